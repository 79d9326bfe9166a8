"""Sufficient statistics of a partialled IV model: one orthonormal basis and the group sums of its products.

After partialling (intercept, controls, absorbed effects) and sqrt(w) scaling, the columns C = [Z, X, y]
(k instruments, p endogenous regressors, optionally the outcome; m columns in that order) are divided by their
norms (``scale``, so every column has unit length) and factored as C / scale = Q R, Q (n x m) with orthonormal
columns and R (m x m) upper triangular. Every statistic of the diagnostic suite is a function of

* ``r``: R. Every cross-product is C'C = diag(scale) R'R diag(scale), and every least-squares fit among the
  columns is a small problem in the coordinates of the basis Q (an n-vector Q a is represented by a);
* ``moments``: for each clustering dimension d (the rows themselves for the robust covariance; for two-way
  clustering the two dimensions and their intersection), K_d = sum_g t_g t_g', where the u = m(m+1)/2 entries
  of t_g are the upper triangle of T_g = sum_{i in g} q_i q_i' (q_i the i-th row of Q). The cluster sum of
  any score (A'q_i)(q_i'a) is A'T_g a, a linear function of t_g, so every robust or cluster meat matrix of
  the suite is W'K_d W for a small weight matrix W built from A and a;
* ``n``, the number of groups per dimension and the degrees-of-freedom counts.

The sums can be accumulated chunk by chunk (:class:`MomentAccumulator`: ``add`` a chunk of rows with their
group codes, ``merge`` two accumulators, ``finish``), from the orthonormal rows (exact path, in memory) or from
the standardised columns themselves with the basis applied at the end (out-of-core path: one pass for the
Gram matrix, one for the grouped sums). Working in the orthonormal basis makes every statistic invariant to a
change of instrument basis and equivariant to the units of each column, and keeps nearly collinear
instruments accurate to the precision the data carry.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.covariance import CovSpec, intersection_codes
from ivdossier.estimation.linalg import one_blas_thread

Array = NDArray[np.float64]
BLOCK_ROWS = 65536
# relative tolerance for rank: a unit-length instrument whose distance from the span of the other instruments
# is below RANK_RTOL counts as collinear (pivoted QR of the standardised instrument block)
RANK_RTOL = 1e-9
# a first stage counts as zero when the instruments explain less than ZERO_RTOL of a treatment's length
ZERO_RTOL = 1e-10
# relative eigenvalue below which a covariance matrix counts as singular
SINGULAR_RTOL = 1e-10
# CholeskyQR2 is used when the smallest diagonal of the Cholesky factor of the unit-diagonal Gram matrix
# exceeds this (condition number below about 1e6); otherwise Householder QR
CHOLQR_MIN_DIAG = 1e-6


class NotComputable(EstimationError):
    """A statistic cannot be computed for this model; the message says why (caught section by section)."""


@functools.lru_cache(maxsize=64)
def pack_index(m: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column indices of the upper triangle (a <= b) of an m x m matrix, in packing order (cached;
    the arrays are read-only)."""
    ia, ib = np.triu_indices(m)
    ia.flags.writeable = False
    ib.flags.writeable = False
    return ia, ib


def packed_products(q: np.ndarray) -> Array:
    """Rows q_a q_b for a <= b of each row of q (n x m) -> (n x m(m+1)/2), column-major."""
    ia, ib = pack_index(q.shape[1])
    qf = np.asfortranarray(q, dtype=np.float64)
    out = np.empty((qf.shape[0], ia.size), dtype=np.float64, order="F")
    for j, (a, b) in enumerate(zip(ia, ib, strict=True)):
        np.multiply(qf[:, a], qf[:, b], out=out[:, j])
    return out


def pack_weights(mats: Array) -> Array:
    """Weights w with t . w = <T, M> for symmetric T packed as t; ``mats`` is (..., m, m) -> (..., u)."""
    m = mats.shape[-1]
    ia, ib = pack_index(m)
    sym = mats + np.swapaxes(mats, -1, -2)
    w = sym[..., ia, ib]
    w[..., ia == ib] *= 0.5
    return np.asarray(w, dtype=np.float64)


