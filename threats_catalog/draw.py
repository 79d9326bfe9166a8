"""Self-contained SVG drawing of an instrument's causal graph and its verdict.

Visual language (meaning never rests on colour alone):

* instrument: arrow-tag pentagon; treatment: plain box with a heavy border; outcome: box with a double border;
  unobserved: dashed ellipse with italic text; measured covariate: rounded box; measurable threat node:
  rounded box with a dash-dot border. Every node carries a small upper-case role tag.
* conditioned-on nodes get a hatched fill and a "W" badge; sample-selection nodes an "S" badge.
* layout: left-to-right layers (longest path), the instrument-treatment-outcome spine on one row,
  unobserved nodes above it and measured ones below.
* edges on an open bypass path: heavy dashed line if the path breaks a condition, heavy dotted line if it only
  puts one at risk; threat codes are written beside the edges they drew.
* a verdict strip on top (one shape per value: filled disc = holds, triangle = at risk, cross = broken,
  dashed ring = not assessed), the open paths as text, and a legend at the bottom.
"""

from __future__ import annotations

import hashlib
import math
import re
import textwrap
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import networkx as nx

from ivdossier.errors import InvalidInputError
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
    s = _CTRL.sub("\N{REPLACEMENT CHARACTER}", str(text))
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


def _text_width(text: str, size: float) -> float:
    return len(text) * size * 0.6


def _wrap(label: str, width: int = 20) -> list[str]:
    lines = textwrap.wrap(label, width=width, break_long_words=True) or [""]
    if len(lines) > 3:
        lines = [*lines[:2], lines[2][: width - 1] + "…"]
    return lines


def _layers(G: nx.DiGraph) -> dict[str, int]:
    """Longest-path layers; parentless helper nodes (confounders) move right to sit one layer before their
    first child, so they do not pile up in the first column."""
    layer: dict[str, int] = {}
    for node in nx.topological_sort(G):
        layer[node] = max((layer[p] + 1 for p in G.predecessors(node)), default=0)
    for node in reversed(list(nx.topological_sort(G))):
        role = G.nodes[node].get("role")
        children = list(G.successors(node))
        if not list(G.predecessors(node)) and children and role not in ("instrument", "treatment", "outcome"):
            layer[node] = min(layer[c] for c in children) - 1
    low = min(layer.values(), default=0)
    return {n: v - low for n, v in layer.items()}


def _layout(G: nx.DiGraph, boxes: dict[str, _Box], top: float) -> tuple[float, float]:
    """Place boxes; return the drawing's width and the y of its bottom edge."""
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
                        sum(rank[m] for m in nx.all_neighbors(G, n))
                        / max(1, len(list(nx.all_neighbors(G, n)))),
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
        cx = MARGIN + max_w / 2 + lv * COL_W
        for i, n in enumerate(col["spine"]):
            boxes[n].x, boxes[n].y = cx, spine_y + i * ROW_H
        # above: nearest to the spine is the last in order so edges to the spine stay short
        for i, n in enumerate(reversed(col["above"])):
            boxes[n].x, boxes[n].y = cx, spine_y - (i + 1) * ROW_H
        for i, n in enumerate(col["below"]):
            boxes[n].x, boxes[n].y = cx, spine_y + (spine_rows - 1 + i + 1) * ROW_H
    width = MARGIN * 2 + max_w + max(layer.values(), default=0) * COL_W
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
    G: nx.DiGraph, boxes: Mapping[str, _Box], u: str, v: str, spine_y: float
) -> tuple[float, float, float, float, float, float, bool]:
    """Start, control and end points of the edge u -> v (a quadratic curve when ``bow``)."""
    a, b = boxes[u], boxes[v]
    span = abs(b.x - a.x) / COL_W
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


def _edge_extent(G: nx.DiGraph, boxes: Mapping[str, _Box], spine_y: float) -> tuple[float, float, float]:
    """Lowest and highest y reached by any edge curve, and the right-most x (for sizing the drawing)."""
    ys: list[float] = []
    xs: list[float] = []
    for u, v in G.edges:
        x1, y1, cx, cy, x2, y2, _ = _edge_geometry(G, boxes, u, v, spine_y)
        for t in (0.0, 0.25, 0.5, 0.75, 1.0):
            ys.append((1 - t) ** 2 * y1 + 2 * (1 - t) * t * cy + t**2 * y2)
            xs.append((1 - t) ** 2 * x1 + 2 * (1 - t) * t * cx + t**2 * x2)
    return min(ys, default=spine_y), max(ys, default=spine_y), max(xs, default=0.0)


