"""A static site of dossiers: an index of programs, one comparison page per program, one page per instrument and
a catalogue page. Every page is a self-contained HTML file; links are relative; file names come from sanitised
slugs and are checked to stay inside the output folder. The site is rendered completely, staged beside the folder
and swapped in at once, so a failed or interrupted build leaves the previous site (or none), never a partial one.

Layout::

    index.html
    catalogue.html
    studies.html                                  (when studies are recorded: each study and its audit)
    programs/<program>/index.html                 (candidates side by side, plans, link to the runs)
    programs/<program>/runs.html                  (every run of the program's instruments)
    programs/<program>/plans/<plan>.html          (one page per pre-analysis plan)
    programs/<program>/instruments/<instrument>.html
"""

from __future__ import annotations

import os
import re
import unicodedata
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ivdossier import safefiles
from ivdossier.errors import InvalidInputError
from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.dossier import CAUTIONS, dossier_html, headline_run
from ivdossier.reports.estimates import ar_set_of, effective_f_of
from ivdossier.reports.html import render_html
from ivdossier.reports.inputs import (
    CONDITIONS,
    AuditInputs,
    CatalogEntry,
    DossierInput,
    LinkInfo,
    ProgramInfo,
)
from ivdossier.reports.parallel import render_parallel
from ivdossier.vocabulary import BROKEN, READING_ASPECTS

if TYPE_CHECKING:
    from ivdossier.estimation.audit import AuditSummary


@dataclass(frozen=True)
class PlanPage:
    """A pre-analysis plan as the site shows it: its sealed form (drafts: the same shape, no freeze fields)."""

    program: str
    slug: str
    title: str
    state: str
    instrument: str = ""
    sealed: Mapping[str, Any] = field(default_factory=dict)
    sha256: str = ""
    frozen_at: str = ""


@dataclass(frozen=True)
class RunRow:
    """One stored run on a program's runs page: what it is, when, whether primary, and its key results."""

    program: str
    instrument: str
    slug: str
    kind: str
    created: str
    primary: bool = False
    summary: tuple[tuple[str, str], ...] = ()
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class PendingDossier:
    """A dossier assembled only where its page is rendered (in a forked worker when the site uses several cores).

    `assemble` must not read the registry: whatever it needs is read before the site is built, since a worker
    must never use the parent's database connection. `program` and `slug` place the page in the site before the
    dossier exists; they must equal the assembled dossier's program and instrument slug.
    """

    program: ProgramInfo
    slug: str
    assemble: Callable[[], DossierInput]


@dataclass(frozen=True)
class StudiesAudit:
    """Every recorded study and the re-examination of what it reported (the literature audit)."""

    summary: AuditSummary
    inputs: AuditInputs


_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(10)), *(f"lpt{i}" for i in range(10))}
_MAX_SLUG = 64


def safe_slug(text: str) -> str:
    """A file-name-safe slug: ASCII letters, digits, '-' and '_' only; never empty, '.', '..' or a device name."""
    ascii_text = unicodedata.normalize("NFKD", str(text)).encode("ascii", "ignore").decode("ascii")
    slug = re.sub(r"[^a-z0-9_-]+", "-", ascii_text.lower())
    slug = re.sub(r"-{2,}", "-", slug).strip("-_")[:_MAX_SLUG].strip("-_")
    if not slug:
        slug = "item"
    if slug in _RESERVED:
        slug = f"x-{slug}"
    return slug


def _unique(slug: str, used: set[str]) -> str:
    candidate, n = slug, 2
    while candidate in used:
        candidate = f"{slug}-{n}"
        n += 1
    used.add(candidate)
    return candidate


def _write(root: Path, relative: str, text: str, pages: dict[str, bytes]) -> None:
    """Add one page to the site being staged; its path must stay inside the site folder."""
    _check_inside(root, relative)
    pages[relative] = text.encode("utf-8")


