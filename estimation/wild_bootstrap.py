"""Wild restricted efficient (WRE) bootstrap for one endogenous regressor (Davidson and MacKinnon 2010, JBES).

Under H0: beta = b0 the bootstrap data are built from the restricted structural residuals u = M_W(y - b0 x)
and the efficient reduced-form residuals v = x - Z pi, where (pi, delta) come from the OLS regression of x on
the instruments, the controls and u (so v carries delta u). Draw b multiplies every residual of cluster g by
the same weight v_g (Rademacher +/-1 or Webb's six-point distribution):

    x* = Z pi + v * v_g,   y* = b0 x* + u * v_g,

and the 2SLS t statistic (cluster-robust or heteroskedasticity-robust, the same small-sample factor as the
analytic one) and the Anderson–Rubin Wald statistic of H0 are recomputed on (y*, x*). The p-value is the share
of draws whose statistic is at least as large as the sample's (|t| for the symmetric t test). With G <= 12
clusters and Rademacher weights all 2^G sign vectors are enumerated, so the p-value is exact and reproducible.

Speed: every draw needs only per-cluster sums (instruments times residuals, the instruments' per-cluster
cross-products and the instruments-by-controls products that re-partial the bootstrap errors), so a draw costs
O(G L) after one pass over the data. When absorbed fixed effects are not nested in the clusters the bootstrap
errors are partialled again draw by draw (exact, O(n) per draw).

The Anderson–Rubin bootstrap is a restricted wild bootstrap of the OLS regression of y - b0 x on the
instruments and controls (it needs no first stage); its statistic is, draw by draw, a ratio of quadratics in
b0, so after one pass over the draws any b0 costs O(draws). With one instrument the t statistic likewise
becomes a function of b0 and a few b0-free sums per draw. Confidence sets invert each test over b0 with the
same draws: a grid around the 2SLS estimate, widened while its ends are accepted, and safeguarded regula falsi
at every change of decision. Residuals are not rescaled; the statistics use the same small-sample factors as
the analytic ones (covariance.py), which do not change bootstrap p-values.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.fragility_data import CAUTION, FragilityData
from ivdossier.estimation.robust_inference import Interval, classify_set
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]
Progress = Callable[[int, int], None]
WEIGHT_TYPES: tuple[str, ...] = ("rademacher", "webb")
WEBB_VALUES = np.array([-math.sqrt(1.5), -1.0, -math.sqrt(0.5), math.sqrt(0.5), 1.0, math.sqrt(1.5)])
SOURCE = "Davidson and MacKinnon (2010), Wild Bootstrap Tests for IV Regression, JBES 28:128-144"
TIE_RTOL = 1e-9
T_TABLE_MAX_GROUPS = 100_000  # the b0-free sums hold about 30 numbers per cluster
CHUNK_ELEMENTS = 1 << 18  # about 2 MB per temporary, so blocks stay in cache


def weight_codes(kind: str, n_groups: int, draws: int, rng: np.random.Generator) -> np.ndarray:
    """Compact (G x draws) int8 codes of wild weights: 0/1 for Rademacher, 0..5 for Webb's six points."""
    if kind not in WEIGHT_TYPES:
        raise InvalidInputError(
            f"Unknown wild weight type {kind!r}; choose one of {', '.join(WEIGHT_TYPES)}."
        )
    top = 2 if kind == "rademacher" else 6
    return np.asarray(rng.integers(0, top, size=(n_groups, draws), dtype=np.int8))


def weight_values(kind: str, codes: np.ndarray) -> Array:
    """The wild weights that ``weight_codes`` stand for, as floats."""
    if kind == "rademacher":
        return np.asarray(codes, dtype=np.float64) * 2.0 - 1.0
    return np.asarray(WEBB_VALUES[codes], dtype=np.float64)


def bootstrap_weights(kind: str, n_groups: int, draws: int, rng: np.random.Generator) -> Array:
    """A (G x draws) matrix of wild weights: Rademacher +/-1 or Webb's six points, each equally likely."""
    return weight_values(kind, weight_codes(kind, n_groups, draws, rng))


def all_sign_vectors(n_groups: int) -> Array:
    """Every Rademacher sign vector for G clusters as a (G x 2^G) matrix; the last column is all +1."""
    idx = np.arange(2**n_groups, dtype=np.int64)
    bits = (idx[None, :] >> np.arange(n_groups, dtype=np.int64)[:, None]) & 1
    return np.asarray(bits * 2 - 1, dtype=np.float64)


def _group_sums(codes: np.ndarray, g: int, values: Array) -> Array:
    v = values[:, None] if values.ndim == 1 else values
    out = np.empty((g, v.shape[1]))
    for j in range(v.shape[1]):
        out[:, j] = np.bincount(codes, weights=v[:, j], minlength=g)
    return out


