"""Self-contained SVG drawing of an instrument's causal graph and its verdict.

Visual language (meaning never rests on colour alone):

* instrument: arrow-tag pentagon; treatment: plain box with a heavy border; outcome: box with a double border;
  unobserved (a threat's hidden variable, or a covariate the team declared but did not measure, tagged
  NOT MEASURED): dashed ellipse with italic text; measured covariate: rounded box; measurable threat node:
  rounded box with a dash-dot border. Every node carries a small upper-case role tag.
* conditioned-on nodes get a hatched fill and a "W" badge; sample-selection nodes an "S" badge.
* layout: left-to-right layers (longest path), the instrument-treatment-outcome spine on one row,
  unobserved nodes above it and measured ones below.
* edges on an open bypass path: heavy dashed line if the path breaks a condition, heavy dotted line if it only
  puts one at risk; a small tag beside an edge names the threat codes that drew it, or "team" for an edge the
  team drew. Tags are placed so that none overlaps another tag, a node or a text line.
* a verdict strip on top with the dossier's verdict shapes (:data:`VERDICT_SHAPES`: filled circle with a tick =
  holds, triangle with an exclamation mark = at risk, square with a cross = broken, dashed ring with a bar = not
  assessed), the open paths as text with each arrow's direction, and a legend at the bottom.
* every text's width is estimated from DejaVu Sans advance widths (the first font named), so the drawing is
  always wide enough for its title and its longest line.
"""

from __future__ import annotations

import bisect
import hashlib
import math
import re
import textwrap
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.threats_catalog.dag import DiGraph, all_neighbors, is_directed_acyclic_graph, topological_sort
from ivdossier.threats_catalog.graph import GraphVerdict
from ivdossier.vocabulary import Verdict, verdict_key

FONT = "DejaVu Sans, Liberation Sans, Arial, Helvetica, sans-serif"
INK = "#1f1f1f"
MUTED = "#6b6b6b"
BROKEN = "#9a1b1b"
AT_RISK = "#8a5a00"
PAPER = "#ffffff"
COL_W = 210.0
ROW_H = 96.0
MARGIN = 36.0
_CTRL = re.compile(r"[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")
_TAGS = {
    "instrument": "INSTRUMENT",
    "treatment": "TREATMENT",
    "outcome": "OUTCOME",
    "unobserved": "UNOBSERVED",
    "covariate": "MEASURED",
    "intermediate": "MEASURABLE",
}


def esc(text: object) -> str:
    """Escape text for SVG element content or a double-quoted attribute (drops XML-illegal control codes)."""
    if type(text) is str:
        return _esc_str(text)
    return _esc_str.__wrapped__(str(text))


@lru_cache(maxsize=16384)
def _esc_str(text: str) -> str:
    """`esc` of a string, remembered (a diagram repeats its names, codes and numbers many times)."""
    s = _CTRL.sub("\N{REPLACEMENT CHARACTER}", text)
    return (
        s.replace("&", "&amp;")
        .replace("<", "&lt;")
        .replace(">", "&gt;")
        .replace('"', "&quot;")
        .replace("'", "&#39;")
    )


@dataclass
class _Box:
    name: str
    role: str
    lines: list[str]
    sub: str
    x: float = 0.0
    y: float = 0.0
    w: float = 120.0
    h: float = 50.0
    conditioned: bool = False
    selection: bool = False
    covariate_unmeasured: bool = False


# Advance widths of DejaVu Sans (Book and Bold) for ASCII 32-126, in thousandths of an em, read from the font files;
# any other character counts a full em (wider than most), DejaVu Sans Mono is 0.602 em throughout.
_SANS = (
    318, 401, 460, 838, 636, 950, 780, 275, 390, 390, 500, 838, 318, 361, 318, 337, 636, 636, 636, 636, 636, 636,
    636, 636, 636, 636, 337, 337, 838, 838, 838, 531, 1000, 684, 686, 698, 770, 632, 575, 775, 752, 295, 295, 656,
    557, 863, 748, 787, 603, 787, 695, 635, 611, 732, 684, 989, 685, 611, 685, 390, 337, 390, 838, 500, 500, 613,
    635, 550, 635, 615, 352, 635, 634, 278, 278, 579, 278, 974, 634, 612, 635, 635, 411, 521, 392, 634, 592, 818,
    592, 592, 525, 636, 337, 636, 838,
)  # fmt: skip
_BOLD = (
    348, 456, 521, 838, 696, 1002, 872, 306, 457, 457, 523, 838, 380, 415, 380, 365, 696, 696, 696, 696, 696, 696,
    696, 696, 696, 696, 400, 400, 838, 838, 838, 580, 1000, 774, 762, 734, 830, 683, 683, 821, 837, 372, 372, 775,
    637, 995, 837, 850, 733, 850, 770, 720, 682, 812, 774, 1103, 771, 724, 725, 457, 365, 457, 838, 500, 500, 675,
    716, 593, 716, 678, 435, 716, 712, 343, 343, 665, 343, 1042, 712, 687, 716, 716, 493, 595, 478, 712, 652, 924,
    645, 652, 582, 712, 365, 712, 838,
)  # fmt: skip
MONO_ADVANCE = 0.602


@lru_cache(maxsize=8192)
def text_width(
    text: str, size: float, *, bold: bool = False, mono: bool = False, spacing: float = 0.0
) -> float:
    """Estimated rendered width of ``text`` at font ``size`` (DejaVu Sans metrics; wider glyphs never shrink it)."""
    if mono:
        return len(text) * size * MONO_ADVANCE + spacing * len(text)
    table = _BOLD if bold else _SANS
    units = sum(table[ord(c) - 32] if 32 <= ord(c) < 127 else 1000 for c in text)
    return units / 1000 * size + spacing * len(text)


def _text_width(text: str, size: float) -> float:
    return text_width(text, size)


def _wrap(label: str, width: int = 20) -> list[str]:
    return list(_wrap_cached(label, width))


@lru_cache(maxsize=4096)
def _wrap_cached(label: str, width: int) -> tuple[str, ...]:
    lines = textwrap.wrap(label, width=width, break_long_words=True) or [""]
    if len(lines) > 3:
        lines = [*lines[:2], lines[2][: width - 1] + "…"]
    return tuple(lines)


