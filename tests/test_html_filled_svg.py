"""A drawing cleaned once as a template and filled in afterwards (`html.clean_filled_svg`) gives exactly what the
full check (`html.clean_svg`) gives for the filled drawing: the same bytes, or the same error.

Exact identity, three ways: real diagrams from `draw.render_svg_parts` for many instrument names and titles,
hostile ones included (quotes, <, &, ]]>, script tags, control and private-use characters, lone surrogates,
non-characters, very long names); hand-made templates with marks in every place a mark can stand (text, plain
and judged attributes, tag and attribute names, comments, character references, next to '<') filled with
escaped and raw text; and random texts (hypothesis) in text and attribute positions. The outcome of the full
check on the filled drawing is the reference each time.
"""

from __future__ import annotations

import random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ivdossier.errors import InvalidInputError
from ivdossier.reports import html
from ivdossier.reports.html import FilledSvg, clean_filled_svg, clean_svg
from ivdossier.threats_catalog import draw, load_builtin
from ivdossier.threats_catalog import graph as g

HOSTILE = (
    "wave",
    "wave_2019",
    'quote"d',
    "it's",
    "a<b",
    "a>b",
    "a&b",
    "&amp;",
    "&#39;",
    "&#xe002;",
    "]]>",
    "a]]b",
    "<script>alert(1)</script>",
    '"><script>alert(1)</script>',
    "x' onload='alert(1)",
    "javascript:alert(1)",
    "url(http://example.org/x)",
    "<!-- c -->",
    "<?xml version='1.0'?>",
    "<!DOCTYPE x>",
    "Ω 東京 🎉 ünïcödé",
    "tab\there",
    "cr\rhere",
    "nul\x00here",
    "bell\x07",
    "del\x7f and c1\x85",
    "\ufffe\uffff",
    "\ufdd0 non-character",
    "\U0001fffe",
    "lone \ud800 surrogate",
    "private \ue000\ue001\ue002\ue003 use",
    "   ",
    "z" * 40,
    "very long " + "name " * 60,
)


def _outcome(fn: object, *args: object, **kw: object) -> tuple[str, str]:
    try:
        return ("ok", fn(*args, **kw))  # type: ignore[operator]
    except Exception as exc:  # the error itself is part of the outcome compared
        return (type(exc).__name__, str(exc))


def _same(filled: FilledSvg, key: str = "causal-diagram") -> tuple[str, str]:
    fast = _outcome(clean_filled_svg, filled, key=key)
    full = _outcome(clean_svg, filled.text, key=key)
    assert fast == full, (filled.fills, fast[1][:200], full[1][:200])
    return fast


def _graphs() -> list[tuple[object, list[str]]]:
    """A few graph shapes from the built-in catalogue (seeded), each drawable for any instrument name."""
    entries = [e for e in load_builtin().threats if not e.fragment.is_empty]
    rng = random.Random(7)
    return [
        ([e.fragment for e in rng.sample(entries, k)], [f"w{i}" for i in range(c)])
        for k, c in ((0, 0), (2, 1), (4, 2))
    ]


def test_real_diagrams_filled_with_hostile_names_clean_exactly_as_in_full() -> None:
    fast_paths = 0
    for fragments, covariates in _graphs():
        for name in HOSTILE:
            try:
                G = g.build_graph(
                    instrument=name, covariates=dict.fromkeys(covariates, True), fragments=fragments
                )
                verdict = g.check_instrument(G, instrument=name, treatment="X", outcome="Y")
            except Exception:
                continue  # a name the graph refuses (it clashes with a node, or is blank)
            for title in (f"Causal diagram for {name}", "T", name + " <&>"):
                template, fills = draw.render_svg_parts(G, verdict, title=title)
                filled = FilledSvg(template, fills)
                assert filled.text == draw.render_svg(G, verdict, title=title)
                _same(filled)
                if fills:
                    shape = html._template_shape(template, tuple(m for m, _ in fills))
                    fast_paths += shape is not None and html._fills_inert(fills, shape)
    assert fast_paths > 100  # most drawings took the template path, so the comparison tested it


