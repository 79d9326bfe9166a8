"""How strong would an omitted confounder of the instrument have to be? (Cinelli and Hazlett 2025, Biometrika).

Building blocks (Cinelli and Hazlett 2020, JRSS-B) for one least-squares coefficient with t-value ``t`` and
residual degrees of freedom ``dof``: a confounder W that explains a share ``r2_regressor`` of the regressor's
residual variance and ``r2_outcome`` of the outcome's residual variance (both partial R², after the controls and,
for the outcome, the regressor) moves the estimate by exactly

    |bias| = se * sqrt(dof) * sqrt(r2_outcome * r2_regressor / (1 - r2_regressor))

and changes its standard error to se * sqrt((1 - r2_outcome) / (1 - r2_regressor)) * sqrt(dof / (dof - 1)).
With f = |t| / sqrt(dof), f_q = q f and f* = t_{1-alpha/2, dof-1} / sqrt(dof - 1):

* RV_q = (sqrt(f_q^4 + 4 f_q^2) - f_q^2) / 2 (equal strengths that move the estimate by q times itself);
* RV_{q,alpha} = 0 if f_q <= f*, RV_q evaluated at f_q - f* if f_q < 1/f*, else (f_q^2 - f*^2)/(1 + f_q^2);
* XRV_q = f_q^2 / (1 + f_q^2) and XRV_{q,alpha} = max(0, (f_q^2 - f*^2) / (1 + f_q^2)) (the strength with the
  regressor alone when the confounder may explain as much of the outcome as is worst).

For an instrument Z (one instrument, one treatment D) these apply to the reduced form (Y on Z), the first stage
(D on Z) and the Anderson–Rubin regression of Y - tau0 D on Z, whose coefficient is zero exactly when the IV
estimate equals tau0: the robustness value of the IV estimate against tau0 is RV_{1,alpha} of that regression
(the confounder strength that would make the AR interval include tau0), its point form RV_1 the strength that
would move the estimate itself to tau0. Benchmarks bound a confounder k times as strong as an observed control
X_j (with the instrument and with the outcome) that is, like the paper assumes, unrelated to X_j given the other
controls. Everything uses classical (homoskedastic) standard errors; no statistic can establish exclusion or
exogeneity — these numbers say only how strong a violation would have to be.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.data import as_names, prepare
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

__all__ = [
    "CAUTION",
    "BenchmarkBound",
    "ContourGrid",
    "IvBenchmark",
    "IvRobustness",
    "NotApplicable",
    "RobustnessValues",
    "adjusted_se",
    "benchmark_strengths",
    "bias_bound",
    "contour_grid",
    "critical_f",
    "extreme_robustness_value",
    "iv_robustness",
    "partial_f",
    "partial_r2",
    "robustness_value",
    "robustness_values",
]

Array = NDArray[np.float64]

CAUTION = (
    "Robustness values say how strong an omitted confounder of the instrument would have to be to change the "
    "conclusion; they cannot establish exclusion or exogeneity, and conclusions for policy or clinical "
    "decisions need domain review."
)


# ----------------------------------------------------------------------------------------------------------
# building blocks (Cinelli and Hazlett 2020)
# ----------------------------------------------------------------------------------------------------------


def _check_dof(dof: float) -> None:
    if not dof >= 2:
        raise InvalidInputError(f"dof must be at least 2 for a sensitivity analysis, got {dof!r}.")


def partial_r2(t: float, dof: float) -> float:
    """Partial R² of a regressor with the outcome from its t-value: t² / (t² + dof)."""
    _check_dof(dof)
    return float(t * t / (t * t + dof))


def partial_f(t: float, dof: float) -> float:
    """Partial Cohen's f of a regressor with the outcome: |t| / sqrt(dof)."""
    _check_dof(dof)
    return float(abs(t) / math.sqrt(dof))


def critical_f(alpha: float, dof: float) -> float:
    """f* = t_{1-alpha/2, dof-1} / sqrt(dof - 1): the f a coefficient needs to stay significant after adjustment."""
    from scipy import stats

    _check_dof(dof)
    if not 0.0 < alpha < 1.0:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    return float(stats.t.ppf(1.0 - alpha / 2.0, dof - 1) / math.sqrt(dof - 1))


def _rv_from_f(fq: float) -> float:
    return 0.5 * (math.sqrt(fq**4 + 4.0 * fq**2) - fq**2)


