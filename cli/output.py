"""Rendering for the terminal: aligned plain-text tables and JSON (the only two output formats)."""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

import typer

from ivdossier.jsonsafe import json_safe


def print_json(data: Any) -> None:
    typer.echo(json.dumps(json_safe(data), indent=2, ensure_ascii=False, sort_keys=False))


def _cell(value: Any, width: int | None) -> str:
    text = "" if value is None else str(value)
    text = " ".join(text.split())  # one line per row, whatever the user typed
    if width is not None and len(text) > width:
        text = text[: width - 1] + "…"
    return text


def table(
    rows: Sequence[Mapping[str, Any]], columns: Sequence[str], *, widths: Mapping[str, int] | None = None
) -> str:
    """An aligned table: column names in capitals, a rule of dashes, then one line per row."""
    widths = widths or {}
    cells = [[_cell(r.get(c), widths.get(c)) for c in columns] for r in rows]
    heads = [c.upper().replace("_", " ") for c in columns]
    size = [max([len(h)] + [len(row[i]) for row in cells]) for i, h in enumerate(heads)]
    lines = ["  ".join(h.ljust(size[i]) for i, h in enumerate(heads)).rstrip()]
    lines.append("  ".join("-" * s for s in size))
    lines.extend("  ".join(v.ljust(size[i]) for i, v in enumerate(row)).rstrip() for row in cells)
    if not rows:
        lines.append("(none)")
    return "\n".join(lines)


def print_table(rows: Sequence[Mapping[str, Any]], columns: Sequence[str], **kw: Any) -> None:
    typer.echo(table(rows, columns, **kw))


def print_record(pairs: Sequence[tuple[str, Any]]) -> None:
    """A key/value block for `show` commands; long text wraps under its label."""
    width = max(len(k) for k, _ in pairs) if pairs else 0
    for key, value in pairs:
        text = "" if value is None else str(value)
        if "\n" in text or len(text) > 90:
            typer.echo(f"{key}:")
            for line in text.splitlines() or [""]:
                typer.echo(f"    {line}")
        else:
            typer.echo(f"{key.ljust(width)}  {text}")
