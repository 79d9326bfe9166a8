"""Weak-instrument-robust inference on partialled data: Anderson–Rubin test and confidence set, tF interval,
Moreira's conditional likelihood-ratio test and set, and the reduced form.

Anderson–Rubin (1949), one endogenous regressor. With pi_y, pi_x the reduced-form and first-stage
coefficients on Z and V their joint covariance from ``sandwich`` (any covariance kind), the Wald form of the
AR statistic at beta is AR(b) = (pi_y - b pi_x)' W(b)^{-1} (pi_y - b pi_x), with
W(b) = V_yy - b (V_yx + V_xy) + b^2 V_xx. This is exactly the Wald test of all Z coefficients in the
regression of y - b x on Z with the same covariance, because the sandwich is quadratic in the residuals.
The set {b : AR(b) <= k F_{1-alpha}(k, d)} is found

* analytically when k = 1 or the covariance is unadjusted (W(b) is then a scalar quadratic times a fixed
  matrix, so the inequality is one quadratic inequality: bounded, two rays, whole line or empty);
* numerically otherwise, on a grid in the angle theta = arctan(b) covering the whole line including
  b = +/-inf, with every sign change refined by ``scipy.optimize.brentq``.

The F-form statistic AR/k is referred to F(k, d), d = n - k - n_partialled (or G - 1 with clusters).

tF (Lee, McCrary, Moreira and Porter 2022): with one instrument, beta_IV +/- c(F) se, where F is the
first-stage Wald F under the chosen covariance (pi_x^2 / V_xx) and se the delta-method standard error
under the same covariance, which equals the usual 2SLS sandwich standard error when k = 1.

CLR, one endogenous regressor: Moreira (2003) under the unadjusted covariance; under a robust or cluster
covariance the GMM form of Kleibergen (2005) built from the same pi_y, pi_x and V (it reduces to Moreira's
statistic under the Kronecker covariance). The p-value is exact given Q_T (for Kleibergen's form: given r)
through one-dimensional numerical integration over the chi-square(k - 1) part:
P(LR > m | Q_T = q) = P(chi2_{k-1} > m + q) + int_0^{m+q} f_{k-1}(v) P(chi2_1 > m - v m / (m + q)) dv, which
follows from LR = (Q_1 + Q_{k-1} - q + sqrt((Q_1 + Q_{k-1} + q)^2 - 4 q Q_{k-1})) / 2 with independent
Q_1 ~ chi2(1) and Q_{k-1} ~ chi2(k-1) under the null. The set inverts the test on the same angle grid.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.critical_values import TF_SOURCE, tf_critical_value
from ivdossier.estimation.crossproducts import (
    SINGULAR_RTOL,
    ZERO_RTOL,
    CrossProducts,
    build,
    quad_form_inv,
)
from ivdossier.estimation.distributions import f_ppf
from ivdossier.estimation.roots import brentq
from ivdossier.estimation.sets import Interval as Interval
from ivdossier.estimation.sets import classify_set as classify_set
from ivdossier.estimation.sets import quadratic_set as quadratic_set
from ivdossier.estimation.strength import (
    as_matrix,
    denominator_df_cp,
    f_p_value,
    instrument_basis,
    require_distinct_instruments,
    to_instrument_units,
    wald,
)
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]
HALF_PI = math.pi / 2


def invert_on_circle(
    margin: Callable[[float], float], thetas: Array, margins: Array, *, xtol: float = 1e-12
) -> list[Interval]:
    """Accepted set {b = tan(theta) : margin(theta) <= 0} from margins on a sorted grid over [-pi/2, pi/2].

    Each change of sign between grid points is refined with brentq (estimation/roots.py); the grid ends represent
    b = -inf and +inf.
    """
    accepted = margins <= 0
    if accepted.all():
        return [(-math.inf, math.inf)]
    bounds: list[float] = []
    for i in np.flatnonzero(accepted[:-1] != accepted[1:]):
        a, b = float(thetas[i]), float(thetas[i + 1])
        fa, fb = margin(a), margin(b)
        if fa == 0.0 or fb == 0.0 or (fa < 0) == (fb < 0):
            # the scalar margin disagrees in sign with the vectorised one at round-off level: keep the end
            # point whose margin is closer to zero instead of refining
            bounds.append(a if abs(fa) <= abs(fb) else b)
            continue
        bounds.append(brentq(margin, a, b, xtol=xtol))
    segments: list[tuple[float, float]] = []
    start = -HALF_PI if accepted[0] else None
    for root in bounds:
        if start is None:
            start = root
        else:
            segments.append((start, root))
            start = None
    if start is not None:
        segments.append((start, HALF_PI))

    def to_b(t: float) -> float:
        if t <= -HALF_PI:
            return -math.inf
        if t >= HALF_PI:
            return math.inf
        return math.tan(t)

    return [(to_b(lo), to_b(hi)) for lo, hi in segments]


def angle_grid(center: float, scale: float, *, n_uniform: int = 1201, n_local: int = 401) -> Array:
    """Sorted angles covering [-pi/2, pi/2] uniformly plus a denser band around b = center (+/- 50 scale)."""
    uniform = np.linspace(-HALF_PI, HALF_PI, n_uniform)
    local: Array = (
        np.arctan(center + scale * np.linspace(-50.0, 50.0, n_local))
        if math.isfinite(center)
        else np.empty(0)
    )
    return np.unique(np.concatenate([uniform, local]))


def _refine_dip(margin: Callable[[float], float], thetas: Array, margins: Array) -> tuple[Array, Array]:
    """With no accepted grid point, minimise near the smallest margin so a narrow dip is not missed."""
    if (margins <= 0).any():
        return thetas, margins
    from scipy import optimize  # only here, where it minimises: importing scipy.optimize is slow

    i = int(np.argmin(margins))
    lo, hi = float(thetas[max(i - 1, 0)]), float(thetas[min(i + 1, len(thetas) - 1)])
    res = optimize.minimize_scalar(margin, bounds=(lo, hi), method="bounded", options={"xatol": 1e-13})
    if float(res.fun) <= 0:
        t = float(res.x)
        order = np.argsort(np.append(thetas, t))
        return np.append(thetas, t)[order], np.append(margins, float(res.fun))[order]
    return thetas, margins


@dataclass(frozen=True)
class ReducedForm(Record):
    """Reduced-form regression of the outcome on the excluded instruments, with the joint Wald test."""

    coefficients: dict[str, float]
    std_errors: dict[str, float]
    wald_f: float
    df: tuple[int, int]
    p_value: float
    cov_kind: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "coefficients": json_safe(self.coefficients),
            "std_errors": json_safe(self.std_errors),
            "wald_f": json_safe(self.wald_f),
            "df": list(self.df),
            "p_value": json_safe(self.p_value),
            "cov": self.cov_kind,
        }


def _cp(
    y: np.ndarray | None,
    x: np.ndarray,
    z: np.ndarray,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int,
) -> CrossProducts:
    zm, xm = as_matrix(z, "Z"), as_matrix(x, "X")
    ym = None if y is None else as_matrix(y, "y")
    cp = build(zm, xm, ym, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested)
    require_distinct_instruments(cp, [f"column {j}" for j in range(cp.k)])
    return cp


def reduced_form(
    y: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    instrument_names: list[str],
) -> ReducedForm:
    """Coefficients of y on each instrument with SEs under the chosen covariance and the F-form Wald test."""
    ym, zm = as_matrix(y, "y"), as_matrix(z, "Z")
    cp = _cp(None, ym, zm, spec, n_partialled, n_partialled_nested)  # y in the role of the one "treatment"
    return reduced_form_from(cp, instrument_names=instrument_names, column=cp.k)


def reduced_form_from(
    cp: CrossProducts, *, instrument_names: list[str], column: int | None = None
) -> ReducedForm:
    """Reduced form of the outcome column (or ``column``) on the instruments, from the sufficient statistics."""
    k = cp.k
    col = cp.iy if column is None else column
    coef = np.asarray(cp.r[:k, col], dtype=np.float64)
    resid = np.array(cp.r[:, col], dtype=np.float64)
    resid[:k] = 0.0
    cov = cp.covariance(instrument_basis(cp), resid, np.eye(k), k)
    f = quad_form_inv(cov, coef, "the reduced-form coefficients") / k
    d = denominator_df_cp(cp, k)
    coef_o, cov_o = to_instrument_units(cp, coef, cov, col)
    return ReducedForm(
        coefficients={nm: float(coef_o[i]) for i, nm in enumerate(instrument_names)},
        std_errors={nm: float(math.sqrt(max(cov_o[i, i], 0.0))) for i, nm in enumerate(instrument_names)},
        wald_f=f,
        df=(k, d),
        p_value=f_p_value(f, k, d),
        cov_kind=cp.kind,
    )


@dataclass(frozen=True)
class _Moments:
    """Reduced-form and first-stage coefficients on the orthonormal instrument basis (standardised units)
    and their joint covariance (one endogenous); an effect b in data units is b_std * unit."""

    pi_y: Array
    pi_x: Array
    v_yy: Array
    v_yx: Array
    v_xx: Array
    zz: Array
    k: int
    d: int
    unit: float = 1.0
    joint_rank: int = 0


def moments_from(cp: CrossProducts) -> _Moments:
    """The AR/CLR/tF moments of the first endogenous regressor from the sufficient statistics."""
    k = cp.k
    cols = [cp.iy, cp.k]
    coef = np.asarray(cp.r[:k, cols], dtype=np.float64)
    resid = np.array(cp.r[:, cols], dtype=np.float64)
    resid[:k] = 0.0
    v = cp.covariance(instrument_basis(cp), resid, np.eye(k), k)
    vals = np.linalg.eigvalsh((v + v.T) / 2)
    top = float(np.abs(vals).max()) if vals.size else 0.0
    rank = int(np.count_nonzero(np.abs(vals) > SINGULAR_RTOL * top)) if top > 0 else 0
    return _Moments(
        pi_y=coef[:, 0],
        pi_x=coef[:, 1],
        v_yy=v[:k, :k],
        v_yx=v[:k, k:],
        v_xx=v[k:, k:],
        zz=np.eye(k),
        k=k,
        d=denominator_df_cp(cp, k),
        unit=float(cp.scale[cp.iy] / cp.scale[cp.k]),
        joint_rank=rank,
    )


def _moments(
    y: Array, x: Array, z: Array, spec: CovSpec, n_partialled: int, n_partialled_nested: int
) -> _Moments:
    return moments_from(_cp(y, x[:, :1], z, spec, n_partialled, n_partialled_nested))


def _ar_wald(m: _Moments, b: float) -> float:
    """AR Wald statistic at b in standardised units (b = +/-inf allowed through the angle form)."""
    w = m.v_yy - b * (m.v_yx + m.v_yx.T) + b * b * m.v_xx
    return quad_form_inv(w, m.pi_y - b * m.pi_x, "the Anderson–Rubin moments")


def ar_statistics(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    betas: np.ndarray,
) -> tuple[Array, int]:
    """The AR statistic (F form: Wald / number of instruments) at each hypothesised effect in ``betas``, for one
    endogenous regressor, with the denominator degrees of freedom of its F reference distribution."""
    m = _moments(
        as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z"), spec, n_partialled, n_partialled_nested
    )
    return np.array([_ar_wald(m, float(b) / m.unit) / m.k for b in np.asarray(betas, dtype=np.float64)]), m.d


@dataclass(frozen=True)
class AndersonRubin(Record):
    """Anderson–Rubin test at a stated null and, with one endogenous regressor, the confidence set."""

    null: tuple[float, ...]
    statistic: float
    df: tuple[int, int]
    p_value: float
    alpha: float
    intervals: list[Interval] | None
    shape: str | None
    method: str | None
    reason: str | None
    cov_kind: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict; intervals as [[low, high], ...] with "inf"/"-inf" ends."""
        return {
            "null": list(self.null),
            "statistic": json_safe(self.statistic),
            "statistic_form": "F (Wald / number of instruments)",
            "df": list(self.df),
            "p_value": json_safe(self.p_value),
            "confidence_level": 1 - self.alpha,
            "confidence_set": None
            if self.intervals is None
            else [json_safe(list(iv)) for iv in self.intervals],
            "shape": self.shape,
            "set_method": self.method,
            "reason": self.reason,
            "cov": self.cov_kind,
        }


