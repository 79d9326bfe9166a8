"""A registry written with an older catalogue picks up the shipped one when it is opened: new entries appear,
the new kind column is filled, and links, ratings, dismissals and critiques of merged or replaced codes move to
their successors, each move an audit event. The expectations follow from the retirement table in
threats_catalog/catalog.py (RETIRED) and the rules in registry/threats.py::carry_to_successor."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sqlalchemy import select

from ivdossier.errors import InvalidInputError
from ivdossier.registry import instruments as reg
from ivdossier.registry import records, studies
from ivdossier.registry import threats as thr
from ivdossier.registry.db import open_registry
from ivdossier.registry.models import AuditEvent, Critique, Dismissal, Instrument, Link, Rating, Threat
from ivdossier.threats_catalog import CATALOGUE_VERSION, load_builtin
from ivdossier.threats_catalog.catalog import RETIRED
from ivdossier.workflows.catalog_sync import catalog_is_current, ensure_builtin, sync_on_open


def _old_entry(code: str, condition: str) -> dict[str, object]:
    """A stand-in for a 1.0.0 built-in entry that the current catalogue has retired."""
    return {
        "code": code,
        "title": f"retired entry {code}",
        "condition": condition,
        "mechanism": "selection-attrition",
        "families": ["any"],
        "description": "An entry of the previous catalogue.",
        "testability": "partly-testable",
        "checks": [],
        "mitigations": ["none"],
        "references": ["none 2000"],
        "fragment": {"nodes": [], "edges": []},
    }


@pytest.fixture
def old_registry(tmp_path: Path):  # type: ignore[no-untyped-def]
    """A registry synced with a 1.0.0 catalogue that still held LE-I01 and DM-E02, with links to them."""
    registry = open_registry(str(tmp_path / "old.sqlite"))
    current = [t.to_dict() for t in load_builtin() if t.code in ("AN-I02", "PP-E02")]
    old = [_old_entry("LE-I01", "exogeneity"), _old_entry("DM-E02", "exclusion")]
    with registry.writing() as s:
        thr.sync_catalog(s, [*current, *old], version="1.0.0", actor="ana")
        reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
        for slug in ("clerk", "fibre"):
            reg.add_instrument(
                s, actor="ana", program="tele", slug=slug, name=slug, family="lottery-encouragement"
            )
        for handle in ("ana", "ben"):
            reg.add_member(s, actor="ana", handle=handle)
        # clerk: only the retired code is linked, with a rating -> the link itself moves
        thr.link_threat(
            s, actor="ana", instrument="clerk", code="LE-I01", state="mitigated", argument="tracked"
        )
        thr.rate_link(s, actor="ana", link="clerk--le-i01", likelihood=2, severity=3)
        # fibre: both the retired code and its successor are linked -> merged into the successor's link
        thr.link_threat(
            s, actor="ana", instrument="fibre", code="AN-I02", state="open", argument="response 80%"
        )
        thr.link_threat(
            s, actor="ana", instrument="fibre", code="LE-I01", state="fatal", argument="losers left"
        )
        thr.rate_link(s, actor="ana", link="fibre--an-i02", likelihood=4, severity=4)
        thr.rate_link(s, actor="ana", link="fibre--le-i01", likelihood=5, severity=5)
        thr.rate_link(s, actor="ben", link="fibre--le-i01", likelihood=1, severity=2)
        thr.dismiss(s, actor="ana", instrument="clerk", code="DM-E02", reason="no recording by the clerk")
        studies.add_study(s, actor="ana", key="smith2020", title="An earlier study")
        studies.critique(s, actor="ana", key="smith2020", threat="DM-E02")
    yield registry
    registry.dispose()


def test_opening_an_older_registry_carries_links_to_successors_with_audit_events(old_registry) -> None:  # type: ignore[no-untyped-def]
    with old_registry.reading() as s:
        assert not catalog_is_current(s)
    assert sync_on_open(old_registry, actor="tool") > 0
    with old_registry.reading() as s:
        assert catalog_is_current(s)
        codes = {t.code: t for t in s.scalars(select(Threat))}
        builtin = [t for t in codes.values() if t.origin == "builtin" and not t.retired_into]
        assert {t.code for t in builtin} == set(load_builtin().codes())  # every shipped entry is present
        assert codes["LE-I01"].retired_into == RETIRED["LE-I01"] == "AN-I02"
        assert codes["DM-E02"].retired_into == "PP-E02"
        assert codes["AN-T02"].threat_kind == "reading" and codes["AN-I02"].threat_kind == "condition"

        clerk = records.get(s, Instrument, "clerk")
        [(link, threat)] = thr.links_of(s, clerk)
        assert (link.slug, threat.code, link.state, link.argument) == (
            "clerk--an-i02",
            "AN-I02",
            "mitigated",
            "tracked",
        )
        assert [r.likelihood for r in s.scalars(select(Rating).where(Rating.link_id == link.id))] == [2]

        fibre = records.get(s, Instrument, "fibre")
        [(merged, threat)] = thr.links_of(s, fibre)
        assert threat.code == "AN-I02" and merged.state == "open"  # the successor's state is kept
        assert merged.argument == "response 80%\n\n[carried from LE-I01, state fatal] losers left"
        ratings = {
            r.member_id: (r.likelihood, r.severity)
            for r in s.scalars(select(Rating).where(Rating.link_id == merged.id))
        }
        assert sorted(ratings.values()) == [
            (1, 2),
            (4, 4),
        ]  # ana's own rating of the successor wins; ben's moves
        assert s.scalars(select(Link).where(Link.threat_id == codes["LE-I01"].id)).all() == []

        [dismissal] = s.scalars(select(Dismissal)).all()
        assert (dismissal.threat_id, dismissal.slug) == (codes["PP-E02"].id, "clerk--pp-e02")
        [crit] = s.scalars(select(Critique)).all()
        assert crit.threat_id == codes["PP-E02"].id and "--PP-E02--" in crit.slug

        carried = s.scalars(select(AuditEvent).where(AuditEvent.action == thr.CARRY_ACTION)).all()
        assert {e.entity_kind for e in carried} >= {"link", "rating", "dismissal", "critique"}
        assert all("was merged into or replaced by" in e.reason for e in carried)
        retire = s.scalars(select(AuditEvent).where(AuditEvent.action == "catalog-retire")).all()
        assert sorted(e.entity_label for e in retire) == ["DM-E02", "LE-I01"]
    # a second open finds nothing to do
    assert sync_on_open(old_registry, actor="tool") == 0


def test_a_retired_code_cannot_be_linked_again_and_names_its_successor(old_registry) -> None:  # type: ignore[no-untyped-def]
    with old_registry.writing() as s:
        ensure_builtin(s, actor="tool")
    with (
        old_registry.writing() as s,
        pytest.raises(InvalidInputError, match="LE-I01 was merged into or replaced by AN-I02"),
    ):
        thr.link_threat(s, actor="ana", instrument="clerk", code="LE-I01")


def test_every_retired_code_has_a_current_successor_and_is_not_shipped() -> None:
    catalog = load_builtin()
    for old, new in RETIRED.items():
        assert old not in catalog and new in catalog, (old, new)
    assert CATALOGUE_VERSION != "1.0.0"  # bumped with the merges and the new entries


def test_any_cli_command_brings_the_catalogue_in_and_credits_the_tool(cli) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli("threat", "show", "AN-T01", "--json")
    assert code == 0, err
    assert json.loads(out)["kind"] == "reading"
    _, out, _ = cli("history", "--json")
    events = json.loads(out)
    assert len(events) == len(load_builtin()) and {e["actor"] for e in events} == {"ivdossier-catalogue"}
    _, out, _ = cli("threat", "show", "AN-I02")
    assert "differential-attrition (not computable by ivdossier yet)" in out
