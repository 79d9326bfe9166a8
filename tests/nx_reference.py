"""A networkx copy of one of our graphs, so reference checks run networkx's own algorithms on networkx's class."""

from __future__ import annotations

from typing import Any

import networkx as nx


def to_networkx(G: Any) -> nx.DiGraph:
    """``G`` (our ``DiGraph`` from ``build_graph``, or already a networkx graph) as a networkx ``DiGraph``: nodes,
    edges and attributes in ``G``'s order."""
    if isinstance(G, nx.DiGraph):
        return G
    H: nx.DiGraph = nx.DiGraph()
    H.graph.update(G.graph)
    H.add_nodes_from(G.nodes(data=True))
    H.add_edges_from(G.edges(data=True))
    return H
