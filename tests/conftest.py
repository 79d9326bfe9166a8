"""Shared fixtures: registries on SQLite and on a real PostgreSQL server, and an in-process CLI runner."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest

IN_CI = bool(os.environ.get("CI"))


@pytest.fixture(scope="session")
def pg_server() -> Iterator[object]:
    """A PostgreSQL server for the session; skipped locally when the server package is absent, fatal in CI."""
    from pgserver import find_pg_bin, start_server

    if find_pg_bin() is None:
        if IN_CI:
            pytest.fail(
                "CI must run the PostgreSQL tests, but initdb was not found (install the postgresql package)"
            )
        pytest.skip(
            "PostgreSQL server binaries not installed here (Debian package postgresql); CI runs these tests"
        )
    server = start_server()
    yield server
    server.stop()


@pytest.fixture(params=["sqlite", "postgresql"])
def db_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A fresh, empty registry location on each backend."""
    if request.param == "sqlite":
        return str(tmp_path / "registry.sqlite")
    server = request.getfixturevalue("pg_server")
    return server.create_database()  # type: ignore[attr-defined, no-any-return]


@pytest.fixture
def sqlite_path(tmp_path: Path) -> str:
    return str(tmp_path / "registry.sqlite")


@pytest.fixture
def cli(monkeypatch: pytest.MonkeyPatch, sqlite_path: str):  # type: ignore[no-untyped-def]
    """Invoke the ivdossier app in-process against a fresh SQLite registry; returns (exit_code, stdout, stderr).

    The registry file is created (schema only, as `init` would before loading the catalogue), because commands
    other than `init` and `demo` refuse a registry that does not exist.
    """
    from typer.testing import CliRunner

    from ivdossier.cli.app import app
    from ivdossier.cli.common import settings
    from ivdossier.registry.db import open_registry

    open_registry(sqlite_path, create=True).dispose()

    monkeypatch.setenv("IVDOSSIER_USER", "tester")
    monkeypatch.delenv("IVDOSSIER_DB", raising=False)
    runner = CliRunner()

    def invoke(*args: str) -> tuple[int, str, str]:
        settings.db = settings.actor = None
        settings.debug = False
        result = runner.invoke(app, ["--db", sqlite_path, *args])
        return result.exit_code, result.stdout, result.stderr

    return invoke
