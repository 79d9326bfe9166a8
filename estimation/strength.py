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

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.critical_values import (
    MOP_SOURCE,
    MOP_TAUS,
    StockYogoValue,
    mop_critical_value,
    mop_k_eff,
    stock_yogo_applicable,
)
from ivdossier.estimation.crossproducts import (
    RANK_RTOL,
    CrossProducts,
    NotComputable,
    build,
    collinear_instruments,
    quad_form_inv,
)
from ivdossier.estimation.distributions import chi2_sf, f_sf
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
    if spec.kind == "clustered":
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
    return f_sf(f, q, d) if math.isfinite(f) else 0.0


def _sym_sqrt(m: Array, *, inverse: bool = False) -> Array:
    vals, vecs = np.linalg.eigh((m + m.T) / 2)
    if vals.min() <= 1e-12 * max(float(np.abs(vals).max()), 1e-300):
        raise NotComputable(
            "a covariance or cross-product matrix is singular (collinear treatments, or a treatment the "
            "instruments fit exactly)"
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
    robust_f_reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "endog": self.endog,
            "coefficients": json_safe(self.coefficients),
            "std_errors": json_safe(self.std_errors),
            "partial_f": json_safe(self.partial_f),
            "partial_f_df": list(self.f_df),
            "partial_f_p_value": json_safe(self.partial_f_p_value),
            "partial_f_cov": "homoskedastic",
            "robust_f": json_safe(self.robust_f),
            "robust_f_df": list(self.robust_f_df),
            "robust_f_p_value": json_safe(self.robust_f_p_value),
            "robust_f_cov": self.cov_kind,
            "partial_r2": json_safe(self.partial_r2),
            "robust_f_reason": self.robust_f_reason,
        }


