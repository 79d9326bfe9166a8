"""Small summaries of a fitted model that documents plot: first-stage bins and the Anderson–Rubin curve.

Both are computed from the partialled arrays, so they show exactly what the estimator used (controls and
absorbed fixed effects removed, weights applied). The first-stage plot puts the instrument itself (controls
partialled out) on the x axis and carries the first-stage slope estimated on every row, never a line through
fitted values. The Anderson–Rubin curve's range is widened until it holds the whole set when the set is
bounded.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ivdossier.estimation.covariance import CovSpec, cov_name
from ivdossier.estimation.data import PreparedData
from ivdossier.estimation.distributions import f_ppf
from ivdossier.estimation.result import EstimationResult
from ivdossier.estimation.robust_inference import ar_statistics
from ivdossier.estimation.roots import brentq
from ivdossier.estimation.strength import ols
from ivdossier.jsonsafe import json_safe

__all__ = [
    "ArCurveData",
    "FirstStagePlot",
    "ar_curve",
    "ar_curve_data",
    "first_stage_bins",
    "first_stage_plot",
]


@dataclass(frozen=True)
class FirstStagePlot:
    """Binned means of the treatment against the instrument (both with the controls partialled out).

    With one instrument ``slope`` is the first-stage coefficient from all ``n`` rows and ``intercept`` the
    matching intercept of the partialled variables; with several there is no single instrument to put on the
    x axis, so x is the first-stage prediction from all of them (``x_kind`` = "prediction") and no slope is
    stated (against its own prediction the treatment has slope one by construction, which says nothing).
    """

    x_bins: tuple[float, ...]
    y_bins: tuple[float, ...]
    x_label: str
    y_label: str
    n: int
    n_bins: int
    x_kind: str  # "instrument" or "prediction"
    slope: float | None
    slope_se: float | None
    intercept: float | None
    note: str

    def to_dict(self) -> dict[str, Any]:
        return json_safe({k: (list(v) if isinstance(v, tuple) else v) for k, v in self.__dict__.items()})

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> FirstStagePlot:
        """Rebuild from :meth:`to_dict`; an older stored summary (bins and labels only) gets n = 0, no slope."""

        def num(key: str) -> float | None:
            value = data.get(key)
            return None if value is None else float(value)

        return cls(
            x_bins=tuple(float(v) for v in data["x_bins"]),
            y_bins=tuple(float(v) for v in data["y_bins"]),
            x_label=str(data.get("x_label", "instrument")),
            y_label=str(data.get("y_label", "treatment")),
            n=int(data.get("n", 0)),
            n_bins=int(data.get("n_bins", len(data["x_bins"]))),
            x_kind=str(data.get("x_kind", "unknown")),
            slope=num("slope"),
            slope_se=num("slope_se"),
            intercept=num("intercept"),
            note=str(data.get("note", "")),
        )


def first_stage_plot(prepared: PreparedData, *, bins: int = 20) -> FirstStagePlot | None:
    """Means of the treatment within quantile bins of the instrument, and the first-stage slope (one treatment)."""
    if prepared.X.shape[1] != 1 or prepared.Z.shape[1] == 0:
        return None
    x_treat = prepared.X[:, 0]
    n = int(x_treat.size)
    if prepared.Z.shape[1] == 1:
        axis = prepared.Z[:, 0]
        design = np.column_stack([np.ones(n), axis])
        coef, *_ = np.linalg.lstsq(design, x_treat, rcond=None)
        resid = x_treat - design @ coef
        sxx = float(np.sum((axis - axis.mean()) ** 2))
        slope_se = (
            math.sqrt(float(resid @ resid) / max(n - 2 - prepared.n_partialled, 1) / sxx) if sxx > 0 else None
        )
        intercept, slope = float(coef[0]), float(coef[1])
        x_label = f"{prepared.instruments[0]} (controls partialled out)"
        kind = "instrument"
        note = (
            f"points: mean of {prepared.treatment[0]} within bins of equal count of the instrument; line: the "
            f"first-stage slope from all {n:,} rows (homoskedastic SE, for reading only)"
        )
    else:
        coef, _ = ols(prepared.Z, prepared.X)
        axis = (prepared.Z @ coef)[:, 0]
        intercept, slope, slope_se = None, None, None
        x_label = f"first-stage prediction from {prepared.Z.shape[1]} instruments (controls partialled out)"
        kind = "prediction"
        note = (
            f"points: mean of {prepared.treatment[0]} within bins of equal count of the first-stage prediction "
            f"from {', '.join(prepared.instruments)}; no slope is drawn, because against its own prediction the "
            "treatment has slope one by construction"
        )
    order = np.argsort(axis, kind="stable")
    groups = [g for g in np.array_split(order, min(bins, max(2, n // 10))) if g.size]
    return FirstStagePlot(
        x_bins=tuple(float(axis[g].mean()) for g in groups),
        y_bins=tuple(float(x_treat[g].mean()) for g in groups),
        x_label=x_label,
        y_label=f"{prepared.treatment[0]} (controls partialled out)",
        n=n,
        n_bins=len(groups),
        x_kind=kind,
        slope=slope,
        slope_se=slope_se,
        intercept=intercept,
        note=note,
    )


def first_stage_bins(prepared: PreparedData, *, bins: int = 20) -> dict[str, Any] | None:
    """:func:`first_stage_plot` as the plain dictionary a run stores (``x_bins``, ``y_bins``, labels, n, slope)."""
    plot = first_stage_plot(prepared, bins=bins)
    return None if plot is None else plot.to_dict()


@dataclass(frozen=True)
class ArCurveData:
    """The AR statistic (F form) over a grid of hypothesised effects, with the extent of the confidence set.

    ``set_lower``/``set_upper`` are the outermost finite ends of the set when it is bounded (the grid then
    contains them with a margin); ``bounded`` is False when the set runs to infinity on a side.
    """

    betas: tuple[float, ...]
    stats: tuple[float, ...]
    critical_value: float
    form: str
    bounded: bool
    set_lower: float | None
    set_upper: float | None

    def to_dict(self) -> dict[str, Any]:
        return json_safe({k: (list(v) if isinstance(v, tuple) else v) for k, v in self.__dict__.items()})


def ar_curve_data(
    prepared: PreparedData, result: EstimationResult, *, points: int = 161, width: float = 8.0
) -> ArCurveData | None:
    """The AR curve within ``width`` SEs of the estimate, widened to hold the whole set when it is bounded."""
    if prepared.X.shape[1] != 1 or prepared.Z.shape[1] == 0:
        return None
    spec = CovSpec(
        result.vcov,  # type: ignore[arg-type]
        prepared.clusters if cov_name(result.vcov) == "clustered" else (),
        bool(result.spec.get("small_sample", True)),
    )

    def ar(betas: np.ndarray) -> tuple[np.ndarray, int]:
        return ar_statistics(
            prepared.y,
            prepared.X,
            prepared.Z,
            spec=spec,
            n_partialled=prepared.n_partialled,
            n_partialled_nested=prepared.n_partialled_nested,
            betas=betas,
        )

    centre, se = float(result.coef[0]), float(result.se[0])
    half = width * se if np.isfinite(se) and se > 0 else max(1.0, abs(centre))
    grid = np.linspace(centre - half, centre + half, points)
    values, d = ar(grid)
    crit = f_ppf(1 - result.alpha, prepared.Z.shape[1], d)
    steps = half * 2.0 ** np.arange(1, 41)
    probes = np.concatenate([centre - steps[::-1], grid, centre + steps])
    probe_values = np.concatenate([ar(probes[:40])[0], values, ar(probes[-40:])[0]])
    inside = probe_values <= crit
    bounded = not (inside[0] or inside[-1])
    lower = upper = None
    if bounded and inside.any():
        first, last = int(np.argmax(inside)), int(len(inside) - 1 - np.argmax(inside[::-1]))

        def gap(b: float) -> float:
            return float(ar(np.array([b]))[0][0] - crit)

        lower = brentq(gap, probes[first - 1], probes[first], xtol=1e-12 * max(1.0, half))
        upper = brentq(gap, probes[last], probes[last + 1], xtol=1e-12 * max(1.0, half))
        lo, hi = min(lower, grid[0]), max(upper, grid[-1])
        if lo < grid[0] or hi > grid[-1]:
            margin = 0.08 * (hi - lo)
            grid = np.linspace(lo - margin, hi + margin, points)
            values, _ = ar(grid)
    return ArCurveData(
        betas=tuple(map(float, grid)),
        stats=tuple(map(float, values)),
        critical_value=crit,
        form="F",
        bounded=bounded,
        set_lower=lower,
        set_upper=upper,
    )


def ar_curve(
    prepared: PreparedData, result: EstimationResult, *, points: int = 161, width: float = 8.0
) -> dict[str, Any] | None:
    """:func:`ar_curve_data` as the plain dictionary a run stores (``betas``, ``stats``, ``critical_value``...)."""
    data = ar_curve_data(prepared, result, points=points, width=width)
    return None if data is None else data.to_dict()
