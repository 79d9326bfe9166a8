"""Pre-analysis plans: drafting from the registry, freezing, read-only frozen rows, and tamper detection."""

from __future__ import annotations

import json
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import text

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry import plans, records
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.models import Plan
from ivdossier.workflows import plan_check
from ivdossier.workflows import plans as drafting

FROZEN_AT = datetime(2026, 1, 31, 9, 30, 5, tzinfo=UTC)


@pytest.fixture
def reg(tmp_path: Path) -> Iterator[Registry]:
    from ivdossier.registry.instruments import add_instrument, add_program

    registry = open_registry(str(tmp_path / "r.sqlite"))
    with registry.writing() as s:
        add_program(s, actor="ana", slug="tele", title="Telehealth and ED visits", treatment="video_share",
                    outcome="ed_visits", question="Does telehealth reduce emergency visits?")  # fmt: skip
        add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre wave", family="distance-geography",
                       columns=["fibre_months"], claims={"exclusion": "Fibre reaches visits only through video."})  # fmt: skip
        add_instrument(s, actor="ana", program="tele", slug="clerk", name="Clerk propensity",
                       family="decision-maker-assignment", columns=["clerk_share"])  # fmt: skip
    yield registry
    registry.dispose()


def _draft_and_freeze(reg: Registry, target: str = "fibre", **options: Any) -> str:
    with reg.writing() as s:
        plan = drafting.draft_plan(
            s, actor="ana", target=target, controls=["age", "rural"], cluster=["district"], **options
        )
        slug = plan.slug
        drafting.freeze_plan(s, actor="bo", slug=slug, at=FROZEN_AT)
    return slug


def test_draft_collects_question_instruments_specs_and_default_rules(reg: Registry) -> None:
    with reg.writing() as s:
        plan = drafting.draft_plan(s, actor="ana", target="tele", controls=["age"], expected_n=5000)
        content = plan.content or {}
    assert plan.slug == "tele-plan" and plan.state == "draft"
    assert content["question"]["question"] == "Does telehealth reduce emergency visits?"
    assert [i["slug"] for i in content["instruments"]] == ["clerk", "fibre"]
    assert [sp["id"] for sp in content["specs"]] == ["clerk", "fibre"]
    spec = content["specs"][1]
    assert (spec["outcome"], spec["treatment"], spec["instruments"], spec["controls"], spec["vcov"]) == (
        "ed_visits", ["video_share"], ["fibre_months"], ["age"], "heteroskedastic")  # fmt: skip
    assert [r["id"] for r in content["decision_rules"]] == ["strength-gate", "effect-claim"]
    assert content["data"]["expected_n"] == 5000
    with reg.writing() as s:
        assert drafting.draft_plan(s, actor="ana", target="tele").slug == "tele-plan-2"


def test_freeze_stores_hash_time_and_author_and_the_row_becomes_read_only(reg: Registry) -> None:
    slug = _draft_and_freeze(reg)
    with reg.reading() as s:
        plan = records.get(s, Plan, slug)
        sealed = plans.sealed_document(s, plan)
    assert (plan.state, plan.frozen_by, plans.iso(plan.frozen_at)) == ("frozen", "bo", "2026-01-31T09:30:05Z")  # type: ignore[arg-type]
    assert plan.sha256 == plans.sha256_of(sealed) and len(plan.sha256) == 64
    with (
        pytest.raises(ConflictError, match=r"plan 'fibre-plan' is frozen .* cannot be changed"),
        reg.writing() as s,
    ):
        drafting.edit_plan(s, actor="ana", slug=slug, title="New title")
    # a generic audited edit (bypassing plans.edit_plan) is refused too, at flush time
    with (
        pytest.raises(ConflictError, match=r"plan 'fibre-plan' is frozen and cannot be changed"),
        reg.writing() as s,
    ):
        records.edit(s, records.get(s, Plan, slug), {"title": "Sneaky"}, actor="ana")
    with pytest.raises(ConflictError, match="frozen and cannot be deleted"), reg.writing() as s:
        records.delete(s, records.get(s, Plan, slug), actor="ana")
    with pytest.raises(ConflictError, match="is frozen"), reg.writing() as s:
        drafting.freeze_plan(s, actor="ana", slug=slug)
    with reg.reading() as s:
        report = plan_check.verify_plan(s, slug)
    assert report.intact and report.differences == ()


