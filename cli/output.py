"""Rendering for the terminal: aligned plain-text tables and JSON (the only two output formats)."""

from __future__ import annotations

import json
import re
from collections.abc import Mapping, Sequence
from typing import Any

import typer

from ivdossier.jsonsafe import json_safe

# Characters that can steer a terminal or disguise text: C0/C1 controls (bell, escape sequences), bidirectional
# overrides and isolates, and Unicode line separators. They are shown as escapes, never sent raw.
_BIDI = "\u061c\u200e\u200f\u202a\u202b\u202c\u202d\u202e\u2066\u2067\u2068\u2069"
_UNSAFE = re.compile(f"[\x00-\x08\x0b-\x1f\x7f-\x9f\u2028\u2029{_BIDI}]")


def _escape(match: re.Match[str]) -> str:
    code = ord(match.group(0))
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def safe_text(text: str, *, keep_newlines: bool = False) -> str:
    """Text fit for a terminal: control, bidirectional and line-separator characters shown as escapes."""
    escaped = _UNSAFE.sub(_escape, text)
    return escaped if keep_newlines else escaped.replace("\n", "\\n").replace("\t", " ")


def print_json(data: Any) -> None:
    text = json.dumps(json_safe(data), indent=2, ensure_ascii=False, sort_keys=False)
    # The same JSON value, with characters that could steer the terminal written as \\u escapes.
    typer.echo(_UNSAFE.sub(lambda m: f"\\u{ord(m.group(0)):04x}", text))


def _cell(value: Any, width: int | None) -> str:
    text = "" if value is None else str(value)
    text = safe_text(" ".join(text.split()))  # one line per row, whatever the user typed
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
        text = safe_text("" if value is None else str(value), keep_newlines=True)
        if "\n" in text or len(text) > 90:
            typer.echo(f"{key}:")
            for line in text.split("\n"):
                typer.echo(f"    {line}")
        else:
            typer.echo(f"{key.ljust(width)}  {text}")
