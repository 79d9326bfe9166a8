"""Gather what one instrument's dossier shows from the registry: claims, links, ratings, graph verdict, runs.

This module joins the layers (registry rows -> graph checker -> report inputs) so that the CLI, the demo and a
notebook all build the same documents.
"""

from __future__ import annotations

import dataclasses
import functools
import gc
import os
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime
from functools import lru_cache
from pathlib import Path
from typing import Any

from sqlalchemy import event, select
from sqlalchemy.orm import ORMExecuteState, Session

from ivdossier import __version__
from ivdossier.registry import bulk, records
from ivdossier.registry.bulk import EventRow, LinkRow, RatingRow
from ivdossier.registry.history import history
from ivdossier.registry.instruments import covariates_of, edges_of
from ivdossier.registry.models import (
    CONDITIONS,
    AuditEvent,
    Covariate,
    Dataset,
    GraphEdge,
    Instrument,
    Link,
    Program,
    Run,
    Study,
    Threat,
)
from ivdossier.registry.runs import runs_of
from ivdossier.registry.threats import links_of
from ivdossier.reports import inputs as ri
from ivdossier.threats_catalog.graph import GraphVerdict
from ivdossier.vocabulary import SPEC_KEYS, Verdict
from ivdossier.workflows.catalog_sync import catalog_entry, registry_catalog
from ivdossier.workflows.fragility import fragility_runs

CONFOUNDER = "U"


