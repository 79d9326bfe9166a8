"""Registry hygiene: only `init` and `demo` create a registry; non-members may not write once there are members."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest
from typer.testing import CliRunner

from ivdossier.errors import NotFoundError
from ivdossier.registry.db import open_registry


def _run(monkeypatch: pytest.MonkeyPatch, db: str, *args: str, user: str = "tester") -> tuple[int, str, str]:
    from ivdossier.cli.app import app
    from ivdossier.cli.common import settings

    monkeypatch.setenv("IVDOSSIER_USER", user)
    monkeypatch.delenv("IVDOSSIER_DB", raising=False)
    settings.db = settings.actor = None
    settings.debug = False
    result = CliRunner().invoke(app, ["--db", db, *args])
    return result.exit_code, result.stdout, result.stderr


@pytest.mark.parametrize(
    "args",
    [
        ("program", "list"),
        ("program", "add", "tele", "--title", "Telehealth"),
        ("threat", "list"),
        ("history",),
        ("export", "OUT"),
    ],
)
def test_a_mistyped_db_path_is_refused_and_nothing_is_created(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path, args: tuple[str, ...]
) -> None:
    typo = tmp_path / "regsitry.sqlite"
    args = tuple(str(tmp_path / "out") if a == "OUT" else a for a in args)
    code, out, err = _run(monkeypatch, str(typo), *args)
    assert code == 3 and out == ""
    assert err == (
        f"error: no registry at {str(typo)!r}: the file does not exist; check --db (or $IVDOSSIER_DB), "
        f"or create a registry there with `ivdossier --db {typo} init`.\n"
    )
    assert not typo.exists() and not (tmp_path / "out").exists()


def test_init_creates_the_registry_and_then_other_commands_use_it(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    db = str(tmp_path / "registry.sqlite")
    code, out, _ = _run(monkeypatch, db, "init")
    assert code == 0 and out.startswith("registry ready at")
    assert _run(monkeypatch, db, "program", "add", "tele", "--title", "Telehealth")[0] == 0
    code, out, _ = _run(monkeypatch, db, "program", "list", "--json")
    assert [p["slug"] for p in json.loads(out)] == ["tele"]


def test_an_empty_sqlite_file_is_not_taken_for_a_registry(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    empty = tmp_path / "empty.sqlite"
    empty.write_bytes(b"")
    code, _, err = _run(monkeypatch, str(empty), "program", "list")
    assert code == 3 and f"the file {str(empty)!r} holds no ivdossier registry" in err
    with sqlite3.connect(empty) as conn:  # no schema written into it
        assert conn.execute("SELECT count(*) FROM sqlite_master").fetchone() == (0,)


def test_the_library_refuses_a_missing_registry_only_when_asked(tmp_path: Path) -> None:
    with pytest.raises(NotFoundError, match="the file does not exist"):
        open_registry(str(tmp_path / "missing.sqlite"), create=False)
    open_registry(str(tmp_path / "new.sqlite")).dispose()  # a notebook caller creates by default
    open_registry(str(tmp_path / "new.sqlite"), create=False).dispose()


def test_an_uninitialised_postgresql_database_is_refused(pg_server: object) -> None:
    url = pg_server.create_database()  # type: ignore[attr-defined]
    with pytest.raises(NotFoundError, match="holds no ivdossier registry"):
        open_registry(url, create=False)
    open_registry(url).dispose()
    open_registry(url, create=False).dispose()


def test_anyone_writes_until_the_first_member_then_only_members(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    db = str(tmp_path / "registry.sqlite")
    assert _run(monkeypatch, db, "init")[0] == 0
    assert _run(monkeypatch, db, "program", "add", "tele", "--title", "Telehealth", user="anyone")[0] == 0
    assert _run(monkeypatch, db, "member", "add", "ana", user="anyone")[0] == 0
    refusal = (
        "error: 'anyone' is not a member of this registry (members: ana), so it may not write; act as a member "
        "with --as HANDLE, or have a member add you: `ivdossier --as ana member add anyone`.\n"
    )
    # Every kind of write is refused the same way, by --as, $IVDOSSIER_USER or the OS user alike.
    for args in (
        ("program", "add", "other", "--title", "Other"),
        ("program", "edit", "tele", "--unit", "patient"),
        ("member", "add", "anyone"),
        ("comment", "add", "tele", "a note"),
        ("graph", "covariate", "tele", "age"),
    ):
        code, out, err = _run(monkeypatch, db, *args, user="anyone")
        assert (code, out, err) == (2, "", refusal), args
        code, _, err = _run(monkeypatch, db, "--as", "anyone", *args, user="ana")
        assert (code, err) == (2, refusal), args
    # Reading stays open to everyone; nothing the refused writes tried is in the audit trail.
    code, out, _ = _run(monkeypatch, db, "history", "--json", user="anyone")
    assert code == 0
    assert {e["actor"] for e in json.loads(out)} == {"anyone", "ivdossier-catalogue"}
    # The fix the message names works.
    assert _run(monkeypatch, db, "--as", "ana", "member", "add", "anyone")[0] == 0
    assert _run(monkeypatch, db, "program", "edit", "tele", "--unit", "patient", user="anyone")[0] == 0
