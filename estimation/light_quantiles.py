"""Pure-Python quantiles for numbers derived from stored or reported statistics, so that a document which only
reads stored results (a dossier: its literature audit, the complier shares' intervals) does not import scipy.

Only the few reference distributions the audit of a reported study needs: the standard normal (the standard
library's :class:`statistics.NormalDist`, Wichura's AS 241 algorithm), chi-square(1) as the square of a normal,
F(1, d) as the square of Student's t with d degrees of freedom (its distribution function from the regularised
incomplete beta function, evaluated by its continued fraction), and the noncentral chi-square with one degree of
freedom, whose distribution function is Phi(sqrt(x) - sqrt(nc)) - Phi(-sqrt(x) - sqrt(nc)). Quantiles are found by
bisection down to adjacent floating-point numbers. They agree with scipy.stats to about 1e-13 relative (F(1, d)
to 1e-12 at d = 1e5; tests/test_light_quantiles.py states each bound). Critical values are printed with a few digits, so documents read the same. Estimation runs keep using :mod:`ivdossier.estimation.distributions`, which
matches scipy.stats bit for bit.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from statistics import NormalDist

__all__ = ["chi2_1_ppf", "f_1_ppf", "ncx2_1_ppf", "norm_ppf"]

_NORMAL = NormalDist()


def norm_ppf(q: float) -> float:
    """Standard normal quantile."""
    return _NORMAL.inv_cdf(q)


def chi2_1_ppf(q: float) -> float:
    """Chi-square(1) quantile: the square of the normal quantile at (1 - q) / 2 (upper tail, so that q near 1,
    the case of critical values, keeps every digit)."""
    return norm_ppf(0.5 * (1.0 - q)) ** 2


def _bisect(cdf: Callable[[float], float], q: float, hi: float) -> float:
    """The x in [0, hi] with cdf(x) = q, to adjacent floats (cdf increasing; hi doubled until it is above)."""
    lo = 0.0
    while cdf(hi) < q:
        lo, hi = hi, 2.0 * hi
    for _ in range(2000):
        mid = 0.5 * (lo + hi)
        if mid in (lo, hi):
            break
        if cdf(mid) < q:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def _betacf(a: float, b: float, x: float) -> float:
    """Continued fraction of the incomplete beta function (modified Lentz)."""
    tiny = 1e-300
    qab, qap, qam = a + b, a + 1.0, a - 1.0
    c, d = 1.0, 1.0 - qab * x / qap
    d = 1.0 / (d if abs(d) > tiny else tiny)
    h = d
    for m in range(1, 10_000):
        m2 = 2 * m
        aa = m * (b - m) * x / ((qam + m2) * (a + m2))
        d = 1.0 + aa * d
        d = 1.0 / (d if abs(d) > tiny else tiny)
        c = 1.0 + aa / c
        c = c if abs(c) > tiny else tiny
        h *= d * c
        aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2))
        d = 1.0 + aa * d
        d = 1.0 / (d if abs(d) > tiny else tiny)
        c = 1.0 + aa / c
        c = c if abs(c) > tiny else tiny
        step = d * c
        h *= step
        if abs(step - 1.0) < 1e-16:
            break
    return h


def _log_beta_half(b: float) -> float:
    """ln B(1/2, b), with Gamma(b + 1/2) / Gamma(b) built up by its recurrence from b0 in [0.5, 1.5): a plain
    difference of log-gamma values would lose digits for large b."""
    k = max(0, math.floor(b - 0.5))
    b0 = b - k
    ratio = 1.0
    for j in range(k):
        ratio *= (b0 + j + 0.5) / (b0 + j)
    log_ratio = math.lgamma(b0 + 0.5) - math.lgamma(b0) + math.log(ratio)
    return 0.5 * math.log(math.pi) - log_ratio


def f_1_ppf(q: float, d: float) -> float:
    """Quantile of F(1, d): P(F <= f) = I_x(1/2, d/2) with x = f / (f + d); the upper tail
    I_{1-x}(d/2, 1/2) is computed directly, so critical values (q near 1) keep their digits."""
    if not (0.0 < q < 1.0 and d > 0):
        raise ValueError("need 0 < q < 1 and d > 0")
    a, b = 0.5, d / 2.0
    log_beta = _log_beta_half(b)

    def tails(f: float) -> tuple[float, float]:
        x, y = f / (f + d), d / (f + d)
        log_y = -math.log1p(f / d)  # ln(d / (f + d)) without cancellation when d is large
        front = math.exp(a * (math.log(f / d) + log_y) + b * log_y - log_beta)
        if x < (a + 1.0) / (a + b + 2.0):
            lower = front * _betacf(a, b, x) / a
            return lower, 1.0 - lower
        upper = front * _betacf(b, a, y) / b
        return 1.0 - upper, upper

    if q <= 0.5:
        return _bisect(lambda f: tails(f)[0], q, 16.0)
    return _bisect(lambda f: -tails(f)[1], -(1.0 - q), 16.0)


def ncx2_1_ppf(q: float, nc: float) -> float:
    """Quantile of the noncentral chi-square with one degree of freedom and noncentrality nc (the square of a
    normal with mean sqrt(nc) and unit variance)."""
    if not (0.0 < q < 1.0 and nc >= 0):
        raise ValueError("need 0 < q < 1 and nc >= 0")
    root = math.sqrt(nc)

    def cdf(x: float) -> float:
        s = math.sqrt(x)
        # Phi(s - root) - Phi(-s - root), each written with erfc so that neither tail loses digits
        return 0.5 * (math.erfc(-(s - root) / math.sqrt(2.0)) - math.erfc((s + root) / math.sqrt(2.0)))

    return _bisect(cdf, q, (root + 8.0) ** 2)
