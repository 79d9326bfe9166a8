"""Markdown -> one self-contained HTML file: inline CSS, inline trusted SVG, no scripts, no network fetches.

Raw HTML in the Markdown is disabled, so user text containing markup is shown, never executed. Links are
validated (only relative, #fragment, http(s) and mailto survive). Figures and verdict badges are inserted by the
renderer from markers that only generated Markdown can contain (a fence with a reserved info string and a code
span with a reserved prefix; user text has its backticks escaped), and the SVG comes from the `svgs` mapping,
never from the Markdown itself. A Content-Security-Policy meta tag forbids scripts and remote loads as a second
line of defence.
"""

from __future__ import annotations

import html
import re
import xml.etree.ElementTree as ET  # DOCTYPE and entity declarations are refused before parsing
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

from markdown_it import MarkdownIt
from markdown_it.common.utils import escapeHtml, mdTrim
from markdown_it.token import Token

from ivdossier.errors import InvalidInputError
from ivdossier.reports.inputs import LINK_STATES
from ivdossier.reports.mdtext import BADGE_PREFIX, CHIP_PREFIX, FIGURE_INFO

CSP = "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'"
_SAFE_SCHEMES = ("http:", "https:", "mailto:")
_SCHEME = re.compile(r"^([a-z][a-z0-9+.\-]*):")
SVG_NS = "http://www.w3.org/2000/svg"
XLINK_NS = "http://www.w3.org/1999/xlink"
# Elements an inlined figure may use: what the plot drawer (reports/svgplot.py), the verdict badges and the graph
# diagram (threats_catalog/draw.py) write: shapes, text, grouping, arrowhead markers and hatch patterns. No script,
# style sheet, foreignObject, image, use/symbol, animation, link or embedding elements.
SVG_ELEMENTS = frozenset(
    {
        "svg", "g", "defs", "title", "desc",
        "path", "rect", "circle", "ellipse", "line", "polyline", "polygon",
        "text", "marker", "pattern",
    }
)  # fmt: skip
# Attributes that can carry a URL or CSS (others, such as aria-label, hold plain text and are not judged).
_URL_ATTRIBUTES = frozenset(
    {"style", "src", "fill", "stroke", "clip-path", "mask", "filter", "cursor", "marker-start", "marker-mid",
     "marker-end", "marker", "values", "from", "to", "by"}
)  # fmt: skip
_CSS_FORBIDDEN = re.compile(
    r"url\(\s*[\"']?(?!#)|@import|expression\s*\(|javascript:|behavior\s*:", re.IGNORECASE
)
_SVG_PROLOGUE = re.compile(r"<\?xml[^>]*\?>|<!DOCTYPE[^>]*>|<!--.*?-->", re.DOTALL | re.IGNORECASE)


def validate_link(url: str) -> bool:
    """Allow relative links, #fragments, http(s) and mailto; refuse javascript:, data:, file: and the rest."""
    compact = re.sub(r"[\x00-\x20\x7f]", "", url).lower()
    match = _SCHEME.match(compact)
    return match is None or f"{match.group(1)}:" in _SAFE_SCHEMES


def _split(tag: str) -> tuple[str, str]:
    """('namespace', 'local') of an ElementTree tag or attribute name."""
    if tag.startswith("{"):
        ns, _, local = tag[1:].partition("}")
        return ns, local
    return "", tag


@lru_cache(maxsize=1024)
def _split_cached(tag: str) -> tuple[str, str]:
    return _split(tag)


_ALLOWED_NS = ("", XLINK_NS, "http://www.w3.org/XML/1998/namespace")


@lru_cache(maxsize=1024)
def _attribute_rule(name: str) -> tuple[str, str | None, bool, str | None, bool]:
    """How attribute `name` is judged: its local name, the problem its name alone is if it is an event handler,
    whether its value must be a #fragment (href), the problem its namespace is (None if allowed) and whether its
    value may carry a URL or CSS."""
    a_ns, a_local = _split(name)
    lowered = a_local.lower()
    event = f"event-handler attribute {a_local!r}" if lowered.startswith("on") else None
    foreign = None if a_ns in _ALLOWED_NS else f"attribute {a_local!r} in namespace {a_ns!r}"
    return a_local, event, lowered == "href", foreign, lowered in _URL_ATTRIBUTES


