"""Team edits of the causal graph are checked when they are written: an unknown node (with the closest name
suggested), a self-loop or a cycle is refused with the fix and nothing is written; edges can be removed and
reversed (audited), scoped to one instrument or the whole program, and listed with `graph show`."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from sqlalchemy import select

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry import instruments as reg
from ivdossier.registry.db import open_registry
from ivdossier.registry.models import AuditEvent, GraphEdge
from ivdossier.workflows import graph_edits as ge
from ivdossier.workflows.dossiers import instrument_check

FIXTURES = Path(__file__).resolve().parent / "fixtures"


def _program(cli) -> None:  # type: ignore[no-untyped-def]
    assert (
        cli("program", "add", "card", "--title", "Schooling", "--treatment", "educ", "--outcome", "lwage")[0]
        == 0
    )
    for slug in ("nearc4", "nearc2"):
        code, _, err = cli(
            "instrument", "add", slug, "--program", "card", "--name", slug,
            "--family", "distance-geography", "--column", slug,
        )  # fmt: skip
        assert code == 0, err
    assert cli("graph", "covariate", "card", "region")[0] == 0
    assert cli("graph", "covariate", "card", "geography", "--unmeasured")[0] == 0


def _edges(cli) -> list[dict[str, str]]:  # type: ignore[no-untyped-def]
    code, out, err = cli("graph", "show", "card", "--json")
    assert code == 0, err
    return [{k: e[k] for k in ("from", "to", "scope")} for e in json.loads(out)["edges"]]


def test_a_mistyped_node_is_refused_with_the_closest_name_and_nothing_is_written(cli) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    code, _, err = cli("graph", "edge", "card", "regoin", "lwage")
    assert code == 2
    assert "unknown node 'regoin'" in err and "did you mean 'region'?" in err and "Nothing was written" in err
    assert _edges(cli) == []
    # every command keeps working afterwards
    assert cli("graph", "check", "nearc4")[0] == 0


def test_self_loop_and_cycle_are_refused_naming_the_cycle_and_the_fix(cli) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    code, _, err = cli("graph", "edge", "add", "card", "region", "region")
    assert code == 2 and "self-loop" in err
    code, _, err = cli("graph", "edge", "add", "card", "educ", "lwage")
    assert code == 4 and "base design" in err
    assert cli("graph", "edge", "add", "card", "region", "lwage")[0] == 0
    code, _, err = cli("graph", "edge", "add", "card", "lwage", "region")
    assert code == 2
    assert "would close the cycle lwage -> region -> lwage" in err and "graph edge reverse" in err
    # a cycle through the base graph (educ -> lwage) is found too
    assert cli("graph", "edge", "add", "card", "lwage", "geography")[0] == 0
    code, _, err = cli("graph", "edge", "add", "card", "geography", "educ")
    assert code == 2 and "educ -> lwage -> geography" in err
    assert _edges(cli) == [
        {"from": "lwage", "to": "geography", "scope": "program"},
        {"from": "region", "to": "lwage", "scope": "program"},
    ]


def test_edges_are_removed_and_reversed_and_each_change_is_audited(cli, sqlite_path: str) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    assert cli("graph", "edge", "card", "lwage", "region")[0] == 0  # the earlier form still adds
    assert cli("graph", "edge", "reverse", "card", "lwage", "region", "--reason", "drawn backwards")[0] == 0
    assert _edges(cli) == [{"from": "region", "to": "lwage", "scope": "program"}]
    code, _, err = cli("graph", "edge", "remove", "card", "lwage", "region")
    assert code == 3 and "no team edge lwage -> region" in err and "region -> lwage (program-wide)" in err
    assert cli("graph", "edge", "remove", "card", "region", "lwage", "--reason", "not needed")[0] == 0
    assert _edges(cli) == []
    registry = open_registry(sqlite_path)
    try:
        with registry.reading() as s:
            events = s.scalars(
                select(AuditEvent).where(AuditEvent.entity_kind == "edge").order_by(AuditEvent.id)
            )
            trail = [(e.action, e.before, e.after, e.reason) for e in events]
    finally:
        registry.dispose()
    assert [t[0] for t in trail] == ["create", "reverse", "delete"]
    assert trail[1][1]["source"] == "lwage" and trail[1][2]["source"] == "region"
    assert trail[1][3] == "drawn backwards" and trail[2][3] == "not needed"


def test_reversing_into_a_cycle_is_refused(cli) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    assert cli("graph", "edge", "add", "card", "region", "geography")[0] == 0
    assert cli("graph", "edge", "add", "card", "geography", "lwage")[0] == 0
    assert cli("graph", "edge", "add", "card", "region", "lwage")[0] == 0
    code, _, err = cli("graph", "edge", "reverse", "card", "region", "lwage")
    assert code == 2 and "cycle" in err
    assert {"from": "region", "to": "lwage", "scope": "program"} in _edges(cli)


def test_an_edge_into_one_instruments_column_is_scoped_and_siblings_are_untouched(
    cli, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    code, _, err = cli("graph", "edge", "add", "card", "geography", "nearc4")
    assert code == 2 and "--instrument nearc4" in err and "graph common-cause nearc4" in err
    assert cli("graph", "edge", "add", "card", "geography", "nearc4", "--instrument", "nearc4")[0] == 0
    assert cli("graph", "edge", "add", "card", "geography", "lwage")[0] == 0
    code, out, _ = cli("graph", "check", "nearc4", "--json")
    assert code == 0 and [p["path"] for p in json.loads(out)["open_paths"]] == [
        "nearc4 <- geography -> lwage"
    ]
    code, out, _ = cli("graph", "check", "nearc2", "--json")
    assert code == 0 and json.loads(out)["open_paths"] == []
    for slug in ("nearc4", "nearc2"):
        code, _, err = cli("dossier", slug, "--out", str(tmp_path / f"{slug}.md"))
        assert code == 0, err
    code, _, err = cli("site", str(tmp_path / "site"))
    assert code == 0, err


def test_common_cause_of_one_instrument_and_the_outcome_in_one_command(cli) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    code, out, err = cli("graph", "common-cause", "nearc2", "geography", "--note", "colleges sit in cities")
    assert code == 0, err
    assert _edges(cli) == [
        {"from": "geography", "to": "lwage", "scope": "nearc2"},
        {"from": "geography", "to": "nearc2", "scope": "nearc2"},
    ]
    code, out, _ = cli("graph", "check", "nearc2", "--json")
    assert [p["path"] for p in json.loads(out)["open_paths"]] == ["nearc2 <- geography -> lwage"]
    code, out, _ = cli("graph", "check", "nearc4", "--json")
    assert json.loads(out)["open_paths"] == []
    code, _, err = cli("graph", "common-cause", "nearc2", "geografy")
    assert code == 2 and "Did you mean 'geography'?" in err


def test_an_edge_that_no_longer_fits_is_left_out_with_a_note_instead_of_breaking_the_graph(
    cli, sqlite_path: str
) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    # a row written before edges were checked (or by an older version): names an unknown node
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            reg.add_edge(s, actor="tester", program="card", source="regoin", target="lwage")
        with registry.reading() as s:
            check = instrument_check(s, reg.records.get(s, reg.Instrument, "nearc4"))
    finally:
        registry.dispose()
    assert check.check.notes and "regoin -> lwage left out" in check.check.notes[0]
    code, out, _ = cli("graph", "check", "nearc4")
    assert code == 0 and "note: team edge regoin -> lwage left out" in out
    assert cli("graph", "edge", "remove", "card", "regoin", "lwage")[0] == 0


def test_registry_functions_refuse_duplicates_and_foreign_instruments(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="a", slug="p", title="P", treatment="d", outcome="y")
            reg.add_program(s, actor="a", slug="q", title="Q", treatment="d", outcome="y")
            reg.add_instrument(s, actor="a", program="q", slug="zq", name="zq", columns=["zq"])
            reg.add_covariate(s, actor="a", program="p", name="c")
            ge.add_team_edge(s, actor="a", program="p", source="c", target="y")
        with (
            pytest.raises(ConflictError, match="already in the graph of program 'p'"),
            registry.writing() as s,
        ):
            ge.add_team_edge(s, actor="a", program="p", source="c", target="y")
        with (
            pytest.raises(InvalidInputError, match="instrument 'zq' is not in program 'p'"),
            registry.writing() as s,
        ):
            ge.add_team_edge(s, actor="a", program="p", source="c", target="y", instrument="zq")
        with pytest.raises(NotFoundError, match="no team edge y -> c"), registry.reading() as s:
            ge.stored_edge(s, program="p", source="y", target="c")
    finally:
        registry.dispose()


def test_a_schema_0002_registry_keeps_its_edges_program_wide_and_takes_scoped_ones(tmp_path: Path) -> None:
    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURES / "registry-0002.sqlite", copy)
    registry = open_registry(str(copy))
    try:
        with registry.reading() as s:
            assert [(e.source, e.target, e.instrument_id) for e in s.scalars(select(GraphEdge))] == [
                ("age", "Y", None)
            ]
        with registry.writing() as s:  # the same edge, scoped to each sibling, no longer collides
            for slug in ("fibre", "clerk"):
                reg.add_edge(s, actor="ana", program="tele", source="age", target="Y", instrument=slug)
        with registry.reading() as s:
            assert len(list(s.scalars(select(GraphEdge)))) == 3
    finally:
        registry.dispose()


def test_family_is_validated_listed_and_read_in_any_letter_case(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    code, _, err = cli("instrument", "add", "z", "--program", "p", "--name", "Z", "--family", "bogus")
    assert code == 2 and "not a family of the threat catalogue" in err and "distance-geography" in err
    code, _, err = cli(
        "instrument", "add", "z", "--program", "p", "--name", "Z", "--family", "distance-geograpy"
    )
    assert code == 2 and "Did you mean 'distance-geography'?" in err
    code, _, err = cli(
        "instrument", "add", "z", "--program", "p", "--name", "Z", "--family", "Distance-Geography"
    )
    assert code == 0, err
    code, _, err = cli("instrument", "edit", "z", "--family", "bogus")
    assert code == 2 and "not a family" in err
    code, _, err = cli("threat", "list", "--family", "bogus")
    assert code == 2 and "family list" in err
    code, out, _ = cli("family", "list", "--json")
    rows = {r["family"]: r for r in json.loads(out)}
    from ivdossier.threats_catalog import load_builtin

    builtin = load_builtin()
    # independent count: every built-in entry that names the family
    assert rows["distance-geography"]["entries"] == sum("distance-geography" in t.families for t in builtin)
    assert rows["distance-geography"]["instruments"] == 1
    code, out, _ = cli("threat", "suggest", "z", "--json")
    assert code == 0 and len(json.loads(out)) == rows["distance-geography"]["suggested"]


def test_threat_codes_are_accepted_in_any_letter_case(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert (
        cli("instrument", "add", "z", "--program", "p", "--name", "Z", "--family", "distance-geography")[0]
        == 0
    )
    code, out, _ = cli("threat", "show", "dg-e01", "--json")
    assert code == 0 and json.loads(out)["code"] == "DG-E01"
    code, _, err = cli("link", "add", "z", "dg-e01")
    assert code == 0, err
    code, _, err = cli("link", "edit", "z--DG-E01", "--state", "rebutted")
    assert code == 0, err
    code, out, _ = cli("link", "show", "Z--Dg-E01", "--json")
    assert code == 0 and json.loads(out)["state"] == "rebutted"
    code, _, err = cli("link", "dismiss", "z", "Dg-I01", "--reason", "no sorting here")
    assert code == 0, err


def test_edge_scopes_survive_export_and_import(tmp_path: Path) -> None:
    from ivdossier.registry import portability

    first = open_registry(str(tmp_path / "a.sqlite"))
    try:
        with first.writing() as s:
            reg.add_program(s, actor="a", slug="p", title="P", treatment="d", outcome="y")
            reg.add_instrument(s, actor="a", program="p", slug="z1", name="z1", columns=["z1"])
            reg.add_instrument(s, actor="a", program="p", slug="z2", name="z2", columns=["z2"])
            reg.add_covariate(s, actor="a", program="p", name="c", measured=False)
            ge.add_common_cause(s, actor="a", instrument="z1", covariate="c")
            ge.add_team_edge(s, actor="a", program="p", source="c", target="d")
        with first.reading() as s:
            portability.export_registry(s, tmp_path / "out")
            before = ge.graph_listing(s, "p").edges
    finally:
        first.dispose()
    second = open_registry(str(tmp_path / "b.sqlite"))
    try:
        with second.writing() as s:
            portability.import_registry(s, portability.read_export(tmp_path / "out"), actor="a")
        with second.reading() as s:
            assert ge.graph_listing(s, "p").edges == before
            assert [(e["from"], e["to"], e["scope"]) for e in before] == [
                ("c", "d", "program"),
                ("c", "y", "z1"),
                ("c", "z1", "z1"),
            ]
    finally:
        second.dispose()
