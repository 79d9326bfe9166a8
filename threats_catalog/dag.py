"""A small directed graph with attribute dictionaries, and the few graph algorithms the causal-graph checker uses.

Nodes, successors and predecessors are kept in insertion order, as networkx keeps them in its dict-of-dicts, and
every algorithm visits them in the order networkx 3.x does (topological order by generations, depth-first simple
paths, bidirectional breadth-first shortest path, depth-first cycle search), so drawings and messages are the same
as with networkx; tests/test_dag_reference.py compares each with networkx. The algorithms read a graph only
through ``successors``, ``predecessors``, ``in`` and iteration, so a networkx ``DiGraph`` works with them too.
The traversal orders are ported from NetworkX, whose BSD 3-Clause licence applies (THIRD_PARTY_NOTICES.md).
"""

from __future__ import annotations

from collections.abc import Callable, Hashable, Iterable, Iterator, Mapping
from typing import Any, Literal, Protocol, overload


class GraphError(Exception):
    """A graph algorithm cannot answer: a node is missing, there is no path, or no cycle, or a cycle."""


class NoPathError(GraphError):
    """No path joins the two nodes."""


class NoCycleError(GraphError):
    """The graph has no cycle."""


class CycleError(GraphError):
    """The graph has a cycle, so it has no topological order."""


class Directed(Protocol):
    """What the algorithms read from a directed graph (ours, or a networkx ``DiGraph``)."""

    def successors(self, n: str) -> Iterator[str]: ...

    def predecessors(self, n: str) -> Iterator[str]: ...

    def __iter__(self) -> Iterator[str]: ...

    def __contains__(self, n: object) -> bool: ...

    def __len__(self) -> int: ...


class Adjacent(Protocol):
    """What the simple-path search reads: a node's neighbours (successors in a directed graph)."""

    def neighbors(self, n: str) -> Iterator[str]: ...

    def __contains__(self, n: object) -> bool: ...

    def __len__(self) -> int: ...


class NodeView:
    """``G.nodes``: iterate names, ``G.nodes[n]`` is the attribute dict, ``G.nodes(data=True)`` gives pairs."""

    __slots__ = ("_node",)

    def __init__(self, node: dict[str, dict[str, Any]]) -> None:
        self._node = node

    @overload
    def __call__(self, data: Literal[False] = False) -> Iterator[str]: ...

    @overload
    def __call__(self, data: Literal[True]) -> Iterator[tuple[str, dict[str, Any]]]: ...

    def __call__(self, data: bool = False) -> Iterator[str] | Iterator[tuple[str, dict[str, Any]]]:
        return iter(self._node.items()) if data else iter(self._node)

    def __getitem__(self, n: str) -> dict[str, Any]:
        return self._node[n]

    def __iter__(self) -> Iterator[str]:
        return iter(self._node)

    def __len__(self) -> int:
        return len(self._node)

    def __contains__(self, n: object) -> bool:
        return n in self._node


class EdgeView:
    """``G.edges``: iterate ``(u, v)`` pairs by source, then in the order each source's edges were added;
    ``G.edges[u, v]`` is the attribute dict, ``G.edges(data=True)`` gives ``(u, v, attrs)``."""

    __slots__ = ("_succ",)

    def __init__(self, succ: dict[str, dict[str, dict[str, Any]]]) -> None:
        self._succ = succ

    @overload
    def __call__(self, data: Literal[False] = False) -> Iterator[tuple[str, str]]: ...

    @overload
    def __call__(self, data: Literal[True]) -> Iterator[tuple[str, str, dict[str, Any]]]: ...

    def __call__(
        self, data: bool = False
    ) -> Iterator[tuple[str, str]] | Iterator[tuple[str, str, dict[str, Any]]]:
        if data:
            return ((u, v, d) for u, nbrs in self._succ.items() for v, d in nbrs.items())
        return iter(self)

    def __getitem__(self, edge: tuple[str, str]) -> dict[str, Any]:
        u, v = edge
        return self._succ[u][v]

    def __iter__(self) -> Iterator[tuple[str, str]]:
        return ((u, v) for u, nbrs in self._succ.items() for v in nbrs)

    def __len__(self) -> int:
        return sum(len(nbrs) for nbrs in self._succ.values())

    def __contains__(self, edge: object) -> bool:
        if not isinstance(edge, tuple) or len(edge) != 2:
            return False
        u, v = edge
        return u in self._succ and v in self._succ[u]


