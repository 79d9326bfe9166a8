"""A plan's seal is one audit event recorded by this registry; deleting, repeating, importing or altering it fails
verification, and the seal receipt kept outside the registry tells which side changed."""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import select, text

from ivdossier.errors import InvalidInputError
from ivdossier.registry import plans, records
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.models import AuditEvent, Plan
from ivdossier.workflows import plan_check
from ivdossier.workflows import plans as drafting

FROZEN_AT = datetime(2026, 1, 31, 9, 30, 5, tzinfo=UTC)


@pytest.fixture
def reg(tmp_path: Path) -> Iterator[Registry]:
    from ivdossier.registry.instruments import add_instrument, add_program

    registry = open_registry(str(tmp_path / "r.sqlite"))
    with registry.writing() as s:
        add_program(s, actor="ana", slug="tele", title="Telehealth and ED visits", treatment="video_share",
                    outcome="ed_visits")  # fmt: skip
        add_instrument(
            s, actor="ana", program="tele", slug="fibre", name="Fibre wave", columns=["fibre_months"]
        )
        plan = drafting.draft_plan(s, actor="ana", target="fibre", controls=["age"])
        drafting.freeze_plan(s, actor="bo", slug=plan.slug, at=FROZEN_AT)
    yield registry
    registry.dispose()


def _verify(reg: Registry, **kw: Any) -> plan_check.VerifyReport:
    with reg.reading() as s:
        return plan_check.verify_plan(s, "fibre-plan", **kw)


def _sql(reg: Registry, statement: str, **params: Any) -> None:
    """Raw SQL: what someone with write access to the database file (or an unguarded import) could do."""
    with reg.engine.begin() as conn:
        conn.execute(text(statement), params)


SEAL = "action = 'sealed' AND entity_kind = 'plan'"


def test_freeze_records_exactly_one_seal_event_carrying_the_rows_actor_time_and_hash(reg: Registry) -> None:
    with reg.reading() as s:
        plan = records.get(s, Plan, "fibre-plan")
        events = plans.seal_events(s, plan)
        assert len(events) == 1
        event = events[0]
        assert (event.actor, plans.iso(event.at)) == ("bo", "2026-01-31T09:30:05Z")
        assert event.after is not None and event.after["sha256"] == plan.sha256
        assert plans.is_own_seal(event, plan)
    assert _verify(reg).intact


def test_deleting_the_seal_event_fails_verification(reg: Registry) -> None:
    _sql(reg, f"DELETE FROM audit_event WHERE {SEAL}")
    report = _verify(reg)
    assert not report.intact
    assert (
        report.headline == "the seal event is missing from the audit trail; a plan frozen here always has one"
    )


def test_a_second_seal_event_fails_verification(reg: Registry) -> None:
    _sql(reg, "INSERT INTO audit_event (at, actor, action, entity_kind, entity_uuid, entity_label, before, after, "
              f"reason) SELECT at, actor, action, entity_kind, entity_uuid, entity_label, before, after, reason "
              f"FROM audit_event WHERE {SEAL}")  # fmt: skip
    report = _verify(reg)
    assert not report.intact
    assert report.problems[0].startswith(
        "the audit trail holds 2 seal events for the plan (bo at 2026-01-31T09:30:05Z"
    )


@pytest.mark.parametrize(
    ("column", "value", "expected"),
    [
        ("actor", "mallory", ("actor", "mallory", "bo")),
        ("at", "2026-02-01 00:00:00.000000", ("time", "2026-02-01T00:00:00Z", "2026-01-31T09:30:05Z")),
        ("at", "2026-01-31 09:30:04.000000", ("time", "2026-01-31T09:30:04Z", "2026-01-31T09:30:05Z")),
    ],
)
def test_a_seal_event_whose_actor_or_time_disagrees_with_the_row_fails(
    reg: Registry, column: str, value: str, expected: tuple[str, str, str]
) -> None:
    _sql(reg, f"UPDATE audit_event SET {column} = :v WHERE {SEAL}", v=value)
    report = _verify(reg)
    assert not report.intact
    assert report.problems == (f"the seal event disagrees with the plan row ({expected[0]})",)
    assert [(d.where, d.path, d.frozen, d.found) for d in report.differences] == [("seal event", *expected)]