def anderson_rubin(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    alpha: float = 0.05,
    null: np.ndarray | None = None,
) -> AndersonRubin:
    """AR test at ``null`` (default beta = 0) and, for one endogenous regressor, the (1 - alpha) set."""
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    return anderson_rubin_from(
        _cp(ym, xm, zm, spec, n_partialled, n_partialled_nested), alpha=alpha, null=null
    )


def _scale_intervals(intervals: list[Interval], unit: float) -> list[Interval]:
    return [(lo * unit, hi * unit) for lo, hi in intervals]


def anderson_rubin_from(
    cp: CrossProducts, *, alpha: float = 0.05, null: np.ndarray | None = None
) -> AndersonRubin:
    """AR test and set from the sufficient statistics (standardised units inside, data units out)."""
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie in (0, 1), got {alpha}; use e.g. 0.05.")
    k, p = cp.k, cp.p
    b0 = np.zeros(p) if null is None else np.asarray(null, dtype=np.float64).ravel()
    if b0.shape != (p,):
        raise InvalidInputError(
            f"The AR null must have one value per endogenous regressor ({p}), got {b0.size}."
        )
    d = denominator_df_cp(cp, k)
    if p > 1:
        b_std = b0 * cp.scale[cp.ix] / cp.scale[cp.iy]
        u = cp.coords(cp.iy) - cp.coords(cp.ix) @ b_std
        resid = u.copy()
        resid[:k] = 0.0
        cov = cp.covariance(instrument_basis(cp), resid, np.eye(k), k)
        stat = quad_form_inv(cov, u[:k], "the Anderson–Rubin moments") / k
        return AndersonRubin(
            null=tuple(float(v) for v in b0),
            statistic=stat,
            df=(k, d),
            p_value=f_p_value(stat, k, d),
            alpha=alpha,
            intervals=None,
            shape=None,
            method=None,
            reason="joint test only: with several endogenous regressors the confidence set "
            "(or its projection) is not computed",
            cov_kind=cp.kind,
        )
    m = moments_from(cp)
    stat = _ar_wald(m, float(b0[0]) / m.unit) / k
    crit = k * f_ppf(1 - alpha, k, d)
    reason = None
    intervals: list[Interval] | None
    how: str | None
    if k > 1 and cp.kind != "homoskedastic" and m.joint_rank < 2 * k:
        intervals, how = None, None
        reason = (
            f"the confidence set is not computed: the joint covariance of the reduced-form and first-stage "
            f"coefficients has rank {m.joint_rank} of {2 * k}"
            + (f" (with {min(cp.cluster_counts())} clusters)" if cp.kind == "clustered" else "")
        )
    else:
        std_set, how = _ar_confidence_set(m, crit, cp.kind)
        intervals = _scale_intervals(std_set, m.unit)
    return AndersonRubin(
        null=(float(b0[0]),),
        statistic=stat,
        df=(k, d),
        p_value=f_p_value(stat, k, d),
        alpha=alpha,
        intervals=intervals,
        shape=None if intervals is None else classify_set(intervals),
        method=how,
        reason=reason,
        cov_kind=cp.kind,
    )


