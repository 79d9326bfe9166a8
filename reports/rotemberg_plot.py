"""SVG of an exposure-share design's per-sector just-identified estimates against their Rotemberg weights.

Same visual language as :mod:`ivdossier.reports.plots`: open circles for positive weights, filled for negative,
a horizontal line at the overall 2SLS estimate, and the sectors of largest weight labelled.
"""

from __future__ import annotations

import math

from ivdossier.estimation.exposure_share import RotembergWeights
from ivdossier.reports.plots import ACCENT, ALERT, INK, MUTED
from ivdossier.reports.svgplot import Plot

__all__ = ["rotemberg_svg"]


def rotemberg_svg(weights: RotembergWeights, *, key: str = "rotemberg-weights") -> str:
    """Per-sector estimate (y) against Rotemberg weight (x); sectors whose estimate is undefined are left out."""
    points = [
        (s, w, b)
        for s, w, b in zip(weights.sectors, weights.weights, weights.estimates, strict=True)
        if math.isfinite(w) and math.isfinite(b)
    ]
    top = set(weights.top)

    plot = Plot(width=560, height=360)
    plot.grid_x = True
    pos = [(w, b) for _, w, b in points if w >= 0]
    neg = [(w, b) for _, w, b in points if w < 0]
    if pos:
        plot.points([w for w, _ in pos], [b for _, b in pos], size=3.8, fill="#ffffff", stroke=ACCENT,
                    label="positive weight")  # fmt: skip
    if neg:
        plot.points([w for w, _ in neg], [b for _, b in neg], size=3.8, fill=ALERT, stroke=ALERT,
                    label="negative weight")  # fmt: skip
    if math.isfinite(weights.estimate):
        plot.hline(weights.estimate, color=INK, width=1.0, dash="dashed", label="2SLS estimate")
    plot.vline(0.0, color=MUTED, width=0.7)
    for s, w, b in points:
        if s in top:
            plot.text(w, b, s, dx=5, dy=-4, size=9)
    plot.xlabel, plot.ylabel = "Rotemberg weight", "per-sector estimate"
    del key
    return plot.svg()
