"""The conditional instrument criterion and the per-condition verdicts on textbook graph configurations.

Definition (Pearl 2009, Causality, 2nd ed., ch. 7; Brito and Pearl 2002, "Generalized instrumental
variables"), total-effect form: Z is an instrument for X -> Y given W when W has no descendant of X or Y,
W d-separates Z from Y once the edges out of X are removed, and W does not d-separate Z from X. Every expected
verdict below follows from that definition by hand; each graph is also re-checked with networkx's own
d-separation (an implementation independent of ours) in ``reference_criterion``.
"""

from __future__ import annotations

import itertools
import json
from collections.abc import Callable
from typing import Any

import networkx as nx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nx_reference import to_networkx

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.threats_catalog import load_builtin
from ivdossier.threats_catalog.catalog import FragmentNode, GraphFragment
from ivdossier.threats_catalog.graph import (
    adjustment_sets,
    build_graph,
    check_instrument,
    criterion_holds,
)

nx_dsep: Callable[..., bool] = getattr(nx, "is_d_separator", None) or nx.d_separated  # type: ignore[attr-defined]
ROLES = {"instrument": "Z", "treatment": "X", "outcome": "Y"}


def reference_criterion(G: Any, W: set[str], z: str = "Z", x: str = "X", y: str = "Y") -> bool:
    """The criterion computed only with networkx primitives (independent of our d-separation and graph class)."""
    G = to_networkx(G)
    banned = nx.descendants(G, x) | nx.descendants(G, y) | {x, y, z}
    if W & banned:
        return False
    cut = G.copy()
    cut.remove_edges_from(list(G.out_edges(x)))
    return bool(nx_dsep(cut, {z}, {y}, W)) and not nx_dsep(G, {z}, {x}, W)


def frag(
    code: str,
    condition: str,
    edges: list[tuple[str, str]],
    nodes: dict[str, bool] | None = None,
    **flags: bool,
) -> GraphFragment:
    node_objs = tuple(
        FragmentNode(name, observed, selection=flags.get(f"{name}_selection", False))
        for name, observed in (nodes or {}).items()
    )
    return GraphFragment(code, condition, node_objs, tuple(edges))


def verdict(G: nx.DiGraph, W: set[str] | frozenset[str] = frozenset()):  # type: ignore[no-untyped-def]
    return check_instrument(G, conditioning=W, **ROLES)


MEDIATOR = frag("T-MED", "exclusion", [("Z", "M"), ("M", "Y")], {"M": False})
MEDIATOR_MEASURED = frag("T-MED", "exclusion", [("Z", "M"), ("M", "Y")], {"M": True})
CONFOUNDER = frag("T-CC", "exogeneity", [("C", "Z"), ("C", "Y")], {"C": False})
CONFOUNDER_MEASURED = frag("T-CC", "exogeneity", [("C", "Z"), ("C", "Y")], {"C": True})
COLLIDER = frag("T-COL", "exogeneity", [("Z", "K"), ("V", "K"), ("V", "Y")], {"K": True, "V": False})


def test_plain_instrument_satisfies_the_criterion_without_conditioning() -> None:
    G = build_graph()
    v = verdict(G)
    assert v.criterion_holds and reference_criterion(G, set())
    assert v.relevance_connected
    assert v.open_paths == ()
    assert adjustment_sets(G, **ROLES) == [frozenset()]
    # nothing was considered, so the graph does not vouch for exclusion or exogeneity
    assert v.value("exclusion") == v.value("exogeneity") == v.value("monotonicity") == "not-assessed"
    assert v.value("relevance") == "holds"


def test_unobserved_mediator_path_breaks_exclusion() -> None:
    G = build_graph(fragments=[MEDIATOR])
    v = verdict(G)
    assert not v.criterion_holds and not reference_criterion(G, set())
    assert [p.text for p in v.open_paths] == ["Z -> M -> Y"]
    assert v.open_paths[0].condition == "exclusion"
    assert v.open_paths[0].threats == ("T-MED",)
    assert v.value("exclusion") == "broken"
    assert v.condition("exclusion").threats == ("T-MED",)
    assert adjustment_sets(G, **ROLES) == []  # M cannot be measured, so no valid set exists