def _ar_confidence_set(m: _Moments, crit: float, kind: str) -> tuple[list[Interval], str]:
    """Invert AR(b) <= crit (Wald units): analytic quadratic when possible, else angle grid plus brentq."""
    if m.k == 1 or kind == "homoskedastic":
        q = m.zz
        s_yy = float(np.trace(m.v_yy @ q)) / m.k
        s_yx = float(np.trace(m.v_yx @ q)) / m.k
        s_xx = float(np.trace(m.v_xx @ q)) / m.k
        n_yy = float(m.pi_y @ q @ m.pi_y)
        n_yx = float(m.pi_y @ q @ m.pi_x)
        n_xx = float(m.pi_x @ q @ m.pi_x)
        a2 = n_xx - crit * s_xx
        a1 = -2.0 * (n_yx - crit * s_yx)
        a0 = n_yy - crit * s_yy
        scale = max(n_xx, crit * s_xx, abs(n_yx), crit * abs(s_yx), n_yy, crit * s_yy)
        return quadratic_set(a2, a1, a0, scale=scale), "analytic quadratic inversion"

    def margin(theta: float) -> float:
        c, s = math.cos(theta), math.sin(theta)
        w = c * c * m.v_yy - s * c * (m.v_yx + m.v_yx.T) + s * s * m.v_xx
        return wald(c * m.pi_y - s * m.pi_x, w) - crit

    center, scale = _iv_center(m)
    thetas = angle_grid(center, scale)
    c, s = np.cos(thetas), np.sin(thetas)
    g = c[:, None] * m.pi_y[None, :] - s[:, None] * m.pi_x[None, :]
    w = (
        (c * c)[:, None, None] * m.v_yy
        - (s * c)[:, None, None] * (m.v_yx + m.v_yx.T)
        + (s * s)[:, None, None] * m.v_xx
    )
    margins = np.einsum("ij,ij->i", g, np.linalg.solve(w, g[:, :, None])[:, :, 0]) - crit
    thetas, margins = _refine_dip(margin, thetas, margins)
    return invert_on_circle(
        margin, thetas, margins
    ), "numerical inversion on an angle grid with brentq refinement"