def _layers(G: DiGraph) -> dict[str, int]:
    """Longest-path layers; parentless helper nodes (confounders) move right to sit one layer before their
    first child, so they do not pile up in the first column."""
    layer: dict[str, int] = {}
    for node in topological_sort(G):
        layer[node] = max((layer[p] + 1 for p in G.predecessors(node)), default=0)
    for node in reversed(list(topological_sort(G))):
        role = G.nodes[node].get("role")
        children = list(G.successors(node))
        if not list(G.predecessors(node)) and children and role not in ("instrument", "treatment", "outcome"):
            layer[node] = min(layer[c] for c in children) - 1
    low = min(layer.values(), default=0)
    return {n: v - low for n, v in layer.items()}


def _layout(G: DiGraph, boxes: dict[str, _Box], top: float, col_w: float) -> tuple[float, float]:
    """Place boxes in columns ``col_w`` apart; return the drawing's width and the y of its bottom edge."""
    layer = _layers(G)
    spine_roles = ("instrument", "treatment", "outcome")
    columns: dict[int, dict[str, list[str]]] = {}
    for node, lv in layer.items():
        role = boxes[node].role
        side = "spine" if role in spine_roles else ("above" if role == "unobserved" else "below")
        columns.setdefault(lv, {"above": [], "spine": [], "below": []})[side].append(node)
    # order within a side by barycentre of neighbours' layers-and-names, a few sweeps for stability
    rank = {n: i for i, n in enumerate(sorted(G, key=lambda n: (layer[n], n)))}
    for _ in range(4):
        for col in columns.values():
            for side in ("above", "below"):
                col[side].sort(
                    key=lambda n: (
                        sum(rank[m] for m in all_neighbors(G, n)) / max(1, len(list(all_neighbors(G, n)))),
                        n,
                    )
                )
                for i, n in enumerate(col[side]):
                    rank[n] = i
    n_above = max((len(c["above"]) for c in columns.values()), default=0)
    n_below = max((len(c["below"]) for c in columns.values()), default=0)
    spine_rows = max((len(c["spine"]) for c in columns.values()), default=1)
    spine_y = top + ROW_H * n_above + 34.0
    max_w = max((b.w for b in boxes.values()), default=120.0)
    for lv, col in columns.items():
        cx = MARGIN + max_w / 2 + lv * col_w
        for i, n in enumerate(col["spine"]):
            boxes[n].x, boxes[n].y = cx, spine_y + i * ROW_H
        # above: nearest to the spine is the last in order so edges to the spine stay short
        for i, n in enumerate(reversed(col["above"])):
            boxes[n].x, boxes[n].y = cx, spine_y - (i + 1) * ROW_H
        for i, n in enumerate(col["below"]):
            boxes[n].x, boxes[n].y = cx, spine_y + (spine_rows - 1 + i + 1) * ROW_H
    width = MARGIN * 2 + max_w + max(layer.values(), default=0) * col_w
    bottom = spine_y + (spine_rows - 1 + n_below) * ROW_H + 40.0
    return width, bottom


def _boundary(box: _Box, tx: float, ty: float) -> tuple[float, float]:
    """Point where the ray from the box centre towards (tx, ty) leaves the box (ellipse for unobserved)."""
    dx, dy = tx - box.x, ty - box.y
    if dx == 0 and dy == 0:
        return box.x, box.y
    a, b = box.w / 2 + 3, box.h / 2 + 3
    if box.role == "unobserved":
        t = 1.0 / math.sqrt((dx / a) ** 2 + (dy / b) ** 2)
    else:
        t = min(a / abs(dx) if dx else math.inf, b / abs(dy) if dy else math.inf)
    return box.x + dx * t, box.y + dy * t


def _node_svg(box: _Box, ids: str) -> list[str]:
    x0, y0, w, h = box.x - box.w / 2, box.y - box.h / 2, box.w, box.h
    fill = f"url(#{ids}-hatch)" if box.conditioned else PAPER
    out: list[str] = [f'<g class="node role-{box.role}" data-node="{esc(box.name)}">']
    if box.role == "instrument":
        tip = 16.0
        pts = [(x0, y0), (x0 + w - tip, y0), (x0 + w, box.y), (x0 + w - tip, y0 + h), (x0, y0 + h)]
        p = " ".join(f"{px:.1f},{py:.1f}" for px, py in pts)
        out.append(f'<polygon points="{p}" fill="{fill}" stroke="{INK}" stroke-width="2.2"/>')
    elif box.role == "treatment":
        out.append(
            f'<rect x="{x0:.1f}" y="{y0:.1f}" width="{w:.1f}" height="{h:.1f}" fill="{fill}" stroke="{INK}" '
            'stroke-width="3.5"/>'
        )
    elif box.role == "outcome":
        out.append(
            f'<rect x="{x0:.1f}" y="{y0:.1f}" width="{w:.1f}" height="{h:.1f}" fill="{fill}" stroke="{INK}" '
            'stroke-width="1.6"/>'
        )
        out.append(
            f'<rect x="{x0 + 4:.1f}" y="{y0 + 4:.1f}" width="{w - 8:.1f}" height="{h - 8:.1f}" fill="none" '
            f'stroke="{INK}" stroke-width="1.6"/>'
        )
    elif box.role == "unobserved":
        out.append(
            f'<ellipse cx="{box.x:.1f}" cy="{box.y:.1f}" rx="{w / 2:.1f}" ry="{h / 2:.1f}" fill="{fill}" '
            f'stroke="{INK}" stroke-width="1.6" stroke-dasharray="6 4"/>'
        )
    else:
        dash = ' stroke-dasharray="9 3 2 3"' if box.role == "intermediate" or box.covariate_unmeasured else ""
        out.append(
            f'<rect x="{x0:.1f}" y="{y0:.1f}" width="{w:.1f}" height="{h:.1f}" rx="12" fill="{fill}" '
            f'stroke="{INK}" stroke-width="1.6"{dash}/>'
        )
    tag = _TAGS.get(box.role, box.role.upper())
    if box.covariate_unmeasured:
        tag = "NOT MEASURED"
    n_lines = len(box.lines) + (1 if box.sub else 0)
    ty = box.y - (n_lines * 14) / 2 + 2
    out.append(
        f'<text x="{box.x:.1f}" y="{ty:.1f}" text-anchor="middle" font-size="8.5" letter-spacing="0.8" '
        f'fill="{MUTED}">{esc(tag)}</text>'
    )
    style = ' font-style="italic"' if box.role == "unobserved" else ""
    weight = ' font-weight="bold"' if box.role in ("instrument", "treatment", "outcome") else ""
    for i, line in enumerate(box.lines):
        out.append(
            f'<text x="{box.x:.1f}" y="{ty + 14 * (i + 1):.1f}" text-anchor="middle" font-size="12" '
            f'fill="{INK}"{style}{weight}>{esc(line)}</text>'
        )
    if box.sub:
        out.append(
            f'<text x="{box.x:.1f}" y="{ty + 14 * (len(box.lines) + 1) - 1:.1f}" text-anchor="middle" '
            f'font-size="9" font-family="DejaVu Sans Mono, monospace" fill="{MUTED}">{esc(box.sub)}</text>'
        )
    for k, (flag, letter) in enumerate(((box.conditioned, "W"), (box.selection, "S"))):
        if flag:
            bx, by = x0 - 6 + 20 * k, y0 - 8
            out.append(
                f'<rect x="{bx:.1f}" y="{by:.1f}" width="16" height="16" fill="{INK}" stroke="{PAPER}" '
                'stroke-width="1"/>'
            )
            out.append(
                f'<text x="{bx + 8:.1f}" y="{by + 12:.1f}" text-anchor="middle" font-size="11" '
                f'font-weight="bold" fill="{PAPER}">{letter}</text>'
            )
    out.append("</g>")
    return out