def _check_q(q: float) -> None:
    if not q > 0:
        raise InvalidInputError(f"q (the share of the estimate to explain away) must be positive, got {q!r}.")


def robustness_value(t: float, dof: float, *, q: float = 1.0, alpha: float | None = None) -> float:
    """RV_q (alpha None) or RV_{q,alpha}: the equal partial R² with regressor and outcome that changes the result."""
    _check_q(q)
    fq = q * partial_f(t, dof)
    if alpha is None:
        return _rv_from_f(fq)
    fs = critical_f(alpha, dof)
    if fq <= fs:
        return 0.0
    if fq < 1.0 / fs:
        return _rv_from_f(fq - fs)
    return (fq**2 - fs**2) / (1.0 + fq**2)


def extreme_robustness_value(t: float, dof: float, *, q: float = 1.0, alpha: float | None = None) -> float:
    """XRV: the partial R² with the regressor alone that changes the result when the outcome side is worst."""
    _check_q(q)
    fq = q * partial_f(t, dof)
    if alpha is None:
        return fq**2 / (1.0 + fq**2)
    fs = critical_f(alpha, dof)
    return max(0.0, (fq**2 - fs**2) / (1.0 + fq**2))


def _check_r2(value: float, name: str, *, below_one: bool) -> None:
    if not (0.0 <= value <= 1.0) or (below_one and value >= 1.0):
        bound = "[0, 1)" if below_one else "[0, 1]"
        raise InvalidInputError(f"{name} is a partial R² and must lie in {bound}, got {value!r}.")


def bias_bound(se: float, dof: float, r2_outcome: float, r2_regressor: float) -> float:
    """|bias| of the coefficient from a confounder with the given partial R² (exact for least squares)."""
    _check_dof(dof)
    _check_r2(r2_outcome, "r2_outcome", below_one=False)
    _check_r2(r2_regressor, "r2_regressor", below_one=True)
    return float(se * math.sqrt(dof) * math.sqrt(r2_outcome * r2_regressor / (1.0 - r2_regressor)))


def adjusted_se(se: float, dof: float, r2_outcome: float, r2_regressor: float) -> float:
    """Standard error the coefficient would have with the confounder included (exact for least squares)."""
    _check_dof(dof)
    _check_r2(r2_outcome, "r2_outcome", below_one=False)
    _check_r2(r2_regressor, "r2_regressor", below_one=True)
    return float(se * math.sqrt((1.0 - r2_outcome) / (1.0 - r2_regressor)) * math.sqrt(dof / (dof - 1.0)))


def benchmark_strengths(
    r2_regressor_cov: float, r2_outcome_cov: float, *, k_regressor: float = 1.0, k_outcome: float = 1.0
) -> tuple[float, float]:
    """Partial R² bounds (regressor, outcome) for a confounder k times as strong as an observed control X_j.

    ``r2_regressor_cov`` is R²_{regressor~X_j | other controls}; ``r2_outcome_cov`` is R²_{outcome~X_j |
    regressor, other controls}. The confounder is taken to be unrelated to X_j given the other controls.
    """
    _check_r2(r2_regressor_cov, "r2_regressor_cov", below_one=True)
    _check_r2(r2_outcome_cov, "r2_outcome_cov", below_one=True)
    if not (k_regressor >= 0 and k_outcome >= 0):
        raise InvalidInputError("The multipliers k must be non-negative; pass k >= 0.")
    r2d = r2_regressor_cov
    if k_regressor * r2d >= 1.0:
        raise InvalidInputError(
            f"A confounder {k_regressor:g} times as strong as this control would explain all of the "
            "regressor's variance; choose a smaller k."
        )
    r2_reg = k_regressor * r2d / (1.0 - r2d)
    if r2_reg >= 1.0:
        raise InvalidInputError(
            f"A confounder {k_regressor:g} times as strong as this control would explain all of the "
            "regressor's residual variance; choose a smaller k."
        )
    # correlation the confounder acquires with X_j once the regressor (a collider) is conditioned on
    r2_zx = k_regressor * r2d * r2d / ((1.0 - k_regressor * r2d) * (1.0 - r2d))
    if r2_zx >= 1.0:
        raise InvalidInputError(
            f"k = {k_regressor:g} is too large for this control: the implied confounder is collinear with it; "
            "choose a smaller k."
        )
    eta2 = ((math.sqrt(k_outcome) + math.sqrt(r2_zx)) / math.sqrt(1.0 - r2_zx)) ** 2
    r2_out = min(1.0, eta2 * r2_outcome_cov / (1.0 - r2_outcome_cov))
    return float(r2_reg), float(r2_out)