def test_a_seal_event_whose_hash_disagrees_with_the_row_fails(reg: Registry) -> None:
    with reg.reading() as s:
        event = s.scalars(select(AuditEvent).where(AuditEvent.action == "sealed")).one()
        after, sha = dict(event.after or {}), records.get(s, Plan, "fibre-plan").sha256
    _sql(reg, f"UPDATE audit_event SET after = :a WHERE {SEAL}", a=json.dumps({**after, "sha256": "f" * 64}))
    report = _verify(reg)
    assert not report.intact
    assert [(d.where, d.path, d.frozen, d.found) for d in report.differences] == [
        ("seal event", "sha256", "f" * 64, sha)
    ]


def test_an_imported_seal_event_never_counts_as_this_registrys_seal(reg: Registry) -> None:
    # the mark the import gives another registry's events (an action prefix) ...
    _sql(reg, f"UPDATE audit_event SET action = 'imported:sealed' WHERE {SEAL}")
    report = _verify(reg)
    assert not report.intact
    assert report.headline.startswith(
        "this registry holds no seal event of its own for the plan (the only one came from an import)"
    )
    assert report.notes[0].startswith(
        "a seal event imported from another registry (bo, 2026-01-31T09:30:05Z)"
    )
    # ... or a marker inside the event
    _sql(reg, "UPDATE audit_event SET action = 'sealed' WHERE action = 'imported:sealed'")
    assert _verify(reg).intact
    with reg.reading() as s:
        event = s.scalars(select(AuditEvent).where(AuditEvent.action == "sealed")).one()
        after = dict(event.after or {})
    _sql(reg, f"UPDATE audit_event SET after = :a WHERE {SEAL}", a=json.dumps({**after, "origin": "lab-b"}))
    assert not _verify(reg).intact


def test_a_forged_seal_event_with_another_actor_and_time_fails(reg: Registry) -> None:
    # an injected `sealed` line (as an unguarded import wrote them) naming another actor and an earlier time
    _sql(reg, "INSERT INTO audit_event (at, actor, action, entity_kind, entity_uuid, entity_label, before, after, "
              "reason) SELECT '2025-12-01 08:00:00.000000', 'mallory', action, entity_kind, entity_uuid, entity_label, "
              f"before, after, reason FROM audit_event WHERE {SEAL}")  # fmt: skip
    _sql(reg, f"DELETE FROM audit_event WHERE {SEAL} AND actor = 'bo'")
    report = _verify(reg)
    assert not report.intact
    assert report.problems == ("the seal event disagrees with the plan row (actor, time)",)


def _event(**kw: Any) -> AuditEvent:
    base: dict[str, Any] = {"actor": "bo", "action": "sealed", "entity_kind": "plan", "entity_uuid": "u-1",
                            "at": FROZEN_AT, "after": {"sha256": "a" * 64, "sealed": {}}}  # fmt: skip
    return AuditEvent(**{**base, **kw})


def test_is_own_seal_reads_the_import_marks_and_the_plan_row() -> None:
    plan = Plan(uuid="u-1", slug="p", program_id=1, state="frozen", frozen_at=FROZEN_AT, frozen_by="bo",
                sha256="a" * 64)  # fmt: skip
    assert plans.is_own_seal(_event()) and plans.is_own_seal(_event(), plan)
    assert not plans.is_own_seal(_event(action="imported:sealed"))
    assert not plans.is_own_seal(_event(action="edit"))
    assert not plans.is_own_seal(_event(after={"sha256": "a" * 64, "imported": True}))
    assert not plans.is_own_seal(_event(after={"sha256": "a" * 64, "origin": "lab-b"}))
    assert plans.is_own_seal(_event(after={"sha256": "a" * 64, "origin": "local"}), plan)
    assert not plans.is_own_seal(_event(actor="mallory"), plan)
    assert not plans.is_own_seal(_event(entity_uuid="u-2"), plan)
    assert not plans.is_own_seal(_event(after={"sha256": "b" * 64}), plan)
    # seals recorded before the event took the row's time were stamped a moment after it
    assert plans.is_own_seal(_event(at=FROZEN_AT + timedelta(milliseconds=700)), plan)
    assert not plans.is_own_seal(_event(at=FROZEN_AT + timedelta(hours=1)), plan)
    assert not plans.is_own_seal(_event(at=FROZEN_AT - timedelta(seconds=1)), plan)


# ---------------------------------------------------------------- the seal receipt


def _receipt(reg: Registry) -> dict[str, Any]:
    with reg.reading() as s:
        return json.loads(plans.receipt_text(plans.seal_receipt(s, records.get(s, Plan, "fibre-plan"))))


