"""A Markdown dossier and its folder of SVG figures are written together: every image link of the document on disk
resolves at every moment, a foreign folder is never touched, and a failed write leaves the previous pair."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.reports import docfiles
from ivdossier.reports.dossier import dossier_figures, dossier_markdown
from ivdossier.reports.mdtext import figure_file
from ivdossier.reports.sample import sample_input
from ivdossier.workflows.verdicts import with_verdicts

SVG = '<svg xmlns="http://www.w3.org/2000/svg" width="10" height="10"><rect width="5" height="5"/></svg>'


def links_of(document: Path) -> list[str]:
    return re.findall(r"!\[[^\n]*?\]\(([^)\s]+)\)", document.read_text(encoding="utf-8"))


def assert_links_resolve(document: Path) -> None:
    for link in links_of(document):
        assert (document.parent / link).is_file(), link


def doc(*keys: str) -> str:
    return "# Dossier\n\n" + "\n\n".join(f"![{k}](x-figures/{k}.svg)" for k in keys) + "\n"


def test_the_dossier_and_its_figures_are_written_side_by_side(tmp_path: Path) -> None:
    inp = with_verdicts(sample_input())
    out = tmp_path / "fibre.md"
    text = dossier_markdown(inp, figure_dir="fibre-figures")
    figures = {figure_file(k): svg.encode() for k, svg in dossier_figures(inp).items()}
    written = docfiles.write_document(out, text, tmp_path / "fibre-figures", figures)
    assert written[0] == out and out.read_text(encoding="utf-8") == text
    assert sorted(links_of(out)) == sorted(f"fibre-figures/{name}" for name in figures)
    assert_links_resolve(out)
    assert (
        (tmp_path / "fibre-figures" / "causal-diagram.svg")
        .read_bytes()
        .lstrip()
        .startswith((b"<svg", b"<?xml"))
    )


def test_a_figure_no_longer_linked_is_removed_only_after_the_new_document_is_in_place(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out, folder = tmp_path / "x.md", tmp_path / "x-figures"
    docfiles.write_document(out, doc("a", "b"), folder, {"a.svg": SVG.encode(), "b.svg": SVG.encode()})

    # interrupted after the figures were swapped in: the old document still finds both of its figures
    def crash(path: Path, data: bytes) -> Path:
        raise OSError("disk full")

    monkeypatch.setattr(docfiles, "write_file", crash)
    with pytest.raises(OSError, match="disk full"):
        docfiles.write_document(out, doc("a", "c"), folder, {"a.svg": SVG.encode(), "c.svg": SVG.encode()})
    assert out.read_text(encoding="utf-8") == doc("a", "b")
    assert_links_resolve(out)
    monkeypatch.undo()

    # completed: exactly the new figures remain
    docfiles.write_document(out, doc("a", "c"), folder, {"a.svg": SVG.encode(), "c.svg": SVG.encode()})
    assert out.read_text(encoding="utf-8") == doc("a", "c")
    assert sorted(p.name for p in folder.iterdir()) == ["a.svg", "c.svg"]
    assert_links_resolve(out)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no staging or temporary leftovers


def test_a_document_without_figures_leaves_no_figure_folder(tmp_path: Path) -> None:
    out, folder = tmp_path / "x.md", tmp_path / "x-figures"
    docfiles.write_document(out, doc("a"), folder, {"a.svg": SVG.encode()})
    docfiles.write_document(out, doc(), folder, {})
    assert not folder.exists() and out.read_text(encoding="utf-8") == doc()


def test_a_figure_folder_holding_other_files_is_refused_before_anything_is_written(tmp_path: Path) -> None:
    out, folder = tmp_path / "x.md", tmp_path / "x-figures"
    folder.mkdir()
    (folder / "notes.txt").write_text("mine", encoding="utf-8")
    with pytest.raises(InvalidInputError, match=r"holds files that are not dossier figures \(notes.txt\)"):
        docfiles.write_document(out, doc("a"), folder, {"a.svg": SVG.encode()})
    assert not out.exists()
    assert sorted(p.name for p in folder.iterdir()) == ["notes.txt"]


def test_a_single_file_is_replaced_whole_or_not_at_all(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    out = tmp_path / "d.html"
    docfiles.write_file(out, b"old")

    def fail(src: str, dst: str) -> None:
        raise OSError("interrupted")

    monkeypatch.setattr(docfiles.os, "replace", fail)
    with pytest.raises(OSError, match="interrupted"):
        docfiles.write_file(out, b"new")
    assert out.read_bytes() == b"old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.html"]  # the temporary file is gone


def test_the_dossier_command_writes_markdown_with_its_figure_folder(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    from ivdossier.workflows.demo import build_demo, ticking_clock

    demo = tmp_path / "demo"
    build_demo(demo, clock=ticking_clock())
    out = tmp_path / "reports" / "mast report.md"
    code, _out, err = cli(
        "--db", str(demo / "ivdossier.sqlite"), "dossier", "mast-distance", "--out", str(out)
    )
    assert code == 0, err
    links = links_of(out)
    assert links and all(link.startswith("mast%20report-figures/") for link in links)
    for link in links:
        assert (out.parent / link.replace("%20", " ")).is_file(), link
