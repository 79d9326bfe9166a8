"""k-class estimators (OLS, 2SLS, LIML, Fuller) on partialled arrays.

Inputs are the outcome y (n,), the endogenous regressors X (n x k) and the excluded instruments Z (n x L), all
already residualised on the controls, the intercept and absorbed fixed effects and scaled by sqrt(w) when
weighted. By Frisch–Waugh–Lovell the coefficients on X equal those of the full model; the coefficients of the
partialled controls are not reported.

Conventions (common practice, and those of linearmodels' IV estimators):

* k-class: beta = [X'(I - kappa M_Z)X]^{-1} X'(I - kappa M_Z)y with kappa = 0 (OLS), 1 (2SLS);
* LIML: kappa is the smallest eigenvalue of (W'M_Z W)^{-1} W'W with W = [y, X] (both partialled);
* Fuller: kappa = kappa_LIML - alpha / (n - K_total), K_total = L + partialled columns (all instruments,
  included exogenous ones and absorbed levels), alpha = 1 by default;
* covariance bread: [X'(I - kappa M_Z)X]^{-1}; robust and cluster scores use the projected regressors
  P_Z X times the residual for every kappa (as linearmodels does), OLS uses X.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.linalg import Projector, tall_matmul

Array = NDArray[np.float64]
METHODS: tuple[str, ...] = ("ols", "2sls", "liml", "fuller")
RANK_TOL = 1e-9


@dataclass(frozen=True, eq=False)
class KClassFit:
    """Coefficients of the endogenous regressors with what the covariance step needs."""

    method: str
    beta: Array
    kappa: float
    kappa_liml: float | None
    resid: Array
    score_regressors: Array
    bread: Array


def collinear_columns(
    mat: np.ndarray, *, scale: np.ndarray | None = None, tol: float = RANK_TOL
) -> list[int]:
    """Indices of columns that are (numerically) zero or linear combinations of the other columns.

    A column counts as zero when its norm is below ``tol`` times ``scale`` (its norm before partialling, if
    given). A QR factorisation in the given column order then flags each column whose part orthogonal to the
    columns before it is below ``tol`` times its own norm, so the later of two redundant columns is named.
    """
    a = np.asarray(mat, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None]
    norms = np.sqrt(np.einsum("ij,ij->j", a, a))
    ref = norms if scale is None else np.asarray(scale, dtype=np.float64)
    zero = [j for j in range(a.shape[1]) if norms[j] <= tol * ref[j] or norms[j] == 0.0]
    alive = [j for j in range(a.shape[1]) if j not in zero]
    bad = list(zero)
    if len(alive) > 1:
        sub = a[:, alive]
        inv_norm = 1.0 / norms[alive]
        try:  # fast path: a well-conditioned scaled Gram matrix proves full rank without an n x k QR
            chol = np.linalg.cholesky((sub.T @ sub) * np.outer(inv_norm, inv_norm))
            if np.diag(chol).min() > 1e-3:
                return sorted(bad)
        except np.linalg.LinAlgError:
            pass
        r = np.linalg.qr(sub, mode="r")
        diag = np.abs(np.diag(r))
        bad += [j for i, j in enumerate(alive) if diag[i] <= tol * norms[j]]
    return sorted(bad)


def require_full_rank(
    mat: np.ndarray, names: Sequence[str], role: str, *, scale: np.ndarray | None = None
) -> None:
    """Raise EstimationError naming the columns of ``mat`` that are constant or collinear."""
    bad = collinear_columns(mat, scale=scale)
    if bad:
        listed = ", ".join(repr(names[j]) for j in bad)
        raise EstimationError(
            f"The {role} {listed} {'is' if len(bad) == 1 else 'are'} constant or collinear after partialling "
            "out "
            "the controls and fixed effects; drop or replace it."
        )


def _chol_solve_inv(a: Array, b: Array) -> tuple[Array, Array]:
    import scipy.linalg

    try:
        c = scipy.linalg.cho_factor(a, lower=True, check_finite=False)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "The k-class cross-product matrix is not positive definite (collinear regressors or kappa too "
            "large); check the regressors and instruments for redundancy."
        ) from exc
    sol = scipy.linalg.cho_solve(c, b, check_finite=False)
    inv = scipy.linalg.cho_solve(c, np.eye(a.shape[0]), check_finite=False)
    return np.asarray(sol, dtype=np.float64), np.asarray((inv + inv.T) / 2, dtype=np.float64)


def liml_kappa(y: np.ndarray, X: np.ndarray, Z: np.ndarray) -> float:
    """Smallest eigenvalue of (W'M_Z W)^{-1} W'W with W = [y, X]; equals 1 when exactly identified."""
    yv = np.asarray(y, dtype=np.float64).ravel()
    x = np.asarray(X, dtype=np.float64)
    x = x[:, None] if x.ndim == 1 else x
    proj = Projector(Z)
    return _liml_kappa_from(yv, x, proj.coords(yv), proj.coords(x))


def _liml_kappa_from(y: Array, x: Array, qy: Array, qx: Array) -> float:
    """LIML kappa from the data and their coordinates Q'y, Q'X in an orthonormal basis of the instruments."""
    import scipy.linalg

    qw = np.column_stack([qy, qx])
    xy = x.T @ y
    ww = np.block([[np.atleast_2d(y @ y), xy[None, :]], [xy[:, None], x.T @ x]])
    wmw = ww - qw.T @ qw
    try:
        vals = scipy.linalg.eigh(ww, wmw, eigvals_only=True, check_finite=False)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "LIML needs W'M_Z W to be positive definite, but the instruments fit [y, X] exactly; "
            "check for an outcome or treatment that is a combination of the instruments."
        ) from exc
    return float(vals.min())


def fit_kclass(
    y: np.ndarray,
    X: np.ndarray,
    Z: np.ndarray | None,
    *,
    method: str,
    n_partialled: int = 0,
    fuller_alpha: float = 1.0,
    kappa: float | None = None,
) -> KClassFit:
    """Fit OLS, 2SLS, LIML or Fuller (or a given ``kappa``) to partialled arrays; see the module docstring."""
    import scipy.linalg

    if method not in METHODS:
        raise InvalidInputError(f"Unknown method {method!r}; choose one of {', '.join(METHODS)}.")
    yv = np.asarray(y, dtype=np.float64).ravel()
    x = np.asarray(X, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    n, k = x.shape
    if method == "ols":
        if not Projector(x).exact:  # well-conditioned: Cholesky of X'X is as accurate as QR here
            beta, bread = _chol_solve_inv(x.T @ x, x.T @ yv)
            return KClassFit("ols", beta, 0.0, None, tall_matmul(x, beta, subtract_from=yv), x, bread)
        q, r = np.linalg.qr(x)
        if np.any(np.abs(np.diag(r)) <= RANK_TOL * np.sqrt(np.einsum("ij,ij->j", x, x))):
            raise EstimationError("The regressors are collinear; drop the redundant regressor.")
        beta = scipy.linalg.solve_triangular(r, q.T @ yv, check_finite=False)
        rinv = scipy.linalg.solve_triangular(r, np.eye(k), check_finite=False)
        resid = yv - x @ beta
        return KClassFit("ols", beta, 0.0, None, resid, x, rinv @ rinv.T)
    if Z is None:
        raise InvalidInputError(
            f"Method {method!r} needs excluded instruments; pass instruments or use 'ols'."
        )
    z = np.asarray(Z, dtype=np.float64)
    if z.ndim == 1:
        z = z[:, None]
    n_inst = z.shape[1]
    if n_inst < k:
        raise EstimationError(
            f"{n_inst} excluded instrument(s) for {k} endogenous regressor(s): the model is not identified; "
            "add instruments or remove endogenous regressors."
        )
    proj = Projector(z)
    qx = proj.coords(x)
    qy = proj.coords(yv)
    xhat = proj.fitted(qx)
    k_liml: float | None = None
    if kappa is None:
        if method == "2sls":
            kappa = 1.0
        else:
            k_liml = _liml_kappa_from(yv, x, qy, qx)
            kappa = k_liml
            if method == "fuller":
                kappa = k_liml - fuller_alpha / (n - (n_inst + n_partialled))
    if kappa == 1.0:
        qq, rr = np.linalg.qr(qx)
        beta = scipy.linalg.solve_triangular(rr, qq.T @ qy, check_finite=False)
        rinv = scipy.linalg.solve_triangular(rr, np.eye(k), check_finite=False)
        bread = rinv @ rinv.T
    else:
        xx = x.T @ x
        a = (1.0 - kappa) * xx + kappa * (qx.T @ qx)
        b = (1.0 - kappa) * (x.T @ yv) + kappa * (qx.T @ qy)
        beta, bread = _chol_solve_inv(a, b)
    resid = tall_matmul(x, beta, subtract_from=yv)
    return KClassFit(method, np.asarray(beta, dtype=np.float64), float(kappa), k_liml, resid, xhat, bread)


@dataclass(frozen=True, eq=False)
class MomentFit:
    """A k-class fit computed from the sufficient statistics: coefficients and covariance in data units."""

    method: str
    beta: Array
    cov: Array
    kappa: float
    kappa_liml: float | None
    ssr: float


def fit_from_cross_products(cp: Any, *, method: str, fuller_alpha: float = 1.0) -> MomentFit:
    """2SLS, LIML or Fuller from :class:`~ivdossier.estimation.crossproducts.CrossProducts` (no pass over
    the rows): the same conventions as :func:`fit_kclass`, computed in the orthonormal coordinates."""
    import scipy.linalg

    if method not in ("2sls", "liml", "fuller"):
        raise InvalidInputError(f"Method {method!r} is not an instrumental-variable method.")
    k, p = cp.k, cp.p
    rx, ry = cp.coords(cp.ix), cp.coords(cp.iy)
    qx, qy = rx[:k], ry[:k]
    k_liml: float | None = None
    if method == "2sls":
        kappa = 1.0
    else:
        k_liml = _liml_kappa_coords(np.column_stack([ry, rx]), k)
        kappa = k_liml if method == "liml" else k_liml - fuller_alpha / (cp.n - (k + cp.n_partialled))
    if kappa == 1.0:
        qq, rr = np.linalg.qr(qx)
        beta = scipy.linalg.solve_triangular(rr, qq.T @ qy, check_finite=False)
        rinv = scipy.linalg.solve_triangular(rr, np.eye(p), check_finite=False)
        bread = rinv @ rinv.T
    else:
        a = (1.0 - kappa) * (rx.T @ rx) + kappa * (qx.T @ qx)
        b = (1.0 - kappa) * (rx.T @ ry) + kappa * (qx.T @ qy)
        beta, bread = _chol_solve_inv(a, b)
    u = ry - rx @ beta
    xhat = np.zeros_like(rx)
    xhat[:k] = qx
    cov_std = cp.covariance(xhat, u, bread, p)
    unit = cp.scale[cp.iy] / cp.scale[cp.ix]
    return MomentFit(
        method=method,
        beta=np.asarray(beta * unit, dtype=np.float64),
        cov=np.asarray(cov_std * np.outer(unit, unit), dtype=np.float64),
        kappa=float(kappa),
        kappa_liml=k_liml,
        ssr=float(u @ u) * float(cp.scale[cp.iy]) ** 2,
    )


def ols_from_cross_products(cp: Any) -> MomentFit:
    """OLS of the outcome on the treatments from :class:`~ivdossier.estimation.crossproducts.CrossProducts`
    (no pass over the rows; the instrument block, if any, is ignored): the conventions of :func:`fit_kclass`."""
    import scipy.linalg

    rx, ry = cp.coords(cp.ix), cp.coords(cp.iy)
    qq, rr = np.linalg.qr(rx)
    if np.any(np.abs(np.diag(rr)) <= RANK_TOL * np.maximum(np.linalg.norm(rx, axis=0), 1e-300)):
        raise EstimationError("The regressors are collinear; drop the redundant regressor.")
    beta = scipy.linalg.solve_triangular(rr, qq.T @ ry, check_finite=False)
    rinv = scipy.linalg.solve_triangular(rr, np.eye(cp.p), check_finite=False)
    u = ry - rx @ beta
    cov = cp.covariance(rx, u, rinv @ rinv.T, cp.p)
    unit = cp.scale[cp.iy] / cp.scale[cp.ix]
    return MomentFit(
        method="ols",
        beta=np.asarray(beta * unit, dtype=np.float64),
        cov=np.asarray(cov * np.outer(unit, unit), dtype=np.float64),
        kappa=0.0,
        kappa_liml=None,
        ssr=float(u @ u) * float(cp.scale[cp.iy]) ** 2,
    )


def _liml_kappa_coords(w: Array, k: int) -> float:
    """Smallest eigenvalue of (W'M_Z W)^{-1} W'W from coordinates (the first k span the instruments)."""
    import scipy.linalg

    ww = w.T @ w
    wmw = w[k:].T @ w[k:]
    try:
        vals = scipy.linalg.eigh(ww, wmw, eigvals_only=True, check_finite=False)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "LIML needs W'M_Z W to be positive definite, but the instruments fit [y, X] exactly; "
            "check for an outcome or treatment that is a combination of the instruments."
        ) from exc
    return float(vals.min())