@dataclass(frozen=True)
class FirstStageSection(Record):
    """First-stage results, one row per endogenous regressor."""

    rows: tuple[FirstStageRow, ...]

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict keyed by endogenous regressor name."""
        return {"by_endog": {r.endog: r.to_dict() for r in self.rows}}


def _from_arrays(
    x: Array, z: Array, spec: CovSpec, n_partialled: int, n_partialled_nested: int
) -> CrossProducts:
    _check_shapes(x, z)
    cp = build(z, x, None, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    require_distinct_instruments(cp, [f"column {j}" for j in range(cp.k)])
    return cp


def require_distinct_instruments(cp: CrossProducts, names: list[str]) -> None:
    """Raise EstimationError naming instruments that are zero or collinear (scale-free pivoted QR)."""
    bad = collinear_instruments(cp)
    if bad:
        listed = ", ".join(repr(names[j]) for j in bad)
        raise EstimationError(
            f"The instrument(s) {listed} are constant or collinear with the other instruments after "
            f"partialling (relative tolerance {RANK_RTOL:g} on unit-length columns); drop the redundant one."
        )


def instrument_basis(cp: CrossProducts) -> Array:
    """Coordinates (m x k) of the orthonormal instrument basis."""
    return np.eye(cp.m)[:, : cp.k]


def first_stage_pi(cp: CrossProducts) -> Array:
    """First-stage coefficients (k x p) on the orthonormal instrument basis, standardised units."""
    return np.asarray(cp.r[: cp.k, cp.ix], dtype=np.float64)


def first_stage_resid(cp: CrossProducts) -> Array:
    """Coordinates (m x p) of the first-stage residuals."""
    v = np.array(cp.r[:, cp.ix], dtype=np.float64)
    v[: cp.k] = 0.0
    return v


def first_stage_cov(cp: CrossProducts, *, small_sample: bool | None = None) -> Array:
    """Covariance (k p x k p, equation-major) of the first-stage coefficients on the orthonormal basis."""
    return cp.covariance(
        instrument_basis(cp), first_stage_resid(cp), np.eye(cp.k), cp.k, small_sample=small_sample
    )


def to_instrument_units(cp: CrossProducts, coef: Array, cov: Array, target: int) -> tuple[Array, Array]:
    """Coefficients (k) and covariance (k x k) on the orthonormal basis -> on the original instruments,
    in the units of column ``target`` per unit of each instrument."""
    import scipy.linalg

    rinv = scipy.linalg.solve_triangular(cp.r[: cp.k, : cp.k], np.eye(cp.k), check_finite=False)
    unit = np.where(cp.scale[: cp.k] > 0, cp.scale[: cp.k], 1.0)
    t = (cp.scale[target] / unit)[:, None] * rinv
    return np.asarray(t @ coef, dtype=np.float64), np.asarray(t @ cov @ t.T, dtype=np.float64)


def denominator_df_cp(cp: CrossProducts, k: int) -> int:
    """Denominator df for F-form p-values: n - k - n_partialled, or G - 1 for cluster covariances."""
    if cp.kind == "clustered":
        return max(min(cp.cluster_counts()) - 1, 1)
    return max(cp.n - k - cp.n_partialled, 1)


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
    if len(endog_names) != xm.shape[1] or len(instrument_names) != zm.shape[1]:
        raise InvalidInputError(
            f"Got {len(endog_names)} endogenous and {len(instrument_names)} instrument names for "
            f"{xm.shape[1]} and {zm.shape[1]} columns; pass one name per column."
        )
    _check_shapes(xm, zm)
    cp = build(zm, xm, None, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    require_distinct_instruments(cp, list(instrument_names))
    return first_stage_from(cp, endog_names=endog_names, instrument_names=instrument_names)


def first_stage_from(
    cp: CrossProducts, *, endog_names: list[str], instrument_names: list[str]
) -> FirstStageSection:
    """First-stage section from the sufficient statistics (see :func:`first_stage`)."""
    k, p = cp.k, cp.p
    pi = first_stage_pi(cp)
    cov_u = cp.with_kind("homoskedastic").covariance(
        instrument_basis(cp), first_stage_resid(cp), np.eye(k), k
    )
    try:
        cov = cov_u if cp.kind == "homoskedastic" else first_stage_cov(cp)
        cov_reason = None
    except NotComputable as exc:
        cov, cov_reason = None, str(exc)
    df_u = cp.n - k - cp.n_partialled
    df_r = denominator_df_cp(cp, k)
    rows = []
    for j in range(p):
        block = slice(j * k, (j + 1) * k)
        f_u = quad_form_inv(cov_u[block, block], pi[:, j], f"the first stage of {endog_names[j]!r}") / k
        if cov is not None:
            try:
                f_r = quad_form_inv(cov[block, block], pi[:, j], f"the first stage of {endog_names[j]!r}") / k
            except NotComputable as exc:
                f_r, cov_reason = float("nan"), str(exc)
        else:
            f_r = float("nan")
        vj = cov[block, block] if cov is not None else np.full((k, k), np.nan)
        coef, vj_orig = to_instrument_units(cp, pi[:, j], vj, cp.k + j)
        tss = float(cp.r[:, cp.k + j] @ cp.r[:, cp.k + j])
        r2 = float(pi[:, j] @ pi[:, j]) / tss if tss > 0 else float("nan")
        rows.append(
            FirstStageRow(
                endog=endog_names[j],
                coefficients={nm: float(coef[i]) for i, nm in enumerate(instrument_names)},
                std_errors={
                    nm: float(math.sqrt(max(vj_orig[i, i], 0.0))) if cov is not None else float("nan")
                    for i, nm in enumerate(instrument_names)
                },
                partial_f=f_u,
                partial_f_p_value=f_p_value(f_u, k, df_u),
                robust_f=f_r,
                robust_f_p_value=f_p_value(f_r, k, df_r) if math.isfinite(f_r) else float("nan"),
                f_df=(k, df_u),
                robust_f_df=(k, df_r),
                partial_r2=r2,
                cov_kind=cp.kind,
                robust_f_reason=cov_reason if not math.isfinite(f_r) else None,
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
    if xm.shape[1] != 1:
        raise EstimationError(
            "The effective F is defined for one endogenous regressor; pass a single column."
        )
    return effective_f_from(_from_arrays(xm, zm, spec, n_partialled, n_partialled_nested))


def effective_f_from(cp: CrossProducts) -> EffectiveF:
    """Effective F on the orthonormal instrument basis, where Z'Z = I, so S = V_pi (same eigenvalues as in
    the original basis: the two are orthogonally similar)."""
    pi = first_stage_pi(cp)[:, 0]
    s = first_stage_cov(cp)
    trace = float(np.trace(s))
    if not trace > 0:
        raise NotComputable("the covariance of the first-stage coefficients is zero")
    stat = float(pi @ pi) / trace
    k_eff = {tau: mop_k_eff(s, tau) for tau in MOP_TAUS}
    crit = {tau: mop_critical_value(k_eff[tau], tau) for tau in MOP_TAUS}
    return EffectiveF(stat, k_eff, crit)


def cragg_donald_f(x: np.ndarray, z: np.ndarray, *, n_partialled: int) -> float:
    """Cragg–Donald F: smallest eigenvalue of Sigma^{-1/2} X'P_Z X Sigma^{-1/2} / k (Stock and Yogo 2005)."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    return cragg_donald_from(_from_arrays(xm, zm, CovSpec("homoskedastic"), n_partialled, 0))


