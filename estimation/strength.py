"""Instrument-strength statistics on partialled data: first-stage F (conventional and robust), partial R^2,
effective F (Montiel Olea–Pflueger 2013), Cragg–Donald F, Kleibergen–Paap rk Wald F and Sanderson–Windmeijer
conditional F.

Every array is already partialled on the controls and absorbed fixed effects (Frisch–Waugh–Lovell) and scaled
by sqrt(weights); ``n_partialled`` counts the columns removed, so residual degrees of freedom are
n - k - n_partialled. Every covariance comes from :func:`ivdossier.estimation.covariance.sandwich`.

Conventions (stated here once):

* F-form Wald statistics are Wald / q with q restrictions; their p-values use F(q, d) with
  d = n - k - n_partialled for the unadjusted and robust covariances and d = G - 1 (G the smallest number of
  clusters) for cluster covariances (common practice).
* Effective F (Montiel Olea and Pflueger 2013) uses V_pi from ``sandwich`` with its small-sample factors, so
  with one instrument it equals the robust first-stage F exactly; its critical values come from the
  simplified conservative procedure with K_eff computed from S = (Z'Z)^{1/2} V_pi (Z'Z)^{1/2} and refer to the
  2SLS Nagar-bias benchmark.
* Cragg–Donald F is the smallest eigenvalue of Sigma^{-1/2} X'P_Z X Sigma^{-1/2} / k with
  Sigma = X'M_Z X / (n - k - n_partialled) (Stock and Yogo 2005).
* Kleibergen–Paap rk Wald F is the rk Wald statistic for rank p - 1 (Kleibergen and Paap 2006) divided by k,
  with Theta = (Z'Z)^{1/2} Pi Sigma^{-1/2} and the covariance of vec(Pi) from ``sandwich`` (so the HC1/CR1
  small-sample factors of that module apply). Under the unadjusted covariance it equals Cragg–Donald F
  exactly; with one endogenous regressor it equals the robust first-stage F.
* Sanderson–Windmeijer conditional F for regressor j: eps_j = x_j - X_{-j} delta_j with delta_j the 2SLS
  coefficients of x_j on the other endogenous regressors; F_j = Wald(Z coefficients of eps_j on Z) /
  (k - p + 1) with the chosen covariance; under the unadjusted covariance this is
  [eps'P_Z eps / (k - p + 1)] / [eps'M_Z eps / (n - k - n_partialled)] (Sanderson and Windmeijer 2016).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.covariance import CovSpec, sandwich
from ivdossier.estimation.critical_values import (
    MOP_SOURCE,
    MOP_TAUS,
    StockYogoValue,
    mop_critical_value,
    mop_k_eff,
    stock_yogo_applicable,
)
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]


def as_matrix(a: np.ndarray, name: str) -> Array:
    """Return a float (n, m) matrix from a 1-D or 2-D array; reject NaN/inf with a message naming ``name``."""
    arr = np.asarray(a, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise InvalidInputError(f"{name} must be a 1-D or 2-D array, got {arr.ndim} dimensions.")
    if not np.all(np.isfinite(arr)):
        raise InvalidInputError(f"{name} contains NaN or infinite values; drop or impute those rows first.")
    return arr


def ols(regressors: Array, dependent: Array) -> tuple[Array, Array]:
    """Least-squares coefficients (k x m) and residuals (n x m) of each column of ``dependent``."""
    coef = np.asarray(np.linalg.lstsq(regressors, dependent, rcond=None)[0], dtype=np.float64)
    return coef, dependent - regressors @ coef


def denominator_df(spec: CovSpec, n: int, k: int, n_partialled: int) -> int:
    """Denominator df for F-form p-values: n - k - n_partialled, or G - 1 for cluster covariances."""
    if spec.kind == "cluster":
        return max(min(spec.n_clusters()) - 1, 1)
    return max(n - k - n_partialled, 1)


def wald(coef: Array, cov: Array) -> float:
    """Wald statistic coef' cov^{-1} coef (pseudo-inverse guarded against an ill-conditioned cov)."""
    c = np.asarray(coef, dtype=np.float64).ravel()
    try:
        return float(c @ np.linalg.solve(cov, c))
    except np.linalg.LinAlgError:
        return float(c @ np.linalg.pinv(cov) @ c)


def f_p_value(f: float, q: int, d: int) -> float:
    """Upper-tail p-value of an F(q, d) statistic."""
    return float(stats.f.sf(f, q, d)) if math.isfinite(f) else 0.0


