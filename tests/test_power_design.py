"""Power, MDE and sample size for a planned 2SLS design, and the expected first stage."""

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.power import NormalIndPower, TTestIndPower

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.covariance import CovSpec, sandwich
from ivdossier.estimation.estimators import fit_kclass
from ivdossier.estimation.power import (
    expected_first_stage,
    iv_design,
    mde_2sls,
    n_for_power,
    power_2sls,
    power_analysis,
    se_2sls,
)


def test_perfect_first_stage_equals_two_sample_normal_power() -> None:
    # With X = Z, a balanced binary assignment (R2 = 1, Var(X) = 1/4), the 2SLS test is the two-sample
    # comparison of means, so the formula must reproduce the standard two-sample power formula
    # (common practice; reference: statsmodels NormalIndPower with nobs1 = N/2, ratio 1).
    design = iv_design(n=300, partial_r2=1.0, residual_sd=2.0, treatment_sd=0.5)
    for effect in (0.2, 0.5, 0.9):
        ref = NormalIndPower().power(effect_size=effect / 2.0, nobs1=150, alpha=0.05, ratio=1.0)
        assert power_2sls(design, effect) == pytest.approx(ref, rel=1e-10)
    # the t-based version differs only by the t vs normal quantile at this N (statsmodels TTestIndPower)
    ref_t = TTestIndPower().power(effect_size=0.25, nobs1=150, alpha=0.05, ratio=1.0)
    assert power_2sls(design, 0.5) == pytest.approx(ref_t, abs=0.005)
    # and the MDE / N inversions match statsmodels' solve_power (same reference)
    d = NormalIndPower().solve_power(effect_size=None, nobs1=150, alpha=0.05, power=0.8, ratio=1.0)
    assert mde_2sls(design, power=0.8) == pytest.approx(d * 2.0, rel=1e-6)
    n1 = NormalIndPower().solve_power(effect_size=0.3, nobs1=None, alpha=0.05, power=0.9, ratio=1.0)
    assert n_for_power(design, 0.6, power=0.9) == math.ceil(2 * n1 - 1e-9)


def test_se_formula_pieces() -> None:
    # Var(beta) = DEFF sigma_u^2 / (N R2 Var(X)) (formula stated in the module; common practice)
    design = iv_design(n=1000, partial_r2=0.05, residual_sd=3.0, treatment_sd=0.5, cluster_size=11, icc=0.1)
    assert design.design_effect == pytest.approx(2.0)
    assert se_2sls(design) == pytest.approx(math.sqrt(2.0 * 9.0 / (1000 * 0.05 * 0.25)))


def test_mde_and_required_n_are_consistent_inversions() -> None:
    design = iv_design(n=800, partial_r2=0.08, outcome_sd=1.5, treatment_sd=0.4, alpha=0.01)
    mde = mde_2sls(design, power=0.9)
    assert power_2sls(design, mde) == pytest.approx(0.9, abs=1e-9)
    assert power_2sls(design, -mde) == pytest.approx(0.9, abs=1e-9)  # two-sided
    need = n_for_power(design, 0.5, power=0.8)
    same = {"partial_r2": 0.08, "outcome_sd": 1.5, "treatment_sd": 0.4, "alpha": 0.01}
    assert power_2sls(iv_design(n=need, **same), 0.5) >= 0.8
    assert power_2sls(iv_design(n=need - 1, **same), 0.5) < 0.8


def test_plug_in_f_matches_statsmodels_first_stage_f() -> None:
    # Identity F = (R2/k) / ((1 - R2)/(N - k - c - 1)) for the test of the excluded instruments, checked
    # against statsmodels' F-test of the instruments in an OLS first stage with controls (reference:
    # statsmodels).
    rng = np.random.default_rng(5)
    n = 250
    w = rng.normal(size=(n, 2))
    z = rng.normal(size=(n, 3)) + 0.3 * w[:, :1]
    x = z @ np.array([0.3, 0.1, -0.2]) + w @ np.array([0.5, 0.5]) + rng.normal(size=n)
    full = sm.OLS(x, sm.add_constant(np.column_stack([z, w]))).fit()
    short = sm.OLS(x, sm.add_constant(w)).fit()
    r2_partial = (short.ssr - full.ssr) / short.ssr
    f_ref = full.f_test(np.eye(6)[1:4]).fvalue
    design = iv_design(n=n, partial_r2=r2_partial, residual_sd=1.0,
                        treatment_sd=1.0, n_instruments=3, n_controls=2)  # fmt: skip
    assert expected_first_stage(design).plug_in_f == pytest.approx(float(np.squeeze(f_ref)), rel=1e-10)


