"""Balance, zero-first-stage subsample, placebo outcomes and instruments one at a time.

Reference implementations (test-only): statsmodels OLS with HC1/cluster covariances and Wald tests, linearmodels
IV2SLS for just-identified estimates. Data: the invented telehealth scenario, simulated with a seed.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.falsification import balance, per_instrument, placebo_outcomes, zero_first_stage
from ivdossier.estimation.sensitivity import local_to_zero


def simulate(n: int = 1200, seed: int = 21) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    district = rng.integers(0, 25, size=n)
    region = district % 5
    age = rng.normal(50, 12, size=n)
    chronic = rng.binomial(1, 0.3, size=n).astype(float)
    early_fibre = rng.binomial(1, 0.45, size=n).astype(float)  # binary instrument
    clerk = rng.normal(size=n)  # continuous instrument
    income = rng.normal(size=n) + 0.35 * early_fibre  # planted imbalance
    no_device = rng.binomial(1, 0.25, size=n).astype(float)
    v = rng.normal(size=n)
    telehealth = (1 - no_device) * (0.8 * early_fibre + 0.5 * clerk) + 0.01 * age + v
    direct = 0.3 * early_fibre  # a direct effect of the instrument on the outcome (exclusion violated)
    visits = -0.6 * telehealth + direct + 0.02 * age + 0.5 * v + rng.normal(size=n) + 0.2 * region
    last_year_visits = 0.4 * early_fibre + rng.normal(size=n)  # a placebo outcome that should not respond
    return pd.DataFrame(
        {
            "visits": visits,
            "telehealth": telehealth,
            "early_fibre": early_fibre,
            "clerk": clerk,
            "age": age,
            "chronic": chronic,
            "income": income,
            "no_device": no_device,
            "last_year_visits": last_year_visits,
            "district": district,
            "region": region,
        }
    )


@pytest.fixture(scope="module")
def sim() -> pd.DataFrame:
    return simulate()


def test_balance_rows_match_statsmodels_hc1(sim: pd.DataFrame) -> None:
    # Reference: statsmodels OLS of each covariate on [1, instrument, control] with HC1 and t(n - K)
    # inference.
    res = balance(sim, instruments="early_fibre", covariates=["age", "chronic", "income"], controls="clerk")
    for row in res.rows:
        ref = sm.OLS(sim[row.target], sm.add_constant(sim[["early_fibre", "clerk"]])).fit(
            cov_type="HC1", use_t=True
        )
        c = row.coefficients[0]
        assert c.coef == pytest.approx(ref.params["early_fibre"], rel=1e-10)
        assert c.se == pytest.approx(ref.bse["early_fibre"], rel=1e-9)
        assert c.p_value == pytest.approx(ref.pvalues["early_fibre"], rel=1e-7)
        lo, hi = ref.conf_int(alpha=0.05).loc["early_fibre"]
        assert (c.ci_lower, c.ci_upper) == pytest.approx((lo, hi), rel=1e-9)
    income = {r.target: r for r in res.rows}["income"]
    assert income.coefficients[0].p_value < 0.001  # the planted imbalance is found


def test_balance_with_clusters_and_fixed_effects_matches_statsmodels_dummies(sim: pd.DataFrame) -> None:
    # Reference: statsmodels OLS with region dummies, cluster-robust by district (G/(G-1) (n-1)/(n-K) factor).
    res = balance(
        sim, instruments="clerk", covariates=["age"], absorb="region", cluster="district", vcov="clustered"
    )
    design = pd.concat([sim[["clerk"]], pd.get_dummies(sim["region"], prefix="r", dtype=float)], axis=1)
    ref = sm.OLS(sim["age"], design).fit(cov_type="cluster", cov_kwds={"groups": sim["district"]}, use_t=True)
    c = res.rows[0].coefficients[0]
    assert c.coef == pytest.approx(ref.params["clerk"], rel=1e-9)
    assert c.se == pytest.approx(ref.bse["clerk"], rel=1e-8)
    assert c.p_value == pytest.approx(ref.pvalues["clerk"], rel=1e-6)  # t with G - 1 = 24 df in both


def test_joint_test_equals_stacked_regression_wald(sim: pd.DataFrame) -> None:
    # The seemingly-unrelated joint covariance equals the covariance of one stacked regression with
    # equation-specific regressors, clustered on the observation (no small-sample factor on either side).
    # Reference: statsmodels OLS on the stacked data + wald_test.
    covs, inst = ["age", "chronic", "income"], ["early_fibre", "clerk"]
    res = balance(sim, instruments=inst, covariates=covs, small_sample=False)
    n, m = len(sim), len(covs)
    blocks, ys = [], []
    for j, c in enumerate(covs):
        x = np.zeros((n, 3 * m))
        x[:, 3 * j] = 1.0
        x[:, 3 * j + 1 : 3 * j + 3] = sim[inst].to_numpy()
        blocks.append(x)
        ys.append(sim[c].to_numpy())
    fit = sm.OLS(np.concatenate(ys), np.vstack(blocks)).fit(
        cov_type="cluster", cov_kwds={"groups": np.tile(np.arange(n), m), "use_correction": False}
    )
    r = np.zeros((2 * m, 3 * m))
    for j in range(m):
        r[2 * j, 3 * j + 1] = 1.0
        r[2 * j + 1, 3 * j + 2] = 1.0
    ref = fit.wald_test(r, use_f=False, scalar=True)
    assert res.joint.statistic == pytest.approx(float(ref.statistic), rel=1e-8)
    assert res.joint.df == 6
    assert res.joint.p_value == pytest.approx(float(ref.pvalue), rel=1e-6, abs=1e-300)


def test_standardised_differences(sim: pd.DataFrame) -> None:
    res = balance(sim, instruments="early_fibre", covariates=["income"])
    c = res.rows[0].coefficients[0]
    # common practice (e.g. Austin 2009, from memory): (mean1 - mean0) / sqrt((s1^2 + s0^2) / 2)
    g1 = sim.loc[sim["early_fibre"] == 1, "income"]
    g0 = sim.loc[sim["early_fibre"] == 0, "income"]
    assert c.std_diff == pytest.approx(
        (g1.mean() - g0.mean()) / np.sqrt((g1.var() + g0.var()) / 2), rel=1e-12
    )
    assert c.std_diff_kind.startswith("binary")
    cont = balance(sim, instruments="clerk", covariates=["age"]).rows[0].coefficients[0]
    assert cont.std_diff == pytest.approx(cont.coef * sim["clerk"].std() / sim["age"].std(), rel=1e-12)
    assert json.loads(json.dumps(res.to_dict()))["kind"] == "balance"


def test_zero_first_stage_subsample(sim: pd.DataFrame) -> None:
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "early_fibre", "controls": "age"}
    res = zero_first_stage(sim, subsample="no_device", **kw)  # type: ignore[arg-type]
    same = zero_first_stage(sim, query="no_device == 1", **kw)  # type: ignore[arg-type]
    assert res.direct_effect_prior_mean == same.direct_effect_prior_mean and res.n == same.n == int(
        sim["no_device"].sum()
    )
    # Reference: statsmodels OLS (HC1) of the outcome on the instrument and control within the subsample.
    sub = sim[sim["no_device"] == 1]
    ref = sm.OLS(sub["visits"], sm.add_constant(sub[["early_fibre", "age"]])).fit(cov_type="HC1")
    assert res.direct_effect_prior_mean[0] == pytest.approx(ref.params["early_fibre"], rel=1e-10)
    assert res.direct_effect_prior_covariance[0][0] == pytest.approx(
        ref.cov_params().loc["early_fibre", "early_fibre"], rel=1e-9
    )
    # simulation truth: no first stage in the subsample, direct effect 0.3
    assert res.first_stage_p_value > 0.01 and res.warning is None
    rf = res.reduced_form.coefficients[0]
    assert abs(rf.coef - 0.3) < 4 * rf.se
    # the prior plugs into local_to_zero on the analysis sample (devices owned)
    main = sim[sim["no_device"] == 0]
    ltz = local_to_zero(
        main,
        mu=list(res.direct_effect_prior_mean),
        omega=[list(r) for r in res.direct_effect_prior_covariance],
        **kw,
    )  # type: ignore[arg-type]
    assert ltz.lower < ltz.estimate < ltz.upper
    assert ltz.se > ltz.se_2sls
    assert json.loads(json.dumps(res.to_dict()))["kind"] == "zero_first_stage"


def test_zero_first_stage_warns_when_the_subsample_has_a_first_stage(sim: pd.DataFrame) -> None:
    res = zero_first_stage(
        sim, outcome="visits", treatment="telehealth", instruments="early_fibre", query="no_device == 0"
    )
    assert res.warning is not None and "not near zero" in res.warning


def test_placebo_outcome_reduced_form(sim: pd.DataFrame) -> None:
    res = placebo_outcomes(sim, instruments=["early_fibre", "clerk"], outcomes=["last_year_visits"])
    # Reference: statsmodels OLS HC1 and its Wald test of both instrument coefficients (chi-square form).
    ref = sm.OLS(sim["last_year_visits"], sm.add_constant(sim[["early_fibre", "clerk"]])).fit(cov_type="HC1")
    row = res.rows[0]
    assert row.coefficients[0].coef == pytest.approx(ref.params["early_fibre"], rel=1e-10)
    w = ref.wald_test("early_fibre = 0, clerk = 0", use_f=False, scalar=True)
    assert row.wald == pytest.approx(float(w.statistic), rel=1e-9)
    assert res.joint.statistic == pytest.approx(row.wald, rel=1e-12)  # one target: joint = per-target test
    assert row.wald_p_value < 0.001  # the planted response of the placebo outcome is detected


def test_per_instrument_estimates_match_linearmodels(sim: pd.DataFrame) -> None:
    from linearmodels.iv import IV2SLS

    res = per_instrument(
        sim, outcome="visits", treatment="telehealth", instruments=["early_fibre", "clerk"], controls="age"
    )
    frame = sim.assign(const=1.0)
    for row in res.rows:
        # Reference: linearmodels IV2SLS with that instrument alone, robust covariance with debiased=True
        ref = IV2SLS(
            frame["visits"], frame[["const", "age"]], frame["telehealth"], frame[row.instrument]
        ).fit(cov_type="robust", debiased=True)
        assert row.estimate == pytest.approx(ref.params["telehealth"], rel=1e-10)
        assert row.se == pytest.approx(ref.std_errors["telehealth"], rel=1e-8)
    full = IV2SLS(
        frame["visits"], frame[["const", "age"]], frame["telehealth"], frame[["early_fibre", "clerk"]]
    ).fit(cov_type="robust", debiased=True)
    assert res.estimate_all == pytest.approx(full.params["telehealth"], rel=1e-10)
    # the planted direct effect of early_fibre pulls its estimate away from clerk's; the J test sees it
    assert res.overid["p_value"] < 0.05
    assert json.loads(json.dumps(res.to_dict()))["kind"] == "per_instrument"


def test_clear_errors(sim: pd.DataFrame) -> None:
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "early_fibre"}
    with pytest.raises(InvalidInputError, match="selects no rows"):
        zero_first_stage(sim, query="age > 1000", **kw)  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="give exactly one of subsample="):
        zero_first_stage(sim, subsample="no_device", query="age > 0", **kw)  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="must be boolean"):
        zero_first_stage(sim, subsample="age", **kw)  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="could not be evaluated"):
        zero_first_stage(sim, query="age >>> 3", **kw)  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="covariates is empty"):
        balance(sim, instruments="early_fibre", covariates=[])
    with pytest.raises(InvalidInputError, match="Column 'agee' is not in the data"):
        balance(sim, instruments="early_fibre", covariates=["agee"])
    with pytest.raises(InvalidInputError, match="needs at least two"):
        per_instrument(sim, outcome="visits", treatment="telehealth", instruments=["clerk"])
    with pytest.raises(InvalidInputError, match="vcov='clustered' needs cluster="):
        placebo_outcomes(sim, instruments="clerk", outcomes=["age"], vcov="clustered")
    with pytest.raises(EstimationError, match="'early_fibre' is constant"):
        balance(sim.assign(early_fibre=1.0), instruments="early_fibre", covariates=["age"])


def test_a_zero_first_stage_result_stored_under_the_old_field_names_still_loads() -> None:
    """Runs stored before the rename carry prior_mu / prior_omega; they load under the new names (one release)."""
    import warnings

    from ivdossier.estimation.falsification import ZeroFirstStageResult
    from ivdossier.jsonsafe import load_record

    rng = np.random.default_rng(4)
    n = 400
    z, u = rng.normal(size=n), rng.normal(size=n)
    sub = rng.random(n) < 0.5
    d = np.where(sub, 0.0, z + u)
    frame = pd.DataFrame({"y": 0.1 * z + d + u, "d": d, "z": z, "sub": sub})
    res = zero_first_stage(frame, outcome="y", treatment="d", instruments="z", subsample="sub")
    stored = res.to_record()
    old = {("prior_mu" if k == "direct_effect_prior_mean" else k): v for k, v in stored.items()}
    old = {("prior_omega" if k == "direct_effect_prior_covariance" else k): v for k, v in old.items()}
    assert "prior_mu" in old and "direct_effect_prior_mean" not in old
    loaded = load_record(old)
    assert isinstance(loaded, ZeroFirstStageResult)
    assert (
        loaded.to_record() == stored
    )  # compared in stored form: NaN fields (t of a zero SE) are not == themselves
    assert set(res.to_dict()) >= {"direct_effect_prior_mean", "direct_effect_prior_covariance"}
    assert not {"prior_mu", "prior_omega"} & set(res.to_dict())
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert res.prior_mu == res.direct_effect_prior_mean
        assert res.prior_omega == res.direct_effect_prior_covariance
    assert [str(w.message) for w in caught] == [
        "prior_mu is deprecated; use direct_effect_prior_mean.",
        "prior_omega is deprecated; use direct_effect_prior_covariance.",
    ]
