"""Hostile files for every import format (export folder, BibTeX, study-statistics CSV, data files): each either
imports correctly or fails with one clear error, and a failed import leaves the registry exactly as it was."""

from __future__ import annotations

import itertools
import json
import shutil
import tempfile
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from export_tools import reseal
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.estimation.data import load_table
from ivdossier.registry import instruments as reg
from ivdossier.registry import studies
from ivdossier.registry import threats as thr
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.portability import export_registry, import_registry, read_export, render_export
from ivdossier.workflows import studies as study_work

SETTINGS = settings(
    max_examples=30,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers()
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=30),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner, max_size=3),
    max_leaves=10,
)
_counter = itertools.count()


def _state(registry: Registry) -> dict[str, str]:
    with registry.reading() as s:
        return render_export(s)


def _import_or_refuse(registry: Registry, work: Any) -> bool:
    """One import in one transaction: True if applied; if refused, the error is one line and nothing changed."""
    before = _state(registry)
    try:
        with registry.writing() as s:
            work(s)
    except (InvalidInputError, ConflictError) as exc:
        assert "\n" not in str(exc)
        assert _state(registry) == before
        return False
    return True


@pytest.fixture(scope="module")
def export_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small valid export: a program, two instruments, a member, a threat, a link and a rating."""
    root = tmp_path_factory.mktemp("template")
    registry = open_registry(str(root / "src.sqlite"))
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
            reg.add_member(s, actor="ana", handle="ana")
            reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre", columns=["z"])
            reg.add_instrument(s, actor="ana", program="tele", slug="clerk", name="Clerk")
            thr.add_team_threat(s, actor="ana", entry={"code": "T-H", "title": "h", "condition": "exclusion"})
            thr.link_threat(s, actor="ana", instrument="fibre", code="T-H")
            thr.rate_link(s, actor="ana", link="fibre--t-h", likelihood=2, severity=4)
        with registry.reading() as s:
            export_registry(s, root / "export")
    finally:
        registry.dispose()
    return root / "export"


@pytest.fixture(scope="module")
def target(tmp_path_factory: pytest.TempPathFactory) -> Any:
    registry = open_registry(str(tmp_path_factory.mktemp("target") / "t.sqlite"))
    with registry.writing() as s:  # something already there, so merges meet existing rows
        reg.add_program(s, actor="ben", slug="other", title="Other program")
    yield registry
    registry.dispose()


def _mutated_copy(template: Path, tmp: Path, file_index: int, mutation: str, payload: Any) -> Path:
    folder = tmp / "export"
    shutil.copytree(template, folder)
    files = sorted(p for p in folder.rglob("*") if p.is_file())
    victim = files[file_index % len(files)]
    if mutation == "bytes":
        victim.write_bytes(payload)
    elif mutation == "set-field" and victim.suffix == ".json":
        doc = json.loads(victim.read_text(encoding="utf-8"))
        key, value = payload
        if isinstance(doc, dict) and doc:
            doc[sorted(doc)[key % len(doc)]] = value
        victim.write_text(json.dumps(doc, ensure_ascii=False), encoding="utf-8")
    elif mutation == "drop-field" and victim.suffix == ".json":
        doc = json.loads(victim.read_text(encoding="utf-8"))
        doc.pop(sorted(doc)[payload % len(doc)], None)
        victim.write_text(json.dumps(doc), encoding="utf-8")
    elif mutation == "audit-line":
        with (folder / "audit.jsonl").open("a", encoding="utf-8") as fh:
            fh.write(payload + "\n")
    elif mutation == "extra-file":
        name, text = payload
        (folder / "instrument" / name).write_text(text, encoding="utf-8")
    if file_index % 2 == 0 and victim.name != "manifest.json":
        # half the time the forger also rewrites the manifest: the content checks must hold (a mutated manifest
        # itself cannot be resealed, it is judged as it is)
        reseal(folder)
    return folder


mutations = st.one_of(
    st.tuples(st.just("bytes"), st.binary(max_size=200)),
    st.tuples(st.just("set-field"), st.tuples(st.integers(0, 30), json_values)),
    st.tuples(st.just("drop-field"), st.integers(0, 30)),
    st.tuples(st.just("audit-line"), st.text(max_size=80).filter(lambda t: "\n" not in t and "\r" not in t)),
    st.tuples(
        st.just("extra-file"),
        st.tuples(
            st.text(
                st.characters(blacklist_characters="/\x00", codec="utf-8"), min_size=1, max_size=40
            ).filter(lambda n: n not in {".", ".."}),
            st.text(max_size=50),
        ),
    ),
)


@SETTINGS
@given(file_index=st.integers(0, 50), mutation=mutations)
def test_mutated_export_folders_import_whole_or_not_at_all(
    export_template: Path, target: Registry, file_index: int, mutation: tuple[str, Any]
) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        folder = _mutated_copy(export_template, Path(tmp), file_index, *mutation)
        applied = _import_or_refuse(
            target,
            lambda s: import_registry(s, read_export(folder), actor="ben", on_conflict="keep-registry"),
        )
        if applied:
            # Whatever was accepted reads back as a valid export of the target.
            with tempfile.TemporaryDirectory() as out, target.reading() as s:
                export_registry(s, Path(out) / "again")
                read_export(Path(out) / "again")


bib_field = st.text(st.characters(codec="utf-8", blacklist_characters="\x00"), max_size=40)


@SETTINGS
@given(
    raw=st.one_of(
        st.text(max_size=300),
        st.tuples(
            st.sampled_from(["article", "book", "misc", "weird type"]), bib_field, bib_field, bib_field
        ).map(lambda t: f"@{t[0]}{{{t[1]},\n  title = {{{t[2]}}},\n  year = {t[3]}\n}}\n"),
    )
)
def test_bibtex_text_imports_whole_or_not_at_all(target: Registry, raw: str) -> None:
    added: list[str] = []
    applied = _import_or_refuse(
        target, lambda s: added.extend(x.key for x in studies.import_bibtex(s, actor="ben", text=raw))
    )
    if applied:
        assert all(key in raw for key in added)  # only entries written in the text were added


@SETTINGS
@given(
    raw=st.one_of(
        st.text(max_size=200),
        st.lists(
            st.tuples(st.sampled_from(["hostile-key", "missing", ""]), bib_field, bib_field), max_size=4
        ).map(lambda rows: "key,estimate,se\n" + "".join(f"{k},{e},{s}\n" for k, e, s in rows)),
    )
)
def test_study_statistics_csv_imports_whole_or_not_at_all(target: Registry, raw: str) -> None:
    with target.writing() as s:
        if studies.records.find(s, studies.Study, "hostile-key") is None:
            studies.import_bibtex(
                s, actor="ben", text="@article{hostile-key,\n  title = {T},\n  year = 2020\n}\n"
            )
    _import_or_refuse(target, lambda s: study_work.import_stats_csv(s, actor="ben", text=raw))


@settings(SETTINGS, max_examples=40)
@given(suffix=st.sampled_from([".csv", ".parquet", ".dta"]), data=st.binary(max_size=400))
def test_data_files_load_or_fail_with_one_clear_error(tmp_path: Path, suffix: str, data: bytes) -> None:
    path = tmp_path / f"hostile{next(_counter)}{suffix}"
    path.write_bytes(data)
    try:
        frame = load_table(path)
    except InvalidInputError as exc:
        assert f"Cannot read {str(path)!r}" in str(exc)
    else:
        assert isinstance(frame, pd.DataFrame)


@settings(SETTINGS, max_examples=20)
@given(cells=st.lists(st.lists(st.text(max_size=12), min_size=2, max_size=2), max_size=5))
def test_csv_with_hostile_cells_round_trips_as_text(tmp_path: Path, cells: list[list[str]]) -> None:
    frame = pd.DataFrame(cells, columns=["a", "b"], dtype=object)
    path = tmp_path / f"cells{next(_counter)}.csv"
    frame.to_csv(path, index=False)
    try:
        loaded = load_table(path)
    except InvalidInputError as exc:
        assert "check that the file is a valid CSV file" in str(exc)
    else:
        assert isinstance(loaded, pd.DataFrame)


def test_export_folder_problems_are_listed_together(export_template: Path, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    shutil.copytree(export_template, folder)
    (folder / "instrument" / "fibre.json").write_text('{"uuid": 1}')
    (folder / "program" / "tele.json").write_bytes(b"\xff\xfe")
    (folder / "evil").mkdir()
    reseal(folder)
    with pytest.raises(InvalidInputError) as info:
        read_export(folder)
    message = str(info.value)
    assert "instrument/fibre.json has the wrong fields (missing " in message
    assert "program/tele.json is not UTF-8 text" in message
    assert "'evil' is not part of an export" in message
    assert message.endswith("fix these files and import again.")


def test_numbers_json_cannot_carry_are_refused(export_template: Path, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    shutil.copytree(export_template, folder)
    text = (folder / "instrument" / "fibre.json").read_text()
    (folder / "instrument" / "fibre.json").write_text(text.replace('"columns": [', '"columns": [1e400, '))
    (folder / "member" / "ana.json").write_text(
        (folder / "member" / "ana.json").read_text().replace('"name": ""', '"name": NaN')
    )
    reseal(folder)
    with pytest.raises(InvalidInputError) as info:
        read_export(folder)
    assert "instrument/fibre.json is not valid JSON (number 1e400 is too large for a float)" in str(
        info.value
    )
    assert "member/ana.json is not valid JSON (NaN is not valid JSON)" in str(info.value)


def test_lone_surrogate_escapes_are_refused(export_template: Path, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    shutil.copytree(export_template, folder)
    path = folder / "instrument" / "clerk.json"
    path.write_text(path.read_text().replace('"name": "Clerk"', '"name": "Cl\\ud800rk"'))
    reseal(folder)
    with pytest.raises(
        InvalidInputError, match=r"instrument/clerk.json field name contains text that is not UTF-8"
    ):
        read_export(folder)
