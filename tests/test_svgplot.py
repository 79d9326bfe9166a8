"""The SVG drawer: every mark sits where its data value says, ticks cover the data, text is inert, bytes repeat.

The position checks read only what a viewer sees: the axis is recovered from the printed tick labels and the tick
positions, and every point and line vertex is mapped back through that affine map to its data value. The only
error allowed is the rounding of coordinates to two decimals: each printed position is within 0.005 px of the
exact one, so a vertex, and the two ticks that define the map, move the recovered value by at most
0.02 px times the axis's data units per pixel (derived below from the map's formula).
"""

from __future__ import annotations

import math
import random
import re
import xml.etree.ElementTree as ET
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import pytest

from ivdossier.reports.html import clean_svg
from ivdossier.reports.inputs import ArCurve, FirstStageBins
from ivdossier.reports.plots import ar_curve_svg, ar_intervals_from_curve, ar_plot_range, first_stage_svg
from ivdossier.reports.svgplot import Plot, contour_segments, fmt_tick, nice_step, nice_ticks, svg_text

NS = "{http://www.w3.org/2000/svg}"


@dataclass
class AxisMap:
    """The affine map from pixels back to data, read from the first and last tick of one axis."""

    p0: float
    p1: float
    t0: float
    t1: float

    def value(self, p: float) -> float:
        return self.t0 + (p - self.p0) * (self.t1 - self.t0) / (self.p1 - self.p0)

    @property
    def bound(self) -> float:
        # v = t0 + (p - p0) (t1 - t0) / (p1 - p0); p, p0 and p1 each off by <= 0.005 px: (p - p0) by <= 0.01 and
        # the scale's denominator by <= 0.01 px, which moves v by <= |p - p0| / |p1 - p0| * 0.01 px <= 0.01 px
        # for p inside the axis. Together <= 0.02 px, in data units:
        return 0.02 * abs(self.t1 - self.t0) / abs(self.p1 - self.p0)

    def ticks_cover(self, values: Sequence[float]) -> bool:
        lo, hi = sorted((self.t0, self.t1))
        return all(lo <= v <= hi for v in values)


def _parse(svg: str) -> ET.Element:
    return ET.fromstring(svg)


def _maps(root: ET.Element) -> tuple[AxisMap, AxisMap]:
    xs = [
        (float(t.get("x", "")), float(t.text or ""))
        for t in root.iter(f"{NS}text")
        if t.get("class") == "tick-x"
    ]
    ys = [
        (float(t.get("data-at", "")), float(t.text or ""))
        for t in root.iter(f"{NS}text")
        if t.get("class") == "tick-y"
    ]
    return AxisMap(xs[0][0], xs[-1][0], xs[0][1], xs[-1][1]), AxisMap(
        ys[0][0], ys[-1][0], ys[0][1], ys[-1][1]
    )


def _points(root: ET.Element) -> list[tuple[float, float]]:
    """Centres of the data markers (circles by cx/cy, other shapes by the first move of their path)."""
    out = []
    for el in root.iter():
        if el.get("class") != "pt":
            continue
        if el.tag == f"{NS}circle":
            out.append((float(el.get("cx", "")), float(el.get("cy", ""))))
        else:
            m = re.match(r"M(-?[\d.]+) (-?[\d.]+)", el.get("d", ""))
            assert m is not None
            out.append((float(m.group(1)), float(m.group(2))))
    return out


def _polylines(root: ET.Element, cls: str = "line") -> list[list[tuple[float, float]]]:
    out = []
    for el in root.iter():
        if el.get("class") == cls and el.tag in (f"{NS}polyline", f"{NS}polygon"):
            pairs = [p.split(",") for p in (el.get("points") or "").split()]
            out.append([(float(a), float(b)) for a, b in pairs])
    return out


def _assert_maps_back(
    drawn: Sequence[tuple[float, float]], data: Sequence[tuple[float, float]], xm: AxisMap, ym: AxisMap
) -> None:
    assert len(drawn) == len(data)
    for (px, py), (x, y) in zip(drawn, data, strict=True):
        assert abs(xm.value(px) - x) <= xm.bound + 1e-12 * abs(x), (px, x)
        assert abs(ym.value(py) - y) <= ym.bound + 1e-12 * abs(y), (py, y)


# ---- ticks ---------------------------------------------------------------------------------------------------


def test_ticks_by_hand() -> None:
    # worked by hand: span 0.74 / 5 targets = 0.148 -> the next nice step is 0.2; floor(0.13/0.2) = 0, ceil(0.87/0.2) = 5
    assert nice_ticks(0.13, 0.87) == pytest.approx([0.0, 0.2, 0.4, 0.6, 0.8, 1.0])
    assert (
        nice_step(9.0) == 2.0 and nice_step(11.0) == 2.5 and nice_step(24.0) == 5.0 and nice_step(4.0) == 1.0
    )
    assert [fmt_tick(v, 0.25) for v in (-0.5, -0.25, 0.0, 0.25)] == ["-0.50", "-0.25", "0", "0.25"]
    assert fmt_tick(1500.0, 500.0) == "1500" and fmt_tick(0.3, 0.1) == "0.3"