def _iv_center(m: _Moments) -> tuple[float, float]:
    """A 2SLS-type point estimate and a scale to centre the dense part of an angle grid."""
    q = m.zz
    denom = float(m.pi_x @ q @ m.pi_x)
    if denom <= 0:
        return 0.0, 1.0
    center = float(m.pi_x @ q @ m.pi_y) / denom
    var = (
        float((m.pi_x @ q) @ (m.v_yy - center * (m.v_yx + m.v_yx.T) + center**2 * m.v_xx) @ (q @ m.pi_x))
        / denom**2
    )
    return center, math.sqrt(var) if var > 0 else max(abs(center), 1.0)


@dataclass(frozen=True)
class TFResult(Record):
    """tF inference (Lee, McCrary, Moreira and Porter 2022): one instrument, one endogenous regressor."""

    applicable: bool
    reason: str | None
    estimate: float | None = None
    std_error: float | None = None
    first_stage_f: float | None = None
    critical_value: float | None = None
    interval: Interval | None = None
    significant_5pct: bool | None = None
    t_ratio: float | None = None
    cov_kind: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "estimate": json_safe(self.estimate),
            "std_error": json_safe(self.std_error),
            "t_ratio": json_safe(self.t_ratio),
            "first_stage_f": json_safe(self.first_stage_f),
            "first_stage_f_cov": self.cov_kind,
            "critical_value": json_safe(self.critical_value),
            "interval": None if self.interval is None else json_safe(list(self.interval)),
            "significant_5pct": self.significant_5pct,
            "level": 0.05,
            "source": TF_SOURCE,
        }


