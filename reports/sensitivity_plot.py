"""The plausibly-exogenous figure: the 2SLS interval against the assumed direct effect of the instrument.

The estimation (:mod:`ivdossier.estimation.sensitivity`) returns the evaluation grid as data; this module only
draws it: the interval at each direct effect as a band, the estimate as a line, the union of the intervals as two
dashed reference lines and, when given, the local-to-zero interval as a square with its bar. The figure shows
what would follow if the direct effect lay in the stated range; it cannot show that exclusion holds.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from ivdossier.reports.plots import ACCENT, ALERT, MUTED
from ivdossier.reports.svgplot import Plot

if TYPE_CHECKING:  # result types only: drawing needs no numerics
    from ivdossier.estimation.sensitivity import LocalToZeroResult, UnionIntervalResult

__all__ = ["sensitivity_svg"]

BAND = "#d3dde8"
PRIOR = "#3d6b1f"


def sensitivity_svg(
    result: UnionIntervalResult, *, ltz: LocalToZeroResult | None = None, key: str = "sensitivity"
) -> str:
    """SVG text (self-contained, deterministic) of the union-of-intervals grid, with an optional LTZ interval."""
    pos = [g.position for g in result.grid]
    level = f"{100 * (1 - result.alpha):g}%"
    plot = Plot(height=380, title="Plausibly exogenous: interval against the assumed direct effect")
    plot.band(pos, [g.lower for g in result.grid], [g.upper for g in result.grid], color=BAND,
              label=f"{level} interval at each direct effect")  # fmt: skip
    plot.line(pos, [g.estimate for g in result.grid], color=ACCENT, width=1.7,
              label="2SLS estimate given the direct effect")  # fmt: skip
    plot.line(pos, [g.lower for g in result.grid], color=ACCENT, width=0.8, dash="dotted")
    plot.line(pos, [g.upper for g in result.grid], color=ACCENT, width=0.8, dash="dotted")
    plot.hline(0.0, color=MUTED, width=0.8)
    plot.hline(result.lower, color=ALERT, width=1.1, dash="dashed", label="union of intervals")
    plot.hline(result.upper, color=ALERT, width=1.1, dash="dashed")
    if ltz is not None:
        x0 = float(ltz.mu[0]) if len(result.instruments) == 1 else 0.5
        plot.segments([((x0, ltz.lower), (x0, ltz.upper))], color=PRIOR, width=1.4)
        plot.points([x0], [ltz.estimate], shape="square", size=3.6, fill=PRIOR, stroke=PRIOR,
                    label="local-to-zero interval (at prior mean)")  # fmt: skip
    plot.xlabel = (
        f"assumed direct effect of {result.instruments[0]} on the outcome (gamma)"
        if len(result.instruments) == 1
        else "position along the direct-effect box (0 = gamma_min, 1 = gamma_max)"
    )
    plot.ylabel = f"effect of {result.treatment}"
    del key
    return plot.svg()
