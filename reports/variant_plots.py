"""SVG figures for summary-data evidence and the omitted-variable robustness value.

Same visual language as :mod:`ivdossier.reports.plots` (palette, deterministic SVG from
:mod:`ivdossier.reports.svgplot`, labels as escaped text):
fitted lines differ by dash pattern as well as colour, points are open circles, and every figure has a legend.
Each function takes a typed result and returns SVG text.
"""

from __future__ import annotations

import math

import numpy as np

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.omitted_variable import ContourGrid
from ivdossier.estimation.variant_summary import (
    EggerFit,
    IvwFit,
    LeaveOneOut,
    NotApplicable,
    SummaryEvidence,
    WeightedMedian,
)
from ivdossier.reports.plots import ACCENT, ALERT, INK, MUTED, SHADE
from ivdossier.reports.svgplot import Plot

__all__ = ["funnel_svg", "leave_one_out_svg", "robustness_contour_svg", "variant_scatter_svg"]

_DASH_EGGER = "dashed"
_DASH_MEDIAN = "dotted"


def _oriented(evidence: SummaryEvidence) -> tuple[np.ndarray, ...]:
    t = evidence.table
    sign = np.where(t.bx < 0, -1.0, 1.0)
    return t.bx * sign, t.by * sign, t.sx, t.sy


def variant_scatter_svg(evidence: SummaryEvidence, *, key: str = "variant-scatter") -> str:
    """Outcome effect against exposure effect per variant (oriented to positive exposure effects, ±1 se bars),
    with the IVW, MR-Egger and weighted-median lines."""
    bx, by, sx, sy = _oriented(evidence)
    top = float(max(bx + sx)) * 1.08

    plot = Plot(height=400)
    plot.grid_x = True
    plot.hline(0.0, color=MUTED, width=0.7)
    plot.segments(
        [((x - ex, y), (x + ex, y)) for x, y, ex in zip(bx, by, sx, strict=True)], color=MUTED, width=0.7
    )
    plot.segments(
        [((x, y - ey), (x, y + ey)) for x, y, ey in zip(bx, by, sy, strict=True)], color=MUTED, width=0.7
    )
    plot.points(bx, by, size=3.6, fill="#ffffff", stroke=INK, label="variants")
    ends = [0.0, top]
    fit = evidence.ivw
    if isinstance(fit, IvwFit):
        plot.line(
            ends, [fit.estimate * e for e in ends], color=ACCENT, width=1.7, label=f"IVW ({fit.estimate:.3g})"
        )
    eg = evidence.egger
    if isinstance(eg, EggerFit):
        plot.line(ends, [eg.intercept + eg.estimate * e for e in ends], color=ALERT, width=1.5, dash=_DASH_EGGER,
                  label=f"MR-Egger ({eg.estimate:.3g}, intercept {eg.intercept:.2g})")  # fmt: skip
    wm = evidence.weighted_median
    if isinstance(wm, WeightedMedian):
        plot.line(ends, [wm.estimate * e for e in ends], color=INK, width=1.5, dash=_DASH_MEDIAN,
                  label=f"weighted median ({wm.estimate:.3g})")  # fmt: skip
    plot.xlim(0.0, top)
    plot.xlabel = "variant effect on the exposure (oriented positive)"
    plot.ylabel = "variant effect on the outcome"
    del key
    return plot.svg()


def funnel_svg(evidence: SummaryEvidence, *, key: str = "variant-funnel") -> str:
    """Wald ratio of each variant against its precision (1 / first-order se), with the IVW and Egger estimates."""
    ratio = np.asarray(evidence.ratios.ratio)
    precision = 1.0 / np.asarray(evidence.ratios.se_first_order)

    plot = Plot(height=360)
    plot.grid_x = True
    plot.points(ratio, precision, size=3.6, fill="#ffffff", stroke=INK, label="variants")
    fit = evidence.ivw
    if isinstance(fit, IvwFit):
        plot.vline(fit.estimate, color=ACCENT, width=1.7, label=f"IVW ({fit.estimate:.3g})")
    eg = evidence.egger
    if isinstance(eg, EggerFit):
        plot.vline(
            eg.estimate, color=ALERT, width=1.5, dash=_DASH_EGGER, label=f"MR-Egger ({eg.estimate:.3g})"
        )
    plot.ylim(0.0, float(precision.max()))
    plot.xlabel, plot.ylabel = "Wald ratio of the variant", "precision (1 / se)"
    del key
    return plot.svg()


