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

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from ivdossier.errors import EstimationError
from ivdossier.estimation.covariance import CovSpec, sandwich
from ivdossier.estimation.strength import Array, as_matrix, denominator_df, ols, wald
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


def sargan(y: np.ndarray, x: np.ndarray, z: np.ndarray, beta: np.ndarray) -> float:
    """Sargan statistic n u'P_Z u / u'u at the residual u = y - X beta."""
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    u = ym[:, 0] - xm @ np.asarray(beta, dtype=np.float64).ravel()
    coef, _ = ols(zm, u[:, None])
    fitted = zm @ coef[:, 0]
    return float(zm.shape[0] * (fitted @ fitted) / (u @ u))


def _meat(z: Array, u: Array, spec: CovSpec, n_partialled: int) -> Array:
    raw = CovSpec(spec.kind, spec.clusters, small_sample=False)
    return sandwich(z, u, raw, n_partialled=n_partialled, bread=np.eye(z.shape[1]))


def hansen_j(
    y: np.ndarray, x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int
) -> tuple[float, np.ndarray]:
    """Hansen J from two-step efficient GMM (step-1 2SLS weight); returns (J, two-step GMM coefficients)."""
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    if spec.kind == "unadjusted":
        raise EstimationError("Hansen J needs a robust or cluster covariance; use the Sargan test otherwise.")
    zx, zy = zm.T @ xm, zm.T @ ym[:, 0]
    zz_inv = np.linalg.inv(zm.T @ zm)
    b1 = np.linalg.solve(zx.T @ zz_inv @ zx, zx.T @ zz_inv @ zy)
    s = _meat(zm, ym[:, 0] - xm @ b1, spec, n_partialled)
    w = np.linalg.pinv(s)
    b2 = np.linalg.solve(zx.T @ w @ zx, zx.T @ w @ zy)
    g = zm.T @ (ym[:, 0] - xm @ b2)
    return float(g @ w @ g), b2


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
    k, p = zm.shape[1], xm.shape[1]
    if k <= p:
        return OverId(
            None,
            None,
            None,
            None,
            f"just identified ({k} instrument(s) for {p} endogenous regressor(s)): there are no "
            "over-identifying restrictions to test",
            spec.kind,
        )
    df = k - p
    if spec.kind == "unadjusted":
        stat, name = sargan(y, xm, zm, beta), "sargan"
    else:
        stat, name = hansen_j(y, xm, zm, spec=spec, n_partialled=n_partialled)[0], "hansen_j"
    return OverId(name, stat, df, float(stats.chi2.sf(stat, df)), None, spec.kind)


@dataclass(frozen=True)
class Endogeneity(Record):
    """Durbin–Wu–Hausman test in control-function form with the chosen covariance."""

    statistic: float
    df: int
    p_value: float
    f_statistic: float
    f_df: tuple[int, int]
    f_p_value: float
    cov_kind: str

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
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    n, p = xm.shape
    _, v = ols(zm, xm)
    aug = np.column_stack([xm, v])
    coef, resid = ols(aug, ym)
    cov = sandwich(aug, resid, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    stat = wald(coef[p:, 0], cov[p:, p:])
    d = denominator_df(spec, n, 2 * p, n_partialled)
    f = stat / p
    return Endogeneity(
        statistic=stat,
        df=p,
        p_value=float(stats.chi2.sf(stat, p)),
        f_statistic=f,
        f_df=(p, d),
        f_p_value=float(stats.f.sf(f, p, d)) if math.isfinite(f) else 0.0,
        cov_kind=spec.kind,
    )
