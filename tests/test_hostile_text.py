"""Hostile text in every field: arbitrary Unicode, control characters, markup and huge strings are either stored
exactly or refused with a clear error, and a refused write leaves the registry as it was (both backends)."""

from __future__ import annotations

import itertools
import tempfile
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import select

from ivdossier.errors import ConflictError, InvalidInputError, IvdossierError
from ivdossier.registry import comments, records
from ivdossier.registry import instruments as reg
from ivdossier.registry import threats as thr
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.models import Comment, Instrument, Link, Member, Program, Study
from ivdossier.registry.portability import SAFE_NAME_RE, export_registry, render_export

HOSTILE_SETTINGS = settings(
    max_examples=25,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
MARKUP = [
    "<script>alert(1)</script>",
    "](javascript:x)",
    "{{7*7}}",
    "'; DROP TABLE program; --",
    "\u202e",
    "\r\n",
]

# Any Unicode text (surrogates excluded: they cannot be encoded as UTF-8 at all), with control characters,
# markup fragments, and now and then a huge string around the field limits.
hostile_text = st.one_of(
    st.text(),
    st.text(alphabet=st.characters(codec="utf-8"), max_size=300),
    st.lists(st.sampled_from(MARKUP) | st.text(max_size=5), max_size=8).map("".join),
    st.tuples(
        st.sampled_from(["x", "é", "🚀", "\x07"]), st.sampled_from([63, 64, 65, 299, 300, 301, 100_001])
    ).map(lambda t: t[0] * t[1]),
)
_counter = itertools.count()


def _seeded(db: str) -> Registry:
    registry = open_registry(db)
    with registry.writing() as s:
        reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
        reg.add_member(s, actor="ana", handle="ana")
        reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre")
        thr.add_team_threat(s, actor="ana", entry={"code": "T-H", "title": "h", "condition": "exclusion"})
        thr.link_threat(s, actor="ana", instrument="fibre", code="T-H")
    return registry


def _state(registry: Registry) -> dict[str, str]:
    with registry.reading() as s:
        return render_export(s)


def _write_or_refuse(registry: Registry, work: Any) -> bool:
    """Run one write; True when it was stored, False when refused (and then nothing may have changed)."""
    before = _state(registry)
    try:
        with registry.writing() as s:
            work(s)
    except (InvalidInputError, ConflictError) as exc:
        assert str(exc).endswith(".") and "\n" not in str(exc)  # one sentence on one line
        assert _state(registry) == before
        return False
    return True


FIELD_WRITES = {
    "program.notes": (Program, "tele", "notes"),
    "program.title": (Program, "tele", "title"),
    "program.unit": (Program, "tele", "unit"),
    "instrument.claim_exclusion": (Instrument, "fibre", "claim_exclusion"),
    "instrument.name": (Instrument, "fibre", "name"),
    "link.argument": (Link, "fibre--t-h", "argument"),
    "member.name": (Member, "ana", "name"),
}


def _check_fields(registry: Registry, field: str, text: str) -> None:
    cls, label, column = FIELD_WRITES[field]
    stored = _write_or_refuse(
        registry, lambda s: records.edit(s, records.get(s, cls, label), {column: text}, actor="ana")
    )
    with registry.reading() as s:
        value = getattr(records.get(s, cls, label), column)
    if stored:
        assert value == text  # exactly what was typed, markup and control characters included
    else:
        # Refused only for a NUL, a value over the column length, or a blank where a name or title is required.
        required = field in ("instrument.name", "program.title")
        assert "\x00" in text or len(text) > 64 or (required and not text.strip())


@HOSTILE_SETTINGS
@given(field=st.sampled_from(sorted(FIELD_WRITES)), text=hostile_text)
def test_edited_text_is_stored_exactly_or_refused_on_sqlite(sqlite_path: str, field: str, text: str) -> None:
    registry = _cached(sqlite_path)
    _check_fields(registry, field, text)


@pytest.mark.postgres
@settings(HOSTILE_SETTINGS, max_examples=15)
@given(field=st.sampled_from(sorted(FIELD_WRITES)), text=hostile_text)
def test_edited_text_is_stored_exactly_or_refused_on_postgresql(
    pg_registry: Registry, field: str, text: str
) -> None:
    _check_fields(pg_registry, field, text)


_registries: dict[str, Registry] = {}


def _cached(db: str) -> Registry:
    if db not in _registries:
        _registries[db] = _seeded(db)
    return _registries[db]


@pytest.fixture(scope="module")
def pg_registry(pg_server: Any) -> Any:
    registry = _seeded(pg_server.create_database())
    yield registry
    registry.dispose()


@pytest.fixture(scope="module", autouse=True)
def _dispose_cached() -> Any:
    yield
    for registry in _registries.values():
        registry.dispose()
    _registries.clear()


@HOSTILE_SETTINGS
@given(slug=st.text(max_size=80), title=hostile_text, claim=hostile_text)
def test_new_entities_with_hostile_names_and_claims(
    sqlite_path: str, slug: str, title: str, claim: str
) -> None:
    registry = _cached(sqlite_path)
    stored = _write_or_refuse(
        registry,
        lambda s: reg.add_instrument(
            s, actor="ana", program="tele", slug=slug, name=title, claims={"exogeneity": claim}
        ),
    )
    if stored:
        assert records.SLUG_RE.match(slug)
        with registry.reading() as s:
            inst = records.get(s, Instrument, slug)
            assert (inst.name, inst.claim_exogeneity) == (title, claim)


@HOSTILE_SETTINGS
@given(body=hostile_text, actor=st.text(max_size=70))
def test_comments_with_hostile_bodies_and_actor_names(sqlite_path: str, body: str, actor: str) -> None:
    registry = _cached(sqlite_path)
    try:
        who = records.resolve_actor(actor) if actor.strip() else "ana"
    except InvalidInputError as exc:
        assert "is not a usable name; pass --as HANDLE" in str(exc)
        return
    made: list[str] = []
    stored = _write_or_refuse(
        registry, lambda s: made.append(comments.add_comment(s, actor=who, target="fibre", body=body).slug)
    )
    if stored:
        with registry.reading() as s:
            assert records.get(s, Comment, made[0]).body == body


@pytest.fixture(scope="module")
def label_registry(tmp_path_factory: pytest.TempPathFactory) -> Any:
    registry = open_registry(str(tmp_path_factory.mktemp("labels") / "r.sqlite"))
    yield registry
    registry.dispose()


@settings(HOSTILE_SETTINGS, max_examples=20)
@given(
    labels=st.lists(
        st.text(min_size=1, max_size=120).filter(lambda t: "\x00" not in t), min_size=1, max_size=4
    )
)
def test_no_label_can_steer_an_export_outside_its_folder(label_registry: Registry, labels: list[str]) -> None:
    """Labels stored around the slug checks (dots, slashes, drive letters, control text) stay inside the folder."""
    with label_registry.writing() as s:
        for label in dict.fromkeys(labels):
            if records.find(s, Study, label) is None:
                records.create(s, Study(key=label, title="hostile"), actor="ana")
        total = len(list(s.scalars(select(Study))))
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        with label_registry.reading() as s:
            export_registry(s, root / "out" / "deep")
        written = [p for p in root.rglob("*") if p.is_file()]
        for path in written:
            assert path.resolve().is_relative_to((root / "out" / "deep").resolve())
            assert (
                path.name in {"manifest.json", "audit.jsonl"}
                or SAFE_NAME_RE.match(path.stem)
                or path.stem.startswith("_")
            )
        assert len([p for p in written if p.parent.name == "study"]) == total


def test_refused_writes_name_the_field_and_the_fix(sqlite_path: str) -> None:
    registry = _cached(sqlite_path)
    with (
        pytest.raises(
            InvalidInputError, match="program unit is 201 characters long; the limit is 200; shorten it"
        ),
        registry.writing() as s,
    ):
        records.edit(s, records.get(s, Program, "tele"), {"unit": "u" * 201}, actor="ana")
    with pytest.raises(IvdossierError, match=r"slug '\.\./x' is not allowed"), registry.writing() as s:
        reg.add_instrument(s, actor="ana", program="tele", slug="../x", name="x")


def test_undecodable_command_line_bytes_are_refused_not_crashing(cli) -> None:  # type: ignore[no-untyped-def]
    # Linux hands undecodable argv bytes to Python as lone surrogates (surrogateescape), e.g. b"\xff" -> "\udcff".
    code, _, err = cli("program", "add", "tele", "--title", "caf\udcff")
    assert code == 2 and "program title contains bytes that are not UTF-8 text" in err
    assert cli("program", "list", "--json")[1].strip() == "[]"


@HOSTILE_SETTINGS
@given(label=hostile_text)
def test_figure_labels_stay_inert_text(label: str) -> None:
    """Any label reaches a figure as one escaped <text> element's content: well-formed XML, accepted by the HTML
    layer's structural check, with control/bidi/non-XML characters removed and at most 120 characters kept."""
    import re
    import xml.etree.ElementTree as ET

    from ivdossier.reports.html import clean_svg
    from ivdossier.reports.inputs import FirstStageBins
    from ivdossier.reports.plots import first_stage_svg

    svg = first_stage_svg(FirstStageBins(x_bins=(1, 2), y_bins=(3, 4), x_label=label, y_label="y"))
    clean_svg(svg, key="first-stage")
    found = [t.text or "" for t in ET.fromstring(svg).iter() if t.get("class") == "xlabel"]
    flat = label.replace("\n", " ").replace("\t", " ")  # line breaks and tabs become spaces, then
    flat = re.sub(r"[\x00-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069\ufffe\uffff]", "", flat)  # these go
    expected = flat if len(flat) <= 120 else flat[:119].rstrip() + "…"
    assert found == ([expected] if expected else [])  # nothing left to show: no element