def test_measured_pure_bypass_mediator_restores_the_criterion_when_conditioned_on() -> None:
    # M lies on Z -> M -> Y only; it is not a descendant of X, so conditioning on it is allowed.
    G = build_graph(fragments=[MEDIATOR_MEASURED])
    assert not verdict(G).criterion_holds
    v = verdict(G, {"M"})
    assert v.criterion_holds and reference_criterion(G, {"M"})
    assert v.value("exclusion") == "holds"
    assert [p.text for p in v.blocked_paths] == ["Z -> M -> Y"]
    assert v.blocked_paths[0].blocked_by == ("M",)
    assert [t.effect for t in v.threats] == ["blocked"]
    assert adjustment_sets(G, **ROLES) == [frozenset({"M"})]


def test_mediator_that_is_also_a_descendant_of_x_may_not_be_conditioned_on() -> None:
    # Z -> M -> Y and X -> M: M is a descendant of X, so W = {M} violates the criterion even though it blocks
    # the bypass path (it would also open Z -> X <- U -> Y through the collider X).
    G = build_graph(fragments=[frag("T-MED", "exclusion", [("Z", "M"), ("X", "M"), ("M", "Y")], {"M": True})])
    v = verdict(G, {"M"})
    assert not v.criterion_holds and not reference_criterion(G, {"M"})
    assert v.value("exogeneity") == "broken"
    assert "'M', a descendant of X" in v.conditioning_issues[0]
    assert adjustment_sets(G, **ROLES) == []
    # without conditioning the bypass path is open and exclusion is broken
    assert verdict(G).value("exclusion") == "broken"


def test_common_cause_of_instrument_and_outcome() -> None:
    G = build_graph(fragments=[CONFOUNDER])
    v = verdict(G)
    assert [p.text for p in v.open_paths] == ["Z <- C -> Y"]
    assert v.open_paths[0].condition == "exogeneity"
    assert v.value("exogeneity") == "broken" and v.value("exclusion") == "not-assessed"
    assert adjustment_sets(G, **ROLES) == []
    with pytest.raises(InvalidInputError, match="cannot condition on 'C': it is unobserved"):
        verdict(G, {"C"})
    measured = build_graph(fragments=[CONFOUNDER_MEASURED])
    assert adjustment_sets(measured, **ROLES) == [frozenset({"C"})]
    assert verdict(measured, {"C"}).value("exogeneity") == "holds"
    assert reference_criterion(measured, {"C"}) and not reference_criterion(measured, set())


def test_conditioning_on_a_collider_opens_a_path() -> None:
    # Z -> K <- V -> Y: closed until K is conditioned on.
    G = build_graph(fragments=[COLLIDER])
    assert verdict(G).criterion_holds and reference_criterion(G, set())
    v = verdict(G, {"K"})
    assert not v.criterion_holds and not reference_criterion(G, {"K"})
    assert [p.text for p in v.open_paths] == ["Z -> K <- V -> Y"]
    assert v.open_paths[0].opened_by == ("K",)
    assert v.value("exogeneity") == "broken"
    assert adjustment_sets(G, **ROLES) == [frozenset()]


def test_descendant_of_treatment_or_outcome_in_w_is_reported() -> None:
    G = build_graph(covariates={"D": True, "after_y": True}, extra_edges=[("X", "D"), ("Y", "after_y")])
    for node, role in (("D", "X"), ("after_y", "X and Y")):
        v = verdict(G, {node})
        assert not v.criterion_holds and not reference_criterion(G, {node})
        assert v.value("exogeneity") == "broken"
        assert f"a descendant of {role}" in v.conditioning_issues[0]
    assert not criterion_holds(G, conditioning={"D"}, **ROLES)
    assert adjustment_sets(G, **ROLES) == [frozenset()]


def test_w_that_cuts_the_instrument_from_the_treatment_breaks_relevance() -> None:
    # Z -> A -> X only (no direct Z -> X edge); conditioning on A d-separates Z from X (Brito and Pearl 2002).
    G = nx.DiGraph([("Z", "A"), ("A", "X"), ("X", "Y"), ("U", "X"), ("U", "Y")])
    nx.set_node_attributes(G, dict.fromkeys(G, True), "observed")
    G.nodes["U"]["observed"] = False
    v = verdict(G, {"A"})
    assert not v.relevance_connected and v.value("relevance") == "broken"
    assert not v.criterion_holds and not reference_criterion(G, {"A"})
    assert verdict(G).criterion_holds
    assert adjustment_sets(G, **ROLES) == [frozenset()]


