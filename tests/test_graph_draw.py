"""SVG drawing of the instrument graph: well-formed, escaped, self-contained and faithful to the verdict.

Well-formedness is checked with the standard library's XML parser (an outside reference for the escaping).
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import networkx as nx
import pytest
from nx_reference import to_networkx

from ivdossier.errors import InvalidInputError
from ivdossier.threats_catalog import load_builtin
from ivdossier.threats_catalog.catalog import FragmentNode, GraphFragment
from ivdossier.threats_catalog.dag import DiGraph
from ivdossier.threats_catalog.draw import esc, open_path_edges, render_svg
from ivdossier.threats_catalog.graph import GraphVerdict, build_graph, check_instrument

SVG = "{http://www.w3.org/2000/svg}"
NASTY = "a<b & \"c\" 'd' </text><script>alert(1)</script>"


def demo() -> tuple[DiGraph, GraphVerdict]:
    cat = load_builtin()
    roads = GraphFragment(
        "T-ROADS",
        "exclusion",
        (FragmentNode("clinic_closures", False, "clinic closures"),),
        (("Z", "clinic_closures"), ("clinic_closures", "Y")),
    )
    G = build_graph(
        instrument="fibre_wave",
        treatment="telehealth",
        outcome="ed_visits",
        covariates={"district_income": True},
        fragments=[roads, cat.get("DG-I01").fragment, cat.get("AN-I02").fragment],
        link_states={"T-ROADS": "fatal", "DG-I01": "mitigated", "AN-I02": "open"},
        extra_edges=[("district_income", "fibre_wave")],
    )
    v = check_instrument(
        G,
        instrument="fibre_wave",
        treatment="telehealth",
        outcome="ed_visits",
        conditioning={"district_income"},
    )
    return G, v


def texts(root: ET.Element) -> list[str]:
    return ["".join(t.itertext()) for t in root.iter(f"{SVG}text")]


def test_output_is_well_formed_svg_with_a_legend_and_the_verdicts() -> None:
    G, v = demo()
    svg = render_svg(G, v, title="Fibre wave")
    root = ET.fromstring(svg)
    assert root.tag == f"{SVG}svg"
    words = texts(root)
    assert "Legend" in words
    assert {"instrument (Z)", "treatment (X)", "outcome (Y)", "unobserved"} <= set(words)
    strip = {
        g.get("data-condition"): g.get("data-value") for g in root.iter(f"{SVG}g") if g.get("data-condition")
    }
    assert strip == {c.condition: c.value for c in v.conditions}


def test_open_paths_are_emphasised_by_line_pattern_not_only_colour() -> None:
    G, v = demo()
    root = ET.fromstring(render_svg(G, v))
    drawn = {}
    for path in root.iter(f"{SVG}path"):
        if path.get("data-from"):
            drawn[(path.get("data-from"), path.get("data-to"))] = path
    assert set(drawn) == set(G.edges)
    emphasised = open_path_edges(v)
    assert emphasised  # the planted exclusion violation and the selection path are open
    for edge, element in drawn.items():
        classes = element.get("class", "")
        if edge in emphasised:
            assert ("broken" in classes or "at-risk" in classes) and element.get("stroke-dasharray")
            assert float(element.get("stroke-width", "0")) >= 3
        else:
            assert element.get("stroke-dasharray") is None
    broken = {e for e, el in drawn.items() if "broken" in el.get("class", "")}
    assert ("fibre_wave", "clinic_closures") in broken


def test_node_kinds_differ_in_shape_and_border() -> None:
    G, v = demo()
    root = ET.fromstring(render_svg(G, v))
    shapes = {}
    for g in root.iter(f"{SVG}g"):
        if g.get("data-node"):
            first = next(iter(g))
            shapes[g.get("data-node")] = (
                first.tag.replace(SVG, ""),
                first.get("stroke-dasharray"),
                len(g.findall(f"{SVG}rect")),
            )
    assert shapes["fibre_wave"][0] == "polygon"
    assert shapes["telehealth"][0] == "rect"
    assert shapes["ed_visits"][2] >= 2  # double border
    assert shapes["U"][:2] == ("ellipse", "6 4")
    assert shapes["clinic_closures"][0] == "ellipse"
    conditioned = next(g for g in root.iter(f"{SVG}g") if g.get("data-node") == "district_income")
    assert "W" in texts(conditioned)
    selected = next(g for g in root.iter(f"{SVG}g") if g.get("data-node") == "outcome_observed")
    assert "S" in texts(selected)


def test_user_text_is_escaped_everywhere() -> None:
    G = build_graph(covariates={NASTY: True, "ctrl\x00char": True}, extra_edges=[(NASTY, "Y")])
    G.nodes["Z"]["label"] = NASTY
    v = check_instrument(G, instrument="Z", treatment="X", outcome="Y", conditioning={NASTY})
    svg = render_svg(G, v, title=f"Title {NASTY}")
    assert "<script" not in svg and "\x00" not in svg
    root = ET.fromstring(svg)  # parses, so every <, & and quote was escaped
    assert f"Title {NASTY}" in texts(root)
    assert any(g.get("data-node") == NASTY for g in root.iter(f"{SVG}g"))
    assert root.get("aria-label") == f"Title {NASTY}"


def test_escape_function() -> None:
    assert esc('<a href="x">&\'') == "&lt;a href=&quot;x&quot;&gt;&amp;&#39;"
    assert esc("bell\x07") == "bell\N{REPLACEMENT CHARACTER}"


def test_drawing_is_self_contained_and_deterministic() -> None:
    G, v = demo()
    svg = render_svg(G, v)
    assert svg == render_svg(G, v)
    assert "http" not in svg.replace('xmlns="http://www.w3.org/2000/svg"', "")
    assert "@import" not in svg and "<image" not in svg and "<script" not in svg
    assert all(chunk.startswith("#") for chunk in svg.split("url(")[1:])
    assert "cannot establish exclusion or exogeneity" in svg


def test_graph_without_verdict_and_bad_input() -> None:
    svg = render_svg(build_graph(), None)
    root = ET.fromstring(svg)
    assert not [g for g in root.iter(f"{SVG}g") if g.get("data-condition")]
    for empty in (nx.DiGraph(), DiGraph(), {"Z": "X"}, nx.Graph([("Z", "X")])):
        with pytest.raises(InvalidInputError, match="non-empty directed graph"):
            render_svg(empty, None)  # type: ignore[arg-type]


def test_a_networkx_copy_of_the_graph_draws_the_same_svg() -> None:
    """render_svg reads a networkx DiGraph through the same methods (duck typing): the same drawing, byte for
    byte, for the graph and for its networkx copy."""
    G, v = demo()
    assert render_svg(to_networkx(G), v, title="t") == render_svg(G, v, title="t")
    assert render_svg(to_networkx(G), None) == render_svg(G, None)
