"""A static site of dossiers: an index of programs, one comparison page per program, one page per instrument and
a catalogue page. Every page is a self-contained HTML file; links are relative; file names come from sanitised
slugs and are checked to stay inside the output folder. The site is rendered completely, staged beside the folder
and swapped in at once, so a failed or interrupted build leaves the previous site (or none), never a partial one.

Layout::

    index.html
    catalogue.html
    programs/<program>/index.html
    programs/<program>/instruments/<instrument>.html
"""

from __future__ import annotations

import os
import re
import unicodedata
from collections.abc import Sequence
from pathlib import Path

from ivdossier import safefiles
from ivdossier.errors import InvalidInputError
from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.dossier import CAUTIONS, dossier_html, headline_run
from ivdossier.reports.estimates import ar_set_of, effective_f_of
from ivdossier.reports.html import render_html
from ivdossier.reports.inputs import CONDITIONS, CatalogEntry, DossierInput, LinkInfo, ProgramInfo
from ivdossier.vocabulary import BROKEN, READING_ASPECTS

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
    if (root / relative).resolve(strict=False) != root.joinpath(
        *relative.split("/")
    ) or ".." in relative.split("/"):
        raise InvalidInputError(f"refusing to write {relative}: it lies outside the site folder {root}.")
    pages[relative] = text.encode("utf-8")


def _is_site_file(rel: str, kind: str) -> bool:
    """Entries an earlier site build writes: the two top pages, and folders and pages under programs/."""
    if rel in ("index.html", "catalogue.html"):
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
    dossiers: Sequence[DossierInput],
    catalog_entries: Sequence[CatalogEntry] = (),
    *,
    title: str = "Instrument dossiers",
) -> list[Path]:
    """Write the site under `out_dir` and return the written files (index first).

    Dossiers are grouped by their program's slug; a dossier whose program is not in `programs` brings its own.
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
    by_program: dict[str, list[DossierInput]] = {p.slug: [] for p in ordered}
    for d in dossiers:
        by_program[d.program.slug].append(d)
    with mt.for_html():
        written = _pages(root, ordered, by_program, program_dirs, dossiers, catalog_entries, title)
    # Every page is rendered before anything is written; then the whole site replaces the old one in one swap.
    safefiles.replace_tree(root, written, allowed_old=old)
    return [root.joinpath(*rel.split("/")) for rel in written]


def _pages(
    root: Path,
    ordered: Sequence[ProgramInfo],
    by_program: dict[str, list[DossierInput]],
    program_dirs: dict[str, str],
    dossiers: Sequence[DossierInput],
    catalog_entries: Sequence[CatalogEntry],
    title: str,
) -> dict[str, bytes]:
    stamp = _stamp(dossiers)
    written: dict[str, bytes] = {}
    _write(root, "index.html", _index_page(ordered, by_program, program_dirs, title, stamp), written)
    _write(root, "catalogue.html", _catalogue_page(catalog_entries, stamp), written)
    for program in ordered:
        folder = program_dirs[program.slug]
        used: set[str] = set()
        files = {id(d): _unique(safe_slug(d.instrument.slug), used) for d in by_program[program.slug]}
        page = _program_page(program, by_program[program.slug], files, stamp)
        _write(root, f"programs/{folder}/index.html", page, written)
        for d in by_program[program.slug]:
            nav = (
                f"[All programs](../../../index.html) · [{mt.inline(program.title or program.slug)}](../index.html)"
                " · [Threat catalogue](../../../catalogue.html)"
            )
            _write(
                root,
                f"programs/{folder}/instruments/{files[id(d)]}.html",
                dossier_html(d, preamble=nav),
                written,
            )
    return written


def _stamp(dossiers: Sequence[DossierInput]) -> str:
    if not dossiers:
        return ""
    latest = max(dossiers, key=lambda d: d.generated_text)
    return f"*Generated {mt.inline(latest.generated_text)} by ivdossier {mt.inline(latest.tool_version)}.*"


def _index_page(
    programs: Sequence[ProgramInfo],
    by_program: dict[str, list[DossierInput]],
    dirs: dict[str, str],
    title: str,
    stamp: str,
) -> str:
    parts = [f"# {mt.inline(title)}"]
    if stamp:
        parts.append(stamp)
    if programs:
        rows = []
        for p in programs:
            ds = by_program[p.slug]
            broken = sum(1 for d in ds if any(v.status == BROKEN for v in d.verdicts))
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
    parts.append(
        "## Reference\n\n[The threat catalogue](catalogue.html) describes the recorded ways an instrument can fail, by condition."
    )
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


def _program_page(
    program: ProgramInfo, dossiers: Sequence[DossierInput], files: dict[int, str], stamp: str
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
        rows = []
        for d in sorted(dossiers, key=lambda x: (x.instrument.name or x.instrument.slug).lower()):
            run = headline_run(d.runs)
            feff = effective_f_of(run.result)[0] if run is not None else None
            ar = ar_set_of(run.result) if run is not None else None
            described = ", ".join(mt.inline(x) for x in (d.instrument.family, d.instrument.state) if x)
            rows.append(
                [
                    f"[{mt.inline(d.instrument.name or d.instrument.slug)}](instruments/{files[id(d)]}.html)"
                    + (f" ({described})" if described else ""),
                    *[_badge(d, c) for c in CONDITIONS],
                    _strongest_threat(d.links),
                    rv.fmt(feff) if feff is not None else "–",
                    rv.fmt_set(ar) if ar is not None else "–",
                ]
            )
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
