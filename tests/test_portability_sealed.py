"""No import may change or unfreeze a frozen plan, imported audit events stay the other registry's history (never
this registry's seal), and imported entities meet the rules of the commands that create them."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

import pytest
from export_tools import reseal
from sqlalchemy import func, select

from ivdossier.errors import ConflictError
from ivdossier.registry import instruments as reg
from ivdossier.registry import records
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.models import AuditEvent, Plan
from ivdossier.registry.portability import export_registry, import_registry, read_export, render_export

SEALED_AT = datetime(2026, 3, 1, 9, 0, 0, tzinfo=UTC)


def _build(registry: Registry) -> None:
    """A program with a frozen plan (and the seal event freezing writes), plus a draft plan."""
    with registry.writing() as s:
        prog = reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
        plan = records.create(
            s,
            Plan(
                slug="pap",
                program_id=prog.id,
                title="Plan",
                content={"outcome": "ed_visits"},
                state="frozen",
                frozen_at=SEALED_AT,
                frozen_by="ana",
                sha256="a" * 64,
            ),
            actor="ana",
        )
        records.audit(s, actor="ana", action="sealed", obj=plan, before=None, after={"sha256": "a" * 64})
        records.create(s, Plan(slug="draft", program_id=prog.id, title="Draft"), actor="ana")


@pytest.fixture
def source(tmp_path: Path) -> Registry:
    registry = open_registry(str(tmp_path / "source.sqlite"))
    _build(registry)
    yield registry  # type: ignore[misc]
    registry.dispose()


def _export(registry: Registry, folder: Path) -> Path:
    with registry.reading() as s:
        export_registry(s, folder)
    return folder


def _edit(folder: Path, rel: str, **changes: object) -> None:
    path = folder / rel
    doc = json.loads(path.read_text())
    doc.update(changes)
    path.write_text(json.dumps(doc, indent=2, sort_keys=True) + "\n")
    reseal(folder)  # a careful forger keeps the manifest consistent


def _state(registry: Registry) -> dict[str, str]:
    with registry.reading() as s:
        return render_export(s)


@pytest.mark.parametrize(
    "changes",
    [
        {"state": "draft", "frozen_at": None, "frozen_by": "", "sha256": ""},  # unfreeze
        {"content": {"outcome": "hospital_days"}},  # change what was sealed
        {"frozen_by": "mallory"},  # forge who sealed it
    ],
)
def test_take_import_refuses_any_change_to_a_frozen_plan_naming_it(
    source: Registry, tmp_path: Path, changes: dict[str, object]
) -> None:
    folder = _export(source, tmp_path / "export")
    _edit(folder, "plan/pap.json", **changes)
    before = _state(source)
    with (
        source.writing() as s,
        pytest.raises(
            ConflictError,
            match=r"nothing was written: it would change what a frozen plan sealed: plan 'pap' .*: plan 'pap' is "
            r"frozen; an import cannot change or unfreeze it",
        ),
    ):
        import_registry(s, read_export(folder), actor="mallory", on_conflict="take-import")
    assert _state(source) == before
    with source.reading() as s:
        plan = records.get(s, Plan, "pap")
        assert (plan.state, plan.frozen_by, plan.content) == ("frozen", "ana", {"outcome": "ed_visits"})


def test_renaming_what_a_frozen_plan_names_is_refused_but_drafts_follow_the_import(
    source: Registry, tmp_path: Path
) -> None:
    folder = _export(source, tmp_path / "export")
    _edit(folder, "program/tele.json", slug="tele-renamed")
    with (
        source.writing() as s,
        pytest.raises(
            ConflictError,
            match=r"program 'tele-renamed' .*renaming it would change the sealed document of frozen plan 'pap'",
        ),
    ):
        import_registry(s, read_export(folder), actor="mallory", on_conflict="take-import")
    folder = _export(source, tmp_path / "again")
    _edit(folder, "plan/draft.json", title="Draft, revised elsewhere")
    with source.writing() as s:
        report = import_registry(s, read_export(folder), actor="ben", on_conflict="take-import")
    assert report.replaced == {"plan": 1}
    # keep-registry leaves the frozen plan alone, so it may go ahead.
    folder = _export(source, tmp_path / "third")
    _edit(folder, "plan/pap.json", state="draft")
    with source.writing() as s:
        kept = import_registry(s, read_export(folder), actor="ben", on_conflict="keep-registry")
    assert kept.kept == {"plan": 1}


def test_an_injected_seal_event_is_kept_as_imported_history_never_as_a_seal(
    source: Registry, tmp_path: Path
) -> None:
    folder = _export(source, tmp_path / "export")
    with source.reading() as s:
        plan_uuid = records.get(s, Plan, "pap").uuid
    forged = {
        "action": "sealed",
        "actor": "mallory",
        "after": {"sha256": "b" * 64},
        "at": "2026-03-02T00:00:00.000000+00:00",
        "before": None,
        "entity_kind": "plan",
        "entity_label": "pap",
        "entity_uuid": plan_uuid,
        "reason": "",
    }
    trail = folder / "audit.jsonl"
    trail.write_text(trail.read_text() + json.dumps(forged, sort_keys=True, separators=(",", ":")) + "\n")
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["audit_events"] += 1
    (folder / "manifest.json").write_text(json.dumps(manifest))
    reseal(folder)
    with source.writing() as s:
        report = import_registry(s, read_export(folder), actor="ben", on_conflict="stop")
    assert report.audit_events_added == 1  # only the forged line is new; the rest is this registry's own
    with source.reading() as s:
        seals = s.scalars(select(AuditEvent).where(AuditEvent.action == "sealed")).all()
        assert [(e.actor, e.after) for e in seals] == [("ana", {"sha256": "a" * 64})]
        kept = s.scalars(select(AuditEvent).where(AuditEvent.action == "imported:sealed")).one()
        assert kept.actor == "mallory"


def test_imported_history_is_not_duplicated_when_it_comes_back(source: Registry, tmp_path: Path) -> None:
    other = open_registry(str(tmp_path / "other.sqlite"))
    try:
        with other.writing() as s:
            import_registry(s, read_export(_export(source, tmp_path / "a")), actor="ben")
        with other.reading() as s:
            assert s.scalars(select(func.count()).where(AuditEvent.action == "sealed")).one() == 0
        with source.writing() as s:  # the source's own events come back marked, and are recognised
            report = import_registry(s, read_export(_export(other, tmp_path / "b")), actor="ana")
        assert report.audit_events_added == 0
    finally:
        other.dispose()


def _team_threat_entry() -> dict[str, object]:
    from ivdossier.threats_catalog.catalog import load_builtin

    entry = load_builtin().threats[0].to_dict()
    entry["code"] = "T-AWARE"
    return entry


def _cli_registry_with_threat(cli, tmp_path: Path) -> Path:  # type: ignore[no-untyped-def]
    entry = _team_threat_entry()
    toml = tmp_path / "t-aware.toml"
    import tomli_w

    toml.write_text(tomli_w.dumps(entry))
    assert cli("init")[0] == 0
    code, _, err = cli("threat", "new", str(toml))
    assert code == 0, err
    assert cli("export", str(tmp_path / "export"))[0] == 0
    return tmp_path / "export"


def test_take_import_of_a_threat_with_an_unknown_check_is_refused(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    folder = _cli_registry_with_threat(cli, tmp_path)
    _edit(folder, "threat/t-aware.json", checks=["placebo-outcome", "ask-a-friend"])
    code, _, err = cli("import", str(folder), "--on-conflict", "take-import")
    assert code == 2 and "names unknown check 'ask-a-friend'" in err and "nothing was written" in err
    code, out, _ = cli("threat", "show", "T-AWARE", "--json")
    assert code == 0 and "ask-a-friend" not in out


def test_a_built_in_entry_with_a_cyclic_fragment_is_refused(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    folder = _cli_registry_with_threat(cli, tmp_path)
    builtin = json.loads((folder / "threat" / "an-e01.json").read_text())
    fragment = builtin["fragment"]
    fragment["edges"] = [*fragment["edges"], ["Y", "Z"]]
    _edit(folder, "threat/an-e01.json", fragment=fragment)
    code, _, err = cli("import", str(folder), "--on-conflict", "take-import")
    assert code == 2 and "fragment makes a cycle" in err
    assert cli("site", str(tmp_path / "site"))[0] == 0  # the registry still renders


def test_an_instrument_without_a_name_is_refused_like_the_add_command(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "tele", "--title", "Telehealth")[0] == 0
    assert cli("instrument", "add", "fibre", "--program", "tele", "--name", "Fibre")[0] == 0
    assert cli("export", str(tmp_path / "export"))[0] == 0
    _edit(tmp_path / "export", "instrument/fibre.json", name="  ")
    code, _, err = cli("import", str(tmp_path / "export"), "--on-conflict", "take-import")
    assert code == 2 and "instrument/fibre.json field name: an instrument needs a name" in err