def _check_inside(root: Path, relative: str) -> None:
    """Refuse a page path that would lie outside the site folder."""
    if (root / relative).resolve(strict=False) != root.joinpath(
        *relative.split("/")
    ) or ".." in relative.split("/"):
        raise InvalidInputError(f"refusing to write {relative}: it lies outside the site folder {root}.")


def _is_site_file(rel: str, kind: str) -> bool:
    """Entries an earlier site build writes: the two top pages, and folders and pages under programs/."""
    if rel in ("index.html", "catalogue.html", "studies.html"):
        return kind == "file"
    if rel == "programs" or rel.startswith("programs/"):
        return kind == "dir" or (kind == "file" and rel.endswith(".html"))
    return False


def _check_old_site(root: Path) -> list[str]:
    """Files of an earlier site in root; a folder holding anything else (links included) is refused."""
    if not os.path.lexists(root):
        return []
    if root.is_symlink() or not root.is_dir():
        raise InvalidInputError(f"{str(root)!r} is not a folder; choose a new or empty folder for the site.")
    entries = [
        e
        for e in safefiles.scan_tree(root)
        if e.rel.split("/")[0] not in safefiles.PRESERVED
        and e.rel.rsplit("/", 1)[-1] not in safefiles.CLUTTER
    ]
    strays = [
        e.rel + (" (a symbolic link)" if e.kind == "link" else "")
        for e in entries
        if not _is_site_file(e.rel, e.kind)
    ]
    if strays:
        raise InvalidInputError(
            f"{str(root)!r} holds files that are not part of an ivdossier site ({', '.join(sorted(strays)[:5])}); "
            "choose a new or empty folder, or move them away."
        )
    return [e.rel for e in entries if e.kind == "file"]


def build_site(
    out_dir: str | Path,
    programs: Sequence[ProgramInfo],
    dossiers: Sequence[DossierInput | PendingDossier],
    catalog_entries: Sequence[CatalogEntry] = (),
    *,
    title: str = "Instrument dossiers",
    plans: Sequence[PlanPage] = (),
    runs: Sequence[RunRow] = (),
    studies: StudiesAudit | None = None,
) -> list[Path]:
    """Write the site under `out_dir` and return the written files (index first).

    Dossiers are grouped by their program's slug; a dossier whose program is not in `programs` brings its own.
    A `PendingDossier` is assembled together with its page (on all cores when there are many), so the site is
    the same as one built from the assembled dossiers. `plans` and `runs` are shown under their program;
    `studies` (when given) gets its own page.
    """
    root = Path(out_dir).expanduser().resolve()
    safefiles.clean_stale(root)
    old = _check_old_site(root)
    ordered: list[ProgramInfo] = list(programs)
    known = {p.slug for p in ordered}
    for d in dossiers:
        if d.program.slug not in known:
            ordered.append(d.program)
            known.add(d.program.slug)
    used_programs: set[str] = set()
    program_dirs = {p.slug: _unique(safe_slug(p.slug), used_programs) for p in ordered}
    by_program: dict[str, list[DossierInput | PendingDossier]] = {p.slug: [] for p in ordered}
    for d in dossiers:
        by_program[d.program.slug].append(d)
    extras = _Extras(plans=plans, runs=runs, studies=studies)
    # The pages are written into a staging folder beside the site as they are rendered (the instrument pages while
    # the rest are still being rendered); once every page is there, the whole site replaces the old one in one
    # swap. An error on the way removes the staging folder and leaves the old site as it was.
    with safefiles.staged_tree(root, allowed_old=old, compare=False) as stage:
        with mt.for_html():
            written = _pages(
                root, ordered, by_program, program_dirs, dossiers, catalog_entries, title, extras, stage.write
            )
        for rel, data in written.items():
            if rel not in stage.files:
                stage.write(rel, data)
        stage.commit()
    return [root.joinpath(*rel.split("/")) for rel in written]