def _edge_svg(
    G: nx.DiGraph, boxes: Mapping[str, _Box], u: str, v: str, severity: str | None, spine_y: float, ids: str
) -> tuple[list[str], list[str]]:
    """The edge's path and, separately, its threat-code label (drawn last so nodes never hide it)."""
    x1, y1, cx, cy, x2, y2, bow = _edge_geometry(G, boxes, u, v, spine_y)
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
        f'stroke-width="{width}"{dash} marker-end="url(#{ids}-{marker})" data-from="{esc(u)}" data-to="{esc(v)}"/>'
    ]
    label = (
        ", ".join(codes) + (" (team)" if data.get("team") else "")
        if codes
        else ("team" if data.get("team") else "")
    )
    tag: list[str] = []
    if label:
        lx = 0.25 * x1 + 0.5 * cx + 0.25 * x2 if bow else (x1 + x2) / 2
        ly = (0.25 * y1 + 0.5 * cy + 0.25 * y2 if bow else (y1 + y2) / 2) - 6
        tw = _text_width(label, 9.5) + 8
        tag.append(
            f'<rect x="{lx - tw / 2:.1f}" y="{ly - 10:.1f}" width="{tw:.1f}" height="14" rx="3" fill="{PAPER}" '
            f'fill-opacity="0.92" stroke="{MUTED}" stroke-width="0.6"/>'
        )
        tag.append(
            f'<text x="{lx:.1f}" y="{ly + 1:.1f}" text-anchor="middle" font-size="9.5" '
            f'font-family="DejaVu Sans Mono, monospace" fill="{INK}">{esc(label)}</text>'
        )
    return out, tag


def _glyph(value: str, x: float, y: float) -> str:
    if value == "holds":
        return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="6" fill="{INK}"/>'
    if value == "at-risk":
        return (
            f'<polygon points="{x:.1f},{y - 7:.1f} {x + 7:.1f},{y + 6:.1f} {x - 7:.1f},{y + 6:.1f}" fill="{PAPER}" '
            f'stroke="{AT_RISK}" stroke-width="2"/>'
        )
    if value == "broken":
        return (
            f'<path d="M {x - 6:.1f} {y - 6:.1f} L {x + 6:.1f} {y + 6:.1f} M {x + 6:.1f} {y - 6:.1f} L {x - 6:.1f} '
            f'{y + 6:.1f}" stroke="{BROKEN}" stroke-width="3"/>'
        )
    return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="6" fill="none" stroke="{MUTED}" stroke-width="1.5" stroke-dasharray="2 2"/>'


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


