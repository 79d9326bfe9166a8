"""SVG figures for summary-data evidence and the omitted-variable robustness value.

Same visual language as :mod:`ivdossier.reports.plots` (palette, deterministic SVG, text drawn as paths):
fitted lines differ by dash pattern as well as colour, points are open circles, and every figure has a legend.
Each function takes a typed result and returns SVG text.
"""

from __future__ import annotations

import math
from typing import Any

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
from ivdossier.reports.plots import ACCENT, ALERT, GRID, INK, MUTED, SHADE, _label, _render

__all__ = ["funnel_svg", "leave_one_out_svg", "robustness_contour_svg", "variant_scatter_svg"]

_DASH_EGGER = (0, (6, 3))
_DASH_MEDIAN = (0, (1.5, 2.5))


def _oriented(evidence: SummaryEvidence) -> tuple[np.ndarray, ...]:
    t = evidence.table
    sign = np.where(t.bx < 0, -1.0, 1.0)
    return t.bx * sign, t.by * sign, t.sx, t.sy


def variant_scatter_svg(evidence: SummaryEvidence, *, key: str = "variant-scatter") -> str:
    """Outcome effect against exposure effect per variant (oriented to positive exposure effects, ±1 se bars),
    with the IVW, MR-Egger and weighted-median lines."""
    bx, by, sx, sy = _oriented(evidence)
    top = float(max(bx + sx)) * 1.08

    def draw(ax: Any) -> None:
        ax.grid(True, color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)
        ax.axhline(0.0, color=MUTED, linewidth=0.7)
        ax.errorbar(bx, by, xerr=sx, yerr=sy, fmt="none", ecolor=MUTED, elinewidth=0.7, capsize=0)
        ax.scatter(bx, by, s=26, color="white", edgecolor=INK, linewidth=1.1, zorder=3, label="variants")
        grid = np.linspace(0.0, top, 50)
        fit = evidence.ivw
        if isinstance(fit, IvwFit):
            ax.plot(grid, fit.estimate * grid, color=ACCENT, linewidth=1.6, label=f"IVW ({fit.estimate:.3g})")
        eg = evidence.egger
        if isinstance(eg, EggerFit):
            ax.plot(
                grid,
                eg.intercept + eg.estimate * grid,
                color=ALERT,
                linewidth=1.4,
                linestyle=_DASH_EGGER,
                label=f"MR-Egger ({eg.estimate:.3g}, intercept {eg.intercept:.2g})",
            )
        wm = evidence.weighted_median
        if isinstance(wm, WeightedMedian):
            ax.plot(
                grid,
                wm.estimate * grid,
                color=INK,
                linewidth=1.4,
                linestyle=_DASH_MEDIAN,
                label=f"weighted median ({wm.estimate:.3g})",
            )
        ax.set_xlim(0.0, top)
        ax.set_xlabel("variant effect on the exposure (oriented positive)")
        ax.set_ylabel("variant effect on the outcome")
        ax.legend(loc="best", fontsize=8)

    return _render(key, draw, size=(6.4, 4.0))


def funnel_svg(evidence: SummaryEvidence, *, key: str = "variant-funnel") -> str:
    """Wald ratio of each variant against its precision (1 / first-order se), with the IVW and Egger estimates."""
    ratio = np.asarray(evidence.ratios.ratio)
    precision = 1.0 / np.asarray(evidence.ratios.se_first_order)

    def draw(ax: Any) -> None:
        ax.grid(True, color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)
        ax.scatter(
            ratio, precision, s=26, color="white", edgecolor=INK, linewidth=1.1, zorder=3, label="variants"
        )
        fit = evidence.ivw
        if isinstance(fit, IvwFit):
            ax.axvline(fit.estimate, color=ACCENT, linewidth=1.6, label=f"IVW ({fit.estimate:.3g})")
        eg = evidence.egger
        if isinstance(eg, EggerFit):
            ax.axvline(
                eg.estimate,
                color=ALERT,
                linewidth=1.4,
                linestyle=_DASH_EGGER,
                label=f"MR-Egger ({eg.estimate:.3g})",
            )
        ax.set_ylim(0.0, float(precision.max()) * 1.08)
        ax.set_xlabel("Wald ratio of the variant")
        ax.set_ylabel("precision (1 / se)")
        ax.legend(loc="best", fontsize=8)

    return _render(key, draw, size=(6.4, 3.6))


