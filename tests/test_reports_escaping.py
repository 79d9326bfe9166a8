"""User-written text is shown, never interpreted: Markdown escaping, HTML rendering, links and inlined SVG."""

from __future__ import annotations

import dataclasses
import re
from html.parser import HTMLParser

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ivdossier.errors import InvalidInputError
from ivdossier.reports import mdtext as mt
from ivdossier.reports.dossier import dossier_html, dossier_markdown
from ivdossier.reports.html import clean_svg, markdown_parser, render_html, validate_link
from ivdossier.reports.inputs import AuditEvent, CheckInfo, InstrumentInfo, LinkInfo, ProgramInfo, Rating
from ivdossier.reports.plots import verdict_badge_svg
from ivdossier.reports.sample import make_run, sample_input
from ivdossier.workflows.verdicts import with_verdicts

SCRIPT = "<script>document.title='pwned'; window.__pwned = 1</script>"
IMG = '<img src=x onerror="window.__pwned = 2">'
JS_LINK = "[click me](javascript:alert(1))"
FORGED_FIGURE = "```ivdossier-figure\nfirst-stage\n```"
FORGED_BADGE = "`verdict:holds` `state:fatal`"
HOSTILE = [
    SCRIPT,
    IMG,
    JS_LINK,
    "<javascript:alert(1)> and <http://example.org/x>",
    FORGED_FIGURE,
    FORGED_BADGE,
    "a | b | c",
    "*stars* _under_ **bold** ~~strike~~ \\backslash\\",
    "# not a heading",
    "- not a list",
    "1. not a list",
    "> not a quote",
    "---",
    "===",
    "    not code",
    "&lt;escaped entity&gt; &amp; &#x3C;",
    "![img](data:image/png;base64,AAAA)",
    "<!-- comment -->",
]


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, list[tuple[str, str | None]]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, attrs))

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(html_text: str) -> _Collector:
    c = _Collector()
    c.feed(html_text)
    return c


def visible_text_of_block(text: str) -> tuple[str, set[str]]:
    """Render escaped user text with the project's Markdown settings; return its text and the tags used."""
    rendered = markdown_parser().render(mt.block(text))
    c = parse(rendered)
    return "".join(c.text), {tag for tag, _ in c.tags}


@pytest.mark.parametrize("text", HOSTILE)
def test_escaped_block_renders_as_exactly_the_same_text(text: str) -> None:
    shown, tags = visible_text_of_block(text)
    assert shown.strip() == text.strip()
    assert tags <= {"p", "br"}


@pytest.mark.parametrize("text", HOSTILE)
def test_escaped_inline_text_stays_one_plain_line(text: str) -> None:
    rendered = markdown_parser().render(mt.inline(text))
    c = parse(rendered)
    assert {tag for tag, _ in c.tags} <= {"p"}
    assert "".join(c.text).strip() == " ".join(text.split())


@settings(max_examples=150, deadline=None)
@given(st.text(alphabet=st.sampled_from(list("ab 1.-+=#*_`[]()<>!&|\\~:/\"'\n{}")), max_size=60))
def test_any_text_round_trips_through_escaping(text: str) -> None:
    shown, tags = visible_text_of_block(text)
    expected = "\n".join(line.strip() for line in text.split("\n") if line.strip())
    # paragraphs and hard breaks may re-flow whitespace; the characters and their order must survive
    assert "".join(shown.split()) == "".join(expected.split())
    assert tags <= {"p", "br"}


def test_control_characters_and_bidi_overrides_are_replaced() -> None:
    text = "a\x00b\x1b[31mc\x07d\u202eevil\x7f"
    out = mt.inline(text)
    for bad in ("\x00", "\x1b", "\x07", "\u202e", "\x7f"):
        assert bad not in out
    assert out.count("\ufffd") == 5


def test_pipes_inside_table_cells_do_not_add_columns() -> None:
    table = mt.table(["Reviewer", "Comment"], [[mt.cell("Ana | admin"), mt.cell("x | y | z")]])
    rendered = markdown_parser().render(table)
    assert rendered.count("<td ") == 2
    assert "x | y | z" in rendered


