"""Warnings about a run's inference: few clusters, or a t reference with few degrees of freedom. Pure rules with
no database or numerics, so `estimate` can warn without loading the registry."""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import Any

FEW_CLUSTERS = 42
"""Below this many clusters, cluster-robust inference can over-reject (common practice; a rule of thumb, not a
theorem: with few or unbalanced clusters a wild cluster bootstrap is the usual remedy)."""
FEW_T_DF = 30
"""Below this many degrees of freedom the t reference is far from normal and the interval leans on the error
distribution (common practice)."""
_T_DF = re.compile(r"t quantiles with (\d+) degrees of freedom")


def inference_warnings(n_clusters: Sequence[int], ref_df: float | None) -> tuple[str, ...]:
    """Warnings about a run's inference: few clusters (G < 42) or a t reference with few degrees of freedom."""
    out = []
    if n_clusters and min(n_clusters) < FEW_CLUSTERS:
        out.append(
            f"few clusters: {min(n_clusters)} (fewer than {FEW_CLUSTERS}); cluster-robust standard errors can be "
            "too small with few clusters, so confirm the inference with a wild cluster bootstrap or "
            "randomization inference"
        )
    if ref_df is not None and ref_df < FEW_T_DF:
        out.append(
            f"the t reference has only {int(ref_df)} degrees of freedom (fewer than {FEW_T_DF}); intervals and "
            "p-values lean on that small-sample reference"
        )
    return tuple(out)


def run_warnings(results: Mapping[str, Any] | None) -> tuple[str, ...]:
    """`inference_warnings` read from a run's stored JSON view (any kind that reports clusters or its reference)."""
    res = results or {}
    clusters = [int(g) for g in res.get("n_clusters") or () if isinstance(g, int | float)]
    df = res.get("ref_df")
    if df is None:
        match = _T_DF.search(str(res.get("ci_reference") or res.get("reference") or ""))
        df = int(match.group(1)) if match else None
    return inference_warnings(clusters, df if isinstance(df, int | float) else None)