def packed_map(basis: np.ndarray) -> Array:
    """The linear map L with pack(B' T B) = L pack(T) for symmetric T (m x m) and ``basis`` B (m x s)."""
    b = np.asarray(basis, dtype=np.float64)
    m, s = b.shape
    ia, ib = pack_index(s)
    ca, cb = pack_index(m)
    lin = np.empty((ia.size, ca.size))
    for col, (c, d) in enumerate(zip(ca, cb, strict=True)):
        # T_cd (and T_dc when c != d) contributes B[c, a] B[d, b] (+ B[d, a] B[c, b]) to entry (a, b)
        contrib = b[c, ia] * b[d, ib]
        if c != d:
            contrib = contrib + b[d, ia] * b[c, ib]
        lin[:, col] = contrib
    return lin


@dataclass(eq=False)
class MomentAccumulator:
    """Running sums for :class:`CrossProducts`, fed chunk by chunk; ``n_dims`` = 0 for the robust covariance.

    Holds: the row count, the Gram matrix sum_i b_i b_i' of the rows given (m x m), and either the row sum
    K = sum_i t_i t_i' (robust; t_i packs b_i b_i') or, for each cluster dimension, the per-cluster sums T_g
    packed as rows of a (G_d x u) array indexed by the global cluster code. Merging adds the sums, aligning
    clusters by code, so chunks may be cut anywhere (a cluster may span chunks).
    """

    m: int
    n_dims: int
    n: int = 0
    gram: Array = field(default_factory=lambda: np.zeros((0, 0)))
    row_moments: Array = field(default_factory=lambda: np.zeros((0, 0)))
    group_sums: list[Array] = field(default_factory=list)

    def __post_init__(self) -> None:
        u = self.m * (self.m + 1) // 2
        if self.gram.size == 0:
            self.gram = np.zeros((self.m, self.m))
        if self.row_moments.size == 0:
            self.row_moments = np.zeros((u, u))
        if not self.group_sums:
            self.group_sums = [np.zeros((0, u)) for _ in range(self.n_dims)]

    def add(self, rows: np.ndarray, codes: Sequence[np.ndarray] = ()) -> None:
        """Add a chunk of rows (n_chunk x m) with one int64 code array (0..G-1) per cluster dimension."""
        b = np.asarray(rows, dtype=np.float64)
        if b.ndim != 2 or b.shape[1] != self.m:
            raise InvalidInputError(f"A chunk must have {self.m} columns, got shape {b.shape}.")
        if len(codes) != self.n_dims:
            raise InvalidInputError(f"Expected {self.n_dims} cluster code array(s), got {len(codes)}.")
        self.n += b.shape[0]
        self.gram += b.T @ b
        if self.n_dims == 0:
            prods = packed_products(b)
            self.row_moments += prods.T @ prods
            return
        u = self.m * (self.m + 1) // 2
        for d, c in enumerate(codes):
            top = int(c.max()) + 1 if c.size else 0
            if top > self.group_sums[d].shape[0]:
                grown = np.zeros((top, u))
                grown[: self.group_sums[d].shape[0]] = self.group_sums[d]
                self.group_sums[d] = grown
        # one product column at a time into one scratch vector, summed by group in every dimension (the
        # products matrix is never formed)
        scratch = np.empty(b.shape[0])
        for j, (ia, ib) in enumerate(zip(*pack_index(self.m), strict=True)):
            np.multiply(b[:, ia], b[:, ib], out=scratch)
            for d, c in enumerate(codes):
                target = self.group_sums[d]
                target[:, j] += np.bincount(c, weights=scratch, minlength=target.shape[0])

    def merge(self, other: MomentAccumulator) -> MomentAccumulator:
        """A new accumulator holding the sums of both (clusters aligned by their global codes)."""
        if (other.m, other.n_dims) != (self.m, self.n_dims):
            raise InvalidInputError("Cannot merge accumulators of different shapes; build both alike.")
        sums = []
        for a, b in zip(self.group_sums, other.group_sums, strict=True):
            out = np.zeros((max(a.shape[0], b.shape[0]), a.shape[1]))
            out[: a.shape[0]] += a
            out[: b.shape[0]] += b
            sums.append(out)
        return MomentAccumulator(
            self.m,
            self.n_dims,
            self.n + other.n,
            self.gram + other.gram,
            self.row_moments + other.row_moments,
            sums,
        )

    def finish(self, basis_inv: np.ndarray | None = None) -> tuple[tuple[Array, ...], tuple[int, ...]]:
        """Moment matrices K_d and the number of groups with a nonzero sum per dimension (the row count for
        the robust case); ``basis_inv`` maps the rows given to orthonormal rows (q_i = b_i basis_inv), used
        when the chunks held standardised columns rather than Q."""
        u = self.m * (self.m + 1) // 2
        # t(q) = L t(b): entry (a, b) of R^{-T} T R^{-1}
        lin = np.eye(u) if basis_inv is None else packed_map(basis_inv)
        if self.n_dims == 0:
            return (lin @ self.row_moments @ lin.T,), (self.n,)
        moments = []
        counts = []
        for s in self.group_sums:
            t = s @ lin.T
            moments.append(t.T @ t)
            counts.append(int(np.count_nonzero(np.any(s != 0, axis=1))))
        return tuple(moments), tuple(counts)


