"""Partial out controls (with an intercept) and absorbed fixed effects (Frisch–Waugh–Lovell).

One fixed effect is removed exactly by (weighted) group demeaning. Two are removed by eliminating the first
(group demeaning, on rows sorted by it) and solving the normal equations of the second by preconditioned
conjugate gradients until the residual norm falls below ``tol`` times the right-hand side's norm. Three or more
use alternating projections until the largest change in a sweep, relative to the column's scale, is below
``tol``. Controls are then removed
by a least-squares projection computed with a QR factorisation (in the given column order, so the
later of two redundant controls is the one reported). The returned columns are multiplied by
sqrt(w) when the model is weighted, ready for :func:`ivdossier.estimation.covariance.sandwich`.

Degrees of freedom absorbed (stated convention):

* no fixed effect: the intercept counts 1;
* one fixed effect: its number of levels (the intercept lies in their span and is not counted again);
* two fixed effects: L1 + L2 minus the number of connected components of the bipartite graph linking their
  levels (exact rank of the two sets of dummies);
* three or more: L1 + sum over j >= 2 of (Lj - c_1j), with c_1j the components between fixed effect 1 and j.
  This is an upper bound on the rank, so the count is conservative (standard errors never too small from it).

Singleton groups are kept (they are fitted exactly and count as levels).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError
from ivdossier.estimation.linalg import GRAM_MIN_DIAG, Projector, tall_matmul

Array = NDArray[np.float64]

DEFAULT_TOL = 1e-10
DEFAULT_MAX_ITER = 10_000
COLLINEAR_TOL = 1e-7


@dataclass(frozen=True, eq=False)
class Absorbed:
    """Residualised (and sqrt(w)-scaled) columns with the degrees of freedom that partialling used.

    ``n_partialled`` = intercept (when no fixed effect) + number of controls + ``n_absorbed``;
    ``n_absorbed_nested`` counts the absorbed levels of fixed effects nested in a cluster variable;
    ``scale`` holds each target column's weighted norm after centring, before partialling (0 for a constant
    column), used to detect columns that partialling wiped out.
    """

    columns: Array
    n_partialled: int
    n_controls: int
    n_absorbed: int
    n_absorbed_nested: int
    fe_levels: tuple[int, ...]
    iterations: int
    scale: Array
    dropped_controls: tuple[int, ...]


def count_levels(codes: np.ndarray) -> int:
    """Number of distinct non-negative codes present."""
    return int(np.count_nonzero(np.bincount(codes))) if codes.size else 0


def bipartite_components(a: np.ndarray, b: np.ndarray) -> int:
    """Connected components of the graph whose nodes are the levels of a and b and whose edges are rows.

    Codes are non-negative integers; codes that never occur are not nodes (they are not counted).
    """
    import scipy.sparse
    from scipy.sparse.csgraph import connected_components

    na, nb = int(a.max()) + 1, int(b.max()) + 1
    graph = scipy.sparse.csr_matrix(
        (np.ones(a.size, dtype=np.int8), (a.astype(np.int64), b.astype(np.int64) + na)),
        shape=(na + nb, na + nb),
    )
    n_comp, _ = connected_components(graph, directed=False)
    absent = (na - count_levels(a)) + (nb - count_levels(b))
    return int(n_comp) - absent


def is_nested(inner: np.ndarray, outer: np.ndarray) -> bool:
    """True when every level of ``inner`` lies within a single level of ``outer``."""
    first = np.zeros(int(inner.max()) + 1, dtype=np.int64)
    first[inner] = outer  # one representative outer code per inner level
    return bool(np.array_equal(first[inner], outer))


def absorbed_df(fe_codes: Sequence[np.ndarray], cluster_codes: Sequence[np.ndarray] = ()) -> tuple[int, int]:
    """Degrees of freedom absorbed by the fixed effects and how many of them are nested in a cluster.

    Follows the convention in the module docstring; a fixed effect nested in any cluster variable has all the
    levels it contributes counted as nested.
    """
    if not fe_codes:
        return 0, 0
    contrib = [count_levels(fe_codes[0])]
    for codes in fe_codes[1:]:
        contrib.append(count_levels(codes) - bipartite_components(fe_codes[0], codes))
    nested = 0
    for codes, c in zip(fe_codes, contrib, strict=True):
        if any(is_nested(codes, cl) for cl in cluster_codes):
            nested += c
    return int(sum(contrib)), int(nested)


def _subtract_group_means(col: Array, codes: np.ndarray, weights: Array | None, inv_wsum: Array) -> float:
    """Subtract the (weighted) group means from one column in place; returns the largest absolute mean."""
    sums = np.bincount(codes, weights=col if weights is None else col * weights, minlength=inv_wsum.shape[0])
    means = sums * inv_wsum
    col -= means[codes]
    return float(np.abs(means).max()) if means.size else 0.0


def demean(
    values: Array,
    fe_codes: Sequence[np.ndarray],
    weights: Array | None = None,
    *,
    tol: float = DEFAULT_TOL,
    max_iter: int = DEFAULT_MAX_ITER,
) -> int:
    """Remove the fixed effects from the columns of ``values`` in place; returns the most sweeps a column took.

    One fixed effect: one exact (weighted) demeaning. Several: alternating projections, column by column,
    until the largest absolute change of the column in a sweep is below ``tol`` times the larger of 1 and the
    column's largest absolute value; raises EstimationError after ``max_iter`` sweeps.
    """
    if not fe_codes:
        return 0
    wsums: list[Array] = [
        np.asarray(np.bincount(c) if weights is None else np.bincount(c, weights=weights), dtype=np.float64)
        for c in fe_codes
    ]
    inv_w = [np.where(ws > 0, 1.0 / np.where(ws > 0, ws, 1.0), 0.0) for ws in wsums]
    if len(fe_codes) == 1:
        for jcol in range(values.shape[1]):
            _subtract_group_means(values[:, jcol], fe_codes[0], weights, inv_w[0])
        return 1
    if len(fe_codes) == 2:
        return _demean_two(values, fe_codes[0], fe_codes[1], weights, inv_w, tol=tol, max_iter=max_iter)
    worst = 0
    for jcol in range(values.shape[1]):
        col = values[:, jcol]
        limit = tol * max(float(np.abs(col).max()) if col.size else 0.0, 1.0)
        for sweep in range(1, max_iter + 1):
            change = 0.0
            for codes, iw in zip(fe_codes, inv_w, strict=True):
                change = max(change, _subtract_group_means(col, codes, weights, iw))
            if change <= limit:
                worst = max(worst, sweep)
                break
        else:
            worst = -1
            break
    if worst >= 0:
        return worst
    raise EstimationError(
        f"Absorbing {len(fe_codes)} fixed effects did not converge within {max_iter} sweeps "
        f"(tolerance {tol:g}); "
        "raise max_iter, loosen tol, or absorb fewer fixed effects."
    )


def _demean_two(
    values: Array,
    codes1: np.ndarray,
    codes2: np.ndarray,
    weights: Array | None,
    inv_w: list[Array],
    *,
    tol: float,
    max_iter: int,
) -> int:
    """Two fixed effects exactly up to ``tol``: eliminate the first by (weighted) group demeaning and solve the
    normal equations of the second, D2'W M1 D2 a = D2'W M1 v, by Jacobi-preconditioned conjugate gradients,
    column by column; then v <- M1 (v - D2 a). An iteration costs about one sweep of alternating projections
    and far fewer are needed on poorly connected designs. A column stops when its residual norm is below
    ``tol`` times its right-hand side's norm; returns the most iterations a column used."""
    inv1, inv2 = inv_w
    l2 = inv2.shape[0]
    # rows sorted by the first effect: its group sums become contiguous segment sums (no random access)
    order = np.argsort(codes1, kind="stable")
    c1s = codes1[order]
    starts = np.flatnonzero(np.concatenate([[True], c1s[1:] != c1s[:-1]]))
    counts = np.diff(np.append(starts, c1s.shape[0]))
    seg_inv = inv1[c1s[starts]]
    c2s = np.ascontiguousarray(codes2[order])
    ws = None if weights is None else np.ascontiguousarray(weights[order])

    seg_id = np.repeat(np.arange(starts.shape[0]), counts)  # segment of each sorted row
    spread = np.empty(c1s.shape[0])  # reused buffers: fresh n-sized arrays each iteration cost page faults
    gathered = np.empty(c1s.shape[0])
    weighted = np.empty(c1s.shape[0]) if ws is not None else None

    def m1(v: Array) -> Array:
        """v <- M1 v in place (sorted rows)."""
        src = v if ws is None else np.multiply(v, ws, out=weighted)
        sums = np.add.reduceat(src, starts)
        np.take(sums * seg_inv, seg_id, out=spread, mode="clip")
        np.subtract(v, spread, out=v)
        return v

    def d2t(v: Array) -> Array:
        src = v if ws is None else np.multiply(v, ws, out=weighted)
        return np.asarray(np.bincount(c2s, weights=src, minlength=l2), dtype=np.float64)

    worst = 0
    for j in range(values.shape[1]):
        col = values[:, j][order]
        b = d2t(m1(col.copy()))
        goal = tol * max(float(np.sqrt(b @ b)), 1e-300)
        x = np.zeros(l2)
        r = b.copy()
        zvec = r * inv2
        pdir = zvec.copy()
        rz = float(r @ zvec)
        used = 0
        converged = float(np.sqrt(r @ r)) <= goal
        while not converged and used < max_iter:
            used += 1
            ap = d2t(m1(np.take(pdir, c2s, out=gathered, mode="clip")))
            denom = float(pdir @ ap)
            if denom <= 0:
                break
            alpha = rz / denom
            x += alpha * pdir
            r -= alpha * ap
            converged = float(np.sqrt(r @ r)) <= goal
            zvec = r * inv2
            rz_new = float(r @ zvec)
            pdir = zvec + (rz_new / rz) * pdir
            rz = rz_new
        if not converged and float(np.sqrt(r @ r)) > goal:
            raise EstimationError(
                f"Absorbing 2 fixed effects did not converge within {max_iter} sweeps (tolerance {tol:g}); "
                "raise max_iter, loosen tol, or absorb fewer fixed effects."
            )
        np.subtract(col, np.take(x, c2s, out=gathered, mode="clip"), out=col)
        values[order, j] = m1(col)
        worst = max(worst, used, 1)
    return worst