# ----------------------------------------------------------------------------------------------------------
# results
# ----------------------------------------------------------------------------------------------------------


def _as_dict(obj: Any) -> dict[str, Any]:
    return cast(dict[str, Any], json_safe(obj.__dict__))


@dataclass(frozen=True)
class SensitivityNotApplicable(Record):
    """The omitted-variable analysis does not apply to this model; ``reason`` says why."""

    reason: str
    applicable: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {"applicable": False, "reason": self.reason, "kind": "omitted_variable_sensitivity"}

    def __str__(self) -> str:
        return f"Omitted-variable sensitivity: not applicable ({self.reason})."


NotApplicable = (
    SensitivityNotApplicable  # the module's name for it; the record type is SensitivityNotApplicable
)


@dataclass(frozen=True)
class RobustnessValues(Record):
    """Robustness values of one coefficient: ``target`` is the value the change would reach ((1 - q) × estimate,
    or tau0 for the IV estimate); ``rv_alpha``/``xrv_alpha`` are the forms that also account for sampling error."""

    label: str
    estimate: float
    se: float
    t_value: float
    dof: int
    partial_r2: float
    q: float
    alpha: float
    target: float
    rv: float
    rv_alpha: float
    xrv: float
    xrv_alpha: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"{self.label}: estimate {self.estimate:.4g} (se {self.se:.3g}, t {self.t_value:.3g}, dof {self.dof}); "
            f"partial R² with the outcome {self.partial_r2:.3g}; RV {self.rv:.3g}, RV at alpha {self.alpha:g} "
            f"{self.rv_alpha:.3g}, XRV {self.xrv:.3g}, XRV at alpha {self.alpha:g} {self.xrv_alpha:.3g}"
        )


def robustness_values(
    label: str,
    estimate: float,
    se: float,
    dof: int,
    *,
    q: float = 1.0,
    alpha: float = 0.05,
    target: float | None = None,
) -> RobustnessValues:
    """All four robustness values of a coefficient from its estimate, standard error and residual dof."""
    if not se > 0:
        raise EstimationError(f"The standard error of the {label} is {se!r}; no sensitivity can be computed.")
    t = estimate / se
    return RobustnessValues(
        label=label,
        estimate=float(estimate),
        se=float(se),
        t_value=float(t),
        dof=int(dof),
        partial_r2=partial_r2(t, dof),
        q=float(q),
        alpha=float(alpha),
        target=float((1.0 - q) * estimate if target is None else target),
        rv=robustness_value(t, dof, q=q),
        rv_alpha=robustness_value(t, dof, q=q, alpha=alpha),
        xrv=extreme_robustness_value(t, dof, q=q),
        xrv_alpha=extreme_robustness_value(t, dof, q=q, alpha=alpha),
    )


@dataclass(frozen=True)
class BenchmarkBound(Record):
    """A confounder k times as strong as control ``covariate``: its partial R² bounds and the adjusted result.

    ``estimate_range`` is the estimate moved by the bias bound in either direction; ``interval`` the widest
    (1 - alpha) interval over both directions with the adjusted standard error.
    """

    regression: str
    covariate: str
    k: float
    r2_regressor: float
    r2_outcome: float
    bias: float
    adjusted_se: float
    estimate_range: tuple[float, float]
    interval: tuple[float, float]
    excludes_target: bool

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"{self.regression}, confounder {self.k:g}x {self.covariate}: R² with instrument <= "
            f"{self.r2_regressor:.3g}, with outcome <= {self.r2_outcome:.3g}; estimate in "
            f"[{self.estimate_range[0]:.4g}, {self.estimate_range[1]:.4g}], interval "
            f"[{self.interval[0]:.4g}, {self.interval[1]:.4g}]"
        )


