"""Confidence sets as unions of closed intervals (ends may be infinite): their shape and the solution set of a
quadratic inequality. Pure Python, so that code which only reads or re-examines stored sets (the literature audit,
documents) imports no numerics; `ivdossier.estimation.robust_inference` re-exports these names."""

from __future__ import annotations

import math

Interval = tuple[float, float]


def classify_set(intervals: list[Interval]) -> str:
    """Name the shape of a union of intervals: empty, whole_line, bounded, ray, two_rays or union."""
    if not intervals:
        return "empty"
    if len(intervals) == 1:
        lo, hi = intervals[0]
        if math.isinf(lo) and math.isinf(hi):
            return "whole_line"
        if math.isinf(lo) or math.isinf(hi):
            return "ray"
        return "bounded"
    if len(intervals) == 2 and math.isinf(intervals[0][0]) and math.isinf(intervals[1][1]):
        return "two_rays"
    return "union"


def quadratic_set(a2: float, a1: float, a0: float, *, scale: float = 1.0) -> list[Interval]:
    """Solve a2 b^2 + a1 b + a0 <= 0 over the real line; returns sorted closed intervals with +/-inf ends.

    ``scale`` is the size of the coefficients' terms, used to decide when a2 is numerically zero.
    """
    inf = math.inf
    tiny = 1e-12 * max(scale, abs(a2), abs(a1), abs(a0), 1e-300)
    if abs(a2) <= tiny:
        if abs(a1) <= tiny:
            return [(-inf, inf)] if a0 <= 0 else []
        root = -a0 / a1
        return [(-inf, root)] if a1 > 0 else [(root, inf)]
    disc = a1 * a1 - 4 * a2 * a0
    if disc < 0:
        return [] if a2 > 0 else [(-inf, inf)]
    sq = math.sqrt(disc)
    # numerically stable roots
    q = -0.5 * (a1 + math.copysign(sq, a1)) if a1 != 0 else -0.5 * sq
    r1 = q / a2
    r2 = a0 / q if q != 0 else -r1
    lo, hi = min(r1, r2), max(r1, r2)
    if a2 > 0:
        return [(lo, hi)]
    return [(-inf, lo), (hi, inf)]
