"""Export writes one stable text file per entity; importing it into a fresh registry and exporting again gives
byte-identical files on SQLite and PostgreSQL; merges report conflicts and apply all or nothing."""

from __future__ import annotations

import json
import re
from datetime import UTC, datetime
from pathlib import Path

import pytest
from export_tools import reseal
from sqlalchemy import func, select

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry import comments, records, runs
from ivdossier.registry import instruments as reg
from ivdossier.registry import threats as thr
from ivdossier.registry.db import SCHEMA_HEAD, Registry, open_registry
from ivdossier.registry.models import AuditEvent, Critique, Instrument, Plan, Program, Study
from ivdossier.registry.portability import export_registry, import_registry, read_export


def build_rich_registry(registry: Registry) -> None:
    """One of every entity kind, with Unicode, markup, JSON fields, nullable references and edits."""
    with registry.writing() as s:
        reg.add_program(
            s, actor="ana", slug="tele", title="Télésanté & urgences <i>rural</i>", notes="line1\nline2"
        )
        reg.add_member(s, actor="ana", handle="ana", name="Ana Ñúñez", email="ana@example.org")
        reg.add_member(s, actor="ana", handle="ben", name="Ben")
        reg.add_instrument(
            s,
            actor="ana",
            program="tele",
            slug="fibre",
            name="Fibre wave",
            family="engineering-schedule",
            columns=["fibre_months", "wave"],
            claims={"exclusion": "Only through access 🚀", "relevance": "First stage F ≈ 40"},
        )
        reg.add_instrument(s, actor="ana", program="tele", slug="clerk", name="Clerk propensity")
        reg.add_covariate(s, actor="ana", program="tele", name="age", measured=True)
        reg.add_edge(s, actor="ana", program="tele", source="age", target="Y", note="older, more visits")
        thr.add_team_threat(
            s,
            actor="ana",
            entry={
                "code": "T-ROUTE",
                "title": "Roll-out follows income",
                "condition": "exogeneity",
                "families": ["engineering-schedule"],
                "fragment": {"edges": [["U", "Z"], ["U", "Y"]]},
                "checks": ["balance"],
            },
        )
        thr.add_team_threat(
            s, actor="ana", entry={"code": "T-Case", "title": "Mixed case code", "condition": "exclusion"}
        )
        thr.link_threat(s, actor="ana", instrument="fibre", code="T-ROUTE", argument="see **map**")
        thr.dismiss(s, actor="ana", instrument="clerk", code="T-ROUTE", reason="not a schedule")
        thr.rate_link(s, actor="ana", link="fibre--t-route", likelihood=4, severity=5, comment="worried")
        thr.rate_link(s, actor="ben", link="fibre--t-route", likelihood=2, severity=3)
        dataset = runs.register_dataset(
            s, actor="ana", path="data/telehealth.csv", sha256="ab" * 32, rows=1000, columns=["y", "x", "z"]
        )
        runs.record_run(
            s,
            actor="ana",
            instrument="fibre",
            run_kind="estimate",
            spec={"outcome": "y", "treatment": ["x"], "instruments": ["z"]},
            results={"beta": -0.6012345678901234, "se": 0.1, "ci": [-0.8, -0.4], "F": "inf"},
            versions={"numpy": "2.0"},
            seconds=0.125,
            dataset=dataset,
        )
        first = records.create(
            s, Study(key="smith2020", title="A study", year=2020, reported={"beta": 1.5}), actor="ana"
        )
        second = records.create(s, Study(key="lee2021", title="A reply", families=["distance"]), actor="ana")
        threat = records.get(s, thr.Threat, "T-ROUTE")
        records.create(
            s,
            Critique(
                slug="smith2020--t-route--lee2021",
                study_id=first.id,
                threat_id=threat.id,
                raised_by_id=second.id,
            ),
            actor="ana",
        )
        records.create(
            s,
            Critique(slug="smith2020--t-route", study_id=first.id, threat_id=threat.id, note="self"),
            actor="ana",
        )
        prog = records.get(s, Program, "tele")
        records.create(
            s,
            Plan(
                slug="pap-1",
                program_id=prog.id,
                title="Plan",
                content={"b": 1, "a": [1, 2.5]},
                frozen_at=datetime(2026, 1, 2, 3, 4, 5, 678901, tzinfo=UTC),
            ),
            actor="ana",
        )
        comments.add_comment(s, actor="ben", target="fibre", body="Ask the utility <script>x</script>")
    with registry.writing() as s:
        reg.move_instrument(s, actor="ben", instrument="fibre", to="vetting", reason="schedule obtained")