def hostile_input() -> object:
    base = sample_input()
    claims = {
        c: f"{SCRIPT} {IMG} {JS_LINK}\n\n{FORGED_FIGURE}\n{FORGED_BADGE} | pipe"
        for c in base.instrument.claims
    }
    instrument = InstrumentInfo(
        slug="evil",
        name=f"Evil {SCRIPT}",
        family=IMG,
        columns=("z`col`", "a|b"),
        state="<b>bold</b>",
        claims=claims,
    )
    link = LinkInfo(
        threat_code="TH-<1>",
        title=JS_LINK,
        condition="exclusion",
        state="open",
        argument=SCRIPT,
        evidence=IMG + "\n" + FORGED_FIGURE,
        ratings=(Rating(f"Eve {IMG}", 5, 5, "a | b | c " + JS_LINK),),
        checks=(CheckInfo(SCRIPT, IMG),),
    )
    run = dataclasses.replace(
        make_run(1),
        slug="run<script>",
        vcov=IMG,
        spec={"controls": [SCRIPT, "x|y"], "note": JS_LINK},
        dataset_path="data/<img src=x onerror=1>.csv",
        package_versions={SCRIPT: IMG},
    )
    hostile = dataclasses.replace(
        base,
        program=ProgramInfo(slug="p", title=f"Program {SCRIPT}", question=JS_LINK, treatment="telehealth"),
        instrument=instrument,
        links=(link,),
        runs=(run,),
        audit=(AuditEvent("2026-11-02T08:00:00+00:00", f"mallory {SCRIPT}", IMG, JS_LINK, FORGED_FIGURE),),
        tool_version=IMG,
    )
    return with_verdicts(hostile)


def test_hostile_text_everywhere_never_becomes_markup_in_the_html() -> None:
    page = dossier_html(hostile_input())  # type: ignore[arg-type]
    c = parse(page)
    tags = [tag for tag, _ in c.tags]
    assert "script" not in tags
    assert "img" not in tags
    assert "b" not in tags
    for _tag, attrs in c.tags:
        for name, value in attrs:
            assert not name.lower().startswith("on"), (name, value)
            if name in ("href", "src", "xlink:href"):
                assert value is not None and not value.lower().startswith(("javascript:", "data:")), value
    assert "&lt;script&gt;document.title=" in page
    assert "onerror=&quot;window.__pwned = 2&quot;" in page
    # three genuine figures only, however often the marker appears in user text
    assert tags.count("figure") == 3
    # badges come only from verdicts: one per condition in the summary and one per condition section
    assert page.count('class="badge ') == 4 + 4
    assert page.count('class="chip ') == 1  # one state chip for the one linked threat


def test_hostile_text_in_markdown_is_escaped_at_the_source() -> None:
    md = dossier_markdown(hostile_input())  # type: ignore[arg-type]
    assert re.search(r"(?<!\\)<", md) is None  # every '<' is backslash-escaped: no tag, no autolink
    assert re.search(r"(?<!\\)\[javascript|(?<!\\)\[click me", md) is None  # every opening bracket too
    # three genuine figures only, however often a marker or an image appears in user text
    assert len(re.findall(r"^!\[", md, re.M)) == 3
    assert re.search(r"(?<!\\)`(verdict|state):", md) is None  # no code-span verdict or state marker


def test_link_validation_keeps_only_safe_schemes() -> None:
    for bad in (
        "javascript:alert(1)",
        "JAVASCRIPT:alert(1)",
        "java\tscript:x",
        " javascript:x",
        "data:text/html,x",
        "vbscript:x",
        "file:///etc/passwd",
    ):
        assert not validate_link(bad), bad
    for good in ("page.html", "../index.html", "#section", "https://example.org", "mailto:a@example.org"):
        assert validate_link(good), good
    page = render_html(
        "[a](javascript:alert(1)) [b](data:text/html,x) [c](../index.html)", title="t", svgs={}
    )
    hrefs = [v for _t, attrs in parse(page).tags for k, v in attrs if k == "href"]
    assert hrefs == ["../index.html"]


def test_renderer_refuses_unsafe_or_missing_svg() -> None:
    with mt.for_html():
        md = mt.figure("plot", "caption")
    for bad in (
        "<svg><script>alert(1)</script></svg>",
        '<svg onload="alert(1)"></svg>',
        '<svg><image href="https://example.org/x.png"/></svg>',
        "<svg><foreignObject><div/></foreignObject></svg>",
        '<svg style="background:url(https://example.org/x)"></svg>',
        "<div>not svg</div>",
    ):
        with pytest.raises(InvalidInputError, match="figure 'plot'"):
            render_html(md, title="t", svgs={"plot": bad})
    with pytest.raises(InvalidInputError, match="no SVG was given"):
        render_html(md, title="t", svgs={})
    inner = '<svg><defs><marker id="m1"><path d="M0 0L4 2L0 4z"/></marker></defs><path marker-end="url(#m1)"/></svg>'
    ok = render_html(md, title="t", svgs={"plot": f'<?xml version="1.0"?>{inner}'})
    assert (
        f'<figure class="figure" id="figure-plot">{inner}</figure>' in ok
    )  # references inside the figure are fine
    with pytest.raises(InvalidInputError, match="contains element <use>"):  # none of our figures writes <use>
        render_html(md, title="t", svgs={"plot": '<svg><use xlink:href="#m1"/></svg>'})


