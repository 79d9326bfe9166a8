"""State and options shared by every command: which registry, who is acting, how to report errors."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Annotated, Any

import typer

JsonFlag = Annotated[bool, typer.Option("--json", help="Print machine-readable JSON instead of a table.")]
IfVersion = Annotated[
    int | None,
    typer.Option(
        "--if-version", help="Refuse the edit unless the entity is still at this version (optimistic lock)."
    ),
]


@dataclass
class Settings:
    db: str | None = None
    actor: str | None = None
    debug: bool = False


settings = Settings()


def actor() -> str:
    from ivdossier.registry.records import resolve_actor

    return resolve_actor(settings.actor)


def _open(*, sync: bool = True, create: bool = False) -> Any:
    """Open the chosen registry and (unless ``sync`` is off) bring its copy of the built-in catalogue up to date.

    Only `init` passes ``create``: every other command refuses a registry that does not exist yet.
    """
    from ivdossier.registry.db import open_registry
    from ivdossier.workflows.catalog_sync import sync_on_open

    reg = open_registry(settings.db, create=create)
    if sync:
        try:
            sync_on_open(reg)
        except BaseException:
            reg.dispose()
            raise
    return reg


@contextmanager
def writing(*, sync: bool = True, create: bool = False) -> Iterator[Any]:
    """A write transaction on the chosen registry; nothing is kept if the command fails.

    Every write refuses an acting handle that is not a member once the registry has members
    (`registry.instruments.check_writer`); `init` (``create``) writes only as the catalogue and is not checked.
    """
    reg = _open(sync=sync, create=create)
    try:
        with reg.writing() as session:
            if not create:
                from ivdossier.registry.instruments import check_writer

                check_writer(session, actor())
            yield session
    finally:
        reg.dispose()


@contextmanager
def reading() -> Iterator[Any]:
    reg = _open()
    try:
        with reg.reading() as session:
            yield session
    finally:
        reg.dispose()


def read_text_option(value: str | None, field: str = "text option") -> str | None:
    """Options that take long text accept @FILE to read it from a file, read with a bound (no endless files)."""
    if value is None or not value.startswith("@"):
        return value
    from ivdossier.registry.records import read_text_file

    return read_text_file(value[1:], field=field)


MAX_INPUT_FILE_BYTES = 20_000_000
"""Largest plan, receipt or exported copy a command reads (bounded: no endless or huge files read whole)."""


def read_input_file(path: Any, what: str) -> str:
    """The UTF-8 text of a file a command reads (a plan section, an exported copy, a receipt), read with a bound."""
    from ivdossier.safefiles import read_bounded_text

    return read_bounded_text(path, MAX_INPUT_FILE_BYTES, what=f"the {what}")
