"""Weak-instrument-robust inference with many instruments: the jackknife Anderson-Rubin test and its strength measure.

Mikusheva and Sun (2022, Review of Economic Studies, "Inference with many weak instruments"). With the controls
(and an intercept) partialled out of y, x and the instruments Z, P the projection onto the partialled Z (rank K),
M = I - P and e = y - x b0:

    AR(b0) = sum_{i != j} P_ij e_i e_j / sqrt(K * Phi),
    Phi    = (2 / K) sum_{i != j} P_ij^2 / (M_ii M_jj + M_ij^2) * e_i (M e)_i * e_j (M e)_j     (cross-fit variance)

is asymptotically standard normal under H0 with many (K -> infinity), possibly weak instruments and
heteroskedasticity; the test rejects when AR(b0) exceeds the standard-normal 1 - alpha quantile (one-sided).
Source status: the formulas above and the one-sided rule are written from memory of the paper (recalled). The
stored public material searched for this project holds the abstracts of the paper and of the authors' survey
(Mikusheva and Sun, "Weak identification with many instruments", arXiv 2308.09535v2) but not their formulas,
critical values or simulation tables; third-party code in public repositories writes the same Phi, which is
agreement, not a source. The tests check the code against these formulas written with explicit matrices. The
cross-fit Phi is unbiased for the numerator's variance when the errors are independent with mean zero:
E[e_i (M e)_i e_j (M e)_j] = (M_ii M_jj + M_ij^2) s_i s_j for i != j (an exact identity).

Finite samples (our simulations; the paper's own size figures could not be read): the test rejects somewhat more
than its level with 50-200 instruments. Nominal 5%, MC s.e. 0.3 points, K + 1 clerks, heteroskedastic normal
errors: with 10 cases per clerk 6.3-6.8% at K = 50, 6.3-6.4% at K = 100 and 6.1% at K = 200
(benchmarks/sim_jackknife_ar_size.py and sim_jackknife_ar_finite_sample.py); with 40 cases per clerk 5.7% at
K = 50, 5.7-5.9% at K = 100 and 5.5% at K = 200. With the exact variance in place of Phi the rate is still 5.5-5.8%: the numerator
is a quadratic form in the errors, right-skewed (skewness exactly 8 tr(B^3) / (2 tr(B^2))^{3/2}, about
2 sqrt(2) / sqrt(K) for small leverages; 0.34 at K = 50), which a one-sided normal test turns into over-rejection.
The noise of Phi adds the rest, most with few cases per decision-maker (Phi uses within-decision-maker variation
only); its mean is within 0.5% of the exact variance, so it is not a bias. No change is made to the statistic or
its critical value: they are the paper's.

The strength measure F~ is the same statistic with e replaced by x:
F~ = sum_{i != j} P_ij x_i x_j / sqrt(K * Upsilon). AR(b) tends to F~ as |b| grows, so the confidence set is
unbounded exactly when F~ does not exceed the critical value. Its cut-off 4.14 is recalled (not found in the
stored material).

The confidence set {b : AR(b) <= z} is found exactly: the numerator is quadratic and Phi quartic in b, so every
boundary is a real root of a polynomial of degree at most four.

Controls are partialled out first, as in the paper's fixed-number-of-controls setting. With many controls for the
number of cases (e.g. fixed-effect cells that each hold two or three decision-makers) the partialled errors are no
longer independent and the numerator is no longer centred at zero: with e = M_W u and homoskedastic u its mean is
s^2 sum_i P_ii (P_W)_ii (exact). The authors' survey (abstract, arXiv 2308.09535v2) says as much and proposes a test
that partials out many exogenous regressors while keeping the jackknife's re-centring; its construction is not in
the stored material and is not implemented. Instead the result is not applicable when that centring error exceeds
``MAX_SHIFT`` standard deviations of the numerator (our rule; benchmarks/sim_jackknife_ar_many_cells.py shows the
over-rejection behind it).
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.absorb import is_nested
from ivdossier.estimation.jackknife_iv import orthonormal_basis
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]
# Mikusheva and Sun (2022): F~ above 4.14 keeps the JIVE-based Wald test's size at most 10% at nominal 5%
# (recalled from memory; check against the paper before quoting the cut-off)
STRENGTH_CUTOFF = 4.14
MAX_DENSE_N = 20_000
# Largest accepted centring error of the numerator from partialling out controls, in its standard deviations
# (homoskedastic approximation, see _shift). Ours, not the paper's: 0.05 moves a one-sided 5% test to about 5.5%.
MAX_SHIFT = 0.05
BLOCK_ELEMENTS = 4_000_000
CAUTION = (
    "The jackknife Anderson-Rubin test is robust to many and weak instruments but assumes the instruments are "
    "valid; it cannot establish exclusion or exogeneity. Conclusions for policy or clinical decisions need "
    "domain review."
)


@dataclass(frozen=True)
class JackknifeAR(Record):
    """Jackknife AR test of ``beta0``, its confidence set (list of intervals) and the strength measure F~.

    When the test does not apply, ``applicable`` is False, ``reason`` says why and the numbers are NaN.
    """

    applicable: bool
    reason: str | None
    beta0: float
    statistic: float
    p_value: float
    reject: bool
    alpha: float
    confidence_set: tuple[tuple[float, float], ...]
    strength: float
    strength_cutoff: float
    n: int
    n_instruments: int
    path: str
    caution: str = CAUTION

    @property
    def bounded(self) -> bool:
        return all(np.isfinite(lo) and np.isfinite(hi) for lo, hi in self.confidence_set)

    def set_text(self) -> str:
        if not self.confidence_set:
            return "empty"
        return " U ".join(f"[{lo:.4g}, {hi:.4g}]" for lo, hi in self.confidence_set)

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "kind": "jackknife_anderson_rubin",
                    "applicable": self.applicable,
                    "reason": self.reason,
                    "beta0": self.beta0,
                    "statistic": self.statistic,
                    "p_value": self.p_value,
                    "reject": self.reject,
                    "alpha": self.alpha,
                    "confidence_set": [list(iv) for iv in self.confidence_set],
                    "bounded": self.bounded if self.applicable else None,
                    "strength": self.strength,
                    "strength_cutoff": self.strength_cutoff,
                    "strong": bool(self.strength > self.strength_cutoff) if self.applicable else None,
                    "n": self.n,
                    "n_instruments": self.n_instruments,
                    "path": self.path,
                    "caution": self.caution,
                }
            )
        )

    def __str__(self) -> str:
        if not self.applicable:
            return f"Jackknife Anderson-Rubin: not applicable: {self.reason}"
        level = f"{100 * (1 - self.alpha):g}%"
        verdict = "rejected" if self.reject else "not rejected"
        strength = "above" if self.strength > self.strength_cutoff else "not above"
        return "\n".join(
            [
                f"Jackknife Anderson-Rubin (many instruments): {self.n:,} cases, {self.n_instruments:,} instruments",
                f"  H0: beta = {self.beta0:.4g}: statistic {self.statistic:.4g}, one-sided p = {self.p_value:.4g} "
                f"({verdict} at {self.alpha:g})",
                f"  {level} confidence set: {self.set_text()}",
                f"  strength F~ = {self.strength:.4g} ({strength} the cut-off {self.strength_cutoff:g})",
                f"  {self.caution}",
            ]
        )


def not_applicable(reason: str, *, n: int, k: int, alpha: float, beta0: float) -> JackknifeAR:
    nan = float("nan")
    return JackknifeAR(False, reason, beta0, nan, nan, False, alpha, (), nan, STRENGTH_CUTOFF, n, k, "none")


@dataclass(frozen=True, eq=False)
class _Pieces:
    """Everything the statistic needs as polynomials in b: numerator coefficients and the 3 x 3 Phi form."""

    num: Array  # N(b) = num[0] + num[1] b + num[2] b^2
    phi: Array  # S(b) = v(b)' phi v(b), v(b) = (1, b, b^2); Phi = (2/K) S
    k: int
    shift: float  # centring error of the numerator from partialling the controls, in its standard deviations


def _shift(p_diag: Array, pw_diag: Array, k: int) -> float:
    """E[N] / sd(N) under H0 with homoskedastic errors when the controls W were partialled out of e first.

    With e = M_W u, u independent with variance s^2: E[e'Pe] = s^2 sum_i P_ii (P M_W = P) while the removed diagonal
    has E[sum_i P_ii e_i^2] = s^2 sum_i P_ii (1 - (P_W)_ii), so E[N] = s^2 sum_i P_ii (P_W)_ii instead of 0; the
    standard deviation of N is about s^2 sqrt(2 sum_{i != j} P_ij^2) = s^2 sqrt(2 (K - sum_i P_ii^2)).
    """
    spread = 2.0 * (k - float(np.sum(p_diag**2)))
    return float(np.sum(p_diag * pw_diag) / np.sqrt(spread)) if spread > 0 else float("inf")


def _poly_vectors(ey: Array, ex: Array, mey: Array, mex: Array) -> Array:
    """Columns A, B, C with e_i (M e)_i = A_i + B_i b + C_i b^2 for e = ey - b ex."""
    return np.column_stack([ey * mey, -(ey * mex + ex * mey), ex * mex])


def _numerator(qa: Array, qb: Array, p_diag: Array, ey: Array, ex: Array) -> Array:
    """Coefficients of sum_{i != j} P_ij e_i e_j in b, from the Q' projections (P = Q Q')."""
    yy = float(qa @ qa) - float(np.sum(p_diag * ey * ey))
    xy = float(qa @ qb) - float(np.sum(p_diag * ey * ex))
    xx = float(qb @ qb) - float(np.sum(p_diag * ex * ex))
    return np.array([yy, -2.0 * xy, xx])


def _dense_pieces(ey: Array, ex: Array, zt: Array, pw_diag: Array) -> _Pieces:
    q = orthonormal_basis(zt)
    k = q.shape[1]
    if k < 1:
        raise EstimationError(
            "The instruments are collinear with the controls; nothing is left to test with."
        )
    p_diag = np.einsum("ij,ij->i", q, q)
    m_diag = 1.0 - p_diag
    qy, qx = q.T @ ey, q.T @ ex
    mey, mex = ey - q @ qy, ex - q @ qx
    v = _poly_vectors(ey, ex, mey, mex)
    n = ey.size
    acc = np.zeros((n, 3))
    rows = max(1, BLOCK_ELEMENTS // max(n, 1))
    for start in range(0, n, rows):
        stop = min(start + rows, n)
        pb = q[start:stop] @ q.T
        p2 = pb * pb
        w = p2 / (np.outer(m_diag[start:stop], m_diag) + p2)
        w[np.arange(stop - start), np.arange(start, stop)] = 0.0
        acc[start:stop] = w @ v
    return _Pieces(_numerator(qy, qx, p_diag, ey, ex), v.T @ acc, k, _shift(p_diag, pw_diag, k))


def _grouped_pieces(ey: Array, ex: Array, dm: np.ndarray, cells: np.ndarray) -> _Pieces:
    """Decision-maker dummies nested in cells: P_ij = [same dm]/n_dm - [same cell]/n_cell, zero across cells."""
    n_dm = np.bincount(dm).astype(np.float64)
    n_cell = np.bincount(cells).astype(np.float64)
    k = int(n_dm.size - n_cell.size)
    if k < 1:
        raise EstimationError("Every cell has a single decision-maker; the dummies add no instrument.")
    dm_cell = np.zeros(n_dm.size, dtype=np.int64)
    dm_cell[dm] = cells
    p_diag = 1.0 / n_dm[dm] - 1.0 / n_cell[cells]
    m_dm = 1.0 - 1.0 / n_dm + 1.0 / n_cell[dm_cell]  # M_ii is constant within a decision-maker
    mey = ey - (np.bincount(dm, weights=ey) / n_dm)[dm]
    mex = ex - (np.bincount(dm, weights=ex) / n_dm)[dm]
    v = _poly_vectors(ey, ex, mey, mex)
    vg = np.column_stack([np.bincount(dm, weights=v[:, j], minlength=n_dm.size) for j in range(3)])
    sy, sx = np.bincount(dm, weights=ey), np.bincount(dm, weights=ex)
    cy, cx = np.bincount(cells, weights=ey), np.bincount(cells, weights=ex)

    def quad(a_dm: np.ndarray, b_dm: np.ndarray, a_c: np.ndarray, b_c: np.ndarray) -> float:
        return float(np.sum(a_dm * b_dm / n_dm) - np.sum(a_c * b_c / n_cell))

    num = np.array(
        [
            quad(sy, sy, cy, cy) - float(np.sum(p_diag * ey * ey)),
            -2.0 * (quad(sy, sx, cy, cx) - float(np.sum(p_diag * ey * ex))),
            quad(sx, sx, cx, cx) - float(np.sum(p_diag * ex * ex)),
        ]
    )
    phi = np.zeros((3, 3))
    order = np.argsort(dm_cell, kind="stable")
    bounds = np.searchsorted(dm_cell[order], np.arange(n_cell.size + 1))
    for c in range(n_cell.size):
        members = order[bounds[c] : bounds[c + 1]]
        inv_c = 1.0 / n_cell[c]
        rows = max(1, BLOCK_ELEMENTS // max(members.size, 1))
        for start in range(0, members.size, rows):
            blk = members[start : start + rows]
            same = blk[:, None] == members[None, :]
            pb = same * (1.0 / n_dm[blk])[:, None] - inv_c
            p2 = pb * pb
            w = p2 / (np.outer(m_dm[blk], m_dm[members]) + p2)
            phi += vg[blk].T @ (w @ vg[members])
    # remove the i == j terms: W_ii uses P_ii = 1/n_dm - 1/n_cell and M_ii on both sides
    w_self = p_diag**2 / (m_dm[dm] ** 2 + p_diag**2)
    phi -= (v * w_self[:, None]).T @ v
    return _Pieces(num, phi, k, _shift(p_diag, 1.0 / n_cell[cells], k))


def _statistic(pieces: _Pieces, b: float) -> tuple[float, float]:
    """(numerator, S) at b; AR = numerator / sqrt(2 S)."""
    vb = np.array([1.0, b, b * b])
    return float(pieces.num @ vb), float(vb @ pieces.phi @ vb)


def _accepts(pieces: _Pieces, b: float, z: float) -> bool:
    num, s = _statistic(pieces, b)
    return num <= 0 or (s > 0 and num * num <= 2.0 * z * z * s)


def _confidence_set(pieces: _Pieces, z: float) -> tuple[tuple[float, float], ...]:
    a0, a1, a2 = pieces.num
    p = pieces.phi
    s_poly = np.array([p[2, 2], p[1, 2] + p[2, 1], p[1, 1] + p[0, 2] + p[2, 0], p[0, 1] + p[1, 0], p[0, 0]])
    n_poly = np.array([a2, a1, a0])
    f_poly = np.polysub(np.polymul(n_poly, n_poly), 2.0 * z * z * s_poly)
    cands: list[float] = []
    for poly in (n_poly, s_poly, f_poly):
        trimmed = np.trim_zeros(poly, "f")
        if trimmed.size > 1:
            r = np.roots(trimmed)
            cands += [float(x.real) for x in r if abs(x.imag) <= 1e-9 * max(1.0, abs(x.real))]
    pts = sorted(set(cands))
    scale = max([1.0] + [abs(x) for x in pts])
    edges = [-np.inf, *pts, np.inf]
    out: list[list[float]] = []
    for lo, hi in itertools.pairwise(edges):
        if np.isinf(lo) and np.isinf(hi):
            mid = 0.0
        elif np.isinf(lo):
            mid = hi - scale
        elif np.isinf(hi):
            mid = lo + scale
        else:
            mid = 0.5 * (lo + hi)
        if _accepts(pieces, mid, z):
            if out and out[-1][1] == lo:
                out[-1][1] = hi
            else:
                out.append([lo, hi])
    return tuple((float(lo), float(hi)) for lo, hi in out)


def _partial(w: np.ndarray | None, n: int, *cols: Array) -> tuple[list[Array], Array]:
    """The columns with an intercept and ``w`` partialled out, and the diagonal of the projection onto them."""
    wm = np.ones((n, 1)) if w is None else np.column_stack([np.ones(n), np.asarray(w, dtype=np.float64)])
    qw = orthonormal_basis(wm)
    pw_diag = np.einsum("ij,ij->i", qw, qw)
    return [np.asarray(c - qw @ (qw.T @ c), dtype=np.float64) for c in cols], pw_diag


def _result(
    pieces: _Pieces, n: int, beta0: float, alpha: float, path: str, max_shift: float, partialled: str
) -> JackknifeAR:
    from scipy import stats

    if not pieces.shift <= max_shift:
        return not_applicable(
            f"partialling out {partialled} moves the centre of the statistic's numerator by about "
            f"{pieces.shift:.2g} of its standard deviation (limit {max_shift:g}; homoskedastic approximation): with "
            "many controls for the number of cases the jackknife's re-centring fails, and Mikusheva and Sun (2022) "
            "cover a fixed number of controls; use coarser cells or fewer controls, or raise max_shift",
            n=n,
            k=pieces.k,
            alpha=alpha,
            beta0=beta0,
        )
    z = float(stats.norm.ppf(1 - alpha))
    num, s = _statistic(pieces, beta0)
    if s <= 0:
        return not_applicable(
            "the cross-fit variance estimate is not positive at beta0 (too little data per instrument)",
            n=n,
            k=pieces.k,
            alpha=alpha,
            beta0=beta0,
        )
    stat = num / np.sqrt(2.0 * s)
    s_xx = float(pieces.phi[2, 2])
    strength = float(pieces.num[2] / np.sqrt(2.0 * s_xx)) if s_xx > 0 else float("nan")
    return JackknifeAR(
        applicable=True,
        reason=None,
        beta0=beta0,
        statistic=float(stat),
        p_value=float(stats.norm.sf(stat)),
        reject=bool(stat > z),
        alpha=alpha,
        confidence_set=_confidence_set(pieces, z),
        strength=strength,
        strength_cutoff=STRENGTH_CUTOFF,
        n=n,
        n_instruments=pieces.k,
        path=path,
    )


def _check(alpha: float, y: np.ndarray, x: np.ndarray, n: int) -> tuple[Array, Array]:
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    yv = np.asarray(y, dtype=np.float64).ravel()
    xv = np.asarray(x, dtype=np.float64).ravel()
    if yv.size != n or xv.size != n:
        raise InvalidInputError("outcome, treatment and instruments must have the same number of rows.")
    if not (np.all(np.isfinite(yv)) and np.all(np.isfinite(xv))):
        raise InvalidInputError(
            "The outcome and treatment must be finite; drop rows with missing values first."
        )
    return yv, xv


def jackknife_anderson_rubin(
    y: np.ndarray,
    x: np.ndarray,
    instruments: np.ndarray,
    controls: np.ndarray | None = None,
    *,
    beta0: float = 0.0,
    alpha: float = 0.05,
    max_n: int = MAX_DENSE_N,
    max_shift: float = MAX_SHIFT,
) -> JackknifeAR:
    """Jackknife AR test of H0: beta = ``beta0`` with its confidence set and F~ (dense path, n <= ``max_n``).

    Not applicable when partialling the controls out shifts the numerator's centre by more than ``max_shift`` of
    its standard deviation (see :func:`_shift`).

    An intercept is added to ``controls``; all are partialled out first. Larger problems return a
    not-applicable result (the dense path costs n^2 K); decision-maker designs have a grouped path in
    :func:`decision_maker_anderson_rubin`.
    """
    zmat = np.asarray(instruments, dtype=np.float64)
    zmat = zmat[:, None] if zmat.ndim == 1 else zmat
    n = zmat.shape[0]
    yv, xv = _check(alpha, y, x, n)
    if n > max_n:
        return not_applicable(
            f"{n:,} rows exceed the dense limit of {max_n:,} (cost grows with n^2); use the grouped "
            "decision-maker path or raise max_n",
            n=n,
            k=zmat.shape[1],
            alpha=alpha,
            beta0=beta0,
        )
    parts, pw_diag = _partial(controls, n, yv, xv, *[zmat[:, j] for j in range(zmat.shape[1])])
    pieces = _dense_pieces(parts[0], parts[1], np.column_stack(parts[2:]), pw_diag)
    what = "the intercept" if controls is None else "the controls"
    return _result(pieces, n, beta0, alpha, "dense", max_shift, what)


def decision_maker_anderson_rubin(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    decision_maker: str,
    absorb: str | None = None,
    controls: str | Sequence[str] = (),
    beta0: float = 0.0,
    alpha: float = 0.05,
    max_n: int = MAX_DENSE_N,
    max_shift: float = MAX_SHIFT,
) -> JackknifeAR:
    """Jackknife AR with one dummy per decision-maker as instruments; an intercept, the ``absorb`` cells' dummies
    and the ``controls`` columns are partialled out of the outcome, the treatment and the dummies first (as the
    paper handles a fixed number of covariates).

    Without ``controls`` and with every decision-maker working within one cell (or no cells) the projection is a
    difference of group means and the grouped path is exact at any size (cost about the sum over cells of the
    squared number of decision-makers). Otherwise (numeric controls, or decision-makers working in several cells)
    the partialled projection is dense and the dense path is used up to ``max_n`` rows; above that the result is
    not applicable and its reason names the fix. It is also not applicable when partialling out the cells and
    controls shifts the numerator's centre by more than ``max_shift`` of its standard deviation (many small cells,
    e.g. court-by-day cells holding two or three decision-makers: see benchmarks/sim_jackknife_ar_many_cells.py).
    """
    import pandas as pd

    ctrl = (controls,) if isinstance(controls, str) else tuple(controls)
    cols = [outcome, treatment, decision_maker, *([absorb] if absorb else []), *ctrl]
    missing = [c for c in cols if c not in data.columns]
    if missing:
        raise InvalidInputError(f"Column(s) {missing} not found in the data; check the names.")
    na = data[cols].isna().any(axis=1).to_numpy()
    if na.any():
        raise InvalidInputError(
            f"{int(na.sum())} row(s) have missing values in {cols} (index {data.index[na][:8].tolist()}); "
            "drop or fill them first."
        )
    for c in (outcome, treatment, *ctrl):
        if not (pd.api.types.is_numeric_dtype(data[c]) or pd.api.types.is_bool_dtype(data[c])):
            raise InvalidInputError(
                f"Column {c!r} must be numeric, got dtype {data[c].dtype}; recode it as numbers (a categorical "
                "control goes to absorb)."
            )
    n = len(data)
    yv, xv = _check(alpha, data[outcome].to_numpy(float), data[treatment].to_numpy(float), n)
    dm, dm_ids = pd.factorize(data[decision_maker], sort=False)
    counts = np.bincount(dm)
    if np.any(counts == 1):
        ids = [str(dm_ids[int(i)]) for i in np.flatnonzero(counts == 1)[:8]]
        raise InvalidInputError(
            f"Decision-maker(s) {ids} in {decision_maker!r} have a single case; drop those cases or merge them."
        )
    cells = pd.factorize(data[absorb], sort=False)[0] if absorb else np.zeros(n, dtype=np.int64)
    if not ctrl and is_nested(dm, cells):
        n_cell = np.bincount(cells).astype(np.float64)
        ey = yv - (np.bincount(cells, weights=yv) / n_cell)[cells]
        ex = xv - (np.bincount(cells, weights=xv) / n_cell)[cells]
        pieces = _grouped_pieces(ey, ex, dm, cells)
        what = f"the {absorb!r} cells" if absorb else "the intercept"
        return _result(pieces, n, beta0, alpha, "grouped", max_shift, what)
    why = (
        f"controls {list(ctrl)}"
        if ctrl
        else f"decision-makers in {decision_maker!r} working in more than one {absorb!r} cell"
    )
    if n > max_n:
        return not_applicable(
            f"with {why} the partialled projection is dense and its cost grows with n^2: {n:,} rows exceed the "
            f"dense limit of {max_n:,}; absorb the controls as cells (a categorical column) in which every "
            "decision-maker is nested, for the exact grouped path, or raise max_n",
            n=n,
            k=int(counts.size - 1),
            alpha=alpha,
            beta0=beta0,
        )
    dummies = np.zeros((n, counts.size))
    dummies[np.arange(n), dm] = 1.0
    parts = []
    if absorb:
        cd = np.zeros((n, int(cells.max()) + 1))
        cd[np.arange(n), cells] = 1.0
        parts.append(cd[:, 1:])
    if ctrl:
        parts.append(data[list(ctrl)].to_numpy(dtype=np.float64))
    wmat = np.column_stack(parts) if parts else None
    res = jackknife_anderson_rubin(
        yv, xv, dummies, wmat, beta0=beta0, alpha=alpha, max_n=max_n, max_shift=max_shift
    )
    if res.reason and "the controls" in res.reason:
        named = " and ".join(
            [*([f"the {absorb!r} cells"] if absorb else []), *([f"controls {list(ctrl)}"] if ctrl else [])]
        )
        res = type(res)(**{**res.__dict__, "reason": res.reason.replace("the controls", named, 1)})
    return res