def test_first_stage_f_input_round_trips_to_expected_f() -> None:
    design = iv_design(n=500, first_stage_f=20.0, residual_sd=1.0, treatment_sd=1.0, n_instruments=2)
    # mean of the noncentral F (Johnson, Kotz and Balakrishnan; checked with scipy.stats.ncf.mean)
    from scipy import stats

    outlook = expected_first_stage(design)
    assert outlook.expected_f == pytest.approx(20.0, rel=1e-10)
    assert stats.ncf.mean(2, design.df2, outlook.noncentrality) == pytest.approx(20.0, rel=1e-10)


def test_first_stage_f_input_round_trips_with_clusters() -> None:
    # the given F is read as the expected F of the (cluster-robust) test the plan will use (module docstring)
    design = iv_design(n=1200, first_stage_f=15.0, residual_sd=1.0, treatment_sd=1.0, cluster_size=8, icc=0.1)
    assert expected_first_stage(design).expected_f == pytest.approx(15.0, rel=1e-10)
    analysis = power_analysis(design, effect=0.2)
    assert analysis.n_required is not None and analysis.clusters_required is not None
    assert analysis.clusters_required * 8 >= analysis.n_required > (analysis.clusters_required - 1) * 8


def test_outlook_uses_published_critical_values() -> None:
    design = iv_design(n=400, partial_r2=0.05, residual_sd=1.0, treatment_sd=1.0)
    outlook = expected_first_stage(design)
    values = {label: c for label, c, _p, _s in outlook.critical_values}
    # Stock and Yogo (2005) Table 5.2, K2 = 1, 10 % maximal size: 16.38
    assert values["Stock–Yogo 2SLS 10 % maximal size"] == pytest.approx(16.38)
    # Montiel Olea and Pflueger (2013), just identified, tau = 10 %: 23.109 (REFERENCE_VALUES, computed)
    assert values["MOP effective F, tau = 10%"] == pytest.approx(23.109, abs=2e-3)
    probs = [p for _l, _c, p, _s in outlook.critical_values]
    assert all(p is not None and 0.0 < p < 1.0 for p in probs)
    # expected F about 1 + N R2 / (k (1 - R2)) = 22.05 (module docstring); the tF value applies at that F
    assert outlook.expected_f == pytest.approx(1 + 400 * 0.05 / 0.95, rel=0.01)
    assert 2.4 < outlook.tf_critical_value_at_expected_f < 2.7  # Lee et al. (2022) Table 3 near F = 20-25
    d = power_analysis(design, effect=0.3).to_dict()
    assert d["first_stage"]["critical_values"][0]["critical_value"] == pytest.approx(16.38)
    assert d["n_required"] is not None and d["power"] is not None


def _simulate_power(
    *, n_clusters: int, m: int, r2: float, icc: float, beta: float, reps: int, seed: int
) -> float:
    """Share of replications in which the two-sided 5 % 2SLS t-test rejects beta = 0."""
    rng = np.random.default_rng(seed)
    n = n_clusters * m
    codes = np.repeat(np.arange(n_clusters), m)
    pi = math.sqrt(r2)
    rejections = 0
    for _ in range(reps):
        z = rng.normal(size=n_clusters)[codes] if m > 1 else rng.normal(size=n)
        v = rng.normal(size=n) * math.sqrt(1 - r2)
        e = 0.5 * v / math.sqrt(1 - r2) + math.sqrt(0.75) * rng.normal(size=n)
        u = math.sqrt(icc) * rng.normal(size=n_clusters)[codes] + math.sqrt(1 - icc) * e
        x = pi * z + v
        y = beta * x + u
        zc, xc, yc = z - z.mean(), x - x.mean(), y - y.mean()
        fit = fit_kclass(yc, xc, zc, method="2sls", n_partialled=1)
        spec = CovSpec("clustered", (codes,)) if m > 1 else CovSpec("heteroskedastic")
        cov = sandwich(fit.score_regressors, fit.resid, spec, n_partialled=1, bread=fit.bread)
        rejections += abs(fit.beta[0] / math.sqrt(cov[0, 0])) > 1.959964
    return rejections / reps


