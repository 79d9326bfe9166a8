"""Threat catalogue and causal-graph checker: plain data and pure functions, no SQL and no CLI.

The graph functions live in ``ivdossier.threats_catalog.graph`` and the drawing in ``.draw`` (imported on demand
so that reading the catalogue does not load networkx).
"""

from ivdossier.threats_catalog.catalog import (
    CATALOGUE_VERSION,
    Catalog,
    FragmentNode,
    GraphFragment,
    Threat,
    load_builtin,
    merge,
    suggest_for_family,
)

__all__ = [
    "CATALOGUE_VERSION",
    "Catalog",
    "FragmentNode",
    "GraphFragment",
    "Threat",
    "load_builtin",
    "merge",
    "suggest_for_family",
]