@lru_cache(maxsize=4096)
def _unsafe_value(value: str) -> bool:
    """Whether a URL-or-CSS attribute value could fetch something or run code."""
    return bool(_CSS_FORBIDDEN.search(value)) or "javascript:" in re.sub(r"[\x00-\x20]", "", value).lower()


def _svg_problem(root: ET.Element) -> str | None:
    """The first element or attribute that could run code or fetch something, described; None when clean."""

    def walk(el: ET.Element) -> str | None:
        ns, local = _split_cached(el.tag)
        if ns not in ("", SVG_NS) or local not in SVG_ELEMENTS:
            return f"element <{local}>"
        for name, value in el.attrib.items():
            a_local, event, href, foreign, url = _attribute_rule(name)
            if event is not None:
                return event
            if href and not value.strip().startswith("#"):
                return f"external reference {value[:60]!r}"
            if foreign is not None:
                return foreign
            if url and _unsafe_value(value):
                return f"attribute {a_local}={value[:60]!r}"
        for child in el:
            found = walk(child)
            if found:
                return found
        return None

    return walk(root)


def clean_svg(svg: str, *, key: str) -> str:
    """Strip the XML prologue and refuse SVG that could run code or fetch anything.

    The figure is parsed as XML and checked structurally: only drawing elements, no event-handler attributes,
    no references outside the document. Text inside the figure (labels people typed) is never judged by its
    wording, so a label like "wave onset=2019" is fine.
    """
    body = _SVG_PROLOGUE.sub("", svg).strip()
    if not body.lower().startswith("<svg"):
        raise InvalidInputError(f"figure {key!r} is not an SVG document; pass the <svg>...</svg> text.")
    if "<!" in body or "<?" in body:  # DOCTYPE, ENTITY, CDATA or processing instructions: none are needed
        raise InvalidInputError(
            f"figure {key!r} contains declarations, CDATA or processing instructions; pass plain SVG elements."
        )
    # Declare the usual prefixes around the figure, so a fragment using xlink:href without declaring it parses.
    wrapper = f'<wrapper xmlns:xlink="{XLINK_NS}">{body}</wrapper>'
    try:
        parsed = ET.fromstring(wrapper)
        if len(parsed) != 1 or (parsed.text or "").strip() or (parsed[0].tail or "").strip():
            raise ET.ParseError("expected exactly one <svg> element")
        root = parsed[0]
    except ET.ParseError as exc:
        raise InvalidInputError(
            f"figure {key!r} is not well-formed SVG ({exc}); it cannot be inlined."
        ) from exc
    bad = _svg_problem(root)
    if bad is not None:
        raise InvalidInputError(
            f"figure {key!r} contains {bad}; only self-contained SVG without scripts, event handlers "
            "or external references can be inlined."
        )
    return body


@lru_cache(maxsize=256)
def _clean_svg_cached(svg: str, key: str) -> str:
    """`clean_svg` remembered for figures that recur across pages (badges, repeated plots)."""
    return clean_svg(svg, key=key)


@dataclass(frozen=True)
class FilledSvg:
    """An SVG given as a template holding one-character marks and the escaped text written for each mark, in
    order (a drawing shared by many pages that differ only in a name); `text` is the SVG itself."""

    template: str
    fills: tuple[tuple[str, str], ...] = ()

    @property
    def text(self) -> str:
        out = self.template
        for mark, value in self.fills:
            out = out.replace(mark, value)
        return out


# A mark is one private-use character.
_MARK = re.compile("[\ue000-\uf8ff]")
# Escaped text that leaves an XML document's structure as it is wherever character data or a quoted attribute
# value stands: XML characters except < > & " ' (and CR and C0/C1 controls, left to the full check), and the five
# entity references the SVG escapers write.
_INERT = re.compile(
    "(?:[\t\n\x20\x21\x23-\x25\x28-\x3b\x3d\x3f-\x7e\xa0-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]"
    "|&(?:amp|lt|gt|quot|#39);)*"
)
# Inert text the parser reads as written inside an attribute value (no reference, no tab or newline to normalise).
_VERBATIM = re.compile(
    "[\x20\x21\x23-\x25\x28-\x3b\x3d\x3f-\x7e\xa0-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]*"
)