def _edge_geometry(
    G: DiGraph, boxes: Mapping[str, _Box], u: str, v: str, spine_y: float, col_w: float = COL_W
) -> tuple[float, float, float, float, float, float, bool]:
    """Start, control and end points of the edge u -> v (a quadratic curve when ``bow``)."""
    a, b = boxes[u], boxes[v]
    span = abs(b.x - a.x) / col_w
    mx, my = (a.x + b.x) / 2, (a.y + b.y) / 2
    bow = span > 1.01 or span < 0.2
    cx, cy = mx, my
    if bow:
        # route around the boxes standing between the two ends: the curve's midpoint clears them by 24 px
        lo, hi = min(a.x, b.x) + 1, max(a.x, b.x) - 1
        between = (
            [o for o in boxes.values() if o is not a and o is not b and lo < o.x < hi] if span > 1.01 else []
        )
        upward = min(a.y, b.y) < spine_y - 1 or (
            abs(my - spine_y) <= 1 and G.nodes[u].get("role") == "unobserved"
        )
        if upward:
            clear = min([o.y - o.h / 2 for o in between] + [min(a.y - a.h / 2, b.y - b.h / 2)]) - 24
            target = min(clear, my - 30)
        else:
            clear = max([o.y + o.h / 2 for o in between] + [max(a.y + a.h / 2, b.y + b.h / 2)]) + 24
            target = max(clear, my + 30)
        cy = 2 * target - my
        if span < 0.2:  # same column: bow sideways
            cx, cy = mx + 60, my
    x1, y1 = _boundary(a, cx, cy)
    x2, y2 = _boundary(b, cx, cy)
    return x1, y1, cx, cy, x2, y2, bow


def _edge_extent(
    G: DiGraph, boxes: Mapping[str, _Box], spine_y: float, col_w: float
) -> tuple[float, float, float]:
    """Lowest and highest y reached by any edge curve, and the right-most x (for sizing the drawing)."""
    ys: list[float] = []
    xs: list[float] = []
    for u, v in G.edges:
        x1, y1, cx, cy, x2, y2, _ = _edge_geometry(G, boxes, u, v, spine_y, col_w)
        for t in (0.0, 0.25, 0.5, 0.75, 1.0):
            ys.append((1 - t) ** 2 * y1 + 2 * (1 - t) * t * cy + t**2 * y2)
            xs.append((1 - t) ** 2 * x1 + 2 * (1 - t) * t * cx + t**2 * x2)
    return min(ys, default=spine_y), max(ys, default=spine_y), max(xs, default=0.0)


def _edge_svg(
    G: DiGraph,
    boxes: Mapping[str, _Box],
    u: str,
    v: str,
    severity: str | None,
    spine_y: float,
    ids: str,
    col_w: float,
) -> tuple[list[str], str, list[tuple[float, float]]]:
    """The edge's path, its tag text ("" for none: threat codes, or "team") and points along its curve."""
    x1, y1, cx, cy, x2, y2, bow = _edge_geometry(G, boxes, u, v, spine_y, col_w)
    data = G.edges[u, v]
    codes = list(data.get("threats", []))
    if severity == "broken":
        stroke, width, dash, marker = BROKEN, 4.0, ' stroke-dasharray="11 6"', "arrow-broken"
    elif severity == "at-risk":
        stroke, width, dash, marker = (
            AT_RISK,
            3.4,
            ' stroke-dasharray="1.5 6" stroke-linecap="round"',
            "arrow-risk",
        )
    else:
        stroke, width, dash, marker = (
            (INK, 1.7, "", "arrow") if not codes else (MUTED, 1.4, "", "arrow-muted")
        )
    path = (
        f"M {x1:.1f} {y1:.1f} Q {cx:.1f} {cy:.1f} {x2:.1f} {y2:.1f}"
        if bow
        else (f"M {x1:.1f} {y1:.1f} L {x2:.1f} {y2:.1f}")
    )
    out = [
        f'<path class="edge{" " + severity if severity else ""}" d="{path}" fill="none" stroke="{stroke}" '
        f'stroke-width="{width}"{dash} marker-end="url(#{ids}-{marker})" data-from="{esc(boxes[u].name)}" data-to="{esc(boxes[v].name)}"/>'
    ]
    label = (
        ", ".join(codes) + (", team" if data.get("team") else "")
        if codes
        else ("team" if data.get("team") else "")
    )
    if not bow:
        cx, cy = (x1 + x2) / 2, (y1 + y2) / 2
    points = [(a * x1 + b * cx + c * x2, a * y1 + b * cy + c * y2) for a, b, c in _BEZIER_41]
    return out, label, points


# Weights (1 - t)², 2(1 - t)t and t² of a quadratic curve at t = 0, 1/40, ..., 1, each computed in the order the
# expanded formula evaluates it, so the points are the same to the last bit.
_BEZIER_41 = tuple(((1 - t) ** 2, 2 * (1 - t) * t, t**2) for t in (i / 40 for i in range(41)))


Rect = tuple[float, float, float, float]  # left, top, right, bottom
TAG_SIZE = 9.5
TAG_H = 14.0


def _overlaps(a: Rect, b: Rect, pad: float = 0.0) -> bool:
    return a[0] < b[2] + pad and b[0] < a[2] + pad and a[1] < b[3] + pad and b[1] < a[3] + pad


