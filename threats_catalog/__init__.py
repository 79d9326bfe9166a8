"""Threat catalogue and causal-graph checker: plain data and pure functions, no SQL and no CLI.

The graph functions live in ``ivdossier.threats_catalog.graph`` (on the small directed graph of ``.dag``) and the
drawing in ``.draw``, imported on demand so that reading the catalogue loads neither. The names below load
``.catalog`` on first use, so a command that only compares catalogue versions (``.version``) does not parse or
validate the catalogue.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from ivdossier.threats_catalog.catalog import (
        Catalog,
        FragmentNode,
        GraphFragment,
        Threat,
        load_builtin,
        merge,
        suggest_for_family,
    )
from ivdossier.threats_catalog.version import CATALOGUE_VERSION

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


def __getattr__(name: str) -> Any:
    if name in __all__:
        from ivdossier.threats_catalog import catalog

        return getattr(catalog, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