def test_selection_node_is_always_conditioned_on() -> None:
    # Attrition that depends on Z and on U (catalogue entry AN-I02): Z -> S <- U -> Y, with the sample
    # restricted to S. No measured set can undo selection.
    threat = load_builtin().get("AN-I02")
    G = build_graph(fragments=[threat.fragment])
    v = verdict(G)
    assert v.selection == ("outcome_observed",)
    assert [p.text for p in v.open_paths] == ["Z -> outcome_observed <- U -> Y"]
    assert v.open_paths[0].opened_by == ("outcome_observed",)
    assert v.value("exogeneity") == "broken"
    assert adjustment_sets(G, **ROLES) == []
    assert not reference_criterion(G, {"outcome_observed"})


def test_role_tokens_map_to_project_names_and_paths_read_naturally() -> None:
    closures = frag(
        "T-ROADS",
        "exclusion",
        [("Z", "clinic_closures"), ("clinic_closures", "Y")],
        {"clinic_closures": False},
    )
    G = build_graph(
        instrument="fibre_wave", treatment="telehealth", outcome="ed_visits", fragments=[closures]
    )
    v = check_instrument(G, instrument="fibre_wave", treatment="telehealth", outcome="ed_visits")
    assert [p.text for p in v.open_paths] == ["fibre_wave -> clinic_closures -> ed_visits"]
    assert G.nodes["fibre_wave"]["role"] == "instrument"
    assert G.nodes["clinic_closures"]["role"] == "unobserved"
    assert G.edges["fibre_wave", "clinic_closures"]["threats"] == ["T-ROADS"]


def test_covariate_flag_overrides_the_fragment_default_and_edges_collect_codes() -> None:
    a = frag("T-A", "exclusion", [("Z", "M"), ("M", "Y")], {"M": False})
    b = frag("T-B", "exclusion", [("Z", "M")], {"M": False})
    G = build_graph(fragments=[a, b], covariates={"M": True})
    assert G.nodes["M"]["observed"] is True and G.nodes["M"]["role"] == "covariate"
    assert G.edges["Z", "M"]["threats"] == ["T-A", "T-B"]
    assert verdict(G).open_paths[0].threats == ("T-A", "T-B")


@pytest.mark.parametrize(
    ("state", "exclusion"),
    [
        ("open", "at-risk"),  # raised but not yet answered: the path is possible, not asserted
        ("fatal", "broken"),
        ("mitigated", "at-risk"),
        ("accepted", "at-risk"),
        ("rebutted", "holds"),
    ],
)
def test_link_states_decide_between_broken_at_risk_and_holds(state: str, exclusion: str) -> None:
    G = build_graph(fragments=[MEDIATOR], link_states={"T-MED": state})
    v = verdict(G)
    assert v.value("exclusion") == exclusion
    assert ("M" in G) is (state != "rebutted")
    assert v.threats[0].effect == ("dropped" if state == "rebutted" else "opens-path")


def test_fragment_without_a_state_is_a_suggestion_and_only_puts_the_condition_at_risk() -> None:
    G = build_graph(fragments=[MEDIATOR, CONFOUNDER], link_states={"T-CC": "fatal"})
    v = verdict(G)
    assert v.value("exclusion") == "at-risk"
    assert v.value("exogeneity") == "broken"
    assert {t.code: t.state for t in v.threats} == {"T-MED": "suggested", "T-CC": "fatal"}


def test_fatal_link_breaks_its_condition_even_when_w_blocks_the_path() -> None:
    G = build_graph(fragments=[MEDIATOR_MEASURED], link_states={"T-MED": "fatal"})
    assert verdict(G, {"M"}).value("exclusion") == "broken"


def test_team_drawn_edge_counts_as_asserted() -> None:
    G = build_graph(covariates={"road_works": False}, extra_edges=[("Z", "road_works"), ("road_works", "Y")])
    v = verdict(G)
    assert v.value("exclusion") == "broken"
    assert v.open_paths[0].team_edges and v.open_paths[0].threats == ()
    assert "team-drawn edge" in v.condition("exclusion").reasons[0]


@pytest.mark.parametrize(
    ("states", "expected"),
    [
        ({}, "not-assessed"),
        ({"AN-M01": "open"}, "at-risk"),
        ({"AN-M01": "rebutted"}, "holds"),
        ({"AN-M01": "fatal"}, "broken"),
    ],
)
def test_monotonicity_comes_from_links_alone(states: dict[str, str], expected: str) -> None:
    cat = load_builtin()
    frags = [cat.get(code).fragment for code in states]
    v = verdict(build_graph(fragments=frags, link_states=states))
    assert v.value("monotonicity") == expected