class PointIndex:
    """Points sorted by x, to count those inside a box by bisection instead of testing every point."""

    def __init__(self, points: Sequence[tuple[float, float]]) -> None:
        ordered = sorted(points)
        self.xs = [x for x, _ in ordered]
        self.ys = [y for _, y in ordered]

    def count(self, box: Rect) -> int:
        """How many points lie in the closed box (left, top, right, bottom)."""
        lo, hi = bisect.bisect_left(self.xs, box[0]), bisect.bisect_right(self.xs, box[2])
        top, bottom = box[1], box[3]
        return len([y for y in self.ys[lo:hi] if top <= y <= bottom])


_PLACED: dict[tuple[Any, ...], list[tuple[str, Rect, tuple[float, float] | None]]] = {}
_PLACED_MAX = 256  # a key holds every curve point of a drawing (about 100 kB): keep the memo small


def _place_tags(
    tags: Sequence[tuple[str, list[tuple[float, float]], int]],
    obstacles: Sequence[Rect],
    curves: Sequence[list[tuple[float, float]]],
) -> list[tuple[str, Rect, tuple[float, float] | None]]:
    """`_place_tags_computed`, remembered by the value of its arguments (a pure function of numbers and texts):
    diagrams of the same shape (the same threats on instruments whose names are as wide) place their tags once.
    A tag whose points are its own curve's (as `render_svg` passes them) is keyed by the curve's index alone."""
    key = (
        tuple(
            (text, None if 0 <= own < len(curves) and points is curves[own] else tuple(points), own)
            for text, points, own in tags
        ),
        tuple(obstacles),
        tuple(map(tuple, curves)),
    )
    found = _PLACED.get(key)
    if found is None:
        found = _place_tags_computed(tags, obstacles, curves)
        if len(_PLACED) >= _PLACED_MAX:
            _PLACED.clear()
        _PLACED[key] = found
    return list(found)


def _place_tags_computed(
    tags: Sequence[tuple[str, list[tuple[float, float]], int]],
    obstacles: Sequence[Rect],
    curves: Sequence[list[tuple[float, float]]],
) -> list[tuple[str, Rect, tuple[float, float] | None]]:
    """Place each edge tag on (or just beside) its own curve where it overlaps no other tag, node or text, and
    covers as few points of other edges as possible. When its curve has no free spot, the tag goes to the nearest
    free spot with a thin leader line to the curve (so a tag never sits on top of another)."""
    placed: list[Rect] = []
    out: list[tuple[str, Rect, tuple[float, float] | None]] = []
    order = (20, 16, 24, 12, 28, 14, 26, 10, 30, 8, 32, 18, 22, 6, 34)
    every = PointIndex([p for curve in curves for p in curve])
    for text, points, own in tags:
        w, h = text_width(text, TAG_SIZE, mono=True) + 8, TAG_H
        mine = PointIndex(curves[own] if 0 <= own < len(curves) else [])
        best: tuple[float, Rect] | None = None
        # Every candidate lies inside this box, so a rectangle that misses it (with the same padding) overlaps
        # none of them: testing only the others decides every candidate exactly as testing all would.
        xs = [points[i][0] for i in order]
        ys = [points[i][1] for i in order]
        reach = (min(xs) - w / 2, min(ys) - 20.0 - h / 2, max(xs) + w / 2, max(ys) + 20.0 + h / 2)
        near = [o for o in (*placed, *obstacles) if _overlaps(reach, o, 2)]
        for rank, i in enumerate(order):
            px, py = points[i]
            for k, dy in enumerate((0.0, -10.0, 10.0, -20.0, 20.0)):
                if best is not None and rank + 3 * k >= best[0]:
                    continue  # cannot beat the best score found, whatever it crosses
                r = (px - w / 2, py + dy - h / 2, px + w / 2, py + dy + h / 2)
                left, top, right, bottom = r
                if any(
                    left < o[2] + 2 and o[0] < right + 2 and top < o[3] + 2 and o[1] < bottom + 2
                    for o in near
                ):  # _overlaps(r, o, 2), written out
                    continue
                box = (r[0] - 2, r[1] - 2, r[2] + 2, r[3] + 2)
                crossed = every.count(box) - mine.count(box)  # points of other edges' curves in the box
                score = crossed * 100 + rank + 3 * k
                if best is None or score < best[0]:
                    best = (score, r)
            if best is not None and best[0] < 100:
                break
        leader: tuple[float, float] | None = None
        if best is None:  # spiral outwards from the curve's middle to the nearest free spot
            px, py = points[20]
            for step in range(1, 400):
                angle, radius = step * 0.7, 6.0 * math.sqrt(step) * 3
                qx, qy = px + radius * math.cos(angle), py + radius * math.sin(angle)
                r = (qx - w / 2, qy - h / 2, qx + w / 2, qy + h / 2)
                if not any(_overlaps(r, o, 2) for o in [*placed, *obstacles]):
                    best, leader = (0.0, r), (px, py)
                    break
            else:  # pragma: no cover - a free spot always exists far enough out
                r = (px - w / 2, py - h / 2, px + w / 2, py + h / 2)
                best = (0.0, r)
        placed.append(best[1])
        out.append((text, best[1], leader))
    return out


def _tag_svg(text: str, r: Rect, leader: tuple[float, float] | None) -> list[str]:
    out = []
    if leader is not None:
        out.append(
            f'<path class="tag-leader" d="M {(r[0] + r[2]) / 2:.1f} {(r[1] + r[3]) / 2:.1f} L {leader[0]:.1f} '
            f'{leader[1]:.1f}" stroke="{MUTED}" stroke-width="0.8" fill="none"/>'
        )
    out.append(
        f'<rect class="edge-tag" x="{r[0]:.1f}" y="{r[1]:.1f}" width="{r[2] - r[0]:.1f}" height="{r[3] - r[1]:.1f}" '
        f'rx="3" fill="{PAPER}" stroke="{MUTED}" stroke-width="0.6"/>'
    )
    out.append(
        f'<text x="{(r[0] + r[2]) / 2:.1f}" y="{r[3] - 3.5:.1f}" text-anchor="middle" font-size="{TAG_SIZE}" '
        f'font-family="DejaVu Sans Mono, monospace" fill="{INK}">{esc(text)}</text>'
    )
    return out


