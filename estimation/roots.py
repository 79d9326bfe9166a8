"""Brent's root finder (inverse quadratic extrapolation) without scipy.optimize.

A line-by-line port of scipy's `brentq` (scipy/optimize/Zeros/brentq.c, scipy 1.17, and the checks of its
Python wrapper), so the root is the same float: Python floats are IEEE doubles and every operation is done in
the C code's order. Importing `scipy.optimize` costs a large part of `estimate`'s start-up for this one routine.
tests/test_roots.py compares the result with scipy.optimize.brentq on many functions and brackets.
SciPy's BSD 3-Clause licence applies to this port (THIRD_PARTY_NOTICES.md).
"""

from __future__ import annotations

import math
from collections.abc import Callable

XTOL = 2e-12
RTOL = 4 * 2.220446049250313e-16  # 4 * machine epsilon, scipy's smallest allowed rtol
MAXITER = 100


def _div(num: float, den: float) -> float:
    """num / den as C divides doubles: a zero denominator gives a signed infinity (nan for 0 / 0)."""
    if den != 0 or math.isnan(den):
        return num / den
    if num == 0 or math.isnan(num):
        return math.nan
    return math.copysign(math.inf, num) * math.copysign(1.0, den)


def brentq(
    f: Callable[[float], float],
    a: float,
    b: float,
    *,
    xtol: float = XTOL,
    rtol: float = RTOL,
    maxiter: int = MAXITER,
) -> float:
    """A root of f in [a, b] (f(a), f(b) of opposite signs) to within xtol + rtol * |root| (scipy's brentq)."""
    if xtol <= 0:
        raise ValueError(f"xtol too small ({xtol:g} <= 0)")
    if rtol < RTOL:
        raise ValueError(f"rtol too small ({rtol:g} < {RTOL:g})")
    if maxiter < 0:
        raise ValueError("maxiter must be >= 0")

    def call(x: float) -> float:
        fx = f(x)
        if math.isnan(fx):
            raise ValueError(f"The function value at x={x} is NaN; solver cannot continue.")
        return float(fx)

    xpre, xcur = float(a), float(b)
    xblk = fblk = spre = scur = 0.0
    fpre, fcur = call(xpre), call(xcur)
    if fpre * fcur > 0:
        raise ValueError("f(a) and f(b) must have different signs")
    if fpre == 0:
        return xpre
    if fcur == 0:
        return xcur
    for _ in range(maxiter):
        if fpre != 0 and fcur != 0 and math.copysign(1.0, fpre) != math.copysign(1.0, fcur):
            xblk, fblk = xpre, fpre
            spre = scur = xcur - xpre
        if abs(fblk) < abs(fcur):
            xpre, xcur, xblk = xcur, xblk, xcur
            fpre, fcur, fblk = fcur, fblk, fcur
        delta = (xtol + rtol * abs(xcur)) / 2
        sbis = (xblk - xcur) / 2
        if fcur == 0 or abs(sbis) < delta:
            return xcur
        if abs(spre) > delta and abs(fcur) < abs(fpre):
            if xpre == xblk:  # interpolate
                stry = _div(-fcur * (xcur - xpre), fcur - fpre)
            else:  # extrapolate
                dpre = _div(fpre - fcur, xpre - xcur)
                dblk = _div(fblk - fcur, xblk - xcur)
                stry = _div(-fcur * (fblk * dblk - fpre * dpre), dblk * dpre * (fblk - fpre))
            limit = 3 * abs(sbis) - delta
            if abs(spre) < limit:  # C's MIN(a, b): a if a < b else b (differs from min() only with a nan)
                limit = abs(spre)
            if 2 * abs(stry) < limit:  # good short step
                spre, scur = scur, stry
            else:  # bisect
                spre = scur = sbis
        else:  # bisect
            spre = scur = sbis
        xpre, fpre = xcur, fcur
        xcur += scur if abs(scur) > delta else (delta if sbis > 0 else -delta)
        fcur = call(xcur)
    raise RuntimeError(f"Failed to converge after {maxiter} iterations.")