def test_relevance_link_states() -> None:
    weak = load_builtin().get("AN-R01").fragment
    assert (
        verdict(build_graph(fragments=[weak], link_states={"AN-R01": "fatal"})).value("relevance") == "broken"
    )
    assert (
        verdict(build_graph(fragments=[weak], link_states={"AN-R01": "rebutted"})).value("relevance")
        == "holds"
    )


def test_cycle_is_named_with_the_threats_that_drew_it() -> None:
    loop = frag("T-LOOP", "exogeneity", [("Y", "W1"), ("W1", "Z")], {"W1": True})
    with pytest.raises(
        InvalidInputError, match=r"cycle .*Z -> X -> Y -> W1 -> Z|cycle .*W1 -> Z -> X -> Y -> W1"
    ):
        build_graph(fragments=[loop])
    with pytest.raises(InvalidInputError, match=r"edges from T-LOOP"):
        build_graph(fragments=[loop])


def test_bad_inputs_are_named() -> None:
    G = build_graph(covariates={"age": True})
    with pytest.raises(InvalidInputError, match="link state 'closed' for threat T-MED is unknown"):
        build_graph(fragments=[MEDIATOR], link_states={"T-MED": "closed"})
    with pytest.raises(
        InvalidInputError, match="extra edge \\('age', 'income'\\) names unknown node 'income'"
    ):
        build_graph(covariates={"age": True}, extra_edges=[("age", "income")])
    with pytest.raises(InvalidInputError, match="need distinct names"):
        build_graph(instrument="X")
    with pytest.raises(NotFoundError, match="conditioning variable 'income' is not a node"):
        verdict(G, {"income"})
    with pytest.raises(InvalidInputError, match="cannot condition on 'U': it is unobserved"):
        verdict(G, {"U"})
    with pytest.raises(InvalidInputError, match="cannot condition on 'X'"):
        verdict(G, {"X"})
    with pytest.raises(
        InvalidInputError, match="conditioning must be a set of node names, got the string 'age'"
    ):
        check_instrument(G, conditioning="age", **ROLES)
    with pytest.raises(NotFoundError, match="instrument 'fibre' is not a node"):
        check_instrument(G, instrument="fibre", treatment="X", outcome="Y")
    with pytest.raises(InvalidInputError, match="max_size must be a non-negative integer"):
        adjustment_sets(G, max_size=-1, **ROLES)


def test_adjustment_sets_are_minimal_and_respect_max_size() -> None:
    # two separate confounding paths, each closable by one of two measured nodes: minimal sets pick one per path
    f1 = frag("T-1", "exogeneity", [("A1", "Z"), ("A1", "B1"), ("B1", "Y")], {"A1": True, "B1": True})
    f2 = frag("T-2", "exogeneity", [("A2", "Z"), ("A2", "Y")], {"A2": True})
    G = build_graph(fragments=[f1, f2])
    sets = adjustment_sets(G, **ROLES)
    assert sets == [frozenset({"A1", "A2"}), frozenset({"A2", "B1"})]
    assert adjustment_sets(G, max_size=1, **ROLES) == []
    for W in sets:
        assert reference_criterion(G, set(W))


def test_verdict_to_dict_is_json_safe_and_readable() -> None:
    G = build_graph(fragments=[MEDIATOR, CONFOUNDER], link_states={"T-MED": "fatal", "T-CC": "mitigated"})
    data = json.loads(json.dumps(verdict(G).to_dict()))
    assert data["conditions"]["exclusion"]["value"] == "broken"
    assert data["conditions"]["exogeneity"]["value"] == "at-risk"
    assert {p["path"] for p in data["open_paths"]} == {"Z -> M -> Y", "Z <- C -> Y"}
    assert set(data) >= {"criterion_holds", "conditions", "open_paths", "threats", "conditioning_issues"}


