"""Causal-graph checker: build the instrument's graph from threat fragments and test the instrument criterion.

The criterion used is the conditional instrument definition (Pearl 2009, Causality, 2nd ed., ch. 7; Brito and
Pearl 2002) in its total-effect form: Z is an instrument for the effect of X on Y given a set W when

1. W holds no descendant of X or Y (and never X, Y or Z themselves);
2. W d-separates Z from Y in the graph with every edge out of X removed;
3. W does not d-separate Z from X.

Link states and the graph
-------------------------
The registry attaches threats to an instrument as links with a state; ``build_graph(link_states=...)`` reads:

* ``rebutted``: the fragment is dropped, its nodes and edges are not drawn;
* ``fatal``: the fragment is drawn and its edges are *asserted* (the team judges the threat real);
* ``open``: the fragment is drawn and its edges are only *possible* (raised, not yet answered);
* ``mitigated``, ``accepted``: the fragment is drawn but its edges are only *possible* (the team argues
  the effect is handled or small);
* a fragment whose code has no state, when ``link_states`` is given, is a ``suggested`` preview (possible);
  with ``link_states=None`` (a hand-drawn hypothesis graph, no registry links) every fragment counts as
  ``open`` and its edges are asserted.

Verdict per condition (the graph part; statistics come from the estimation layer)
---------------------------------------------------------------------------------
* exclusion / exogeneity: every open path from Z to Y that avoids X (given W plus selection nodes) is
  classified as exclusion when all its arrows point from Z towards Y, otherwise exogeneity.
  ``broken`` = an open path of that kind whose edges are all asserted (base, team-drawn, or from fatal
  links), or a fatal link for that condition, or (exogeneity) W holds a descendant of X or Y;
  ``at-risk`` = an open path that uses at least one merely possible edge, or an unresolved link whose threat
  has no fragment; ``holds`` = none of these, and at least one threat for the condition was considered
  (any state, rebutted included) or team edges were drawn; ``not-assessed`` = nothing was considered.
* relevance: ``broken`` if W d-separates Z from X or a relevance link is fatal; ``at-risk`` if a relevance
  link is open, mitigated, accepted or suggested; else ``holds`` (``ivdossier estimate`` judges strength).
* monotonicity: a graph cannot express defiers, so the value comes from links alone: fatal -> broken; any
  open, mitigated, accepted or suggested -> at-risk; only rebutted links -> holds; no links -> not-assessed.

Other rules: nodes flagged ``selection`` or ``adjusted`` are always conditioned on; conditioning on a node
flagged ``fixes_instrument`` breaks relevance (the instrument has no variation left), and such nodes are never
offered by :func:`adjustment_sets`; a set that holds a descendant of the instrument comes last and
:func:`adjustment_advice` attaches the warning that it is valid only if nothing unmeasured causes that node;
conditioning on an unobserved node (or on
Z, X, Y) raises InvalidInputError; the criterion itself is decided by d-separation, while the path listing (for
explanation) stops after 200 open or 20,000 visited paths and then says so. Edges that no threat drew (base,
team-drawn, or a hand-made graph without our attributes) count as asserted.

Graphs are :class:`ivdossier.threats_catalog.dag.DiGraph` (networkx is not needed at run time); the functions read
a graph only through the methods that class shares with networkx's ``DiGraph``, so a networkx graph works too.
"""

from __future__ import annotations

import dataclasses
import difflib
import itertools
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.threats_catalog.catalog import CONDITIONS, GraphFragment
from ivdossier.threats_catalog.dag import (
    DiGraph,
    GraphError,
    all_simple_paths,
    ancestors,
    descendants,
    find_cycle,
    has_path,
    is_directed_acyclic_graph,
    relabel_nodes,
    shortest_path,
    skeleton,
)
from ivdossier.vocabulary import LINK_STATES, VERDICTS, verdict_key

#: Pseudo-state for a fragment passed without a link state when ``link_states`` is given.
SUGGESTED = "suggested"
#: States whose fragments stay in the graph.
KEPT_STATES: frozenset[str] = frozenset({"open", "mitigated", "accepted", "fatal", SUGGESTED})
#: States whose edges are asserted (an open path made only of asserted edges breaks a condition).
ASSERTED_STATES: frozenset[str] = frozenset({"fatal"})
#: The vocabulary's verdict values as one token each: holds, at-risk, broken, not-assessed.
VERDICT_VALUES: tuple[str, ...] = tuple(verdict_key(v) for v in VERDICTS)
ROLES: tuple[str, ...] = ("instrument", "treatment", "outcome", "unobserved", "covariate", "intermediate")

_MAX_OPEN_PATHS = 200
_MAX_PATHS_VISITED = 20_000
_MAX_SUBSETS = 1 << 16


# ------------------------------------------------------------------------------------------------ building