def tf_inference(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
) -> TFResult:
    """tF interval beta_IV +/- c(F) se at the 5 % level; F is the first-stage Wald F, chosen covariance."""
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    return tf_from(_cp(ym, xm, zm, spec, n_partialled, n_partialled_nested))


def tf_from(cp: CrossProducts) -> TFResult:
    """tF from the sufficient statistics (standardised units inside, data units out)."""
    if cp.p != 1 or cp.k != 1:
        return TFResult(
            applicable=False,
            reason="the published tF critical values cover one instrument and one endogenous regressor; "
            f"this model has {cp.k} instrument(s) and {cp.p} endogenous regressor(s)",
        )
    m = moments_from(cp)
    px, py = float(m.pi_x[0]), float(m.pi_y[0])
    vxx, vyx, vyy = float(m.v_xx[0, 0]), float(m.v_yx[0, 0]), float(m.v_yy[0, 0])
    if abs(px) <= ZERO_RTOL or vxx <= 0:
        return TFResult(
            False, "the first-stage coefficient or its variance is zero, so the IV estimate or F is undefined"
        )
    f = px * px / vxx
    beta = py / px
    se = math.sqrt(max(vyy - 2 * beta * vyx + beta * beta * vxx, 0.0)) / abs(px)
    c = tf_critical_value(f)
    t = beta / se if se > 0 else math.inf
    u = m.unit
    interval = (-math.inf, math.inf) if math.isinf(c) else ((beta - c * se) * u, (beta + c * se) * u)
    return TFResult(
        applicable=True,
        reason=None,
        estimate=beta * u,
        std_error=se * u,
        first_stage_f=f,
        critical_value=c,
        interval=interval,
        significant_5pct=bool(abs(t) > c),
        t_ratio=t,
        cov_kind=cp.kind,
    )


def clr_p_value(lr: float, qt: float, k: int) -> float:
    """P(LR > lr | Q_T = qt) under the null for k instruments (Moreira 2003), by numerical integration."""
    from scipy import special

    if lr <= 0:
        return 1.0
    if k == 1:
        return float(special.chdtrc(1, lr))
    from scipy import integrate  # only here: importing scipy.integrate also imports scipy.optimize

    upper = lr + qt
    tail = float(special.chdtrc(k - 1, upper))
    # the chi2(k - 1) mass beyond v_max is below 1e-15, so the integral can stop there
    v_max = min(upper, float(special.chdtri(k - 1, 1e-15)))
    if k == 2:  # chi2(1) density has an integrable singularity at 0: substitute v = u^2
        const = math.sqrt(2 / math.pi)

        def integrand(u: float) -> float:
            return const * math.exp(-u * u / 2) * math.erfc(math.sqrt(max(lr - u * u * lr / upper, 0.0) / 2))

        val, _ = integrate.quad(integrand, 0.0, math.sqrt(v_max), limit=200)
    else:
        half = (k - 1) / 2
        log_norm = -half * math.log(2) - math.lgamma(half)

        def integrand(u: float) -> float:
            v = u
            dens = (
                math.exp(log_norm + (half - 1) * math.log(v) - v / 2) if v > 0 else (0.5 if k == 3 else 0.0)
            )
            return dens * math.erfc(math.sqrt(max(lr - v * lr / upper, 0.0) / 2))

        val, _ = integrate.quad(integrand, 0.0, v_max, limit=200)
    return float(min(max(tail + val, 0.0), 1.0))