class RegistryReader:
    """What dossiers read from the registry, through one session.

    Used as is, each read is one query the first time it is asked (and remembered); after `preload` every read
    comes from a few batch queries over the whole registry (`ivdossier.registry.bulk`: one per table), so the
    site costs the same number of queries for ten instruments as for ten thousand. Both give the same rows in
    the same order, so a dossier is identical either way.
    """

    def __init__(self, session: Session) -> None:
        self.session = session
        self._programs: dict[int, Program] = {}
        self._links: dict[int, list[tuple[Link | LinkRow, Threat]]] = {}
        self._rating_rows: dict[int, list[RatingRow]] | None = None
        self._runs: dict[int, list[Run]] = {}
        self._datasets: dict[int, Dataset | None] = {}
        self._covariates: dict[int, list[Covariate]] = {}
        self._edges: dict[int, list[GraphEdge]] = {}
        self._events: dict[str, list[EventRow]] | None = None
        self._studies: list[Study] | None = None
        self._entries: dict[tuple[int | None, int], Any] = {}
        self.preloaded = False

    def preload(self, instruments: Sequence[Instrument]) -> None:
        """Read everything the dossiers of `instruments` show in one batch query per table (with the garbage
        collector paused: every object read is kept, so its collections would find nothing)."""
        with collector_paused():
            self._preload(instruments)

    def _preload(self, instruments: Sequence[Instrument]) -> None:
        ids = [i.id for i in instruments if i.id is not None]
        self._programs = bulk.programs(self.session)
        links, _threats = bulk.link_rows_by_instrument(self.session, ids)
        self._links = {i: list(links.get(i, [])) for i in ids}
        link_ids = [lk.id for pairs in self._links.values() for lk, _ in pairs if lk.id is not None]
        self._rating_rows = bulk.rating_rows_by_link(self.session, link_ids)
        runs = bulk.runs_by_instrument(self.session, ids)
        self._runs = {i: runs.get(i, []) for i in ids}
        dataset_ids = {r.dataset_id for rs in self._runs.values() for r in rs if r.dataset_id}
        found = bulk.datasets(self.session, dataset_ids)
        self._datasets = {i: found.get(i) for i in dataset_ids}
        self._covariates = dict(bulk.covariates_by_program(self.session))
        self._edges = dict(bulk.edges_by_program(self.session))
        uuids = [i.uuid for i in instruments] + [lk.uuid for pairs in self._links.values() for lk, _ in pairs]
        self._events = dict(bulk.event_rows_by_entity(self.session, uuids))
        self._studies = list(self.session.scalars(select(Study).order_by(Study.key)))
        self.preloaded = True

    def program(self, instrument: Instrument) -> Program:
        pid = instrument.program_id
        if pid not in self._programs:
            self._programs[pid] = records.get_by_id(self.session, Program, pid)
        return self._programs[pid]

    def links(self, instrument: Instrument) -> list[tuple[Link | LinkRow, Threat]]:
        """The instrument's (link, threat) pairs by threat code; after `preload` each link is a `LinkRow` (its
        columns only, read without building model objects)."""
        key = instrument.id or 0
        if key not in self._links:
            self._links[key] = list(links_of(self.session, instrument))
        return self._links[key]

    def rating_infos(self, link: Link | LinkRow) -> tuple[ri.Rating, ...]:
        """The link's ratings as the reports layer reads them, by reviewer handle (then rating id)."""
        if self._rating_rows is None:
            rows = bulk.rating_rows_by_link(self.session, [link.id]).get(link.id or 0, [])
        else:
            rows = self._rating_rows.get(link.id or 0, [])
        return tuple(_rating(r.handle, r.likelihood, r.severity, r.comment) for r in rows)

    def runs(self, instrument: Instrument) -> list[Run]:
        key = instrument.id or 0
        if key not in self._runs:
            self._runs[key] = runs_of(self.session, instrument)
        return self._runs[key]

    def dataset(self, dataset_id: int | None) -> Dataset | None:
        if not dataset_id:
            return None
        if dataset_id not in self._datasets:
            self._datasets[dataset_id] = self.session.get(Dataset, dataset_id)
        return self._datasets[dataset_id]

    def covariates(self, program: Program) -> list[Covariate]:
        key = program.id or 0
        if key not in self._covariates:
            self._covariates[key] = [] if self.preloaded else covariates_of(self.session, program)
        return self._covariates[key]

    def edges(self, instrument: Instrument) -> list[GraphEdge]:
        """The team edges drawn in the instrument's graph: program-wide ones and those scoped to it."""
        key = instrument.program_id
        if key not in self._edges:
            self._edges[key] = [] if self.preloaded else edges_of(self.session, self.program(instrument))
        return [e for e in self._edges[key] if e.instrument_id is None or e.instrument_id == instrument.id]

    def events(self, uuids: Sequence[str]) -> list[AuditEvent] | list[EventRow]:
        """The audit events of these entities, oldest first (ties by id); after `preload` as `EventRow`s."""
        if self._events is None:
            return history(self.session, entity_uuids=set(uuids))
        groups = self._events
        events = [e for u in dict.fromkeys(uuids) for e in groups.get(u, ())]
        return sorted(events, key=lambda e: (e.at, e.id))

    def any_studies(self) -> bool:
        """Whether the registry records any study at all."""
        if self._studies is None:
            self._studies = list(self.session.scalars(select(Study).order_by(Study.key)))
        return bool(self._studies)

    def has_studies(self, instrument: Instrument) -> bool:
        """Whether any study is attached to the instrument or its family (decided without the audit's numerics)."""
        if not self.any_studies():
            return False
        assert self._studies is not None
        return any(
            instrument.slug in (s.instruments or [])
            or (instrument.family and instrument.family in (s.families or []))
            for s in self._studies
        )

    def catalog_entry(self, threat: Threat) -> Any:
        """The threat as a validated catalogue entry, validated once per threat (and version) per reader."""
        key = (threat.id, threat.version)
        if key not in self._entries:
            self._entries[key] = catalog_entry(threat)
        return self._entries[key]


@contextmanager
def collector_paused() -> Iterator[None]:
    """Automatic garbage collection off while the block runs (as it was before, afterwards)."""
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def graph_roles(program: Program, instrument: Instrument) -> dict[str, str]:
    """Node names for the graph: the data columns where known, else the role letters."""
    z = instrument.columns[0] if instrument.columns and len(instrument.columns) == 1 else instrument.slug
    roles = {"instrument": z, "treatment": program.treatment or "X", "outcome": program.outcome or "Y"}
    if len(set(roles.values())) < 3:
        roles = {"instrument": "Z", "treatment": "X", "outcome": "Y"}
    return roles