@dataclass(frozen=True)
class _Shape:
    """A cleaned template, and the judged attributes (href, or one that may carry a URL or CSS) whose values hold
    marks, each distinct one once: (local name, is href, may carry a URL, value as parsed)."""

    body: str
    judged: tuple[tuple[str, bool, bool, str], ...]


@lru_cache(maxsize=512)
def _template_shape(template: str, marks: tuple[str, ...]) -> _Shape | None:
    """The template cleaned once, when filling its marks with inert text cannot change what `clean_svg` decides:
    the template is accepted, holds no declaration, comment or processing instruction, and its marks (distinct
    private-use characters) stand only in character data and attribute values. None otherwise."""
    if len(set(marks)) != len(marks) or not all(len(m) == 1 and _MARK.fullmatch(m) for m in marks):
        return None
    if "<!" in template or "<?" in template:
        return None
    try:
        body = clean_svg(template, key="template")
    except (InvalidInputError, ValueError):
        return None
    found = re.compile("[" + "".join(marks) + "]")
    placed = 0
    judged: list[tuple[str, bool, bool, str]] = []
    for el in ET.fromstring(f'<wrapper xmlns:xlink="{XLINK_NS}">{body}</wrapper>')[0].iter():
        if found.search(el.tag):
            return None
        placed += len(found.findall(el.text or "")) + len(found.findall(el.tail or ""))
        for name, value in el.attrib.items():
            if found.search(name):
                return None
            in_value = len(found.findall(value))
            a_local, _, href, _, url = _attribute_rule(name)
            if in_value and (href or url):
                judged.append((a_local, href, url, value))
            placed += in_value
    if placed != len(found.findall(body)):  # a mark elsewhere, or one written as a character reference
        return None
    return _Shape(body=body, judged=tuple(dict.fromkeys(judged)))  # each value checked once


def clean_filled_svg(svg: FilledSvg, *, key: str) -> str:
    """`clean_svg(svg.text, key=key)`, with the template cleaned once for every page showing it: when the texts are
    inert (see `_INERT`), the filled template is accepted exactly when the judged attribute values holding marks
    pass their checks once filled, and its cleaned form is the cleaned template filled. Anything else (text that
    is not inert, a refused value, a template that cannot be shared) is cleaned in full."""
    marks = tuple(mark for mark, _ in svg.fills)
    shape = _template_shape(svg.template, marks) if marks else None
    if shape is None or not _fills_inert(svg.fills, shape):
        return _clean_svg_cached(svg.text, key)
    return FilledSvg(shape.body, svg.fills).text


def _fills_inert(fills: tuple[tuple[str, str], ...], shape: _Shape) -> bool:
    """Whether every text is inert and holds no mark, and every judged value holding a mark, filled, passes."""
    for _, text in fills:
        if not _INERT.fullmatch(text) or any(mark in text for mark, _ in fills):
            return False
    for _, href, url, value in shape.judged:
        for mark, text in fills:
            if mark in value:
                if not _VERBATIM.fullmatch(text):
                    return False
                value = value.replace(mark, text)
        if href and not value.strip().startswith("#"):
            return False
        if url and _unsafe_value(value):
            return False
    return True


@lru_cache(maxsize=1)
def stylesheet() -> str:
    """The document stylesheet (reports/dossier.css)."""
    return (Path(__file__).with_name("dossier.css")).read_text(encoding="utf-8")


def _slug(text: str, seen: dict[str, int]) -> str:
    base = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-") or "section"
    count = seen.get(base, 0)
    seen[base] = count + 1
    return base if count == 0 else f"{base}-{count + 1}"


def markdown_parser() -> MarkdownIt:
    """The project's Markdown settings: CommonMark plus tables, raw HTML off, links validated."""
    md = MarkdownIt("commonmark", {"html": False, "linkify": False, "typographer": False}).enable("table")
    md.validateLink = validate_link  # type: ignore[method-assign]
    return md


