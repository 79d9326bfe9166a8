"""SVG figures for documents: first-stage binned scatter, Anderson-Rubin curve, and verdict badges.

The first-stage figure plots the treatment against the instrument (both with the controls partialled out) with
the first-stage slope estimated on every row and the number of rows; the Anderson–Rubin figure's range holds
every finite end of the confidence set. The words on each figure come from small pure functions
(:func:`first_stage_texts`, :func:`ar_plot_range`) so that tests can read them.

Figures are drawn by :mod:`ivdossier.reports.svgplot` (pure Python, no plotting library): deterministic SVG with
no date and no ids, user text as escaped ``<text>`` elements.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING

from ivdossier.errors import InvalidInputError
from ivdossier.reports.inputs import ArCurve, FirstStageBins
from ivdossier.reports.svgplot import Plot

if TYPE_CHECKING:  # the estimation type is only named here, so importing this module stays light
    from ivdossier.estimation.plot_data import FirstStagePlot

INK = "#22262b"
MUTED = "#6b737c"
ACCENT = "#2c5e6e"
ALERT = "#9b3b2c"
SHADE = "#d6e6e8"
GRID = "#e6e2d8"


def _is_full(bins: FirstStageBins | FirstStagePlot) -> bool:
    """True for a :class:`FirstStagePlot` (it records n, the kind of x axis and the slope)."""
    return hasattr(bins, "x_kind") and hasattr(bins, "slope")


def first_stage_texts(bins: FirstStageBins | FirstStagePlot) -> dict[str, str]:
    """Title, axis labels and line label of the first-stage figure (never "slope 1", never fitted values as Z)."""
    if _is_full(bins):
        assert not isinstance(bins, FirstStageBins)
        rows = f"n = {bins.n:,} rows" if bins.n else "rows not recorded"
        if bins.slope is not None:
            se = f", SE {bins.slope_se:.2g}" if bins.slope_se is not None else ""
            line = f"first-stage slope {bins.slope:.3g}{se} (all rows)"
        else:
            line = ""
        what = "instrument" if bins.x_kind == "instrument" else "first-stage prediction"
        title = f"First stage: {rows}; points are means of {bins.n_bins} equal-count bins of the {what}"
        return {"title": title, "x": bins.x_label, "y": bins.y_label, "line": line}
    return {
        "title": "First stage: points are bin means",
        "x": bins.x_label,
        "y": bins.y_label,
        "line": "least-squares line through the bin means",
    }


def first_stage_svg(bins: FirstStageBins | FirstStagePlot, *, key: str = "first-stage") -> str:
    """Binned means of the treatment against the instrument, with the first-stage slope when it is known.

    A :class:`FirstStagePlot` (from ``estimation.plot_data``) carries n and the slope from every row; an older
    :class:`FirstStageBins` only bins, so its line is fitted through the bin means and labelled so.
    """
    x = [float(v) for v in bins.x_bins]
    y = [float(v) for v in bins.y_bins]
    if len(x) != len(y) or len(x) < 2:
        raise InvalidInputError(
            "first-stage bins need equally long x_bins and y_bins with at least 2 points."
        )
    if max(x) == min(x):
        raise InvalidInputError("first-stage x_bins are all equal; bin the instrument over its range.")
    texts = first_stage_texts(bins)
    line: tuple[float, float] | None
    if not isinstance(bins, FirstStageBins) and _is_full(bins):
        line = None if bins.slope is None else (bins.intercept or 0.0, bins.slope)
    else:
        line = _least_squares(x, y)
    plot = Plot(title=texts["title"])
    plot.grid_x = True
    lo, hi = min(x), max(x)
    if line is not None and texts["line"]:
        plot.line([lo, hi], [line[0] + line[1] * lo, line[0] + line[1] * hi], color=ACCENT, width=1.8,
                  label=texts["line"])  # fmt: skip
    plot.points(x, y, shape="circle", size=4, fill="#ffffff", stroke=INK, label="bin means")
    plot.xlabel, plot.ylabel = texts["x"], texts["y"]
    del key  # one drawing per figure; the key names the figure's file, and the SVG needs no ids
    return plot.svg()


def _least_squares(x: Sequence[float], y: Sequence[float]) -> tuple[float, float]:
    """(intercept, slope) of the least-squares line of y on x (x not all equal)."""
    mx, my = sum(x) / len(x), sum(y) / len(y)
    sxy = sum((a - mx) * (b - my) for a, b in zip(x, y, strict=True))
    sxx = sum((a - mx) ** 2 for a in x)
    slope = sxy / sxx
    return my - slope * mx, slope


def ar_intervals_from_curve(curve: ArCurve) -> list[tuple[float, float]]:
    """Stretches of the grid where the AR statistic is at or below the critical value (grid resolution)."""
    out: list[tuple[float, float]] = []
    start: float | None = None
    prev: float | None = None
    for beta, stat in zip(curve.betas, curve.stats, strict=True):
        inside = stat <= curve.critical_value
        if inside and start is None:
            start = beta
        if not inside and start is not None and prev is not None:
            out.append((start, prev))
            start = None
        prev = beta
    if start is not None and prev is not None:
        out.append((start, prev))
    return out


def ar_plot_range(
    curve: ArCurve, pieces: Sequence[tuple[float, float]], *, margin: float = 0.06
) -> tuple[float, float]:
    """x range of the AR figure: the curve's grid, widened to hold every finite end of the set (with a margin)."""
    lo, hi = float(min(curve.betas)), float(max(curve.betas))
    ends = [e for piece in pieces for e in piece if math.isfinite(e)]
    if ends and (min(ends) < lo or max(ends) > hi):
        lo, hi = min(lo, min(ends)), max(hi, max(ends))
        pad = margin * (hi - lo)
        lo, hi = lo - pad, hi + pad
    return lo, hi