def _tree(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def _count(registry: Registry, cls: type) -> int:
    with registry.reading() as s:
        return int(s.scalars(select(func.count()).select_from(cls)).one())


def _import(registry: Registry, folder: Path, **kw: object) -> object:
    content = read_export(folder)
    with registry.writing() as s:
        return import_registry(s, content, actor="importer", **kw)  # type: ignore[arg-type]


def test_round_trip_into_a_fresh_registry_is_byte_identical(
    db_url: str, tmp_path: Path, pg_or_sqlite_second
) -> None:  # type: ignore[no-untyped-def]
    source = open_registry(db_url)
    target = open_registry(pg_or_sqlite_second)
    try:
        build_rich_registry(source)
        with source.reading() as s:
            summary = export_registry(s, tmp_path / "a")
        assert summary.counts["instrument"] == 2 and summary.audit_events == _count(source, AuditEvent)
        report = _import(target, tmp_path / "a")
        assert report.added["rating"] == 2 and report.conflicts == ()  # type: ignore[attr-defined]
        with target.reading() as s:
            export_registry(s, tmp_path / "b")
            inst = records.get(s, Instrument, "fibre")
            assert (inst.state, inst.version, inst.columns) == ("vetting", 2, ["fibre_months", "wave"])
        a, b = _tree(tmp_path / "a"), _tree(tmp_path / "b")
        trail_a, trail_b = a.pop("audit.jsonl").decode(), b.pop("audit.jsonl").decode()
        del a["manifest.json"], b["manifest.json"]  # they differ only in the audit file's hash
        assert a == b
        # The audit trail comes across as the other registry's history: every event marked as imported.
        assert trail_b == re.sub(r'"action":"', '"action":"imported:', trail_a)
        # Importing the same export again changes nothing.
        again = _import(target, tmp_path / "a")
        assert again.added == {} and again.audit_events_added == 0  # type: ignore[attr-defined]
        assert _count(target, AuditEvent) == _count(source, AuditEvent)
    finally:
        source.dispose()
        target.dispose()


@pytest.fixture(params=["sqlite-target", "postgresql-target"])
def pg_or_sqlite_second(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A second empty registry for the import side (each backend), so exports cross backends too."""
    if request.param == "sqlite-target":
        return str(tmp_path / "second.sqlite")
    return request.getfixturevalue("pg_server").create_database()  # type: ignore[no-any-return]


def test_files_are_sorted_json_with_uuids_for_references_and_utc_microseconds(
    sqlite_path: str, tmp_path: Path
) -> None:
    registry = open_registry(sqlite_path)
    try:
        build_rich_registry(registry)
        with registry.reading() as s:
            export_registry(s, tmp_path / "out")
            program_uuid = records.get(s, Program, "tele").uuid
    finally:
        registry.dispose()
    root = tmp_path / "out"
    text = (root / "instrument" / "fibre.json").read_text(encoding="utf-8")
    assert text.endswith("}\n") and '\n  "argument"' not in text
    doc = json.loads(text)
    assert list(doc) == sorted(doc) and "id" not in doc and "program_id" not in doc
    assert doc["program_uuid"] == program_uuid
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{6}\+00:00", doc["created_at"])
    assert "Only through access 🚀" in text  # UTF-8, not escaped
    assert (
        json.loads((root / "plan" / "pap-1.json").read_text())["frozen_at"]
        == "2026-01-02T03:04:05.678901+00:00"
    )
    critique = json.loads((root / "critique" / "smith2020--t-route.json").read_text())
    assert critique["raised_by_uuid"] is None
    # Threat codes become lower-case file names; the manifest names the schema.
    assert (root / "threat" / "t-case.json").is_file()
    manifest = json.loads((root / "manifest.json").read_text())
    assert manifest["schema"] == SCHEMA_HEAD and manifest["counts"]["comment"] == 1
    lines = (root / "audit.jsonl").read_text().splitlines()
    stamps = [json.loads(line)["at"] for line in lines]
    assert stamps == sorted(stamps) and len(lines) == manifest["audit_events"]


def test_unsafe_or_colliding_labels_fall_back_to_uuid_names_inside_the_folder(
    sqlite_path: str, tmp_path: Path
) -> None:
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="ana", slug="tele", title="t")
            thr.add_team_threat(
                s, actor="ana", entry={"code": "T-X", "title": "upper", "condition": "exclusion"}
            )
            thr.add_team_threat(
                s, actor="ana", entry={"code": "T-x", "title": "lower", "condition": "exclusion"}
            )
            # Labels written around the slug checks (e.g. by an older tool) must not steer the file path.
            records.create(s, Study(key="../../escape", title="hostile"), actor="ana")
            records.create(s, Study(key="/etc/passwd", title="hostile"), actor="ana")
        with registry.reading() as s:
            export_registry(s, tmp_path / "out")
    finally:
        registry.dispose()
    files = sorted(str(p.relative_to(tmp_path)) for p in tmp_path.rglob("*.json"))
    assert all(f.startswith("out/") for f in files)
    assert not (tmp_path / "escape.json").exists()
    threat_files = sorted(p.name for p in (tmp_path / "out" / "threat").iterdir())
    assert len(threat_files) == 2 and all(re.fullmatch(r"_[0-9a-f-]{36}\.json", n) for n in threat_files)
    assert all(n.startswith("_") for n in (p.name for p in (tmp_path / "out" / "study").iterdir()))


def test_export_refuses_a_folder_with_other_content_and_updates_its_own(
    sqlite_path: str, tmp_path: Path
) -> None:
    registry = open_registry(sqlite_path)
    try:
        build_rich_registry(registry)
        (tmp_path / "notes").mkdir()
        (tmp_path / "notes" / "mine.txt").write_text("keep me")
        with (
            registry.reading() as s,
            pytest.raises(InvalidInputError, match=r"not an ivdossier export \(mine.txt\)"),
        ):
            export_registry(s, tmp_path / "notes")
        with registry.reading() as s:
            first = export_registry(s, tmp_path / "out")
        (tmp_path / "out" / ".git").mkdir()  # version-control folders are left alone
        with registry.writing() as s:
            reg.add_program(s, actor="ana", slug="second", title="Another program")
        with registry.reading() as s:
            second = export_registry(s, tmp_path / "out")
        # Only the new program, the manifest and the audit file change: small diffs.
        assert (second.written, second.removed) == (3, 0)
        assert second.unchanged == first.written - 2
        (tmp_path / "out" / "program" / "stray.txt").write_text("x")
        with (
            registry.reading() as s,
            pytest.raises(InvalidInputError, match=r"other content \(program/stray.txt\)"),
        ):
            export_registry(s, tmp_path / "out")
        assert (tmp_path / "notes" / "mine.txt").read_text() == "keep me"
    finally:
        registry.dispose()


def _export_fresh(tmp_path: Path, name: str, build: object) -> tuple[Registry, Path]:
    registry = open_registry(str(tmp_path / f"{name}.sqlite"))
    build(registry)  # type: ignore[operator]
    with registry.reading() as s:
        export_registry(s, tmp_path / name)
    return registry, tmp_path / name


def test_changed_entities_are_conflicts_resolved_only_by_a_chosen_flag(tmp_path: Path) -> None:
    source, folder = _export_fresh(tmp_path, "src", build_rich_registry)
    target = open_registry(str(tmp_path / "target.sqlite"))
    try:
        _import(target, folder)
        with target.writing() as s:
            records.edit(s, records.get(s, Program, "tele"), {"notes": "target's notes"}, actor="cai")
        with source.writing() as s:
            records.edit(s, records.get(s, Program, "tele"), {"unit": "patient"}, actor="ana")
            reg.add_program(s, actor="ana", slug="new-one", title="New")
        with source.reading() as s:
            export_registry(s, folder)
        events_before = _count(target, AuditEvent)
        with pytest.raises(
            ConflictError,
            match=r"import refused, nothing was written: 1 conflicting entity: program 'tele' \(.*\): differs from the "
            r"registry \(registry version 2, export version 2\); rerun with --on-conflict keep-registry",
        ):
            _import(target, folder)
        assert _count(target, Program) == 1 and _count(target, AuditEvent) == events_before
        dry = _import(target, folder, dry_run=True)
        assert [c.label for c in dry.conflicts] == ["tele"] and dry.added == {"program": 1}  # type: ignore[attr-defined]
        assert _count(target, Program) == 1
        kept = _import(target, folder, on_conflict="keep-registry")
        assert kept.kept == {"program": 1} and kept.added == {"program": 1}  # type: ignore[attr-defined]
        with target.reading() as s:
            assert records.get(s, Program, "tele").notes == "target's notes"
        taken = _import(target, folder, on_conflict="take-import")
        assert taken.replaced == {"program": 1}  # type: ignore[attr-defined]
        with target.reading() as s:
            prog = records.get(s, Program, "tele")
            assert (prog.unit, prog.notes, prog.version) == ("patient", "line1\nline2", 3)
            last = s.scalars(select(AuditEvent).where(AuditEvent.action == "import")).one()
            assert last.actor == "importer" and set(last.after or {}) == {"notes", "unit"}
    finally:
        source.dispose()
        target.dispose()


def test_same_name_with_another_uuid_is_refused_even_with_a_flag(tmp_path: Path) -> None:
    source, folder = _export_fresh(tmp_path, "src", build_rich_registry)
    target = open_registry(str(tmp_path / "target.sqlite"))
    try:
        with target.writing() as s:
            reg.add_program(s, actor="cai", slug="tele", title="Someone else's program")
        for flag in ("stop", "take-import"):
            with pytest.raises(
                ConflictError, match=r"program 'tele' .*the registry has another program of this name"
            ):
                _import(target, folder, on_conflict=flag)
        assert _count(target, Program) == 1 and _count(target, Instrument) == 0
    finally:
        source.dispose()
        target.dispose()


def test_import_checks_everything_before_writing_anything(tmp_path: Path) -> None:
    source, folder = _export_fresh(tmp_path, "src", build_rich_registry)
    source.dispose()
    doc = json.loads((folder / "instrument" / "clerk.json").read_text())
    doc["program_uuid"] = "00000000-0000-4000-8000-000000000000"
    (folder / "instrument" / "clerk.json").write_text(json.dumps(doc))
    bad = json.loads((folder / "link" / "fibre--t-route.json").read_text())
    bad["state"] = "maybe"
    (folder / "link" / "fibre--t-route.json").write_text(json.dumps(bad))
    reseal(folder)
    target = open_registry(str(tmp_path / "target.sqlite"))
    try:
        with pytest.raises(
            InvalidInputError, match=r"link/fibre--t-route.json field state 'maybe' is not one of"
        ):
            read_export(folder)
        bad["state"] = "open"
        (folder / "link" / "fibre--t-route.json").write_text(json.dumps(bad))
        reseal(folder)
        with pytest.raises(
            InvalidInputError, match=r"instrument/clerk.json field program_uuid names no program"
        ):
            _import(target, folder)
        assert _count(target, Program) == 0 and _count(target, AuditEvent) == 0
    finally:
        target.dispose()


def test_cli_export_import_and_their_mistakes(cli, sqlite_path: str, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    registry = open_registry(sqlite_path)
    build_rich_registry(registry)
    registry.dispose()
    code, out, err = cli("export", str(tmp_path / "dump"))
    assert code == 0, err
    assert (
        out.startswith("exported 1 comment, 1 covariate, 2 critique, 1 dataset") and "audit events to" in out
    )
    code, out, _ = cli("--as", "ana", "import", str(tmp_path / "dump"), "--json")
    assert code == 0 and json.loads(out)["unchanged"]["instrument"] == 2
    code, _, err = cli("--as", "ana", "import", str(tmp_path))
    assert code == 2 and "has no ivdossier export manifest" in err
    code, _, err = cli("--as", "ana", "import", str(tmp_path / "dump"), "--on-conflict", "merge")
    assert (
        code == 2
        and "--on-conflict 'merge' is not known; use one of: stop, keep-registry, take-import" in err
    )


def test_cli_dry_run_reports_conflicts_and_writes_nothing(cli, sqlite_path: str, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    registry = open_registry(sqlite_path)
    build_rich_registry(registry)
    registry.dispose()
    assert cli("export", str(tmp_path / "dump"))[0] == 0
    assert cli("--as", "ana", "program", "edit", "tele", "--unit", "patient")[0] == 0
    assert cli("--as", "ana", "program", "add", "extra", "--title", "Extra")[0] == 0
    code, out, _ = cli("--as", "ana", "import", str(tmp_path / "dump"), "--dry-run")
    assert code == 0
    lines = out.splitlines()
    assert lines[0] == "would add nothing and 0 audit events"
    assert (
        lines[-1].startswith("conflict: program 'tele' (")
        and "registry version 2, export version 1" in lines[-1]
    )
    code, _, err = cli("--as", "ana", "import", str(tmp_path / "dump"))
    assert code == 4 and "import refused, nothing was written: 1 conflicting entity: program 'tele'" in err
    (tmp_path / "notes").mkdir()
    (tmp_path / "notes" / "todo.md").write_text("x")
    code, _, err = cli("export", str(tmp_path / "notes"))
    assert code == 2 and "already holds files that are not an ivdossier export (todo.md)" in err