@st.composite
def random_instrument_graph(draw: st.DrawFn) -> tuple[nx.DiGraph, set[str]]:
    """Base IV graph plus up to four extra measured nodes wired at random (acyclic by a random order)."""
    extra = [f"v{i}" for i in range(draw(st.integers(0, 4)))]
    order = draw(st.permutations(["Z", "X", "Y", "U", *extra]))
    rank = {n: i for i, n in enumerate(order)}
    G: nx.DiGraph = nx.DiGraph()
    for n in order:
        G.add_node(n, observed=n != "U")
    for u, v in (("Z", "X"), ("X", "Y"), ("U", "X"), ("U", "Y")):
        G.add_edge(u, v)
    for a, b in itertools.permutations(order, 2):
        if rank[a] < rank[b] and (a in extra or b in extra) and draw(st.booleans()):
            G.add_edge(a, b)
    if not nx.is_directed_acyclic_graph(G):  # base edges may clash with the random order: drop the extras
        G.remove_edges_from([(a, b) for a, b in list(G.edges) if a in extra or b in extra])
    W = set(draw(st.sets(st.sampled_from(extra)))) if extra else set()
    return G, W


@settings(max_examples=300, deadline=None)
@given(random_instrument_graph())
def test_criterion_matches_the_networkx_reference_on_random_graphs(case: tuple[nx.DiGraph, set[str]]) -> None:
    G, W = case
    assert criterion_holds(G, conditioning=W, **ROLES) == reference_criterion(G, W)
    v = check_instrument(G, conditioning=W, **ROLES)
    assert v.criterion_holds == reference_criterion(G, W)
    # the listed open paths agree with d-separation: none listed exactly when the criterion's part (2) holds
    assert v.criterion_holds == (v.relevance_connected and not v.open_paths and not v.conditioning_issues)
    for found in adjustment_sets(G, **ROLES):
        assert reference_criterion(G, set(found))
        smaller = itertools.combinations(found, len(found) - 1) if found else ()
        assert not any(reference_criterion(G, set(sub)) for sub in smaller)


@settings(max_examples=200, deadline=None)
@given(random_instrument_graph())
def test_adjustment_sets_equal_brute_force_minimal_sets(case: tuple[nx.DiGraph, set[str]]) -> None:
    """Every subset of measured non-role nodes is tried with the networkx reference; the minimal valid ones
    must be exactly what adjustment_sets returns (this also checks its ancestor-only search)."""
    G, _ = case
    pool = sorted(n for n in G if G.nodes[n]["observed"] and n not in ("Z", "X", "Y"))
    valid = [
        frozenset(c)
        for k in range(len(pool) + 1)
        for c in itertools.combinations(pool, k)
        if reference_criterion(G, set(c))
    ]
    minimal = sorted((s for s in valid if not any(o < s for o in valid)), key=lambda s: (len(s), sorted(s)))
    assert adjustment_sets(G, **ROLES) == minimal


def test_whole_catalogue_graph_is_checked_and_has_no_adjustment_set() -> None:
    # Every built-in fragment at once: many unobserved bypass paths (e.g. WS-E01's household income) can never
    # be blocked by measured variables, so the answer is [] (the search stops early on such a path).
    cat = load_builtin()
    G = build_graph(fragments=[t.fragment for t in cat])
    v = verdict(G)
    assert v.value("exclusion") == v.value("exogeneity") == "broken"
    assert "Z -> household_income -> Y" in {p.text for p in v.open_paths}
    assert not v.paths_truncated
    assert adjustment_sets(G, **ROLES) == []
    assert not reference_criterion(G, set())


def test_truncated_path_listing_never_hides_a_failed_criterion(monkeypatch: pytest.MonkeyPatch) -> None:
    import ivdossier.threats_catalog.graph as graph_module

    monkeypatch.setattr(graph_module, "_MAX_PATHS_VISITED", 0)
    G = build_graph(fragments=[MEDIATOR])
    v = verdict(G)
    assert v.paths_truncated and v.open_paths == ()
    assert not v.criterion_holds  # decided by d-separation, not by the (empty) listing
    assert v.value("exclusion") == "at-risk"
    assert "path listing stopped early" in v.condition("exclusion").reasons[-1]


def test_hand_made_graph_without_attributes_is_read_as_drawn() -> None:
    # A plain networkx graph: every edge counts as asserted, so an open bypass path breaks exclusion, and a graph
    # without one holds (the team drew it, so it was considered).
    plain = nx.DiGraph([("Z", "X"), ("X", "Y"), ("U", "X"), ("U", "Y"), ("Z", "M"), ("M", "Y")])
    nx.set_node_attributes(plain, {n: n != "U" for n in plain}, "observed")
    v = verdict(plain)
    assert v.value("exclusion") == "broken" and v.open_paths[0].severity == "broken"
    plain.remove_node("M")
    assert verdict(plain).value("exclusion") == "holds"