def centred_norms(values: Array, weights: Array | None = None) -> Array:
    """Weighted norm of each column after subtracting its weighted mean (0 for a constant column)."""
    out = np.empty(values.shape[1])
    wsum = float(values.shape[0]) if weights is None else float(weights.sum())
    for j in range(values.shape[1]):
        col = values[:, j]
        if weights is None:
            centred = col - col.sum() / wsum
            out[j] = np.sqrt(centred @ centred)
        else:
            centred = col - (weights @ col) / wsum
            out[j] = np.sqrt(centred @ (centred * weights))
    return out


def _columns(values: np.ndarray | Sequence[np.ndarray] | None, n: int | None) -> list[np.ndarray]:
    """Split a 1-D array, a 2-D array or a list of 1-D arrays into a list of 1-D columns (no copy)."""
    if values is None:
        return []
    if isinstance(values, np.ndarray):
        return [values] if values.ndim == 1 else [values[:, j] for j in range(values.shape[1])]
    return [np.asarray(v) for v in values]


def _project_out(t: Array, cc: Array, norms: Array) -> tuple[Array, list[int]]:
    """Residualise t on the columns of cc; returns the residuals and the positions of collinear columns.

    Fast path: :class:`~ivdossier.estimation.linalg.Projector` with a well-conditioned scaled Gram matrix
    (then no column is near-collinear). Otherwise a Householder QR in the given column order detects the
    collinear columns and the projection on the others is exact.
    """
    proj = Projector(cc)
    if not proj.exact:
        return proj.residual(t), []
    r = np.linalg.qr(cc, mode="r")
    keep = np.abs(np.diag(r)) > COLLINEAR_TOL * norms
    if not keep.all():
        proj = Projector(cc[:, keep])
    return proj.residual(t), [i for i in range(cc.shape[1]) if not keep[i]]