def conditioning_of(
    session: Session, instrument: Instrument, program: Program, *, reader: RegistryReader | None = None
) -> set[str]:
    """Measured covariates the headline estimation run (the primary one, else the latest) controlled for: the set
    W the graph check conditions on."""
    reader = reader or RegistryReader(session)
    runs = [r for r in reader.runs(instrument) if r.run_kind == "estimate"]
    if not runs:
        return set()
    headline = next((r for r in runs if r.is_primary), runs[-1])
    used = set((headline.spec or {}).get("controls", []) or [])
    measured = {c.name for c in reader.covariates(program) if c.measured}
    return used & measured


def instrument_graph(
    session: Session,
    instrument: Instrument,
    *,
    team_edges: Sequence[tuple[str, str]] | None = None,
    reader: RegistryReader | None = None,
) -> tuple[Any, GraphVerdict]:
    """Build the instrument's causal graph from its program, linked threats and team edges, and check it.

    The team edges are the program-wide ones and those scoped to this instrument (``team_edges`` replaces them,
    to try an edit before it is written). An edge that no longer fits (its node left with a rebutted threat, or
    it would close a cycle with a newly linked threat) is left out and named in ``G.graph["skipped_edges"]``."""
    from ivdossier.threats_catalog.graph import add_team_edges, check_instrument

    reader = reader or RegistryReader(session)
    G = base_graph(session, instrument, reader=reader)
    if team_edges is None:
        team_edges = [(e.source, e.target) for e in reader.edges(instrument)]
    G.graph["skipped_edges"] = add_team_edges(G, team_edges)
    program = reader.program(instrument)
    roles = graph_roles(program, instrument)
    conditioning = conditioning_of(session, instrument, program, reader=reader)
    verdict = check_instrument(G, conditioning=conditioning, **roles)
    return G, verdict


def base_graph(session: Session, instrument: Instrument, *, reader: RegistryReader | None = None) -> Any:
    """The instrument's graph without team edges: roles, declared covariates and linked threats' fragments."""
    from ivdossier.threats_catalog.graph import build_graph

    reader = reader or RegistryReader(session)
    program = reader.program(instrument)
    fragments = []
    states: dict[str, str] = {}
    for link, threat in reader.links(instrument):
        states[threat.code] = link.state
        fragments.append(reader.catalog_entry(threat).fragment)
    covariates = {c.name: c.measured for c in reader.covariates(program)}
    return build_graph(
        **graph_roles(program, instrument),
        covariates=covariates,
        fragments=fragments,
        link_states=states,
        confounder=CONFOUNDER,
    )


def program_info(program: Program) -> ri.ProgramInfo:
    """A program as the reports layer reads it."""
    return ri.ProgramInfo(
        slug=program.slug,
        title=program.title,
        question=program.question,
        treatment=program.treatment,
        outcome=program.outcome,
        unit=program.unit,
        population=program.population,
    )


def check_finding(check: str, runs: Sequence[Run]) -> str:
    """What the newest relevant run found for a catalogue check, or that it has not been run yet.

    Over-identification looks for the newest run that has more instruments than treatments.
    """
    from ivdossier.threats_catalog.checks import CHECKS
    from ivdossier.workflows.findings import finding, run_kind_for_command

    spec = CHECKS.get(check)
    if spec is None:
        return ""
    if not spec.computable:
        return spec.how_to_run
    try:
        kind = run_kind_for_command(spec.command)
    except KeyError:  # a check answered by a command that stores no run (e.g. comparing runs with a plan)
        return f"answered by a command, not by a stored run (command: {spec.command})"
    candidates = [r for r in reversed(runs) if r.run_kind == kind]
    if check == "over-identification":
        candidates = [
            r for r in candidates if ((r.results or {}).get("overid") or {}).get("p_value") is not None
        ]
    if not candidates:
        return f"not run yet (command: {spec.command})"
    return f"{finding(check, candidates[0].results or {}, candidates[0].run_kind)} (run {candidates[0].slug})"


