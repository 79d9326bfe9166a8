"""The leave-one-out figure: the estimate and interval with each cluster left out, against the full sample.

One row per deletion, sorted by its estimate: a hollow diamond on the interval's line, the full-sample estimate
as a solid vertical line with its interval as a band, and the tested null dashed. Rows whose deletion flips
significance of the t test are drawn in the alert colour and marked with a cross, so colour is never the only
carrier of meaning. With many clusters only the most influential ``limit`` rows are drawn (the caption says so).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from ivdossier.reports.plots import ACCENT, ALERT, INK, MUTED, SHADE
from ivdossier.reports.svgplot import Plot

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

    height = max(240.0, min(720.0, 110 + 19 * len(rows)))
    plot = Plot(height=height)
    plot.grid_x, plot.grid_y = True, False
    lo, hi = full.interval
    plot.xspan(lo, hi, color=SHADE, label="full-sample interval")
    plot.vline(full.estimate, color=ACCENT, width=1.5, label="full-sample estimate")
    plot.vline(null, color=MUTED, width=1.0, dash="dashed", label=f"null {null:g}")
    for flips in (False, True):
        chosen = [
            (i, d) for i, d in enumerate(rows) if (_significant(d.t_p_value, alpha) != base_sig) == flips
        ]
        if not chosen:
            continue
        colour = ALERT if flips else INK
        plot.segments([((d.interval[0], i), (d.interval[1], i)) for i, d in chosen], color=colour, width=1.1)
        plot.points([d.estimate for _, d in chosen], [i for i, _ in chosen], shape="diamond", size=3.6,
                    fill="#ffffff", stroke=colour)  # fmt: skip
        if flips:
            plot.points([d.interval[1] for _, d in chosen], [i for i, _ in chosen], shape="cross", size=3.5,
                        stroke=ALERT, label="significance flips")  # fmt: skip
    plot.ycategories(range(len(rows)), [d.label for d in rows])
    plot.ylim(-0.8, len(rows) - 0.2, exact=True)
    plot.xlabel = f"2SLS estimate for {result.treatment or 'the treatment'} with one {result.unit} left out"
    del key
    return plot.svg()
