"""Specification tests on partialled data: over-identifying restrictions (Sargan or Hansen J) and the
Durbin–Wu–Hausman endogeneity test in control-function form.

Conventions:

* Sargan (unadjusted covariance): n u'P_Z u / u'u with u = y - X beta the residual of the chosen estimator;
  chi-square with k - p df. On partialled data this equals n R^2 of u on all instruments whenever u is
  orthogonal to the controls, as it is for k-class residuals.
* Hansen J (robust or cluster covariance): two-step efficient GMM on the partialled moments Z'u. Step 1 is
  2SLS; S is the meat sum_i z_i z_i' u_i^2 (or the cluster sum of scores; two-way as in ``sandwich``) without
  small-sample factors; step 2 is GMM with weight S^{-1}; J = (Z'u_2)' S^{-1} (Z'u_2) with the step-1 S.
  The statistic does not depend on the chosen estimator's beta.
* Durbin–Wu–Hausman: regress y on X and the first-stage residuals V = M_Z X and Wald-test the V coefficients
  with the chosen covariance (df = p). Reported as the chi-square Wald statistic and in F form (Wald / p,
  referred to F(p, d) with d = n - 2p - n_partialled, or G - 1 with clusters). Under the unadjusted
  covariance the F form is the Wu–Hausman regression F.

Neither test can establish that an instrument is excluded or exogenous: J/Sargan only compares instruments
with one another, and the endogeneity test presumes valid instruments.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ivdossier.errors import EstimationError
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.crossproducts import (
    CrossProducts,
    build,
    lstsq_coords,
    quad_form_inv,
    solve_psd,
)
from ivdossier.estimation.distributions import chi2_sf
from ivdossier.estimation.strength import (
    Array,
    as_matrix,
    denominator_df_cp,
    f_p_value,
    instrument_basis,
    require_distinct_instruments,
)
from ivdossier.jsonsafe import Record, json_safe


@dataclass(frozen=True)
class OverId(Record):
    """Over-identification test result, or not applicable with a reason when just identified."""

    test: str | None
    statistic: float | None
    df: int | None
    p_value: float | None
    reason: str | None
    cov_kind: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "test": self.test,
            "statistic": json_safe(self.statistic),
            "df": self.df,
            "p_value": json_safe(self.p_value),
            "distribution": None if self.df is None else f"chi2({self.df})",
            "reason": self.reason,
            "cov": self.cov_kind,
            "caution": "a non-rejection cannot establish exclusion or exogeneity: the test only compares "
            "instruments with one another",
        }


def _cp(
    y: np.ndarray, x: np.ndarray, z: np.ndarray, spec: CovSpec, n_partialled: int, nested: int = 0
) -> CrossProducts:
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    cp = build(zm, xm, ym, spec, n_partialled=n_partialled, n_partialled_nested=nested)
    require_distinct_instruments(cp, [f"column {j}" for j in range(cp.k)])
    return cp


def _std_beta(cp: CrossProducts, beta: np.ndarray) -> Array:
    """Coefficients in data units -> standardised units (b_std = b * scale_x / scale_y)."""
    return np.asarray(beta, dtype=np.float64).ravel() * cp.scale[cp.ix] / cp.scale[cp.iy]


def sargan(y: np.ndarray, x: np.ndarray, z: np.ndarray, beta: np.ndarray) -> float:
    """Sargan statistic n u'P_Z u / u'u at the residual u = y - X beta."""
    cp = _cp(y, x, z, CovSpec("homoskedastic"), 0)
    return sargan_from(cp, beta)


def sargan_from(cp: CrossProducts, beta: np.ndarray) -> float:
    """Sargan from the sufficient statistics: n ||u_Z||^2 / ||u||^2 in orthonormal coordinates."""
    u = cp.coords(cp.iy) - cp.coords(cp.ix) @ _std_beta(cp, beta)
    return float(cp.n * (u[: cp.k] @ u[: cp.k]) / (u @ u))


def hansen_j(
    y: np.ndarray, x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int
) -> tuple[float, np.ndarray]:
    """Hansen J from two-step efficient GMM (step-1 2SLS weight); returns (J, two-step GMM coefficients)."""
    if spec.kind == "homoskedastic":
        raise EstimationError("Hansen J needs a robust or cluster covariance; use the Sargan test otherwise.")
    return hansen_j_from(_cp(y, x, z, spec, n_partialled))


def hansen_j_from(cp: CrossProducts) -> tuple[float, np.ndarray]:
    """Two-step GMM on the orthonormal basis (Z'Z = I): step 1 is 2SLS, S the large-sample meat of its
    residual; J = g' S^{-1} g at the step-2 estimate. Basis-invariant, so no pseudo-inverse cut-off is needed;
    a singular S is reported as not computable."""
    k = cp.k
    zx, zy = cp.r[:k, cp.ix], cp.r[:k, cp.iy]
    rx, ry = cp.coords(cp.ix), cp.coords(cp.iy)
    b1 = np.linalg.lstsq(zx, zy, rcond=None)[0]
    s = cp.meat(instrument_basis(cp), ry - rx @ b1, k, small_sample=False)
    w_zx = solve_psd(s, zx, "the moment conditions")
    b2 = np.linalg.solve(zx.T @ w_zx, w_zx.T @ zy)
    g = zy - zx @ b2
    j = quad_form_inv(s, g, "the moment conditions")
    return j, b2 * cp.scale[cp.iy] / cp.scale[cp.ix]


def overid_test(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    beta: np.ndarray,
    spec: CovSpec,
    n_partialled: int,
) -> OverId:
    """Sargan under the unadjusted covariance, Hansen J otherwise; not applicable when just identified."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    if zm.shape[1] <= xm.shape[1]:
        return _just_identified(zm.shape[1], xm.shape[1], spec.kind)
    return overid_from(_cp(y, xm, zm, spec, n_partialled), beta=beta)


def _just_identified(k: int, p: int, kind: str) -> OverId:
    return OverId(
        None,
        None,
        None,
        None,
        f"just identified ({k} instrument(s) for {p} endogenous regressor(s)): there are no "
        "over-identifying restrictions to test",
        kind,
    )


def overid_from(cp: CrossProducts, *, beta: np.ndarray) -> OverId:
    """Over-identification test from the sufficient statistics."""
    k, p = cp.k, cp.p
    if k <= p:
        return _just_identified(k, p, cp.kind)
    df = k - p
    if cp.kind == "homoskedastic":
        stat, name = sargan_from(cp, beta), "sargan"
    else:
        stat, name = hansen_j_from(cp)[0], "hansen_j"
    return OverId(name, stat, df, chi2_sf(stat, df), None, cp.kind)


@dataclass(frozen=True)
class Endogeneity(Record):
    """Durbin–Wu–Hausman test in control-function form with the chosen covariance, and Durbin's form."""

    statistic: float
    df: int
    p_value: float
    f_statistic: float
    f_df: tuple[int, int]
    f_p_value: float
    cov_kind: str
    durbin: float | None = None
    durbin_p_value: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "test": "durbin_wu_hausman_control_function",
            "statistic": json_safe(self.statistic),
            "df": self.df,
            "p_value": json_safe(self.p_value),
            "distribution": f"chi2({self.df})",
            "f_statistic": json_safe(self.f_statistic),
            "f_df": list(self.f_df),
            "f_p_value": json_safe(self.f_p_value),
            "cov": self.cov_kind,
            "null": "the endogenous regressors are exogenous (given valid instruments)",
            "durbin": {
                "statistic": json_safe(self.durbin),
                "df": self.df,
                "distribution": f"chi2({self.df})",
                "p_value": json_safe(self.durbin_p_value),
                "form": "n (e0'P_[Z,X] e0 - e'P_Z e) / e0'e0 with e0 the OLS and e the 2SLS residuals "
                "(Durbin 1954); assumes homoskedastic errors whatever the covariance chosen",
            },
        }