def gram_coefficients(gcc: Array, gct: Array, norms: Array) -> Array | None:
    """Least-squares coefficients from the normal equations when the unit-scaled Gram matrix of the controls is
    well conditioned (Cholesky diagonal above GRAM_MIN_DIAG); None sends the caller to the exact QR path."""
    import scipy.linalg

    inv = 1.0 / norms
    try:
        chol = np.linalg.cholesky(gcc * np.outer(inv, inv))
    except np.linalg.LinAlgError:
        return None
    if float(np.diag(chol).min()) <= GRAM_MIN_DIAG:
        return None
    sol = scipy.linalg.cho_solve((chol, True), gct * inv[:, None], check_finite=False)
    return np.asarray(sol * inv[:, None], dtype=np.float64)


def partial_out(
    targets: np.ndarray | Sequence[np.ndarray],
    *,
    controls: np.ndarray | Sequence[np.ndarray] | None = None,
    fe_codes: Sequence[np.ndarray] = (),
    weights: np.ndarray | None = None,
    cluster_codes: Sequence[np.ndarray] = (),
    tol: float = DEFAULT_TOL,
    max_iter: int = DEFAULT_MAX_ITER,
) -> Absorbed:
    """Residualise ``targets`` (n x p, or a list of p columns) on an intercept, ``controls`` and fixed effects.

    The intercept is implied: by the fixed effects when present, otherwise added explicitly. Weighted
    projections use ``weights``; the returned columns (Fortran order) are multiplied by sqrt(w).
    ``dropped_controls`` lists the controls that are constant, absorbed by the fixed effects or collinear
    with earlier controls; they are left out of the projection and of the degrees of freedom (the caller
    decides whether that is an error).
    """
    t_cols = _columns(targets, None)
    c_cols = _columns(controls, None)
    n = t_cols[0].shape[0]
    p, k_c = len(t_cols), len(c_cols)
    both = np.empty((n, p + k_c), dtype=np.float64, order="F")
    for j, col in enumerate(t_cols + c_cols):
        both[:, j] = col
    del t_cols, c_cols
    w = None if weights is None else np.asarray(weights, dtype=np.float64)
    if fe_codes:
        pre = centred_norms(both, w)
        iterations = demean(both, fe_codes, w, tol=tol, max_iter=max_iter)
        n_absorbed, n_nested = absorbed_df(fe_codes, cluster_codes)
        n_intercept = 0
    else:
        iterations = 0
        wsum = float(n) if w is None else float(w.sum())
        means = (both.sum(axis=0) if w is None else w @ both) / wsum
        both -= means[None, :]
        pre = None
        n_absorbed, n_nested = 0, 0
        n_intercept = 1
    if w is not None:
        both *= np.sqrt(w)[:, None]
    # one Gram pass gives every norm and the normal equations of the controls
    gram = both.T @ both
    norms_now = np.sqrt(np.clip(np.diag(gram), 0.0, None))
    if pre is None:
        pre = norms_now
    t = both[:, :p]
    dropped: list[int] = []
    if k_c:
        cc = both[:, p:]
        after_fe = norms_now[p:]
        alive = [j for j in range(k_c) if after_fe[j] > COLLINEAR_TOL * pre[p + j] and pre[p + j] > 0]
        dropped = [j for j in range(k_c) if j not in alive]
        if alive:
            idx = np.asarray(alive)
            sub = cc if len(alive) == k_c else cc[:, alive]
            coef = gram_coefficients(gram[p:, p:][np.ix_(idx, idx)], gram[p:, :p][idx], after_fe[idx])
            if coef is not None:
                t = tall_matmul(sub, coef, subtract_from=t)
            else:
                t, bad = _project_out(t, sub, after_fe[idx])
                dropped += [alive[i] for i in bad]
    fe_levels = tuple(count_levels(cd) for cd in fe_codes)
    n_used_controls = k_c - len(dropped)
    return Absorbed(
        columns=np.asfortranarray(t),
        n_partialled=n_intercept + n_used_controls + n_absorbed,
        n_controls=n_used_controls,
        n_absorbed=n_absorbed,
        n_absorbed_nested=n_nested,
        fe_levels=fe_levels,
        iterations=iterations,
        scale=pre[:p],
        dropped_controls=tuple(sorted(dropped)),
    )