@lru_cache(maxsize=4096)
def _rating(reviewer: str, likelihood: int, severity: int, comment: str) -> ri.Rating:
    """A rating as the reports layer reads it (a frozen record, so equal ratings share one object)."""
    return ri.Rating(reviewer=reviewer, likelihood=likelihood, severity=severity, comment=comment)


SPEC_ORDER: tuple[str, ...] = ("data", *SPEC_KEYS)
"""The order a run's spec is shown in: the model spec's own order (its echo), then an analysis's options by name."""


def canonical_spec_order(spec: Mapping[str, Any]) -> dict[str, Any]:
    """A stored spec in one order whatever order it was stored in (an exported and imported run stores its keys
    sorted), so a dossier reads the same in every registry that holds the run."""
    known = [k for k in SPEC_ORDER if k in spec]
    return {k: spec[k] for k in [*known, *sorted(k for k in spec if k not in SPEC_ORDER)]}


def run_info(session: Session, run: Run, *, reader: RegistryReader | None = None) -> ri.RunInfo:
    """A stored run as the reports layer reads it, with its plot summaries, primary mark and inference warnings."""
    from ivdossier.workflows.run_records import warnings_of

    results: Mapping[str, Any] = run.results or {}
    plots: Mapping[str, Any] = results.get("plot_data") or {}
    bins = plots.get("first_stage_bins")
    curve = plots.get("ar_curve")
    dataset = (reader or RegistryReader(session)).dataset(run.dataset_id)
    return ri.RunInfo(
        slug=run.slug,
        created_at=run.created_at,
        method=str(results.get("method", (run.spec or {}).get("method", ""))),
        vcov=str(results.get("vcov", (run.spec or {}).get("vcov", ""))),
        spec=canonical_spec_order(run.spec or {}),
        dataset_path=dataset.path if dataset else "",
        dataset_sha256=dataset.sha256 if dataset else "",
        results={k: v for k, v in results.items() if k != "plot_data"},
        package_versions=run.versions or {},
        seconds=run.seconds,
        first_stage_bins=ri.FirstStageBins(
            x_bins=tuple(bins["x_bins"]),
            y_bins=tuple(bins["y_bins"]),
            x_label=bins.get("x_label", "instrument"),
            y_label=bins.get("y_label", "treatment"),
        )
        if bins
        else None,
        ar_curve=ri.ArCurve(
            betas=tuple(curve["betas"]), stats=tuple(curve["stats"]), critical_value=curve["critical_value"]
        )
        if curve
        else None,
        kind=run.run_kind,
        primary=bool(run.is_primary),
        warnings=warnings_of(run),
    )


def _links(reader: RegistryReader, inst: Instrument, all_runs: Sequence[Run]) -> tuple[ri.LinkInfo, ...]:
    # A check's finding depends on the instrument's runs only: found once per check, not once per link.
    findings: dict[str, str] = {}

    def found(check: str) -> str:
        if check not in findings:
            findings[check] = check_finding(check, all_runs)
        return findings[check]

    return tuple(
        ri.LinkInfo(
            threat_code=threat.code,
            title=threat.title,
            condition=threat.condition,
            state=link.state,
            argument=link.argument,
            evidence=link.evidence,
            ratings=reader.rating_infos(link),
            checks=tuple(ri.CheckInfo(name=c, finding=found(c)) for c in (threat.checks or [])),
        )
        for link, threat in reader.links(inst)
    )


def _instrument_info(inst: Instrument) -> ri.InstrumentInfo:
    return ri.InstrumentInfo(
        slug=inst.slug,
        name=inst.name,
        family=inst.family,
        columns=tuple(inst.columns or ()),
        state=inst.state,
        claims={c: getattr(inst, f"claim_{c}") for c in CONDITIONS},
    )


@dataclass(frozen=True)
class InstrumentCheck:
    """An instrument's causal graph, the graph check on it and the derived verdicts (computed once)."""

    graph: Any
    check: GraphVerdict
    verdicts: tuple[Verdict, ...]