def leave_one_out_svg(evidence: SummaryEvidence | LeaveOneOut, *, key: str = "variant-loo") -> str:
    """IVW estimate and interval with each variant left out (one row each), the full estimate dashed."""
    loo = evidence.leave_one_out if isinstance(evidence, SummaryEvidence) else evidence
    if isinstance(loo, NotApplicable):
        raise InvalidInputError(f"No leave-one-out plot: {loo.reason}.")
    rows = len(loo.variants)
    y = np.arange(rows)[::-1]
    est = np.asarray(loo.estimate)
    lo, hi = np.asarray(loo.lower), np.asarray(loo.upper)

    plot = Plot(height=max(200.0, 120 + 22 * rows))
    plot.grid_x, plot.grid_y = True, False
    plot.vline(0.0, color=MUTED, width=0.8)
    plot.vline(loo.full_estimate, color=ALERT, width=1.3, dash=_DASH_EGGER, label="IVW, all variants")
    plot.segments([((a, r), (b, r)) for a, b, r in zip(lo, hi, y, strict=True)], color=ACCENT, width=1.5,
                  label="interval without the variant")  # fmt: skip
    plot.points(
        est, y, shape="square", size=3.2, fill=ACCENT, stroke=ACCENT, label="estimate without the variant"
    )
    plot.ycategories(y, list(loo.variants))
    plot.ylim(-1.0, float(rows), exact=True)
    plot.xlabel = "IVW estimate with the variant left out"
    del key
    return plot.svg()


def robustness_contour_svg(grid: ContourGrid, *, key: str = "robustness-contour") -> str:
    """Adjusted estimate over confounder strengths: contour lines, the target (bold) and the line where the
    adjusted interval reaches the target (dashed); benchmark confounders as labelled diamonds."""
    x = np.asarray(grid.r2_regressor)
    y = np.asarray(grid.r2_outcome)
    est = np.asarray(grid.estimate, dtype=float)
    tval = np.asarray(grid.t_value, dtype=float)
    if est.shape != (len(y), len(x)):
        raise InvalidInputError(
            "The contour grid is malformed: estimate rows must follow r2_outcome; rebuild it."
        )

    if not math.isfinite(grid.critical_t):
        raise InvalidInputError(
            "The contour grid has no finite critical value; rebuild it with a valid alpha."
        )
    xs, ys = x.tolist(), y.tolist()
    plot = Plot(width=560, height=460, title=grid.label)
    plot.grid_x = True
    finite = est[np.isfinite(est)]
    levels = np.unique(np.round(np.linspace(finite.min(), finite.max(), 9), 12))
    levels = levels[np.abs(levels - grid.target) > 1e-12 * max(1.0, abs(grid.target))]
    if levels.size >= 2:
        for level in levels.tolist():
            plot.contour(xs, ys, est.tolist(), level, color=MUTED, width=0.7, tag=f"{level:.3g}")
    side = 1.0 if grid.unadjusted_estimate >= grid.target else -1.0
    if finite.min() <= grid.target <= finite.max():
        plot.contour(xs, ys, est.tolist(), grid.target, color=INK, width=1.9,
                     label=f"estimate reaches {grid.target:g}")  # fmt: skip
    crit = side * grid.critical_t
    tf = tval[np.isfinite(tval)]
    if tf.size and tf.min() <= crit <= tf.max():
        plot.contour(xs, ys, tval.tolist(), crit, color=ALERT, width=1.5, dash="dashed",
                     label="interval reaches the target")  # fmt: skip
    plot.points([0.0], [0.0], shape="triangle", size=4.5, fill=INK, stroke=INK, label="no confounding")
    shown = [(name, px, py) for name, px, py in grid.points if px <= x.max() and py <= y.max()]
    if shown:
        plot.points([p[1] for p in shown], [p[2] for p in shown], shape="diamond", size=4.2, fill=SHADE,
                    stroke=ACCENT, label="benchmark confounders")  # fmt: skip
        for name, px, py in shown:
            plot.text(px, py, name, dx=6, dy=-5, size=9)
    plot.xlim(0.0, float(x.max()))
    plot.ylim(0.0, float(y.max()))
    plot.xlabel = "partial R² of the confounder with the instrument"
    plot.ylabel = "partial R² of the confounder with the outcome"
    del key
    return plot.svg()