def ar_curve_svg(
    curve: ArCurve, *, ar_set: Sequence[tuple[float, float]] | None = None, key: str = "ar-curve"
) -> str:
    """AR statistic against the hypothesised effect, the critical value (dashed) and the confidence set (shaded).

    `ar_set` is the set the estimation reported; without it the set is read off the grid. The x range always
    holds every finite end of the set (:func:`ar_plot_range`).
    """
    betas = [float(b) for b in curve.betas]
    stats = [float(v) for v in curve.stats]
    pieces = list(ar_set) if ar_set is not None else ar_intervals_from_curve(curve)
    lo_grid, hi_grid = ar_plot_range(curve, pieces)
    finite = [v for v in stats if math.isfinite(v)]
    cv = curve.critical_value
    top = max(cv * 3.0, min(max(finite) if finite else 1.0, cv * 6))
    plot = Plot()
    first = True
    for low, high in pieces:
        a = max(low, lo_grid) if math.isfinite(low) else lo_grid
        b = min(high, hi_grid) if math.isfinite(high) else hi_grid
        if a <= b:
            plot.xspan(a, b, color=SHADE, label="confidence set" if first else None)
            for edge, raw in ((a, low), (b, high)):
                if math.isfinite(raw) and lo_grid <= raw <= hi_grid:
                    plot.vline(edge, color=ACCENT, width=0.9, dash="dotted")
            first = False
    # the statistic is cut at the top of the panel (a steep curve would otherwise flatten the region of interest)
    plot.line(betas, [min(v, top) for v in stats], color=INK, width=1.6, label="Anderson–Rubin statistic")
    plot.hline(cv, color=ALERT, width=1.3, dash="dashed", label=f"critical value {cv:.3g}")
    plot.xlim(lo_grid, hi_grid)
    plot.ylim(0.0, top)
    plot.xlabel, plot.ylabel = "hypothesised effect", "AR statistic"
    del key
    return plot.svg()


_BADGE_SHAPES = {
    # filled circle with a tick
    "holds": '<circle cx="8" cy="8" r="7" fill="currentColor"/>'
    '<path d="M4.6 8.3l2.3 2.3 4.6-5" fill="none" stroke="#fff" stroke-width="1.8" stroke-linecap="round" '
    'stroke-linejoin="round"/>',
    # triangle with an exclamation mark
    "at risk": '<path d="M8 1.2L15.2 14.3H0.8Z" fill="currentColor"/>'
    '<path d="M8 5.6v4.2" stroke="#fff" stroke-width="1.8" stroke-linecap="round"/>'
    '<circle cx="8" cy="12.1" r="1" fill="#fff"/>',
    # square with a cross
    "broken": '<rect x="1.2" y="1.2" width="13.6" height="13.6" rx="1.5" fill="currentColor"/>'
    '<path d="M5 5l6 6M11 5l-6 6" stroke="#fff" stroke-width="1.8" stroke-linecap="round"/>',
    # dashed empty circle with a bar
    "not assessed": '<circle cx="8" cy="8" r="6.3" fill="none" stroke="currentColor" stroke-width="1.5" '
    'stroke-dasharray="2.6 1.9"/><path d="M5.5 8h5" stroke="currentColor" stroke-width="1.6" '
    'stroke-linecap="round"/>',
}


def verdict_badge_svg(status: str) -> str:
    """A 16-unit inline SVG whose shape alone tells the verdict apart (circle, triangle, square, dashed ring)."""
    if status not in _BADGE_SHAPES:
        raise InvalidInputError(f"unknown verdict {status!r}; use one of {', '.join(_BADGE_SHAPES)}.")
    return (
        '<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 16 16" width="14" height="14" '
        f'focusable="false">{_BADGE_SHAPES[status]}</svg>'
    )


def badge_legend_markdown() -> str:
    """One Markdown line explaining the badge shapes in words (the shapes are rendered by the HTML layer)."""
    return (
        "Verdict shapes: filled circle with a tick = holds; triangle with an exclamation mark = at risk; "
        "square with a cross = broken; dashed ring = not assessed."
    )