def instrument_check(session: Session, instrument: Instrument) -> InstrumentCheck:
    """The graph, the graph check and the four verdicts of one instrument, as `graph check` and `graph draw` show
    them and as its dossier shows them."""
    G, inp = _assemble(
        session,
        instrument,
        generated_at="",
        relative_to=None,
        reproducible=False,
        prior=False,
        figures=False,
    )
    assert inp.graph is not None and inp.graph.verdict is not None
    return InstrumentCheck(G, inp.graph.verdict, inp.verdicts)


def dossier_input(
    session: Session,
    slug: str,
    *,
    generated_at: datetime | str,
    relative_to: Path | None = None,
    reproducible: bool = False,
    reader: RegistryReader | None = None,
) -> ri.DossierInput:
    """Everything the dossier of instrument `slug` shows, read in one session, with its verdicts derived once.

    `relative_to` shows dataset paths relative to that folder when they lie inside it; `reproducible` leaves out
    what differs from machine to machine (run timings and installed package versions), for golden files.
    `reader` shares reads between many dossiers (the site preloads one).
    """
    inst = records.get(session, Instrument, slug)
    return _dossier_input(
        session,
        inst,
        generated_at=generated_at,
        relative_to=relative_to,
        reproducible=reproducible,
        reader=reader or RegistryReader(session),
    )


def _dossier_input(
    session: Session,
    inst: Instrument,
    *,
    generated_at: datetime | str,
    relative_to: Path | None,
    reproducible: bool,
    reader: RegistryReader,
    prior_uses: tuple[str, ...] | None = None,
) -> ri.DossierInput:
    """The dossier input with its diagram drawn; `prior_uses` (the literature audit sections, read beforehand)
    spares the reads `_prior_uses` makes, so that a forked worker can assemble it without the database."""
    from ivdossier.threats_catalog.draw import fill_marks, render_svg_parts

    G, inp = _assemble(
        session,
        inst,
        reader=reader,
        generated_at=generated_at,
        relative_to=relative_to,
        reproducible=reproducible,
        prior=True,
        prior_uses=prior_uses,
    )
    assert inp.graph is not None
    template, fills = render_svg_parts(
        G, inp.graph.verdict, title=f"Causal diagram for {inst.name}", verdicts=inp.verdicts
    )
    graph = ri.GraphInfo(
        verdict=inp.graph.verdict,
        svg=fill_marks(template, fills),
        svg_template=template if fills else "",
        svg_fills=fills,
    )
    return dataclasses.replace(inp, graph=graph)


def _assemble(
    session: Session,
    inst: Instrument,
    *,
    generated_at: datetime | str,
    relative_to: Path | None,
    reproducible: bool,
    prior: bool,
    reader: RegistryReader | None = None,
    figures: bool = True,
    prior_uses: tuple[str, ...] | None = None,
) -> tuple[Any, ri.DossierInput]:
    """The graph and the dossier input (without the drawing) with its verdicts derived once; without `figures`
    no plot is drawn (the verdicts never read one)."""
    from ivdossier.reports.design_sections import KINDS as DESIGN_KINDS
    from ivdossier.workflows.evidence_runs import evidence_fields
    from ivdossier.workflows.verdicts import with_verdicts

    reader = reader or RegistryReader(session)
    program = reader.program(inst)
    all_runs = reader.runs(inst)
    G, check = instrument_graph(session, inst, reader=reader)
    runs = tuple(
        _portable(run_info(session, r, reader=reader), relative_to, reproducible)
        for r in all_runs
        if r.run_kind == "estimate"
    )
    events = reader.events([inst.uuid, *(lk.uuid for lk, _ in reader.links(inst))])
    audit = tuple(
        ri.AuditEvent(
            when=e.at,
            actor=e.actor,
            action=plain_action(e.action),
            entity=e.entity_label,
            summary=e.reason or ", ".join(sorted((e.after or {}).keys()))[:200],
        )
        for e in events
    )
    inp = ri.DossierInput(
        extra_sections=(
            (prior_uses if prior_uses is not None else _prior_uses(session, inst, reader)) if prior else ()
        ),
        program=program_info(program),
        instrument=_instrument_info(inst),
        generated_at=generated_at,
        tool_version=__version__,
        links=_links(reader, inst, all_runs),
        runs=runs,
        fragility=fragility_runs(all_runs),
        graph=ri.GraphInfo(verdict=check),
        audit=audit,
        evidence_runs=tuple(
            _portable(run_info(session, r, reader=reader), relative_to, reproducible)
            for r in all_runs
            if r.run_kind in DESIGN_KINDS
        ),
        **evidence_fields(all_runs, figures=figures),
    )
    return G, with_verdicts(inp)


