"""The diagram's geometry, read back from the SVG: every text fits inside the drawing (the title is never cut
off), no text or edge tag overlaps another, no tag sits on a node, the legend explains every mark the drawing
uses, and the verdict shapes are the dossier's.

Text extents are measured independently of the drawing code with matplotlib's FreeType binding on the DejaVu
fonts matplotlib ships (the first font the SVG names), so the check does not reuse the drawing's own width table.
"""

from __future__ import annotations

import itertools
import xml.etree.ElementTree as ET
from functools import cache

import pytest
from matplotlib import ft2font
from matplotlib.font_manager import FontProperties, findfont

from ivdossier.threats_catalog import load_builtin
from ivdossier.threats_catalog.catalog import FragmentNode, GraphFragment
from ivdossier.threats_catalog.dag import DiGraph
from ivdossier.threats_catalog.draw import VERDICT_SHAPES, render_svg, text_width
from ivdossier.threats_catalog.graph import build_graph, check_instrument

SVG = "{http://www.w3.org/2000/svg}"
Rect = tuple[float, float, float, float]


@cache
def _font(bold: bool, mono: bool) -> ft2font.FT2Font:
    family = "DejaVu Sans Mono" if mono else "DejaVu Sans"
    return ft2font.FT2Font(findfont(FontProperties(family=family, weight="bold" if bold else "normal")))


def measured_width(text: str, size: float, *, bold: bool = False, mono: bool = False) -> float:
    """Advance width in pixels as FreeType lays the string out, unhinted like a browser with subpixel positioning
    (72 dpi: one point is one pixel)."""
    font = _font(bold, mono)
    font.set_size(size, 72)
    font.set_text(text, 0.0, flags=ft2font.LoadFlags.NO_HINTING)
    return font.get_width_height()[0] / 64.0


def text_boxes(root: ET.Element) -> list[tuple[str, Rect]]:
    boxes = []
    for el in root.iter(f"{SVG}text"):
        content = "".join(el.itertext())
        size = float(el.get("font-size", "12"))
        mono = "Mono" in (el.get("font-family") or "")
        width = measured_width(content, size, bold=el.get("font-weight") == "bold", mono=mono)
        width += float(el.get("letter-spacing", "0")) * len(content)
        x, y = float(el.get("x", "0")), float(el.get("y", "0"))
        left = x - width / 2 if el.get("text-anchor") == "middle" else x
        # DejaVu Sans: ascent 0.76 em, descent 0.24 em
        boxes.append((content, (left, y - 0.76 * size, left + width, y + 0.24 * size)))
    return boxes


def tag_boxes(root: ET.Element) -> list[Rect]:
    out = []
    for el in root.iter(f"{SVG}rect"):
        if el.get("class") == "edge-tag":
            x, y, w, h = (float(el.get(k, "0")) for k in ("x", "y", "width", "height"))
            out.append((x, y, x + w, y + h))
    return out


def node_boxes(root: ET.Element) -> dict[str, Rect]:
    out = {}
    for g in root.iter(f"{SVG}g"):
        if not (g.get("class") or "").startswith("node"):
            continue
        xs: list[float] = []
        ys: list[float] = []
        for el in g:
            tag = el.tag.removeprefix(SVG)
            if tag == "rect":
                x, y, w, h = (float(el.get(k, "0")) for k in ("x", "y", "width", "height"))
                if w > 20:  # the shape, not the 16-unit W/S badge
                    xs += [x, x + w]
                    ys += [y, y + h]
            elif tag == "ellipse":
                cx, cy, rx, ry = (float(el.get(k, "0")) for k in ("cx", "cy", "rx", "ry"))
                xs += [cx - rx, cx + rx]
                ys += [cy - ry, cy + ry]
            elif tag == "polygon":
                pts = [tuple(map(float, p.split(","))) for p in (el.get("points") or "").split()]
                xs += [p[0] for p in pts]
                ys += [p[1] for p in pts]
        out[g.get("data-node", "")] = (min(xs), min(ys), max(xs), max(ys))
    return out