@dataclass(frozen=True)
class IvBenchmark(Record):
    """The IV estimate under a confounder k times as strong as ``covariate``: the values tau0 that the
    worst-case adjusted Anderson–Rubin regression can no longer tell apart from the data.

    ``estimate_set`` holds the tau0 whose AR coefficient the bias bound can reach zero (the possible IV
    estimates); ``interval_set`` the tau0 the adjusted (1 - alpha) AR interval does not reject. Both are unions
    of intervals found on the grid and refined by bisection; an end at the grid edge is marked open.
    """

    covariate: str
    k: float
    r2_instrument: float
    estimate_set: tuple[tuple[float, float], ...]
    interval_set: tuple[tuple[float, float], ...]
    grid: tuple[float, float]
    reaches_grid_edge: bool
    excludes_null: bool

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        def fmt(parts: tuple[tuple[float, float], ...]) -> str:
            return " ∪ ".join(f"[{a:.4g}, {b:.4g}]" for a, b in parts) or "empty"

        edge = " (reaches the grid edge)" if self.reaches_grid_edge else ""
        return (
            f"IV estimate, confounder {self.k:g}x {self.covariate}: possible estimates {fmt(self.estimate_set)}; "
            f"interval {fmt(self.interval_set)}{edge}"
        )


@dataclass(frozen=True)
class ContourGrid(Record):
    """Adjusted estimate and t-value of one regression over a grid of confounder strengths (for a contour plot).

    Rows follow ``r2_outcome``, columns ``r2_regressor``; the adjustment moves the estimate towards ``target``.
    ``points`` are benchmark confounders as (label, r2_regressor, r2_outcome).
    """

    label: str
    r2_regressor: tuple[float, ...]
    r2_outcome: tuple[float, ...]
    estimate: tuple[tuple[float, ...], ...]
    t_value: tuple[tuple[float, ...], ...]
    unadjusted_estimate: float
    target: float
    critical_t: float
    points: tuple[tuple[str, float, float], ...]

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"Contour grid for the {self.label}: {len(self.r2_regressor)} x {len(self.r2_outcome)} confounder "
            f"strengths up to {max(self.r2_regressor):.3g} / {max(self.r2_outcome):.3g}, "
            f"{len(self.points)} benchmark point(s)"
        )


@dataclass(frozen=True)
class IvRobustness(Record):
    """Omitted-variable sensitivity of one IV estimate (one instrument, one treatment).

    ``iv`` holds the robustness values of the Anderson–Rubin regression of Y - tau0 D on Z at tau0 = ``null``:
    its coefficient is zero exactly when the IV estimate equals tau0, so ``iv.rv`` moves the IV estimate to
    tau0 and ``iv.rv_alpha`` brings tau0 into the Anderson–Rubin interval (for tau0 = 0 it is the reduced form).
    """

    outcome: str
    treatment: str
    instrument: str
    controls: tuple[str, ...]
    n: int
    dof: int
    iv_estimate: float
    null: float
    alpha: float
    reduced_form: RobustnessValues
    first_stage: RobustnessValues
    iv: RobustnessValues
    benchmarks: tuple[BenchmarkBound, ...]
    iv_benchmarks: tuple[IvBenchmark, ...]
    contour: ContourGrid
    caution: str = CAUTION
    applicable: bool = True

    def to_dict(self) -> dict[str, Any]:
        out = _as_dict(self)
        out["kind"] = "omitted_variable_sensitivity"
        return out

    def __str__(self) -> str:
        lines = [
            f"Omitted-variable sensitivity of the IV estimate of {self.treatment} on {self.outcome} "
            f"(instrument {self.instrument}, n {self.n}, dof {self.dof})",
            f"IV estimate {self.iv_estimate:.4g}; null tau0 = {self.null:g}, alpha {self.alpha:g}",
            f"  {self.reduced_form}",
            f"  {self.first_stage}",
            f"  {self.iv}",
            f"  IV estimate: a confounder explaining {self.iv.rv:.3g} of the residual variance of both the "
            f"instrument and the outcome would move it to {self.null:g}; one explaining {self.iv.rv_alpha:.3g} "
            f"would bring {self.null:g} into the {100 * (1 - self.alpha):g}% Anderson–Rubin interval "
            f"(extreme form {self.iv.xrv_alpha:.3g}).",
        ]
        lines += [f"  {b}" for b in self.benchmarks]
        lines += [f"  {b}" for b in self.iv_benchmarks]
        lines.append(self.caution)
        return "\n".join(lines)


# ----------------------------------------------------------------------------------------------------------
# the IV analysis on data
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Ols:
    coef: float
    se: float
    dof: int


