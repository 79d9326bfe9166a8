"""Small summaries of a fitted model that documents plot: first-stage bins and the Anderson–Rubin curve.

Both are computed from the partialled arrays, so they show exactly what the estimator used (controls and
absorbed fixed effects removed, weights applied).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.data import PreparedData
from ivdossier.estimation.result import EstimationResult
from ivdossier.estimation.robust_inference import ar_statistics
from ivdossier.estimation.strength import ols


def first_stage_bins(prepared: PreparedData, *, bins: int = 20) -> dict[str, Any] | None:
    """Means of the treatment within quantile bins of the first-stage index (one endogenous regressor)."""
    if prepared.X.shape[1] != 1 or prepared.Z.shape[1] == 0:
        return None
    coef, _ = ols(prepared.Z, prepared.X)
    index = (prepared.Z @ coef)[:, 0]
    order = np.argsort(index, kind="stable")
    groups = np.array_split(order, min(bins, max(2, index.size // 10)))
    x_bins = [float(index[g].mean()) for g in groups if g.size]
    y_bins = [float(prepared.X[g, 0].mean()) for g in groups if g.size]
    label = prepared.instruments[0] if len(prepared.instruments) == 1 else "first-stage index"
    return {
        "x_bins": x_bins,
        "y_bins": y_bins,
        "x_label": f"{label} (controls partialled out)",
        "y_label": f"{prepared.treatment[0]} (controls partialled out)",
    }


def ar_curve(
    prepared: PreparedData, result: EstimationResult, *, points: int = 161, width: float = 8.0
) -> dict[str, Any] | None:
    """The Anderson–Rubin statistic (F form) over effects within `width` standard errors of the estimate."""
    if prepared.X.shape[1] != 1 or prepared.Z.shape[1] == 0:
        return None
    spec = CovSpec(
        result.vcov,  # type: ignore[arg-type]
        prepared.clusters if result.vcov == "cluster" else (),
        bool(result.spec.get("small_sample", True)),
    )
    centre, se = float(result.coef[0]), float(result.se[0])
    half = width * se if np.isfinite(se) and se > 0 else max(1.0, abs(centre))
    betas = np.linspace(centre - half, centre + half, points)
    values, d = ar_statistics(
        prepared.y,
        prepared.X,
        prepared.Z,
        spec=spec,
        n_partialled=prepared.n_partialled,
        n_partialled_nested=prepared.n_partialled_nested,
        betas=betas,
    )
    crit = float(stats.f.ppf(1 - result.alpha, prepared.Z.shape[1], d))
    return {"betas": betas.tolist(), "stats": values.tolist(), "critical_value": crit, "form": "F"}