def leave_one_out_svg(evidence: SummaryEvidence | LeaveOneOut, *, key: str = "variant-loo") -> str:
    """IVW estimate and interval with each variant left out (one row each), the full estimate dashed."""
    loo = evidence.leave_one_out if isinstance(evidence, SummaryEvidence) else evidence
    if isinstance(loo, NotApplicable):
        raise InvalidInputError(f"No leave-one-out plot: {loo.reason}.")
    rows = len(loo.variants)
    y = np.arange(rows)[::-1]
    est = np.asarray(loo.estimate)
    lo, hi = np.asarray(loo.lower), np.asarray(loo.upper)

    def draw(ax: Any) -> None:
        ax.grid(True, axis="x", color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)
        ax.axvline(0.0, color=MUTED, linewidth=0.8)
        ax.axvline(
            loo.full_estimate, color=ALERT, linewidth=1.2, linestyle=_DASH_EGGER, label="IVW, all variants"
        )
        ax.hlines(y, lo, hi, color=ACCENT, linewidth=1.4, label="interval without the variant")
        ax.scatter(est, y, s=22, marker="s", color=ACCENT, zorder=3, label="estimate without the variant")
        ax.set_yticks(y)
        ax.set_yticklabels([_label(v) for v in loo.variants], fontsize=7)
        ax.set_ylim(-1, rows)
        ax.set_xlabel("IVW estimate with the variant left out")
        ax.legend(loc="upper center", fontsize=8, ncols=3, bbox_to_anchor=(0.5, 1.0 + 2.2 / (rows + 8)))

    return _render(key, draw, size=(6.4, 1.4 + 0.22 * rows))


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

    def draw(ax: Any) -> None:
        finite = est[np.isfinite(est)]
        levels = np.unique(np.round(np.linspace(finite.min(), finite.max(), 9), 12))
        levels = levels[np.abs(levels - grid.target) > 1e-12 * max(1.0, abs(grid.target))]
        if levels.size >= 2:
            cs = ax.contour(x, y, est, levels=levels, colors=MUTED, linewidths=0.7, linestyles="solid")
            ax.clabel(cs, fontsize=7, fmt="%.3g")
        side = 1.0 if grid.unadjusted_estimate >= grid.target else -1.0
        if finite.min() <= grid.target <= finite.max():
            ax.contour(x, y, est, levels=[grid.target], colors=INK, linewidths=1.8)
            ax.plot([], [], color=INK, linewidth=1.8, label=f"estimate reaches {grid.target:g}")
        crit = side * grid.critical_t
        tf = tval[np.isfinite(tval)]
        if tf.size and tf.min() <= crit <= tf.max():
            ax.contour(x, y, tval, levels=[crit], colors=ALERT, linewidths=1.4, linestyles="dashed")
            ax.plot([], [], color=ALERT, linewidth=1.4, linestyle="--", label="interval reaches the target")
        ax.scatter([0.0], [0.0], marker="^", s=40, color=INK, zorder=4, clip_on=False, label="no confounding")
        for name, px, py in grid.points:
            if px <= x.max() and py <= y.max():
                ax.scatter([px], [py], marker="D", s=30, color=SHADE, edgecolor=ACCENT, zorder=4)
                ax.annotate(_label(name), (px, py), xytext=(4, 4), textcoords="offset points", fontsize=7)
        if grid.points:
            ax.scatter([], [], marker="D", s=30, color=SHADE, edgecolor=ACCENT, label="benchmark confounders")
        ax.set_xlim(0.0, float(x.max()))
        ax.set_ylim(0.0, float(y.max()))
        ax.set_xlabel("partial R² of the confounder with the instrument")
        ax.set_ylabel("partial R² of the confounder with the outcome")
        ax.set_title(_label(grid.label), fontsize=9, color=INK)
        ax.legend(loc="upper right", fontsize=7)

    if not math.isfinite(grid.critical_t):
        raise InvalidInputError(
            "The contour grid has no finite critical value; rebuild it with a valid alpha."
        )
    return _render(key, draw, size=(5.6, 4.6))
