"""Catalogue and graph commands: search, suggest, team entries, links with family propagation, graph verdicts."""

from __future__ import annotations

import json
from pathlib import Path

TEAM_ENTRY = """
code = "T-ROAD-WORKS"
title = "Road works that came with the cable trenches"
condition = "exclusion"
mechanism = "alternative-pathway"
families = ["distance-geography"]
testability = "partly-testable"
checks = ["zero-first-stage-reduced-form"]
description = "Trenching for the cable closed roads for weeks, which delayed ambulances."
mitigations = ["Compare districts by trenching dates."]
references = ["Team note (internal)"]

[fragment]
nodes = [{ name = "road_closures", observed = false, label = "road closures" }]
edges = [["Z", "road_closures"], ["road_closures", "Y"]]
"""


def _setup(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P", "--treatment", "d", "--outcome", "y")[0] == 0
    for slug, col in (("fibre", "z1"), ("mast", "z2")):
        code, _, err = cli(
            "instrument",
            "add",
            slug,
            "--program",
            "p",
            "--name",
            slug,
            "--family",
            "distance-geography",
            "--column",
            col,
        )
        assert code == 0, err


def test_list_filters_by_condition_and_family_and_show_gives_json(cli) -> None:  # type: ignore[no-untyped-def]
    code, out, _ = cli("threat", "list", "--condition", "monotonicity", "--json")
    entries = json.loads(out)
    assert code == 0 and entries and all(t["condition"] == "monotonicity" for t in entries)
    code, out, _ = cli("threat", "list", "--family", "genetic-variant", "--json")
    assert all("genetic-variant" in t["families"] or "any" in t["families"] for t in json.loads(out))
    code, out, _ = cli("threat", "show", "DM-E01", "--json")
    assert json.loads(out)["condition"] == "exclusion"
    code, _, err = cli("threat", "show", "DM-E99")
    assert code == 3 and "no threat with code 'DM-E99'" in err


def test_team_entry_link_propagation_and_graph_verdict(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    entry = tmp_path / "T-ROAD-WORKS.toml"
    entry.write_text(TEAM_ENTRY, encoding="utf-8")
    code, out, err = cli("threat", "new", str(entry))
    assert code == 0, err
    code, _, err = cli("threat", "new", str(entry))
    assert code == 4 and "already" in err
    assert cli("link", "add", "fibre", "T-ROAD-WORKS", "--state", "fatal")[0] == 0
    # Family propagation: the sibling of the same family sees the threat as raised elsewhere.
    code, out, _ = cli("instrument", "show", "mast", "--json")
    assert [r["code"] for r in json.loads(out)["raised_elsewhere"]] == ["T-ROAD-WORKS"]
    assert cli("link", "dismiss", "mast", "T-ROAD-WORKS", "--reason", "Masts needed no trenches.")[0] == 0
    code, out, _ = cli("instrument", "show", "mast", "--json")
    assert json.loads(out)["raised_elsewhere"] == []
    code, out, _ = cli("graph", "check", "fibre", "--json")
    verdict = json.loads(out)
    assert verdict["conditions"]["exclusion"]["value"] == "broken"
    assert [p["path"] for p in verdict["open_paths"]] == ["z1 -> road_closures -> y"]
    # road_closures is unmeasured, so no measured set can restore the criterion.
    assert verdict["adjustment_sets"] == []
    svg = tmp_path / "g.svg"
    assert cli("graph", "draw", "fibre", "--out", str(svg))[0] == 0
    assert svg.read_text(encoding="utf-8").lstrip().startswith("<svg")


def test_suggest_lists_family_threats_not_yet_linked(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    assert cli("link", "add", "fibre", "DG-R01")[0] == 0
    _, out, _ = cli("threat", "suggest", "fibre", "--json")
    codes = [t["code"] for t in json.loads(out)]
    assert "DG-R01" not in codes and "DG-E01" in codes