def render_html(
    markdown: str,
    *,
    title: str,
    svgs: Mapping[str, str | FilledSvg] | None = None,
    badges: Mapping[str, str] | None = None,
    lang: str = "en",
    toc: bool = True,
    wide: bool = False,
) -> str:
    """Render Markdown to one self-contained HTML page.

    `svgs` maps figure keys (from ``mdtext.figure``) to trusted generated SVG (or a `FilledSvg`); `badges` maps verdict statuses
    to badge SVG (default: ``plots.verdict_badge_svg``); `wide` widens the sheet for broad comparison tables.
    A figure marker without an SVG raises InvalidInputError, so a missing plot is noticed, not dropped.

    The document is rendered section by section (a section runs from one heading to the next, which CommonMark
    renders independently) and each section's HTML is remembered, so text repeated across documents (a
    catalogue threat, a shared claim) is parsed once per process however many pages show it.
    """
    figures = {
        key: clean_filled_svg(svg, key=key) if isinstance(svg, FilledSvg) else _clean_svg_cached(svg, key)
        for key, svg in (svgs or {}).items()
    }
    if badges is None:
        from ivdossier.reports.plots import verdict_badge_svg

        badge_svgs = {
            status: verdict_badge_svg(status) for status in ("holds", "at risk", "broken", "not assessed")
        }
    else:
        badge_svgs = dict(badges)

    def figure(match: re.Match[str]) -> str:
        key = match.group(1)
        if key not in figures:
            raise InvalidInputError(f"the document refers to figure {key!r}, but no SVG was given for it.")
        return f'<figure class="figure" id="figure-{html.escape(key)}">{figures[key]}</figure>\n'

    def badge(match: re.Match[str]) -> str:
        status = match.group(1)
        if status not in badge_svgs:
            return f"<code>{html.escape(BADGE_PREFIX + status.replace(' ', '-'))}</code>"
        css = status.replace(" ", "-")
        return (
            f'<span class="badge badge-{css}">'
            f'<span class="badge-shape" aria-hidden="true">{badge_svgs[status]}</span>'
            f'<span class="badge-word">{html.escape(status)}</span></span>'
        )

    seen: dict[str, int] = {}
    sections: list[tuple[str, str]] = []
    parts: list[str] = []
    in_card = False
    for text in _split_sections(markdown):
        body, tag, heading = _render_section(text)
        if tag in ("h1", "h2", "h3", "h4") and in_card:
            parts.append("</section>\n")
            in_card = False
        if tag in ("h2", "h3"):
            ident = _slug(heading, seen)
            body = body.replace(f"<{tag}>", f'<{tag} id="{ident}">', 1)
            if tag == "h2":
                sections.append((ident, heading))
        if tag == "h4":
            parts.append('<section class="card">\n')
            in_card = True
        parts.append(body)
    if in_card:
        parts.append("</section>\n")
    body = _BADGE_MARK.sub(badge, _FIGURE_MARK.sub(figure, "".join(parts)))
    nav = ""
    if toc and len(sections) > 1:
        items = "".join(f'<li><a href="#{ident}">{html.escape(text)}</a></li>' for ident, text in sections)
        nav = f'<nav class="toc" aria-label="Contents"><p class="toc-title">Contents</p><ol>{items}</ol></nav>\n'
    body = _insert_after_first_h1(body, nav)
    return (
        "<!DOCTYPE html>\n"
        f'<html lang="{html.escape(lang)}">\n<head>\n<meta charset="utf-8">\n'
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        '<meta name="referrer" content="no-referrer">\n'
        f"<title>{html.escape(title)}</title>\n<style>\n{stylesheet()}</style>\n</head>\n"
        f'<body>\n<main class="{"sheet wide" if wide else "sheet"}">\n{body}</main>\n</body>\n</html>\n'
    )


# Placeholders the cached section renderer writes for figures and badges (NUL never survives into rendered
# text: Markdown parsing replaces it by U+FFFD), filled in per document.
_FIGURE_MARK = re.compile("\x00figure:([a-z0-9-]+)\x00\n?")
_BADGE_MARK = re.compile("\x00badge:([a-z ]+)\x00")
_ATX = re.compile(r"^#{1,6}(?:[ \t]|$)")


_CONTINUES = re.compile(r"^(?:[ \t]|[-+*][ \t]|\d{1,9}[.)][ \t])")