def _slug_of(d: DossierInput | PendingDossier) -> str:
    return d.slug if isinstance(d, PendingDossier) else d.instrument.slug


def _pages(
    root: Path,
    ordered: Sequence[ProgramInfo],
    by_program: dict[str, list[DossierInput | PendingDossier]],
    program_dirs: dict[str, str],
    dossiers: Sequence[DossierInput | PendingDossier],
    catalog_entries: Sequence[CatalogEntry],
    title: str,
    extras: _Extras,
    stage: Callable[[str, bytes], None],
) -> dict[str, bytes]:
    # The instrument pages are most of the work and independent of each other: they are assembled (when pending)
    # and rendered first, on all cores, each with what the pages listing it show of it (a `_Summary`).
    files: dict[int, str] = {}
    instrument_pages: list[tuple[str, DossierInput | PendingDossier, str, str]] = []
    for program in ordered:
        folder = program_dirs[program.slug]
        used: set[str] = set()
        files.update({id(d): _unique(safe_slug(_slug_of(d)), used) for d in by_program[program.slug]})
        nav = (
            f"[All programs](../../../index.html) · [{mt.inline(program.title or program.slug)}](../index.html)"
            " · [Threat catalogue](../../../catalogue.html)"
        )
        for d in by_program[program.slug]:
            relative = f"programs/{folder}/instruments/{files[id(d)]}.html"
            _check_inside(root, relative)  # before the page is staged
            instrument_pages.append((relative, d, nav, files[id(d)]))
    _warm_up()

    def staged(i: int, made: tuple[bytes, _Summary]) -> None:
        stage(instrument_pages[i][0], made[0])

    rendered = render_parallel(instrument_pages, _instrument_page, staged)
    html_of: dict[str, bytes] = {}
    summary: dict[int, _Summary] = {}
    for (relative, d, _, _), (html, made) in zip(instrument_pages, rendered, strict=True):
        html_of[relative] = html
        summary[id(d)] = made
    groups = {slug: [summary[id(d)] for d in ds] for slug, ds in by_program.items()}

    stamp = _stamp([summary[id(d)] for d in dossiers])
    written: dict[str, bytes] = {}
    has_studies = extras.studies is not None and bool(extras.studies.inputs.studies)
    _write(root, "index.html", _index_page(ordered, groups, program_dirs, title, stamp, has_studies), written)
    _write(root, "catalogue.html", _catalogue_page(catalog_entries, stamp), written)
    if has_studies and extras.studies is not None:
        _write(root, "studies.html", _studies_page(extras.studies, stamp), written)
    for program in ordered:
        folder = program_dirs[program.slug]
        used_plans: set[str] = set()
        plans = [pl for pl in extras.plans if pl.program == program.slug]
        plan_files = {pl.slug: _unique(safe_slug(pl.slug), used_plans) for pl in plans}
        runs = [r for r in extras.runs if r.program == program.slug]
        mine = groups[program.slug]
        by_slug = {sm.slug: sm.file for sm in mine}
        page = _program_page(program, mine, stamp, plans, plan_files, len(runs))
        _write(root, f"programs/{folder}/index.html", page, written)
        _write(root, f"programs/{folder}/runs.html", _runs_page(program, runs, by_slug, stamp), written)
        for pl in plans:
            _write(
                root, f"programs/{folder}/plans/{plan_files[pl.slug]}.html", _plan_page(program, pl), written
            )
        for sm in mine:
            relative = f"programs/{folder}/instruments/{sm.file}.html"  # checked before it was staged
            written[relative] = html_of[relative]  # the page keeps its place in the site's order
    return written


def _warm_up() -> None:
    """Import and build once here what a dossier page loads on first use, so that forked workers inherit it
    instead of each loading it again."""
    from ivdossier.reports import html, jackknife_plot, plots, svgplot, variant_checklist  # noqa: F401

    html.stylesheet()
    html._section_parser()  # remembered per process, as the stylesheet