def _cholesky_upper(gram: Array) -> Array | None:
    """Upper Cholesky factor of a unit-diagonal Gram matrix, or None when it is too ill-conditioned for
    CholeskyQR2 (smallest diagonal below CHOLQR_MIN_DIAG) and Householder QR must be used."""
    try:
        r1 = np.linalg.cholesky((gram + gram.T) / 2).T
    except np.linalg.LinAlgError:
        return None
    return np.asarray(r1, dtype=np.float64) if float(np.diag(r1).min()) > CHOLQR_MIN_DIAG else None


def orthonormal_rows(a: Array) -> tuple[Array | None, Array, bool]:
    """Factor a (n x m, unit-length columns) as Q R; returns (Q or None, R, exact).

    CholeskyQR2 (two Cholesky passes over the Gram matrix) when the columns are well conditioned, then Q is
    not formed (None: rows are a R^{-1}, computed block by block); else Householder QR (exact, Q returned).
    """
    import scipy.linalg

    gram = a.T @ a
    try:
        r1 = np.linalg.cholesky(gram).T
        ok = bool(np.diag(r1).min() > CHOLQR_MIN_DIAG)
    except np.linalg.LinAlgError:
        ok = False
    if ok:
        r1inv = scipy.linalg.solve_triangular(r1, np.eye(a.shape[1]), check_finite=False)
        g2 = np.zeros_like(gram)
        for start in range(0, a.shape[0], BLOCK_ROWS):
            blk = a[start : start + BLOCK_ROWS] @ r1inv
            g2 += blk.T @ blk
        r2 = np.linalg.cholesky((g2 + g2.T) / 2).T
        return None, np.asarray(r2 @ r1, dtype=np.float64), False
    q, r = np.linalg.qr(a)
    signs = np.where(np.diag(r) < 0, -1.0, 1.0)
    return np.asarray(q * signs, dtype=np.float64), np.asarray(signs[:, None] * r, dtype=np.float64), True


