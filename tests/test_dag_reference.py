"""Our directed-graph module (ivdossier.threats_catalog.dag) against networkx, the reference implementation.

networkx is a test-only dependency here: every graph is built twice, with the same calls in the same order, once
with our classes and once with networkx's ``DiGraph``/``Graph``, and every answer (sets, and the orders the
diagram and the messages depend on) must be the same: node, edge, successor and predecessor orders, descendants,
ancestors, topological order, acyclicity, the cycle ``find_cycle`` names, ``shortest_path``, ``has_path``, the
order of ``all_simple_paths``, ``relabel_nodes``, ``copy`` and ``subgraph``. The graphs are random (seeded) and
include the empty graph, a single node, disconnected, sparse and dense graphs, and unicode node names.
"""

from __future__ import annotations

import itertools
import random
from typing import Any

import networkx as nx
import pytest

from ivdossier.threats_catalog import dag

NAMES = ["Z", "X", "Y", "U", "a", "b", "ψ_1", "Zé", "日本", "naïve node", "m2", "q", "Ω", "w w", "k9", "ß"]
SEEDS = range(80)


def _names(rng: random.Random, n: int) -> list[str]:
    return rng.sample(NAMES, n)


def _dag_calls(seed: int) -> list[tuple[Any, ...]]:
    """A random sequence of add_node/add_edge calls that builds a DAG: sizes 0-12 (some of them dense), nodes
    added in random order, edges (along a random order of the nodes) added in random order, with attributes."""
    rng = random.Random(seed)
    n = [0, 1, 2][seed] if seed < 3 else rng.randint(2, 12)
    names = _names(rng, n)
    order = names[:]
    rng.shuffle(order)
    density = rng.choice([0.0, 0.15, 0.35, 0.7, 1.0])
    edges = [(u, v) for i, u in enumerate(order) for v in order[i + 1 :] if rng.random() < density]
    rng.shuffle(edges)
    calls: list[tuple[Any, ...]] = []
    pending = names[:]
    while pending or edges:
        if pending and (not edges or rng.random() < 0.5):
            node = pending.pop()
            calls.append(
                ("node", node, {"label": node.upper(), "observed": rng.random() < 0.7, "threats": []})
            )
        else:
            u, v = edges.pop()
            calls.append(("edge", u, v, {"threats": [f"T{rng.randint(1, 5)}"], "team": rng.random() < 0.2}))
    return calls


def _digraph_calls(seed: int) -> list[tuple[Any, ...]]:
    """A random directed graph that may have cycles (self-loops and two-cycles included)."""
    rng = random.Random(10_000 + seed)
    n = rng.randint(1, 10)
    names = _names(rng, n)
    calls: list[tuple[Any, ...]] = [("node", name, {}) for name in names[: rng.randint(0, n)]]
    density = rng.choice([0.1, 0.25, 0.5])
    pairs = [
        (u, v) for u in names for v in names if rng.random() < density and (u != v or rng.random() < 0.2)
    ]
    rng.shuffle(pairs)
    calls += [("edge", u, v, {}) for u, v in pairs]
    calls += [("node", name, {}) for name in names]
    return calls


def _build(calls: list[tuple[Any, ...]]) -> tuple[dag.DiGraph, nx.DiGraph]:
    ours, ref = dag.DiGraph(), nx.DiGraph()
    for call in calls:
        if call[0] == "node":
            ours.add_node(call[1], **call[2])
            ref.add_node(call[1], **call[2])
        else:
            ours.add_edge(call[1], call[2], **call[3])
            ref.add_edge(call[1], call[2], **call[3])
    ours.graph["roles"] = ref.graph["roles"] = {"instrument": "Z"}
    return ours, ref


def _same_structure(ours: Any, ref: Any) -> None:
    """Node order, edge order, attributes, successor and predecessor orders all equal."""
    assert list(ours) == list(ref)
    assert list(ours.nodes(data=True)) == list(ref.nodes(data=True))
    assert list(ours.edges) == list(ref.edges)
    assert list(ours.edges(data=True)) == list(ref.edges(data=True))
    assert ours.graph == ref.graph
    for n in ref:
        assert list(ours.successors(n)) == list(ref.successors(n))
        assert list(ours.predecessors(n)) == list(ref.predecessors(n))


def _both_raise(ours: Any, ref: Any, our_error: type[Exception], ref_error: type[Exception]) -> None:
    with pytest.raises(our_error):
        ours()
    with pytest.raises(ref_error):
        ref()


