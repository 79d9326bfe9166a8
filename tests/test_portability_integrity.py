"""Export folders under attack and accident: planted links are never followed, an interrupted export leaves the
old export or the new one (never a mixture, never a leftover that blocks the next run), and import refuses a
folder whose files do not match the SHA-256 list of its manifest, naming the files."""

from __future__ import annotations

import contextlib
import io
import json
import os
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.registry import instruments as reg
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.portability import export_registry, read_export, render_export, write_export

VICTIM_TEXT = "#!/bin/sh\necho harmless\n"


@pytest.fixture
def registry(tmp_path: Path) -> Iterator[Registry]:
    registry = open_registry(str(tmp_path / "registry.sqlite"))
    with registry.writing() as s:
        reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
        reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre wave")
    yield registry
    registry.dispose()


def _export(registry: Registry, folder: Path) -> Any:
    with registry.reading() as s:
        return export_registry(s, folder)


def _render(registry: Registry) -> dict[str, str]:
    with registry.reading() as s:
        return render_export(s)


def _folder_files(folder: Path) -> dict[str, str]:
    return {
        p.relative_to(folder).as_posix(): p.read_text(encoding="utf-8")
        for p in sorted(folder.rglob("*"))
        if p.is_file() and not p.relative_to(folder).as_posix().startswith(".")
    }


def _siblings(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.parent.iterdir() if p.name != folder.name and p.name.startswith("."))


@pytest.mark.parametrize("planted", [".audit.jsonl.tmp", ".manifest.json.tmp", "program/.tele.json.tmp"])
def test_a_link_planted_in_the_export_folder_is_refused_and_its_target_untouched(
    registry: Registry, tmp_path: Path, planted: str
) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    victim = tmp_path / "victim.sh"
    victim.write_text(VICTIM_TEXT)
    (folder / planted).symlink_to(victim)
    with registry.writing() as s:  # something to write, so the export has files to replace
        reg.add_program(s, actor="ana", slug="second", title="$(touch pwned) second program")
    with pytest.raises(InvalidInputError, match=rf"other content \({planted} \(a symbolic link\)\)"):
        _export(registry, folder)
    assert victim.read_text() == VICTIM_TEXT