def _sym_sqrt(m: Array, *, inverse: bool = False) -> Array:
    vals, vecs = np.linalg.eigh((m + m.T) / 2)
    if vals.min() <= 0:
        raise EstimationError(
            "A covariance or cross-product matrix is singular in the strength statistics; "
            "drop collinear instruments or endogenous regressors."
        )
    power = -0.5 if inverse else 0.5
    return (vecs * vals**power) @ vecs.T


def _check_shapes(x: Array, z: Array) -> None:
    n, k = z.shape
    if x.shape[0] != n:
        raise InvalidInputError(
            f"X has {x.shape[0]} rows but Z has {n}; pass the endogenous regressors and instruments "
            "for the same rows."
        )
    if k < x.shape[1]:
        raise EstimationError(
            f"{k} excluded instrument(s) for {x.shape[1]} endogenous regressor(s): the model is "
            "under-identified; add instruments or drop endogenous regressors."
        )


@dataclass(frozen=True)
class FirstStageRow(Record):
    """First-stage regression of one endogenous regressor on the excluded instruments."""

    endog: str
    coefficients: dict[str, float]
    std_errors: dict[str, float]
    partial_f: float
    partial_f_p_value: float
    robust_f: float
    robust_f_p_value: float
    f_df: tuple[int, int]
    robust_f_df: tuple[int, int]
    partial_r2: float
    cov_kind: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "endog": self.endog,
            "coefficients": json_safe(self.coefficients),
            "std_errors": json_safe(self.std_errors),
            "partial_f": json_safe(self.partial_f),
            "partial_f_df": list(self.f_df),
            "partial_f_p_value": json_safe(self.partial_f_p_value),
            "partial_f_cov": "unadjusted",
            "robust_f": json_safe(self.robust_f),
            "robust_f_df": list(self.robust_f_df),
            "robust_f_p_value": json_safe(self.robust_f_p_value),
            "robust_f_cov": self.cov_kind,
            "partial_r2": json_safe(self.partial_r2),
        }