def build_graph(
    *,
    instrument: str = "Z",
    treatment: str = "X",
    outcome: str = "Y",
    covariates: Mapping[str, bool] | None = None,
    fragments: Sequence[GraphFragment] = (),
    extra_edges: Iterable[tuple[str, str]] = (),
    link_states: Mapping[str, str] | None = None,
    confounder: str = "U",
) -> DiGraph:
    """Base graph Z -> X -> Y with U -> X, U -> Y, plus covariates, threat fragments and team-drawn edges.

    Fragment role tokens Z, X, Y, U become the given instrument, treatment, outcome and confounder names.
    Node attributes: ``role`` (one of :data:`ROLES`), ``observed``, ``label``, ``selection``, ``threats``.
    Edge attributes: ``threats`` (codes whose fragments drew it), ``base``, ``team``. A covariate's measured
    flag overrides a fragment's ``observed`` default. ``G.graph["threats"]`` maps every fragment's code to
    its condition and state (rebutted ones included, although their edges are left out).

    Examples
    --------
    >>> G = build_graph(instrument="fibre_wave", covariates={"district_income": True})
    >>> sorted(G.successors("fibre_wave"))
    ['X']
    """
    roles = {"instrument": instrument, "treatment": treatment, "outcome": outcome, "unobserved": confounder}
    for role, name in roles.items():
        if not isinstance(name, str) or not name.strip():
            raise InvalidInputError(f"the {role} name must be a non-empty string, got {name!r}")
    if len(set(roles.values())) != 4:
        raise InvalidInputError(
            f"instrument, treatment, outcome and confounder need distinct names, got {list(roles.values())}"
        )
    covs = dict(covariates or {})
    for name, measured in covs.items():
        if name in roles.values():
            raise InvalidInputError(f"covariate {name!r} has the name of a role node; rename the covariate")
        if not isinstance(measured, bool):
            raise InvalidInputError(f"covariate {name!r} needs a measured flag True/False, got {measured!r}")
    if link_states is not None:
        for code, state in link_states.items():
            if state not in LINK_STATES:
                raise InvalidInputError(
                    f"link state {state!r} for threat {code} is unknown; use one of: {', '.join(LINK_STATES)}"
                )
    token = {"Z": instrument, "X": treatment, "Y": outcome, "U": confounder}

    G: DiGraph = DiGraph()
    G.graph.update(
        roles={"instrument": instrument, "treatment": treatment, "outcome": outcome},
        threats={},
        assert_fragments=link_states is None,
    )
    for role, name in roles.items():
        G.add_node(name, role=role, observed=role != "unobserved", label=name, selection=False, threats=[])
    G.nodes[confounder]["label"] = f"unmeasured causes of {treatment} and {outcome}"
    for u, v in (
        (instrument, treatment),
        (treatment, outcome),
        (confounder, treatment),
        (confounder, outcome),
    ):
        G.add_edge(u, v, threats=[], base=True, team=False)
    for name, measured in covs.items():
        G.add_node(name, role="covariate", observed=measured, label=name, selection=False, threats=[])

    for frag in fragments:
        code = frag.threat_code
        state = "open" if link_states is None else link_states.get(code, SUGGESTED)
        G.graph["threats"][code] = {"condition": frag.condition, "state": state, "empty": frag.is_empty}
        if state not in KEPT_STATES:
            continue
        for node in frag.nodes:
            if node.name in roles.values():
                raise InvalidInputError(
                    f"fragment node {node.name!r} of {code} has the same name as a role node; rename the "
                    "project's instrument, treatment or outcome"
                )
            if node.name in G:
                attrs = G.nodes[node.name]
                if node.name not in covs:
                    attrs["observed"] = attrs["observed"] and node.observed
                attrs["selection"] = attrs["selection"] or node.selection
                attrs["adjusted"] = attrs.get("adjusted", False) or node.adjusted
                attrs["fixes_instrument"] = attrs.get("fixes_instrument", False) or node.fixes_instrument
                attrs["threats"].append(code)
                if not attrs["label"] or attrs["label"] == node.name:
                    attrs["label"] = node.label or node.name
            else:
                observed = covs.get(node.name, node.observed)
                G.add_node(
                    node.name,
                    role="covariate" if node.name in covs else ("intermediate" if observed else "unobserved"),
                    observed=observed,
                    label=node.label or node.name,
                    selection=node.selection,
                    adjusted=node.adjusted,
                    fixes_instrument=node.fixes_instrument,
                    threats=[code],
                )
            if G.nodes[node.name]["role"] != "covariate":
                G.nodes[node.name]["role"] = (
                    "intermediate" if G.nodes[node.name]["observed"] else "unobserved"
                )
        for a, b in frag.edges:
            u, v = token.get(a, a), token.get(b, b)
            if G.has_edge(u, v):
                if code not in G.edges[u, v]["threats"]:
                    G.edges[u, v]["threats"].append(code)
            else:
                G.add_edge(u, v, threats=[code], base=False, team=False)

    for pair in extra_edges:
        if not (isinstance(pair, tuple | list) and len(pair) == 2):
            raise InvalidInputError(f"extra edge {pair!r} must be a (from, to) pair of node names")
        u, v = pair
        for end in (u, v):
            if end not in G:
                raise InvalidInputError(
                    f"extra edge ({u!r}, {v!r}) names unknown node {end!r}; add it to covariates first"
                )
        if u == v:
            raise InvalidInputError(f"extra edge ({u!r}, {v!r}) is a self-loop; remove it")
        _add_team_edge(G, u, v)

    if not is_directed_acyclic_graph(G):
        cycle = find_cycle(G)
        chain = " -> ".join([cycle[0][0], *(v for _, v in cycle)])
        codes = sorted({c for u, v in cycle for c in G.edges[u, v]["threats"]})
        team = any(G.edges[u, v]["team"] for u, v in cycle)
        who = ", ".join(codes + (["team-drawn edges"] if team else [])) or "the base graph"
        raise InvalidInputError(
            f"the graph has a cycle {chain} (edges from {who}); rebut one of those threats or reverse an edge"
        )
    return G


def _add_team_edge(G: DiGraph, u: str, v: str) -> None:
    if G.has_edge(u, v):
        G.edges[u, v]["team"] = True
    else:
        G.add_edge(u, v, threats=[], base=False, team=True)