#: The verdict shapes in a 16-unit box, the same as the dossier's verdict badges, so the diagram, its legend and the
#: dossier show one glyph per verdict (drawn in ``currentColor``; the shape alone tells them apart).
VERDICT_SHAPES: dict[str, str] = {
    # filled circle with a tick
    "holds": '<circle cx="8" cy="8" r="7" fill="currentColor"/>'
    '<path d="M4.6 8.3l2.3 2.3 4.6-5" fill="none" stroke="#fff" stroke-width="1.8" stroke-linecap="round" '
    'stroke-linejoin="round"/>',
    # triangle with an exclamation mark
    "at-risk": '<path d="M8 1.2L15.2 14.3H0.8Z" fill="currentColor"/>'
    '<path d="M8 5.6v4.2" stroke="#fff" stroke-width="1.8" stroke-linecap="round"/>'
    '<circle cx="8" cy="12.1" r="1" fill="#fff"/>',
    # square with a cross
    "broken": '<rect x="1.2" y="1.2" width="13.6" height="13.6" rx="1.5" fill="currentColor"/>'
    '<path d="M5 5l6 6M11 5l-6 6" stroke="#fff" stroke-width="1.8" stroke-linecap="round"/>',
    # dashed empty circle with a bar
    "not-assessed": '<circle cx="8" cy="8" r="6.3" fill="none" stroke="currentColor" stroke-width="1.5" '
    'stroke-dasharray="2.6 1.9"/><path d="M5.5 8h5" stroke="currentColor" stroke-width="1.6" '
    'stroke-linecap="round"/>',
}
_GLYPH_COLOUR = {"holds": INK, "at-risk": AT_RISK, "broken": BROKEN, "not-assessed": MUTED}


def _glyph(value: str, x: float, y: float) -> str:
    """The verdict's shape centred on (x, y)."""
    colour = _GLYPH_COLOUR.get(value, MUTED)
    shape = VERDICT_SHAPES.get(value, VERDICT_SHAPES["not-assessed"])
    return (
        f'<g class="glyph" data-value="{esc(value)}" transform="translate({x - 8:.1f} {y - 8:.1f})" '
        f'color="{colour}">{shape}</g>'
    )


def _defs(ids: str) -> str:
    def marker(name: str, colour: str) -> str:
        return (
            f'<marker id="{ids}-{name}" viewBox="0 0 10 10" refX="9" refY="5" markerWidth="7" markerHeight="7" '
            f'markerUnits="userSpaceOnUse" orient="auto"><path d="M0,0 L10,5 L0,10 z" fill="{colour}"/></marker>'
        )

    hatch = (
        f'<pattern id="{ids}-hatch" width="7" height="7" patternUnits="userSpaceOnUse" '
        f'patternTransform="rotate(45)"><rect width="7" height="7" fill="{PAPER}"/>'
        f'<line x1="0" y1="0" x2="0" y2="7" stroke="#c9c9c9" stroke-width="3"/></pattern>'
    )
    big = [
        marker("arrow", INK),
        marker("arrow-muted", MUTED),
        marker("arrow-broken", BROKEN).replace(
            'markerWidth="7" markerHeight="7"', 'markerWidth="11" markerHeight="11"'
        ),
        marker("arrow-risk", AT_RISK).replace(
            'markerWidth="7" markerHeight="7"', 'markerWidth="10" markerHeight="10"'
        ),
    ]
    return "<defs>" + "".join(big) + hatch + "</defs>"


class _Flow:
    """Legend items laid out left to right, wrapping at ``right``; each item is (width, draw(x, y) -> svg)."""

    def __init__(self, x: float, y: float, right: float, row_h: float) -> None:
        self.x0, self.x, self.y, self.right, self.row_h = x, x, y, right, row_h
        self.out: list[str] = []

    def add(self, width: float, draw: Any) -> None:
        if self.x > self.x0 and self.x + width > self.right:
            self.x, self.y = self.x0, self.y + self.row_h
        self.out.extend(draw(self.x, self.y))
        self.x += width + 24

    def newline(self, gap: float = 0.0) -> None:
        if self.x > self.x0:
            self.x, self.y = self.x0, self.y + self.row_h + gap


_IDS_MARK = "\ue001"  # a private-use character no legend text contains; stands for the drawing's id prefix


@lru_cache(maxsize=256)
def _legend_marked(x: float, y: float, right: float) -> tuple[tuple[str, ...], float]:
    out, bottom = _legend(x, y, _IDS_MARK, right)
    return tuple(out), bottom


def _legend_cached(x: float, y: float, ids: str, right: float) -> tuple[list[str], float]:
    """`_legend`, remembered: the legend depends on the id prefix only where the prefix is written, so it is drawn
    once per position and width with a mark in place of the prefix, and the prefix is put in."""
    out, bottom = _legend_marked(x, y, right)
    return [line.replace(_IDS_MARK, ids) for line in out], bottom