def durbin_wu_hausman(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
) -> Endogeneity:
    """Wald test that the first-stage residuals have zero coefficients in the outcome regression."""
    return endogeneity_from(_cp(y, x, z, spec, n_partialled, n_partialled_nested))


def endogeneity_from(cp: CrossProducts) -> Endogeneity:
    """Control-function Wald test and Durbin's statistic from the sufficient statistics (coordinates)."""
    k, p = cp.k, cp.p
    rx, ry = cp.coords(cp.ix), cp.coords(cp.iy)
    v = rx.copy()
    v[:k] = 0.0
    aug = np.column_stack([rx, v])
    coef, resid = lstsq_coords(aug, ry[:, None])
    cov = cp.covariance(aug, resid, np.linalg.inv(aug.T @ aug), 2 * p)
    stat = quad_form_inv(cov[p:, p:], coef[p:, 0], "the control-function coefficients")
    d = denominator_df_cp(cp, 2 * p)
    f = stat / p
    # Durbin: OLS residual e0, 2SLS residual e (coordinates); projections are leading coordinates
    e0 = lstsq_coords(rx, ry[:, None])[1][:, 0]
    b_iv = np.linalg.lstsq(rx[:k], ry[:k], rcond=None)[0]
    e = ry - rx @ b_iv
    delta = float(e0[: k + p] @ e0[: k + p] - e[:k] @ e[:k])
    durbin = cp.n * delta / float(e0 @ e0)
    return Endogeneity(
        statistic=stat,
        df=p,
        p_value=chi2_sf(stat, p),
        f_statistic=f,
        f_df=(p, d),
        f_p_value=f_p_value(f, p, d),
        cov_kind=cp.kind,
        durbin=durbin,
        durbin_p_value=chi2_sf(durbin, p),
    )
