"""Figures are checked by their structure, not their wording: a label such as "wave onset=2019" renders, while
scripts, event handlers and outside references are refused. A site build is all or nothing: it never leaves a
partial site, and it only replaces a folder that holds an earlier site."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.reports import mdtext as mt
from ivdossier.reports import site as site_mod
from ivdossier.reports.dossier import dossier_html
from ivdossier.reports.html import render_html
from ivdossier.reports.sample import PROGRAM, sample_input
from ivdossier.reports.site import build_site

LABELS = [
    "wave onset=2019",
    "clinic onsite=yes",
    'onload="x"',
    "<script>alert(1)</script>",
    "javascript:void",
]


@pytest.mark.parametrize("label", LABELS)
def test_a_diagram_whose_labels_look_like_markup_renders_escaped(label: str) -> None:
    from ivdossier.threats_catalog.draw import render_svg
    from ivdossier.threats_catalog.graph import build_graph

    svg = render_svg(build_graph(), None, title=label)  # the drawer escapes every label
    inp = sample_input()
    graph = dataclasses.replace(inp.graph, svg=svg)
    page = dossier_html(
        dataclasses.replace(inp, graph=graph, instrument=dataclasses.replace(inp.instrument, name=label))
    )
    assert "<script>alert" not in page and "<svg" in page


@pytest.mark.parametrize(
    "bad",
    [
        '<svg><rect ONLOAD="alert(1)"/></svg>',
        '<svg><set attributeName="x" onbegin="alert(1)"/></svg>',
        '<svg><a href="https://example.org"><text>x</text></a></svg>',
        "<svg><metadata><script>alert(1)</script></metadata></svg>",
        '<svg xmlns:h="http://www.w3.org/1999/xhtml"><h:iframe/></svg>',
        '<svg><use href="https://example.org/sprite.svg#a"/></svg>',
        "<svg><style>@import 'https://example.org/x.css';</style></svg>",
        '<svg><!DOCTYPE x [<!ENTITY a "b">]><text>&a;</text></svg>',
        "<svg><text><![CDATA[<b>x</b>]]></text></svg>",
        "<svg><text>unclosed</svg>",
        "<svg></svg><script>alert(1)</script>",
    ],
)
def test_figures_that_could_run_code_or_fetch_are_refused(bad: str) -> None:
    with pytest.raises(InvalidInputError, match=r"figure 'plot'"):
        render_html(html_figure(), title="t", svgs={"plot": bad})


def html_figure() -> str:
    """A figure as generated for the HTML renderer (the marker it inlines the SVG for)."""
    with mt.for_html():
        return mt.figure("plot", "caption")


def test_text_in_a_figure_is_not_judged_by_its_wording() -> None:
    svg = '<svg xmlns="http://www.w3.org/2000/svg"><text>wave onset=2019; see javascript: url(x)</text></svg>'
    page = render_html(html_figure(), title="t", svgs={"plot": svg})
    assert "wave onset=2019" in page


def _tree(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_a_failed_site_build_leaves_the_previous_site_untouched(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "site"
    build_site(out, [PROGRAM], [sample_input()], [])
    before = _tree(out)
    calls = {"n": 0}
    real = site_mod.dossier_html

    def failing(*args: object, **kw: object) -> str:
        calls["n"] += 1
        if calls["n"] == 2:
            raise InvalidInputError("figure 'x' is broken")
        return real(*args, **kw)  # type: ignore[arg-type]

    monkeypatch.setattr(site_mod, "dossier_html", failing)
    second = dataclasses.replace(
        sample_input(), instrument=dataclasses.replace(sample_input().instrument, slug="mast")
    )
    with pytest.raises(InvalidInputError, match="figure 'x' is broken"):
        build_site(out, [PROGRAM], [sample_input(), second], [])
    assert _tree(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site"]  # no staging folder left


def test_a_site_replaces_only_an_earlier_site(tmp_path: Path) -> None:
    build_site(tmp_path / "site", [PROGRAM], [sample_input()], [])
    (tmp_path / "site" / ".git").mkdir()
    build_site(tmp_path / "site", [PROGRAM], [], [])  # fewer pages: the old dossier page goes
    assert (tmp_path / "site" / ".git").is_dir()
    assert sorted(_tree(tmp_path / "site")) == [
        "catalogue.html",
        "index.html",
        "programs/telehealth-ed/index.html",
        "programs/telehealth-ed/runs.html",
    ]
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "thesis.tex").write_text("keep")
    with pytest.raises(InvalidInputError, match=r"not part of an ivdossier site \(thesis.tex\)"):
        build_site(mine, [PROGRAM], [sample_input()], [])
    assert (mine / "thesis.tex").read_text() == "keep" and sorted(p.name for p in mine.iterdir()) == [
        "thesis.tex"
    ]
    (tmp_path / "file.txt").write_text("x")
    with pytest.raises(
        InvalidInputError, match=r"is not a folder; choose a new or empty folder for the site"
    ):
        build_site(tmp_path / "file.txt", [PROGRAM], [sample_input()], [])