@dataclass(frozen=True)
class FirstStageSection(Record):
    """First-stage results, one row per endogenous regressor."""

    rows: tuple[FirstStageRow, ...]

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict keyed by endogenous regressor name."""
        return {"by_endog": {r.endog: r.to_dict() for r in self.rows}}


def first_stage(
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    endog_names: list[str],
    instrument_names: list[str],
) -> FirstStageSection:
    """First-stage coefficients and SEs (chosen covariance), conventional partial F, robust F, partial R^2."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    _check_shapes(xm, zm)
    n, k = zm.shape
    p = xm.shape[1]
    if len(endog_names) != p or len(instrument_names) != k:
        raise InvalidInputError(
            f"Got {len(endog_names)} endogenous and {len(instrument_names)} instrument names for {p} and {k} "
            "columns; pass one name per column."
        )
    pi, v = ols(zm, xm)
    cov = sandwich(zm, v, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    cov_u = sandwich(zm, v, CovSpec("unadjusted"), n_partialled=n_partialled)
    df_u = n - k - n_partialled
    df_r = denominator_df(spec, n, k, n_partialled)
    rows = []
    for j in range(p):
        block = slice(j * k, (j + 1) * k)
        vj, vj_u = cov[block, block], cov_u[block, block]
        f_u = wald(pi[:, j], vj_u) / k
        f_r = wald(pi[:, j], vj) / k
        tss = float(xm[:, j] @ xm[:, j])
        r2 = 1.0 - float(v[:, j] @ v[:, j]) / tss if tss > 0 else float("nan")
        rows.append(
            FirstStageRow(
                endog=endog_names[j],
                coefficients={nm: float(pi[i, j]) for i, nm in enumerate(instrument_names)},
                std_errors={
                    nm: float(math.sqrt(max(vj[i, i], 0.0))) for i, nm in enumerate(instrument_names)
                },
                partial_f=f_u,
                partial_f_p_value=f_p_value(f_u, k, df_u),
                robust_f=f_r,
                robust_f_p_value=f_p_value(f_r, k, df_r),
                f_df=(k, df_u),
                robust_f_df=(k, df_r),
                partial_r2=r2,
                cov_kind=spec.kind,
            )
        )
    return FirstStageSection(tuple(rows))


@dataclass(frozen=True)
class EffectiveF(Record):
    """Montiel Olea–Pflueger effective F with its simplified-procedure critical values."""

    statistic: float
    k_eff: dict[float, float]
    critical_values: dict[float, float]
    level: float = 0.05

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict; thresholds tau keyed as percent strings."""
        return {
            "statistic": json_safe(self.statistic),
            "critical_values": {
                f"tau_{round(t * 100)}pct": json_safe(c) for t, c in self.critical_values.items()
            },
            "k_eff": {f"tau_{round(t * 100)}pct": json_safe(c) for t, c in self.k_eff.items()},
            "test_level": self.level,
            "benchmark": "2SLS Nagar bias relative to a worst-case benchmark "
            "(simplified conservative procedure)",
            "source": MOP_SOURCE,
        }


def effective_f(
    x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int, n_partialled_nested: int = 0
) -> EffectiveF:
    """Effective F = pi'(Z'Z)pi / tr(V_pi Z'Z) for one endogenous regressor, with MOP critical values.

    K_eff is computed from S = (Z'Z)^{1/2} V_pi (Z'Z)^{1/2}, the covariance of the normalised first-stage
    moments (up to a scale that K_eff ignores).
    """
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    _check_shapes(xm, zm)
    if xm.shape[1] != 1:
        raise EstimationError(
            "The effective F is defined for one endogenous regressor; pass a single column."
        )
    pi, v = ols(zm, xm)
    v_pi = sandwich(zm, v, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    zz = zm.T @ zm
    root = _sym_sqrt(zz)
    s = root @ v_pi @ root
    stat = float(pi[:, 0] @ zz @ pi[:, 0]) / float(np.trace(s))
    k_eff = {tau: mop_k_eff(s, tau) for tau in MOP_TAUS}
    crit = {tau: mop_critical_value(k_eff[tau], tau) for tau in MOP_TAUS}
    return EffectiveF(stat, k_eff, crit)


def cragg_donald_f(x: np.ndarray, z: np.ndarray, *, n_partialled: int) -> float:
    """Cragg–Donald F: smallest eigenvalue of Sigma^{-1/2} X'P_Z X Sigma^{-1/2} / k (Stock and Yogo 2005)."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    _check_shapes(xm, zm)
    n, k = zm.shape
    pi, v = ols(zm, xm)
    sigma = v.T @ v / (n - k - n_partialled)
    isq = _sym_sqrt(sigma, inverse=True)
    fitted = zm @ pi
    g = isq @ (fitted.T @ fitted) @ isq / k
    return float(np.linalg.eigvalsh((g + g.T) / 2).min())


@dataclass(frozen=True)
class RankTest(Record):
    """Kleibergen–Paap rk Wald test that the first-stage matrix has rank p - 1, and its F form."""

    statistic: float
    df: int
    p_value: float
    f_form: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "rk_wald": json_safe(self.statistic),
            "df": self.df,
            "p_value": json_safe(self.p_value),
            "f_form": json_safe(self.f_form),
            "f_form_note": "rk Wald / K2 with the covariance's own small-sample factors; "
            "equals Cragg–Donald F under the unadjusted covariance",
        }