def overlap(a: Rect, b: Rect) -> bool:
    return a[0] < b[2] and b[0] < a[2] and a[1] < b[3] and b[1] < a[3]


def assert_clean_layout(svg: str) -> ET.Element:
    root = ET.fromstring(svg)
    width, height = float(root.get("width", "0")), float(root.get("height", "0"))
    texts = text_boxes(root)
    for content, (x0, y0, x1, y1) in texts:
        assert x0 >= 0 and y0 >= 0 and x1 <= width and y1 <= height, f"{content!r} is cut off"
    for (a, ra), (b, rb) in itertools.combinations(texts, 2):
        assert not overlap(ra, rb), f"text {a!r} overlaps text {b!r}"
    tags = tag_boxes(root)
    for ra, rb in itertools.combinations(tags, 2):
        assert not overlap(ra, rb), f"edge tags overlap at {ra} and {rb}"
    nodes = node_boxes(root)
    for (a, ra), (b, rb) in itertools.combinations(nodes.items(), 2):
        assert not overlap(ra, rb), f"nodes {a!r} and {b!r} overlap"
    for tag in tags:
        for name, box in nodes.items():
            assert not overlap(tag, box), f"an edge tag at {tag} covers node {name!r}"
        inside = [
            c for c, r in texts if r[0] >= tag[0] - 1 and r[2] <= tag[2] + 1 and tag[1] <= r[1] <= tag[3]
        ]
        for content, r in texts:
            if content not in inside:
                assert not overlap(tag, r), f"an edge tag at {tag} covers the text {content!r}"
    return root


def demo_graph() -> tuple[DiGraph, object]:
    """The demo's fibre-wave graph: two measured controls drawn by the team, two threats with their nodes."""
    cat = load_builtin()
    G = build_graph(
        instrument="fibre_months",
        treatment="telehealth",
        outcome="ed_visits",
        covariates={"age": True, "chronic_conditions": True},
        fragments=[cat.get("AN-E01").fragment, cat.get("DG-E01").fragment],
        link_states={"AN-E01": "open", "DG-E01": "mitigated"},
        extra_edges=[
            ("age", "telehealth"),
            ("age", "ed_visits"),
            ("chronic_conditions", "telehealth"),
            ("chronic_conditions", "ed_visits"),
        ],
    )
    v = check_instrument(
        G,
        instrument="fibre_months",
        treatment="telehealth",
        outcome="ed_visits",
        conditioning={"age", "chronic_conditions"},
    )
    return G, v


def twelve_node_graph() -> tuple[DiGraph, object]:
    """Twelve nodes: the four roles, five declared covariates (one unmeasured), three threat nodes, many tags."""
    frag = GraphFragment(
        "T-DEPOT",
        "exclusion",
        (
            FragmentNode("depot_closures", True, "depot closures in the district"),
            FragmentNode("ambulance_delay", False, "ambulance delays"),
            FragmentNode("staffing", True, "staffing of the local clinic"),
        ),
        (
            ("Z", "depot_closures"),
            ("depot_closures", "ambulance_delay"),
            ("ambulance_delay", "Y"),
            ("staffing", "Y"),
        ),
    )
    covs = {"age": True, "income": True, "distance": True, "rurality": True, "geography": False}
    team = [
        ("age", "X"), ("age", "Y"), ("income", "X"), ("income", "Y"), ("distance", "Z"), ("distance", "X"),
        ("rurality", "Z"), ("rurality", "Y"), ("geography", "Z"), ("geography", "Y"), ("income", "staffing"),
        ("rurality", "staffing"),
    ]  # fmt: skip
    G = build_graph(covariates=covs, fragments=[frag], link_states={"T-DEPOT": "open"}, extra_edges=team)
    assert G.number_of_nodes() == 12
    v = check_instrument(G, instrument="Z", treatment="X", outcome="Y", conditioning={"age", "income"})
    return G, v


