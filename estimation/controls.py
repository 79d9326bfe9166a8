"""Coefficients of the intercept and the controls, and R^2, reported on request (``report_controls=True``).

The main path partials the controls out (Frisch–Waugh–Lovell) and never forms their coefficients. Here the
full structural equation is refitted once: y on [1, controls, treatments] (OLS) or on
[1, controls, fitted treatments] with fitted values from [1, controls, instruments] (2SLS), with the controls
and treatments centred first (their weighted means), which removes most of the ill-conditioning an intercept
brings, and the intercept mapped back to the uncentred parametrisation by an exact linear transform of the
coefficients and their covariance. With absorbed fixed effects the columns are demeaned within the effects and
no intercept is reported. Standard errors follow the model's covariance choice and small-sample convention.
LIML and Fuller control coefficients are given without standard errors (they need the k-class bread of the
whole equation, not computed here).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError
from ivdossier.estimation.absorb import partial_out
from ivdossier.estimation.covariance import CovSpec, sandwich
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]
INTERCEPT = "(intercept)"


@dataclass(frozen=True, eq=False)
class ControlsTable(Record):
    """Intercept and control coefficients with standard errors, the R^2 and the residual standard deviation."""

    names: tuple[str, ...]
    coef: Array
    se: Array
    r_squared: float
    r_squared_kind: str
    sigma: float
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict keyed by regressor name."""
        return {
            "coef": {n: json_safe(float(b)) for n, b in zip(self.names, self.coef, strict=True)},
            "se": {n: json_safe(float(s)) for n, s in zip(self.names, self.se, strict=True)},
            "r_squared": json_safe(self.r_squared),
            "r_squared_kind": self.r_squared_kind,
            "residual_sd": json_safe(self.sigma),
            "note": self.note,
        }

    def __str__(self) -> str:
        width = max(len("regressor"), *(len(n) for n in self.names)) if self.names else 9
        lines = [f"{'regressor':<{width}}  {'estimate':>14}  {'std. error':>14}"]
        for n, b, s in zip(self.names, self.coef, self.se, strict=True):
            lines.append(f"{n:<{width}}  {b:>14.8g}  {s:>14.8g}")
        lines.append(f"R^2 ({self.r_squared_kind}) {self.r_squared:.10g}; residual SD {self.sigma:.10g}")
        if self.note:
            lines.append(self.note)
        return "\n".join(lines)


def _lstsq(a: Array, b: Array) -> tuple[Array, Array]:
    import scipy.linalg

    q, r = np.linalg.qr(a)
    diag = np.abs(np.diag(r))
    if np.any(diag <= 1e-12 * np.linalg.norm(a, axis=0)):
        raise EstimationError(
            "The full design with the intercept and controls is collinear; drop the redundant control."
        )
    coef = scipy.linalg.solve_triangular(r, q.T @ b, check_finite=False)
    rinv = scipy.linalg.solve_triangular(r, np.eye(r.shape[0]), check_finite=False)
    return np.asarray(coef, dtype=np.float64), np.asarray(rinv @ rinv.T, dtype=np.float64)


def controls_fit(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray | None,
    controls: np.ndarray,
    *,
    treatment_names: Sequence[str],
    control_names: Sequence[str],
    method: str,
    beta: np.ndarray,
    spec: CovSpec,
    fe_codes: Sequence[np.ndarray] = (),
    weights: np.ndarray | None = None,
    n_absorbed: int = 0,
    n_absorbed_nested: int = 0,
) -> ControlsTable:
    """Refit the full equation to report the intercept and control coefficients (see the module docstring)."""
    n = y.shape[0]
    p = x.shape[1]
    c = controls.shape[1] if controls.size else 0
    k = 0 if z is None else z.shape[1]
    parts = [y[:, None], x] + ([z] if z is not None else []) + ([controls] if c else [])
    raw = np.column_stack(parts).astype(np.float64)
    w = None if weights is None else np.asarray(weights, dtype=np.float64)
    intercept = not fe_codes
    if intercept:
        wsum = float(n) if w is None else float(w.sum())
        means = (raw.sum(axis=0) if w is None else w @ raw) / wsum
        cols = raw - means
        if w is not None:
            cols *= np.sqrt(w)[:, None]
    else:
        means = np.zeros(raw.shape[1])
        cols = partial_out(raw, fe_codes=fe_codes, weights=w).columns
    sw = np.ones(n) if w is None else np.sqrt(w)
    yc = cols[:, 0]
    xc = cols[:, 1 : 1 + p]
    zc = cols[:, 1 + p : 1 + p + k]
    cc = cols[:, 1 + p + k :]
    lead = [sw[:, None]] if intercept else []
    design = np.column_stack([*lead, cc, xc]) if (lead or c) else xc
    if method == "ols" or z is None:
        regs = design
    else:
        inst = np.column_stack([*lead, cc, zc])
        coef_x, _ = _lstsq(inst, xc)
        regs = np.column_stack([*lead, cc, inst @ coef_x])
    b, bread = _lstsq(regs, yc)
    if method in ("liml", "fuller"):
        # k-class: controls from the normal equations given beta (exact for every kappa)
        base = np.column_stack([*lead, cc]) if (lead or c) else np.zeros((n, 0))
        gamma, _ = (
            _lstsq(base, yc - xc @ np.asarray(beta, dtype=np.float64)) if base.shape[1] else (b[:0], None)
        )
        b = np.concatenate([gamma, np.asarray(beta, dtype=np.float64)])
    resid = yc - design @ b
    n_fe = 0 if intercept else n_absorbed
    cov = sandwich(regs, resid, spec, n_partialled=n_fe, bread=bread, n_partialled_nested=n_absorbed_nested)
    names = ([INTERCEPT] if intercept else []) + list(control_names) + list(treatment_names)
    # map the centred parametrisation back: intercept = a - sum_j mean_j b_j over controls and treatments
    t = np.eye(len(b))
    if intercept:
        col_means = np.concatenate([means[1 + p + k :], means[1 : 1 + p]])
        t[0, 1:] = -col_means
    b_out = t @ b
    if intercept:
        b_out[0] += means[0]  # the outcome was centred at its weighted mean
    cov_out = t @ cov @ t.T
    se = np.sqrt(np.clip(np.diag(cov_out), 0.0, None))
    note = None
    if method in ("liml", "fuller"):
        se = np.full_like(se, np.nan)
        note = "standard errors of the control coefficients are given for OLS and 2SLS only"
    tss = float(yc @ yc)
    ssr = float(resid @ resid)
    df = n - len(b) - n_fe
    kind = "centred" if intercept else "within (after absorbing the fixed effects)"
    return ControlsTable(
        names=tuple(names),
        coef=b_out,
        se=se,
        r_squared=1.0 - ssr / tss if tss > 0 else float("nan"),
        r_squared_kind=kind,
        sigma=math.sqrt(ssr / df) if df > 0 else float("nan"),
        note=note,
    )