@dataclass(frozen=True)
class _Summary:
    """What the pages listing an instrument show of it (taken from its dossier where its page is rendered, so
    that only this, not the dossier, comes back from a worker)."""

    slug: str
    file: str
    sort_key: str
    row: tuple[str, ...]
    broken: bool
    generated_text: str
    tool_version: str


def _summary(d: DossierInput, file: str) -> _Summary:
    return _Summary(
        slug=d.instrument.slug,
        file=file,
        sort_key=(d.instrument.name or d.instrument.slug).lower(),
        row=_candidate_row(d, file),
        broken=any(v.status == BROKEN for v in d.verdicts),
        generated_text=d.generated_text,
        tool_version=d.tool_version,
    )


def _instrument_page(page: tuple[str, DossierInput | PendingDossier, str, str]) -> tuple[bytes, _Summary]:
    """The instrument's page (its dossier assembled first when pending) and its summary."""
    _, d, nav, file = page
    if isinstance(d, PendingDossier):
        pending, d = d, d.assemble()
        if d.program.slug != pending.program.slug or d.instrument.slug != pending.slug:
            raise RuntimeError(
                f"the pending dossier {pending.program.slug}/{pending.slug} was assembled as "
                f"{d.program.slug}/{d.instrument.slug}"
            )
    return dossier_html(d, preamble=nav).encode("utf-8"), _summary(d, file)


@dataclass(frozen=True)
class _Extras:
    plans: Sequence[PlanPage]
    runs: Sequence[RunRow]
    studies: StudiesAudit | None


def _studies_page(studies: StudiesAudit, stamp: str) -> str:
    from ivdossier.reports.audit_doc import audit_markdown

    body = audit_markdown(studies.summary, studies.inputs)
    nav = "[All programs](index.html) · [Threat catalogue](catalogue.html)"
    parts = [nav, body.rstrip()] + ([stamp] if stamp else [])
    return render_html("\n\n".join(parts) + "\n", title="Studies and their audit", svgs={}, badges={})


def _plan_page(program: ProgramInfo, plan: PlanPage) -> str:
    from ivdossier.reports.plan_doc import plan_markdown

    nav = (
        f"[All programs](../../../index.html) · [{mt.inline(program.title or program.slug)}](../index.html)"
        " · [Threat catalogue](../../../catalogue.html)"
    )
    body = plan_markdown(plan.sealed, state=plan.state, sha256=plan.sha256)
    return render_html(nav + "\n\n" + body, title=f"Plan: {plan.title or plan.slug}", svgs={})


def _runs_page(program: ProgramInfo, runs: Sequence[RunRow], files: Mapping[str, str], stamp: str) -> str:
    parts = [
        "[All programs](../../index.html) · [Program](index.html) · [Threat catalogue](../../catalogue.html)",
        f"# Runs: {mt.inline(program.title or program.slug)}",
    ]
    if stamp:
        parts.append(stamp)
    if not runs:
        parts.append("No runs have been stored for this program's instruments yet.")
    by_instrument: dict[str, list[RunRow]] = {}
    for r in runs:
        by_instrument.setdefault(r.instrument, []).append(r)
    for instrument, rows in sorted(by_instrument.items()):
        page = files.get(instrument)
        head = (
            f"[{mt.inline(instrument)}](instruments/{page}.html)"
            if page
            else mt.inline(instrument or "no instrument")
        )
        table = mt.table(
            ["Run", "Kind", "Created", "Primary", "Key results"],
            [
                [
                    mt.cell(r.slug),
                    mt.cell(r.kind),
                    mt.cell(r.created),
                    "yes" if r.primary else "–",
                    "; ".join(f"{mt.inline(k)}: {mt.inline(v)}" for k, v in r.summary) or "–",
                ]
                for r in rows
            ],
            "lllcl",
        )
        warnings = [
            f"- **Warning (run {mt.inline(r.slug)}):** {mt.inline(w)}" for r in rows for w in r.warnings
        ]
        parts.append(f"## {head}\n\n{table}" + ("\n\n" + "\n".join(warnings) if warnings else ""))
    parts.append(
        "The headline of each dossier uses the run marked primary, else the latest estimate; "
        "`ivdossier run show RUN --json` gives a run's full results."
    )
    return render_html("\n\n".join(parts) + "\n", title=f"Runs: {program.title or program.slug}", svgs={})