def _resid_sigma(cp: CrossProducts) -> Array:
    v = first_stage_resid(cp)
    return np.asarray(v.T @ v / cp.df(cp.k), dtype=np.float64)


def cragg_donald_from(cp: CrossProducts) -> float:
    """Cragg–Donald F from the sufficient statistics (X'P_Z X = Pi'Pi on the orthonormal basis)."""
    pi = first_stage_pi(cp)
    isq = _sym_sqrt(_resid_sigma(cp), inverse=True)
    g = isq @ (pi.T @ pi) @ isq / cp.k
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


@dataclass(frozen=True)
class RankLM(Record):
    """Kleibergen–Paap rk LM test of under-identification (H0: rank(Pi) = p - 1)."""

    statistic: float
    df: int
    p_value: float
    cov_kind: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "test": "kleibergen_paap_rk_lm",
            "statistic": json_safe(self.statistic),
            "df": self.df,
            "distribution": f"chi2({self.df})",
            "p_value": json_safe(self.p_value),
            "cov": self.cov_kind,
            "null": "the model is under-identified (the first-stage matrix has rank p - 1)",
            "note": "covariance evaluated under the null, without small-sample factors; equals the "
            "Anderson canonical-correlation LM n * rho_min^2 under the unadjusted covariance",
            "source": "Kleibergen and Paap (2006), Generalized reduced rank tests using the singular value "
            "decomposition, Journal of Econometrics",
        }