class DiGraph:
    """A directed graph of named nodes with attribute dicts for the graph, each node and each edge.

    ``G.graph`` holds graph attributes; ``add_node``/``add_edge`` add (or update) a node or an edge with keyword
    attributes, adding missing end nodes; the two ends of an edge share one attribute dict.
    """

    __slots__ = ("_node", "_pred", "_succ", "edges", "graph", "nodes")

    def __init__(self, edges: Iterable[tuple[str, str]] = ()) -> None:
        self.graph: dict[str, Any] = {}
        self._node: dict[str, dict[str, Any]] = {}
        self._succ: dict[str, dict[str, dict[str, Any]]] = {}
        self._pred: dict[str, dict[str, dict[str, Any]]] = {}
        self.nodes = NodeView(self._node)
        self.edges = EdgeView(self._succ)
        for u, v in edges:
            self.add_edge(u, v)

    def __repr__(self) -> str:
        return f"<DiGraph with {len(self._node)} nodes and {len(self.edges)} edges>"

    def __iter__(self) -> Iterator[str]:
        return iter(self._node)

    def __contains__(self, n: object) -> bool:
        try:
            return n in self._node
        except TypeError:
            return False

    def __len__(self) -> int:
        return len(self._node)

    def number_of_nodes(self) -> int:
        """How many nodes the graph has."""
        return len(self._node)

    def is_directed(self) -> bool:
        """Always True (the question networkx graphs answer too)."""
        return True

    def is_multigraph(self) -> bool:
        """Always False: at most one edge joins u to v."""
        return False

    def add_node(self, n: str, **attr: Any) -> None:
        """Add node ``n`` with ``attr``, or update the attributes of an existing node."""
        self._add(n, attr)

    def _add(self, n: str, attr: Mapping[Any, Any]) -> None:
        if n not in self._node:
            self._succ[n] = {}
            self._pred[n] = {}
            self._node[n] = dict(attr)
        else:
            self._node[n].update(attr)

    def add_edge(self, u: str, v: str, **attr: Any) -> None:
        """Add the edge ``u -> v`` with ``attr`` (missing nodes are added first), or update its attributes."""
        self._join(u, v, attr)

    def _join(self, u: str, v: str, attr: Mapping[Any, Any]) -> None:
        for n in (u, v):
            if n not in self._node:
                self._succ[n] = {}
                self._pred[n] = {}
                self._node[n] = {}
        data = self._succ[u].get(v)
        if data is None:
            data = {}
        data.update(attr)
        self._succ[u][v] = data
        self._pred[v][u] = data

    def remove_edges_from(self, edges: Iterable[tuple[str, str]]) -> None:
        """Remove each listed edge that the graph has (others are ignored)."""
        for u, v in edges:
            if u in self._succ and v in self._succ[u]:
                del self._succ[u][v]
                del self._pred[v][u]

    def has_edge(self, u: str, v: str) -> bool:
        """True when the edge ``u -> v`` is in the graph."""
        nbrs = self._succ.get(u)
        return nbrs is not None and v in nbrs

    def successors(self, n: str) -> Iterator[str]:
        """Heads of the edges out of ``n``, in the order they were added."""
        try:
            return iter(self._succ[n])
        except KeyError:
            raise GraphError(f"node {n!r} is not in the graph") from None

    neighbors = successors

    def predecessors(self, n: str) -> Iterator[str]:
        """Tails of the edges into ``n``, in the order they were added."""
        try:
            return iter(self._pred[n])
        except KeyError:
            raise GraphError(f"node {n!r} is not in the graph") from None

    def out_edges(self, n: str) -> list[tuple[str, str]]:
        """The edges out of ``n`` as ``(n, head)`` pairs."""
        return [(n, v) for v in self.successors(n)]

    def copy(self) -> DiGraph:
        """An independent copy: the graph dict and every node's and edge's attribute dict are copied one level
        deep (values such as lists are shared, as in networkx's ``copy``); edges are re-added source by source."""
        H = DiGraph()
        H.graph.update(self.graph)
        for n, d in self._node.items():
            H._add(n, d)
        for u, nbrs in self._succ.items():
            for v, d in nbrs.items():
                H._join(u, v, d)
        return H

    def subgraph(self, nodes: Iterable[str]) -> DiGraph:
        """A new graph induced on ``nodes`` (those in the graph), in this graph's node and edge order; its
        attribute dicts are copied one level deep."""
        keep = {n for n in nodes if n in self}
        H = DiGraph()
        H.graph.update(self.graph)
        for n, d in self._node.items():
            if n in keep:
                H._add(n, d)
        for u, nbrs in self._succ.items():
            if u in keep:
                for v, d in nbrs.items():
                    if v in keep:
                        H._join(u, v, d)
        return H