def test_links_in_place_of_export_files_or_folders_are_refused(registry: Registry, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    victim = tmp_path / "victim.sh"
    victim.write_text(VICTIM_TEXT)
    (folder / "audit.jsonl").unlink()
    (folder / "audit.jsonl").symlink_to(victim)
    with pytest.raises(InvalidInputError, match=r"audit.jsonl \(a symbolic link\)"):
        _export(registry, folder)
    assert victim.read_text() == VICTIM_TEXT
    (folder / "audit.jsonl").unlink()
    outside = tmp_path / "outside"
    outside.mkdir()
    shutil.rmtree(folder / "instrument")
    (folder / "instrument").symlink_to(outside)
    with pytest.raises(InvalidInputError, match=r"instrument \(a symbolic link\)"):
        _export(registry, folder)
    assert list(outside.iterdir()) == []


def test_a_new_folder_holding_only_a_hidden_link_is_not_an_export(registry: Registry, tmp_path: Path) -> None:
    folder = tmp_path / "fresh"
    folder.mkdir()
    victim = tmp_path / "victim.sh"
    victim.write_text(VICTIM_TEXT)
    (folder / ".audit.jsonl.tmp").symlink_to(victim)
    with pytest.raises(InvalidInputError, match=r"not an ivdossier export \(\.audit\.jsonl\.tmp\)"):
        _export(registry, folder)
    assert victim.read_text() == VICTIM_TEXT


def test_hidden_files_of_the_export_folder_are_checked_too(registry: Registry, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    (folder / ".secret-notes").write_text("mine")
    with pytest.raises(InvalidInputError, match=r"other content \(\.secret-notes\)"):
        _export(registry, folder)
    assert (folder / ".secret-notes").read_text() == "mine"


class Interrupted(BaseException):
    """Stands in for a signal arriving half-way (BaseException, like KeyboardInterrupt)."""


def _interrupt_after(monkeypatch: pytest.MonkeyPatch, n: int) -> Callable[[], int]:
    """Make the n-th file opened for writing (by os.open or io.open) raise Interrupted; returns a counter."""
    count = {"writes": 0}
    real_os_open, real_io_open = os.open, io.open
    write_flags = os.O_WRONLY | os.O_RDWR | os.O_CREAT

    def tick() -> None:
        count["writes"] += 1
        if count["writes"] == n:
            raise Interrupted()

    def os_open(path: Any, flags: int, *args: Any, **kw: Any) -> int:
        if flags & write_flags:
            tick()
        return real_os_open(path, flags, *args, **kw)

    def io_open(file: Any, mode: str = "r", *args: Any, **kw: Any) -> Any:
        if any(c in mode for c in "wax+"):
            tick()
        return real_io_open(file, mode, *args, **kw)

    monkeypatch.setattr(os, "open", os_open)
    monkeypatch.setattr(io, "open", io_open)
    return lambda: count["writes"]


def test_an_interrupted_export_leaves_the_old_export_or_the_new_one(
    registry: Registry, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    old = _render(registry)
    with registry.writing() as s:
        reg.add_program(s, actor="ana", slug="second", title="Second")
        reg.add_instrument(s, actor="ana", program="second", slug="mast", name="Mast distance")
    new = _render(registry)
    assert old != new
    for n in range(1, 12):
        with monkeypatch.context() as patch:
            _interrupt_after(patch, n)
            with contextlib.suppress(Interrupted):
                _export(registry, folder)
        found = _folder_files(folder)
        assert found in (old, new), f"interrupted at write {n}: a mixture of two exports"
        read_export(folder)  # whatever is there is a complete, importable export
        _export(registry, folder)  # and no leftover blocks the next export
        assert _folder_files(folder) == new and _siblings(folder) == []
        shutil.rmtree(folder)
        write_export(old, folder)  # back to the old export for the next round


def test_a_staging_folder_left_by_a_killed_export_is_cleaned_by_the_next(
    registry: Registry, tmp_path: Path
) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    stale = tmp_path / ".export.ivdossier-staging-k1ll3d"  # as a process killed half-way leaves it
    (stale / "program").mkdir(parents=True)
    (stale / "program" / "tele.json").write_text("{half")
    summary = _export(registry, folder)
    assert summary.written == 0 and _siblings(folder) == []


def test_version_control_entries_survive_every_export(registry: Registry, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    (folder / ".git").mkdir()
    (folder / ".git" / "HEAD").write_text("ref: refs/heads/main\n")
    (folder / ".gitignore").write_text("*.swp\n")
    with registry.writing() as s:
        reg.add_program(s, actor="ana", slug="second", title="Second")
    summary = _export(registry, folder)
    assert (summary.written, summary.removed) == (3, 0)  # the new program, the manifest and the audit trail
    assert (folder / ".git" / "HEAD").read_text() == "ref: refs/heads/main\n"
    assert (folder / ".gitignore").read_text() == "*.swp\n"


def _two_exports(registry: Registry, tmp_path: Path) -> tuple[Path, Path]:
    first = tmp_path / "first"
    _export(registry, first)
    with registry.writing() as s:
        inst = reg.records.get(s, reg.Instrument, "fibre")
        reg.records.edit(s, inst, {"name": "Fibre wave (revised)"}, actor="ana")
        reg.add_program(s, actor="ana", slug="second", title="Second")
    second = tmp_path / "second"
    _export(registry, second)
    return first, second


def test_import_refuses_a_folder_mixing_two_exports_and_names_the_files(
    registry: Registry, tmp_path: Path
) -> None:
    first, second = _two_exports(registry, tmp_path)
    mixed = tmp_path / "mixed"
    shutil.copytree(second, mixed)
    shutil.copy(first / "instrument" / "fibre.json", mixed / "instrument" / "fibre.json")
    with pytest.raises(
        InvalidInputError,
        match=r"1 file differ from the SHA-256 the manifest records \(edited, or mixed from another export\): "
        r"instrument/fibre.json",
    ):
        read_export(mixed)
    # An old manifest over new files: every changed file is named, and the extra one too.
    shutil.copy(first / "manifest.json", mixed / "manifest.json")
    shutil.copy(second / "instrument" / "fibre.json", mixed / "instrument" / "fibre.json")
    with pytest.raises(InvalidInputError, match=r"audit.jsonl, instrument/fibre.json") as info:
        read_export(mixed)
    assert "1 file are not listed in the manifest: program/second.json" in str(info.value)


def test_import_refuses_links_and_missing_files(registry: Registry, tmp_path: Path) -> None:
    folder = tmp_path / "export"
    _export(registry, folder)
    outside = tmp_path / "outside.json"
    shutil.copy(folder / "program" / "tele.json", outside)
    (folder / "program" / "tele.json").unlink()
    (folder / "program" / "tele.json").symlink_to(outside)
    (folder / "instrument" / "fibre.json").unlink()
    with pytest.raises(InvalidInputError) as info:
        read_export(folder)
    message = str(info.value)
    assert "program/tele.json is a symbolic link; an export holds plain files only" in message
    assert "are listed in the manifest but missing: instrument/fibre.json, program/tele.json" in message


def test_the_manifest_lists_every_file_with_its_sha256(registry: Registry, tmp_path: Path) -> None:
    import hashlib

    folder = tmp_path / "export"
    _export(registry, folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    on_disk = {
        p.relative_to(folder).as_posix(): hashlib.sha256(
            p.read_bytes()
        ).hexdigest()  # hashlib as the reference
        for p in folder.rglob("*")
        if p.is_file() and p.name != "manifest.json"
    }
    assert manifest["files"] == on_disk and manifest["format_version"] == 2


def test_two_registries_that_each_loaded_the_catalogue_exchange_exports(tmp_path: Path) -> None:
    """Each registry loads the built-in catalogue under its own UUIDs; import matches built-ins by code."""
    from sqlalchemy import select

    from ivdossier.registry import threats as thr
    from ivdossier.registry.models import Link, Threat
    from ivdossier.registry.portability import import_registry
    from ivdossier.workflows.catalog_sync import ensure_builtin

    a, b = (open_registry(str(tmp_path / f"{n}.sqlite")) for n in ("a", "b"))
    try:
        for registry in (a, b):
            with registry.writing() as s:
                ensure_builtin(s, actor="ana")
        with a.writing() as s:
            reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
            reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre wave")
            code = s.scalars(select(Threat.code).order_by(Threat.code)).first()
            thr.link_threat(s, actor="ana", instrument="fibre", code=code)
        _export(a, tmp_path / "from-a")
        with b.writing() as s:
            report = import_registry(s, read_export(tmp_path / "from-a"), actor="ben")
        assert report.conflicts == () and report.added == {"instrument": 1, "link": 1, "program": 1}
        with b.reading() as s:
            link = s.scalars(select(Link)).one()
            threat = s.get(Threat, link.threat_id)
            assert threat is not None and threat.code == code and threat.origin == "builtin"
        _export(b, tmp_path / "from-b")
        with a.writing() as s:  # and back: everything is recognised as identical
            back = import_registry(s, read_export(tmp_path / "from-b"), actor="ana")
        assert back.added == {} and back.conflicts == ()
    finally:
        a.dispose()
        b.dispose()
