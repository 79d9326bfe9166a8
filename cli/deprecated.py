"""Old spellings of options and choices that still work for one release, with a note on stderr when used."""

from __future__ import annotations

from typing import TypeVar

import typer

from ivdossier.errors import InvalidInputError

T = TypeVar("T")


def note(old: str, new: str) -> None:
    """Tell the user that `old` is deprecated in favour of `new` (stderr, so --json output stays clean)."""
    typer.echo(f"warning: {old} is deprecated and will be removed in the next release; use {new}.", err=True)


def either(new_value: T | None, old_value: T | None, *, new: str, old: str) -> T | None:
    """The value of an option given under its new name or its deprecated old one (never both)."""
    if old_value is None:
        return new_value
    if new_value is not None:
        raise InvalidInputError(f"give {new} only; {old} is its deprecated old spelling.")
    note(old, new)
    return old_value