@dataclass(frozen=True)
class CLRResult(Record):
    """Conditional likelihood-ratio test at a null and its confidence set (one endogenous regressor)."""

    applicable: bool
    reason: str | None
    null: float | None = None
    statistic: float | None = None
    qt: float | None = None
    p_value: float | None = None
    alpha: float | None = None
    intervals: list[Interval] | None = None
    shape: str | None = None
    version: str | None = None
    cov_kind: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "null": json_safe(self.null),
            "statistic": json_safe(self.statistic),
            "conditioning_qt": json_safe(self.qt),
            "p_value": json_safe(self.p_value),
            "p_value_method": "exact conditional distribution given Q_T by numerical integration",
            "confidence_level": None if self.alpha is None else 1 - self.alpha,
            "confidence_set": None
            if self.intervals is None
            else [json_safe(list(iv)) for iv in self.intervals],
            "shape": self.shape,
            "cov": self.cov_kind,
            "version": self.version,
            "source": "Moreira (2003), A Conditional Likelihood Ratio Test for Structural Models, "
            "Econometrica; Kleibergen (2005), Testing Parameters in GMM Without Assuming that They Are "
            "Identified, Econometrica",
        }


def _clr_stats(m: _Moments, omega: Array, theta: float) -> tuple[float, float]:
    """(LR, Q_T) at beta = tan(theta); homogeneous in (cos, sin) so theta = +/-pi/2 (beta infinite) works."""
    c, s = math.cos(theta), math.sin(theta)
    b0 = np.array([c, -s])
    a0 = np.array([s, c])
    root = _sqrt_psd(m.zz)
    psi = root @ np.column_stack([m.pi_y, m.pi_x])
    oi_a = np.linalg.solve(omega, a0)
    s_vec = psi @ b0 / math.sqrt(float(b0 @ omega @ b0))
    t_vec = psi @ oi_a / math.sqrt(float(a0 @ oi_a))
    qs, qt, qst = float(s_vec @ s_vec), float(t_vec @ t_vec), float(s_vec @ t_vec)
    lr = 0.5 * (qs - qt + math.sqrt((qs - qt) ** 2 + 4 * qst * qst))
    return lr, qt


def _sqrt_psd(a: Array) -> Array:
    vals, vecs = np.linalg.eigh((a + a.T) / 2)
    return (vecs * np.sqrt(np.clip(vals, 0.0, None))) @ vecs.T


def _clr_stats_robust(m: _Moments, theta: float) -> tuple[float, float]:
    """(CLR, r) at beta = tan(theta) in the GMM form of Kleibergen (2005) with the moments' own covariance.

    g = pi_y - b pi_x with covariance W(b); the Jacobian -pi_x is orthogonalised against g, giving D; then
    AR = g'W^{-1}g, LM = the projection of g on D, r = D'V_{DD.g}^{-1}D and
    CLR = (AR - r + sqrt((AR + r)^2 - 4 (AR - LM) r)) / 2. Every piece is invariant to scaling (cos, sin).
    """
    c, s = math.cos(theta), math.sin(theta)
    g = c * m.pi_y - s * m.pi_x
    # h = s pi_y + c pi_x spans the Jacobian direction: -h = (-pi_x - s g) / c, so orthogonalising h against g
    # gives the orthogonalised Jacobian up to scale, without the 0/0 that -pi_x has at beta = +/-inf.
    h = s * m.pi_y + c * m.pi_x
    v_xy = m.v_yx.T
    v_gg = c * c * m.v_yy - s * c * (m.v_yx + v_xy) + s * s * m.v_xx
    v_hh = s * s * m.v_yy + s * c * (m.v_yx + v_xy) + c * c * m.v_xx
    v_hg = s * c * m.v_yy - s * s * m.v_yx + c * c * v_xy - s * c * m.v_xx  # Cov(h, g)
    w_g = np.linalg.solve(v_gg, g)
    d = h - v_hg @ w_g
    v_dd_g = v_hh - v_hg @ np.linalg.solve(v_gg, v_hg.T)
    ar = float(g @ w_g)
    w_d = np.linalg.solve(v_gg, d)
    dd = float(d @ w_d)
    lm = float((g @ w_d) ** 2 / dd) if dd > 0 else 0.0
    r = max(float(d @ np.linalg.solve(v_dd_g, d)), 0.0)
    clr = 0.5 * (ar - r + math.sqrt(max((ar + r) ** 2 - 4 * (ar - lm) * r, 0.0)))
    return clr, r