def test_canonical_serialisation_is_stable_and_normalises_numbers() -> None:
    # the canonical form is defined here (sorted keys, compact separators, UTF-8, integral floats as ints)
    a = {"b": [1.0, 2.5, -0.0], "a": "Müller", "c": float("inf")}
    assert plans.canonical_json(a) == '{"a":"Müller","b":[1,2.5,0],"c":"inf"}'.encode()
    assert plans.sha256_of(a) == plans.sha256_of({"c": "inf", "a": "Müller", "b": [1, 2.5, 0]})
    with pytest.raises(InvalidInputError, match=r"plan value at x\[0\] is NaN"):
        plans.canonical_json({"x": [float("nan")]})


def _leaves(value: Any, path: str = "") -> list[tuple[str, Any]]:
    if isinstance(value, dict):
        return [leaf for k, v in value.items() for leaf in _leaves(v, f"{path}.{k}" if path else k)]
    if isinstance(value, list):
        return [leaf for i, v in enumerate(value) for leaf in _leaves(v, f"{path}[{i}]")]
    return [(path, value)]


def _set(value: Any, path: str, new: Any) -> Any:
    """Copy of a JSON value with the leaf at a dotted/indexed path replaced."""
    import re

    data = json.loads(json.dumps(value))
    parts = [p for p in re.split(r"\.|(\[\d+\])", path) if p]
    node = data
    for part in parts[:-1]:
        node = node[int(part[1:-1])] if part.startswith("[") else node[part]
    last = parts[-1]
    if last.startswith("["):
        node[int(last[1:-1])] = new
    else:
        node[last] = new
    return data


def _changed(old: Any) -> Any:
    if isinstance(old, bool):
        return not old
    if isinstance(old, int | float):
        return old + 1
    if old is None:
        return "x"
    return f"{old}!"


def test_every_single_field_change_in_the_database_row_is_detected(reg: Registry) -> None:
    from ivdossier.registry.instruments import add_program

    slug = _draft_and_freeze(reg, power={"mde": 0.25, "n_required": 5000})
    with reg.writing() as s:
        other_program = add_program(s, actor="ana", slug="other", title="Another question").id
    with reg.reading() as s:
        plan = records.get(s, Plan, slug)
        content, plan_id = plan.content or {}, plan.id
    leaves = _leaves(content)
    assert len(leaves) > 40
    for path, old in leaves:
        new = _changed(old)
        with reg.engine.begin() as conn:  # raw SQL: what someone editing the database file could do
            conn.execute(text("UPDATE plan SET content = :c WHERE id = :i"),
                         {"c": json.dumps(_set(content, path, new)), "i": plan_id})  # fmt: skip
        with reg.reading() as s:
            report = plan_check.verify_plan(s, slug)
        assert not report.intact, path
        assert [(d.path, d.frozen, d.found) for d in report.differences] == [(f"content.{path}", old, new)]
    with reg.engine.begin() as conn:
        conn.execute(
            text("UPDATE plan SET content = :c WHERE id = :i"), {"c": json.dumps(content), "i": plan_id}
        )
    columns = {
        "title": ("title", "Changed title"),
        "frozen_by": ("frozen_by", "mallory"),
        "frozen_at": ("frozen_at", "2026-02-01 00:00:00.000000"),
        "program": ("program_id", None),
        "instrument": ("instrument_id", None),
        "sha256": ("sha256", "0" * 64),
    }
    for path, (column, value) in columns.items():
        with reg.engine.begin() as conn:
            old = conn.execute(text(f"SELECT {column} FROM plan WHERE id = :i"), {"i": plan_id}).scalar()
            if column == "program_id":
                value = other_program
            conn.execute(text(f"UPDATE plan SET {column} = :v WHERE id = :i"), {"v": value, "i": plan_id})
        with reg.reading() as s:
            report = plan_check.verify_plan(s, slug)
        assert not report.intact, column
        assert path in [d.path for d in report.differences], (column, report.to_dict())
        with reg.engine.begin() as conn:
            conn.execute(text(f"UPDATE plan SET {column} = :v WHERE id = :i"), {"v": old, "i": plan_id})
    with reg.reading() as s:
        assert plan_check.verify_plan(s, slug).intact