def _legend(x: float, y: float, ids: str, right: float) -> tuple[list[str], float]:
    out = [f'<text x="{x:.1f}" y="{y:.1f}" font-size="11" font-weight="bold" fill="{INK}">Legend</text>']
    shapes = [
        ("instrument", "instrument (Z)"),
        ("treatment", "treatment (X)"),
        ("outcome", "outcome (Y)"),
        ("unobserved", "unobserved"),
        ("covariate", "measured variable"),
        ("intermediate", "measurable, from a threat"),
    ]
    flow = _Flow(x, y + 30, right, 38)

    def shape_item(role: str, text: str) -> Any:
        def draw(lx: float, ly: float) -> list[str]:
            box = _Box(name=role, role=role, lines=[""], sub="", x=lx + 24, y=ly, w=48, h=26)
            items = [s for s in _node_svg(box, ids) if not s.startswith("<text")]
            items.append(
                f'<text x="{lx + 58:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>'
            )
            return items

        return draw

    for role, text in shapes:
        flow.add(58 + text_width(text, 11), shape_item(role, text))
    flow.add(
        58 + text_width("unobserved, declared but not measured", 11),
        lambda lx, ly: [
            *[
                s
                for s in _node_svg(_Box("nm", "unobserved", [""], "", lx + 24, ly, 48, 26), ids)
                if not s.startswith("<text")
            ],
            f'<text x="{lx + 24:.1f}" y="{ly + 3:.1f}" text-anchor="middle" font-size="6.5" fill="{MUTED}">NOT MEAS.</text>',
            f'<text x="{lx + 58:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">'
            f"{esc('unobserved, declared but not measured')}</text>",
        ],
    )
    flow.newline(4)
    flow.row_h = 24
    lines = [
        (f'stroke="{INK}" stroke-width="1.7"', "arrow", "edge of the base design or drawn by the team"),
        (f'stroke="{MUTED}" stroke-width="1.4"', "arrow-muted", "edge drawn by a threat"),
        (
            f'stroke="{BROKEN}" stroke-width="4" stroke-dasharray="11 6"',
            "arrow-broken",
            "open path: breaks a condition",
        ),
        (
            f'stroke="{AT_RISK}" stroke-width="3.4" stroke-dasharray="1.5 6" stroke-linecap="round"',
            "arrow-risk",
            "open path: condition at risk",
        ),
    ]

    def line_item(style: str, marker: str, text: str) -> Any:
        def draw(lx: float, ly: float) -> list[str]:
            return [
                f'<path d="M {lx:.1f} {ly:.1f} L {lx + 52:.1f} {ly:.1f}" {style} marker-end="url(#{ids}-{marker})"/>',
                f'<text x="{lx + 62:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>',
            ]

        return draw

    for style, marker, text in lines:
        flow.add(62 + text_width(text, 11), line_item(style, marker, text))
    flow.newline(2)
    for tag, text in (
        ("team", "the team drew this edge (graph edge)"),
        ("DG-E01", "the catalogue threat whose graph drew this edge"),
    ):
        tw = text_width(tag, TAG_SIZE, mono=True) + 8

        def tag_item(lx: float, ly: float, tag: str = tag, text: str = text, tw: float = tw) -> list[str]:
            return [
                *_tag_svg(tag, (lx, ly - TAG_H / 2 - 1, lx + tw, ly + TAG_H / 2 - 1), None),
                f'<text x="{lx + tw + 10:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>',
            ]

        flow.add(tw + 10 + text_width(text, 11), tag_item)
    flow.newline(2)
    for letter, text in (("W", "conditioned on (hatched)"), ("S", "sample selected on")):

        def badge(lx: float, ly: float, letter: str = letter, text: str = text) -> list[str]:
            return [
                f'<rect x="{lx:.1f}" y="{ly - 9:.1f}" width="16" height="16" fill="{INK}"/>',
                f'<text x="{lx + 8:.1f}" y="{ly + 3:.1f}" text-anchor="middle" font-size="11" font-weight="bold" '
                f'fill="{PAPER}">{letter}</text>',
                f'<text x="{lx + 22:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>',
            ]

        flow.add(22 + text_width(text, 11), badge)
    for value, text in (
        ("holds", "holds"),
        ("at-risk", "at risk"),
        ("broken", "broken"),
        ("not-assessed", "not assessed"),
    ):

        def glyph(lx: float, ly: float, value: str = value, text: str = text) -> list[str]:
            return [
                _glyph(value, lx + 8, ly),
                f'<text x="{lx + 22:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>',
            ]

        flow.add(22 + text_width(text, 11), glyph)
    out.extend(flow.out)
    return out, flow.y + 22


def render_svg(
    G: DiGraph,
    verdict: GraphVerdict | None,
    *,
    title: str | None = None,
    verdicts: Sequence[Verdict] | None = None,
) -> str:
    """Draw ``G`` (from :func:`build_graph`) with ``verdict`` (from :func:`check_instrument`) as one SVG string.

    The badge strip shows ``verdicts``, the derived per-condition verdicts (``ivdossier.workflows.verdicts``) that
    the dossier's table shows too; without them (a graph drawn on its own) it shows the graph check's values.
    The result has no scripts, external fonts or links; every user-supplied string is escaped. Passing
    ``verdict=None`` draws the graph alone, without the verdict strip and path emphasis.
    """
    template, fills = render_svg_parts(G, verdict, title=title, verdicts=verdicts)
    return fill_marks(template, fills)


def render_svg_parts(
    G: DiGraph,
    verdict: GraphVerdict | None,
    *,
    title: str | None = None,
    verdicts: Sequence[Verdict] | None = None,
) -> tuple[str, tuple[tuple[str, str], ...]]:
    """`render_svg` as a drawing with one-character marks and the escaped text written for each mark (none when
    the drawing is not shared): ``fill_marks(*render_svg_parts(...)) == render_svg(...)``. Pages showing many
    drawings of one shape can check the shape once and the filled-in texts on their own."""
    if not _directed(G) or G.number_of_nodes() == 0:
        raise InvalidInputError(
            "render_svg needs a non-empty directed graph (a DiGraph); build one with build_graph"
        )
    if not is_directed_acyclic_graph(G):
        raise InvalidInputError(
            "render_svg needs an acyclic graph; build it with build_graph, which names cycles"
        )
    key = _drawing_key(G, verdict, title, verdicts)
    if key is None:
        return _draw(G, verdict, title, verdicts, marked=False), ()
    assert verdict is not None and title
    template = _DRAWN.get(key)
    if template is None:
        drawn = _draw(G, verdict, title, verdicts, marked=False)
        template = _draw(G, verdict, title, verdicts, marked=True)
        if _fill(template, G, verdict.instrument, title) != drawn:  # a text held a mark: never shared
            return drawn, ()
        if len(_DRAWN) >= _DRAWN_MAX:
            _DRAWN.clear()
        _DRAWN[key] = template
    return template, _fills(G, verdict.instrument, title)


def _directed(G: object) -> bool:
    """True for our DiGraph, and for a networkx ``DiGraph`` (read through the same methods)."""
    if isinstance(G, DiGraph):
        return True
    is_directed, is_multigraph = getattr(G, "is_directed", None), getattr(G, "is_multigraph", None)
    return callable(is_directed) and callable(is_multigraph) and bool(is_directed()) and not is_multigraph()


#: Marks written in place of the instrument's name and the title in a remembered drawing (private-use
#: characters; the id prefix uses `_IDS_MARK`).
_NAME_MARK = "\ue002"
_TITLE_MARK = "\ue003"
_MARKS = (_IDS_MARK, _NAME_MARK, _TITLE_MARK)
_DRAWN: dict[tuple[Any, ...], str] = {}
_DRAWN_MAX = 512  # about 30 kB a drawing


def _ids(G: DiGraph) -> str:
    return "ivd-" + hashlib.sha256(repr(sorted(map(str, G.edges))).encode()).hexdigest()[:8]


def _fills(G: DiGraph, name: str, title: str) -> tuple[tuple[str, str], ...]:
    """What a remembered drawing's marks stand for: the id prefix, the escaped name and the escaped title."""
    return ((_IDS_MARK, _ids(G)), (_NAME_MARK, esc(name)), (_TITLE_MARK, esc(title)))