def test_ticks_cover_any_range_with_a_nice_step() -> None:
    # property check over 2,000 random ranges spanning 12 orders of magnitude (seeded)
    rng = random.Random(20261202)
    for _ in range(2000):
        scale = 10 ** rng.uniform(-6, 6)
        a, b = sorted((rng.uniform(-1, 1) * scale, rng.uniform(-1, 1) * scale))
        ticks = nice_ticks(a, b)
        step = ticks[1] - ticks[0]
        mantissa = step / 10 ** math.floor(math.log10(step) + 1e-9)
        assert min(abs(mantissa - m) for m in (1, 2, 2.5, 5, 10)) < 1e-6
        assert ticks[0] <= a and ticks[-1] >= b  # covers the data
        # and no more than needed
        assert ticks[0] > a - step * (1 + 1e-9) and ticks[-1] < b + step * (1 + 1e-9)
        assert 3 <= len(ticks) <= 12
        labels = [fmt_tick(t, step) for t in ticks]
        assert len(set(labels)) == len(labels)  # enough decimals to tell ticks apart
        assert all(float(s) == pytest.approx(t, abs=step * 1e-6) for s, t in zip(labels, ticks, strict=True))


def test_a_single_value_still_gets_an_axis() -> None:
    ticks = nice_ticks(3.0, 3.0)
    assert ticks[0] < 3.0 < ticks[-1]


# ---- positions ------------------------------------------------------------------------------------------------


def test_every_point_and_vertex_maps_back_to_its_value() -> None:
    rng = random.Random(7)
    xs = [rng.uniform(-3.7, 12.2) for _ in range(40)]
    ys = [rng.uniform(-0.004, 0.019) for _ in range(40)]
    lx = sorted(rng.uniform(-5, 14) for _ in range(25))
    ly = [0.001 * v for v in lx]
    plot = Plot(title="random marks")
    plot.points(xs, ys, shape="diamond", label="points")
    plot.line(lx, ly, color="#000", label="line")
    root = _parse(plot.svg())
    xm, ym = _maps(root)
    _assert_maps_back(_points(root), list(zip(xs, ys, strict=True)), xm, ym)
    (vertices,) = _polylines(root)
    _assert_maps_back(vertices, list(zip(lx, ly, strict=True)), xm, ym)
    assert xm.ticks_cover(xs + lx) and ym.ticks_cover(ys + ly)


def test_first_stage_figure_positions() -> None:
    bins = FirstStageBins(
        x_bins=(-1.2, 0.1, 0.9, 2.4, 3.3), y_bins=(0.12, 0.35, 0.41, 0.66, 0.83), x_label="z"
    )
    root = _parse(first_stage_svg(bins))
    xm, ym = _maps(root)
    _assert_maps_back(_points(root), list(zip(bins.x_bins, bins.y_bins, strict=True)), xm, ym)
    # the line through the bin means, by the normal equations (least squares; worked independently here)
    n = len(bins.x_bins)
    mx, my = sum(bins.x_bins) / n, sum(bins.y_bins) / n
    slope = sum((a - mx) * (b - my) for a, b in zip(bins.x_bins, bins.y_bins, strict=True)) / sum(
        (a - mx) ** 2 for a in bins.x_bins
    )
    ends = [(x, my + slope * (x - mx)) for x in (-1.2, 3.3)]
    (line,) = _polylines(root)
    _assert_maps_back(line, ends, xm, ym)
    assert xm.ticks_cover(bins.x_bins) and ym.ticks_cover(bins.y_bins)


def test_ar_figure_positions_and_the_shaded_set() -> None:
    betas = [-1 + 0.01 * i for i in range(201)]
    stats = [((b + 0.2) / 0.1) ** 2 for b in betas]
    curve = ArCurve(tuple(betas), tuple(stats), 3.84)
    root = _parse(ar_curve_svg(curve))
    xm, ym = _maps(root)
    top = max(3.84 * 3, min(max(stats), 3.84 * 6))  # the panel's cut, as documented in ar_curve_svg
    (line,) = _polylines(root)
    _assert_maps_back(line, [(b, min(s, top)) for b, s in zip(betas, stats, strict=True)], xm, ym)
    ((low, high),) = ar_intervals_from_curve(curve)
    (span,) = [el for el in root.iter(f"{NS}rect") if el.get("class") == "span"]
    left, width = float(span.get("x", "")), float(span.get("width", ""))
    # the right edge is x + width, two rounded numbers: 0.015 px + 0.01 px from the map <= 1.5 x the bound
    assert abs(xm.value(left) - low) <= xm.bound and abs(xm.value(left + width) - high) <= 1.5 * xm.bound
    assert xm.ticks_cover(ar_plot_range(curve, [(low, high)])) and ym.ticks_cover([0.0, top, 3.84])


