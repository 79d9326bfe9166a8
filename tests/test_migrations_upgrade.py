"""Registries written by every released schema version open, upgrade and keep their content under the current
code. tests/fixtures/registry-<rev>.sqlite holds one small registry per released revision; registry-0001 was
built with tests/test_portability_roundtrip.py::build_rich_registry at schema 0001 (the first schema), then
checkpointed, switched to journal_mode=DELETE and vacuumed with page_size=1024 so it is one small file;
registry-0002 was built the same way at schema 0002 (its team edge age -> Y predates edge scopes), and
registry-0003 the same way at schema 0003 (edge scopes, before primary runs), and registry-0004 the same way at
schema 0004 (primary runs, before studies kept a per-variant table), and registry-0005 the same way at
schema 0005 (per-variant tables, before built-in threats had identities derived from their codes), with the
built-in catalogue loaded first (workflows.catalog_sync.sync_on_open), so it holds built-in entries with random
identities."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from sqlalchemy import create_engine

from ivdossier.registry import instruments as reg
from ivdossier.registry import records
from ivdossier.registry import threats as thr
from ivdossier.registry.backup import restore_registry
from ivdossier.registry.db import SCHEMA_HEAD, current_revision, open_registry
from ivdossier.registry.models import Instrument, Program
from ivdossier.registry.portability import export_registry

FIXTURES = Path(__file__).resolve().parent / "fixtures"
VERSIONS = Path(__file__).resolve().parent.parent / "registry" / "migrations" / "versions"
REVISIONS = sorted(p.name.split("_", 1)[0] for p in VERSIONS.glob("[0-9]*_*.py"))


def test_every_released_schema_has_a_fixture_registry() -> None:
    # Every revision before the head has been released; 0001 is the first release.
    released = [r for r in REVISIONS if r < SCHEMA_HEAD] + ["0001"]
    missing = sorted({r for r in released if not (FIXTURES / f"registry-{r}.sqlite").is_file()})
    assert missing == [], f"add tests/fixtures/registry-<rev>.sqlite for {missing}"


@pytest.mark.parametrize("revision", [r for r in REVISIONS if (FIXTURES / f"registry-{r}.sqlite").is_file()])
def test_fixture_registry_upgrades_to_head_and_keeps_its_content(revision: str, tmp_path: Path) -> None:
    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURES / f"registry-{revision}.sqlite", copy)
    raw = create_engine(f"sqlite:///{copy}")
    assert current_revision(raw) == revision
    raw.dispose()
    registry = open_registry(str(copy))
    try:
        assert current_revision(registry.engine) == SCHEMA_HEAD
        with registry.reading() as s:
            inst = records.get(s, Instrument, "fibre")
            assert (inst.state, inst.version, inst.claim_exclusion) == (
                "vetting",
                2,
                "Only through access 🚀",
            )
            [summary] = [x for x in thr.rating_summaries(s, inst) if x.code == "T-ROUTE"]
            assert summary.ratings == (("ana", 4, 5, "worried"), ("ben", 2, 3, ""))
        with registry.writing() as s:  # and it takes new writes under the current code
            records.edit(
                s, records.get(s, Program, "tele"), {"unit": "patient"}, actor="ana", expected_version=1
            )
        with registry.reading() as s:
            export_registry(s, tmp_path / "out")
        assert json.loads((tmp_path / "out" / "manifest.json").read_text())["schema"] == SCHEMA_HEAD
    finally:
        registry.dispose()


def test_restoring_an_old_backup_upgrades_it(tmp_path: Path) -> None:
    summary = restore_registry(FIXTURES / "registry-0001.sqlite", str(tmp_path / "restored.sqlite"))
    assert summary.schema == SCHEMA_HEAD
    registry = open_registry(str(tmp_path / "restored.sqlite"), migrate=False)
    try:
        with registry.reading() as s:
            assert records.get(s, Program, "tele").title == "Télésanté & urgences <i>rural</i>"
    finally:
        registry.dispose()


def test_restoring_an_old_backup_over_a_live_registry_replaces_it(tmp_path: Path) -> None:
    """The fixture uses 1,024-byte pages; a live WAL registry uses 4,096: the restore adapts the copy first."""
    live = str(tmp_path / "live.sqlite")
    registry = open_registry(live)
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="ana", slug="mine", title="Mine")
        summary = restore_registry(FIXTURES / "registry-0001.sqlite", live, replace=True)
        assert summary.schema == SCHEMA_HEAD
        with registry.reading() as s:  # the open registry sees the restored content
            assert records.find(s, Program, "mine") is None
            assert records.get(s, Program, "tele").version == 1
    finally:
        registry.dispose()


def test_a_schema_0001_registry_gets_the_threat_kind_column_and_the_current_catalogue_on_open(
    tmp_path: Path,
) -> None:
    from sqlalchemy import select

    from ivdossier.registry.models import AuditEvent, Threat
    from ivdossier.threats_catalog import load_builtin
    from ivdossier.workflows.catalog_sync import CATALOG_ACTOR, sync_on_open

    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURES / "registry-0001.sqlite", copy)
    registry = open_registry(str(copy))
    try:
        with registry.reading() as s:  # migration 0002 gives the old team entries the default kind
            assert {t.code: t.threat_kind for t in s.scalars(select(Threat))} == {
                "T-ROUTE": "condition",
                "T-Case": "condition",
            }
        assert sync_on_open(registry) == len(load_builtin())
        with registry.reading() as s:
            kinds = {t.code: t.threat_kind for t in s.scalars(select(Threat)) if t.origin == "builtin"}
            assert set(kinds) == set(load_builtin().codes())
            assert {k for c, k in kinds.items() if load_builtin().get(c).kind == "reading"} == {"reading"}
            actors = {
                e.actor for e in s.scalars(select(AuditEvent).where(AuditEvent.entity_kind == "threat"))
            }
            assert CATALOG_ACTOR in actors
            inst = records.get(s, Instrument, "fibre")
            assert [t.code for _, t in thr.links_of(s, inst)] == ["T-ROUTE"]  # team links are untouched
    finally:
        registry.dispose()


def test_a_schema_0004_registry_gets_an_empty_variant_table_per_study_and_takes_one(tmp_path: Path) -> None:
    from sqlalchemy import select

    from ivdossier.registry.models import Study
    from ivdossier.registry.studies import set_variant_table

    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURES / "registry-0004.sqlite", copy)
    registry = open_registry(str(copy))
    try:
        with registry.reading() as s:  # migration 0005 adds the column, empty for every existing study
            before = {st.key: (st.variant_table, st.reported, st.version) for st in s.scalars(select(Study))}
        assert before == {"smith2020": (None, {"beta": 1.5}, 1), "lee2021": (None, None, 1)}
        table = {"source": "v.csv", "sha256": "0" * 64, "columns": ["variant"], "rows": [["rs1"]]}
        with registry.writing() as s:
            set_variant_table(s, actor="ana", key="smith2020", table=table)
        with registry.reading() as s:
            assert records.get(s, Study, "smith2020").variant_table == table
    finally:
        registry.dispose()


def test_a_schema_0005_registry_gives_built_in_threats_the_identity_derived_from_their_code(
    tmp_path: Path,
) -> None:
    from sqlalchemy import select

    from ivdossier.registry.models import AuditEvent, Link, Threat
    from ivdossier.registry.threats import builtin_uuid

    copy = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURES / "registry-0005.sqlite", copy)
    raw = create_engine(f"sqlite:///{copy}")
    with raw.connect() as con:  # before: random identities, each with its audit events
        old = {
            code: (uuid, con.exec_driver_sql("SELECT count(*) FROM audit_event WHERE entity_uuid = ?", (uuid,))
                   .scalar_one())
            for code, uuid, in con.exec_driver_sql("SELECT code, uuid FROM threat WHERE origin = 'builtin'")
        }  # fmt: skip
        team = dict(con.exec_driver_sql("SELECT code, uuid FROM threat WHERE origin = 'team'").fetchall())
    raw.dispose()
    assert old and team and all(uuid != builtin_uuid(code) for code, (uuid, _) in old.items())
    registry = open_registry(str(copy))
    try:
        with registry.reading() as s:
            threats = {t.code: t for t in s.scalars(select(Threat))}
            for code, (_, events) in old.items():
                new = threats[code].uuid
                assert new == builtin_uuid(code)  # uuid5 of the code in the project's namespace
                trail = s.scalars(select(AuditEvent).where(AuditEvent.entity_uuid == new)).all()
                assert len(trail) >= events  # the old trail follows (a catalogue refresh may add events)
            assert {code: threats[code].uuid for code in team} == team  # team entries keep theirs
            links = s.scalars(select(Link)).all()
            assert links and all(s.get(Threat, link.threat_id) is not None for link in links)
    finally:
        registry.dispose()


def test_two_new_registries_give_every_built_in_threat_the_same_file_in_their_exports(tmp_path: Path) -> None:
    from ivdossier.workflows.catalog_sync import sync_on_open

    exports = []
    for name in ("a", "b"):
        registry = open_registry(str(tmp_path / f"{name}.sqlite"))
        try:
            sync_on_open(registry)  # what `init` does: load the built-in catalogue
            with registry.reading() as s:
                export_registry(s, tmp_path / f"export-{name}")
        finally:
            registry.dispose()
        exports.append(
            {p.name: p.read_bytes() for p in sorted((tmp_path / f"export-{name}" / "threat").glob("*.json"))}
        )
    assert exports[0] and exports[0] == exports[1]
