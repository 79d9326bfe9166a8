"""Team edits of a program's causal graph, checked at the moment of the write.

An edge is refused, with nothing written, when it names a node the graph does not have (the message suggests
the closest known name), joins a node to itself, or would close a cycle in any instrument graph it is drawn in.
Program-wide edges may only name what every instrument's graph has (treatment, outcome, declared covariates and
the unmeasured-causes node); an edge that touches one instrument's own column or one threat's node is scoped to
that instrument (``instrument=``), so its siblings' graphs, dossiers and the site are untouched.
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry import records
from ivdossier.registry.instruments import (
    add_edge,
    covariates_of,
    edges_for,
    edges_of,
    find_edge,
    instruments_of,
    remove_edge,
    reverse_edge,
)
from ivdossier.registry.models import GraphEdge, Instrument, Program
from ivdossier.workflows.dossiers import CONFOUNDER, base_graph, graph_roles


def program_nodes(session: Session, program: Program) -> dict[str, str]:
    """Nodes every instrument's graph of the program has, each with what it is."""
    treatment, outcome = program.treatment or "X", program.outcome or "Y"
    if treatment == outcome:
        treatment, outcome = "X", "Y"
    nodes = {
        treatment: "treatment",
        outcome: "outcome",
        CONFOUNDER: "unmeasured causes of treatment and outcome",
    }
    for cov in covariates_of(session, program):
        nodes[cov.name] = "covariate" if cov.measured else "covariate, not measured"
    return nodes


def _program_wide_problem(session: Session, program: Program, source: str, target: str) -> str | None:
    """Why a program-wide edge cannot name these nodes (a node only some instruments' graphs have), or None."""
    nodes = program_nodes(session, program)
    for end in (source, target):
        if end in nodes:
            continue
        owners = [inst.slug for inst in instruments_of(session, program) if end in base_graph(session, inst)]
        if owners:
            return (
                f"{end!r} is a node of instrument {', '.join(owners)}'s graph only, so a program-wide "
                f"edge would break every other instrument's graph; scope the edge with --instrument "
                f"{owners[0]} (or say `graph common-cause {owners[0]} COVARIATE` for a common cause of the "
                "instrument and the outcome)"
            )
        close = difflib.get_close_matches(end, list(nodes), n=1, cutoff=0.5)
        hint = f"did you mean {close[0]!r}? " if close else ""
        return (
            f"edge {source} -> {target} names unknown node {end!r}; {hint}program-wide nodes: "
            f"{', '.join(sorted(nodes))} (declare a new variable with `graph covariate` first)"
        )
    return None


def _graphs(
    session: Session, program: Program, instrument: Instrument | None
) -> list[tuple[Instrument, list[tuple[str, str]]]]:
    """Every instrument an edge of this scope is drawn in, with the team edges its graph has now."""
    targets = [instrument] if instrument is not None else instruments_of(session, program)
    return [(inst, [(e.source, e.target) for e in edges_for(session, inst)]) for inst in targets]


def _refuse_if_invalid(
    session: Session,
    program: Program,
    instrument: Instrument | None,
    source: str,
    target: str,
    *,
    without: tuple[str, str] | None = None,
) -> None:
    """Raise InvalidInputError naming the problem and the fix when source -> target cannot be drawn in scope."""
    from ivdossier.threats_catalog.graph import add_team_edges, edge_problem

    if source == target:
        raise InvalidInputError(
            f"edge {source} -> {target} is a self-loop; an edge must join two different nodes. Nothing was written."
        )
    if instrument is None:
        problem = _program_wide_problem(session, program, source, target)
        if problem:
            raise InvalidInputError(problem + ". Nothing was written.")
    for inst, current in _graphs(session, program, instrument):
        G = base_graph(session, inst)
        add_team_edges(G, [e for e in current if e != without])
        if G.has_edge(source, target) and G.edges[source, target].get("base"):
            raise ConflictError(
                f"edge {source} -> {target} is part of every instrument graph's base design already; "
                "nothing to add."
            )
        problem = edge_problem(G, source, target, where=f"in instrument {inst.slug}'s graph")
        if problem is not None:
            raise InvalidInputError(problem.removeprefix("cycle: ") + ". Nothing was written.")


def _scope(session: Session, program: str, instrument: str | None) -> tuple[Program, Instrument | None]:
    prog = records.get(session, Program, program)
    if instrument is None:
        return prog, None
    inst = records.get(session, Instrument, instrument)
    if inst.program_id != prog.id:
        raise InvalidInputError(
            f"instrument {inst.slug!r} is not in program {prog.slug!r}; pick one of: "
            f"{', '.join(i.slug for i in instruments_of(session, prog))}."
        )
    return prog, inst


def add_team_edge(
    session: Session,
    *,
    actor: str,
    program: str,
    source: str,
    target: str,
    instrument: str | None = None,
    note: str = "",
) -> GraphEdge:
    """Check, then store, a team edge (program-wide, or only in ``instrument``'s graph)."""
    prog, inst = _scope(session, program, instrument)
    _refuse_if_invalid(session, prog, inst, source, target)
    return add_edge(
        session,
        actor=actor,
        program=prog.slug,
        source=source,
        target=target,
        note=note,
        instrument=instrument,
    )