class Graph:
    """An undirected graph without attributes: the skeleton the simple-path search walks. A node's neighbours
    come in the order its edges were added, as in networkx's ``Graph``."""

    __slots__ = ("adj",)

    def __init__(self) -> None:
        self.adj: dict[str, dict[str, None]] = {}

    def __iter__(self) -> Iterator[str]:
        return iter(self.adj)

    def __contains__(self, n: object) -> bool:
        try:
            return n in self.adj
        except TypeError:
            return False

    def __len__(self) -> int:
        return len(self.adj)

    def add_node(self, n: str) -> None:
        """Add ``n`` (no effect if present)."""
        self.adj.setdefault(n, {})

    def add_edge(self, u: str, v: str) -> None:
        """Join ``u`` and ``v`` (adding them if missing)."""
        self.adj.setdefault(u, {})[v] = None
        self.adj.setdefault(v, {})[u] = None

    def remove_node(self, n: str) -> None:
        """Remove ``n`` and its edges."""
        try:
            nbrs = self.adj.pop(n)
        except KeyError:
            raise GraphError(f"node {n!r} is not in the graph") from None
        for m in nbrs:
            if m != n:
                del self.adj[m][n]

    def neighbors(self, n: str) -> Iterator[str]:
        """Nodes joined to ``n``."""
        try:
            return iter(self.adj[n])
        except KeyError:
            raise GraphError(f"node {n!r} is not in the graph") from None


def skeleton(G: DiGraph, without: Iterable[str] = ()) -> Graph:
    """The undirected skeleton of ``G`` (nodes, then edges, in ``G``'s order) with the nodes ``without`` removed."""
    S = Graph()
    for n in G.nodes:
        S.add_node(n)
    for u, v in G.edges:
        S.add_edge(u, v)
    for n in without:
        S.remove_node(n)
    return S


# ------------------------------------------------------------------------------------------------ algorithms


def _need(G: Directed | Adjacent, n: str) -> None:
    if n not in G:
        raise GraphError(f"node {n!r} is not in the graph")


def descendants(G: Directed, source: str) -> set[str]:
    """Every node other than ``source`` reachable from it along edges."""
    return _reach(G, source, G.successors)


def ancestors(G: Directed, source: str) -> set[str]:
    """Every node other than ``source`` from which it is reachable along edges."""
    return _reach(G, source, G.predecessors)


def _reach(G: Directed, source: str, step: Callable[[str], Iterator[str]]) -> set[str]:
    _need(G, source)
    seen = {source}
    stack = [source]
    while stack:
        for n in step(stack.pop()):
            if n not in seen:
                seen.add(n)
                stack.append(n)
    seen.discard(source)
    return seen


def topological_sort(G: Directed) -> Iterator[str]:
    """Nodes in topological order, generation by generation: first the nodes without parents in node order,
    then those whose last parent was in the previous generation, in the order they were freed. Raises
    :class:`CycleError` (after the acyclic part) when the graph has a cycle."""
    indegree: dict[str, int] = {}
    zero: list[str] = []
    for n in G:
        d = sum(1 for _ in G.predecessors(n))
        if d:
            indegree[n] = d
        else:
            zero.append(n)
    while zero:
        generation, zero = zero, []
        for node in generation:
            for child in G.successors(node):
                indegree[child] -= 1
                if indegree[child] == 0:
                    zero.append(child)
                    del indegree[child]
        yield from generation
    if indegree:
        raise CycleError("the graph has a cycle")


def is_directed_acyclic_graph(G: Directed) -> bool:
    """True when ``G`` is directed and has no cycle."""
    is_directed = getattr(G, "is_directed", None)
    if is_directed is not None and not is_directed():
        return False
    try:
        for _ in topological_sort(G):
            pass
    except CycleError:
        return False
    return True