TEMPLATE = (
    '<svg xmlns="http://www.w3.org/2000/svg" aria-label="\ue003">'
    "<title>\ue003</title>"
    '<defs><marker id="\ue001-arrow"><path d="M0 0"/></marker></defs>'
    '<line x1="0" x2="1" marker-end="url(#\ue001-arrow)"/>'
    '<rect fill="url(#\ue001-hatch)" data-name="\ue002"/>'
    '<pattern id="p" href="#\ue001-x"/><text>\ue002 ]] &amp; \ue002</text>'
    "<text>a\ue002</text>\n</svg>\n"
)
# Templates whose marks stand where filling them could change the structure, or that the full check refuses.
ODD_TEMPLATES = (
    '<svg><g\ue002 x="1"/></svg>',  # in a tag name (not well-formed)
    '<svg><g a\ue002="1"/></svg>',  # in an attribute name
    "<svg><text>&#xe002;</text></svg>",  # a mark written as a character reference
    "<svg><!-- \ue002 --><text>x</text></svg>",  # in a comment
    "<svg><text><![CDATA[\ue002]]></text></svg>",  # in CDATA
    "<?xml version='1.0'?><svg><text>\ue002</text></svg>",  # after a prologue
    "<svg><text>&amp\ue002;</text></svg>",  # inside an entity reference
    '<svg><pattern href="\ue002"/></svg>',  # the whole of an href
    '<svg><rect onclick="\ue002"/></svg>',  # an event handler (refused whatever it holds)
    "<svg><script>\ue002</script></svg>",  # a refused element
    "\ue002<svg/>",  # outside the figure
    "<svg/>\ue002",
    "<svg><text>\ue002</text></svg><svg/>",  # two figures
)
# Templates whose marks stand in judged attribute values: shared, each filled value checked.
JUDGED_TEMPLATES = (
    '<svg><rect style="\ue002"/></svg>',
    '<svg><rect fill="url(#\ue001)" stroke="\ue003"/><pattern href="#\ue002\ue001"/></svg>',
)
FILLS = (
    "ivd-1a2b3c4d",
    "",
    "plain words",
    "javascript:alert(1)",
    " javascript:alert(1)",
    "http://example.org/x",
    "x) url(http://example.org",
    "@import 'x'",
    "expression(alert(1))",
    "#fine",
    '"><script>alert(1)</script>',
    "&lt;script&gt;",
    "&amp;&quot;&#39;&gt;",
    "&bogus;",
    "&#0;",
    "&#x41;",
    "]]>",
    "]]&gt;",
    "<",
    "&",
    "a\tb\nc",
    "cr\r",
    "\x00",
    "\x0b",
    "\x85",
    "\ufffe",
    "\U0010ffff",
    "\ud800",
    "\ue002",
    "\ue001\ue003",
    "'",
    '"',
)


@pytest.mark.parametrize("template", (TEMPLATE, *JUDGED_TEMPLATES, *ODD_TEMPLATES))
def test_hand_made_templates_clean_exactly_as_in_full(template: str) -> None:
    for ids in FILLS:
        for name in FILLS:
            fills = (("\ue001", ids), ("\ue002", name), ("\ue003", draw.esc(name)))
            _same(FilledSvg(template, fills))


def test_the_template_path_is_taken_and_refuses_what_the_full_check_refuses() -> None:
    marks = ("\ue001", "\ue002", "\ue003")
    for shared in (TEMPLATE, *JUDGED_TEMPLATES):
        assert html._template_shape(shared, marks) is not None, shared
    for odd in ODD_TEMPLATES:
        assert html._template_shape(odd, marks) is None, odd
    ok = FilledSvg(TEMPLATE, (("\ue001", "ivd-00ff00ff"), ("\ue002", "a &amp; b"), ("\ue003", "T")))
    assert _same(ok)[0] == "ok"
    judged = html._template_shape(JUDGED_TEMPLATES[1], marks)
    assert judged is not None  # text the parser would not read as written is never checked in a judged value
    assert not html._fills_inert((("\ue001", "a&amp;b"), ("\ue002", "b"), ("\ue003", "c")), judged)
    assert html._fills_inert((("\ue001", "ab"), ("\ue002", "b"), ("\ue003", "c")), judged)
    for ids in ("javascript:alert(1)", "x) url(http://example.org"):
        bad = FilledSvg(TEMPLATE, (("\ue001", ids), ("\ue002", "a"), ("\ue003", "T")))
        with pytest.raises(InvalidInputError, match="contains"):
            clean_filled_svg(bad, key="f")


def test_an_href_filled_to_leave_the_document_is_refused() -> None:
    template = '<svg xmlns="http://www.w3.org/2000/svg"><pattern href="\ue001x"/><text>y</text></svg>'
    assert _same(FilledSvg(template, (("\ue001", "#"),)))[0] == "ok"
    assert _same(FilledSvg(template, (("\ue001", "http://example.org/"),)))[0] == "InvalidInputError"


TEXT = st.text(
    alphabet=st.one_of(
        st.sampled_from(list("<>&\"';#:()/ ]]\t\n\r\x00\x0b\x7f\x85\ufffe\ue001\ue002\ue003")),
        st.characters(codec="utf-8"),
        st.characters(),
    ),
    max_size=30,
)


@settings(max_examples=300, deadline=None)
@given(
    ids=st.one_of(st.from_regex("ivd-[0-9a-f]{8}", fullmatch=True), TEXT), name=TEXT, escaped=st.booleans()
)
def test_random_texts_clean_exactly_as_in_full(ids: str, name: str, escaped: bool) -> None:
    text = draw.esc(name) if escaped else name
    _same(FilledSvg(TEMPLATE, (("\ue001", ids), ("\ue002", text), ("\ue003", draw.esc(ids)))))