def kleibergen_paap_rk(
    x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int, n_partialled_nested: int = 0
) -> RankTest:
    """Kleibergen–Paap (2006) rk Wald statistic for H0: rank(Pi) = p - 1, chi-square with k - p + 1 df."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    _check_shapes(xm, zm)
    n, k = zm.shape
    p = xm.shape[1]
    pi, v = ols(zm, xm)
    v_pi = sandwich(zm, v, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    sigma = v.T @ v / (n - k - n_partialled)
    g = _sym_sqrt(zm.T @ zm)
    f = _sym_sqrt(sigma, inverse=True)
    theta = g @ pi @ f.T
    u, _, vt = np.linalg.svd(theta)
    vv = vt.T
    q = p - 1
    u12, u22 = u[:q, q:], u[q:, q:]
    v12, v22 = vv[:q, q:], vv[q:, q:]
    a_perp = np.vstack([u12, u22]) @ np.linalg.solve(u22, _psd_sqrt(u22 @ u22.T))
    b_perp = _psd_sqrt(v22 @ v22.T) @ np.linalg.solve(v22.T, np.vstack([v12, v22]).T)
    lam = (a_perp.T @ theta @ b_perp.T).ravel(order="F")
    kron_fg = np.kron(f, g)
    v_theta = kron_fg @ v_pi @ kron_fg.T
    proj = np.kron(b_perp, a_perp.T)
    omega = proj @ v_theta @ proj.T
    stat = wald(lam, omega)
    df = k - p + 1
    return RankTest(stat, df, float(stats.chi2.sf(stat, df)), stat / k)


def _psd_sqrt(m: Array) -> Array:
    vals, vecs = np.linalg.eigh((m + m.T) / 2)
    return (vecs * np.sqrt(np.clip(vals, 0.0, None))) @ vecs.T


def sanderson_windmeijer_f(
    x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int, n_partialled_nested: int = 0
) -> tuple[float, ...]:
    """Sanderson–Windmeijer conditional F for each endogenous regressor (see module docstring)."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    _check_shapes(xm, zm)
    k = zm.shape[1]
    p = xm.shape[1]
    fitted = zm @ ols(zm, xm)[0]
    out = []
    for j in range(p):
        others = [i for i in range(p) if i != j]
        if others:
            xo, xo_hat = xm[:, others], fitted[:, others]
            delta = np.linalg.solve(xo_hat.T @ xo, xo_hat.T @ xm[:, j])
            eps = xm[:, j] - xo @ delta
        else:
            eps = xm[:, j]
        gamma, resid = ols(zm, eps[:, None])
        cov = sandwich(zm, resid, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
        out.append(wald(gamma[:, 0], cov) / (k - p + 1))
    return tuple(out)


@dataclass(frozen=True)
class StrengthSection(Record):
    """Strength summary: effective F, Cragg–Donald, Kleibergen–Paap, Sanderson–Windmeijer, Stock–Yogo."""

    effective_f: EffectiveF | None
    effective_f_reason: str | None
    cragg_donald_f: float
    kp_rk: RankTest
    sanderson_windmeijer_f: dict[str, float] | None
    sanderson_windmeijer_reason: str | None
    stock_yogo: tuple[StockYogoValue, ...]
    cov_kind: str
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "effective_f": None if self.effective_f is None else self.effective_f.to_dict(),
            "effective_f_reason": self.effective_f_reason,
            "cragg_donald_f": json_safe(self.cragg_donald_f),
            "kp_rk_wald_f": json_safe(self.kp_rk.f_form),
            "kp_rk_wald_test": self.kp_rk.to_dict(),
            "kp_cov": self.cov_kind,
            "sanderson_windmeijer_f": json_safe(self.sanderson_windmeijer_f),
            "sanderson_windmeijer_reason": self.sanderson_windmeijer_reason,
            "stock_yogo": {
                "compare_with": "cragg_donald_f (homoskedastic errors assumed by the tables)",
                "values": [v.to_dict() for v in self.stock_yogo],
            },
            "notes": list(self.notes),
        }


def strength_section(
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    method: str,
    endog_names: list[str],
) -> StrengthSection:
    """Compute every strength statistic that applies to this design and say why the others do not."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    _check_shapes(xm, zm)
    p, k = xm.shape[1], zm.shape[1]
    kw: dict[str, Any] = {
        "spec": spec,
        "n_partialled": n_partialled,
        "n_partialled_nested": n_partialled_nested,
    }
    eff: EffectiveF | None = None
    eff_reason = None
    if p == 1:
        eff = effective_f(xm, zm, **kw)
    else:
        eff_reason = (
            "the effective F (Montiel Olea and Pflueger 2013) is defined for one endogenous regressor"
        )
    sw: dict[str, float] | None = None
    sw_reason = None
    if p > 1:
        sw = dict(zip(endog_names, sanderson_windmeijer_f(xm, zm, **kw), strict=True))
    else:
        sw_reason = "with one endogenous regressor the conditional F equals the first-stage F"
    notes = []
    if spec.kind != "unadjusted":
        notes.append(
            "Stock–Yogo critical values assume homoskedastic errors; with a robust or cluster covariance "
            "compare the effective F with its own critical values instead."
        )
    return StrengthSection(
        effective_f=eff,
        effective_f_reason=eff_reason,
        cragg_donald_f=cragg_donald_f(xm, zm, n_partialled=n_partialled),
        kp_rk=kleibergen_paap_rk(xm, zm, **kw),
        sanderson_windmeijer_f=sw,
        sanderson_windmeijer_reason=sw_reason,
        stock_yogo=stock_yogo_applicable(method=method, n_endog=p, k2=k),
        cov_kind=spec.kind,
        notes=tuple(notes),
    )
