"""SVG of an exposure-share design's per-sector just-identified estimates against their Rotemberg weights.

Same visual language as :mod:`ivdossier.reports.plots`: open circles for positive weights, filled for negative,
a horizontal line at the overall 2SLS estimate, and the sectors of largest weight labelled.
"""

from __future__ import annotations

import math
from typing import Any

from ivdossier.estimation.exposure_share import RotembergWeights
from ivdossier.reports.plots import ACCENT, ALERT, INK, MUTED, _label, _render

__all__ = ["rotemberg_svg"]


def rotemberg_svg(weights: RotembergWeights, *, key: str = "rotemberg-weights") -> str:
    """Per-sector estimate (y) against Rotemberg weight (x); sectors whose estimate is undefined are left out."""
    points = [
        (s, w, b)
        for s, w, b in zip(weights.sectors, weights.weights, weights.estimates, strict=True)
        if math.isfinite(w) and math.isfinite(b)
    ]
    top = set(weights.top)

    def draw(ax: Any) -> None:
        pos = [(w, b) for _, w, b in points if w >= 0]
        neg = [(w, b) for _, w, b in points if w < 0]
        if pos:
            ax.scatter(
                *zip(*pos, strict=True), s=26, facecolors="none", edgecolors=ACCENT, label="positive weight"
            )
        if neg:
            ax.scatter(*zip(*neg, strict=True), s=26, color=ALERT, label="negative weight")
        if math.isfinite(weights.estimate):
            ax.axhline(weights.estimate, color=INK, linewidth=1.0, linestyle="--", label="2SLS estimate")
        ax.axvline(0.0, color=MUTED, linewidth=0.6)
        for s, w, b in points:
            if s in top:
                ax.annotate(_label(s), (w, b), xytext=(4, 3), textcoords="offset points", fontsize=7)
        ax.set_xlabel("Rotemberg weight")
        ax.set_ylabel("per-sector estimate")
        ax.legend(loc="best", fontsize=7)

    return _render(key, draw, size=(5.6, 3.6))