def _legend(x: float, y: float, ids: str) -> tuple[list[str], float]:
    items: list[tuple[str, str]] = [
        ("instrument", "instrument (Z)"),
        ("treatment", "treatment (X)"),
        ("outcome", "outcome (Y)"),
        ("unobserved", "unobserved"),
        ("covariate", "measured variable"),
        ("intermediate", "measurable, from a threat"),
    ]
    out = [f'<text x="{x:.1f}" y="{y:.1f}" font-size="11" font-weight="bold" fill="{INK}">Legend</text>']
    y += 14
    for i, (role, text) in enumerate(items):
        col, row = i % 3, i // 3
        bx, by = x + col * 230 + 30, y + row * 40 + 16
        box = _Box(name=role, role=role, lines=[""], sub="", x=bx, y=by, w=48, h=26)
        shape = _node_svg(box, ids)
        out.extend(s for s in shape if not s.startswith("<text"))
        out.append(f'<text x="{bx + 34:.1f}" y="{by + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>')
    y += 2 * 40 + 6
    lines = [
        (f'stroke="{INK}" stroke-width="1.7"', "arrow", "edge of the base design"),
        (f'stroke="{MUTED}" stroke-width="1.4"', "arrow-muted", "edge drawn by a threat (code beside it)"),
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
    for i, (style, marker, text) in enumerate(lines):
        col, row = i % 2, i // 2
        lx, ly = x + col * 345, y + row * 22
        out.append(
            f'<path d="M {lx:.1f} {ly:.1f} L {lx + 52:.1f} {ly:.1f}" {style} marker-end="url(#{ids}-{marker})"/>'
        )
        out.append(f'<text x="{lx + 62:.1f}" y="{ly + 4:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>')
    y += 2 * 22 + 8
    badges = "W = conditioned on (hatched)   S = sample selected on   "
    glyphs = [
        ("holds", "holds"),
        ("at-risk", "at risk"),
        ("broken", "broken"),
        ("not-assessed", "not assessed"),
    ]
    out.append(f'<text x="{x:.1f}" y="{y:.1f}" font-size="11" fill="{INK}">{esc(badges)}</text>')
    gx = x + _text_width(badges, 11) + 4
    for value, text in glyphs:
        out.append(_glyph(value, gx + 6, y - 4))
        out.append(f'<text x="{gx + 17:.1f}" y="{y:.1f}" font-size="11" fill="{INK}">{esc(text)}</text>')
        gx += 30 + _text_width(text, 11)
    return out, y + 16


def render_svg(
    G: nx.DiGraph,
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
    if not isinstance(G, nx.DiGraph) or G.number_of_nodes() == 0:
        raise InvalidInputError("render_svg needs a non-empty networkx DiGraph; build one with build_graph")
    if not nx.is_directed_acyclic_graph(G):
        raise InvalidInputError(
            "render_svg needs an acyclic graph; build it with build_graph, which names cycles"
        )
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
        name = str(node)
        label = str(data.get("label") or name)
        lines = _wrap(label)
        sub = (
            name if label != name and role not in ("instrument", "treatment", "outcome", "unobserved") else ""
        )
        if role in ("instrument", "treatment", "outcome") and label != name:
            lines, sub = _wrap(name), ""
        w = max([_text_width(s, 12) for s in lines] + [_text_width(sub, 9), 80.0]) + 28
        h = 22 + 14 * (len(lines) + (1 if sub else 0))
        if role == "unobserved":
            w, h = w * 1.18, h + 8
        if role == "instrument":
            w += 14
        boxes[node] = _Box(
            name=name,
            role=role,
            lines=lines,
            sub=sub,
            w=min(w, 190.0),
            h=h,
            conditioned=node in conditioned,
            selection=node in selection,
            covariate_unmeasured=role == "covariate" and not data.get("observed", True),
        )

    ids = "ivd-" + hashlib.sha256(repr(sorted(map(str, G.edges))).encode()).hexdigest()[:8]
    top = 28.0 + (30.0 if title else 0.0) + (40.0 if verdict else 0.0)
    width, bottom = _layout(G, boxes, top + 24.0)
    spine_y = next((b.y for b in boxes.values() if b.role == "instrument"), bottom / 2)
    low, high, right = _edge_extent(G, boxes, spine_y)
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

    body: list[str] = []
    y_text = 28.0
    if title:
        body.append(
            f'<text x="{MARGIN:.1f}" y="{y_text:.1f}" font-size="17" font-weight="bold" fill="{INK}">{esc(title)}</text>'
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
            wbox = _text_width(text, 12) + 40
            dash = ' stroke-dasharray="4 3"' if value == "not-assessed" else ""
            stroke_w = "2.4" if value == "broken" else "1.2"
            body.append(
                f'<g class="verdict" data-condition="{esc(condition)}" data-value="{esc(value)}">'
                f'<rect x="{x:.1f}" y="{y_text - 16:.1f}" width="{wbox:.1f}" height="26" rx="4" fill="{PAPER}" '
                f'stroke="{INK}" stroke-width="{stroke_w}"{dash}/>'
                + _glyph(value, x + 14, y_text - 3)
                + f'<text x="{x + 26:.1f}" y="{y_text + 1:.1f}" font-size="12" fill="{INK}">{esc(text)}</text></g>'
            )
            x += wbox + 10
        width = max(width, x + MARGIN)
        given = ", ".join(verdict.conditioning) or "nothing"
        body.append(
            f'<text x="{MARGIN:.1f}" y="{y_text + 28:.1f}" font-size="11" fill="{MUTED}">'
            f"{esc(f'{criterion_sentence(verdict)}, conditioning on {given}.')}</text>"
        )

    tags: list[str] = []
    for u, v in sorted(G.edges, key=lambda e: (severity.get(e) is not None, e)):
        line, tag = _edge_svg(G, boxes, u, v, severity.get((u, v)), spine_y, ids)
        body.extend(line)
        tags.extend(tag)
    for node in sorted(boxes):
        body.extend(_node_svg(boxes[node], ids))
    body.extend(tags)

    y = bottom + 8
    if verdict is not None:
        heading = "Open paths from instrument to outcome that avoid the treatment"
        body.append(
            f'<text x="{MARGIN:.1f}" y="{y:.1f}" font-size="12" font-weight="bold" fill="{INK}">{esc(heading)}</text>'
        )
        y += 18
        rows = [
            f"{i}. {p.text}  [{', '.join(p.threats) or 'team-drawn'}]  {p.severity}, {p.condition}"
            for i, p in enumerate(verdict.open_paths, 1)
        ] or ["none, given the conditioning set"]
        for row in rows:
            body.append(
                f'<text x="{MARGIN + 8:.1f}" y="{y:.1f}" font-size="11" font-family="DejaVu Sans Mono, monospace" '
                f'fill="{INK}">{esc(row)}</text>'
            )
            width = max(width, MARGIN * 2 + 8 + _text_width(row, 11))
            y += 16
        y += 12
    legend, y = _legend(MARGIN, y + 6, ids)
    body.extend(legend)
    height = y + 14
    caution = "A graph records assumptions; it cannot establish exclusion or exogeneity. Review with domain experts."
    body.append(
        f'<text x="{MARGIN:.1f}" y="{height - 4:.1f}" font-size="10" fill="{MUTED}">{esc(caution)}</text>'
    )
    height += 12
    width = max(width, MARGIN * 2 + _text_width(caution, 10))
    head = (
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{height:.0f}" '
        f'viewBox="0 0 {width:.0f} {height:.0f}" font-family="{FONT}" role="img" aria-label="{esc(title or "instrument graph")}">'
    )
    return (
        "\n".join(
            [
                head,
                f"<title>{esc(title or 'instrument graph')}</title>",
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