@dataclass(frozen=True, eq=False)
class _Sums:
    """Per-cluster sufficient statistics of the partialled data (one pass over the rows)."""

    zz_g: Array  # G x L x L
    zy_g: Array  # G x L
    zx_g: Array  # G x L
    aw_g: Array | None  # G x L x kw: Z_g'W_g (W'W)^-1
    wy_g: Array | None  # G x kw
    wx_g: Array | None  # G x kw
    zz: Array
    q: Array  # inverse of Z'Z
    yy: float
    xy: float
    xx: float


def _sums(fd: FragilityData) -> _Sums:
    p = fd.prepared
    z, y, x = p.Z, p.y, p.X[:, 0]
    codes, g = fd.codes(), fd.n_groups
    n_inst = z.shape[1]
    cross = np.einsum("il,im->ilm", z, z).reshape(z.shape[0], n_inst * n_inst)
    zz_g = _group_sums(codes, g, cross).reshape(g, n_inst, n_inst)
    zy_g = _group_sums(codes, g, z * y[:, None])
    zx_g = _group_sums(codes, g, z * x[:, None])
    aw_g = wy_g = wx_g = None
    if fd.w_basis is not None and fd.w_basis.shape[1]:
        wb = fd.w_basis
        kw = wb.shape[1]
        zw = np.einsum("il,ik->ilk", z, wb).reshape(z.shape[0], n_inst * kw)
        zw_g = _group_sums(codes, g, zw).reshape(g, n_inst, kw)
        ww_inv = np.linalg.inv(wb.T @ wb)
        aw_g = zw_g @ ww_inv
        wy_g = _group_sums(codes, g, wb * y[:, None])
        wx_g = _group_sums(codes, g, wb * x[:, None])
    zz = zz_g.sum(axis=0)
    return _Sums(
        zz_g=zz_g,
        zy_g=zy_g,
        zx_g=zx_g,
        aw_g=aw_g,
        wy_g=wy_g,
        wx_g=wx_g,
        zz=zz,
        q=np.linalg.inv(zz),
        yy=float(y @ y),
        xy=float(x @ y),
        xx=float(x @ x),
    )


@dataclass(frozen=True, eq=False)
class _AtNull:
    """Per-cluster sums of the restricted residuals u and efficient first-stage residuals v at one b0."""

    b0: float
    s_u: Array  # G x L, Z_g'u_g
    s_v: Array  # G x L
    w_u: Array | None  # G x kw
    w_v: Array | None
    zz_pi: Array  # G x L, Z_g'Z_g pi
    pi: Array  # L
    u: Array | None  # n-vectors, only for the re-partialling path
    v: Array | None
    shift: Array | None = None  # v = x + Z shift after partialling


def _only_u(a0: _AtNull) -> _AtNull:
    """The same null with the first-stage parts zeroed, so _fast_scores returns c_g(u*v) alone."""
    zeros = np.zeros_like(a0.s_v)
    w_zero = None if a0.w_v is None else np.zeros_like(a0.w_v)
    return _AtNull(a0.b0, a0.s_u, zeros, a0.w_u, w_zero, np.zeros_like(a0.zz_pi), a0.pi, None, None)