def _portable(run: ri.RunInfo, relative_to: Path | None, reproducible: bool) -> ri.RunInfo:
    """The run with its dataset path relative to `relative_to` and, when reproducible, no timing or versions."""
    changes: dict[str, Any] = {}
    if relative_to is not None:
        changes["dataset_path"] = _relative(run.dataset_path, relative_to)
        if isinstance(run.spec.get("data"), str):
            changes["spec"] = {**run.spec, "data": _relative(run.spec["data"], relative_to)}
    if reproducible:
        changes.update(seconds=None, package_versions={})
    return dataclasses.replace(run, **changes) if changes else run


def _relative(path: str, base: Path) -> str:
    if not path:
        return path
    try:
        return Path(path).resolve().relative_to(base.resolve()).as_posix()
    except ValueError:
        return path


def _prior_uses(session: Session, instrument: Instrument, reader: RegistryReader) -> tuple[str, ...]:
    """The literature audit of studies attached to the instrument or its family, when there are any."""
    if not reader.has_studies(instrument):  # decided before the audit's numerics are imported
        return ()
    from ivdossier.reports.audit_doc import audit_section_markdown
    from ivdossier.workflows.studies import audit_inputs, build_audit

    inputs = audit_inputs(session, instrument=instrument.slug)
    if not inputs.studies:
        return ()
    return (audit_section_markdown(build_audit(inputs), inputs),)


def write_dossier(
    session: Session,
    slug: str,
    out: Path,
    *,
    generated_at: datetime | str,
    relative_to: Path | None = None,
    reproducible: bool = False,
) -> Path:
    """Write the dossier of instrument `slug` to `out`: .html is one self-contained page; .md is Markdown with its
    figures as SVG files in the folder ``<stem>-figures`` beside it, written together so that no reader ever sees
    a document whose figures are missing (`ivdossier.reports.docfiles`)."""
    from ivdossier.reports import docfiles
    from ivdossier.reports.dossier import dossier_figures, dossier_html, dossier_markdown, figure_folder_name
    from ivdossier.reports.mdtext import figure_file

    inp = dossier_input(
        session, slug, generated_at=generated_at, relative_to=relative_to, reproducible=reproducible
    )
    if out.suffix.lower() == ".html":
        docfiles.write_file(out, dossier_html(inp).encode("utf-8"))
        return out
    folder = out.with_name(figure_folder_name(out.stem))
    text = dossier_markdown(inp, figure_dir=folder.name)
    figures = {figure_file(key): svg.encode("utf-8") for key, svg in dossier_figures(inp).items()}
    docfiles.write_document(out, text, folder, figures)
    return out


def write_site(
    session: Session, out: Path, *, generated_at: datetime | str, relative_to: Path | None = None
) -> list[Path]:
    """Write the static site of the whole registry: programs, candidate comparisons, dossiers, catalogue."""
    from ivdossier.reports.site import PendingDossier, build_site

    programs = list(session.scalars(select(Program).order_by(Program.slug)))
    infos = [program_info(p) for p in programs]
    instruments = bulk.instruments(session)
    reader = RegistryReader(session)
    reader.preload(instruments)
    _import_assembly_modules()  # imported once here, not once per forked worker
    dossiers = [
        PendingDossier(
            program=program_info(reader.program(inst)),
            slug=inst.slug,
            assemble=functools.partial(
                _dossier_input,
                session,
                inst,
                generated_at=generated_at,
                relative_to=relative_to,
                reproducible=False,
                reader=reader,
                prior_uses=_prior_uses(session, inst, reader),  # the only per-instrument reads left
            ),
        )
        for inst in instruments
    ]
    entries = [
        ri.CatalogEntry(
            code=t.code,
            title=t.title,
            condition=t.condition,
            families=t.families,
            testability=t.testability,
            description=t.description,
            checks=t.checks,
        )
        for t in registry_catalog(session)
    ]
    plans = _plan_pages(session, reader)
    runs = _run_rows(reader, instruments)
    studies = _studies_audit(session, reader)
    with _no_reads_in_forked_workers(session):
        return build_site(out, infos, dossiers, entries, plans=plans, runs=runs, studies=studies)