def test_page_is_self_contained_with_a_strict_content_security_policy() -> None:
    page = dossier_html(with_verdicts(sample_input()))
    assert "default-src 'none'" in page
    c = parse(page)
    for tag, attrs in c.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "img")
        for name, value in attrs:
            if name in ("src", "href") and value and not value.startswith("#"):
                pytest.fail(f"external reference {name}={value} in <{tag}>")
    assert "@import" not in page
    assert re.findall(r"url\(([^)#][^)]*)\)", page) == []  # only url(#local-id) references


@pytest.mark.parametrize("status", ["holds", "at risk", "broken", "not assessed"])
def test_badges_differ_by_shape_not_only_colour(status: str) -> None:
    svg = verdict_badge_svg(status)
    shapes = {
        "holds": "<circle",
        "at risk": '<path d="M8 1.2L15.2 14.3H0.8Z"',
        "broken": "<rect",
        "not assessed": "stroke-dasharray",
    }
    assert shapes[status] in svg
    others = [s for k, s in shapes.items() if k != status and k != "holds"]
    assert not any(o in svg for o in others)
    with pytest.raises(InvalidInputError, match="unknown verdict 'fine'"):
        verdict_badge_svg("fine")


@settings(max_examples=200, deadline=None)
@given(
    st.lists(
        st.sampled_from(
            [
                "## Heading",
                "#### Card",
                "",
                "",
                "- item",
                "- item two",
                "1. first",
                "    indented",
                "| a | b |\n| :-- | --: |\n| 1 | 2 |",
                "```ivdossier-figure\nplot\n```",
                "```\n# not a heading\n\n- not a list\n```",
                "A paragraph with `verdict:holds` and **bold**.",
                "*caption*",
                "> quote",
                "text continued",
            ]
        ),
        max_size=14,
    ).map("\n".join)
)
def test_rendering_piece_by_piece_equals_rendering_the_whole_document(markdown: str) -> None:
    # exact identity (brute force): the cached piece-by-piece renderer against one pass over the whole text
    from ivdossier.reports.html import _render_section, _section_parser, _split_sections

    whole = _section_parser().render(markdown)
    pieces = "".join(_render_section(piece)[0] for piece in _split_sections(markdown))
    assert pieces == whole


def test_svg_check_names_the_first_problem_in_document_order() -> None:
    # The check remembers its per-name and per-value decisions; the same names and values must still be judged
    # on every element, and the first problem (elements in document order, attributes in written order: event
    # handler, then href, then namespace, then URL or CSS value) is the one named.
    xl = 'xmlns:x="http://example.org/x"'
    cases = {
        '<svg><rect fill="#fff"/><rect onclick="a()" href="http://e"/></svg>': "event-handler attribute 'onclick'",
        '<svg><rect href="http://e/x" onclick="a()"/></svg>': "external reference 'http://e/x'",
        '<svg><rect xlink:href="#ok"/><rect xlink:href="ftp://e"/></svg>': "external reference 'ftp://e'",
        f'<svg {xl}><rect x:a="1"/></svg>': "attribute 'a' in namespace 'http://example.org/x'",
        '<svg><rect fill="#fff"/><rect fill="url(http://e)"/></svg>': "attribute fill='url(http://e)'",
        '<svg><rect fill="java\tscript:x"/></svg>': "attribute fill='java script:x'",
        "<svg><style>@import 'x.css';</style></svg>": "element <style>",
        "<svg><g><rect/></g><iframe/></svg>": "element <iframe>",
    }
    for svg, problem in cases.items():
        for _ in range(2):  # the second time the cached decisions answer
            with pytest.raises(InvalidInputError) as err:
                clean_svg(svg, key="f")
            assert f"contains {problem};" in str(err.value), (svg, str(err.value))
    assert clean_svg('<svg><rect fill="#fff" stroke="url(#g)"/></svg>', key="f").startswith("<svg")


_CELL_TEXT = st.lists(
    st.sampled_from(
        [
            *"ab |\\`*_[]()<>&!#:-.\t\"'",
            "é",
            "\u00a0",
            "\x85",
            "&amp;",
            "&#33;",
            "`verdict:holds`",
            "`state:open`",
            "**",
        ]
    ),
    max_size=10,
).map("".join)