class _Engine:
    """Bootstrap statistics for a block of draws, from per-cluster sums (fast) or by re-partialling (exact)."""

    def __init__(self, fd: FragilityData) -> None:
        p = fd.prepared
        if p.X.shape[1] != 1:
            raise InvalidInputError("the wild bootstrap here covers one endogenous regressor")
        self.fd = fd
        self.s = _sums(fd)
        self.codes = fd.codes()
        self.g = fd.n_groups
        n, n_inst = p.Z.shape
        self.n_inst = n_inst
        self.fast = fd.base is not None
        pc = p.n_partialled - p.n_partialled_nested if fd.clustered else p.n_partialled
        g = self.g
        if fd.clustered:
            self.f_t = g / (g - 1) * (n - 1) / (n - 1 - pc)
            self.f_ar = g / (g - 1) * (n - 1) / (n - n_inst - pc)
        else:
            self.f_t = n / (n - 1 - pc)
            self.f_ar = n / (n - n_inst - pc)
        s = self.s
        self.pi_y = s.q @ s.zy_g.sum(axis=0)
        self.pi_x = s.q @ s.zx_g.sum(axis=0)

    def at_null(self, b0: float) -> _AtNull:
        s = self.s
        s_u = s.zy_g - b0 * s.zx_g
        zu, zx = s_u.sum(axis=0), s.zx_g.sum(axis=0)
        uu = s.yy - 2 * b0 * s.xy + b0 * b0 * s.xx
        ux = s.xy - b0 * s.xx
        pi_u = self.pi_y - b0 * self.pi_x
        umu = uu - float(zu @ s.q @ zu)
        umx = ux - float(zu @ s.q @ zx)
        delta = umx / umu if umu > 1e-14 * max(uu, 1e-300) else 0.0
        pi = self.pi_x - delta * pi_u
        shift = (
            -self.pi_x + delta * pi_u
        )  # v = x + Z shift (after partialling): Z_g'v_g = Z_g'x_g + ZZ_g shift
        s_v = s.zx_g + s.zz_g @ shift
        w_u = w_v = None
        if s.wy_g is not None and s.wx_g is not None and s.aw_g is not None:
            w_u = s.wy_g - b0 * s.wx_g
            w_v = s.wx_g + self._wz_times(shift)
        u = v = None
        if not self.fast:
            p = self.fd.prepared
            u = p.y - b0 * p.X[:, 0]
            v = p.X[:, 0] + p.Z @ shift
        return _AtNull(b0, s_u, s_v, w_u, w_v, s.zz_g @ pi, pi, u, v, shift)

    def _wz_times(self, vec: Array) -> Array:
        """W_g'Z_g vec for every cluster (G x kw)."""
        if not hasattr(self, "_wz_g"):
            fd = self.fd
            z, wb = fd.prepared.Z, fd.w_basis
            assert wb is not None
            kw = wb.shape[1]
            wz = np.einsum("ik,il->ikl", wb, z).reshape(z.shape[0], kw * self.n_inst)
            self._wz_g = _group_sums(self.codes, self.g, wz).reshape(self.g, kw, self.n_inst)
        return np.asarray(self._wz_g @ vec, dtype=np.float64)

    def corrected(self, s_r: Array, w_r: Array | None, r: Array | None, v: Array) -> Array:
        """Z_g' [M_W (r * v)]_g for a block of draws v (G x b); returns G x L x b."""
        if self.fast:
            out = s_r[:, :, None] * v[:, None, :]
            if w_r is not None and self.s.aw_g is not None:
                out -= np.einsum("glk,kb->glb", self.s.aw_g, w_r.T @ v)
            return np.asarray(out, dtype=np.float64)
        assert r is not None
        e = r[:, None] * v[self.codes, :]
        me = self.fd.reproject(e)
        z = self.fd.prepared.Z
        out = np.empty((self.g, self.n_inst, v.shape[1]))
        for j in range(self.n_inst):
            out[:, j, :] = _group_sums(self.codes, self.g, z[:, j : j + 1] * me)
        return out

    def _fast_scores(self, a0: _AtNull, v: Array, coef_l: Array, c1: Array) -> Array:
        """Per-cluster scores sum_l coef_l [c1 (ZZ_g pi + c_g(v*v)) + c_g(u*v)]_l for a block (G x b).

        With c_g(r*v) = v_g S_g(r) - AW_g (W'(r*v)) this is three matrix products and elementwise work:
        P (coef*c1) + v * (S_v (coef*c1) + S_u coef) - AW (coef x (c1 W_v'v + W_u'v)).
        """
        ac = coef_l * c1[None, :]
        out = a0.zz_pi @ ac + v * (a0.s_v @ ac + a0.s_u @ coef_l)
        aw = self.s.aw_g
        if aw is not None and a0.w_u is not None and a0.w_v is not None:
            y = c1[None, :] * (a0.w_v.T @ v) + a0.w_u.T @ v  # kw x b
            g, n_inst, kw = aw.shape
            stacked = (coef_l[:, None, :] * y[None, :, :]).reshape(n_inst * kw, -1)
            out -= aw.reshape(g, n_inst * kw) @ stacked
        return np.asarray(out, dtype=np.float64)

    def t_stats(self, a0: _AtNull, v: Array) -> Array:
        """Bootstrap 2SLS t statistics of beta = b0 for draws v (G x b)."""
        s = self.s
        b0 = a0.b0
        zx = (s.zz @ a0.pi)[:, None] + a0.s_v.T @ v
        zy = b0 * zx + a0.s_u.T @ v
        a = s.q @ zx
        den = np.einsum("lb,lb->b", zx, a)
        beta = np.einsum("lb,lb->b", a, zy) / den
        if self.fast:
            score = self._fast_scores(a0, v, a, b0 - beta)
        else:
            cu = self.corrected(a0.s_u, a0.w_u, a0.u, v)
            cv = self.corrected(a0.s_v, a0.w_v, a0.v, v)
            m = (b0 - beta)[None, None, :] * (a0.zz_pi[:, :, None] + cv) + cu
            score = np.einsum("lb,glb->gb", a, m)
        var = self.f_t * np.einsum("gb,gb->b", score, score) / (den * den)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.asarray((beta - b0) / np.sqrt(var), dtype=np.float64)

    def ar_stats(self, a0: _AtNull, v: Array) -> Array:
        """Bootstrap Anderson–Rubin Wald statistics (chi-square form) of beta = b0 for draws v (G x b)."""
        s = self.s
        du = s.q @ (a0.s_u.T @ v)
        n_inst = self.n_inst
        if self.fast:
            # score of instrument l: c_g(u*v)_l - (ZZ_g du)_l, from the same three-product form per instrument
            zero = np.zeros(v.shape[1])
            cols = []
            for j in range(n_inst):
                e = np.zeros((n_inst, v.shape[1]))
                e[j] = 1.0
                cu = self._fast_scores(_only_u(a0), v, e, zero)
                cols.append(cu - s.zz_g[:, j, :] @ du)
            meat = np.empty((v.shape[1], n_inst, n_inst))
            for j in range(n_inst):
                for k in range(j + 1):
                    meat[:, j, k] = meat[:, k, j] = np.einsum("gb,gb->b", cols[j], cols[k])
        else:
            su = self.corrected(a0.s_u, a0.w_u, a0.u, v) - np.einsum("glm,mb->glb", s.zz_g, du)
            meat = np.einsum("glb,gmb->blm", su, su)
        meat *= self.f_ar
        if n_inst == 1:
            q = float(s.q[0, 0])
            return np.asarray(du[0] ** 2 / (q * q * meat[:, 0, 0]), dtype=np.float64)
        cov = s.q[None, :, :] @ meat @ s.q[None, :, :]
        sol = np.linalg.solve(cov, du.T[:, :, None])[:, :, 0]
        return np.asarray(np.einsum("bl,bl->b", du.T, sol), dtype=np.float64)

    def ar_parts(self, v: Array) -> tuple[Array, Array, Array, Array, Array]:
        """Per-draw pieces of the AR statistic, which is linear in b0 through u = y - b0 x.

        Returns d_y, d_x (b x L: Z coefficients of the bootstrap y and x errors) and the meat pieces M_yy, M_yx,
        M_xx (b x L x L), so that at b0: d = d_y - b0 d_x and meat = M_yy - b0 (M_yx + M_yx') + b0^2 M_xx.
        """
        s = self.s
        p = self.fd.prepared
        n_inst, nb = self.n_inst, v.shape[1]
        pieces = []
        for s_r, w_r, r in ((s.zy_g, s.wy_g, p.y), (s.zx_g, s.wx_g, p.X[:, 0])):
            d = s.q @ (s_r.T @ v)
            if self.fast:
                a0 = _AtNull(
                    0.0,
                    s_r,
                    np.zeros_like(s_r),
                    w_r,
                    None if w_r is None else np.zeros_like(w_r),
                    np.zeros_like(s_r),
                    np.zeros(n_inst),
                    None,
                    None,
                )
                cols = []
                for j in range(n_inst):
                    e = np.zeros((n_inst, nb))
                    e[j] = 1.0
                    cols.append(self._fast_scores(a0, v, e, np.zeros(nb)) - s.zz_g[:, j, :] @ d)
                sc = np.stack(cols, axis=1)
            else:
                sc = self.corrected(s_r, w_r, r, v) - np.einsum("glm,mb->glb", s.zz_g, d)
            pieces.append((d.T, sc))
        (dy, sy), (dx, sx) = pieces
        myy = np.einsum("glb,gmb->blm", sy, sy)
        myx = np.einsum("glb,gmb->blm", sy, sx)
        mxx = np.einsum("glb,gmb->blm", sx, sx)
        return dy, dx, myy, myx, mxx

    def t_parts(self, v: Array) -> Array:
        """Per-draw sums that make the one-instrument t statistic a cheap function of b0 (see _TTable).

        Rows: the draws; columns: E'v for the cluster vectors E = [S_x, ZZ, S_y, W_x (kw), W_z (kw), W_y (kw),
        ZZ*S_x, ZZ*ZZ, ZZ*S_y, S_x*AW (kw), ZZ*AW (kw), S_y*AW (kw)] and then E2'(v*v) for the six products
        S_x S_x, S_x ZZ, S_x S_y, ZZ ZZ, ZZ S_y, S_y S_y.
        """
        return np.asarray(np.concatenate([self._t_basis.T @ v, self._t_basis2.T @ (v * v)], axis=0).T)

    def prepare_t_table(self) -> None:
        """Build the cluster vectors used by t_parts (one instrument, per-cluster sums path)."""
        s = self.s
        sx, zz, sy = s.zx_g[:, 0], s.zz_g[:, 0, 0], s.zy_g[:, 0]
        cols = [sx, zz, sy]
        if s.aw_g is not None and s.wx_g is not None and s.wy_g is not None:
            wz = self._wz_times(np.ones(1))
            aw = s.aw_g[:, 0, :]
            cols += [*s.wx_g.T, *wz.T, *s.wy_g.T]
            cols += [zz * sx, zz * zz, zz * sy]
            cols += [*(sx[:, None] * aw).T, *(zz[:, None] * aw).T, *(sy[:, None] * aw).T]
            self.t_kw = aw.shape[1]
            self.t_h = aw.T @ aw
            self.t_zz_aw = zz @ aw
        else:
            cols += [zz * sx, zz * zz, zz * sy]
            self.t_kw = 0
            self.t_h = np.zeros((0, 0))
            self.t_zz_aw = np.zeros(0)
        self._t_basis = np.column_stack(cols)
        self._t_basis2 = np.column_stack([sx * sx, sx * zz, sx * sy, zz * zz, zz * sy, sy * sy])
        self.t_zz_sq = float(zz @ zz)

    def chunk(self) -> int:
        """Draws per block, so that the largest temporary holds about CHUNK_ELEMENTS numbers."""
        if self.fast:
            return max(1, CHUNK_ELEMENTS // (self.g * self.n_inst))
        return max(1, 16 * CHUNK_ELEMENTS // self.fd.prepared.n)


@dataclass(frozen=True, eq=False)
class _ArTable:
    """AR pieces for every draw (row 0 is the sample itself), so any b0 costs O(draws L^3)."""

    dy: Array
    dx: Array
    myy: Array
    myx: Array
    mxx: Array
    q: Array
    factor: float

    def stats(self, b0: float) -> Array:
        d = self.dy - b0 * self.dx
        meat = self.factor * (self.myy - b0 * (self.myx + np.swapaxes(self.myx, 1, 2)) + b0 * b0 * self.mxx)
        if d.shape[1] == 1:
            q = float(self.q[0, 0])
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.asarray(d[:, 0] ** 2 / (q * q * meat[:, 0, 0]), dtype=np.float64)
        cov = self.q[None, :, :] @ meat @ self.q[None, :, :]
        sol = np.linalg.solve(cov, d[:, :, None])[:, :, 0]
        return np.asarray(np.einsum("bl,bl->b", d, sol), dtype=np.float64)


class _TTable:
    """The one-instrument WRE t statistic of every draw as a function of b0, from b0-free sums (row 0: sample).

    With one instrument each cluster's score is m_g = c1 P_g + v_g R_g - AW_g'Y, where c1 = b0 - beta*,
    P = pi ZZ_g, R_g = r1 S_x,g + r2 ZZ_g + S_y,g (r1 = c1 - b0, r2 = c1 shift) and Y = c1 W_v'v + W_u'v; the
    sum of squares over clusters expands into b0-free sums times scalars that depend on b0 and the draw, so a
    new b0 costs O(draws kw^2) instead of a pass over the draws.
    """

    def __init__(self, engine: _Engine, parts: Array) -> None:
        self.engine = engine
        self.parts = parts
        kw = engine.t_kw
        i = 3
        self.sx, self.zz, self.sy = parts[:, 0], parts[:, 1], parts[:, 2]
        if kw:
            self.wx, self.wz, self.wy = (parts[:, i + j * kw : i + (j + 1) * kw] for j in range(3))
            i += 3 * kw
        self.c = parts[:, i : i + 3]
        i += 3
        if kw:
            self.d = parts[:, i : i + 3 * kw].reshape(-1, 3, kw)
            i += 3 * kw
        g2 = parts[:, i : i + 6]
        sym = np.empty((parts.shape[0], 3, 3))
        for k, (a, b) in enumerate(((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))):
            sym[:, a, b] = sym[:, b, a] = g2[:, k]
        self.g2 = sym
        self.kw = kw

    def stats(self, b0: float) -> Array:
        e = self.engine
        a0 = e.at_null(b0)
        assert a0.shift is not None
        shift, pi = float(a0.shift[0]), float(a0.pi[0])
        zz_tot = float(e.s.zz[0, 0])
        zx = zz_tot * pi + self.sx + shift * self.zz
        zy = b0 * zx + self.sy - b0 * self.sx
        with np.errstate(divide="ignore", invalid="ignore"):
            c1 = b0 - zy / zx
            r = np.column_stack([c1 - b0, c1 * shift, np.ones_like(c1)])
            ss = (c1 * pi) ** 2 * e.t_zz_sq + np.einsum("bi,bij,bj->b", r, self.g2, r)
            ss += 2 * c1 * pi * np.einsum("bi,bi->b", r, self.c)
            if self.kw:
                y = c1[:, None] * (self.wx + shift * self.wz) + self.wy - b0 * self.wx
                ss += np.einsum("bk,kl,bl->b", y, e.t_h, y)
                ss -= 2 * c1 * pi * (y @ e.t_zz_aw)
                ss -= 2 * np.einsum("bi,bik,bk->b", r, self.d, y)
            return np.asarray(-c1 * np.abs(zx) / np.sqrt(e.f_t * ss), dtype=np.float64)


@dataclass(frozen=True)
class BootstrapTest(Record):
    """One bootstrap test of H0: beta = b0 with its confidence set (None when not requested)."""

    name: str
    null: float
    statistic: float
    p_value: float
    alpha: float
    intervals: list[Interval] | None
    shape: str | None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict; set ends as "inf"/"-inf" when unbounded."""
        return {
            "test": self.name,
            "null": json_safe(self.null),
            "statistic": json_safe(self.statistic),
            "p_value": json_safe(self.p_value),
            "confidence_level": 1 - self.alpha,
            "confidence_set": None
            if self.intervals is None
            else [json_safe(list(i)) for i in self.intervals],
            "shape": self.shape,
        }


def _fmt_set(intervals: list[Interval] | None) -> str:
    if intervals is None:
        return "not computed"
    if not intervals:
        return "empty"
    return " U ".join(f"[{lo:.4g}, {hi:.4g}]" for lo, hi in intervals)


@dataclass(frozen=True)
class WildBootstrapResult(Record):
    """WRE bootstrap t test and Anderson–Rubin test of one null, with sets, or a not-applicable reason."""

    applicable: bool
    reason: str | None
    treatment: str | None = None
    weights: str | None = None
    draws: int | None = None
    enumerated: bool | None = None
    n_clusters: int | None = None
    clustered: bool | None = None
    seed: int | None = None
    estimate: float | None = None
    t_test: BootstrapTest | None = None
    anderson_rubin: BootstrapTest | None = None
    partialling: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "method": "wild restricted efficient bootstrap",
            "treatment": self.treatment,
            "weights": self.weights,
            "draws": self.draws,
            "enumerated": self.enumerated,
            "n_clusters": self.n_clusters,
            "weights_by": None if self.clustered is None else ("cluster" if self.clustered else "row"),
            "seed": self.seed,
            "estimate": json_safe(self.estimate),
            "t_test": None if self.t_test is None else self.t_test.to_dict(),
            "anderson_rubin": None if self.anderson_rubin is None else self.anderson_rubin.to_dict(),
            "partialling": self.partialling,
            "p_value_rule": "share of draws with a statistic at least as large as the sample's "
            "(|t| for the t test); ties within a relative 1e-9 count as at least as large",
            "caution": CAUTION,
            "source": SOURCE,
        }

    def __str__(self) -> str:
        if not self.applicable:
            return f"Wild bootstrap: not applicable ({self.reason})"
        how = "all sign vectors enumerated (exact)" if self.enumerated else f"seed {self.seed}"
        by = f"{self.n_clusters} clusters" if self.clustered else f"{self.n_clusters} rows (heteroskedastic)"
        lines = [
            f"Wild restricted efficient bootstrap for {self.treatment}: {self.draws} draws, "
            f"{self.weights} weights by {by}, {how}",
            f"  2SLS estimate {self.estimate:.4g}",
        ]
        for t in (self.t_test, self.anderson_rubin):
            if t is not None:
                lines.append(
                    f"  {t.name}: H0 beta = {t.null:g}, statistic {t.statistic:.4g}, bootstrap p = {t.p_value:.4f};"
                    f" {100 * (1 - t.alpha):g}% set {_fmt_set(t.intervals)}"
                )
        return "\n".join(lines)


def _p_value(boot: Array, stat: float) -> float:
    ok = ~np.isnan(
        boot
    )  # an infinite bootstrap statistic is as extreme as can be; an undefined one is dropped
    return float(np.mean(boot[ok] >= stat * (1 - TIE_RTOL))) if ok.any() else math.nan


def wild_bootstrap(
    fd: FragilityData,
    *,
    null: float = 0.0,
    draws: int = 9999,
    weights: str = "rademacher",
    seed: int | np.random.Generator | None = None,
    alpha: float = 0.05,
    confidence_sets: bool = True,
    enumerate_up_to: int = 12,
    tests: tuple[str, ...] = ("t", "ar"),
    progress: Progress | None = None,
) -> WildBootstrapResult:
    """WRE bootstrap t test and Anderson–Rubin test of H0: beta = ``null``, with sets by test inversion.

    ``weights`` is "rademacher" or "webb"; with Rademacher weights and at most ``enumerate_up_to`` clusters all
    2^G draws are used. ``seed`` is an int or a numpy Generator; ``progress(done, total)`` is called as draws
    and set evaluations finish.
    """
    if weights not in WEIGHT_TYPES:
        raise InvalidInputError(
            f"Unknown wild weight type {weights!r}; choose one of {', '.join(WEIGHT_TYPES)}."
        )
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie in (0, 1), got {alpha}; use e.g. 0.05.")
    if draws < 1:
        raise InvalidInputError(f"draws must be a positive number of bootstrap draws, got {draws}.")
    bad = [t for t in tests if t not in ("t", "ar")]
    if bad or not tests:
        raise InvalidInputError(f"tests must name 't' and/or 'ar', got {tests!r}.")
    p = fd.prepared
    if p.X.shape[1] != 1:
        return WildBootstrapResult(
            False,
            f"the wild restricted efficient bootstrap covers one endogenous regressor; this model has "
            f"{p.X.shape[1]} ({', '.join(p.treatment)})",
        )
    g = fd.n_groups
    if fd.clustered and g < 2:
        return WildBootstrapResult(False, "a single cluster: there is nothing to resample")
    enumerated = weights == "rademacher" and fd.clustered and g <= enumerate_up_to
    seed_int = seed if isinstance(seed, int) else None
    if enumerated:
        v_codes = np.asarray((all_sign_vectors(g) + 1) / 2, dtype=np.int8)
    else:
        rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        v_codes = weight_codes(weights, g, draws, rng)
    engine = _Engine(fd)
    n_draws = v_codes.shape[1]
    step = engine.chunk()
    n_blocks = -(-n_draws // step)
    ticker = _Ticker(
        progress, n_blocks * len(tests) + (n_blocks * 30 if confidence_sets and "t" in tests else 0)
    )

    ar_table: _ArTable | None = None
    if "ar" in tests:
        parts = [engine.ar_parts(np.ones((g, 1)))]
        for start in range(0, n_draws, step):
            parts.append(engine.ar_parts(weight_values(weights, v_codes[:, start : start + step])))
            ticker.tick()
        dy, dx, myy, myx, mxx = (np.concatenate(pieces, axis=0) for pieces in zip(*parts, strict=True))
        ar_table = _ArTable(dy, dx, myy, myx, mxx, engine.s.q, engine.f_ar)

    t_table: _TTable | None = None
    if confidence_sets and "t" in tests and engine.fast and engine.n_inst == 1 and g <= T_TABLE_MAX_GROUPS:
        # inverting the t test evaluates many nulls: precompute b0-free sums once (one pass over the draws)
        engine.prepare_t_table()
        rows = [engine.t_parts(np.ones((g, 1)))]
        wide = 8 * step
        for start in range(0, n_draws, wide):
            rows.append(engine.t_parts(weight_values(weights, v_codes[:, start : start + wide])))
            ticker.tick()
        t_table = _TTable(engine, np.concatenate(rows, axis=0))
        # guard against cancellation in the expanded sum of squares: the first block must agree with the
        # direct computation at the null, else the direct path is used for every b0
        first = weight_values(weights, v_codes[:, : min(step, 64)])
        direct = engine.t_stats(engine.at_null(null), first)
        expanded = t_table.stats(null)[1 : 1 + first.shape[1]]
        if not np.allclose(expanded, direct, rtol=1e-6, atol=1e-9, equal_nan=True):
            t_table = None

    def boot(kind: str, b0: float) -> tuple[float, Array]:
        if kind == "t" and t_table is not None:
            all_t = np.abs(t_table.stats(b0))
            return float(all_t[0]), all_t[1:]
        if kind == "ar":
            assert ar_table is not None
            all_stats = ar_table.stats(b0)
            return float(all_stats[0]), all_stats[1:]
        a0 = engine.at_null(b0)
        stat = abs(float(engine.t_stats(a0, np.ones((g, 1)))[0]))
        out = np.empty(n_draws)
        for start in range(0, n_draws, step):
            block = weight_values(weights, v_codes[:, start : start + step])
            out[start : start + step] = np.abs(engine.t_stats(a0, block))
            ticker.tick()
        return stat, out

    beta_hat = float(p.X[:, 0] @ _proj(engine, p.y)) / float(p.X[:, 0] @ _proj(engine, p.X[:, 0]))
    se_hat = _analytic_se(engine, beta_hat)
    results: dict[str, BootstrapTest] = {}
    for kind in tests:
        stat, dist = boot(kind, null)
        pval = _p_value(dist, stat)
        intervals = None
        if confidence_sets:

            def p_at(b0: float, kind: str = kind) -> float:
                st, ds = boot(kind, b0)
                return _p_value(ds, st)

            # the AR table makes every b0 cheap, so its grid is dense; each t evaluation costs a pass over the draws
            grid = 9 if kind == "t" else 41
            intervals = invert_test(
                p_at, alpha, beta_hat, se_hat, n_grid=grid, rtol=1e-4 if kind == "ar" else 1e-3
            )
        name = "t test (2SLS, symmetric)" if kind == "t" else "Anderson–Rubin"
        shown = stat / engine.n_inst if kind == "ar" else stat  # AR in F form: Wald / L
        results[kind] = BootstrapTest(
            name=name,
            null=null,
            statistic=float(shown),
            p_value=pval,
            alpha=alpha,
            intervals=intervals,
            shape=None if intervals is None else classify_set(intervals),
        )
    ticker.finish()
    return WildBootstrapResult(
        applicable=True,
        reason=None,
        treatment=p.treatment[0],
        weights=weights,
        draws=n_draws,
        enumerated=enumerated,
        n_clusters=g,
        clustered=fd.clustered,
        seed=seed_int,
        estimate=beta_hat,
        t_test=results.get("t"),
        anderson_rubin=results.get("ar"),
        partialling=fd.partialling,
    )


class _Ticker:
    def __init__(self, progress: Progress | None, total: int) -> None:
        self.progress, self.total, self.done = progress, max(total, 1), 0

    def tick(self) -> None:
        self.done += 1
        if self.progress is not None:
            self.total = max(self.total, self.done)
            self.progress(self.done, self.total)

    def finish(self) -> None:
        if self.progress is not None:
            self.progress(self.total, self.total)


def _proj(engine: _Engine, col: Array) -> Array:
    z = engine.fd.prepared.Z
    return np.asarray(z @ (engine.s.q @ (z.T @ col)), dtype=np.float64)


def _analytic_se(engine: _Engine, beta: float) -> float:
    """The 2SLS cluster- or heteroskedasticity-robust standard error (scale for the inversion grid)."""
    ones = np.ones((engine.g, 1))
    t_at = engine.t_stats(engine.at_null(beta + 1.0), ones)[0]
    # t(beta + 1) = (beta - beta - 1) / se with the same unrestricted se, so se = -1 / t
    se = -1.0 / float(t_at) if t_at != 0 and np.isfinite(t_at) else 1.0
    return se if se > 0 else 1.0


def invert_test(
    p_value: Callable[[float], float],
    alpha: float,
    center: float,
    scale: float,
    *,
    n_grid: int = 17,
    span: float = 8.0,
    widen: tuple[float, ...] = (40.0, 400.0, 4000.0),
    rtol: float = 1e-4,
) -> list[Interval]:
    """Set {b : p_value(b) > alpha} from a grid center +/- span*scale (widened while an end is accepted).

    Each change between neighbouring grid points is refined by safeguarded regula falsi on p - alpha (the
    interpolated point is kept at least a tenth of the bracket from either end) until the bracket is below
    rtol * scale. A set still accepted at the widest end is reported unbounded on that side.
    """
    pts = list(center + scale * np.linspace(-span, span, n_grid))
    pv = [p_value(b) for b in pts]
    for far in widen:
        if not pv[0] > alpha:
            break
        pts.insert(0, center - far * scale)
        pv.insert(0, p_value(pts[0]))
    for far in widen:
        if not pv[-1] > alpha:
            break
        pts.append(center + far * scale)
        pv.append(p_value(pts[-1]))
    tol = rtol * scale

    def edge(a: float, pa: float, b: float, pb: float) -> float:
        """Boundary between a and b, where exactly one of pa, pb exceeds alpha."""
        while abs(b - a) > tol:
            w = (pa - alpha) / (pa - pb) if pa != pb else 0.5
            w = min(max(w, 0.1), 0.9)
            m = a + w * (b - a)
            pm = p_value(m)
            if (pm > alpha) == (pa > alpha):
                a, pa = m, pm
            else:
                b, pb = m, pm
        return 0.5 * (a + b)

    intervals: list[Interval] = []
    start = -math.inf if pv[0] > alpha else None
    for i in range(1, len(pts)):
        inside, before = pv[i] > alpha, pv[i - 1] > alpha
        if inside == before:
            continue
        b = edge(pts[i - 1], pv[i - 1], pts[i], pv[i])
        if inside:
            start = b
        else:
            intervals.append((start if start is not None else -math.inf, b))
            start = None
    if start is not None:
        intervals.append((start, math.inf))
    return intervals