def _clr_stats_many(m: _Moments, omega: Array, thetas: Array) -> tuple[Array, Array]:
    """Vectorised :func:`_clr_stats` over an array of angles."""
    c, s = np.cos(thetas), np.sin(thetas)
    b0 = np.column_stack([c, -s])
    a0 = np.column_stack([s, c])
    psi = _sqrt_psd(m.zz) @ np.column_stack([m.pi_y, m.pi_x])
    oi_a = np.linalg.solve(omega, a0.T).T
    s_vec = (b0 @ psi.T) / np.sqrt(np.einsum("ti,ij,tj->t", b0, omega, b0))[:, None]
    t_vec = (oi_a @ psi.T) / np.sqrt(np.einsum("ti,ti->t", a0, oi_a))[:, None]
    qs, qt = np.einsum("ti,ti->t", s_vec, s_vec), np.einsum("ti,ti->t", t_vec, t_vec)
    qst = np.einsum("ti,ti->t", s_vec, t_vec)
    lr = 0.5 * (qs - qt + np.sqrt((qs - qt) ** 2 + 4 * qst * qst))
    return lr, qt


def _clr_stats_robust_many(m: _Moments, thetas: Array) -> tuple[Array, Array]:
    """Vectorised :func:`_clr_stats_robust` over an array of angles (batched k x k solves)."""
    c, s = np.cos(thetas)[:, None, None], np.sin(thetas)[:, None, None]
    cv, sv = c[:, :, 0], s[:, :, 0]
    g = cv * m.pi_y[None, :] - sv * m.pi_x[None, :]
    h = sv * m.pi_y[None, :] + cv * m.pi_x[None, :]
    v_xy = m.v_yx.T
    v_gg = c * c * m.v_yy - s * c * (m.v_yx + v_xy) + s * s * m.v_xx
    v_hh = s * s * m.v_yy + s * c * (m.v_yx + v_xy) + c * c * m.v_xx
    v_hg = s * c * m.v_yy - s * s * m.v_yx + c * c * v_xy - s * c * m.v_xx
    w_g = np.linalg.solve(v_gg, g[:, :, None])[:, :, 0]
    d = h - np.einsum("tij,tj->ti", v_hg, w_g)
    v_dd_g = v_hh - v_hg @ np.linalg.solve(v_gg, np.swapaxes(v_hg, 1, 2))
    ar = np.einsum("ti,ti->t", g, w_g)
    w_d = np.linalg.solve(v_gg, d[:, :, None])[:, :, 0]
    dd = np.einsum("ti,ti->t", d, w_d)
    gd = np.einsum("ti,ti->t", g, w_d)
    lm = np.where(dd > 0, gd * gd / np.where(dd > 0, dd, 1.0), 0.0)
    r = np.maximum(np.einsum("ti,ti->t", d, np.linalg.solve(v_dd_g, d[:, :, None])[:, :, 0]), 0.0)
    clr = 0.5 * (ar - r + np.sqrt(np.maximum((ar + r) ** 2 - 4 * (ar - lm) * r, 0.0)))
    return clr, r


_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(96)


def clr_p_values(lr: Array, qt: Array, k: int) -> Array:
    """Vectorised P(LR > lr | Q_T = qt): the integral of :func:`clr_p_value` after v = u^2 (which makes the
    integrand smooth for every k) by 96-point Gauss–Legendre; used to scan the set's grid, while reported
    p-values and set ends use the adaptive scalar version."""
    from scipy import special

    lr = np.maximum(np.asarray(lr, dtype=np.float64), 0.0)
    qt = np.asarray(qt, dtype=np.float64)
    if k == 1:
        return np.asarray(special.chdtrc(1, lr), dtype=np.float64)
    upper = lr + qt
    tail = special.chdtrc(k - 1, upper)
    v_max = np.minimum(upper, float(special.chdtri(k - 1, 1e-15)))
    top = np.sqrt(v_max)
    u = 0.5 * top[:, None] * (_GL_NODES[None, :] + 1.0)
    half = (k - 1) / 2
    log_norm = -half * math.log(2) - math.lgamma(half)
    # chi2(k-1) density at v = u^2 times dv = 2u du: 2 exp(log_norm) u^(k-2) exp(-u^2 / 2)
    dens = 2.0 * np.exp(log_norm - u * u / 2) * (u ** (k - 2) if k > 2 else 1.0)
    safe_upper = np.where(upper > 0, upper, 1.0)[:, None]
    arg = np.maximum(lr[:, None] - u * u * lr[:, None] / safe_upper, 0.0)
    vals = dens * special.erfc(np.sqrt(arg / 2))
    integral = 0.5 * top * (vals @ _GL_WEIGHTS)
    out = np.clip(tail + integral, 0.0, 1.0)
    return np.asarray(np.where(lr <= 0, 1.0, out), dtype=np.float64)