def _import_assembly_modules() -> None:
    """Import what assembling a dossier imports on first use, so that forked workers inherit it."""
    import ivdossier.registry.portability
    import ivdossier.reports.design_sections
    import ivdossier.threats_catalog.checks
    import ivdossier.threats_catalog.draw
    import ivdossier.threats_catalog.graph
    import ivdossier.workflows.evidence_runs
    import ivdossier.workflows.findings
    import ivdossier.workflows.run_records
    import ivdossier.workflows.verdicts  # noqa: F401


@contextmanager
def _no_reads_in_forked_workers(session: Session) -> Iterator[None]:
    """Refuse, in any process forked from this one, a query through `session`: a worker sharing the parent's
    database connection would corrupt it. The refusal fails the worker, and the site is then built serially."""
    parent = os.getpid()

    def refuse(state: ORMExecuteState) -> None:
        if os.getpid() != parent:
            raise RuntimeError(
                "a forked site worker tried to read the registry; every read must happen before the fork"
            )

    event.listen(session, "do_orm_execute", refuse)
    try:
        yield
    finally:
        event.remove(session, "do_orm_execute", refuse)


def _plan_pages(session: Session, reader: RegistryReader) -> list[Any]:
    """Every pre-analysis plan with its sealed form (a draft has the same shape without freeze fields)."""
    from ivdossier.registry.models import Plan
    from ivdossier.registry.plans import sealed_document
    from ivdossier.reports.site import PlanPage

    out = []
    for plan in session.scalars(select(Plan).order_by(Plan.slug)):
        program = session.get(Program, plan.program_id)
        inst = session.get(Instrument, plan.instrument_id) if plan.instrument_id else None
        out.append(
            PlanPage(
                program=program.slug if program else "",
                slug=plan.slug,
                title=plan.title,
                state=plan.state,
                instrument=inst.slug if inst else "",
                sealed=sealed_document(session, plan),
                sha256=plan.sha256 if plan.state == "frozen" else "",
                frozen_at=plan.frozen_at.isoformat(timespec="seconds") if plan.frozen_at else "",
            )
        )
    return out


def _run_rows(reader: RegistryReader, instruments: Sequence[Instrument]) -> list[Any]:
    """Every stored run of every instrument, oldest first, with its key results and inference warnings."""
    from ivdossier.reports.site import RunRow

    rows: list[Any] = []
    for inst in instruments:
        runs = reader.runs(inst)
        if not runs:
            continue
        from ivdossier.workflows.run_records import result_summary, warnings_of

        program = reader.program(inst)
        rows.extend(
            RunRow(
                program=program.slug,
                instrument=inst.slug,
                slug=r.slug,
                kind=r.run_kind,
                created=r.created_at.isoformat(timespec="seconds"),
                primary=bool(r.is_primary),
                summary=result_summary(r),
                warnings=warnings_of(r),
            )
            for r in runs
        )
    return rows


def _studies_audit(session: Session, reader: RegistryReader) -> Any:
    """The literature audit over every recorded study, or None when there is none (numerics stay unloaded)."""
    if not reader.any_studies():
        return None
    from ivdossier.reports.site import StudiesAudit
    from ivdossier.workflows.studies import audit_inputs, build_audit

    inputs = audit_inputs(session)
    return StudiesAudit(summary=build_audit(inputs), inputs=inputs)


def plain_action(action: str) -> str:
    """An audit action without the mark an import puts on another registry's events: a dossier tells what was done
    to the instrument, and reads the same in every registry holding the same history (`ivdossier history` keeps
    the mark)."""
    from ivdossier.registry.portability import IMPORTED_PREFIX

    return action.removeprefix(IMPORTED_PREFIX)
