"""The sufficient statistics of a model without fixed effects in two passes over the raw columns, with no
partialled copy of the data: the fast path of :func:`ivdossier.estimation.api.estimate`.

Pass 1 reads the columns in blocks of rows and sums the Gram matrix of B = [sqrt(w), sqrt(w)(a - s)] (a the
outcome, treatments, instruments and controls; s a shift, the mean of the first block's rows). Its Schur
complements give the weighted centred Gram matrix (intercept out), the control coefficients Gamma (normal
equations of the unit-length controls, as :func:`ivdossier.estimation.absorb.partial_out` solves them) and the
Gram matrix S of the partialled columns C = [Z, X, y], hence a first triangular factor R1 D1 of C (D1 the lengths
from S, R1 the Cholesky factor of the unit-diagonal S). Pass 2 forms the rows b_i = B_i M (R1 D1)^{-1} of the
partialled, nearly orthonormal columns (M maps B to C; the partialled columns themselves are never stored) and
feeds them to :class:`~ivdossier.estimation.crossproducts.MomentAccumulator`: their Gram matrix G2 gives the
second CholeskyQR2 step R2 (R = R2 R1 D1, then unit-length columns) and the per-cluster (or per-row) sums of
their products give every meat matrix. So the basis is CholeskyQR2 computed from the rows themselves, as on the
in-memory path it replaces, with its first step taken from pass 1 instead of a pass of its own.

Rule (every quantity is scale-free, so the choice is the same in any units of any column). The fast path is
taken only when all of the following hold; otherwise :func:`one_pass_cross_products` returns the reason and the
caller uses the exact path (``prepare`` + ``build``: explicit partialled columns, Householder QR where needed),
which also names the offending columns:

1. no absorbed fixed effects; every value finite (a non-finite Gram matrix sends the data to the scan that drops
   incomplete rows or names the infinite value); weights positive; clusters with two levels at least;
2. every column keeps more than CENTRED_MIN = 1e-6 of its length after centring (no constant or nearly
   constant column), and the shift cost at most a factor SHIFT_MAX = 1e4 in cancellation (sum of squares about
   s over sum of squares about the mean; at most 1 + n / BLOCK_ROWS for any data);
3. the unit-length controls have a Cholesky factor with smallest diagonal above GRAM_MIN_DIAG = 1e-3 (the
   partialling path's own rule for the normal equations, so the residuals are those it would compute);
4. the rows b are orthonormal to within FIRST_STEP_TOL = 1e-2 (max |G2 - I|), so the second step starts from a
   basis with condition number below about 1.03;
5. the partialled columns pass the tests the exact path applies before taking its CholeskyQR2 branch: the
   unit-length [Z, X, y] have a Cholesky diagonal above CHOLQR_MIN_DIAG = 1e-6, [X, Z] above 1e-3 with each
   keeping more than 1e-6 of its centred length, and the outcome more than 1e-9.

Error bound. The fast path computes the exact path's quantities in another order, so it is judged against it.
(a) Centring: a - s is rounded as the exact path's a - mean is, and the centred Gram matrix is the shifted one
minus a correction that cancels at most a factor SHIFT_MAX (rule 2), so its relative error is at most about
SHIFT_MAX u (u = 1.1e-16; 1 + n / BLOCK_ROWS bounds the factor for any data, on ordinary data it is near 1).
(b) Control coefficients: the same normal equations under the same rule 3 as the exact path, whose own error
(about cond(unit-length controls)^2 u, below about 1e-10 under rule 3) they share up to the rounding of (a).
(c) Basis: by rule 4 the second step starts from rows with condition number below about 1.03, and CholeskyQR2 then
gives orthogonality ||Q'Q - I|| of order (rows x columns) u and a residual ||C - Q R|| / ||C|| of order
columns^2.5 u (Yamamoto, Nakatsukasa, Yanagisawa and Fukaya 2015; recalled from memory), the bounds of the exact
path's own CholeskyQR2 branch, to which rule 5 restricts the fast path. So the partialled columns the two paths
factor differ by at most about (SHIFT_MAX + cond(controls)^2) u relative, the same order as the exact path's own
error, and a statistic differs by its condition number with respect to those columns times that. Measured: every
number of the result within 1e-11 relative of the exact path on the designs of tests/test_estimation_onepass.py
(typically 1e-14), and the same decisions after rescaling any column by 1e8 or 1e-8.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from ivdossier.estimation.absorb import gram_coefficients
from ivdossier.estimation.covariance import intersection_codes
from ivdossier.estimation.crossproducts import CHOLQR_MIN_DIAG, CrossProducts, MomentAccumulator
from ivdossier.estimation.data import ModelColumns

Array = NDArray[np.float64]
BLOCK_ROWS = 8192
CENTRED_MIN = 1e-6
SHIFT_MAX = 1e4
FIRST_STEP_TOL = 1e-2
# the exact path's prepare(): [X, Z] clearly full rank (data._clearly_full_rank) and a varying outcome
FULL_RANK_MIN_DIAG = 1e-3
KEPT_MIN = 1e-6
OUTCOME_KEPT_MIN = 1e-9


def _fill(buf: Array, cols: Sequence[Array], shift: Array, sw: Array | None, start: int, stop: int) -> Array:
    """Rows start:stop of [sqrt(w), sqrt(w)(a - s)] written into ``buf`` (block x (1 + len(cols)))."""
    nb = stop - start
    out = buf[:nb]
    if sw is None:
        out[:, 0] = 1.0
        for j, col in enumerate(cols):
            np.subtract(col[start:stop], shift[j], out=out[:, j + 1])
    else:
        swb = sw[start:stop]
        out[:, 0] = swb
        for j, col in enumerate(cols):
            np.subtract(col[start:stop], shift[j], out=out[:, j + 1])
            out[:, j + 1] *= swb
    return out


def _partialled_tests(r: Array | None, lengths: Array, pre: Array, k: int, p: int) -> str:
    """The exact path's tests on the partialled columns [Z, X, y] (prepare(), then build()'s choice of basis):
    ``r`` the triangular factor of the unit-length columns, ``lengths`` their lengths and ``pre`` the lengths
    before partialling (after centring); with ``r`` None only the lengths are tested. Returns the reason to
    take the exact path, or ""."""
    if not lengths[-1] > OUTCOME_KEPT_MIN * pre[-1]:
        return "the outcome has (nearly) no variation left after partialling"
    if np.any(lengths[:-1] <= KEPT_MIN * pre[:-1]):
        return "a treatment or instrument keeps (nearly) nothing after partialling"
    if r is None:
        return ""
    xz = np.r_[np.arange(k, k + p), np.arange(0, k)].astype(np.int64)
    unit_xz = (r.T @ r)[np.ix_(xz, xz)]
    try:
        if float(np.diag(np.linalg.cholesky(unit_xz)).min()) <= FULL_RANK_MIN_DIAG:
            return "the treatments and instruments are nearly collinear after partialling"
    except np.linalg.LinAlgError:
        return "the treatments and instruments are collinear after partialling"
    if float(np.abs(np.diag(r)).min()) <= CHOLQR_MIN_DIAG:
        return "the partialled columns are nearly collinear (the exact path uses Householder QR)"
    return ""


def one_pass_cross_products(
    cols: ModelColumns, *, kind: str, small_sample: bool, instruments: bool = True
) -> tuple[CrossProducts | None, str]:
    """The sufficient statistics by the fast path, or (None, reason) when the module's rule sends the model to
    the exact path. ``instruments=False`` leaves the instruments out of the statistics (OLS) after the same
    checks. The columns are read as given; ``cols.finite_checked`` may be False (non-finite values fall back)."""
    if cols.fe_codes:
        return None, "absorbed fixed effects are removed in place by the exact path"
    if kind == "clustered" and min(cols.cl_levels, default=0) < 2:
        return None, "a cluster variable has a single level"
    w = cols.weights
    if w is not None and not bool(np.all(w > 0)):
        return None, "weights must be positive (the exact path names the rows)"
    arrays = list(cols.targets) + list(cols.control_cols)
    n, n_t, n_c = cols.n, len(cols.targets), len(cols.control_cols)
    p, k = len(cols.treatment), len(cols.instruments)
    m_all = 1 + n_t + n_c
    sw = None if w is None else np.sqrt(w)
    first = min(n, BLOCK_ROWS)
    with np.errstate(invalid="ignore", over="ignore"):
        shift = np.array([float(np.mean(a[:first])) for a in arrays])
    buf = np.empty((BLOCK_ROWS, m_all), order="F")
    gram = np.zeros((m_all, m_all))
    with np.errstate(invalid="ignore", over="ignore"):  # non-finite values are detected below
        for start in range(0, n, BLOCK_ROWS):
            blk = _fill(buf, arrays, shift, sw, start, min(start + BLOCK_ROWS, n))
            gram += blk.T @ blk
    if not np.isfinite(gram).all() or not np.isfinite(shift).all():
        return None, "missing or infinite values (the exact path drops or names them)"
    wsum = gram[0, 0]
    dev = gram[0, 1:] / wsum  # weighted mean of a - s
    centred = gram[1:, 1:] - np.outer(gram[0, 1:], dev)
    centred = (centred + centred.T) / 2
    pre = np.sqrt(np.clip(np.diag(centred), 0.0, None))
    raw = np.sqrt(np.clip(np.diag(gram[1:, 1:]) + shift * (2 * gram[0, 1:] + shift * wsum), 0.0, None))
    names = [cols.outcome, *cols.treatment, *cols.instruments, *cols.controls]
    for j, name in enumerate(names):
        if not pre[j] > CENTRED_MIN * raw[j]:
            return None, f"column {name!r} is constant or nearly so"
        if gram[1 + j, 1 + j] > SHIFT_MAX * pre[j] ** 2:
            return None, f"column {name!r} drifts far from its first rows' mean"
    it, ic = slice(0, n_t), slice(n_t, n_t + n_c)
    if n_c:
        coef = gram_coefficients(centred[ic, ic], centred[ic, it], pre[ic])
        if coef is None:
            return None, "the controls are nearly collinear (the exact path uses Householder QR)"
    else:
        coef = np.zeros((0, n_t))
    schur = centred[it, it] - centred[it, ic] @ coef
    # partialled columns in the order of CrossProducts: instruments, treatments, outcome
    order = np.r_[np.arange(1 + p, 1 + p + k), np.arange(1, 1 + p), 0].astype(np.int64)
    s_o = schur[np.ix_(order, order)]
    len0 = np.sqrt(np.clip(np.diag(s_o), 0.0, None))
    reason = _partialled_tests(None, len0, pre[order], k, p)
    if reason:
        return None, reason
    unit = s_o / np.outer(len0, len0)
    try:
        r1 = np.linalg.cholesky((unit + unit.T) / 2).T
    except np.linalg.LinAlgError:
        return None, "the partialled columns are collinear"
    # the same tests on the estimates from pass 1 first (their failure is never worth a second pass)
    reason = _partialled_tests(r1, len0, pre[order], k, p)
    if reason:
        return None, reason
    first_factor = r1 * len0[None, :]
    m = n_t
    # M maps the rows of B to the partialled columns: C = B M
    mmap = np.zeros((m_all, m))
    for o, t in enumerate(order):
        mmap[1 + t, o] = 1.0
        mmap[1 + n_t :, o] = -coef[:, t]
        mmap[0, o] = -(dev[t] - dev[n_t:] @ coef[:, t])
    fold = scipy.linalg.solve_triangular(first_factor, mmap.T, trans="T", check_finite=False).T
    codes: list[np.ndarray] = list(cols.cl_codes) if kind == "clustered" else []
    levels = list(cols.cl_levels) if kind == "clustered" else []
    if len(codes) == 2:
        inter = intersection_codes(codes[0], codes[1])
        codes.append(inter)
        levels.append(int(inter.max()) + 1)
    need_moments = kind != "homoskedastic"
    acc = MomentAccumulator(m, len(codes))
    u = m * (m + 1) // 2
    acc.group_sums = [np.zeros((g, u)) for g in levels]
    for start in range(0, n, BLOCK_ROWS):
        stop = min(start + BLOCK_ROWS, n)
        # (fold' B')' is B fold in Fortran order, the layout packed_products reads without a copy
        rows = (fold.T @ _fill(buf, arrays, shift, sw, start, stop).T).T
        if need_moments:
            acc.add(rows, [c[start:stop] for c in codes])
        else:
            acc.n += stop - start
            acc.gram += rows.T @ rows
    g2 = (acc.gram + acc.gram.T) / 2
    if not np.isfinite(g2).all() or float(np.abs(g2 - np.eye(m)).max()) > FIRST_STEP_TOL:
        return None, "the Gram matrix from one pass is too inaccurate for these columns"
    r2 = np.linalg.cholesky(g2).T
    full = r2 @ first_factor
    scale = np.sqrt(np.einsum("ij,ij->j", full, full))
    r = full / scale[None, :]
    reason = _partialled_tests(r, scale, pre[order], k, p)
    if reason:
        return None, reason
    moments: tuple[Array, ...] = ()
    if need_moments:
        r2inv = scipy.linalg.solve_triangular(r2, np.eye(m), check_finite=False)
        moments, _ = acc.finish(r2inv)
    cp = CrossProducts(
        n=n,
        k=k,
        p=p,
        has_y=True,
        r=np.asarray(r, dtype=np.float64),
        scale=np.asarray(scale, dtype=np.float64),
        kind=kind,
        small_sample=small_sample,
        moments=moments,
        n_groups=tuple(levels),
        n_partialled=1 + n_c,
        n_partialled_nested=0,
        exact_basis=False,
    )
    if not instruments and k:
        cp = cp.subset([], range(p))
    return cp, ""
