"""Complier shares, kappa-weighted complier means and the testable-implications check.

Simulation: known type shares (always-takers 0.2, compliers 0.5, never-takers 0.3), a randomly assigned binary
instrument and a covariate whose mean differs by type, so the truth is known.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.compliers import check_testable_implications, complier_means, complier_shares

TRUE_SHARES = {"always_taker": 0.2, "complier": 0.5, "never_taker": 0.3}
TRUE_MEANS = {"always_taker": 1.0, "complier": 2.0, "never_taker": -1.0}


def simulate(n: int = 20_000, seed: int = 7, exclusion_shift: float = 0.0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    kind = rng.choice(3, size=n, p=[0.2, 0.5, 0.3])  # 0 always-taker, 1 complier, 2 never-taker
    z = rng.binomial(1, 0.4, size=n).astype(float)
    d = np.where(kind == 0, 1.0, np.where(kind == 1, z, 0.0))
    w = np.array([1.0, 2.0, -1.0])[kind] + rng.normal(size=n)
    y = 0.5 * w + 1.0 * d + exclusion_shift * z + rng.normal(size=n)
    clinic = rng.integers(0, 400, size=n)
    return pd.DataFrame({"y": y, "d": d, "z": z, "w": w, "clinic": clinic})


@pytest.fixture(scope="module")
def sim() -> pd.DataFrame:
    return simulate()


def test_shares_recover_known_truth(sim: pd.DataFrame) -> None:
    res = complier_shares(sim, treatment="d", instrument="z")
    for name, truth in TRUE_SHARES.items():
        est = getattr(res, name)
        se = getattr(res, f"{name}_se")
        # simulation truth; 4 SEs leaves a ~1e-4 chance of a false alarm for a fresh seed
        assert abs(est - truth) < 4 * se, name
    assert res.complier + res.always_taker + res.never_taker == pytest.approx(1.0, abs=1e-12)
    assert res.se_method == "delta"


def test_complier_share_is_first_stage_difference_with_robust_se(sim: pd.DataFrame) -> None:
    # Angrist, Imbens and Rubin (1996): under monotonicity the complier share is the first-stage
    # coefficient of D on a binary Z. Reference: statsmodels OLS; its HC0 SE equals the two-sample binomial
    # delta-method SE (common practice: OLS on a single dummy reproduces the two-group variances under HC0).
    fit = sm.OLS(sim["d"], sm.add_constant(sim["z"])).fit(cov_type="HC0")
    res = complier_shares(sim, treatment="d", instrument="z")
    assert res.complier == pytest.approx(fit.params["z"], rel=1e-12)
    assert res.complier_se == pytest.approx(fit.bse["z"], rel=1e-10)
    assert res.always_taker == pytest.approx(fit.params["const"], rel=1e-12)


def test_cluster_bootstrap_shares_are_seeded(sim: pd.DataFrame) -> None:
    a = complier_shares(sim, treatment="d", instrument="z", cluster="clinic", n_boot=200, seed=3)
    b = complier_shares(sim, treatment="d", instrument="z", cluster="clinic", n_boot=200, seed=3)
    assert a == b
    assert a.se_method == "cluster bootstrap"
    # clusters are unrelated to types, so the bootstrap SE should be near the delta SE (simulation design)
    delta = complier_shares(sim, treatment="d", instrument="z")
    assert a.complier_se == pytest.approx(delta.complier_se, rel=0.25)
    assert a.to_dict()["shares"]["complier"]["ci"][0] < a.complier


def test_kappa_means_recover_type_means(sim: pd.DataFrame) -> None:
    res = complier_means(sim, treatment="d", instrument="z", covariates=["w"], n_boot=200, seed=1)
    prof = res.profiles[0]
    # simulation truth: complier mean 2.0; always-takers 1.0 and never-takers -1.0
    assert abs(prof.complier_mean - TRUE_MEANS["complier"]) < 4 * prof.complier_mean_se
    assert prof.always_taker_mean == pytest.approx(TRUE_MEANS["always_taker"], abs=0.06)
    assert prof.never_taker_mean == pytest.approx(TRUE_MEANS["never_taker"], abs=0.05)
    # Abadie (2003): E[kappa] = P(complier); with the sample share as propensity the sample mean of kappa is
    # exactly the first-stage difference in treatment rates (algebraic identity).
    shares = complier_shares(sim, treatment="d", instrument="z")
    assert res.complier_share_kappa == pytest.approx(shares.complier, rel=1e-12)


def test_kappa_mean_agrees_with_iv_of_wd_on_d(sim: pd.DataFrame) -> None:
    # A second consistent estimator of the complier mean (Abadie 2003; Angrist and Pischke 2009, sec. 4.4.4,
    # from memory): 2SLS of W*D on D instrumented by Z. Reference implementation: linearmodels IV2SLS.
    from linearmodels.iv import IV2SLS

    frame = sim.assign(wd=sim["w"] * sim["d"], const=1.0)
    ref = IV2SLS(frame["wd"], frame[["const"]], frame["d"], frame["z"]).fit(cov_type="robust")
    res = complier_means(sim, treatment="d", instrument="z", covariates=["w"], n_boot=100, seed=2)
    assert res.profiles[0].complier_mean == pytest.approx(ref.params["d"], abs=3 * ref.std_errors["d"])


def test_kappa_with_logit_propensity_matches_share_version_when_z_is_random(sim: pd.DataFrame) -> None:
    # Z is randomly assigned in the simulation, so conditioning the propensity on W changes little
    # (simulation design); both stay near the truth.
    part = sim.iloc[:6000]
    res = complier_means(
        part, treatment="d", instrument="z", covariates=["w"], propensity_covariates=["w"], n_boot=50, seed=4
    )
    assert res.propensity.startswith("logit")
    assert abs(res.profiles[0].complier_mean - TRUE_MEANS["complier"]) < 4 * res.profiles[0].complier_mean_se


def test_implication_check_passes_a_valid_design(sim: pd.DataFrame) -> None:
    res = check_testable_implications(sim, outcome="y", treatment="d", instrument="z", bins=6, n_boot=300)
    # valid simulated design (independence, exclusion and monotonicity hold by construction)
    assert res.p_value > 0.05
    assert res.n_intervals == 2 * 6 * 7 // 2


def test_implication_check_flags_a_direct_effect_of_z() -> None:
    # a direct effect of Z on Y shifts always- and never-takers' outcomes across Z groups, which forces
    # negative implied complier densities in the tails (Kitagawa 2015, the implication tested; simulation
    # design)
    bad = simulate(n=8_000, seed=11, exclusion_shift=2.0)
    res = check_testable_implications(bad, outcome="y", treatment="d", instrument="z", bins=8, n_boot=300)
    assert res.violated
    assert res.p_value < 0.01
    assert res.to_dict()["most_negative"]["density"] < 0


def test_implication_check_uses_one_bin_per_value_for_discrete_outcomes(sim: pd.DataFrame) -> None:
    frame = sim.assign(visits=np.clip(np.round(sim["y"]), -1, 3))
    res = check_testable_implications(
        frame, outcome="visits", treatment="d", instrument="z", bins=6, n_boot=60
    )
    assert len(res.bin_edges) - 1 == 5  # values -1, 0, 1, 2, 3


def test_non_binary_instrument_is_rejected(sim: pd.DataFrame) -> None:
    frame = sim.assign(dist=np.linspace(0, 5, len(sim)))
    with pytest.raises(InvalidInputError, match="instrument column 'dist' must be binary"):
        complier_shares(frame, treatment="d", instrument="dist")
    with pytest.raises(InvalidInputError, match="must be binary"):
        complier_means(frame, treatment="d", instrument="dist", covariates=["w"])


def test_missing_column_and_missing_values_are_named(sim: pd.DataFrame) -> None:
    with pytest.raises(InvalidInputError, match="'nope' is not in the data"):
        complier_shares(sim, treatment="nope", instrument="z")
    frame = sim.copy()
    frame.loc[3, "w"] = np.nan
    with pytest.raises(InvalidInputError, match="'w' has 1 missing"):
        complier_means(frame, treatment="d", instrument="z", covariates=["w"])
    with pytest.raises(InvalidInputError, match="covariates is empty"):
        complier_means(sim, treatment="d", instrument="z", covariates=[])


def test_constant_instrument_is_rejected(sim: pd.DataFrame) -> None:
    with pytest.raises(InvalidInputError, match="takes only the value 1"):
        complier_shares(sim.assign(z=1.0), treatment="d", instrument="z")


def test_to_dict_is_strict_json_even_without_always_takers() -> None:
    # one-sided non-compliance: nobody is treated when Z = 0, so always-taker means are undefined (None)
    import json

    rng = np.random.default_rng(9)
    n = 3000
    z = rng.binomial(1, 0.5, size=n).astype(float)
    complier = rng.binomial(1, 0.6, size=n).astype(float)
    frame = pd.DataFrame({"d": z * complier, "z": z, "w": rng.normal(size=n) + complier})
    res = complier_means(frame, treatment="d", instrument="z", covariates=["w"], n_boot=50)
    out = json.loads(json.dumps(res.to_dict(), allow_nan=False))
    assert out["profiles"][0]["always_taker_mean"] is None
    shares = complier_shares(frame, treatment="d", instrument="z")
    assert shares.always_taker == 0.0 and shares.always_taker_se == 0.0
    json.dumps(shares.to_dict(), allow_nan=False)
    check = check_testable_implications(frame, outcome="w", treatment="d", instrument="z", n_boot=50)
    json.dumps(check.to_dict(), allow_nan=False)