@pytest.mark.parametrize("seed", SEEDS)
def test_building_keeps_networkx_orders_and_views(seed: int) -> None:
    ours, ref = _build(_dag_calls(seed))
    _same_structure(ours, ref)
    assert ours.number_of_nodes() == ref.number_of_nodes() == len(ours)
    for u, v in itertools.product([*ref, "absent"], repeat=2):
        assert ours.has_edge(u, v) == ref.has_edge(u, v)
        assert ((u, v) in ours.edges) == ((u, v) in ref.edges)
    for n in ref:
        assert n in ours and ours.nodes[n] == ref.nodes[n]
        assert ours.out_edges(n) == list(ref.out_edges(n))
        assert list(dag.all_neighbors(ours, n)) == list(nx.all_neighbors(ref, n))
    for u, v in ref.edges:
        assert ours.edges[u, v] == ref.edges[u, v]
    assert "absent" not in ours and ["unhashable"] not in ours


@pytest.mark.parametrize("seed", SEEDS)
def test_descendants_ancestors_and_topological_order(seed: int) -> None:
    ours, ref = _build(_dag_calls(seed))
    for n in ref:
        assert dag.descendants(ours, n) == nx.descendants(ref, n)
        assert dag.ancestors(ours, n) == nx.ancestors(ref, n)
    assert list(dag.topological_sort(ours)) == list(nx.topological_sort(ref))
    assert dag.is_directed_acyclic_graph(ours) and nx.is_directed_acyclic_graph(ref)
    # the algorithms read a networkx graph too (duck typing on successors/predecessors)
    assert list(dag.topological_sort(ref)) == list(nx.topological_sort(ref))


@pytest.mark.parametrize("seed", SEEDS)
def test_cycles_acyclicity_and_find_cycle(seed: int) -> None:
    ours, ref = _build(_digraph_calls(seed))
    _same_structure(ours, ref)
    acyclic = nx.is_directed_acyclic_graph(ref)
    assert dag.is_directed_acyclic_graph(ours) == acyclic
    if acyclic:
        assert list(dag.topological_sort(ours)) == list(nx.topological_sort(ref))
        _both_raise(
            lambda: dag.find_cycle(ours), lambda: nx.find_cycle(ref), dag.NoCycleError, nx.NetworkXNoCycle
        )
    else:
        assert dag.find_cycle(ours) == list(nx.find_cycle(ref))
        _both_raise(
            lambda: list(dag.topological_sort(ours)),
            lambda: list(nx.topological_sort(ref)),
            dag.CycleError,
            nx.NetworkXUnfeasible,
        )
    for n in ref:  # on cycles too
        assert dag.descendants(ours, n) == nx.descendants(ref, n)
        assert dag.ancestors(ours, n) == nx.ancestors(ref, n)


def test_cyclic_sample_has_enough_cycles() -> None:
    """The random directed graphs above are not all acyclic (so find_cycle is really compared)."""
    cyclic = sum(not nx.is_directed_acyclic_graph(_build(_digraph_calls(s))[1]) for s in SEEDS)
    assert 20 <= cyclic <= len(SEEDS) - 10


@pytest.mark.parametrize("seed", SEEDS)
def test_shortest_path_and_has_path_for_every_pair(seed: int) -> None:
    for calls in (_dag_calls(seed), _digraph_calls(seed)):
        ours, ref = _build(calls)
        for u, v in itertools.product(ref, repeat=2):
            assert dag.has_path(ours, u, v) == nx.has_path(ref, u, v)
            if nx.has_path(ref, u, v):
                assert dag.shortest_path(ours, u, v) == nx.shortest_path(ref, u, v)
            else:
                with pytest.raises(dag.NoPathError):
                    dag.shortest_path(ours, u, v)
                with pytest.raises(nx.NetworkXNoPath):
                    nx.shortest_path(ref, u, v)


def _first(paths: Any, limit: int = 300) -> list[list[str]]:
    """The first `limit` paths in order (dense skeletons have millions; the checker stops early too)."""
    return list(itertools.islice(paths, limit))