def test_band_vertices_are_the_lower_and_upper_curves() -> None:
    xs = [0.0, 0.5, 1.0, 1.5]
    lo, hi = [-1.0, -0.4, 0.1, 0.3], [1.0, 1.3, 1.9, 2.6]
    plot = Plot()
    plot.band(xs, lo, hi, color="#ccc")
    root = _parse(plot.svg())
    xm, ym = _maps(root)
    (poly,) = _polylines(root, "band")
    expected = list(zip(xs, hi, strict=True)) + list(zip(xs[::-1], lo[::-1], strict=True))
    _assert_maps_back(poly, expected, xm, ym)


def test_a_gap_in_a_line_splits_it() -> None:
    plot = Plot()
    plot.line([0, 1, 2, 3, 4], [1, 2, math.nan, 3, 4], color="#000")
    assert [len(run) for run in _polylines(_parse(plot.svg()))] == [2, 2]


def test_contour_pieces_lie_on_the_level_exactly_for_a_plane() -> None:
    # z = 2x + y is linear, so linear interpolation along cell edges is exact: every end satisfies 2x + y = level
    xs = [0.1 * i for i in range(11)]
    ys = [0.2 * i for i in range(8)]
    z = [[2 * x + y for x in xs] for y in ys]
    pieces = contour_segments(xs, ys, z, 1.3)
    assert pieces
    for end in (e for piece in pieces for e in piece):
        assert 2 * end[0] + end[1] == pytest.approx(1.3, abs=1e-12)
    # full enumeration: the level line crosses every cell it enters exactly once, so pieces = cells crossed
    crossed = sum(
        1
        for i in range(len(ys) - 1)
        for j in range(len(xs) - 1)
        if min(z[i][j], z[i][j + 1], z[i + 1][j], z[i + 1][j + 1])
        < 1.3
        <= max(z[i][j], z[i][j + 1], z[i + 1][j], z[i + 1][j + 1])
    )
    assert len(pieces) == crossed


def test_a_saddle_cell_is_resolved_by_its_centre() -> None:
    # corners (0,0)=1, (1,0)=0, (1,1)=1, (0,1)=0 (worked by hand). At level 0.5 the centre mean 0.5 counts as
    # high, so the high corners join through the centre and the two pieces cut off the low corners (1,0), (0,1).
    cell = ([0.0, 1.0], [0.0, 1.0], [[1.0, 0.0], [0.0, 1.0]])
    pieces = contour_segments(*cell, 0.5)
    assert sorted(tuple(sorted(p)) for p in pieces) == [((0.0, 0.5), (0.5, 1.0)), ((0.5, 0.0), (1.0, 0.5))]
    # at level 0.6 the centre is low: the pieces cut off the high corners, crossing edges at 0.4 / 0.6
    pieces = contour_segments(*cell, 0.6)
    got = sorted(tuple(sorted(p)) for p in pieces)
    assert [tuple(c for end in p for c in end) for p in got] == [
        pytest.approx((0.0, 0.4, 0.4, 0.0)),
        pytest.approx((0.6, 1.0, 1.0, 0.6)),
    ]


# ---- text ------------------------------------------------------------------------------------------------------

HOSTILE = [
    "<script>alert(1)</script>",
    "a & b \"quoted\" 'single'",
    "bell\x07 and nul\x00 and escape\x1b[31m",
    "\u202eright-to-left override",
    "x" * 500,
    "]]><!--",
]


@pytest.mark.parametrize("label", HOSTILE)
def test_labels_are_escaped_text_and_nothing_else(label: str) -> None:
    bins = FirstStageBins(x_bins=(1, 2, 3), y_bins=(2, 3, 5), x_label=label, y_label=label)
    svg = first_stage_svg(bins)
    root = _parse(svg)  # well-formed: the label cannot break out of its element
    clean_svg(svg, key="first-stage")  # and the HTML layer accepts the figure
    assert "<script" not in svg and "<!--" not in svg
    texts = {t.get("class"): t.text for t in root.iter(f"{NS}text")}
    # expected text, computed here: control and bidi characters dropped, then at most 120 characters
    stripped = re.sub(r"[\x00-\x1f\x7f-\x9f\u202a-\u202e]", "", label)
    expected = stripped if len(stripped) <= 120 else stripped[:119] + "…"
    assert texts["xlabel"] == expected and texts["ylabel"] == expected


def test_text_escaping_covers_the_five_xml_characters() -> None:
    assert svg_text("<&>\"'") == "&lt;&amp;&gt;&quot;&#39;"
    assert svg_text("a\nb\tc") == "a b c"


# ---- determinism ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "draw",
    [
        lambda: first_stage_svg(FirstStageBins(x_bins=(1, 2, 3), y_bins=(2, 3, 5))),
        lambda: ar_curve_svg(ArCurve((-1.0, 0.0, 1.0), (5.0, 1.0, 5.0), 3.84)),
    ],
)
def test_same_input_same_bytes_and_no_dates_or_ids(draw: Callable[[], str]) -> None:
    a, b = draw(), draw()
    assert a == b
    assert not re.search(r"20\d\d-\d\d-\d\d", a) and " id=" not in a and "<metadata" not in a
