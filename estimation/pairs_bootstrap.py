"""Cluster pairs bootstrap of the 2SLS estimate and the first-stage F (rows resampled without clusters).

Each draw takes G clusters with replacement (each copy counts as its own cluster) and refits the model; with
per-cluster cross-products (cluster_crossproducts.py) a draw only reweights the clusters, so no rows are
touched again. When absorbed fixed effects are not nested in the clusters every draw is partialled again.

Reported beside the analytic results, as Lal, Lockhart, Xu and Zu (2024, Political Analysis) recommend:

* the percentile interval of the bootstrap 2SLS estimates and their standard deviation;
* the bootstrapped first-stage F: the Wald F of the first-stage coefficients with their bootstrap covariance,
  pi' V*^-1 pi / L (V* the sample covariance of the draws' coefficients), and the percentiles of the draws'
  own cluster-robust first-stage F.

Draws whose resample is degenerate (for instance an instrument without variation) are dropped and counted.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.cluster_crossproducts import (
    BatchStats,
    batch_stats,
    cluster_crossproducts,
    partialled_stats,
)
from ivdossier.estimation.fragility_data import CAUTION, FragilityData
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]
Progress = Callable[[int, int], None]
BLOCK_ELEMENTS = 1 << 20


@dataclass(frozen=True, eq=False)
class PairsBootstrapResult(Record):
    """Pairs (cluster) bootstrap of the 2SLS estimate and the first-stage F, or a not-applicable reason."""

    applicable: bool
    reason: str | None
    treatment: str | None = None
    draws: int | None = None
    draws_used: int | None = None
    resampled: str | None = None
    seed: int | None = None
    alpha: float | None = None
    estimate: float | None = None
    percentile_interval: tuple[float, float] | None = None
    bootstrap_se: float | None = None
    first_stage_f: float | None = None
    bootstrapped_f: float | None = None
    f_percentiles: tuple[float, float, float] | None = None
    method: str | None = None
    estimates: Array | None = None  # the draws' 2SLS estimates (for a histogram), not in to_dict

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict (without the individual draws)."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "method": "pairs bootstrap",
            "treatment": self.treatment,
            "draws": self.draws,
            "draws_used": self.draws_used,
            "resampled": self.resampled,
            "seed": self.seed,
            "confidence_level": None if self.alpha is None else 1 - self.alpha,
            "estimate": json_safe(self.estimate),
            "percentile_interval": None
            if self.percentile_interval is None
            else json_safe(list(self.percentile_interval)),
            "bootstrap_se": json_safe(self.bootstrap_se),
            "first_stage_f": json_safe(self.first_stage_f),
            "bootstrapped_f": json_safe(self.bootstrapped_f),
            "bootstrapped_f_formula": "pi' V*^-1 pi / L with V* the bootstrap covariance of the first-stage "
            "coefficients",
            "draw_f_percentiles_5_50_95": None
            if self.f_percentiles is None
            else json_safe(list(self.f_percentiles)),
            "caution": CAUTION,
            "computation": self.method,
            "source": "Lal, Lockhart, Xu and Zu (2024), How Much Should We Trust Instrumental Variable "
            "Estimates in Political Science?, Political Analysis",
        }

    def __str__(self) -> str:
        if not self.applicable:
            return f"Pairs bootstrap: not applicable ({self.reason})"
        assert self.percentile_interval is not None and self.f_percentiles is not None
        lo, hi = self.percentile_interval
        f5, f50, f95 = self.f_percentiles
        level = 100 * (1 - (self.alpha or 0.05))
        return "\n".join(
            [
                f"Pairs bootstrap for {self.treatment}: {self.draws_used} of {self.draws} draws used, "
                f"{self.resampled} resampled, seed {self.seed}",
                f"  2SLS estimate {self.estimate:.4g}; {level:g}% percentile interval [{lo:.4g}, {hi:.4g}]; "
                f"bootstrap se {self.bootstrap_se:.4g}",
                f"  first-stage F {self.first_stage_f:.4g}; bootstrapped F {self.bootstrapped_f:.4g}; "
                f"draws' F 5/50/95%: {f5:.4g} / {f50:.4g} / {f95:.4g}",
            ]
        )


def _counts(rng: np.random.Generator, n_draws: int, g: int) -> Array:
    picks = rng.integers(0, g, size=(n_draws, g))
    flat = (picks + g * np.arange(n_draws)[:, None]).ravel()
    return np.asarray(np.bincount(flat, minlength=n_draws * g).reshape(n_draws, g), dtype=np.float64)


def pairs_bootstrap(
    fd: FragilityData,
    *,
    draws: int = 999,
    seed: int | np.random.Generator | None = None,
    alpha: float = 0.05,
    progress: Progress | None = None,
) -> PairsBootstrapResult:
    """Resample whole clusters (rows without clusters) ``draws`` times; percentile interval and bootstrapped F."""
    if draws < 2:
        raise InvalidInputError(f"draws must be at least 2 for a pairs bootstrap, got {draws}.")
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie in (0, 1), got {alpha}; use e.g. 0.05.")
    p = fd.prepared
    if p.X.shape[1] != 1:
        return PairsBootstrapResult(
            False,
            f"the pairs bootstrap here covers one treatment; this model has {p.X.shape[1]} ({', '.join(p.treatment)})",
        )
    g = fd.n_groups
    if fd.clustered and g < 3:
        return PairsBootstrapResult(False, f"{g} clusters are too few to resample")
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    n_inst = p.Z.shape[1]
    codes = fd.codes()
    full_cols = np.column_stack([p.y, p.X, p.Z])
    full = partialled_stats(full_cols, fd.cluster_codes, p.n_partialled, p.n_partialled_nested, n_inst, 0.0)
    parts: list[BatchStats] = []
    if fd.base is not None and fd.w_basis is not None:
        cp, rows = cluster_crossproducts(np.column_stack([fd.base, fd.w_basis]), codes, g)
        p_c = p.n_partialled - p.n_partialled_nested if fd.clustered else p.n_partialled
        block = max(1, BLOCK_ELEMENTS // (g * max(n_inst, 1)))
        n_blocks = -(-draws // block)
        for i, start in enumerate(range(0, draws, block)):
            mult = _counts(rng, min(block, draws - start), g)
            with np.errstate(all="ignore"):
                try:
                    parts.append(
                        batch_stats(
                            cp,
                            rows,
                            mult,
                            n_inst=n_inst,
                            kw=fd.w_basis.shape[1],
                            p_c=p_c,
                            clustered=fd.clustered,
                            null=0.0,
                        )
                    )
                except np.linalg.LinAlgError:
                    parts.extend(_one_by_one(cp, rows, mult, n_inst, fd.w_basis.shape[1], p_c, fd.clustered))
            if progress is not None:
                progress(i + 1, n_blocks)
        method = "reweighted per-cluster cross-products"
    else:
        members = [np.flatnonzero(codes == k) for k in range(g)]
        for b in range(draws):
            picks = rng.integers(0, g, size=g)
            rows_b = np.concatenate([members[k] for k in picks])
            new_codes = np.concatenate(
                [np.full(members[k].size, j, dtype=np.int64) for j, k in enumerate(picks)]
            )
            try:
                cols_b, p_b, nested_b = fd.refit_rows(rows_b, new_codes if fd.clustered else None)
                with np.errstate(all="ignore"):
                    parts.append(
                        partialled_stats(
                            cols_b, new_codes if fd.clustered else None, p_b, nested_b, n_inst, 0.0
                        )
                    )
            except (np.linalg.LinAlgError, ValueError):
                pass
            if progress is not None:
                progress(b + 1, draws)
        method = "each draw partialled again (fixed effects not nested in the clusters)"
    beta = np.concatenate([s.beta for s in parts]) if parts else np.empty(0)
    pis = np.concatenate([s.pi for s in parts]) if parts else np.empty((0, n_inst))
    fs = np.concatenate([s.fs_f for s in parts]) if parts else np.empty(0)
    ok = np.isfinite(beta) & np.isfinite(fs) & np.all(np.isfinite(pis), axis=1)
    beta, pis, fs = beta[ok], pis[ok], fs[ok]
    if beta.size < 2:
        return PairsBootstrapResult(False, "fewer than two resamples could be fitted")
    v_star = np.atleast_2d(np.cov(pis, rowvar=False))
    pi_hat = full.pi[0]
    try:
        f_boot = float(pi_hat @ np.linalg.solve(v_star, pi_hat)) / n_inst
    except np.linalg.LinAlgError:
        f_boot = math.nan
    lo, hi = np.quantile(beta, [alpha / 2, 1 - alpha / 2])
    f5, f50, f95 = np.quantile(fs, [0.05, 0.5, 0.95])
    return PairsBootstrapResult(
        applicable=True,
        reason=None,
        treatment=p.treatment[0],
        draws=draws,
        draws_used=int(beta.size),
        resampled="clusters" if fd.clustered else "rows",
        seed=seed if isinstance(seed, int) else None,
        alpha=alpha,
        estimate=float(full.beta[0]),
        percentile_interval=(float(lo), float(hi)),
        bootstrap_se=float(np.std(beta, ddof=1)),
        first_stage_f=float(full.fs_f[0]),
        bootstrapped_f=f_boot,
        f_percentiles=(float(f5), float(f50), float(f95)),
        method=method,
        estimates=beta,
    )


def _one_by_one(
    cp: Array, rows: Array, mult: Array, n_inst: int, kw: int, p_c: int, clustered: bool
) -> list[BatchStats]:
    """Fit a block draw by draw so that one singular resample does not lose the others."""
    out = []
    for b in range(mult.shape[0]):
        try:
            out.append(
                batch_stats(
                    cp, rows, mult[b : b + 1], n_inst=n_inst, kw=kw, p_c=p_c, clustered=clustered, null=0.0
                )
            )
        except np.linalg.LinAlgError:
            continue
    return out