def _split_sections(markdown: str) -> list[str]:
    """The document cut into pieces CommonMark renders independently: before every heading line, and at a blank
    line when what follows cannot continue the block before it (it is not indented and is no list item, so it
    can neither join a list nor an indented block). Nothing is cut inside a fence."""
    out: list[str] = []
    current: list[str] = []
    fenced = False
    blank = False
    for line in markdown.split("\n"):
        if line.startswith("```"):
            if not fenced and current and (blank or _ATX.match(current[0])):
                out.append("\n".join(current))
                current = []
            fenced = not fenced
        elif not fenced and current and line.strip():
            heading = _ATX.match(line) is not None
            if heading or (blank and not _CONTINUES.match(line)):
                out.append("\n".join(current))
                current = []
        blank = not line.strip() and not fenced
        current.append(line)
    if current:
        out.append("\n".join(current))
    return out


@lru_cache(maxsize=1)
def _section_parser() -> MarkdownIt:
    md = markdown_parser()

    def fence(self: Any, toks: Sequence[Token], idx: int, options: Any, env_: Any) -> str:
        tok = toks[idx]
        if tok.info.strip() == FIGURE_INFO and re.fullmatch(r"[a-z0-9-]+", tok.content.strip()):
            return f"\x00figure:{tok.content.strip()}\x00\n"
        return f"<pre><code>{html.escape(tok.content)}</code></pre>\n"

    def code_inline(self: Any, toks: Sequence[Token], idx: int, options: Any, env_: Any) -> str:
        content = toks[idx].content
        if content.startswith(BADGE_PREFIX) and re.fullmatch(r"[a-z-]+", content[len(BADGE_PREFIX) :]):
            return f"\x00badge:{content[len(BADGE_PREFIX) :].replace('-', ' ')}\x00"
        if content.startswith(CHIP_PREFIX) and content[len(CHIP_PREFIX) :] in LINK_STATES:
            state = content[len(CHIP_PREFIX) :]
            return f'<span class="chip chip-{state}">{state}</span>'
        return f"<code>{html.escape(content)}</code>"

    def image(self: Any, toks: Sequence[Token], idx: int, options: Any, env_: Any) -> str:
        # User text cannot form an image (its brackets are escaped); generated documents use figure markers
        # when rendered for HTML. An image here is a Markdown-file figure link rendered by mistake.
        raise InvalidInputError(
            f"the document links to the image {toks[idx].attrGet('src')!r}; generate it for HTML "
            "(within ivdossier.reports.mdtext.for_html()) so its figures are inlined."
        )

    def table_open(self: Any, toks: Sequence[Token], idx: int, options: Any, env_: Any) -> str:
        return '<div class="table-wrap"><table>\n'

    def table_close(self: Any, toks: Sequence[Token], idx: int, options: Any, env_: Any) -> str:
        return "</table></div>\n"

    md.add_render_rule("fence", fence)
    md.add_render_rule("code_inline", code_inline)
    md.add_render_rule("image", image)
    md.add_render_rule("table_open", table_open)
    md.add_render_rule("table_close", table_close)
    return md


@lru_cache(maxsize=16384)
def _render_section(text: str) -> tuple[str, str, str]:
    """One section's HTML with figure and badge placeholders, its heading tag ('' if it has none) and text."""
    table = _render_table(text)
    if table is not None:
        return table, "", ""
    md = _section_parser()
    env: dict[str, Any] = {}
    tokens = md.parse(text, env)
    tag, heading = "", ""
    if len(tokens) > 1 and tokens[0].type == "heading_open":
        tag = tokens[0].tag
        heading = "".join(
            child.content for child in tokens[1].children or [] if child.type in ("text", "code_inline")
        )
    return md.renderer.render(tokens, md.options, env), tag, heading


_DELIMITER_ROW = re.compile(r"\|(?: :?-+:? \|)+")


def _align(mark: str) -> str:
    """The style attribute the parser gives the cells of a column with delimiter `mark` (e.g. ':--')."""
    if mark.endswith(":"):
        return ' style="text-align:center"' if mark.startswith(":") else ' style="text-align:right"'
    return ' style="text-align:left"' if mark.startswith(":") else ""