def _stamp(dossiers: Sequence[_Summary]) -> str:
    if not dossiers:
        return ""
    latest = max(dossiers, key=lambda d: d.generated_text)
    return f"*Generated {mt.inline(latest.generated_text)} by ivdossier {mt.inline(latest.tool_version)}.*"


def _index_page(
    programs: Sequence[ProgramInfo],
    by_program: dict[str, list[_Summary]],
    dirs: dict[str, str],
    title: str,
    stamp: str,
    has_studies: bool = False,
) -> str:
    parts = [f"# {mt.inline(title)}"]
    if stamp:
        parts.append(stamp)
    if programs:
        rows = []
        for p in programs:
            ds = by_program[p.slug]
            broken = sum(1 for d in ds if d.broken)
            rows.append(
                [
                    f"[{mt.inline(p.title or p.slug)}](programs/{dirs[p.slug]}/index.html)",
                    mt.cell(p.question),
                    str(len(ds)),
                    str(broken),
                ]
            )
        parts.append(
            "## Research programs\n\n"
            + mt.table(
                ["Program", "Question", "Candidate instruments", "With a broken condition"], rows, "llrr"
            )
        )
    else:
        parts.append("No programs have been registered yet.")
    reference = "[The threat catalogue](catalogue.html) describes the recorded ways an instrument can fail, by condition."
    if has_studies:
        reference += (
            "\n\n[Studies and their audit](studies.html): earlier studies that used these instruments, their "
            "critiques, and whether each reported result survives re-examination."
        )
    parts.append("## Reference\n\n" + reference)
    parts.append("## Cautions\n\n" + "\n\n".join(CAUTIONS[:3]))
    return render_html("\n\n".join(parts) + "\n", title=title, svgs={}, toc=False)


def _badge(d: DossierInput, condition: str) -> str:
    verdict = d.verdict(condition)
    return mt.badge(verdict.status) if verdict is not None else "–"


def _strongest_threat(links: Sequence[LinkInfo]) -> str:
    live = [lk for lk in links if lk.state in ("fatal", "open", "accepted")]
    if not live:
        return "none unresolved"

    def weight(lk: LinkInfo) -> tuple[int, float, str]:
        score = (lk.mean_likelihood or 0.0) * (lk.mean_severity or 0.0)
        return (1 if lk.state == "fatal" else 0, score, lk.threat_code)

    top = max(live, key=weight)
    sev = f", severity {rv.fmt(top.mean_severity, 2)}" if top.mean_severity is not None else ", unrated"
    return f"{mt.inline(top.threat_code)} {mt.inline(top.title)} ({top.state}{sev})"


def _candidate_row(d: DossierInput, file: str) -> tuple[str, ...]:
    """The instrument's row in its program's side-by-side table."""
    run = headline_run(d.runs)
    feff = effective_f_of(run.result)[0] if run is not None else None
    ar = ar_set_of(run.result) if run is not None else None
    described = ", ".join(mt.inline(x) for x in (d.instrument.family, d.instrument.state) if x)
    return (
        f"[{mt.inline(d.instrument.name or d.instrument.slug)}](instruments/{file}.html)"
        + (f" ({described})" if described else ""),
        *[_badge(d, c) for c in CONDITIONS],
        _strongest_threat(d.links),
        rv.fmt(feff) if feff is not None else "–",
        rv.fmt_set(ar) if ar is not None else "–",
    )


