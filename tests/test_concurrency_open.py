"""Several processes opening the same brand-new registry at once all get a registry at the current schema."""

from __future__ import annotations

import multiprocessing
import time
from pathlib import Path
from typing import Any

import pytest

PROCESSES = 4


def open_at(args: tuple[str, float]) -> str:
    """Wait until the shared start time, then open (and so create) the registry; returns 'ok' or the error."""
    from ivdossier.registry.db import current_revision, open_registry

    db, start_at = args
    time.sleep(max(0.0, start_at - time.time()))
    try:
        registry = open_registry(db)
    except Exception as exc:
        return f"{type(exc).__name__}: {exc}"
    try:
        return "ok" if current_revision(registry.engine) else "no revision"
    finally:
        registry.dispose()


def _open_together(db: str) -> list[str]:
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(PROCESSES) as pool:
        start_at = time.time() + 6.0  # enough for every spawned process to import the package first
        return pool.map(open_at, [(db, start_at)] * PROCESSES)


@pytest.mark.slow
def test_simultaneous_first_opens_on_sqlite_all_succeed(tmp_path: Path) -> None:
    assert _open_together(str(tmp_path / "new.sqlite")) == ["ok"] * PROCESSES


@pytest.mark.slow
@pytest.mark.postgres
def test_simultaneous_first_opens_on_postgresql_all_succeed(pg_server: Any) -> None:
    assert _open_together(pg_server.create_database()) == ["ok"] * PROCESSES
