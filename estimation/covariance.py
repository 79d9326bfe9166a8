"""Sandwich covariance of linear-model coefficients: homoskedastic, heteroskedastic (robust) and clustered.

All functions work on arrays that have already been partialled (Frisch–Waugh–Lovell) and, when the model is
weighted, multiplied row-wise by sqrt(w): callers pass sqrt(w)-scaled regressors and residuals, so the
formulas here are weight-agnostic.

Small-sample conventions (common practice; applied when ``CovSpec.small_sample`` is True, omitted otherwise):

* homoskedastic: ``kron(E'E / (n - k - p), bread)``; without the adjustment ``E'E / n``;
* heteroskedastic (HC1): ``bread (sum_i (e_i e_i') ⊗ (r_i r_i')) bread * n / (n - k - p)``; without it HC0;
* one-way cluster: score sums per cluster, factor ``G / (G - 1) * (n - 1) / (n - k - p_c)``;
* two-way cluster (Cameron, Gelbach and Miller 2011): ``V1 + V2 - V12`` with V12 clustered on the
  intersection, each term with its own G in the factor above. No eigenvalue fix is applied, so the two-way
  matrix can in rare cases fail to be positive semi-definite; :func:`is_psd` lets a caller check.

Here n is the number of rows, k the number of columns of ``regressors``, p = ``n_partialled`` the number of
columns removed by partialling (controls including the intercept plus absorbed fixed-effect levels) and
p_c = p - ``n_partialled_nested``: absorbed levels nested within a cluster variable are not counted in the
cluster factor, because the cluster-robust meat already allows for them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError

Array = NDArray[np.float64]
CovKind = Literal["homoskedastic", "heteroskedastic", "clustered"]
COV_KINDS: tuple[str, ...] = ("homoskedastic", "heteroskedastic", "clustered")
"""The covariance choices: errors with one variance, errors whose variance may differ by row, errors that may be
correlated within clusters (one- or two-way)."""

OLD_COV_NAMES: dict[str, str] = {
    "unadjusted": "homoskedastic",
    "robust": "heteroskedastic",
    "cluster": "clustered",
}
"""Spellings used before release 0.x of this project (deprecated; accepted for one release, and always when
reading stored runs and plans)."""


def cov_name(value: str) -> str:
    """The covariance choice `value` names, in the current words (an old spelling is translated)."""
    name = OLD_COV_NAMES.get(value, value)
    if name not in COV_KINDS:
        raise InvalidInputError(f"Unknown covariance {value!r}; choose one of {', '.join(COV_KINDS)}.")
    return name


@dataclass(frozen=True, eq=False)
class CovSpec:
    """Which covariance estimator to use; cluster codes are int64 arrays with values 0..G-1, one per row.

    ``small_sample`` switches the finite-sample factors listed in the module docstring on or off.
    """

    kind: CovKind
    clusters: tuple[np.ndarray, ...] = ()
    small_sample: bool = True
    _counts: tuple[int, ...] = field(default=(), init=False, repr=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "kind", cov_name(self.kind))  # stored old spellings still work
        if self.kind == "clustered":
            if len(self.clusters) not in (1, 2):
                raise InvalidInputError(
                    f"A cluster covariance needs one or two cluster code arrays, got {len(self.clusters)}; "
                    "pass one or two cluster variables."
                )
            n0 = None
            for c in self.clusters:
                if not isinstance(c, np.ndarray) or c.ndim != 1 or not np.issubdtype(c.dtype, np.integer):
                    raise InvalidInputError(
                        "Cluster codes must be one-dimensional integer arrays; encode the cluster variable "
                        "with pandas.factorize first."
                    )
                if c.size and int(c.min()) < 0:
                    raise InvalidInputError(
                        "Cluster codes must be non-negative (0..G-1); drop rows with a missing cluster first."
                    )
                if n0 is not None and c.shape[0] != n0:
                    raise InvalidInputError("The two cluster code arrays must have the same length.")
                n0 = c.shape[0]
        elif self.clusters:
            raise InvalidInputError(
                f"Cluster codes were given with covariance kind {self.kind!r}; "
                "use kind 'clustered' or drop them."
            )
        counts = tuple(int(np.count_nonzero(np.bincount(c))) for c in self.clusters)
        object.__setattr__(self, "_counts", counts)

    def n_clusters(self) -> tuple[int, ...]:
        """Number of distinct clusters in each cluster dimension (empty tuple when not clustered)."""
        return self._counts


def df_resid(n: int, k: int, n_partialled: int) -> int:
    """Residual degrees of freedom n - k - n_partialled; raise EstimationError when not positive."""
    df = n - k - n_partialled
    if df <= 0:
        raise EstimationError(
            f"No residual degrees of freedom: {n} rows but {k} regressors and {n_partialled} partialled "
            "columns; use fewer controls or fixed effects or more data."
        )
    return df


def group_sums(codes: np.ndarray, values: np.ndarray) -> Array:
    """Sum the rows of ``values`` (n x p) within each code of ``codes`` (0..G-1); returns (G x p)."""
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 1:
        v = v[:, None]
    g = int(codes.max()) + 1 if codes.size else 0
    out = np.empty((g, v.shape[1]), dtype=np.float64)
    for j in range(v.shape[1]):
        out[:, j] = np.bincount(codes, weights=v[:, j], minlength=g)
    return out


def intersection_codes(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Codes 0..G12-1 of the intersection clusters of two cluster code arrays."""
    combined = a.astype(np.int64) * (int(b.max()) + 1) + b.astype(np.int64)
    top = int(combined.max()) + 1 if combined.size else 0
    if top <= 8 * combined.size + 1024:  # dense enough: rank the codes with a boolean table, no sort
        present = np.zeros(top, dtype=bool)
        present[combined] = True
        rank = np.cumsum(present) - 1
        return np.asarray(rank[combined], dtype=np.int64)
    _, inv = np.unique(combined, return_inverse=True)
    return np.asarray(inv, dtype=np.int64).ravel()


