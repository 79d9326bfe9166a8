"""Delete-one-cluster jackknife (delete-one-row without clusters): how much one cluster moves the result.

Every deletion is computed exactly from the per-cluster cross-products (cluster_crossproducts.py): the totals
minus the deleted cluster's cross-products give the refit's 2SLS estimate, its cluster-robust (or
heteroskedasticity-robust) t test, the Anderson–Rubin test of the same null and the first-stage Wald F, with the
small-sample factors recomputed for the remaining clusters and rows. When absorbed fixed effects are not nested
in the clusters a deletion changes the demeaning of the other clusters, so each deletion is partialled again
(slower, same numbers by definition).

Reported: the largest change in the estimate and where it comes from, how many deletions flip significance of
the t test and of Anderson–Rubin at the chosen level, the range of the first-stage F, the jackknife variance
(G-1)/G sum (b_(g) - mean)^2, the most influential clusters by name and every deletion's estimate and interval.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.cluster_crossproducts import (
    BatchStats,
    batch_stats,
    cluster_crossproducts,
    f_p_values,
    partialled_stats,
    t_p_values,
)
from ivdossier.estimation.fragility_data import CAUTION, FragilityData
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]
Progress = Callable[[int, int], None]
BLOCK_ELEMENTS = 1 << 20


@dataclass(frozen=True)
class Deletion(Record):
    """The model refitted without one cluster (or row)."""

    label: str
    estimate: float
    std_error: float
    interval: tuple[float, float]
    t_p_value: float
    ar_p_value: float
    first_stage_f: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "left_out": self.label,
            "estimate": json_safe(self.estimate),
            "std_error": json_safe(self.std_error),
            "interval": json_safe(list(self.interval)),
            "t_p_value": json_safe(self.t_p_value),
            "ar_p_value": json_safe(self.ar_p_value),
            "first_stage_f": json_safe(self.first_stage_f),
        }


@dataclass(frozen=True)
class InfluenceResult(Record):
    """Jackknife influence summary and every deletion, or a not-applicable reason."""

    applicable: bool
    reason: str | None
    unit: str | None = None
    treatment: str | None = None
    null: float | None = None
    alpha: float | None = None
    full: Deletion | None = None
    deletions: tuple[Deletion, ...] = field(default_factory=tuple)
    largest_change: float | None = None
    largest_change_label: str | None = None
    t_flips: int | None = None
    ar_flips: int | None = None
    first_stage_f_range: tuple[float, float] | None = None
    jackknife_variance: float | None = None
    most_influential: tuple[str, ...] = ()
    method: str | None = None

    @property
    def jackknife_se(self) -> float | None:
        """Square root of the jackknife variance."""
        return None if self.jackknife_variance is None else math.sqrt(self.jackknife_variance)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict, deletions included (for the leave-one-out plot)."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "left_out_unit": self.unit,
            "treatment": self.treatment,
            "null": json_safe(self.null),
            "level": None if self.alpha is None else self.alpha,
            "full_sample": None if self.full is None else self.full.to_dict(),
            "largest_change": json_safe(self.largest_change),
            "largest_change_left_out": self.largest_change_label,
            "t_significance_flips": self.t_flips,
            "ar_significance_flips": self.ar_flips,
            "first_stage_f_range": None
            if self.first_stage_f_range is None
            else json_safe(list(self.first_stage_f_range)),
            "jackknife_variance": json_safe(self.jackknife_variance),
            "jackknife_se": json_safe(self.jackknife_se),
            "most_influential": list(self.most_influential),
            "caution": CAUTION,
            "method": self.method,
            "deletions": [d.to_dict() for d in self.deletions],
        }

    def __str__(self) -> str:
        if not self.applicable:
            return f"Leave-one-out influence: not applicable ({self.reason})"
        assert self.full is not None and self.first_stage_f_range is not None
        lo, hi = self.first_stage_f_range
        pct = f"{100 * (self.alpha or 0.05):g}%"
        return "\n".join(
            [
                f"Leave-one-{self.unit}-out influence for {self.treatment} ({len(self.deletions)} deletions, "
                f"{self.method})",
                f"  full sample: estimate {self.full.estimate:.4g} (se {self.full.std_error:.4g}), "
                f"first-stage F {self.full.first_stage_f:.4g}",
                f"  largest change {self.largest_change:.4g} when {self.largest_change_label!r} is left out",
                f"  deletions flipping {pct} significance of H0 beta = {self.null:g}: t test {self.t_flips}, "
                f"Anderson–Rubin {self.ar_flips}",
                f"  first-stage F ranges from {lo:.4g} to {hi:.4g}; jackknife se {self.jackknife_se:.4g}",
                f"  most influential: {', '.join(self.most_influential)}",
            ]
        )


def _deletions_from(stats_: BatchStats, labels: list[str], alpha: float, n_inst: int) -> list[Deletion]:
    from scipy import stats

    q = stats.t.ppf(1 - alpha / 2, stats_.t_df)
    tp = t_p_values(stats_.t, stats_.t_df)
    arp = f_p_values(stats_.ar_f, n_inst, stats_.ar_df)
    return [
        Deletion(
            label=labels[i],
            estimate=float(stats_.beta[i]),
            std_error=float(stats_.se[i]),
            interval=(
                float(stats_.beta[i] - q[i] * stats_.se[i]),
                float(stats_.beta[i] + q[i] * stats_.se[i]),
            ),
            t_p_value=float(tp[i]),
            ar_p_value=float(arp[i]),
            first_stage_f=float(stats_.fs_f[i]),
        )
        for i in range(len(labels))
    ]


def jackknife_influence(
    fd: FragilityData,
    *,
    null: float = 0.0,
    alpha: float = 0.05,
    top: int = 5,
    max_rows: int = 5000,
    progress: Progress | None = None,
) -> InfluenceResult:
    """Leave each cluster (each row, without clusters) out once and summarise how the result moves.

    ``null`` is the b0 of the t and Anderson–Rubin tests whose significance at ``alpha`` may flip; without
    clusters at most ``max_rows`` rows are deleted one by one (beyond that the result is not applicable).
    """
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie in (0, 1), got {alpha}; use e.g. 0.05.")
    p = fd.prepared
    if p.X.shape[1] != 1:
        return InfluenceResult(
            False,
            f"leave-one-out influence covers one treatment; this model has {p.X.shape[1]} "
            f"({', '.join(p.treatment)})",
        )
    g = fd.n_groups
    unit = "cluster" if fd.clustered else "row"
    if fd.clustered and g < 3:
        return InfluenceResult(
            False, f"{g} clusters: leaving one out leaves too few for a cluster covariance"
        )
    if not fd.clustered and g > max_rows:
        return InfluenceResult(
            False,
            f"{g} rows without clusters: deleting each row is limited to {max_rows}; cluster on a grouping "
            "or raise max_rows",
        )
    n_inst = p.Z.shape[1]
    labels = list(fd.cluster_labels)
    codes = fd.codes()
    ticks = [0]

    def tick(total: int) -> None:
        ticks[0] += 1
        if progress is not None:
            progress(ticks[0], total)

    if fd.base is not None and fd.w_basis is not None:
        cols = np.column_stack([fd.base, fd.w_basis])
        cp, rows = cluster_crossproducts(cols, codes, g)
        kw = fd.w_basis.shape[1]
        p_c = p.n_partialled - p.n_partialled_nested if fd.clustered else p.n_partialled
        kw_args: dict[str, Any] = {
            "n_inst": n_inst,
            "kw": kw,
            "p_c": p_c,
            "clustered": fd.clustered,
            "null": null,
        }
        full = batch_stats(cp, rows, np.ones((1, g)), **kw_args)
        block = max(1, BLOCK_ELEMENTS // (g * max(n_inst, 1)))
        parts = []
        n_blocks = -(-g // block)
        for start in range(0, g, block):
            stop = min(start + block, g)
            mult = np.ones((stop - start, g))
            mult[np.arange(stop - start), np.arange(start, stop)] = 0.0
            parts.append(batch_stats(cp, rows, mult, **kw_args))
            tick(n_blocks)
        dels = BatchStats(
            *(np.concatenate([getattr(b, f) for b in parts]) for f in BatchStats.__dataclass_fields__)
        )
        method = "exact downdating of per-cluster cross-products"
    else:
        full_cols = np.column_stack([p.y, p.X, p.Z])
        full = partialled_stats(
            full_cols, fd.cluster_codes, p.n_partialled, p.n_partialled_nested, n_inst, null
        )
        parts = []
        for k in range(g):
            keep = np.flatnonzero(codes != k)
            sub_codes = None if fd.cluster_codes is None else _recode(codes[keep])
            cols_k, p_k, nested_k = fd.refit_rows(keep, sub_codes)
            parts.append(partialled_stats(cols_k, sub_codes, p_k, nested_k, n_inst, null))
            tick(g)
        dels = BatchStats(
            *(np.concatenate([getattr(b, f) for b in parts]) for f in BatchStats.__dataclass_fields__)
        )
        method = "each deletion partialled again (fixed effects not nested in the clusters)"
    full_del = _deletions_from(full, ["(none)"], alpha, n_inst)[0]
    deletions = _deletions_from(dels, labels, alpha, n_inst)
    est = dels.beta
    change = np.abs(est - full.beta[0])
    order = np.argsort(-change, kind="stable")
    sig_t = full_del.t_p_value < alpha
    sig_ar = full_del.ar_p_value < alpha
    t_flips = sum((d.t_p_value < alpha) != sig_t for d in deletions)
    ar_flips = sum((d.ar_p_value < alpha) != sig_ar for d in deletions)
    jk_var = float((g - 1) / g * np.sum((est - est.mean()) ** 2))
    return InfluenceResult(
        applicable=True,
        reason=None,
        unit=unit,
        treatment=p.treatment[0],
        null=null,
        alpha=alpha,
        full=full_del,
        deletions=tuple(deletions),
        largest_change=float(change[order[0]]),
        largest_change_label=labels[int(order[0])],
        t_flips=int(t_flips),
        ar_flips=int(ar_flips),
        first_stage_f_range=(float(dels.fs_f.min()), float(dels.fs_f.max())),
        jackknife_variance=jk_var,
        most_influential=tuple(labels[int(i)] for i in order[:top]),
        method=method,
    )


def _recode(codes: np.ndarray) -> np.ndarray:
    _, inv = np.unique(codes, return_inverse=True)
    return np.asarray(inv, dtype=np.int64).ravel()