def _fill(template: str, G: DiGraph, name: str, title: str) -> str:
    return fill_marks(template, _fills(G, name, title))


def fill_marks(template: str, fills: Sequence[tuple[str, str]]) -> str:
    """The template with each mark replaced by its text, in order."""
    for mark, text in fills:
        template = template.replace(mark, text)
    return template


def _drawing_key(
    G: DiGraph, verdict: GraphVerdict | None, title: str | None, verdicts: Sequence[Verdict] | None
) -> tuple[Any, ...] | None:
    """Everything `_draw` reads, with the instrument's name and the title left out (None when a drawing cannot be
    shared: no verdict or title, a name that is not a string or holds a mark, an instrument name that wraps).

    The name enters the drawing only through its width and length (its box, the path lines), its order among the
    other nodes' names (layout, drawing order) and where it is written; the title through its width and where it
    is written; the id prefix only where it is written. The key holds the widths, the length and the order, and
    the drawing is remembered with marks where the three are written (`_fill` puts them in). A remembered
    drawing is kept only if it gives back, filled, exactly the drawing made directly."""
    if verdict is None or not title or type(title) is not str:
        return None
    z = verdict.instrument
    if type(z) is not str or z not in G or _wrap(z) != [z]:
        return None
    if any(m in z or m in title for m in _MARKS):
        return None
    try:
        names = [n for n in G if n != z]
        if any(type(n) is not str for n in names):
            return None
        paths = []
        for p in verdict.open_paths:
            if not p.nodes or p.nodes[0] != z or z in p.nodes[1:]:
                return None
            paths.append((p.nodes[1:], p.arrows, p.severity, p.threats, p.condition))
        strip = (
            tuple((v.condition, verdict_key(v.status)) for v in verdicts)
            if verdicts is not None
            else tuple((c.condition, c.value) for c in verdict.conditions)
        )
        key = (
            tuple(
                (_NAME_MARK, d.get("role"), d.get("observed", True))
                if n == z
                else (n, d.get("role"), d.get("observed", True), d.get("label"))
                for n, d in G.nodes(data=True)
            ),
            tuple(
                (
                    _NAME_MARK if u == z else u,
                    _NAME_MARK if v == z else v,
                    tuple(d.get("threats", [])),
                    d.get("team"),
                )
                for u, v, d in G.edges(data=True)
            ),
            tuple(z < n for n in names),
            text_width(z, 12, bold=True),
            len(z),
            text_width(title, 17, bold=True),
            verdict.treatment,
            verdict.outcome,
            verdict.conditioning,
            verdict.selection,
            tuple(paths),
            criterion_sentence(verdict),
            strip,
        )
        hash(key)
    except TypeError:
        return None
    return key