def edge_problem(G: DiGraph, source: str, target: str, *, where: str = "") -> str | None:
    """Why the team edge ``source -> target`` cannot join ``G`` (unknown node, self-loop, cycle), with the fix;
    None when it can. ``where`` names the graph in the message ("in instrument x's graph"). A cycle message
    starts with ``"cycle:"`` so callers can tell it apart."""
    at = f" {where}" if where else ""
    for end in (source, target):
        if end not in G:
            close = difflib.get_close_matches(end, [str(n) for n in G], n=1, cutoff=0.5)
            hint = f"did you mean {close[0]!r}? " if close else ""
            known = ", ".join(sorted(str(n) for n in G))
            return (
                f"edge {source} -> {target} names unknown node {end!r}{at}; {hint}known nodes: {known} "
                "(declare a new variable with `graph covariate` first)"
            )
    if source == target:
        return f"edge {source} -> {target} is a self-loop; an edge must join two different nodes"
    if G.has_edge(source, target) or not has_path(G, target, source):
        return None
    back = shortest_path(G, target, source)
    chain = " -> ".join([source, *back])
    return (
        f"cycle: edge {source} -> {target} would close the cycle {chain}{at}; a causal graph has no cycles. "
        f"Reverse or remove one edge of it (`graph edge reverse`/`graph edge remove` for team edges, "
        "rebut the threat for a threat's edge), or draw the edge the other way"
    )


def add_team_edges(G: DiGraph, edges: Iterable[tuple[str, str]]) -> tuple[tuple[str, str, str], ...]:
    """Add team-drawn edges to ``G`` in order; an edge that names a node not in ``G`` or would close a cycle is
    left out and returned as ``(source, target, reason)`` (so one stale edge never stops a whole graph)."""
    skipped: list[tuple[str, str, str]] = []
    for u, v in edges:
        problem = edge_problem(G, u, v)
        if problem is None:
            _add_team_edge(G, u, v)
        else:
            skipped.append((u, v, problem.removeprefix("cycle: ")))
    return tuple(skipped)


# ----------------------------------------------------------------------------------------------- d-separation


def d_separated(G: DiGraph, xs: Iterable[str], ys: Iterable[str], given: Iterable[str] = ()) -> bool:
    """True when ``given`` d-separates every node of ``xs`` from every node of ``ys`` in the DAG ``G``.

    Reachability ("Bayes-ball") traversal over (node, direction) pairs: a trail passes a non-collider that
    is not conditioned on, and a collider that is conditioned on or has a conditioned descendant.

    Examples
    --------
    >>> G = DiGraph([("a", "m"), ("m", "b")])
    >>> d_separated(G, {"a"}, {"b"}), d_separated(G, {"a"}, {"b"}, {"m"})
    (False, True)
    """
    xset, yset, zset = set(xs), set(ys), set(given)
    for name in xset | yset | zset:
        if name not in G:
            raise NotFoundError(f"node {name!r} is not in the graph; check the spelling")
    if xset & yset or xset & zset or yset & zset:
        raise InvalidInputError("the node sets passed to d_separated must not overlap; remove shared nodes")
    opened: set[str] = set(zset)
    stack = list(zset)
    while stack:
        for parent in G.predecessors(stack.pop()):
            if parent not in opened:
                opened.add(parent)
                stack.append(parent)
    # direction "up": reached from a child (moving against an edge); "down": reached from a parent.
    todo: list[tuple[str, str]] = [(x, "up") for x in xset]
    seen: set[tuple[str, str]] = set()
    while todo:
        node, direction = todo.pop()
        if (node, direction) in seen:
            continue
        seen.add((node, direction))
        if node in yset:
            return False
        if direction == "up":
            if node not in zset:
                todo.extend((p, "up") for p in G.predecessors(node))
                todo.extend((c, "down") for c in G.successors(node))
        else:
            if node not in zset:
                todo.extend((c, "down") for c in G.successors(node))
            if node in opened:
                todo.extend((p, "up") for p in G.predecessors(node))
    return True


# ------------------------------------------------------------------------------------------------ verdicts


@dataclass(frozen=True)
class BypassPath:
    """A path between instrument and outcome that avoids the treatment, as a readable chain."""

    nodes: tuple[str, ...]
    arrows: tuple[str, ...]  # "->" or "<-" between consecutive nodes
    threats: tuple[str, ...]  # codes whose fragments drew an edge on the path, in path order
    team_edges: bool  # True when a team-drawn extra edge is on the path
    condition: str  # "exclusion" (directed Z ... -> Y) or "exogeneity" (any other shape)
    severity: str  # "broken" (all edges asserted) or "at-risk"
    is_open: bool
    opened_by: tuple[str, ...]  # conditioned colliders (or their ancestors) that open the path
    blocked_by: tuple[str, ...]  # conditioned non-colliders that block it

    @property
    def text(self) -> str:
        """E.g. ``"Z -> clinic_closures -> Y"``."""
        parts = [self.nodes[0]]
        for arrow, node in zip(self.arrows, self.nodes[1:], strict=True):
            parts += [arrow, node]
        return " ".join(parts)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form."""
        return {
            "path": self.text,
            "nodes": list(self.nodes),
            "arrows": list(self.arrows),
            "threats": list(self.threats),
            "team_edges": self.team_edges,
            "condition": self.condition,
            "severity": self.severity,
            "open": self.is_open,
            "opened_by": list(self.opened_by),
            "blocked_by": list(self.blocked_by),
        }


@dataclass(frozen=True)
class ConditionVerdict:
    """The graph's verdict on one condition, with the reasons and the threat codes behind it."""

    condition: str
    value: str  # one of VERDICT_VALUES
    reasons: tuple[str, ...]
    threats: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form."""
        return {
            "condition": self.condition,
            "value": self.value,
            "reasons": list(self.reasons),
            "threats": list(self.threats),
        }


@dataclass(frozen=True)
class ThreatEffect:
    """What one threat's fragment does in this graph.

    ``effect``: ``opens-path`` (on an open bypass path), ``blocked`` (drawn, but every path through it is
    closed), ``dropped`` (rebutted, so not drawn) or ``not-in-graph`` (its fragment is empty).
    """

    code: str
    condition: str  # the condition the catalogue entry attacks
    state: str
    effect: str
    conditions_hit: tuple[str, ...]  # conditions of the open paths it lies on

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form."""
        return {
            "code": self.code,
            "condition": self.condition,
            "state": self.state,
            "effect": self.effect,
            "conditions_hit": list(self.conditions_hit),
        }


