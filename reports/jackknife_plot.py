"""The leave-one-out figure: the estimate and interval with each cluster left out, against the full sample.

One row per deletion, sorted by its estimate: a hollow diamond on the interval's line, the full-sample estimate
as a solid vertical line with its interval as a band, and the tested null dashed. Rows whose deletion flips
significance of the t test are drawn in the alert colour and marked with a cross, so colour is never the only
carrier of meaning. With many clusters only the most influential ``limit`` rows are drawn (the caption says so).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

from ivdossier.reports.plots import ACCENT, ALERT, GRID, INK, MUTED, SHADE, _label, _render

if TYPE_CHECKING:
    from ivdossier.estimation.influence import Deletion, InfluenceResult

LIMIT = 30


def rows_shown(result: InfluenceResult, limit: int = LIMIT) -> list[Deletion]:
    """The deletions drawn: all when there are at most ``limit``, else those that move the estimate most."""
    assert result.full is not None
    full = result.full.estimate
    rows = list(result.deletions)
    if len(rows) > limit:
        rows = sorted(rows, key=lambda d: -abs(d.estimate - full))[:limit]
    return sorted(rows, key=lambda d: (d.estimate, d.label))


def _significant(p: float, alpha: float) -> bool:
    return not math.isnan(p) and p < alpha


def jackknife_svg(result: InfluenceResult, *, key: str = "leave-one-out", limit: int = LIMIT) -> str:
    """The figure as SVG text (deterministic for equal input)."""
    assert result.full is not None and result.alpha is not None and result.null is not None
    full, alpha, null = result.full, result.alpha, result.null
    rows = rows_shown(result, limit)
    base_sig = _significant(full.t_p_value, alpha)

    def draw(ax: Any) -> None:
        ax.grid(True, axis="x", color=GRID, linewidth=0.6)
        ax.set_axisbelow(True)
        lo, hi = full.interval
        ax.axvspan(lo, hi, color=SHADE, linewidth=0, label="full-sample interval")
        ax.axvline(full.estimate, color=ACCENT, linewidth=1.4, label="full-sample estimate")
        ax.axvline(null, color=MUTED, linewidth=0.9, linestyle=(0, (4, 3)), label=f"null {null:g}")
        flipped_label = True
        for i, d in enumerate(rows):
            flips = _significant(d.t_p_value, alpha) != base_sig
            colour = ALERT if flips else INK
            a, b = d.interval
            ax.plot([a, b], [i, i], color=colour, linewidth=1.0)
            ax.plot(
                [d.estimate], [i], marker="D", markersize=4.5, markerfacecolor="white",
                markeredgecolor=colour, linestyle="none",
            )  # fmt: skip
            if flips:
                ax.plot(
                    [b], [i], marker="x", markersize=5, color=ALERT, linestyle="none",
                    label="significance flips" if flipped_label else None,
                )  # fmt: skip
                flipped_label = False
        ax.set_yticks(range(len(rows)))
        ax.set_yticklabels([_label(d.label)[:24] for d in rows], fontsize=7)
        ax.set_ylim(-0.8, len(rows) - 0.2)
        ax.set_xlabel(
            f"2SLS estimate for {_label(result.treatment or 'the treatment')} with one {result.unit} left out"
        )
        ax.legend(loc="lower right", fontsize=7)

    height = max(2.4, min(7.5, 0.9 + 0.2 * len(rows)))
    return _render(key, draw, size=(6.4, height))
