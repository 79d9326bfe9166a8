"""Static site: pages per program and instrument, relative links only, nothing written outside out_dir."""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest

from ivdossier.estimation.diagnostics import DiagnosticSuite
from ivdossier.reports import resultview as rv
from ivdossier.reports.inputs import CatalogEntry, InstrumentInfo, ProgramInfo
from ivdossier.reports.sample import PROGRAM, make_run, sample_input
from ivdossier.reports.site import PlanPage, RunRow, build_site, safe_slug
from ivdossier.workflows.sample import sample_dossier_input
from ivdossier.workflows.verdicts import with_verdicts

HOSTILE_SLUGS = [
    "../../etc/passwd",
    "/abs/path",
    "..",
    ".",
    "",
    "a/../../b",
    "C:\\Windows\\system32",
    "con",
    "name with spaces & ümlauts",
    "x" * 300,
    "\x00nul",
]


@pytest.mark.parametrize("slug", HOSTILE_SLUGS)
def test_safe_slug_keeps_only_plain_file_name_characters(slug: str) -> None:
    out = safe_slug(slug)
    assert re.fullmatch(r"[a-z0-9][a-z0-9_-]{0,63}", out), out
    assert out not in ("con", "nul", ".", "..")


def test_safe_slug_examples() -> None:
    assert safe_slug("Fibre Wave (2019)") == "fibre-wave-2019"
    assert safe_slug("../../etc/passwd") == "etc-passwd"
    assert safe_slug("Überweisung") == "uberweisung"
    assert safe_slug("") == "item"


def dossier_for(program: ProgramInfo, slug: str, name: str) -> object:
    base = sample_input(n_links=3, n_runs=2)
    runs = (make_run(1, plots=False),)  # plots are covered elsewhere; keep this test fast
    return dataclasses.replace(
        base, program=program, instrument=InstrumentInfo(slug=slug, name=name), runs=runs
    )


def test_hostile_slugs_never_escape_the_output_folder(tmp_path: Path) -> None:
    out = tmp_path / "site"
    evil_program = ProgramInfo(slug="../../outside", title="Evil program")
    dossiers = [dossier_for(evil_program, s, f"Instrument {i}") for i, s in enumerate(HOSTILE_SLUGS)]
    written = build_site(out, [evil_program], [with_verdicts(d) for d in dossiers], [])  # type: ignore[arg-type]
    root = out.resolve()
    assert all(p.resolve().is_relative_to(root) for p in written)
    assert sorted(p for p in tmp_path.rglob("*") if p.is_file()) == sorted(written)
    # one page per instrument even when sanitised slugs collide ("." and "" both become "item")
    pages = [p for p in written if p.parent.name == "instruments"]
    assert len(pages) == len(HOSTILE_SLUGS) == len({p.name for p in pages})


def test_site_layout_and_relative_links(tmp_path: Path) -> None:
    second = ProgramInfo(slug="telehealth-ed-2", title="A second question")
    dossiers = [sample_input(), dossier_for(PROGRAM, "mast", "Mast distance"), dossier_for(second, "z", "Z")]
    catalogue = [
        CatalogEntry(
            "TH-017",
            "Broadband also brings online pharmacy",
            "exclusion",
            ("timing of entry",),
            "partly testable",
            "Other services arrive with the fibre.",
            ("placebo outcome",),
        ),
    ]
    plan = PlanPage(program=PROGRAM.slug, slug="fibre-plan", title="Plan for the fibre wave", state="draft",
                    sealed={"title": "Plan for the fibre wave", "content": {}})  # fmt: skip
    run = RunRow(program=PROGRAM.slug, instrument="mast", slug="mast-estimate-1", kind="estimate",
                 created="2026-11-02T08:00:00+00:00")  # fmt: skip
    written = build_site(
        tmp_path,
        [PROGRAM],
        [with_verdicts(d) for d in dossiers],
        catalogue,
        plans=[plan],
        runs=[run],  # type: ignore[arg-type]
    )
    rel = sorted(str(p.relative_to(tmp_path.resolve())) for p in written)
    assert rel == sorted(
        [
            "index.html",
            "catalogue.html",
            "programs/telehealth-ed/index.html",
            "programs/telehealth-ed/runs.html",
            "programs/telehealth-ed/plans/fibre-plan.html",
            "programs/telehealth-ed/instruments/fibre-wave.html",
            "programs/telehealth-ed/instruments/mast.html",
            "programs/telehealth-ed-2/index.html",
            "programs/telehealth-ed-2/runs.html",
            "programs/telehealth-ed-2/instruments/z.html",
        ]
    )
    for page in written:
        html = page.read_text(encoding="utf-8")
        for href in re.findall(r'href="([^"]*)"', html):
            assert not re.match(r"^[a-z]+:", href) and not href.startswith("/"), (page, href)
            if not href.startswith("#"):
                assert (page.parent / href).resolve().is_file(), (page, href)