def stored_edge(
    session: Session, *, program: str, source: str, target: str, instrument: str | None = None
) -> GraphEdge:
    """The stored team edge of this scope, or a NotFoundError listing the edges the program has."""
    prog, inst = _scope(session, program, instrument)
    edge = find_edge(session, prog, source, target, inst)
    if edge is not None:
        return edge
    listed = [describe(session, e) for e in edges_of(session, prog)]
    where = f"instrument {inst.slug}'s graph" if inst is not None else f"program {prog.slug} (program-wide)"
    hint = (
        f" The program's team edges: {'; '.join(listed)}. Add --instrument SLUG for an instrument-scoped edge."
        if listed
        else " The program has no team edges yet."
    )
    raise NotFoundError(f"no team edge {source} -> {target} in {where}.{hint} See `graph show {prog.slug}`.")


def remove_team_edge(
    session: Session,
    *,
    actor: str,
    program: str,
    source: str,
    target: str,
    instrument: str | None = None,
    reason: str = "",
) -> GraphEdge:
    """Delete a stored team edge (audited); removing an edge never makes a graph invalid."""
    edge = stored_edge(session, program=program, source=source, target=target, instrument=instrument)
    remove_edge(session, actor=actor, edge=edge, reason=reason)
    return edge


def reverse_team_edge(
    session: Session,
    *,
    actor: str,
    program: str,
    source: str,
    target: str,
    instrument: str | None = None,
    reason: str = "",
) -> GraphEdge:
    """Turn a stored team edge round after checking that the reversed edge closes no cycle (audited)."""
    edge = stored_edge(session, program=program, source=source, target=target, instrument=instrument)
    prog, inst = _scope(session, program, instrument)
    _refuse_if_invalid(session, prog, inst, target, source, without=(source, target))
    return reverse_edge(session, actor=actor, edge=edge, reason=reason)


def add_common_cause(
    session: Session, *, actor: str, instrument: str, covariate: str, note: str = ""
) -> list[GraphEdge]:
    """Say that ``covariate`` causes both the instrument and the outcome, in this instrument's graph only (two
    instrument-scoped edges; one already drawn is kept as it is)."""
    inst = records.get(session, Instrument, instrument)
    prog = records.get_by_id(session, Program, inst.program_id)
    covs = {c.name for c in covariates_of(session, prog)}
    if covariate not in covs:
        close = difflib.get_close_matches(covariate, sorted(covs), n=1, cutoff=0.5)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        raise InvalidInputError(
            f"{covariate!r} is not a declared covariate of program {prog.slug!r}.{hint} Declare it with "
            f"`graph covariate {prog.slug} {covariate} [--unmeasured]` first. Nothing was written."
        )
    roles = graph_roles(prog, inst)
    ends = [(covariate, roles["instrument"]), (covariate, roles["outcome"])]
    current = {(e.source, e.target) for e in edges_for(session, inst)}
    todo = [e for e in ends if e not in current]
    for source, target in todo:  # check both before writing either
        _refuse_if_invalid(session, prog, inst, source, target)
    G = base_graph(session, inst)
    from ivdossier.threats_catalog.graph import add_team_edges

    if add_team_edges(G, [*current, *todo]):
        raise InvalidInputError(
            f"{covariate} cannot cause both {roles['instrument']} and {roles['outcome']} without a cycle in "
            f"instrument {inst.slug!r}'s graph; see `graph show {prog.slug}`. Nothing was written."
        )
    return [
        add_edge(
            session,
            actor=actor,
            program=prog.slug,
            source=source,
            target=target,
            note=note or "common cause of the instrument and the outcome",
            instrument=inst.slug,
        )
        for source, target in todo
    ]


def describe(session: Session, edge: GraphEdge) -> str:
    """``a -> b`` with its scope, e.g. ``geography -> nearc4 (instrument nearc4 only)``."""
    if edge.instrument_id is None:
        return f"{edge.source} -> {edge.target} (program-wide)"
    inst = records.get_by_id(session, Instrument, edge.instrument_id)
    return f"{edge.source} -> {edge.target} (instrument {inst.slug} only)"


@dataclass(frozen=True)
class GraphListing:
    """What `graph show` prints: the program's nodes, covariates and team edges with their scope."""

    program: str
    nodes: dict[str, str]
    covariates: tuple[dict[str, Any], ...]
    edges: tuple[dict[str, Any], ...]
    instruments: tuple[dict[str, Any], ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "program": self.program,
            "nodes": dict(self.nodes),
            "covariates": [dict(c) for c in self.covariates],
            "edges": [dict(e) for e in self.edges],
            "instruments": [dict(i) for i in self.instruments],
        }


def graph_listing(session: Session, program: str) -> GraphListing:
    """The program's covariates, team edges (with scope and note) and, per instrument, its node and any team
    edge its graph leaves out."""
    from ivdossier.workflows.dossiers import instrument_graph

    prog = records.get(session, Program, program)
    slugs = {i.id: i.slug for i in instruments_of(session, prog)}
    edges = tuple(
        {
            "from": e.source,
            "to": e.target,
            "scope": slugs.get(e.instrument_id, "?") if e.instrument_id is not None else "program",
            "note": e.note,
        }
        for e in edges_of(session, prog)
    )
    covs = tuple(
        {"name": c.name, "measured": c.measured, "description": c.description}
        for c in covariates_of(session, prog)
    )
    insts = []
    for inst in instruments_of(session, prog):
        G, _ = instrument_graph(session, inst)
        insts.append(
            {
                "instrument": inst.slug,
                "node": graph_roles(prog, inst)["instrument"],
                "left_out": [f"{u} -> {v}: {why}" for u, v, why in G.graph.get("skipped_edges", ())],
            }
        )
    return GraphListing(prog.slug, program_nodes(session, prog), covs, edges, tuple(insts))