def _ols_on(z: Array, v: Array, dof: int) -> _Ols:
    zz = float(z @ z)
    coef = float(z @ v) / zz
    resid = v - coef * z
    s2 = float(resid @ resid) / dof
    return _Ols(coef, math.sqrt(s2 / zz), dof)


def _sq_partial_corr(a: Array, b: Array, given: Array) -> float:
    """Squared partial correlation of a and b given one (already partialled) column."""
    gg = float(given @ given)
    ea = a - (given @ a) / gg * given
    eb = b - (given @ b) / gg * given
    den = float(ea @ ea) * float(eb @ eb)
    return float((ea @ eb) ** 2 / den) if den > 0 else 0.0


def _bound_for(
    regression: str,
    covariate: str,
    k: float,
    fit: _Ols,
    r2_reg_cov: float,
    r2_out_cov: float,
    target: float,
    alpha: float,
) -> BenchmarkBound:
    from scipy import stats

    r2_reg, r2_out = benchmark_strengths(r2_reg_cov, r2_out_cov, k_regressor=k, k_outcome=k)
    bias = bias_bound(fit.se, fit.dof, r2_out, r2_reg)
    se_adj = adjusted_se(fit.se, fit.dof, r2_out, r2_reg)
    crit = float(stats.t.ppf(1.0 - alpha / 2.0, fit.dof - 1))
    lo, hi = fit.coef - bias, fit.coef + bias
    interval = (lo - crit * se_adj, hi + crit * se_adj)
    return BenchmarkBound(
        regression=regression,
        covariate=covariate,
        k=float(k),
        r2_regressor=r2_reg,
        r2_outcome=r2_out,
        bias=bias,
        adjusted_se=se_adj,
        estimate_range=(lo, hi),
        interval=interval,
        excludes_target=not (interval[0] <= target <= interval[1]),
    )


def _sets_from_grid(grid: Array, inside: Any) -> tuple[tuple[tuple[float, float], ...], bool]:
    """Union of intervals where ``inside(tau)`` holds, from a grid with bisection at each change of state."""
    flags = np.array([bool(inside(t)) for t in grid])
    parts: list[tuple[float, float]] = []
    edge = bool(flags[0] or flags[-1])

    def refine(a: float, b: float, a_in: bool) -> float:
        for _ in range(60):
            m = 0.5 * (a + b)
            if bool(inside(m)) == a_in:
                a = m
            else:
                b = m
        return 0.5 * (a + b)

    start: float | None = float(grid[0]) if flags[0] else None
    for i in range(1, len(grid)):
        if flags[i] != flags[i - 1]:
            x = refine(float(grid[i - 1]), float(grid[i]), bool(flags[i - 1]))
            if flags[i]:
                start = x
            else:
                parts.append((cast(float, start), x))
                start = None
    if start is not None:
        parts.append((start, float(grid[-1])))
    return tuple(parts), edge


def _contour(
    label: str,
    fit: _Ols,
    *,
    target: float,
    alpha: float,
    points: Sequence[tuple[str, float, float]],
    r2_max: float | None,
    n_grid: int,
) -> ContourGrid:
    from scipy import stats

    top = r2_max
    if top is None:
        rv = robustness_value((fit.coef - target) / fit.se, fit.dof)
        top = max([min(0.99, 2.5 * rv), 0.05] + [min(0.99, 1.25 * max(p[1], p[2])) for p in points])
    if not 0.0 < top < 1.0:
        raise InvalidInputError(f"r2_max must lie strictly between 0 and 1, got {top!r}.")
    xs = np.linspace(0.0, top, n_grid)
    ys = np.linspace(0.0, top, n_grid)
    sign = 1.0 if fit.coef >= target else -1.0
    est_rows: list[tuple[float, ...]] = []
    t_rows: list[tuple[float, ...]] = []
    for ry in ys:
        est_row, t_row = [], []
        for rx in xs:
            b = bias_bound(fit.se, fit.dof, float(ry), float(rx))
            s = adjusted_se(fit.se, fit.dof, float(ry), float(rx))
            est = fit.coef - sign * b
            est_row.append(est)
            t_row.append((est - target) / s if s > 0 else math.copysign(math.inf, est - target))
        est_rows.append(tuple(est_row))
        t_rows.append(tuple(t_row))
    return ContourGrid(
        label=label,
        r2_regressor=tuple(map(float, xs)),
        r2_outcome=tuple(map(float, ys)),
        estimate=tuple(est_rows),
        t_value=tuple(t_rows),
        unadjusted_estimate=fit.coef,
        target=float(target),
        critical_t=float(stats.t.ppf(1.0 - alpha / 2.0, fit.dof - 1)),
        points=tuple((str(a), float(b), float(c)) for a, b, c in points),
    )