def test_the_demo_diagram_has_no_overlap_and_nothing_cut_off() -> None:
    G, v = demo_graph()
    root = assert_clean_layout(render_svg(G, v, title="Causal diagram for Fibre roll-out wave"))  # type: ignore[arg-type]
    legend_samples = 2  # the legend shows a "team" tag and a threat-code tag
    assert len(tag_boxes(root)) - legend_samples == sum(
        1 for *_, d in G.edges(data=True) if d["team"] or d["threats"]
    )


def test_a_twelve_node_diagram_has_no_overlap_and_nothing_cut_off() -> None:
    G, v = twelve_node_graph()
    root = assert_clean_layout(render_svg(G, v, title="Twelve nodes"))  # type: ignore[arg-type]
    legend_samples = 2  # the legend shows a "team" tag and a threat-code tag
    assert len(tag_boxes(root)) - legend_samples == sum(
        1 for *_, d in G.edges(data=True) if d["team"] or d["threats"]
    )


@pytest.mark.parametrize("n", [40, 90, 140])
def test_a_long_title_is_never_cut_off(n: int) -> None:
    G, v = demo_graph()
    title = ("Causal diagram for a very long instrument name " * 4)[:n]
    assert_clean_layout(render_svg(G, v, title=title))  # type: ignore[arg-type]


def test_width_table_agrees_with_the_font_files() -> None:
    for text, bold, mono in (
        ("Causal diagram for Fibre roll-out wave", True, False),
        ("conditioning on age, chronic_conditions.", False, False),
        ("fibre_months -> awareness -> ed_visits", False, True),
    ):
        # FreeType's width with hinting and kerning vs the table's plain advances: within 3 %
        assert text_width(text, 12, bold=bold, mono=mono) == pytest.approx(
            measured_width(text, 12, bold=bold, mono=mono), rel=0.03
        )


def test_legend_explains_the_team_tag_the_threat_tag_and_unmeasured_covariates() -> None:
    G, v = twelve_node_graph()
    root = ET.fromstring(render_svg(G, v))  # type: ignore[arg-type]
    words = ["".join(t.itertext()) for t in root.iter(f"{SVG}text")]
    assert "team" in words and "the team drew this edge (graph edge)" in words
    assert "the catalogue threat whose graph drew this edge" in words
    assert "unobserved, declared but not measured" in words


def test_an_unmeasured_team_covariate_is_drawn_unobserved_not_as_a_measurable_threat_node() -> None:
    G, v = twelve_node_graph()
    root = ET.fromstring(render_svg(G, v))  # type: ignore[arg-type]
    [geo] = [g for g in root.iter(f"{SVG}g") if g.get("data-node") == "geography"]
    assert "role-unobserved" in (geo.get("class") or "")
    assert geo[0].tag.removeprefix(SVG) == "ellipse"
    assert "NOT MEASURED" in ["".join(t.itertext()) for t in geo.iter(f"{SVG}text")]
    assert "MEASURABLE" not in ["".join(t.itertext()) for t in geo.iter(f"{SVG}text")]


def test_verdict_shapes_are_the_dossiers_badges_in_strip_and_legend() -> None:
    from ivdossier.reports.plots import verdict_badge_svg

    for key, status in (
        ("holds", "holds"),
        ("at-risk", "at risk"),
        ("broken", "broken"),
        ("not-assessed", "not assessed"),
    ):
        assert VERDICT_SHAPES[key] in verdict_badge_svg(status)
    G, v = demo_graph()
    svg = render_svg(G, v)  # type: ignore[arg-type]
    root = ET.fromstring(svg)
    glyphs = [g for g in root.iter(f"{SVG}g") if g.get("class") == "glyph"]
    strip = {g.get("data-value") for g in root.iter(f"{SVG}g") if g.get("class") == "verdict"}
    # the legend shows each of the four shapes once; the strip reuses the same markup
    assert sorted(g.get("data-value") for g in glyphs).count("broken") == 1 + ("broken" in strip)
    for g in glyphs:
        assert "".join(ET.tostring(c, encoding="unicode") for c in g)  # non-empty shape
