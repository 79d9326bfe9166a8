"""Threat catalogue and causal-graph checker: plain data and pure functions, no SQL and no CLI."""

from ivdossier.threats_catalog.catalog import CATALOGUE_VERSION, Catalog, GraphFragment, Threat, load_builtin

__all__ = ["CATALOGUE_VERSION", "Catalog", "GraphFragment", "Threat", "load_builtin"]