def contour_grid(
    values: RobustnessValues,
    *,
    points: Sequence[tuple[str, float, float]] = (),
    r2_max: float | None = None,
    n_grid: int = 41,
) -> ContourGrid:
    """Contour-plot data for any coefficient summarised by :func:`robustness_values` (adjusted towards target)."""
    if n_grid < 2:
        raise InvalidInputError(f"n_grid must be at least 2, got {n_grid}.")
    fit = _Ols(values.estimate, values.se, values.dof)
    return _contour(
        values.label,
        fit,
        target=values.target,
        alpha=values.alpha,
        points=points,
        r2_max=r2_max,
        n_grid=n_grid,
    )


def iv_robustness(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instrument: str | Sequence[str],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    weights: str | None = None,
    benchmarks: str | Sequence[str] = (),
    k: float | Sequence[float] = (1.0,),
    null: float = 0.0,
    q: float = 1.0,
    alpha: float = 0.05,
    grid: tuple[float, float] | None = None,
    n_grid: int = 201,
    r2_max: float | None = None,
) -> IvRobustness | NotApplicable:
    """Robustness values of the reduced form, the first stage and the IV estimate, with benchmark bounds.

    ``benchmarks`` name controls to compare the confounder with; ``k`` the multiples of their strength. ``null``
    is tau0 for the IV statement; ``q`` the share of the reduced-form and first-stage estimates to explain away.
    ``grid`` (low, high) is the tau0 range searched for the benchmarked IV sets (default: the IV estimate
    -/+ 20 times the larger of its magnitude and 2SLS standard error).
    """
    from scipy import stats

    if not isinstance(treatment, str):
        raise InvalidInputError(
            "The omitted-variable analysis takes one treatment; pass treatment= as one name."
        )
    inst = as_names(instrument, "instrument")
    if len(inst) != 1:
        return NotApplicable(
            f"the Cinelli–Hazlett robustness values here take exactly one instrument, got {len(inst)}; "
            "analyse each instrument on its own"
        )
    ctrl = as_names(controls, "controls")
    bench = as_names(benchmarks, "benchmarks")
    for name in bench:
        if name not in ctrl:
            raise InvalidInputError(
                f"Benchmark {name!r} is not among the controls; benchmarks must be controls of the model "
                f"(controls: {', '.join(ctrl) or 'none'})."
            )
    ks = tuple(float(v) for v in np.atleast_1d(np.asarray(k, dtype=np.float64)))
    if any(not v > 0 for v in ks):
        raise InvalidInputError(f"k must hold positive multipliers, got {ks!r}.")
    if not 0.0 < alpha < 1.0:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    if n_grid < 3:
        raise InvalidInputError(f"n_grid must be at least 3, got {n_grid}.")
    prep = prepare(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=inst,
        controls=ctrl,
        absorb=absorb,
        weights=weights,
    )
    y, d, z = prep.y, prep.X[:, 0], prep.Z[:, 0]
    dof = prep.n - prep.n_partialled - 1
    if dof < 3:
        raise EstimationError(
            f"Only {dof} residual degrees of freedom are left after the controls; the analysis needs more rows."
        )
    rf = _ols_on(z, y, dof)
    fs = _ols_on(z, d, dof)
    if fs.coef == 0.0:
        raise EstimationError(
            f"The first-stage coefficient of {inst[0]!r} is exactly zero; no IV estimate exists."
        )
    tau = rf.coef / fs.coef
    ar = _ols_on(z, y - null * d, dof)
    rf_values = robustness_values("reduced form", rf.coef, rf.se, dof, q=q, alpha=alpha)
    fs_values = robustness_values("first stage", fs.coef, fs.se, dof, q=q, alpha=alpha)
    iv_values = robustness_values(
        f"Anderson–Rubin regression at tau0 = {null:g}", ar.coef, ar.se, dof, q=1.0, alpha=alpha
    )
    bounds: list[BenchmarkBound] = []
    iv_bounds: list[IvBenchmark] = []
    points: list[tuple[str, float, float]] = []
    if bench:
        se_iv = abs(ar.se / fs.coef)
        half = 20.0 * max(abs(tau), se_iv, 1e-12)
        lo, hi = grid if grid is not None else (tau - half, tau + half)
        if not lo < hi:
            raise InvalidInputError(f"grid must be (low, high) with low < high, got {(lo, hi)!r}.")
        taus = np.linspace(lo, hi, n_grid)
        crit = float(stats.t.ppf(1.0 - alpha / 2.0, dof - 1))
    for name in bench:
        others = tuple(c for c in ctrl if c != name)
        p2 = prepare(
            data,
            outcome=outcome,
            treatment=treatment,
            instruments=(inst[0], name),
            controls=others,
            absorb=absorb,
            weights=weights,
        )
        y2, d2, z2, x2 = p2.y, p2.X[:, 0], p2.Z[:, 0], p2.Z[:, 1]
        r2_zx = float((z2 @ x2) ** 2 / ((z2 @ z2) * (x2 @ x2)))
        r2_yx = _sq_partial_corr(y2, x2, z2)
        r2_dx = _sq_partial_corr(d2, x2, z2)
        for kk in ks:
            rb = _bound_for("reduced form", name, kk, rf, r2_zx, r2_yx, (1 - q) * rf.coef, alpha)
            fb = _bound_for("first stage", name, kk, fs, r2_zx, r2_dx, (1 - q) * fs.coef, alpha)
            bounds += [rb, fb]
            r2_ar = _sq_partial_corr(y2 - null * d2, x2, z2)
            points.append(
                (f"{kk:g}x {name}", *benchmark_strengths(r2_zx, r2_ar, k_regressor=kk, k_outcome=kk))
            )
            iv_bounds.append(
                _iv_benchmark(name, kk, y, d, z, y2, d2, z2, x2, r2_zx, dof, taus, crit, null, (lo, hi))
            )
    contour = _contour(
        f"Anderson–Rubin regression at tau0 = {null:g}",
        ar,
        target=0.0,
        alpha=alpha,
        points=points,
        r2_max=r2_max,
        n_grid=41,
    )
    return IvRobustness(
        outcome=outcome,
        treatment=treatment,
        instrument=inst[0],
        controls=ctrl,
        n=prep.n,
        dof=dof,
        iv_estimate=float(tau),
        null=float(null),
        alpha=float(alpha),
        reduced_form=rf_values,
        first_stage=fs_values,
        iv=iv_values,
        benchmarks=tuple(bounds),
        iv_benchmarks=tuple(iv_bounds),
        contour=contour,
    )