@pytest.mark.parametrize("seed", SEEDS)
def test_all_simple_paths_order_on_the_skeleton(seed: int) -> None:
    """As the verdict walks it: the undirected skeleton of a DAG with one node removed, every ordered pair."""
    ours, ref = _build(_dag_calls(seed))
    rng = random.Random(seed)
    gone = [rng.choice(list(ref))] if len(ref) > 2 else []
    sk = dag.skeleton(ours, without=gone)
    sk_ref: nx.Graph[str] = nx.Graph()
    sk_ref.add_nodes_from(ref.nodes)
    sk_ref.add_edges_from(ref.edges)
    sk_ref.remove_nodes_from(gone)
    assert list(sk) == list(sk_ref)
    for n in sk_ref:
        assert list(sk.neighbors(n)) == list(sk_ref.neighbors(n))
    for u, v in itertools.product(sk_ref, repeat=2):
        assert _first(dag.all_simple_paths(sk, u, v)) == _first(nx.all_simple_paths(sk_ref, u, v))
    # and along directed edges
    for u, v in itertools.product(ref, repeat=2):
        assert _first(dag.all_simple_paths(ours, u, v)) == _first(nx.all_simple_paths(ref, u, v))


def test_all_simple_paths_on_a_complete_graph_lists_every_path_in_order() -> None:
    """A dense case: the complete graph on 7 unicode-named nodes (326 paths between two nodes)."""
    names = NAMES[4:11]
    sk, sk_ref = dag.Graph(), nx.Graph()
    for u, v in itertools.combinations(names, 2):
        sk.add_edge(u, v)
        sk_ref.add_edge(u, v)
    ours_paths = list(dag.all_simple_paths(sk, names[0], names[-1]))
    assert ours_paths == list(nx.all_simple_paths(sk_ref, names[0], names[-1]))
    assert len(ours_paths) == sum(
        len(list(itertools.permutations(names[1:-1], k))) for k in range(len(names) - 1)
    )


@pytest.mark.parametrize("seed", SEEDS)
def test_relabel_copy_and_subgraph_semantics(seed: int) -> None:
    ours, ref = _build(_dag_calls(seed))
    if not len(ref):
        return
    rng = random.Random(seed)
    old = rng.choice(list(ref))
    mapping = {old: "\ue000"}
    _same_structure(dag.relabel_nodes(ours, mapping), nx.relabel_nodes(ref, mapping, copy=True))
    _same_structure(dag.relabel_nodes(ref, mapping), nx.relabel_nodes(ref, mapping, copy=True))
    copied, copied_ref = ours.copy(), ref.copy()
    _same_structure(copied, copied_ref)
    # the copy's attribute dicts are its own; their list values are shared, as in networkx
    for graph, orig in ((copied, ours), (copied_ref, ref)):
        for n in orig:
            assert graph.nodes[n] is not orig.nodes[n]
            assert graph.nodes[n]["threats"] is orig.nodes[n]["threats"]
        for u, v in orig.edges:
            assert graph.edges[u, v] is not orig.edges[u, v]
    # what the checker does with a copy: remove the edges out of one node; the original keeps them
    removed = list(ours.out_edges(old))
    copied.remove_edges_from([*removed, ("absent", "absent")])
    copied_ref.remove_edges_from([*removed, ("absent", "absent")])
    _same_structure(copied, copied_ref)
    assert all(ours.has_edge(u, v) for u, v in removed)
    assert list(ours.edges) == list(ref.edges)
    copied.nodes[old]["label"] = "changed"
    assert ours.nodes[old]["label"] != "changed"
    keep = {n for n in ref if rng.random() < 0.6} | {"absent"}
    sub, sub_ref = ours.subgraph(keep), ref.subgraph(keep)
    assert set(sub) == set(sub_ref) and set(sub.edges) == set(sub_ref.edges)
    assert [n for n in ours if n in sub] == list(sub)
    for n in sub_ref:
        assert dag.ancestors(sub, n) == nx.ancestors(sub_ref, n)
        assert dag.descendants(sub, n) == nx.descendants(sub_ref, n)
        assert sub.nodes[n] == sub_ref.nodes[n]


def test_missing_nodes_are_named() -> None:
    G = dag.DiGraph([("a", "b")])
    for call in (
        lambda: dag.descendants(G, "c"),
        lambda: dag.ancestors(G, "c"),
        lambda: dag.shortest_path(G, "a", "c"),
        lambda: list(dag.all_simple_paths(G, "c", "a")),
        lambda: G.successors("c"),
    ):
        with pytest.raises(dag.GraphError, match="'c' is not in the graph"):
            call()