@dataclass(frozen=True, eq=False)
class CrossProducts:
    """The sufficient statistics of one partialled model (see the module docstring for what each holds)."""

    n: int
    k: int
    p: int
    has_y: bool
    r: Array
    scale: Array
    kind: str
    small_sample: bool
    moments: tuple[Array, ...]
    n_groups: tuple[int, ...]
    n_partialled: int
    n_partialled_nested: int
    exact_basis: bool

    @property
    def m(self) -> int:
        """Number of columns (k + p + has_y)."""
        return self.k + self.p + int(self.has_y)

    @property
    def iz(self) -> slice:
        """Coordinates of the instrument block."""
        return slice(0, self.k)

    @property
    def ix(self) -> slice:
        """Columns of the endogenous regressors."""
        return slice(self.k, self.k + self.p)

    @property
    def iy(self) -> int:
        """Column of the outcome."""
        if not self.has_y:
            raise InvalidInputError("These cross-products hold no outcome column.")
        return self.k + self.p

    def coords(self, cols: slice | int) -> Array:
        """Coordinates (m x c, or m) of standardised columns in the orthonormal basis."""
        return np.asarray(self.r[:, cols], dtype=np.float64)

    def instrument_condition(self) -> float:
        """Condition number of the instrument block after scaling each instrument to unit length."""
        sv = np.linalg.svd(self.r[: self.k, : self.k], compute_uv=False)
        return float(sv[0] / sv[-1]) if sv[-1] > 0 else float("inf")

    def df(self, n_regressors: int, *, nested: bool = False) -> int:
        """Residual degrees of freedom n - regressors - partialled (nested levels left out if asked)."""
        d = self.n - n_regressors - self.n_partialled + (self.n_partialled_nested if nested else 0)
        if d <= 0:
            raise NotComputable(
                f"no residual degrees of freedom ({self.n} rows, {n_regressors} regressors, "
                f"{self.n_partialled} partialled columns)"
            )
        return d

    def cluster_counts(self) -> tuple[int, ...]:
        """Number of clusters in each clustering dimension (the intersection of two-way left out)."""
        return self.n_groups[:2]

    def meat(
        self,
        regressors: Array,
        resid: Array,
        n_regressors: int | None = None,
        *,
        small_sample: bool | None = None,
    ) -> Array:
        """Meat of the stacked scores (regressors' q_i)(q_i' resid_j) with the small-sample factors.

        ``regressors`` (m x r) and ``resid`` (m x e) are coordinates; the result is (e r x e r),
        equation-major. The df count uses ``n_regressors`` (default r); ``small_sample`` overrides the
        model's setting (False for the large-sample meats of GMM weights and LM statistics).
        """
        adjust = self.small_sample if small_sample is None else small_sample
        a = np.asarray(regressors, dtype=np.float64).reshape(self.m, -1)
        e = np.asarray(resid, dtype=np.float64).reshape(self.m, -1)
        r_, e_ = a.shape[1], e.shape[1]
        kreg = r_ if n_regressors is None else n_regressors
        mats = np.einsum("as,bj->jsab", a, e).reshape(e_ * r_, self.m, self.m)
        w = pack_weights(mats).T  # u x (e r)
        if self.kind == "heteroskedastic":
            meat = w.T @ self.moments[0] @ w
            if adjust:
                meat *= self.n / self.df(kreg)
            return np.asarray(meat, dtype=np.float64)
        if self.kind != "clustered":
            raise InvalidInputError("meat() applies to robust and cluster covariances only.")
        signs = (1.0,) if len(self.moments) == 1 else (1.0, 1.0, -1.0)
        total = np.zeros((e_ * r_, e_ * r_))
        for k_d, g, sign in zip(self.moments, self.n_groups, signs, strict=True):
            f = 1.0
            if adjust:
                if g < 2:
                    raise NotComputable("a cluster variable has a single cluster")
                f = g / (g - 1) * (self.n - 1) / self.df(kreg, nested=True)
            total += sign * f * (w.T @ k_d @ w)
        return total

    def covariance(
        self,
        regressors: Array,
        resid: Array,
        bread: Array | None = None,
        n_regressors: int | None = None,
        *,
        small_sample: bool | None = None,
    ) -> Array:
        """Sandwich covariance of stacked coefficients (coordinates in, standardised units out)."""
        a = np.asarray(regressors, dtype=np.float64).reshape(self.m, -1)
        e = np.asarray(resid, dtype=np.float64).reshape(self.m, -1)
        r_, e_ = a.shape[1], e.shape[1]
        kreg = r_ if n_regressors is None else n_regressors
        b = np.linalg.inv(a.T @ a) if bread is None else np.asarray(bread, dtype=np.float64)
        adjust = self.small_sample if small_sample is None else small_sample
        if self.kind == "homoskedastic":
            sigma = e.T @ e / (self.df(kreg) if adjust else self.n)
            return np.asarray(np.kron(sigma, b), dtype=np.float64)
        big = b if e_ == 1 else np.kron(np.eye(e_), b)
        cov = big @ self.meat(a, e, kreg, small_sample=adjust) @ big
        return np.asarray((cov + cov.T) / 2, dtype=np.float64)

    def with_kind(self, kind: str) -> CrossProducts:
        """The same sums read under the homoskedastic covariance (the moments are not needed for it)."""
        if kind != "homoskedastic":
            raise InvalidInputError("Only a switch to the homoskedastic covariance needs no new sums.")
        return CrossProducts(
            self.n,
            self.k,
            self.p,
            self.has_y,
            self.r,
            self.scale,
            "homoskedastic",
            self.small_sample,
            (),
            (),
            self.n_partialled,
            self.n_partialled_nested,
            self.exact_basis,
        )

    def subset(
        self, instruments: Sequence[int], endogenous: Sequence[int], *, outcome: bool = True
    ) -> CrossProducts:
        """The sufficient statistics of a sub-model that keeps some instruments and endogenous columns (indices
        within each block, in the order given) and optionally the outcome, from these sums alone.

        The kept standardised columns are Q R_s (R_s the kept columns of R); a QR factorisation R_s = Q_s R'
        gives the new basis Q Q_s, whose rows are Q_s' q_i, so every moment matrix maps by the packed form of
        T -> Q_s' T Q_s. No pass over the rows.
        """
        cols = [int(j) for j in instruments] + [self.k + int(j) for j in endogenous]
        if outcome:
            cols.append(self.iy)
        r_s = self.r[:, cols]
        q_s, r_new = np.linalg.qr(r_s)
        signs = np.where(np.diag(r_new) < 0, -1.0, 1.0)
        q_s, r_new = q_s * signs, signs[:, None] * r_new
        lin = packed_map(q_s)
        moments = tuple(np.asarray(lin @ k_d @ lin.T, dtype=np.float64) for k_d in self.moments)
        return CrossProducts(
            n=self.n,
            k=len(instruments),
            p=len(endogenous),
            has_y=outcome,
            r=np.asarray(r_new, dtype=np.float64),
            scale=np.asarray(self.scale[cols], dtype=np.float64),
            kind=self.kind,
            small_sample=self.small_sample,
            moments=moments,
            n_groups=self.n_groups,
            n_partialled=self.n_partialled,
            n_partialled_nested=self.n_partialled_nested,
            exact_basis=self.exact_basis,
        )

    def to_dict(self) -> dict[str, Any]:
        """A description of the sums held (for documentation and debugging, not the sums themselves)."""
        return {
            "n": self.n,
            "columns": {"instruments": self.k, "endogenous": self.p, "outcome": int(self.has_y)},
            "basis": "Householder QR" if self.exact_basis else "CholeskyQR2",
            "covariance": self.kind,
            "groups": list(self.n_groups),
            "instrument_condition": self.instrument_condition() if self.k else None,
        }


