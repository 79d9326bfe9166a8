"""Our d-separation against the textbook rules and against networkx's own implementation.

Rules for chains, forks and colliders: Pearl (2009), Causality, 2nd ed., ch. 1, definition of d-separation
(section number from memory: 1.2.3). The property test compares with ``networkx.is_d_separator``
(networkx >= 3.3; ``d_separated`` in older releases), an implementation independent of ours.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable

import networkx as nx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.threats_catalog.graph import d_separated

nx_dsep: Callable[..., bool] = getattr(nx, "is_d_separator", None) or nx.d_separated  # type: ignore[attr-defined]


def frozen(edges: list[tuple[str, str]]) -> nx.DiGraph:
    return nx.freeze(nx.DiGraph(edges))


CHAIN = frozen([("a", "m"), ("m", "b")])
FORK = frozen([("m", "a"), ("m", "b")])
COLLIDER = frozen([("a", "m"), ("b", "m"), ("m", "d")])


@pytest.mark.parametrize(
    ("graph", "given_", "expected"),
    [
        (CHAIN, set(), False),  # a chain transmits dependence ...
        (CHAIN, {"m"}, True),  # ... and conditioning on the middle node blocks it
        (FORK, set(), False),  # a common cause makes its effects dependent ...
        (FORK, {"m"}, True),  # ... and conditioning on it removes the dependence
        (COLLIDER, set(), True),  # a collider blocks by default ...
        (COLLIDER, {"m"}, False),  # ... conditioning on it opens the path
        (COLLIDER, {"d"}, False),  # ... and so does conditioning on a descendant of it
    ],
)
def test_textbook_chain_fork_collider(graph: nx.DiGraph, given_: set[str], expected: bool) -> None:
    assert d_separated(graph, {"a"}, {"b"}, given_) is expected
    assert nx_dsep(graph, {"a"}, {"b"}, given_) is expected  # the reference agrees on the textbook cases


def test_conditioning_on_a_fork_does_not_close_an_opened_collider() -> None:
    # a -> c <- f -> b with c conditioned: open; also conditioning on f closes it again.
    G = frozen([("a", "c"), ("f", "c"), ("f", "b")])
    assert d_separated(G, {"a"}, {"b"}, {"c"}) is False
    assert d_separated(G, {"a"}, {"b"}, {"c", "f"}) is True


def test_sets_of_nodes_are_separated_only_if_every_pair_is() -> None:
    G = frozen([("a1", "b1"), ("a2", "m"), ("m", "b2")])
    assert d_separated(G, {"a2"}, {"b2"}, {"m"}) is True
    assert d_separated(G, {"a1", "a2"}, {"b1", "b2"}, {"m"}) is False


def test_bad_arguments_are_named() -> None:
    with pytest.raises(NotFoundError, match="node 'q' is not in the graph"):
        d_separated(CHAIN, {"q"}, {"b"})
    with pytest.raises(InvalidInputError, match="must not overlap"):
        d_separated(CHAIN, {"a"}, {"b"}, {"a"})


@st.composite
def dag_and_sets(draw: st.DrawFn) -> tuple[nx.DiGraph, set[str], set[str], set[str]]:
    """A random DAG on 2-8 nodes (edges follow a random order) and disjoint, non-empty X and Y sets."""
    n = draw(st.integers(min_value=2, max_value=8))
    names = [f"n{i}" for i in range(n)]
    order = draw(st.permutations(names))
    G: nx.DiGraph = nx.DiGraph()
    G.add_nodes_from(names)
    for i, j in itertools.combinations(range(n), 2):
        if draw(st.booleans()):
            G.add_edge(order[i], order[j])
    x0, y0 = draw(st.permutations(names))[:2]
    xs, ys, zs = {x0}, {y0}, set[str]()
    for v in names:
        if v not in (x0, y0):
            {"x": xs, "y": ys, "z": zs, "-": set()}[draw(st.sampled_from("xyz-"))].add(v)
    return G, xs, ys, zs


@settings(max_examples=400, deadline=None)
@given(dag_and_sets())
def test_matches_networkx_on_random_small_dags(case: tuple[nx.DiGraph, set[str], set[str], set[str]]) -> None:
    G, xs, ys, zs = case
    assert d_separated(G, xs, ys, zs) == nx_dsep(G, xs, ys, zs)
