"""Escape user-written text so Markdown renders it as literal text, and build the few constructs we emit.

User text never reaches Markdown unescaped: every character that could start markup gets a backslash, line-leading
list/heading/quote markers are neutralised, and control characters are replaced by U+FFFD. Characters that cannot
start markup where they stand are left alone (an underscore inside a word, ``>`` after the start of a line, ``&``
that does not begin an entity), so the Markdown source reads cleanly on a code-hosting site. Backticks are always
escaped, so user text can never open a code span or a fence; the HTML renderer relies on that to recognise the
figure and badge markers that only this module emits.

Two flavours of the same document: read as a Markdown file (the default), a verdict is a plain-text glyph and its
word and a figure is an image link to an SVG file in a folder beside the document; rendered to HTML
(:func:`for_html`), verdicts, link states and figures are reserved markers the HTML renderer replaces by shapes
and inlined SVG.
"""

from __future__ import annotations

import contextlib
import re
from collections.abc import Iterator, Sequence
from contextvars import ContextVar
from functools import lru_cache
from urllib.parse import quote

_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")
# Always escaped: backslash, backtick, emphasis star, opening bracket, '<' (raw HTML, autolinks), pipe (tables),
# tilde (strikethrough) and '$' (maths on code-hosting sites). The rest only where they can start markup.
_ALWAYS = re.compile(r"([\\`*\[<|~$])")
_UNDERSCORE = re.compile(r"_")
_ENTITY = re.compile(r"&(?=#[0-9]{1,7};|#[xX][0-9a-fA-F]{1,6};|[A-Za-z][A-Za-z0-9]{1,31};)")
_LINE_LEAD = re.compile(r"^([-+=>#])(?=\s|$|\1)|^([>#])")
_ORDERED = re.compile(r"^(\d{1,9})([.)])(?=\s|$)")
FIGURE_INFO = "ivdossier-figure"
BADGE_PREFIX = "verdict:"
CHIP_PREFIX = "state:"
#: The plain-text glyph written before each verdict word in a Markdown file: the same shapes the HTML badges
#: draw (a filled circle, a triangle, a square, a dotted ring), so the word and the shape say the same thing.
VERDICT_GLYPHS = {"holds": "●", "at risk": "▲", "broken": "■", "not assessed": "◌"}
GLYPH_LEGEND = "Verdicts: ● holds · ▲ at risk · ■ broken · ◌ not assessed."

_HTML: ContextVar[bool] = ContextVar("ivdossier_markdown_for_html", default=False)
_FIGURE_DIR: ContextVar[str] = ContextVar("ivdossier_markdown_figure_dir", default="figures")


@contextlib.contextmanager
def for_html() -> Iterator[None]:
    """Within this block, documents are generated for the HTML renderer (reserved badge and figure markers)."""
    token = _HTML.set(True)
    try:
        yield
    finally:
        _HTML.reset(token)


@contextlib.contextmanager
def figures_in(folder: str) -> Iterator[None]:
    """Within this block, Markdown figures link to ``folder/<key>.svg`` (a path relative to the document)."""
    token = _FIGURE_DIR.set(folder)
    try:
        yield
    finally:
        _FIGURE_DIR.reset(token)


def html_target() -> bool:
    """True while a document is generated for the HTML renderer (see :func:`for_html`)."""
    return _HTML.get()


def figure_file(key: str) -> str:
    """The file name of figure `key` in a Markdown document's figure folder."""
    return f"{key}.svg"


def clean(text: object) -> str:
    """Text with control characters (and bidi overrides) replaced by U+FFFD and tabs as spaces."""
    value = "" if text is None else str(text)
    value = value.replace("\r\n", "\n").replace("\r", "\n").replace("\t", " ")
    return _CONTROL.sub("\ufffd", value)


def _underscore(match: re.Match[str]) -> str:
    """An underscore between two letters or digits cannot open or close emphasis; any other one is escaped."""
    text, i = match.string, match.start()
    inside_word = 0 < i < len(text) - 1 and text[i - 1].isalnum() and text[i + 1].isalnum()
    return "_" if inside_word else "\\_"


def _escape_span(text: str, *, line_start: bool) -> str:
    text = _ALWAYS.sub(r"\\\1", text)
    text = _UNDERSCORE.sub(_underscore, text)
    text = _ENTITY.sub(r"\\&", text)
    if not line_start:
        return text
    text = _LINE_LEAD.sub(lambda m: "\\" + (m.group(1) or m.group(2)), text)
    return _ORDERED.sub(r"\1\\\2", text)


def _escape_line(line: str) -> str:
    return _escape_span(line.strip(), line_start=True)


def inline(text: object) -> str:
    """Escape user text for one line (headings, list items, table cells): newlines become spaces."""
    if type(text) is str:
        return _inline_str(text)
    return _escape_line(" ".join(clean(text).split()))


@lru_cache(maxsize=65536)
def _inline_str(text: str) -> str:
    """`inline` of a string, remembered: documents repeat the same names, codes and dates many times."""
    return _escape_line(" ".join(clean(text).split()))


_COMMAND = re.compile(r"`([A-Za-z0-9][A-Za-z0-9 ._/-]*)`")


def inline_with_commands(text: object) -> str:
    """Like `inline`, for generated sentences that quote a command in backticks (``run `ivdossier estimate` ``):
    a quoted run of letters, digits, spaces and ``._/-`` becomes a code span; everything else is escaped.
    Verdict and state markers contain a colon, so text can never forge them this way."""
    value = " ".join(clean(text).split())
    out, pos = [], 0
    for match in _COMMAND.finditer(value):
        out.append(_escape_span(value[pos : match.start()], line_start=pos == 0))
        out.append(f"`{match.group(1)}`")
        pos = match.end()
    out.append(_escape_span(value[pos:], line_start=pos == 0))
    return "".join(out)


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
    """A figure and its escaped caption.

    In a Markdown file: an image linking to ``<figure folder>/<key>.svg``. For HTML: a fenced marker the renderer
    replaces by the trusted SVG `key`.
    """
    if not re.fullmatch(r"[a-z0-9][a-z0-9-]*", key):
        raise ValueError(f"figure key {key!r} must be lowercase letters, digits and dashes")
    if _HTML.get():
        return f"```{FIGURE_INFO}\n{key}\n```\n\n*{inline(caption)}*"
    target = quote(f"{_FIGURE_DIR.get()}/{figure_file(key)}")
    return f"![{inline(caption).replace(']', chr(92) + ']')}]({target})\n\n*{inline(caption)}*"


def badge(status: str) -> str:
    """A verdict: in a Markdown file its glyph and word (``▲ at risk``); for HTML a marker drawn as a shape."""
    if _HTML.get():
        return f"`{BADGE_PREFIX}{status.replace(' ', '-')}`"
    glyph = VERDICT_GLYPHS.get(status)
    return f"{glyph} {status}" if glyph else inline(status)


def chip(state: str) -> str:
    """A threat-link state (a fixed word): bold in a Markdown file, a labelled chip in HTML."""
    if _HTML.get():
        return f"`{CHIP_PREFIX}{state}`"
    return f"**{inline(state)}**"