def build(
    z: np.ndarray,
    x: np.ndarray,
    y: np.ndarray | None,
    spec: CovSpec,
    *,
    n_partialled: int,
    n_partialled_nested: int = 0,
) -> CrossProducts:
    """One pass over partialled arrays: scale, orthonormal basis and the grouped moments of its rows."""
    with one_blas_thread():
        return _build(z, x, y, spec, n_partialled, n_partialled_nested)


def _build(
    z: np.ndarray,
    x: np.ndarray,
    y: np.ndarray | None,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int,
) -> CrossProducts:
    import scipy.linalg

    parts = [np.asarray(z, dtype=np.float64), np.asarray(x, dtype=np.float64)]
    parts = [a[:, None] if a.ndim == 1 else a for a in parts]
    if y is not None:
        yv = np.asarray(y, dtype=np.float64)
        parts.append(yv[:, None] if yv.ndim == 1 else yv)
    k, p = parts[0].shape[1], parts[1].shape[1]
    a = np.concatenate(parts, axis=1)
    n, m = a.shape
    scale = np.sqrt(np.einsum("ij,ij->j", a, a))
    unit = np.where(scale > 0, scale, 1.0)
    a /= unit
    codes: list[np.ndarray] = list(spec.clusters) if spec.kind == "clustered" else []
    if len(codes) == 2:
        codes.append(intersection_codes(codes[0], codes[1]))
    need_moments = spec.kind != "homoskedastic"
    acc = MomentAccumulator(m, len(codes))
    gram = a.T @ a
    r1 = _cholesky_upper(gram)
    exact = r1 is None
    if r1 is not None:
        # CholeskyQR2 fused with the moment pass: rows q1 = a R1^{-1} are orthonormal up to round-off; their
        # Gram matrix gives R2 (R = R2 R1) and their moments are mapped by R2^{-1} at the end (``finish``)
        r1inv = scipy.linalg.solve_triangular(r1, np.eye(m), check_finite=False)
        for start in range(0, n, BLOCK_ROWS):
            stop = min(start + BLOCK_ROWS, n)
            q1 = a[start:stop] @ r1inv
            if need_moments:
                acc.add(q1, [c[start:stop] for c in codes])
            else:
                acc.n += q1.shape[0]
                acc.gram += q1.T @ q1
        r2 = np.linalg.cholesky((acc.gram + acc.gram.T) / 2).T
        r = np.asarray(r2 @ r1, dtype=np.float64)
        basis_inv = scipy.linalg.solve_triangular(r2, np.eye(m), check_finite=False)
    else:
        q, r = np.linalg.qr(a)
        signs = np.where(np.diag(r) < 0, -1.0, 1.0)
        q, r = q * signs, signs[:, None] * r
        if need_moments:
            for start in range(0, n, BLOCK_ROWS):
                stop = min(start + BLOCK_ROWS, n)
                acc.add(q[start:stop], [c[start:stop] for c in codes])
        basis_inv = None
    moments: tuple[Array, ...] = ()
    counts: tuple[int, ...] = ()
    if need_moments:
        moments, _ = acc.finish(basis_inv)
        # clusters are counted from their codes (a cluster whose partialled rows are all zero still counts)
        counts = tuple(int(np.count_nonzero(np.bincount(c))) for c in codes)
    return CrossProducts(
        n=n,
        k=k,
        p=p,
        has_y=y is not None,
        r=r,
        scale=scale,
        kind=spec.kind,
        small_sample=spec.small_sample,
        moments=moments,
        n_groups=counts,
        n_partialled=n_partialled,
        n_partialled_nested=n_partialled_nested,
        exact_basis=exact,
    )