def _program_page(
    program: ProgramInfo,
    dossiers: Sequence[_Summary],
    stamp: str,
    plans: Sequence[PlanPage] = (),
    plan_files: Mapping[str, str] | None = None,
    n_runs: int = 0,
) -> str:
    parts = [
        "[All programs](../../index.html) · [Threat catalogue](../../catalogue.html)",
        f"# {mt.inline(program.title or program.slug)}",
    ]
    facts = [
        (label, value)
        for label, value in (
            ("Question", program.question),
            ("Treatment", program.treatment),
            ("Outcome", program.outcome),
            ("Unit", program.unit),
            ("Population", program.population),
        )
        if value
    ]
    if facts:
        parts.append("\n".join(f"- **{label}:** {mt.inline(value)}" for label, value in facts))
    if stamp:
        parts.append(stamp)
    if dossiers:
        rows = [list(d.row) for d in sorted(dossiers, key=lambda x: x.sort_key)]
        headers = ["Instrument (family, state)", *[c.capitalize() for c in CONDITIONS]]
        headers += ["Strongest unresolved threat", "Effective F", "AR set"]
        parts.append(
            "## Candidate instruments side by side\n\n"
            "Verdicts are derived by the rules in `ivdossier.workflows.verdicts`; effective F and the "
            "Anderson–Rubin (AR) set come from each instrument's primary run, else its latest run with diagnostics.\n\n"
            + mt.table(headers, rows, "lccccl" + "rr")
        )
    else:
        parts.append("No candidate instruments have been registered for this program yet.")
    if plans:
        rows = [
            [
                f"[{mt.inline(pl.title or pl.slug)}](plans/{(plan_files or {})[pl.slug]}.html)",
                mt.cell(pl.instrument),
                "frozen" if pl.state == "frozen" else "draft (not sealed)",
                mt.cell(pl.frozen_at),
                mt.cell(pl.sha256[:12]),
            ]
            for pl in plans
        ]
        parts.append(
            "## Pre-analysis plans\n\n"
            + mt.table(["Plan", "Instrument", "State", "Frozen at", "SHA-256 (first 12)"], rows, "lllll")
        )
    parts.append(
        f"## Runs\n\n[Every run of this program's instruments]({'runs.html'}) ({n_runs} stored), with its kind, "
        "whether it is primary and its key results."
    )
    parts.append("## Cautions\n\n" + "\n\n".join(CAUTIONS[:3]))
    title = f"Program: {program.title or program.slug}"
    return render_html("\n\n".join(parts) + "\n", title=title, svgs={}, toc=False, wide=True)


def _catalogue_page(entries: Sequence[CatalogEntry], stamp: str) -> str:
    parts = ["[All programs](index.html)", "# Threat catalogue"]
    if stamp:
        parts.append(stamp)
    if not entries:
        parts.append("The catalogue is empty.")
    for condition in CONDITIONS + READING_ASPECTS:
        mine = sorted((e for e in entries if e.condition == condition), key=lambda e: e.code)
        if not mine:
            continue
        kind = " (reading the estimate)" if condition in READING_ASPECTS else ""
        blocks = [f"## {condition.capitalize()}{kind} ({len(mine)})"]
        for e in mine:
            facts = []
            if e.families:
                facts.append("Families: " + ", ".join(mt.inline(f) for f in e.families))
            if e.testability:
                facts.append(f"testability: {mt.inline(e.testability)}")
            if e.checks:
                facts.append("checks: " + ", ".join(mt.inline(c) for c in e.checks))
            block = f"#### {mt.inline(e.code)} · {mt.inline(e.title)}"
            if e.description.strip():
                block += "\n\n" + mt.block(e.description)
            if facts:
                block += "\n\n" + "; ".join(facts) + "."
            blocks.append(block)
        parts.append("\n\n".join(blocks))
    return render_html("\n\n".join(parts) + "\n", title="Threat catalogue", svgs={}, toc=len(entries) > 0)