def test_program_page_uses_the_primary_run_when_one_is_marked(tmp_path: Path) -> None:
    real = sample_dossier_input()
    assert len(real.runs) >= 2
    first = real.runs[0]
    marked = dataclasses.replace(real, runs=(dataclasses.replace(first, primary=True), *real.runs[1:]))
    build_site(tmp_path, [PROGRAM], [with_verdicts(marked)], [])  # type: ignore[arg-type]
    page = (tmp_path / "programs/telehealth-ed/index.html").read_text(encoding="utf-8")
    table = page[page.index("<table>") : page.index("</table>")]
    # the dossier's headline run (the primary one, here the OLS run), not the latest 2SLS run, gives the numbers
    assert first.method == "ols"
    latest = real.runs[-1].result
    assert latest is not None and isinstance(latest.diagnostics, DiagnosticSuite)
    eff = latest.diagnostics.strength.effective_f
    assert eff is not None and f">{rv.fmt(eff.statistic)}<" not in table
    assert table.count(">–</td>") >= 2  # no effective F and no AR set for an OLS run


def test_program_page_compares_candidates(tmp_path: Path) -> None:
    real = sample_dossier_input()  # runs from the real producers (workflows.sample)
    dossiers = [real, dossier_for(PROGRAM, "mast", "Mast distance")]
    build_site(tmp_path, [PROGRAM], [with_verdicts(d) for d in dossiers], [])  # type: ignore[arg-type]
    page = (tmp_path / "programs/telehealth-ed/index.html").read_text(encoding="utf-8")
    table = page[page.index("<table>") : page.index("</table>")]
    assert table.count("<tr>") == 3  # header and two instruments
    assert "Fibre rollout wave" in table and "Mast distance" in table
    assert "TH-017 Broadband also brings online pharmacy (open, severity 4.5)" in table
    latest = real.runs[-1].result
    assert latest is not None and isinstance(latest.diagnostics, DiagnosticSuite)
    eff = latest.diagnostics.strength.effective_f
    assert eff is not None and f">{rv.fmt(eff.statistic)}<" in table  # the latest run's own numbers
    assert rv.fmt_set(latest.diagnostics.weak_iv_robust.anderson_rubin.intervals) in table
    assert table.count('class="badge ') == 8


def test_site_pages_for_plans_runs_and_studies(tmp_path: Path) -> None:
    from ivdossier.reports.inputs import AuditInputs, CritiqueInfo
    from ivdossier.reports.site import StudiesAudit
    from ivdossier.workflows.studies import build_audit

    plans = [
        PlanPage(program=PROGRAM.slug, slug="fibre-plan", title="Fibre <plan>", state="frozen", instrument="fibre-wave",
                 sealed={"title": "Fibre <plan>", "plan": "fibre-plan", "content": {}, "frozen_at": "2026-11-01T10:00:00+00:00",
                         "frozen_by": "ana"}, sha256="ab" * 32, frozen_at="2026-11-01T10:00:00+00:00"),
    ]  # fmt: skip
    runs = [
        RunRow(program=PROGRAM.slug, instrument="fibre-wave", slug="fibre-wave-estimate-1", kind="estimate",
               created="2026-11-02T08:00:00+00:00", primary=True,
               summary=(("estimate of telehealth", "-0.41 (standard error 0.1)"),),
               warnings=("only 12 clusters (G < 42)",)),
        RunRow(program=PROGRAM.slug, instrument="fibre-wave", slug="fibre-wave-power-1", kind="power",
               created="2026-11-03T08:00:00+00:00"),
    ]  # fmt: skip
    inputs = AuditInputs(
        "all studies",
        (("Good2019", "Good (2019)", {"estimate": 5.0, "std_error": 1.0, "first_stage_f": 200.0},
          (CritiqueInfo("DG-E01", "Roads built with fibre", "exclusion", "ana", "see appendix"),)),),
    )  # fmt: skip
    build_site(tmp_path, [PROGRAM], [with_verdicts(sample_input())], plans=plans, runs=runs,
               studies=StudiesAudit(build_audit(inputs), inputs))  # fmt: skip

    program = (tmp_path / "programs" / "telehealth-ed" / "index.html").read_text(encoding="utf-8")
    assert '<a href="plans/fibre-plan.html">Fibre &lt;plan&gt;</a>' in program  # user text stays text
    assert "abababababab" in program and "frozen" in program
    assert '<a href="runs.html">' in program

    plan_page = (tmp_path / "programs" / "telehealth-ed" / "plans" / "fibre-plan.html").read_text(
        encoding="utf-8"
    )
    assert "<title>Plan: Fibre &lt;plan&gt;</title>" in plan_page and "ab" * 32 in plan_page

    runs_page = (tmp_path / "programs" / "telehealth-ed" / "runs.html").read_text(encoding="utf-8")
    rows = re.findall(r"<tr>\s*<td[^>]*>([^<]+)</td>\s*<td[^>]*>([^<]+)</td>", runs_page)
    assert rows == [("fibre-wave-estimate-1", "estimate"), ("fibre-wave-power-1", "power")]
    assert '<a href="instruments/fibre-wave.html">fibre-wave</a>' in runs_page
    assert "estimate of telehealth: -0.41 (standard error 0.1)" in runs_page
    assert "only 12 clusters (G &lt; 42)" in runs_page

    studies = (tmp_path / "studies.html").read_text(encoding="utf-8")
    assert "Good (2019)" in studies and "DG-E01" in studies
    assert "Statistics cannot establish exclusion or exogeneity." in studies
    index = (tmp_path / "index.html").read_text(encoding="utf-8")
    assert '<a href="studies.html">Studies and their audit</a>' in index