@pytest.mark.slow
def test_monte_carlo_power_matches_formula_without_clusters() -> None:
    # Seeded Monte Carlo (project simulation): 2000 replications, MC SE about 0.011; tolerance 0.04.
    design = iv_design(n=400, partial_r2=0.15, residual_sd=1.0, treatment_sd=1.0)
    expected = power_2sls(design, 0.3)
    assert 0.4 < expected < 0.8
    empirical = _simulate_power(n_clusters=400, m=1, r2=0.15, icc=0.0, beta=0.3, reps=2000, seed=1)
    assert empirical == pytest.approx(expected, abs=0.04)


@pytest.mark.slow
def test_monte_carlo_power_matches_formula_with_clusters() -> None:
    # Instrument assigned per cluster, error ICC 0.3, m = 6: DEFF = 1 + 5 * 0.3 = 2.5 (Kish design effect,
    # common practice). 1500 replications, MC SE about 0.013; tolerance 0.045.
    design = iv_design(n=900, partial_r2=0.15, residual_sd=1.0, treatment_sd=1.0, cluster_size=6, icc=0.3)
    beta = 0.3
    expected = power_2sls(design, beta)
    assert 0.35 < expected < 0.8
    no_deff = power_2sls(iv_design(n=900, partial_r2=0.15, residual_sd=1.0, treatment_sd=1.0), beta)
    empirical = _simulate_power(n_clusters=150, m=6, r2=0.15, icc=0.3, beta=beta, reps=1500, seed=2)
    assert empirical == pytest.approx(expected, abs=0.045)
    assert abs(empirical - no_deff) > 0.15  # ignoring the clustering would be clearly wrong


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"n": 100, "partial_r2": 0.1, "first_stage_f": 10.0, "residual_sd": 1.0}, "exactly one of partial"),
        ({"n": 100, "residual_sd": 1.0}, "exactly one of partial_r2"),
        ({"n": 100, "partial_r2": 1.5, "residual_sd": 1.0}, "partial_r2 must lie in"),
        ({"n": 100, "partial_r2": 0.1}, "exactly one of residual_sd"),
        ({"n": 100, "partial_r2": 0.1, "residual_sd": 1.0, "icc": 1.2}, "icc must lie in"),
        ({"n": 100, "partial_r2": 0.1, "residual_sd": 1.0, "cluster_size": 0.5}, "cluster_size must be"),
        ({"n": 100, "first_stage_f": 0.9, "residual_sd": 1.0}, "mean F with an irrelevant instrument"),
        ({"n": 4, "partial_r2": 0.1, "residual_sd": 1.0}, "fewer than 3 residual degrees"),
        ({"n": 100, "partial_r2": 0.1, "residual_sd": 1.0, "alpha": 1.0}, "alpha must lie strictly"),
    ],
)
def test_bad_design_inputs_are_named(kwargs: dict[str, float], message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        iv_design(**kwargs)  # type: ignore[arg-type]


def test_bad_power_targets_are_named() -> None:
    design = iv_design(n=100, partial_r2=0.1, residual_sd=1.0, treatment_sd=1.0)
    with pytest.raises(InvalidInputError, match="target power must lie in"):
        mde_2sls(design, power=0.01)
    with pytest.raises(InvalidInputError, match="effect must be non-zero"):
        n_for_power(design, 0.0)


def test_to_dict_is_strict_json_with_a_perfect_first_stage() -> None:
    import json

    design = iv_design(n=300, partial_r2=1.0, residual_sd=2.0, treatment_sd=0.5)
    out = json.loads(json.dumps(power_analysis(design, effect=0.5).to_dict(), allow_nan=False))
    assert out["first_stage"]["plug_in_f"] == "inf"  # no first-stage noise at all
    assert out["first_stage"]["critical_values"][0]["probability_exceeded"] == 1.0