@settings(max_examples=300, deadline=None)
@given(
    headers=st.lists(_CELL_TEXT, min_size=1, max_size=4),
    rows=st.lists(st.lists(_CELL_TEXT, min_size=1, max_size=4), max_size=4),
    align=st.text(alphabet="lrcx", max_size=4),
    escape=st.booleans(),
)
def test_tables_rendered_cell_by_cell_match_the_markdown_parser(
    headers: list[str], rows: list[list[str]], align: str, escape: bool
) -> None:
    # Exact identity: the renderer's table fast path against markdown-it's own table rule on the same section.
    # Cells are escaped as documents escape them, or raw (pipes, backslashes and code spans included), and rows
    # may have the wrong number of cells (those sections must go to the parser).
    from ivdossier.reports.html import _render_section, _render_table, _section_parser

    if escape:  # as documents write them: escaped cells, as many in each row as headers
        headers = [mt.cell(h) for h in headers]
        rows = [[mt.cell(c) for c in (row + ["x"] * len(headers))[: len(headers)]] for row in rows]
    text = mt.table(headers, rows, align)
    expected = _section_parser().render(text)
    assert _render_section(text)[0] == expected
    if escape:
        assert _render_table(text) is not None  # every generated table takes the fast path


_INLINE_TEXT = st.lists(
    st.sampled_from(
        [*"ab9_ _->!]~[*`<&\\.:,()'\"", "é", "ß", "٣", "\u00a0", "\u2003", "—", "→", "½", "__", "a_b", "x_1"]
    ),
    max_size=14,
).map("".join)


@settings(max_examples=1500, deadline=None)
@given(content=_INLINE_TEXT)
def test_a_table_cell_rendered_directly_matches_the_markdown_parser(content: str) -> None:
    # Exact identity: the cell renderer (which writes text without inline syntax escaped, directly) against
    # markdown-it's inline parser on the same (trimmed) cell content; underscores inside and beside words,
    # non-ASCII letters and digits, Unicode spaces and punctuation included.
    from markdown_it.common.utils import mdTrim

    from ivdossier.reports.html import _render_cell, _section_parser

    content = mdTrim(content)
    md = _section_parser()
    env: dict[str, object] = {}
    assert _render_cell(content) == md.renderer.render(md.parseInline(content, env), md.options, env)


_ESCAPED_TEXT = st.lists(
    st.sampled_from(
        [
            *"ab9_ -!]|<&*`[\\",
            "\\<",
            "\\-",
            "\\_",
            "\\*",
            "\\\\",
            "\\|",
            "\\[",
            "\\`",
            "\\&",
            "\\a",
            "\\é",
            "é",
            "a_b",
        ]
    ),
    max_size=12,
).map("".join)


@settings(max_examples=1500, deadline=None)
@given(content=_ESCAPED_TEXT)
def test_a_cell_with_backslash_escapes_rendered_directly_matches_the_markdown_parser(content: str) -> None:
    # Exact identity: cells whose only syntax is backslash escapes (as mdtext writes "\<" in path texts) are
    # written without the parser; markdown-it's inline parser on the same trimmed content is the reference.
    from markdown_it.common.utils import mdTrim

    from ivdossier.reports.html import _render_cell, _section_parser

    content = mdTrim(content)
    md = _section_parser()
    env: dict[str, object] = {}
    assert _render_cell.__wrapped__(content) == md.renderer.render(
        md.parseInline(content, env), md.options, env
    )


def test_escaped_cells_take_the_direct_path() -> None:
    from ivdossier.reports import html as h

    md = h._section_parser()
    # underscores beside an escape can open or close emphasis (the escaped character is punctuation)
    for content in ("\\<_a_\\<", "a\\__b_", "\\__a__\\_", "\\*a\\*", "x\\<_y", "\\-_a_-"):
        env: dict[str, object] = {}
        assert h._render_cell.__wrapped__(content) == md.renderer.render(
            md.parseInline(content, env), md.options, env
        ), content

    for content in ("open path z5 \\<- u -> Y (T-0230): at-risk", "a\\_b \\* c", "\\\\"):
        assert "\\" in content and h._plain_text(h._ESCAPE_PAIR.sub("!", content)), content
    for content in ("a\\b", "x_\\<", "\\", "\\< *b*"):
        assert not h._plain_text(h._ESCAPE_PAIR.sub("!", content)), content


@settings(max_examples=1500, deadline=None)
@given(line=st.lists(st.sampled_from([*"ab|\\ |", "\\|", "\\\\|", "||", "`|`"]), max_size=16).map("".join))
def test_rows_are_split_as_the_parsers_escaped_split_splits_them(line: str) -> None:
    # Exact identity against markdown-it's own splitting function.
    from markdown_it.rules_block.table import escapedSplit

    from ivdossier.reports.html import _split_escaped

    assert _split_escaped(line) == escapedSplit(line)