def collinear_instruments(cp: CrossProducts, *, rtol: float = RANK_RTOL) -> list[int]:
    """Instruments (indices) that a pivoted QR of the unit-length instrument block finds redundant."""
    import scipy.linalg

    if cp.k == 0:
        return []
    zero = [j for j in range(cp.k) if cp.scale[j] == 0]
    _, rr, piv = scipy.linalg.qr(cp.r[: cp.k, : cp.k], pivoting=True)
    d = np.abs(np.diag(rr))
    bad = [int(piv[i]) for i in range(cp.k) if d[i] <= rtol * max(d[0], 1e-300)]
    return sorted(set(bad) | set(zero))


def solve_psd(mat: Array, vec: Array, what: str) -> Array:
    """mat^{-1} vec for a symmetric positive semi-definite mat; NotComputable when it is singular."""
    sym = (mat + mat.T) / 2
    vals, vecs = np.linalg.eigh(sym)
    top = float(np.abs(vals).max()) if vals.size else 0.0
    if top == 0.0 or vals.min() <= SINGULAR_RTOL * top:
        rank = int(np.count_nonzero(vals > SINGULAR_RTOL * top))
        raise NotComputable(f"the covariance of {what} is singular (rank {rank} of {vals.size})")
    return np.asarray(vecs @ ((vecs.T @ vec).T / vals).T, dtype=np.float64)


def quad_form_inv(mat: Array, vec: Array, what: str) -> float:
    """vec' mat^{-1} vec with the singularity check of :func:`solve_psd`."""
    v = np.asarray(vec, dtype=np.float64).ravel()
    return float(v @ solve_psd(mat, v, what))


def lstsq_coords(a: Array, b: Array) -> tuple[Array, Array]:
    """Least squares in coordinates: coefficients of b (m x e) on a (m x r) and residual coordinates."""
    import scipy.linalg

    qa, ra = np.linalg.qr(a)
    if np.any(np.abs(np.diag(ra)) <= RANK_RTOL * np.maximum(np.linalg.norm(a, axis=0), 1e-300)):
        raise NotComputable("the regressors of an auxiliary regression are collinear")
    coef = scipy.linalg.solve_triangular(ra, qa.T @ b, check_finite=False)
    return np.asarray(coef, dtype=np.float64), np.asarray(b - a @ coef, dtype=np.float64)