def test_every_single_field_change_in_an_exported_copy_is_detected(reg: Registry) -> None:
    slug = _draft_and_freeze(reg)
    with reg.reading() as s:
        exported = plans.export_document(s, slug)
        assert plan_check.verify_plan(s, slug, exported=exported).intact
    data = json.loads(exported)
    for path, old in _leaves(data):
        new = _changed(old)
        tampered = json.dumps(_set(data, path, new), indent=2)
        with reg.reading() as s:
            report = plan_check.verify_plan(s, slug, exported=tampered)
        assert not report.intact, path
        found = [(d.where, d.path) for d in report.differences]
        expected = path.removeprefix("sealed.")
        assert ("exported file", expected) in found, (path, found)
    with reg.reading() as s, pytest.raises(InvalidInputError, match=r"not valid JSON \(line 1, column 1"):
        plan_check.verify_plan(s, slug, exported="not json")


def test_export_and_verify_refuse_drafts(reg: Registry) -> None:
    with reg.writing() as s:
        slug = drafting.draft_plan(s, actor="ana", target="fibre").slug
    with (
        reg.reading() as s,
        pytest.raises(InvalidInputError, match="is a draft; only frozen plans can be verified"),
    ):
        plan_check.verify_plan(s, slug)
    with reg.reading() as s, pytest.raises(InvalidInputError, match="is a draft; freeze it before exporting"):
        plans.export_document(s, slug)


def test_freeze_and_verify_on_each_backend(db_url: str) -> None:
    """The same seal on SQLite and PostgreSQL: timestamps and JSON read back identically, so the hash holds."""
    from ivdossier.registry.instruments import add_instrument, add_program

    registry = open_registry(db_url)
    try:
        with registry.writing() as s:
            add_program(s, actor="ana", slug="tele", title="Telehealth", treatment="x", outcome="y")
            add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre", columns=["z"])
            drafting.draft_plan(s, actor="ana", target="fibre", power={"mde": 0.125, "se": 1 / 3})
            drafting.freeze_plan(s, actor="bo", slug="fibre-plan", at=FROZEN_AT)
        with registry.reading() as s:
            report = plan_check.verify_plan(s, "fibre-plan", exported=plans.export_document(s, "fibre-plan"))
        assert report.intact, report.to_dict()
        with pytest.raises(ConflictError, match="is frozen"), registry.writing() as s:
            drafting.edit_plan(s, actor="ana", slug="fibre-plan", sections={"deviations": "none"})
        with registry.engine.begin() as conn:
            conn.execute(text("UPDATE plan SET frozen_by = 'mallory' WHERE slug = 'fibre-plan'"))
        with registry.reading() as s:
            report = plan_check.verify_plan(s, "fibre-plan")
        # the row's author no longer matches the seal event's actor, nor the sealed document
        assert [(d.where, d.path, d.frozen, d.found) for d in report.differences] == [
            ("seal event", "actor", "bo", "mallory"),
            ("registry", "frozen_by", "bo", "mallory"),
        ]
    finally:
        registry.dispose()