def _render_table(text: str) -> str | None:
    """The HTML of a section that is one pipe table as `mdtext.table` writes it, built row by row with each cell
    rendered (and remembered) on its own: what the Markdown parser writes for it, in a fraction of the time
    (generated tables repeat most cells). Anything else (None) goes to the parser: a line that does not start
    with a pipe, another delimiter row, a row with another number of cells, a carriage return or NUL (which
    the parser would normalise first). The cells are split and trimmed by the parser's own table functions."""
    if "\r" in text or "\x00" in text:
        return None
    lines = text.split("\n")
    while lines and lines[-1] == "":
        lines.pop()
    if len(lines) < 2 or not all(line.startswith("|") for line in lines):
        return None
    if not _DELIMITER_ROW.fullmatch(lines[1]):
        return None
    aligns = tuple(_align(mark.strip()) for mark in lines[1][1:-1].split("|"))
    head = _render_row(lines[0], aligns, "th")
    if head is None:
        return None
    out = ['<div class="table-wrap"><table>\n<thead>\n', head, "</thead>\n"]
    if len(lines) > 2:
        out.append("<tbody>\n")
        for line in lines[2:]:
            row = _render_row(line, aligns, "td")
            if row is None:
                return None
            out.append(row)
        out.append("</tbody>\n")
    out.append("</table></div>\n")
    return "".join(out)


@lru_cache(maxsize=65536)
def _render_row(line: str, aligns: tuple[str, ...], tag: str) -> str | None:
    """One table row's HTML (`tag` is th or td), remembered (generated tables repeat whole rows); None when the
    row does not have one cell per column. The line is split as the parser's `escapedSplit` splits it."""
    trimmed = mdTrim(line)
    cells = trimmed.split("|") if "\\" not in trimmed else _split_escaped(trimmed)
    if cells and cells[0] == "":
        cells.pop(0)
    if cells and cells[-1] == "":
        cells.pop()
    if len(cells) != len(aligns):
        return None
    body = "".join(
        f"<{tag}{a}>{_render_cell(mdTrim(c))}</{tag}>\n" for a, c in zip(aligns, cells, strict=True)
    )
    return f"<tr>\n{body}</tr>\n"


_UNESCAPED_PIPE = re.compile(r"(?<!\\)\|")


def _split_escaped(line: str) -> list[str]:
    """The parser's `escapedSplit`, with regular expressions: a pipe right after a backslash stays in its cell
    (without that backslash); every other pipe separates two cells."""
    return [cell.replace("\\|", "|") for cell in _UNESCAPED_PIPE.split(line)]


# Characters at which one of the active inline rules (newline, escape, backticks, emphasis, link, image, autolink,
# entity) can start; text without any of them is one text run, which the parser writes HTML-escaped. An image
# starts at "![" and a link at "[", so "!" and "]" without "[" are text, and no inline rule starts at ">".
_INLINE_SYNTAX = re.compile(r"[\n\\`*\[<&\x00\r]")
# An underscore without a letter or digit ([^\W_]: what str.isalnum accepts) right before it or right after it.
_LOOSE_UNDERSCORE = re.compile(r"(?<![^\W_])_|_(?![^\W_])")


# A backslash escape: a backslash before an ASCII punctuation character (CommonMark), which the parser writes as
# that character alone, as text.
_ESCAPE_PAIR = re.compile(r"\\([!-/:-@\[-`{-~])")


def _plain_text(content: str) -> bool:
    """True when the parser renders `content` as one text run: no inline syntax can start in it, and every
    underscore stands between two letters or digits."""
    if _INLINE_SYNTAX.search(content):
        return False
    return "_" not in content or not _LOOSE_UNDERSCORE.search(content)


@lru_cache(maxsize=65536)
def _render_cell(content: str) -> str:
    """One table cell's inline HTML (with badge placeholders), as the parser renders a cell's content."""
    if _plain_text(content):
        return escapeHtml(content)
    if "\\" in content and _plain_text(_ESCAPE_PAIR.sub("!", content)):
        # Text whose only syntax is backslash escapes: each escape is one character of text, and with each one
        # standing in for a punctuation mark ("!", which starts nothing here) the rest is plain, underscores
        # beside an escape counted as loose.
        return escapeHtml(_ESCAPE_PAIR.sub(r"\1", content))
    md = _section_parser()
    env: dict[str, Any] = {}
    return md.renderer.render(md.parseInline(content, env), md.options, env)


def _insert_after_first_h1(body: str, nav: str) -> str:
    if not nav:
        return body
    end = body.find("</h1>")
    if end < 0:
        return nav + body
    cut = body.find("<h2", end)
    cut = cut if cut >= 0 else end + len("</h1>\n")
    return body[:cut] + nav + body[cut:]