def _draw(
    G: DiGraph,
    verdict: GraphVerdict | None,
    title: str | None,
    verdicts: Sequence[Verdict] | None,
    *,
    marked: bool,
) -> str:
    """The drawing; `marked` writes `_NAME_MARK`, `_TITLE_MARK` and `_IDS_MARK` where the instrument's name, the
    title and the id prefix are written (everything else, sizes and places included, is drawn as it is)."""
    conditioned = set(verdict.conditioning) if verdict else set()
    selection = (
        set(verdict.selection) if verdict else {n for n, d in G.nodes(data=True) if d.get("selection")}
    )
    roles: dict[str, str] = {}
    if verdict is not None:
        roles = {verdict.instrument: "instrument", verdict.treatment: "treatment", verdict.outcome: "outcome"}

    boxes: dict[str, _Box] = {}
    for node, data in G.nodes(data=True):
        role = (
            roles.get(node)
            or data.get("role")
            or ("intermediate" if data.get("observed", True) else "unobserved")
        )
        if role not in _TAGS:
            role = "intermediate"
        unmeasured = role == "covariate" and not data.get("observed", True)
        if unmeasured:  # a declared covariate missing from the data is drawn as what it is: unobserved
            role = "unobserved"
        name = str(node)
        label = str(data.get("label") or name)
        lines = _wrap(label)
        sub = (
            name if label != name and role not in ("instrument", "treatment", "outcome", "unobserved") else ""
        )
        if role in ("instrument", "treatment", "outcome") and label != name:
            lines, sub = _wrap(name), ""
        bold = role in ("instrument", "treatment", "outcome")
        tag = "NOT MEASURED" if unmeasured else _TAGS.get(role, role.upper())
        w = (
            max(
                [text_width(t, 12, bold=bold) for t in lines]
                + [text_width(sub, 9, mono=True), text_width(tag, 8.5, spacing=0.8), 80.0]
            )
            + 28
        )
        h = 22 + 14 * (len(lines) + (1 if sub else 0))
        if role == "unobserved":
            w, h = w * 1.3, h + 8
        if role == "instrument":
            w += 18
        boxes[node] = _Box(
            name=name,
            role=role,
            lines=lines,
            sub=sub,
            w=w,
            h=h,
            conditioned=node in conditioned,
            selection=node in selection,
            covariate_unmeasured=unmeasured,
        )

    ids = _IDS_MARK if marked else _ids(G)
    if marked and verdict is not None:
        instrument = boxes[verdict.instrument]
        instrument.name, instrument.lines = _NAME_MARK, [_NAME_MARK]
    texts: list[Rect] = []  # every text line outside the nodes, for sizing and for keeping tags off them

    def text_line(
        x: float, y: float, content: str, size: float, extra: str = "", shown: str | None = None, **kw: Any
    ) -> str:
        """A text line sized by `content` and showing `shown` (escaped text with marks) when given."""
        width = text_width(content, size, **kw)
        texts.append((x, y - size, x + width, y + size * 0.3))
        return f'<text x="{x:.1f}" y="{y:.1f}" font-size="{size}"{extra}>{esc(content) if shown is None else shown}</text>'

    body: list[str] = []
    y_text = 28.0
    if title:
        shown = _TITLE_MARK if marked else None
        body.append(
            text_line(MARGIN, y_text, title, 17, f' font-weight="bold" fill="{INK}"', shown=shown, bold=True)
        )
        y_text += 30
    if verdict is not None:
        x = MARGIN
        strip = (
            [(v.condition, verdict_key(v.status)) for v in verdicts]
            if verdicts is not None
            else [(c.condition, c.value) for c in verdict.conditions]
        )
        for condition, value in strip:
            text = f"{condition}: {value.replace('-', ' ')}"
            wbox = text_width(text, 12) + 40
            dash = ' stroke-dasharray="4 3"' if value == "not-assessed" else ""
            stroke_w = "2.4" if value == "broken" else "1.2"
            texts.append((x, y_text - 16, x + wbox, y_text + 10))
            body.append(
                f'<g class="verdict" data-condition="{esc(condition)}" data-value="{esc(value)}">'
                f'<rect x="{x:.1f}" y="{y_text - 16:.1f}" width="{wbox:.1f}" height="26" rx="4" fill="{PAPER}" '
                f'stroke="{INK}" stroke-width="{stroke_w}"{dash}/>'
                + _glyph(value, x + 14, y_text - 3)
                + f'<text x="{x + 28:.1f}" y="{y_text + 1:.1f}" font-size="12" fill="{INK}">{esc(text)}</text></g>'
            )
            x += wbox + 10
        given = ", ".join(verdict.conditioning) or "nothing"
        sentence = f"{criterion_sentence(verdict)}, conditioning on {given}."
        body.append(text_line(MARGIN, y_text + 28, sentence, 11, f' fill="{MUTED}"'))

    top = 28.0 + (30.0 if title else 0.0) + (40.0 if verdict else 0.0)
    max_w = max((b.w for b in boxes.values()), default=120.0)
    col_w = max(COL_W, max_w + 40.0)
    width, bottom = _layout(G, boxes, top + 24.0, col_w)
    spine_y = next((b.y for b in boxes.values() if b.role == "instrument"), bottom / 2)
    low, high, right = _edge_extent(G, boxes, spine_y, col_w)
    node_top = min(b.y - b.h / 2 for b in boxes.values())
    shift = max(0.0, (top + 24.0) - min(low - 12.0, node_top - 12.0))
    for box in boxes.values():
        box.y += shift
    spine_y += shift
    bottom = max(bottom, high + 20.0) + shift
    width = max(width, 720.0, right + MARGIN)

    severity: dict[tuple[str, str], str] = {}
    if verdict is not None:
        for path in verdict.open_paths:
            for (a, b), arrow in zip(zip(path.nodes, path.nodes[1:], strict=False), path.arrows, strict=True):
                edge = (a, b) if arrow == "->" else (b, a)
                if severity.get(edge) != "broken":
                    severity[edge] = path.severity

    pending: list[tuple[str, list[tuple[float, float]], int]] = []
    curves: list[list[tuple[float, float]]] = []
    for u, v in sorted(G.edges, key=lambda e: (severity.get(e) is not None, e)):
        line, label, points = _edge_svg(G, boxes, u, v, severity.get((u, v)), spine_y, ids, col_w)
        body.extend(line)
        if label:
            pending.append((label, points, len(curves)))
        curves.append(points)
    for node in sorted(boxes):
        body.extend(_node_svg(boxes[node], ids))
    nodes = [
        (b.x - b.w / 2 - 8, b.y - b.h / 2 - 9, b.x + b.w / 2 + 2, b.y + b.h / 2 + 2) for b in boxes.values()
    ]
    placed = _place_tags(pending, [*nodes, *texts], curves)
    for text, r, leader in placed:
        body.extend(_tag_svg(text, r, leader))
        bottom = max(bottom, r[3] + 12)
        width = max(width, r[2] + MARGIN)

    y = bottom + 8
    if verdict is not None:
        heading = "Open paths from instrument to outcome that avoid the treatment"
        body.append(text_line(MARGIN, y, heading, 12, f' font-weight="bold" fill="{INK}"', bold=True))
        y += 18
        rows = [
            (f"{i}. ", p.text, f"  [{', '.join(p.threats) or 'team-drawn'}]  {p.severity}, {p.condition}")
            for i, p in enumerate(verdict.open_paths, 1)
        ] or [("", "none, given the conditioning set", "")]
        for lead, text, tail in rows:
            row = lead + text + tail
            shown = None
            if marked and lead:  # every path starts at the instrument (`_drawing_key` makes sure)
                shown = esc(lead) + _NAME_MARK + esc(text[len(verdict.instrument) :] + tail)
            body.append(
                text_line(
                    MARGIN + 8,
                    y,
                    row,
                    11,
                    f' font-family="DejaVu Sans Mono, monospace" fill="{INK}"',
                    shown=shown,
                    mono=True,
                )
            )
            y += 16
        y += 12
    caution = "A graph records assumptions; it cannot establish exclusion or exogeneity. Review with domain experts."
    width = max([width, MARGIN * 2 + text_width(caution, 10)] + [r[2] + MARGIN for r in texts])
    legend, y = _legend_cached(MARGIN, y + 6, ids, width - MARGIN)
    body.extend(legend)
    height = y + 14
    body.append(text_line(MARGIN, height - 4, caution, 10, f' fill="{MUTED}"'))
    height += 12
    label = _TITLE_MARK if marked else esc(title or "instrument graph")
    head = (
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{height:.0f}" '
        f'viewBox="0 0 {width:.0f} {height:.0f}" font-family="{FONT}" role="img" aria-label="{label}">'
    )
    return (
        "\n".join(
            [
                head,
                f"<title>{label}</title>",
                _defs(ids),
                f'<rect width="100%" height="100%" fill="{PAPER}"/>',
                *body,
                "</svg>",
            ]
        )
        + "\n"
    )


def criterion_sentence(verdict: GraphVerdict) -> str:
    """The conditional instrument criterion in words, graded like the verdicts: an open path made only of merely
    possible edges (open, mitigated or accepted threats) puts conditions at risk, it does not break them."""
    if verdict.criterion_holds:
        return "Conditional instrument criterion holds in this diagram"
    breaks = (
        not verdict.relevance_connected
        or bool(verdict.conditioning_issues)
        or any(p.severity == "broken" for p in verdict.open_paths)
        or any(c.value == "broken" for c in verdict.conditions if c.condition != "monotonicity")
    )
    if breaks:
        return "Conditional instrument criterion fails"
    return "Conditional instrument criterion holds only if the possible edges on the open paths are absent"


def open_path_edges(verdict: GraphVerdict) -> set[tuple[str, str]]:
    """Directed edges that lie on at least one open bypass path (what the drawing emphasises)."""
    edges: set[tuple[str, str]] = set()
    for path in verdict.open_paths:
        for (a, b), arrow in zip(zip(path.nodes, path.nodes[1:], strict=False), path.arrows, strict=True):
            edges.add((a, b) if arrow == "->" else (b, a))
    return edges