def clr_inference(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    alpha: float = 0.05,
    null: float = 0.0,
    n_grid: int = 241,
) -> CLRResult:
    """CLR test at ``null`` and the (1 - alpha) CLR set by grid inversion with brentq refinement.

    One endogenous regressor. Unadjusted covariance: Moreira's (2003) statistic with Omega estimated from the
    reduced-form residuals. Robust or cluster covariance: the GMM version of Kleibergen (2005), which uses
    the same conditional null distribution given its rank statistic r (asymptotic under weak instruments).
    """
    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    cp = _cp(ym, xm, zm, spec, n_partialled, n_partialled_nested)
    return clr_from(cp, alpha=alpha, null=null, n_grid=n_grid)


def clr_from(cp: CrossProducts, *, alpha: float = 0.05, null: float = 0.0, n_grid: int = 241) -> CLRResult:
    """CLR test and set from the sufficient statistics (standardised units inside, data units out)."""
    if cp.p != 1:
        return CLRResult(False, "the CLR test here covers one endogenous regressor")
    m = moments_from(cp)
    k = m.k
    if m.joint_rank < 2 * k and cp.kind != "homoskedastic":
        return CLRResult(
            False,
            f"not computed: the joint covariance of the reduced-form and first-stage coefficients has rank "
            f"{m.joint_rank} of {2 * k}"
            + (f" (with {min(cp.cluster_counts())} clusters)" if cp.kind == "clustered" else ""),
        )
    if cp.kind == "homoskedastic":
        omega = (
            np.array(
                [
                    [np.trace(m.v_yy), np.trace(m.v_yx)],
                    [np.trace(m.v_yx.T), np.trace(m.v_xx)],
                ]
            )
            / k
        )

        def stats_at(theta: float) -> tuple[float, float]:
            return _clr_stats(m, omega, theta)

        def stats_many(thetas: Array) -> tuple[Array, Array]:
            return _clr_stats_many(m, omega, thetas)

        version = "Moreira (2003), homoskedastic"
    else:

        def stats_at(theta: float) -> tuple[float, float]:
            return _clr_stats_robust(m, theta)

        def stats_many(thetas: Array) -> tuple[Array, Array]:
            return _clr_stats_robust_many(m, thetas)

        version = f"Kleibergen (2005) GMM form with the {cp.kind} covariance"

    def margin(theta: float) -> float:
        lr, qt = stats_at(theta)
        return alpha - clr_p_value(lr, qt, k)

    lr0, qt0 = stats_at(math.atan(null / m.unit))
    p0 = clr_p_value(lr0, qt0, k)
    center, scale = _iv_center(m)
    thetas = angle_grid(center, scale, n_uniform=n_grid, n_local=n_grid)
    lrs, qts = stats_many(thetas)
    margins = alpha - clr_p_values(lrs, qts, k)
    thetas, margins = _refine_dip(margin, thetas, margins)
    intervals = _scale_intervals(invert_on_circle(margin, thetas, margins, xtol=1e-10), m.unit)
    return CLRResult(
        applicable=True,
        reason=None,
        null=null,
        statistic=lr0,
        qt=qt0,
        p_value=p0,
        alpha=alpha,
        intervals=intervals,
        shape=classify_set(intervals),
        version=version,
        cov_kind=cp.kind,
    )


@dataclass(frozen=True)
class WeakIVRobustSection(Record):
    """Weak-instrument-robust inference: Anderson–Rubin, tF and CLR."""

    anderson_rubin: AndersonRubin
    tf: TFResult
    clr: CLRResult

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "anderson_rubin": self.anderson_rubin.to_dict(),
            "tf": self.tf.to_dict(),
            "clr": self.clr.to_dict(),
        }