def kleibergen_paap_rk(
    x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int, n_partialled_nested: int = 0
) -> RankTest:
    """Kleibergen–Paap (2006) rk Wald statistic for H0: rank(Pi) = p - 1, chi-square with k - p + 1 df."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    return kleibergen_paap_from(_from_arrays(xm, zm, spec, n_partialled, n_partialled_nested))


def _rank_pieces(theta: Array) -> tuple[Array, Array]:
    """A_perp and B_perp of Kleibergen and Paap (2006) for the rank p - 1 null from the SVD of theta."""
    p = theta.shape[1]
    u, _, vt = np.linalg.svd(theta)
    vv = vt.T
    q = p - 1
    u12, u22 = u[:q, q:], u[q:, q:]
    v12, v22 = vv[:q, q:], vv[q:, q:]
    try:
        a_perp = np.vstack([u12, u22]) @ np.linalg.solve(u22, _psd_sqrt(u22 @ u22.T))
        b_perp = _psd_sqrt(v22 @ v22.T) @ np.linalg.solve(v22.T, np.vstack([v12, v22]).T)
    except np.linalg.LinAlgError as exc:
        raise NotComputable("the singular vectors of the first-stage matrix are degenerate") from exc
    return a_perp, b_perp


def _rk_statistic(theta: Array, f: Array, v_pi: Array) -> float:
    a_perp, b_perp = _rank_pieces(theta)
    lam = (a_perp.T @ theta @ b_perp.T).ravel(order="F")
    k = theta.shape[0]
    kron_f = np.kron(f, np.eye(k))
    v_theta = kron_f @ v_pi @ kron_f.T
    proj = np.kron(b_perp, a_perp.T)
    omega = proj @ v_theta @ proj.T
    return quad_form_inv(omega, lam, "the rank statistic")


def kleibergen_paap_from(cp: CrossProducts) -> RankTest:
    """rk Wald on the orthonormal basis (G = (Z'Z)^{1/2} = I), Theta = Pi Sigma^{-1/2}."""
    pi = first_stage_pi(cp)
    f = _sym_sqrt(_resid_sigma(cp), inverse=True)
    stat = _rk_statistic(pi @ f.T, f, first_stage_cov(cp))
    k, p = cp.k, cp.p
    df = k - p + 1
    return RankTest(stat, df, chi2_sf(stat, df), stat / k)


def kleibergen_paap_lm(
    x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int, n_partialled_nested: int = 0
) -> RankLM:
    """Kleibergen–Paap (2006) rk LM statistic for H0: rank(Pi) = p - 1, chi-square with k - p + 1 df."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    return kleibergen_paap_lm_from(_from_arrays(xm, zm, spec, n_partialled, n_partialled_nested))


def kleibergen_paap_lm_from(cp: CrossProducts) -> RankLM:
    """rk LM: Theta = Pi (X'X)^{-1/2}; the covariance of vec(Pi) uses the treatments themselves as the
    residuals (under the null the combination X b_perp has no first stage, so its residual is itself) and
    no small-sample factor. Unadjusted: Omega = I / n, so LM = n * (smallest canonical correlation)^2."""
    pi = first_stage_pi(cp)
    rx = cp.coords(cp.ix)
    xx = rx.T @ rx
    f = _sym_sqrt(xx, inverse=True)
    if cp.kind == "homoskedastic":
        v_pi = np.kron(xx / cp.n, np.eye(cp.k))
    else:
        v_pi = cp.covariance(instrument_basis(cp), rx, np.eye(cp.k), cp.k, small_sample=False)
    stat = _rk_statistic(pi @ f.T, f, v_pi)
    df = cp.k - cp.p + 1
    return RankLM(stat, df, chi2_sf(stat, df), cp.kind)


def _psd_sqrt(m: Array) -> Array:
    vals, vecs = np.linalg.eigh((m + m.T) / 2)
    return (vecs * np.sqrt(np.clip(vals, 0.0, None))) @ vecs.T


def sanderson_windmeijer_f(
    x: np.ndarray, z: np.ndarray, *, spec: CovSpec, n_partialled: int, n_partialled_nested: int = 0
) -> tuple[float, ...]:
    """Sanderson–Windmeijer conditional F for each endogenous regressor (see module docstring)."""
    xm, zm = as_matrix(x, "X"), as_matrix(z, "Z")
    return sanderson_windmeijer_from(_from_arrays(xm, zm, spec, n_partialled, n_partialled_nested))


def sanderson_windmeijer_from(cp: CrossProducts) -> tuple[float, ...]:
    """Conditional F from the sufficient statistics; delta_j is the 2SLS fit among the treatments."""
    k, p = cp.k, cp.p
    pi = first_stage_pi(cp)
    rx = cp.coords(cp.ix)
    out = []
    for j in range(p):
        others = [i for i in range(p) if i != j]
        if others:
            po = pi[:, others]
            delta = np.linalg.solve(po.T @ po, po.T @ pi[:, j])
            eps = rx[:, j] - rx[:, others] @ delta
        else:
            eps = rx[:, j]
        resid = eps.copy()
        resid[:k] = 0.0
        cov = cp.covariance(instrument_basis(cp), resid, np.eye(k), k)
        out.append(quad_form_inv(cov, eps[:k], "the conditional first stage") / (k - p + 1))
    return tuple(out)


@dataclass(frozen=True)
class StrengthSection(Record):
    """Strength summary: effective F, Cragg–Donald, Kleibergen–Paap, Sanderson–Windmeijer, Stock–Yogo.

    A statistic that cannot be computed is None with its reason in ``reasons`` (key: the statistic).
    """

    effective_f: EffectiveF | None
    effective_f_reason: str | None
    cragg_donald_f: float | None
    kp_rk: RankTest | None
    sanderson_windmeijer_f: dict[str, float] | None
    sanderson_windmeijer_reason: str | None
    stock_yogo: tuple[StockYogoValue, ...]
    cov_kind: str
    notes: tuple[str, ...] = field(default=())
    kp_lm: RankLM | None = None
    reasons: dict[str, str] = field(default_factory=dict)
    instrument_condition: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "effective_f": None if self.effective_f is None else self.effective_f.to_dict(),
            "effective_f_reason": self.effective_f_reason,
            "cragg_donald_f": json_safe(self.cragg_donald_f),
            "cragg_donald_reason": self.reasons.get("cragg_donald_f"),
            "kp_rk_wald_f": None if self.kp_rk is None else json_safe(self.kp_rk.f_form),
            "kp_rk_wald_test": None if self.kp_rk is None else self.kp_rk.to_dict(),
            "kp_rk_wald_reason": self.reasons.get("kp_rk"),
            "kp_rk_lm_test": None if self.kp_lm is None else self.kp_lm.to_dict(),
            "kp_rk_lm_reason": self.reasons.get("kp_lm"),
            "kp_cov": self.cov_kind,
            "sanderson_windmeijer_f": json_safe(self.sanderson_windmeijer_f),
            "sanderson_windmeijer_reason": self.sanderson_windmeijer_reason,
            "stock_yogo": {
                "compare_with": "cragg_donald_f (homoskedastic errors assumed by the tables)",
                "values": [v.to_dict() for v in self.stock_yogo],
            },
            "instrument_condition": json_safe(self.instrument_condition),
            "instrument_condition_note": "condition number of the instruments after partialling, each "
            "scaled to unit length; above about 1e6 the instruments are nearly collinear and individual "
            "first-stage coefficients are poorly determined (the joint statistics are not affected)",
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
    cp = _from_arrays(xm, zm, spec, n_partialled, n_partialled_nested)
    return strength_from(cp, method=method, endog_names=endog_names)


def strength_from(cp: CrossProducts, *, method: str, endog_names: list[str]) -> StrengthSection:
    """Strength section from the sufficient statistics; each statistic fails alone with its reason."""
    p, k = cp.p, cp.k
    reasons: dict[str, str] = {}

    def guarded(key: str, fn: Any) -> Any:
        try:
            return fn()
        except NotComputable as exc:
            reasons[key] = f"not computed: {exc}"
            return None

    eff: EffectiveF | None = None
    eff_reason = None
    if p == 1:
        eff = guarded("effective_f", lambda: effective_f_from(cp))
        eff_reason = reasons.get("effective_f")
    else:
        eff_reason = (
            "the effective F (Montiel Olea and Pflueger 2013) is defined for one endogenous regressor"
        )
    sw: dict[str, float] | None = None
    sw_reason = None
    if p > 1:
        vals = guarded("sanderson_windmeijer_f", lambda: sanderson_windmeijer_from(cp))
        sw = None if vals is None else dict(zip(endog_names, vals, strict=True))
        sw_reason = reasons.get("sanderson_windmeijer_f")
    else:
        sw_reason = "with one endogenous regressor the conditional F equals the first-stage F"
    notes = []
    if cp.kind != "homoskedastic":
        notes.append(
            "Stock–Yogo critical values assume homoskedastic errors; with a robust or cluster covariance "
            "compare the effective F with its own critical values instead."
        )
    return StrengthSection(
        effective_f=eff,
        effective_f_reason=eff_reason,
        cragg_donald_f=guarded("cragg_donald_f", lambda: cragg_donald_from(cp)),
        kp_rk=guarded("kp_rk", lambda: kleibergen_paap_from(cp)),
        sanderson_windmeijer_f=sw,
        sanderson_windmeijer_reason=sw_reason,
        stock_yogo=stock_yogo_applicable(method=method, n_endog=p, k2=k),
        cov_kind=cp.kind,
        notes=tuple(notes),
        kp_lm=guarded("kp_lm", lambda: kleibergen_paap_lm_from(cp)),
        reasons=reasons,
        instrument_condition=cp.instrument_condition(),
    )