def _iv_benchmark(
    name: str,
    k: float,
    y: Array,
    d: Array,
    z: Array,
    y2: Array,
    d2: Array,
    z2: Array,
    x2: Array,
    r2_zx: float,
    dof: int,
    taus: Array,
    crit: float,
    null: float,
    window: tuple[float, float],
) -> IvBenchmark:
    r2_inst, _ = benchmark_strengths(r2_zx, 0.0, k_regressor=k, k_outcome=k)

    def adjusted(tau0: float) -> tuple[float, float, float]:
        fit = _ols_on(z, y - tau0 * d, dof)
        _, r2_out = benchmark_strengths(
            r2_zx, min(_sq_partial_corr(y2 - tau0 * d2, x2, z2), 1 - 1e-15), k_regressor=k, k_outcome=k
        )
        return fit.coef, bias_bound(fit.se, dof, r2_out, r2_inst), adjusted_se(fit.se, dof, r2_out, r2_inst)

    def possible(tau0: float) -> bool:
        coef, bias, _ = adjusted(tau0)
        return abs(coef) <= bias

    def not_rejected(tau0: float) -> bool:
        coef, bias, se = adjusted(tau0)
        return abs(coef) <= bias + crit * se

    est_set, edge1 = _sets_from_grid(taus, possible)
    int_set, edge2 = _sets_from_grid(taus, not_rejected)
    return IvBenchmark(
        covariate=name,
        k=float(k),
        r2_instrument=float(r2_inst),
        estimate_set=est_set,
        interval_set=int_set,
        grid=(float(window[0]), float(window[1])),
        reaches_grid_edge=edge1 or edge2,
        excludes_null=not not_rejected(null),
    )