def find_cycle(G: Directed) -> list[tuple[str, str]]:
    """The edges of one cycle, found as networkx's ``find_cycle`` finds it (depth-first over the edges, nodes
    started in order); raises :class:`NoCycleError` when there is none."""
    explored: set[str] = set()
    cycle: list[tuple[str, str]] = []
    final: str | None = None
    for start in G:
        if start in explored:
            continue
        edges: list[tuple[str, str]] = []
        seen = {start}
        active = {start}
        previous: str | None = None
        for tail, head in _edge_dfs(G, start):
            if head in explored:
                continue
            if previous is not None and tail != previous:
                # backtracked: drop edges until the path ends at this edge's tail
                while True:
                    try:
                        popped = edges.pop()
                    except IndexError:
                        edges = []
                        active = {tail}
                        break
                    active.remove(popped[1])
                    if edges and tail == edges[-1][1]:
                        break
            edges.append((tail, head))
            if head in active:
                cycle.extend(edges)
                final = head
                break
            seen.add(head)
            active.add(head)
            previous = head
        if cycle:
            break
        explored.update(seen)
    else:
        raise NoCycleError("the graph has no cycle")
    i = 0
    for i, (tail, _) in enumerate(cycle):  # noqa: B007 (i is used after the loop)
        if tail == final:
            break
    return cycle[i:]


def _edge_dfs(G: Directed, start: str) -> Iterator[tuple[str, str]]:
    """Every edge reachable from ``start``, depth first (networkx's ``edge_dfs`` from one node); each node's edges
    are read from one iterator, so each edge comes once."""
    pending: dict[str, Iterator[str]] = {}
    stack = [start]
    while stack:
        node = stack[-1]
        if node not in pending:
            pending[node] = G.successors(node)
        head = next(pending[node], None)
        if head is None:  # no node is named None
            stack.pop()
            continue
        stack.append(head)
        yield node, head


def shortest_path(G: Directed, source: str, target: str) -> list[str]:
    """A shortest directed path from ``source`` to ``target`` (both included), the one networkx's
    bidirectional breadth-first search returns; raises :class:`NoPathError` when there is none."""
    _need(G, source)
    _need(G, target)
    if source == target:
        return [source]
    pred: dict[str, str | None] = {source: None}
    succ: dict[str, str | None] = {target: None}
    forward = [source]
    reverse = [target]
    meet: str | None = None
    while forward and reverse and meet is None:
        if len(forward) <= len(reverse):
            level, forward = forward, []
            for v in level:
                for w in G.successors(v):
                    if w not in pred:
                        forward.append(w)
                        pred[w] = v
                    if w in succ:
                        meet = w
                        break
                if meet is not None:
                    break
        else:
            level, reverse = reverse, []
            for v in level:
                for w in G.predecessors(v):
                    if w not in succ:
                        succ[w] = v
                        reverse.append(w)
                    if w in pred:
                        meet = w
                        break
                if meet is not None:
                    break
    if meet is None:
        raise NoPathError(f"no path from {source!r} to {target!r}")
    path: list[str] = []
    node: str | None = meet
    while node is not None:
        path.append(node)
        node = pred[node]
    path.reverse()
    node = succ[path[-1]]
    while node is not None:
        path.append(node)
        node = succ[node]
    return path


def has_path(G: Directed, source: str, target: str) -> bool:
    """True when a directed path leads from ``source`` to ``target`` (a node reaches itself)."""
    try:
        shortest_path(G, source, target)
    except NoPathError:
        return False
    return True


def all_simple_paths(G: Adjacent, source: str, target: str) -> Iterator[list[str]]:
    """Every path from ``source`` to ``target`` that visits no node twice, in networkx's depth-first order
    (neighbours in adjacency order); ``[source]`` alone when the two are the same node."""
    _need(G, source)
    _need(G, target)
    if source == target:
        yield [source]
        return
    path = [source]
    on_path = {source}
    stack = [G.neighbors(source)]
    while stack:
        step = next((n for n in stack[-1] if n not in on_path), None)
        if step is None:
            stack.pop()
            on_path.discard(path.pop())
            continue
        if step == target:
            yield [*path, step]
            continue
        path.append(step)
        on_path.add(step)
        stack.append(G.neighbors(step))


def all_neighbors(G: Directed, n: str) -> Iterator[str]:
    """Predecessors of ``n``, then its successors."""
    yield from G.predecessors(n)
    yield from G.successors(n)


def relabel_nodes(G: Any, mapping: Mapping[Hashable, str]) -> DiGraph:
    """A copy of the directed graph ``G`` (ours or networkx's) with nodes renamed by ``mapping`` (others keep
    their names), built as networkx's ``relabel_nodes(copy=True)`` builds it: nodes in order, attribute dicts
    copied one level deep, edges re-added in ``G``'s edge order, the graph dict updated last."""
    H = DiGraph()
    for n in G:
        H.add_node(mapping.get(n, n))
    for n, d in G.nodes(data=True):
        H._node[mapping.get(n, n)] = dict(d)
    for u, v, d in G.edges(data=True):
        H._join(mapping.get(u, u), mapping.get(v, v), d)
    H.graph.update(G.graph)
    return H