@dataclass(frozen=True)
class GraphVerdict:
    """Result of :func:`check_instrument`: criterion, per-condition verdicts and the paths behind them."""

    instrument: str
    treatment: str
    outcome: str
    conditioning: tuple[str, ...]
    selection: tuple[str, ...]
    relevance_connected: bool
    criterion_holds: bool
    conditioning_issues: tuple[str, ...]
    conditions: tuple[ConditionVerdict, ...]
    open_paths: tuple[BypassPath, ...]
    blocked_paths: tuple[BypassPath, ...]
    threats: tuple[ThreatEffect, ...]
    paths_truncated: bool
    notes: tuple[str, ...] = ()  # team edges left out of this graph, each with why and the fix

    def condition(self, name: str) -> ConditionVerdict:
        """The verdict for one condition (relevance, exclusion, exogeneity, monotonicity)."""
        for verdict in self.conditions:
            if verdict.condition == name:
                return verdict
        raise NotFoundError(f"no verdict for condition {name!r}; use one of: {', '.join(CONDITIONS)}")

    def value(self, name: str) -> str:
        """Shorthand for ``condition(name).value``."""
        return self.condition(name).value

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form."""
        return {
            "instrument": self.instrument,
            "treatment": self.treatment,
            "outcome": self.outcome,
            "conditioning": list(self.conditioning),
            "selection": list(self.selection),
            "relevance_connected": self.relevance_connected,
            "criterion_holds": self.criterion_holds,
            "conditioning_issues": list(self.conditioning_issues),
            "conditions": {v.condition: v.to_dict() for v in self.conditions},
            "open_paths": [p.to_dict() for p in self.open_paths],
            "blocked_paths": [p.to_dict() for p in self.blocked_paths],
            "threats": [t.to_dict() for t in self.threats],
            "paths_truncated": self.paths_truncated,
            "notes": list(self.notes),
        }


def check_instrument(
    G: DiGraph,
    *,
    instrument: str,
    treatment: str,
    outcome: str,
    conditioning: Iterable[str] = frozenset(),
) -> GraphVerdict:
    """Test the conditional instrument criterion for ``instrument`` given ``conditioning`` and explain it.

    Nodes flagged ``selection`` are always conditioned on (the sample is restricted on them). Conditioning on
    an unobserved node, or on Z, X or Y, raises InvalidInputError. Conditioning on a descendant of X or Y is
    reported as a conditioning issue (exogeneity broken) rather than raised.

    Checks are remembered by the graph's shape with the instrument's name left out (`_shape_key`): instruments
    whose graphs differ only in the instrument's name (the same threats, covariates and team edges) are checked
    once, and the verdict is given each instrument's name.
    """
    if not isinstance(conditioning, str):
        conditioning = frozenset(conditioning)
        key = _shape_key(G, instrument, treatment, outcome, conditioning)
        if key is not None:
            found = _CHECKED.get(key)
            if found is None:
                try:  # checked once, on a copy in which the instrument is named by a reserved mark
                    found = _check(
                        relabel_nodes(G, {instrument: _NAME_MARK}),
                        instrument=_NAME_MARK,
                        treatment=treatment,
                        outcome=outcome,
                        conditioning=conditioning,
                    )
                except (
                    InvalidInputError,
                    NotFoundError,
                    GraphError,
                ):  # raised below, naming the instrument
                    found = None
                if found is not None:
                    if len(_CHECKED) >= _CHECKED_MAX:
                        _CHECKED.clear()
                    _CHECKED[key] = found
            if found is not None:
                return _named(found, instrument)
    return _check(G, instrument=instrument, treatment=treatment, outcome=outcome, conditioning=conditioning)


#: Stands for the instrument's name in remembered checks: a private-use character, so no text holds it unless a
#: name does (such graphs are never remembered).
_NAME_MARK = "\ue000"
_CHECKED: dict[tuple[Any, ...], GraphVerdict] = {}
_CHECKED_MAX = 1024


def _shape_key(G: DiGraph, z: str, x: str, y: str, conditioning: frozenset[str]) -> tuple[Any, ...] | None:
    """Everything `_check` reads from ``G`` and its arguments, in order, with the instrument's name replaced by
    `_NAME_MARK`; None when a check cannot be shared (a name holds the mark or is not a string, the instrument
    is not a plain node (selected on, adjusted for) or absent, team edges were left out, or a value cannot be
    compared).

    Why the name can be left out: `_check` compares the instrument's name only for equality, every listed path
    starts at the instrument (so sorting paths by their text never compares the name with another), it never
    conditions on the instrument (refused, or absent from this key's graphs), and it writes the name only as the
    first node of a path, in the path texts of its reasons and as ``instrument``, which `_named` puts back.
    """
    if (
        type(z) is not str
        or _NAME_MARK in z
        or z not in G
        or G.graph.get("skipped_edges")
        or any(type(n) is not str or _NAME_MARK in n for n in G)
    ):
        return None
    mine = G.nodes[z]
    if mine.get("selection") or mine.get("adjusted") or mine.get("fixes_instrument"):
        return None
    try:
        nodes = tuple(
            (
                _NAME_MARK if n == z else n,
                d.get("observed", False),
                d.get("selection"),
                d.get("adjusted"),
                d.get("fixes_instrument"),
            )
            for n, d in G.nodes(data=True)
        )
        edges = tuple(
            (
                _NAME_MARK if u == z else u,
                _NAME_MARK if v == z else v,
                tuple(d.get("threats", ())),
                d.get("team", False),
                "base" in d,
            )
            for u, v, d in G.edges(data=True)
        )
        threats = tuple(
            (code, info["condition"], info["state"], info["empty"])
            for code, info in G.graph.get("threats", {}).items()
        )
        limits = (_MAX_OPEN_PATHS, _MAX_PATHS_VISITED)  # read when checking (a caller may change them)
        key = (
            nodes,
            edges,
            threats,
            bool(G.graph.get("assert_fragments", False)),
            x,
            y,
            conditioning,
            limits,
        )
        hash(key)
    except (TypeError, KeyError, AttributeError):
        return None
    codes = {c for e in edges for c in e[2]} | {t[0] for t in threats}
    if any(type(c) is not str or _NAME_MARK in c for c in codes):
        return None
    return key


def _named(verdict: GraphVerdict, z: str) -> GraphVerdict:
    """A remembered verdict with the instrument's name put in place of `_NAME_MARK`."""

    def path(p: BypassPath) -> BypassPath:
        return dataclasses.replace(p, nodes=tuple(z if n == _NAME_MARK else n for n in p.nodes))

    return dataclasses.replace(
        verdict,
        instrument=z,
        open_paths=tuple(path(p) for p in verdict.open_paths),
        blocked_paths=tuple(path(p) for p in verdict.blocked_paths),
        conditions=tuple(
            dataclasses.replace(c, reasons=tuple(r.replace(_NAME_MARK, z) for r in c.reasons))
            for c in verdict.conditions
        ),
    )


def _check(
    G: DiGraph,
    *,
    instrument: str,
    treatment: str,
    outcome: str,
    conditioning: Iterable[str] = frozenset(),
) -> GraphVerdict:
    z, x, y = instrument, treatment, outcome
    for role, name in (("instrument", z), ("treatment", x), ("outcome", y)):
        if name not in G:
            raise NotFoundError(f"{role} {name!r} is not a node of the graph; check the name")
    if len({z, x, y}) != 3:
        raise InvalidInputError("instrument, treatment and outcome must be three different nodes")
    if not is_directed_acyclic_graph(G):
        raise InvalidInputError("the graph has a cycle; build it with build_graph, which names the cycle")
    W = _validate_conditioning(G, conditioning, z, x, y) | _adjusted(G)
    S = {n for n, d in G.nodes(data=True) if d.get("selection")}
    C = W | S
    issues = _conditioning_issues(G, W, S, x, y)
    fixing = sorted(n for n in C if G.nodes[n].get("fixes_instrument"))
    connected = not d_separated(G, {z}, {x}, C - {z, x}) and not fixing
    mutilated = G.copy()
    mutilated.remove_edges_from(list(G.out_edges(x)))
    threat_info: dict[str, dict[str, Any]] = dict(G.graph.get("threats", {}))
    # Which fragments' edges count as asserted: all of them in a hand-drawn graph, else fatal links only.
    assert_all = bool(G.graph.get("assert_fragments", False))
    states = {code: "fatal" if assert_all else info["state"] for code, info in threat_info.items()}

    open_paths, blocked_paths, truncated = _bypass_paths(mutilated, z, y, x, C, S, states)
    # the criterion itself comes from d-separation, so a truncated path listing can never make it look satisfied
    separated = d_separated(mutilated, {z}, {y}, C)
    criterion = connected and separated and not issues

    verdicts: tuple[ConditionVerdict, ...] = (
        _relevance_verdict(connected, W, threat_info, fixing),
        _path_verdict("exclusion", open_paths, blocked_paths, threat_info, G, (), W),
        _path_verdict("exogeneity", open_paths, blocked_paths, threat_info, G, issues, W),
        _monotonicity_verdict(threat_info),
    )
    if truncated and not separated:
        note = "path listing stopped early; d-separation shows an open bypass path not listed here"
        verdicts = tuple(
            ConditionVerdict(v.condition, "at-risk", (*v.reasons, note), v.threats)
            if v.condition in ("exclusion", "exogeneity") and v.value in ("holds", "not-assessed")
            else v
            for v in verdicts
        )
    effects = []
    for code, info in threat_info.items():
        hit = sorted({p.condition for p in open_paths if code in p.threats})
        if info["state"] not in KEPT_STATES:
            effect = "dropped"
        elif info["empty"]:
            effect = "not-in-graph"
        else:
            effect = "opens-path" if hit else "blocked"
        effects.append(ThreatEffect(code, info["condition"], info["state"], effect, tuple(hit)))
    return GraphVerdict(
        instrument=z,
        treatment=x,
        outcome=y,
        conditioning=tuple(sorted(W)),
        selection=tuple(sorted(S)),
        relevance_connected=connected,
        criterion_holds=criterion,
        conditioning_issues=tuple(issues),
        conditions=verdicts,
        open_paths=tuple(open_paths),
        blocked_paths=tuple(blocked_paths),
        threats=tuple(effects),
        paths_truncated=truncated,
        notes=tuple(
            f"team edge {u} -> {v} left out of this graph: {why}"
            for u, v, why in G.graph.get("skipped_edges", ())
        ),
    )


def criterion_holds(
    G: DiGraph, *, instrument: str, treatment: str, outcome: str, conditioning: Iterable[str] = frozenset()
) -> bool:
    """Fast yes/no form of the conditional instrument criterion (no path listing)."""
    W = _validate_conditioning(G, conditioning, instrument, treatment, outcome) | _adjusted(G)
    S = {n for n, d in G.nodes(data=True) if d.get("selection")}
    if any(G.nodes[n].get("fixes_instrument") for n in W | S):
        return False
    return _criterion(G, instrument, treatment, outcome, W | S, _descendants(G, treatment, outcome))


def adjustment_sets(
    G: DiGraph, *, instrument: str, treatment: str, outcome: str, max_size: int | None = None
) -> list[frozenset[str]]:
    """Every minimal set of measured covariates W under which the instrument criterion holds.

    Returns ``[frozenset()]`` when no conditioning is needed and ``[]`` when no measured set works (None is
    never returned). Sets are searched among measured, non-selection ancestors of Z, X, Y and the selection
    nodes that are not descendants of X or Y, up to ``max_size`` members (all when None); a search of more
    than 65,536 candidate sets asks for ``max_size``. Nodes the instrument is a deterministic function of are
    never candidates. Sets free of descendants of the instrument come first (such a node is a valid adjustment
    only if nothing unmeasured causes it; :func:`adjustment_advice` says so), then by size and names.
    Nodes flagged ``adjusted`` (controls already in the model) are candidates like any other, so a set
    without them tells the team to drop them.
    """
    for role, name in (("instrument", instrument), ("treatment", treatment), ("outcome", outcome)):
        if name not in G:
            raise NotFoundError(f"{role} {name!r} is not a node of the graph; check the name")
    if max_size is not None and (not isinstance(max_size, int) or max_size < 0):
        raise InvalidInputError(f"max_size must be a non-negative integer or None, got {max_size!r}")
    S = {n for n, d in G.nodes(data=True) if d.get("selection")}
    banned = _descendants(G, treatment, outcome)
    relevant = set(S) | {instrument, treatment, outcome}
    for node in list(relevant):
        relevant |= ancestors(G, node)
    candidates = sorted(
        n
        for n in relevant
        if G.nodes[n].get("observed")
        and not G.nodes[n].get("fixes_instrument")
        and n not in S
        and n not in banned
        and n not in {instrument, treatment, outcome}
    )
    if S & banned or _unblockable(G, instrument, treatment, outcome, set(candidates), S):
        return []
    top = len(candidates) if max_size is None else min(max_size, len(candidates))
    total = sum(math.comb(len(candidates), k) for k in range(top + 1))
    if total > _MAX_SUBSETS:
        raise InvalidInputError(
            f"{len(candidates)} candidate covariates give {total} sets to test; pass max_size (e.g. 4)"
        )
    found: list[frozenset[str]] = []
    for k in range(top + 1):
        for combo in itertools.combinations(candidates, k):
            W = frozenset(combo)
            if any(f <= W for f in found):
                continue
            if _criterion(G, instrument, treatment, outcome, W | S, banned):
                found.append(W)
    below_z = set(descendants(G, instrument))
    return sorted(found, key=lambda s: (bool(s & below_z), len(s), sorted(s)))


#: What the tool says whenever an adjustment set holds a descendant of the instrument or the treatment.
DESCENDANT_WARNING = (
    "{nodes} {verb} caused by the instrument; holding {pronoun} fixed is valid only if nothing unmeasured "
    "also causes {pronoun} (otherwise it opens a path from the instrument through {pronoun} to the "
    "unmeasured causes of the outcome). Prefer a set without {pronoun}, or argue that claim explicitly."
)


@dataclass(frozen=True)
class AdjustmentAdvice:
    """One adjustment set as the tool presents it: its members, those the instrument or treatment causes, and
    the plain warning that comes with them (empty when there is none)."""

    members: tuple[str, ...]
    caused_by_instrument: tuple[str, ...]
    warning: str

    def __str__(self) -> str:
        text = "{" + ", ".join(self.members) + "}"
        return f"{text} (warning: {self.warning})" if self.warning else text

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form."""
        return {
            "members": list(self.members),
            "caused_by_instrument": list(self.caused_by_instrument),
            "warning": self.warning,
        }


def adjustment_advice(
    G: DiGraph, *, instrument: str, treatment: str, outcome: str, max_size: int | None = None
) -> tuple[AdjustmentAdvice, ...]:
    """The sets of :func:`adjustment_sets`, each with the warning it needs: a member that descends from the
    instrument or the treatment is never presented without saying that it is valid only if nothing
    unmeasured causes it. Sets without such members come first."""
    sets = adjustment_sets(G, instrument=instrument, treatment=treatment, outcome=outcome, max_size=max_size)
    below = set(descendants(G, instrument)) | set(descendants(G, treatment))
    out = []
    for members in sets:
        flagged = tuple(sorted(members & below))
        warning = ""
        if flagged:
            many = len(flagged) > 1
            warning = DESCENDANT_WARNING.format(
                nodes=", ".join(map(repr, flagged)),
                verb="are" if many else "is",
                pronoun="them" if many else "it",
            )
        out.append(AdjustmentAdvice(tuple(sorted(members)), flagged, warning))
    return tuple(out)


# ------------------------------------------------------------------------------------------------ internals


def _validate_conditioning(G: DiGraph, conditioning: Iterable[str], z: str, x: str, y: str) -> set[str]:
    if isinstance(conditioning, str):
        raise InvalidInputError(f"conditioning must be a set of node names, got the string {conditioning!r}")
    W = set(conditioning)
    for name in sorted(W):
        if name not in G:
            raise NotFoundError(
                f"conditioning variable {name!r} is not a node of the graph; add it as a covariate"
            )
        if name in (z, x, y):
            raise InvalidInputError(
                f"cannot condition on {name!r}: it is the instrument, treatment or outcome"
            )
        if not G.nodes[name].get("observed", False):
            raise InvalidInputError(
                f"cannot condition on {name!r}: it is unobserved; remove it or mark it measured in covariates"
            )
    return W


def _adjusted(G: DiGraph) -> set[str]:
    """Nodes a fragment marks as controls already in the model (always conditioned on)."""
    return {n for n, d in G.nodes(data=True) if d.get("adjusted")}


def _descendants(G: DiGraph, x: str, y: str) -> set[str]:
    return set(descendants(G, x)) | set(descendants(G, y)) | {x, y}


def _conditioning_issues(G: DiGraph, W: set[str], S: set[str], x: str, y: str) -> list[str]:
    dx, dy = set(descendants(G, x)), set(descendants(G, y))
    issues = []
    for name in sorted(W | S):
        kind = "selection on" if name in S else "conditioning on"
        of = [r for r, d in ((x, dx), (y, dy)) if name in d]
        if of:
            issues.append(
                f"{kind} {name!r}, a descendant of {' and '.join(of)}, is not allowed: it blocks part of the "
                f"effect or opens a path through {x}; use only pre-treatment variables"
            )
    return issues


def _unblockable(G: DiGraph, z: str, x: str, y: str, candidates: set[str], S: set[str]) -> bool:
    """True when a collider-free Z-Y path avoiding X runs only through nodes nobody may condition on.

    Such a path (a trek Z <- ... <- T -> ... -> Y, T possibly Z itself) stays open under every allowed W,
    so the adjustment search can stop at once.
    """
    keep = {n for n in G if n not in candidates and n not in S and n != x} | {z, y}
    H = G.subgraph(keep)
    up_z = set(ancestors(H, z)) | {z}
    up_y = set(ancestors(H, y)) | {y}
    return bool(up_z & up_y)


def _criterion(G: DiGraph, z: str, x: str, y: str, C: set[str] | frozenset[str], banned: set[str]) -> bool:
    if C & banned or z in C:
        return False
    if d_separated(G, {z}, {x}, C):
        return False
    mutilated = G.copy()
    mutilated.remove_edges_from(list(G.out_edges(x)))
    return d_separated(mutilated, {z}, {y}, C)


def _bypass_paths(
    M: DiGraph, z: str, y: str, x: str, C: set[str], S: set[str], states: Mapping[str, str]
) -> tuple[list[BypassPath], list[BypassPath], bool]:
    """Open and blocked Z-Y paths avoiding x in the mutilated graph M; blocked ones only if they use a
    threat edge and are open without the user's conditioning (i.e. conditioning is what closes them)."""
    # The undirected skeleton, structure only (paths never read attributes): nodes and edges added in M's order.
    walk = skeleton(M, without=(x,))
    anc_c: dict[str, set[str]] = {}
    for node in M.nodes:
        anc_c[node] = ({node} | set(descendants(M, node))) & C
    opened_list: list[BypassPath] = []
    blocked_list: list[BypassPath] = []
    truncated = False
    for visited, nodes in enumerate(all_simple_paths(walk, z, y), start=1):
        if visited > _MAX_PATHS_VISITED:
            truncated = True
            break
        path = _describe(M, nodes, C, S, anc_c, states)
        if path.is_open:
            opened_list.append(path)
            if len(opened_list) >= _MAX_OPEN_PATHS:
                truncated = True
                break
        elif path.threats and _open_given(M, nodes, S):
            blocked_list.append(path)
    key = lambda p: (len(p.nodes), p.text)  # noqa: E731
    return sorted(opened_list, key=key), sorted(blocked_list, key=key), truncated


def _open_given(M: DiGraph, nodes: Sequence[str], C: set[str]) -> bool:
    for i in range(1, len(nodes) - 1):
        a, k, b = nodes[i - 1], nodes[i], nodes[i + 1]
        if M.has_edge(a, k) and M.has_edge(b, k):
            if not (({k} | set(descendants(M, k))) & C):
                return False
        elif k in C:
            return False
    return True


def _describe(
    M: DiGraph,
    nodes: Sequence[str],
    C: set[str],
    S: set[str],
    anc_c: Mapping[str, set[str]],
    states: Mapping[str, str],
) -> BypassPath:
    arrows: list[str] = []
    codes: list[str] = []
    team = False
    asserted = True
    for a, b in itertools.pairwise(nodes):
        u, v = (a, b) if M.has_edge(a, b) else (b, a)
        arrows.append("->" if u == a else "<-")
        data = M.edges[u, v]
        team = team or data.get("team", False)
        for code in data.get("threats", []):
            if code not in codes:
                codes.append(code)
        # an edge no threat drew (base, team-drawn, or from a hand-made graph) is asserted as drawn
        edge_codes = data.get("threats", [])
        edge_asserted = (
            not edge_codes
            or data.get("team", False)
            or any(states.get(c, "open") in ASSERTED_STATES for c in edge_codes)
        )
        asserted = asserted and edge_asserted
    is_open = True
    opened_by: list[str] = []
    blocked_by: list[str] = []
    for i in range(1, len(nodes) - 1):
        k = nodes[i]
        collider = arrows[i - 1] == "->" and arrows[i] == "<-"
        if collider:
            hit = anc_c[k]
            if hit:
                opened_by.extend(sorted(hit))
            else:
                is_open = False
        elif k in C:
            is_open = False
            blocked_by.append(k)
    condition = "exclusion" if all(a == "->" for a in arrows) else "exogeneity"
    return BypassPath(
        nodes=tuple(nodes),
        arrows=tuple(arrows),
        threats=tuple(codes),
        team_edges=team,
        condition=condition,
        severity="broken" if asserted else "at-risk",
        is_open=is_open,
        opened_by=tuple(dict.fromkeys(opened_by)),
        blocked_by=tuple(blocked_by),
    )


def _link_rule(
    condition: str, info: Mapping[str, Mapping[str, Any]]
) -> tuple[list[str], list[str], list[str]]:
    """Codes for ``condition`` split into fatal, unresolved (open/mitigated/accepted/suggested), rebutted."""
    fatal, unresolved, rebutted = [], [], []
    for code, d in info.items():
        if d["condition"] != condition:
            continue
        if d["state"] == "fatal":
            fatal.append(code)
        elif d["state"] == "rebutted":
            rebutted.append(code)
        else:
            unresolved.append(code)
    return fatal, unresolved, rebutted


def _relevance_verdict(
    connected: bool, W: set[str], info: Mapping[str, Mapping[str, Any]], fixing: Sequence[str] = ()
) -> ConditionVerdict:
    fatal, unresolved, _ = _link_rule("relevance", info)
    given = f" given {{{', '.join(sorted(W))}}}" if W else ""
    if fixing:
        reason = (
            f"conditioning on {', '.join(map(repr, fixing))} leaves the instrument no variation (the two "
            "determine each other); compare units close together on it instead of holding it fixed"
        )
        return ConditionVerdict("relevance", "broken", (reason,), ())
    if not connected:
        return ConditionVerdict(
            "relevance", "broken", (f"instrument and treatment are d-separated{given}",), ()
        )
    if fatal:
        return ConditionVerdict(
            "relevance", "broken", (f"relevance link(s) marked fatal: {', '.join(fatal)}",), tuple(fatal)
        )
    if unresolved:
        reason = f"unresolved relevance threat(s) {', '.join(unresolved)}; first-stage strength decides"
        return ConditionVerdict("relevance", "at-risk", (reason,), tuple(unresolved))
    reason = f"instrument and treatment are d-connected{given}; strength is judged by `ivdossier estimate`"
    return ConditionVerdict("relevance", "holds", (reason,), ())


def _path_verdict(
    condition: str,
    open_paths: Sequence[BypassPath],
    blocked_paths: Sequence[BypassPath],
    info: Mapping[str, Mapping[str, Any]],
    G: DiGraph,
    issues: Sequence[str],
    W: set[str],
) -> ConditionVerdict:
    fatal, unresolved, rebutted = _link_rule(condition, info)
    mine = [p for p in open_paths if p.condition == condition]
    broken_paths = [p for p in mine if p.severity == "broken"]
    risky_paths = [p for p in mine if p.severity == "at-risk"]
    graphless = [c for c in unresolved if info[c]["empty"]]
    reasons: list[str] = list(issues)
    codes: list[str] = list(fatal)
    for p in mine:
        label = f" ({', '.join(p.threats)})" if p.threats else " (team-drawn edge)" if p.team_edges else ""
        reasons.append(f"open path {p.text}{label}: {p.severity}")
        codes.extend(c for c in p.threats if c not in codes)
    if fatal:
        reasons.append(f"link(s) marked fatal: {', '.join(fatal)}")
    if graphless:
        reasons.append(f"unresolved threat(s) the graph cannot draw: {', '.join(graphless)}")
        codes.extend(c for c in graphless if c not in codes)
    if broken_paths or fatal or issues:
        value = "broken"
    elif risky_paths or graphless:
        value = "at-risk"
    else:
        # hand-made graphs (edges without build_graph's attributes) count as drawn by the team
        team_drawn = any(d.get("team") or "base" not in d for _, _, d in G.edges(data=True))
        considered = [c for c, d in info.items() if d["condition"] == condition]
        if not considered and not team_drawn:
            return ConditionVerdict(
                condition, "not-assessed", ("no threat for this condition was considered",), ()
            )
        value = "holds"
        closed = [p for p in blocked_paths if p.condition == condition]
        given = f"{{{', '.join(sorted(W))}}}" if W else "the empty set"
        reasons.append(f"no open path from instrument to outcome that avoids the treatment, given {given}")
        reasons.extend(f"blocked by {', '.join(p.blocked_by)}: {p.text}" for p in closed)
        if rebutted:
            reasons.append(f"rebutted and left out: {', '.join(rebutted)}")
    return ConditionVerdict(condition, value, tuple(reasons), tuple(codes))


def _monotonicity_verdict(info: Mapping[str, Mapping[str, Any]]) -> ConditionVerdict:
    fatal, unresolved, rebutted = _link_rule("monotonicity", info)
    if fatal:
        return ConditionVerdict(
            "monotonicity", "broken", (f"link(s) marked fatal: {', '.join(fatal)}",), tuple(fatal)
        )
    if unresolved:
        reason = f"unresolved monotonicity threat(s): {', '.join(unresolved)}"
        return ConditionVerdict("monotonicity", "at-risk", (reason,), tuple(unresolved))
    if rebutted:
        reason = f"every monotonicity threat considered was rebutted: {', '.join(rebutted)}"
        return ConditionVerdict("monotonicity", "holds", (reason,), ())
    return ConditionVerdict(
        "monotonicity", "not-assessed", ("a graph cannot show defiers; no link considered",), ()
    )
