"""Escape user-written text so Markdown renders it as literal text, and build the few constructs we emit.

User text never reaches Markdown unescaped: every character with Markdown meaning gets a backslash, line-leading
list/heading/quote markers are neutralised, and control characters are replaced by U+FFFD. Backticks are escaped
too, so user text can never open a code span or a fence; the HTML renderer relies on that to recognise the
figure and badge markers that only this module emits.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")
_INLINE_SPECIAL = re.compile(r"([\\`*_\[\]<>&|#~])")
_LINE_LEAD = re.compile(r"^([-+=])(?=\s|$|\1)")
_ORDERED = re.compile(r"^(\d{1,9})([.)])(?=\s|$)")
FIGURE_INFO = "ivdossier-figure"
BADGE_PREFIX = "verdict:"
CHIP_PREFIX = "state:"


def clean(text: object) -> str:
    """Text with control characters (and bidi overrides) replaced by U+FFFD and tabs as spaces."""
    value = "" if text is None else str(text)
    value = value.replace("\r\n", "\n").replace("\r", "\n").replace("\t", " ")
    return _CONTROL.sub("\ufffd", value)


def _escape_line(line: str) -> str:
    line = _INLINE_SPECIAL.sub(r"\\\1", line.strip())
    line = _LINE_LEAD.sub(r"\\\1", line)
    return _ORDERED.sub(r"\1\\\2", line)


def inline(text: object) -> str:
    """Escape user text for one line (headings, list items, table cells): newlines become spaces."""
    return _escape_line(" ".join(clean(text).split()))


def cell(text: object) -> str:
    """Escape user text for a table cell (pipes included); empty text becomes an en dash."""
    value = inline(text)
    return value if value else "–"


def block(text: object) -> str:
    """Escape multi-paragraph user text; blank lines keep paragraphs, single newlines become hard breaks."""
    paragraphs = re.split(r"\n\s*\n", clean(text).strip())
    out = []
    for para in paragraphs:
        lines = [_escape_line(line) for line in para.split("\n") if line.strip()]
        if lines:
            out.append("\\\n".join(lines))
    return "\n\n".join(out)


def table(headers: Sequence[str], rows: Sequence[Sequence[str]], align: str = "") -> str:
    """A pipe table; cells must already be escaped. `align` is one letter per column: l, r or c."""
    marks = {"l": ":--", "r": "--:", "c": ":-:"}
    sep = [marks.get(align[i] if i < len(align) else "l", "---") for i in range(len(headers))]
    lines = ["| " + " | ".join(headers) + " |", "| " + " | ".join(sep) + " |"]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(lines)


def figure(key: str, caption: str) -> str:
    """A fenced marker the HTML renderer replaces by the trusted SVG `key`, followed by an escaped caption."""
    if not re.fullmatch(r"[a-z0-9][a-z0-9-]*", key):
        raise ValueError(f"figure key {key!r} must be lowercase letters, digits and dashes")
    return f"```{FIGURE_INFO}\n{key}\n```\n\n*{inline(caption)}*"


def badge(status: str) -> str:
    """An inline code marker for a verdict; rendered as a shape plus the word in HTML, readable in Markdown."""
    return f"`{BADGE_PREFIX}{status.replace(' ', '-')}`"


def chip(state: str) -> str:
    """An inline code marker for a threat-link state (a fixed word); rendered as a labelled chip in HTML."""
    return f"`{CHIP_PREFIX}{state}`"