def _cluster_meat(scores: Array, codes: np.ndarray) -> tuple[Array, int]:
    sums = group_sums(codes, scores)
    g = int(np.count_nonzero(np.bincount(codes)))
    return sums.T @ sums, g


def scores_meat(scores: np.ndarray, spec: CovSpec, *, n_df: int, n_df_cluster: int) -> Array:
    """Meat matrix from per-row scores (n x p), small-sample factors included.

    ``n_df`` is the residual df n - k - p used by the robust factor and ``n_df_cluster`` the df
    n - k - p_c used by the cluster factor. For kind "homoskedastic" this returns the plain outer product,
    unscaled; :func:`sandwich` handles the unadjusted case itself.
    """
    s = np.asarray(scores, dtype=np.float64)
    if s.ndim == 1:
        s = s[:, None]
    n = s.shape[0]
    if spec.kind != "clustered":
        meat = s.T @ s
        if spec.kind == "heteroskedastic" and spec.small_sample:
            meat *= n / n_df
        return meat
    for c in spec.clusters:
        if c.shape[0] != n:
            raise InvalidInputError(
                f"Cluster codes have {c.shape[0]} rows but the data have {n}; build them from the same rows."
            )

    def factor(g: int) -> float:
        if not spec.small_sample:
            return 1.0
        if g < 2:
            raise EstimationError(
                "A cluster variable has a single cluster, so cluster-robust standard errors are undefined; "
                "cluster on a variable with at least two levels."
            )
        return g / (g - 1) * (n - 1) / n_df_cluster

    if len(spec.clusters) == 1:
        m1, g1 = _cluster_meat(s, spec.clusters[0])
        return m1 * factor(g1)
    a, b = spec.clusters
    m1, g1 = _cluster_meat(s, a)
    m2, g2 = _cluster_meat(s, b)
    m12, g12 = _cluster_meat(s, intersection_codes(a, b))
    return m1 * factor(g1) + m2 * factor(g2) - m12 * factor(g12)


def _checked_inverse(cross: Array) -> Array:
    try:
        chol = np.linalg.cholesky(cross)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "The regressor cross-product matrix is not positive definite (collinear or constant columns); "
            "drop the redundant regressor."
        ) from exc
    inv_chol = np.linalg.inv(chol)
    return inv_chol.T @ inv_chol


def sandwich(
    regressors: np.ndarray,
    resid: np.ndarray,
    spec: CovSpec,
    *,
    n_partialled: int,
    bread: np.ndarray | None = None,
    n_partialled_nested: int = 0,
) -> Array:
    """Covariance of the stacked coefficients of m equations that share ``regressors`` (n x k).

    ``resid`` is (n,) or (n, m) with one column of residuals per equation. The result is (m*k, m*k),
    equation-major (all k coefficients of equation 1, then equation 2 ...). ``bread`` defaults to inv(R'R).
    Degrees of freedom: n - k - n_partialled, where n_partialled counts the columns removed by
    Frisch–Waugh–Lovell (controls incl. the intercept plus absorbed fixed-effect levels);
    ``n_partialled_nested`` of them (fixed-effect levels nested in a cluster) are left out of the cluster
    factor.
    Inputs must already be scaled by sqrt(weights) when the model is weighted.
    """
    r = np.asarray(regressors, dtype=np.float64)
    if r.ndim == 1:
        r = r[:, None]
    e = np.asarray(resid, dtype=np.float64)
    if e.ndim == 1:
        e = e[:, None]
    n, k = r.shape
    m = e.shape[1]
    if e.shape[0] != n:
        raise InvalidInputError(f"resid has {e.shape[0]} rows but regressors have {n}; pass matching arrays.")
    b = _checked_inverse(r.T @ r) if bread is None else np.asarray(bread, dtype=np.float64)
    if b.shape != (k, k):
        raise InvalidInputError(f"bread must be {k} x {k}, got {b.shape}.")
    if k == 0:
        return np.zeros((0, 0))
    df = df_resid(n, k, n_partialled)
    if spec.kind == "homoskedastic":
        sigma = e.T @ e / (df if spec.small_sample else n)
        return np.asarray(np.kron(sigma, b), dtype=np.float64)
    scores = r * e if m == 1 else (e[:, :, None] * r[:, None, :]).reshape(n, m * k)
    df_c = df_resid(n, k, n_partialled - n_partialled_nested) if spec.kind == "clustered" else df
    meat = scores_meat(scores, spec, n_df=df, n_df_cluster=df_c)
    big_bread = b if m == 1 else np.kron(np.eye(m), b)
    cov = big_bread @ meat @ big_bread
    return (cov + cov.T) / 2


def is_psd(cov: np.ndarray, *, tol: float = 1e-12) -> bool:
    """True when the symmetric matrix has no eigenvalue below -tol times its largest absolute eigenvalue."""
    if cov.size == 0:
        return True
    ev = np.linalg.eigvalsh((cov + cov.T) / 2)
    return bool(ev.min() >= -tol * max(1.0, float(np.abs(ev).max())))