def test_the_receipt_holds_the_canonical_bytes_their_hash_and_the_plan_identity(reg: Registry) -> None:
    receipt = _receipt(reg)
    with reg.reading() as s:
        plan = records.get(s, Plan, "fibre-plan")
        sealed = plans.sealed_document(s, plan)
        uuid, sha = plan.uuid, plan.sha256
    # hashlib over the receipt's own text, independent of the registry's canonicaliser
    assert hashlib.sha256(receipt["canonical"].encode("utf-8")).hexdigest() == receipt["sha256"] == sha
    assert json.loads(receipt["canonical"]) == sealed
    assert (receipt["format"], receipt["plan"], receipt["plan_uuid"]) == (
        "ivdossier-seal-receipt/1",
        "fibre-plan",
        uuid,
    )
    assert (receipt["sealed_at"], receipt["sealed_by"], receipt["program"], receipt["instrument"]) == (
        "2026-01-31T09:30:05Z", "bo", "tele", "fibre")  # fmt: skip
    assert receipt["tool"].startswith("ivdossier ")
    assert _verify(reg, receipt=json.dumps(receipt)).receipt == "agree"


def test_a_changed_registry_is_named_as_the_side_that_changed(reg: Registry) -> None:
    receipt = json.dumps(_receipt(reg))
    _sql(reg, "UPDATE plan SET title = 'Rewritten title' WHERE slug = 'fibre-plan'")
    report = _verify(reg, receipt=receipt)
    assert (report.intact, report.receipt) == (False, "registry changed")
    assert report.headline == "the registry has changed since the receipt was written"
    assert ("registry", "title", "Pre-analysis plan: Telehealth and ED visits", "Rewritten title") in [
        (d.where, d.path, d.frozen, d.found) for d in report.differences
    ]


def test_a_changed_receipt_is_named_as_the_side_that_changed(reg: Registry) -> None:
    receipt = _receipt(reg)
    doc = json.loads(receipt["canonical"])
    doc["title"] = "Edited in the file"
    edited = {**receipt, "canonical": plans.canonical_json(doc).decode("utf-8")}
    report = _verify(reg, receipt=json.dumps(edited))
    assert (report.intact, report.receipt) == (False, "receipt changed")
    found = [(d.where, d.path) for d in report.differences]
    assert ("receipt", "sha256") in found and ("receipt", "title") in found
    # only the hash line edited: the canonical text still matches the registry
    report = _verify(reg, receipt=json.dumps({**receipt, "sha256": "0" * 64}))
    assert report.receipt == "receipt changed"
    # both sides edited differently: neither can be trusted
    _sql(reg, "UPDATE plan SET title = 'Rewritten title' WHERE slug = 'fibre-plan'")
    assert _verify(reg, receipt=json.dumps(edited)).receipt == "both changed"


def test_a_receipt_rewritten_with_a_fresh_hash_looks_like_a_registry_change(reg: Registry) -> None:
    """The limit of a receipt: whoever holds the file can rewrite it consistently. Only a copy kept where nobody
    can change it unnoticed (a commit, a deposit) settles which side is right."""
    receipt = _receipt(reg)
    doc = json.loads(receipt["canonical"])
    doc["title"] = "Edited in the file"
    canonical = plans.canonical_json(doc).decode("utf-8")
    forged = {**receipt, "canonical": canonical, "sha256": hashlib.sha256(canonical.encode()).hexdigest()}
    assert _verify(reg, receipt=json.dumps(forged)).receipt == "registry changed"


def test_a_receipt_of_another_plan_or_no_receipt_at_all_is_one_clear_error(reg: Registry) -> None:
    receipt = _receipt(reg)
    other = {**receipt, "plan": "clerk-plan", "plan_uuid": "0" * 36}
    with pytest.raises(InvalidInputError, match=r"the receipt is for plan 'clerk-plan', not 'fibre-plan'"):
        _verify(reg, receipt=json.dumps(other))
    with pytest.raises(
        InvalidInputError, match=r"the file is not a seal receipt \(format ivdossier-seal-receipt/1\)"
    ):
        _verify(reg, receipt=json.dumps({"format": "something-else"}))
    with pytest.raises(InvalidInputError, match=r"the receipt is not valid JSON \(line 1, column 1"):
        _verify(reg, receipt="not json")
    with reg.writing() as s:
        drafting.draft_plan(s, actor="ana", target="fibre", slug="second")
    with (
        reg.reading() as s,
        pytest.raises(InvalidInputError, match="is a draft; freeze it before writing a seal"),
    ):
        plans.seal_receipt(s, records.get(s, Plan, "second"))
