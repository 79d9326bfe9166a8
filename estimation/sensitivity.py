"""Plausibly exogenous instruments (Conley, Hansen and Rossi 2012): how far can exclusion fail?

Model: Y = X beta + Z gamma + controls + u, where gamma is the direct effect of the instruments on the outcome
(gamma = 0 is exact exclusion). All numbers come from the partialled arrays of
:func:`ivdossier.estimation.data.prepare` (controls and fixed effects removed, sqrt(w)-scaled), so controls,
absorbed fixed effects, weights and every covariance choice of :func:`ivdossier.estimation.estimate` carry over.

Closed forms used instead of refitting (one treatment X, L instruments Z):

* the 2SLS of Y - Z gamma on X gives beta(gamma) = beta_hat - A gamma with A = (X'P_Z X)^{-1} X'Z
  (partialled cross-products; by Frisch–Waugh–Lovell the same row as the raw formula with the full
  instrument matrix), and residuals u(gamma) = u_hat - M gamma with M = Z - X A;
* its variance is a quadratic form Var(gamma) = c' H c with c = (1, -gamma): H is the joint covariance of the
  m = L + 1 "equations" with residual columns (u_hat, M) sharing the 2SLS score regressors, computed once by
  :func:`ivdossier.estimation.covariance.sandwich`. This reproduces, for every gamma, the interval a refit
  would give, with the same small-sample factor and quantile as :func:`ivdossier.estimation.estimate`.

Union of confidence intervals (UCI): the union over gamma in the box [gamma_min, gamma_max] of the (1 - alpha)
intervals beta(gamma) -/+ q sqrt(Var(gamma)). When H is positive semi-definite (unadjusted, robust, one-way
cluster), sqrt(Var) is a norm of an affine map of gamma, so the lower end is concave and the upper end convex
in gamma: the extremes of the union sit at vertices of the box, and the UCI is exact from them. For two-way
clustering H can be indefinite, so the extremes are taken over the vertices and the evaluation grid (stated
in the result). Local to zero (LTZ): gamma ~ N(mu, Omega) gives beta_hat approx N(beta + A mu, V + A Omega A'),
so the interval is beta_hat - A mu -/+ q sqrt(V + A Omega A'). These are statements about what would follow if
the direct effect lay in the stated range; no statistic establishes exclusion.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.api import SampleCounts, result_from_cross_products, sufficient_statistics
from ivdossier.estimation.covariance import cov_name, is_psd
from ivdossier.estimation.crossproducts import CrossProducts
from ivdossier.estimation.data import PreparedData, as_names, prepare
from ivdossier.estimation.rows import RowAccount, count_rows
from ivdossier.estimation.spec import ModelSpec
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

__all__ = [
    "BreakdownResult",
    "GammaInterval",
    "LocalToZeroResult",
    "UnionIntervalResult",
    "breakdown_value",
    "breakdown_value_from",
    "local_to_zero",
    "local_to_zero_from",
    "sensitivity_core",
    "union_of_intervals",
    "union_of_intervals_from",
]

Array = NDArray[np.float64]


# ----------------------------------------------------------------------------------------------------------
# shared core: everything is a closed-form function of gamma once A and H are known
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Core:
    treatment: str
    instruments: tuple[str, ...]
    beta_hat: float
    se_hat: float
    ci_hat: tuple[float, float]
    shift: Array  # A, shape (L,)
    quad: Array  # H, shape (L + 1, L + 1)
    quantile: float
    ci_reference: str
    reduced_form: Array  # OLS coefficients of y on Z (partialled), shape (L,)
    n: int
    vcov: str
    alpha: float
    exact_from_vertices: bool
    y_coords: Array  # the partialled outcome and instruments as coordinates in the orthonormal basis, in
    z_coords: Array  # data units (m and m x L): auxiliary regressions without a pass over the rows

    def estimate(self, gamma: Array) -> float:
        return float(self.beta_hat - self.shift @ gamma)

    def variance(self, gamma: Array) -> float:
        c = np.concatenate([[1.0], -gamma])
        return float(max(c @ self.quad @ c, 0.0))

    def interval(self, gamma: Array) -> tuple[float, float, float]:
        est = self.estimate(gamma)
        half = self.quantile * math.sqrt(self.variance(gamma))
        return est, est - half, est + half


def _spec_options(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instruments: str | Sequence[str],
    controls: str | Sequence[str],
    absorb: str | Sequence[str],
    cluster: str | Sequence[str] | None,
    weights: str | None,
    vcov: str,
) -> PreparedData:
    if not isinstance(treatment, str):
        raise InvalidInputError(
            "The plausibly-exogenous analysis takes one treatment column; pass treatment= as a single name."
        )
    cov_name(vcov)  # refuses an unknown covariance before the data are read
    inst = as_names(instruments, "instruments")
    if not inst:
        raise InvalidInputError(
            "The plausibly-exogenous analysis needs instruments=; name at least one column."
        )
    return prepare(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=inst,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
    )


def _core(prepared: PreparedData, *, vcov: str, small_sample: bool, alpha: float) -> _Core:
    cp, counts, model = sufficient_statistics(prepared, vcov=vcov, small_sample=small_sample, alpha=alpha)
    return sensitivity_core(cp, counts, model)


def sensitivity_core(cp: CrossProducts, counts: SampleCounts, model: ModelSpec) -> _Core:
    """The 2SLS fit, A and H of the module docstring from the sufficient statistics (one treatment)."""
    import scipy.linalg

    if cp.p != 1:
        raise InvalidInputError(
            "The plausibly-exogenous analysis takes one treatment column; pass treatment= as a single name."
        )
    two_sls = dataclasses.replace(model, method="2sls")
    base = result_from_cross_products(cp, counts, two_sls, diagnostics=False)
    k = cp.k
    # coordinates in data units: the partialled columns are Q times these
    z = cp.coords(cp.iz) * cp.scale[:k][None, :]
    x = cp.coords(cp.ix) * cp.scale[cp.ix][None, :]
    y = cp.coords(cp.iy) * cp.scale[cp.iy]
    xhat = np.zeros_like(x)
    xhat[:k] = x[:k]
    bread = np.array([[1.0 / float(xhat[:, 0] @ xhat[:, 0])]])
    shift = (bread @ (x.T @ z)).ravel()  # A = (X'P_Z X)^{-1} X'Z, 1 x L
    resid = y - x[:, 0] * float(base.coef[0])
    m = z - x @ shift[None, :]
    quad = cp.covariance(xhat, np.column_stack([resid, m]), bread, 1)
    se = float(base.se[0])
    if not se > 0:
        raise EstimationError(
            "The 2SLS standard error is zero, so no interval can be formed; check the data."
        )
    quantile = float((base.ci[0, 1] - base.coef[0]) / se)
    rf = scipy.linalg.solve_triangular(z[:k], y[:k], check_finite=False)
    two_way = model.vcov == "clustered" and len(cp.moments) > 1
    return _Core(
        treatment=model.treatment[0],
        instruments=model.instruments,
        beta_hat=float(base.coef[0]),
        se_hat=se,
        ci_hat=(float(base.ci[0, 0]), float(base.ci[0, 1])),
        shift=np.asarray(shift, dtype=np.float64),
        quad=np.asarray(quad, dtype=np.float64),
        quantile=quantile,
        ci_reference=base.ci_reference,
        reduced_form=np.asarray(rf, dtype=np.float64),
        n=counts.n,
        vcov=model.vcov,
        alpha=model.alpha,
        exact_from_vertices=(not two_way) or is_psd(quad),
        y_coords=np.asarray(y, dtype=np.float64),
        z_coords=np.asarray(z, dtype=np.float64),
    )


def _as_vector(value: float | Sequence[float], n_inst: int, name: str) -> Array:
    arr = np.atleast_1d(np.asarray(value, dtype=np.float64)).ravel()
    if arr.size == 1 and n_inst > 1:
        arr = np.full(n_inst, float(arr[0]))
    if arr.size != n_inst:
        raise InvalidInputError(
            f"{name} has {arr.size} entries but there are {n_inst} instruments; give one value per instrument."
        )
    if not np.all(np.isfinite(arr)):
        raise InvalidInputError(f"{name} must be finite; give a bounded range for the direct effect.")
    return arr


def _account(data: pd.DataFrame, prepared: PreparedData) -> RowAccount:
    """Rows used and left out (by reason) for the prepared model."""
    columns = [prepared.outcome, *prepared.treatment, *prepared.instruments, *prepared.controls]
    columns += [*prepared.absorb, *prepared.cluster, *((prepared.weights,) if prepared.weights else ())]
    return count_rows(data, columns, n_used=prepared.n)


def _rows_text(account: RowAccount | None, n: int) -> str:
    return str(account) if account is not None else f"rows: used {n:,}"


def _v(value: float) -> str:
    if value != value:
        return "—"
    if math.isinf(value):
        return "unbounded" if value > 0 else "-unbounded"
    return f"{value:.4g}"


def _vec(values: Sequence[float]) -> str:
    return ", ".join(_v(v) for v in values)


CAUTION = (
    "Statistics cannot establish exclusion or exogeneity; conclusions for policy or clinical decisions need "
    "domain review."
)


# ----------------------------------------------------------------------------------------------------------
# union of confidence intervals
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class GammaInterval(Record):
    """The 2SLS estimate and interval when the direct effect is ``gamma`` (one value per instrument)."""

    position: float
    gamma: tuple[float, ...]
    estimate: float
    lower: float
    upper: float

    def to_dict(self) -> dict[str, Any]:
        return cast(dict[str, Any], json_safe(self.__dict__))


@dataclass(frozen=True)
class UnionIntervalResult(Record):
    """UCI over the box [gamma_min, gamma_max] with the evaluation grid used for the plot.

    ``grid`` runs over gamma itself for one instrument, and along the box diagonal gamma_min + s (gamma_max -
    gamma_min), s in [0, 1], for several (``position`` holds gamma or s). ``shift`` is A: beta(gamma) =
    beta_hat - A gamma. ``exact`` says whether the bounds are exact (from the box vertices) or grid-based.
    """

    treatment: str
    instruments: tuple[str, ...]
    gamma_min: tuple[float, ...]
    gamma_max: tuple[float, ...]
    lower: float
    upper: float
    lower_at: tuple[float, ...]
    upper_at: tuple[float, ...]
    covers_zero: bool
    estimate: float
    se: float
    ci: tuple[float, float]
    shift: tuple[float, ...]
    reduced_form: tuple[float, ...]
    grid: tuple[GammaInterval, ...]
    grid_coordinate: str
    exact: bool
    quantile: float
    ci_reference: str
    alpha: float
    vcov: str
    n: int
    note: str
    row_account: RowAccount | None = None

    def to_dict(self) -> dict[str, Any]:
        out = {k: v for k, v in self.__dict__.items() if k != "grid"}
        out = cast(dict[str, Any], json_safe(out))
        out["grid"] = [g.to_dict() for g in self.grid]
        out["kind"] = "union_of_confidence_intervals"
        return out

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g} %"
        verdict = "covers zero" if self.covers_zero else "excludes zero"
        return "\n".join(
            [
                f"Union of {level} intervals for the effect of {self.treatment} over an assumed direct effect",
                _rows_text(self.row_account, self.n),
                f"instrument(s): {', '.join(self.instruments)}; covariance {self.vcov}; {self.ci_reference}",
                f"direct effect assumed between [{_vec(self.gamma_min)}] and [{_vec(self.gamma_max)}]",
                f"2SLS without a direct effect: {_v(self.estimate)} (SE {_v(self.se)}), "
                f"interval [{_v(self.ci[0])}, {_v(self.ci[1])}]",
                f"union of intervals: [{_v(self.lower)}, {_v(self.upper)}], which {verdict} "
                f"({'exact, from the range corners' if self.exact else 'from the range corners and a grid'})",
                f"lower end reached at direct effect [{_vec(self.lower_at)}], upper end at [{_vec(self.upper_at)}]",
                self.note,
                CAUTION,
            ]
        )


NOTE = (
    "Sensitivity of the 2SLS interval to a direct effect of the instrument on the outcome in the stated "
    "range; it does not establish that exclusion holds or that the range is the right one."
)


def union_of_intervals(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instruments: str | Sequence[str],
    gamma_min: float | Sequence[float],
    gamma_max: float | Sequence[float],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
    n_grid: int = 101,
) -> UnionIntervalResult:
    """Union of the 2SLS (1 - alpha) intervals over direct effects gamma in [gamma_min, gamma_max].

    With several instruments the range is a box (one bound per instrument; a scalar applies to all).
    """
    if n_grid < 2:
        raise InvalidInputError(f"n_grid must be at least 2, got {n_grid}.")
    prepared = _spec_options(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
    )
    core = _core(prepared, vcov=vcov, small_sample=small_sample, alpha=alpha)
    return _union(core, gamma_min, gamma_max, n_grid, _account(data, prepared))


def union_of_intervals_from(
    cp: CrossProducts,
    counts: SampleCounts,
    model: ModelSpec,
    *,
    gamma_min: float | Sequence[float],
    gamma_max: float | Sequence[float],
    n_grid: int = 101,
    row_account: RowAccount | None = None,
) -> UnionIntervalResult:
    """:func:`union_of_intervals` from the sufficient statistics (any engine)."""
    if n_grid < 2:
        raise InvalidInputError(f"n_grid must be at least 2, got {n_grid}.")
    return _union(sensitivity_core(cp, counts, model), gamma_min, gamma_max, n_grid, row_account)


def _union(
    core: _Core,
    gamma_min: float | Sequence[float],
    gamma_max: float | Sequence[float],
    n_grid: int,
    row_account: RowAccount | None,
) -> UnionIntervalResult:
    alpha, vcov = core.alpha, core.vcov
    n_inst = len(core.instruments)
    lo = _as_vector(gamma_min, n_inst, "the direct-effect minimum (gamma_min, --direct-effect-min)")
    hi = _as_vector(gamma_max, n_inst, "the direct-effect maximum (gamma_max, --direct-effect-max)")
    if np.any(lo > hi):
        j = int(np.argmax(lo > hi))
        raise InvalidInputError(
            f"The direct-effect range for instrument {core.instruments[j]!r} is reversed "
            f"(minimum {lo[j]:g} > maximum {hi[j]:g}); swap the bounds."
        )
    steps = np.linspace(0.0, 1.0, n_grid)
    grid: list[GammaInterval] = []
    for s in steps:
        g = lo * (1.0 - s) + hi * s  # exact endpoints at s = 0 and s = 1
        est, lower, upper = core.interval(g)
        pos = float(g[0]) if n_inst == 1 else float(s)
        grid.append(GammaInterval(pos, tuple(map(float, g)), est, lower, upper))
    vertices = [np.where(np.array(bits, dtype=bool), hi, lo) for bits in np.ndindex(*(2,) * n_inst)]
    candidates = (
        list(vertices) if core.exact_from_vertices else list(vertices) + [np.array(g.gamma) for g in grid]
    )
    bounds = [core.interval(g) for g in candidates]
    i_lo = int(np.argmin([b[1] for b in bounds]))
    i_hi = int(np.argmax([b[2] for b in bounds]))
    lower, upper = bounds[i_lo][1], bounds[i_hi][2]
    return UnionIntervalResult(
        treatment=core.treatment,
        instruments=core.instruments,
        gamma_min=tuple(map(float, lo)),
        gamma_max=tuple(map(float, hi)),
        lower=lower,
        upper=upper,
        lower_at=tuple(map(float, candidates[i_lo])),
        upper_at=tuple(map(float, candidates[i_hi])),
        covers_zero=bool(lower <= 0.0 <= upper),
        estimate=core.beta_hat,
        se=core.se_hat,
        ci=core.ci_hat,
        shift=tuple(map(float, core.shift)),
        reduced_form=tuple(map(float, core.reduced_form)),
        grid=tuple(grid),
        grid_coordinate="gamma"
        if n_inst == 1
        else "position along the box diagonal (0 = gamma_min, 1 = gamma_max)",
        exact=core.exact_from_vertices,
        quantile=core.quantile,
        ci_reference=core.ci_reference,
        alpha=alpha,
        vcov=vcov,
        n=core.n,
        note=NOTE,
        row_account=row_account,
    )


# ----------------------------------------------------------------------------------------------------------
# local to zero
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LocalToZeroResult(Record):
    """LTZ interval: centre beta_hat - A mu, variance V + A Omega A', same quantile as the 2SLS interval."""

    treatment: str
    instruments: tuple[str, ...]
    mu: tuple[float, ...]
    omega: tuple[tuple[float, ...], ...]
    estimate: float
    se: float
    lower: float
    upper: float
    covers_zero: bool
    estimate_2sls: float
    se_2sls: float
    ci_2sls: tuple[float, float]
    shift: tuple[float, ...]
    quantile: float
    ci_reference: str
    alpha: float
    vcov: str
    n: int
    note: str
    row_account: RowAccount | None = None

    def to_dict(self) -> dict[str, Any]:
        out = cast(dict[str, Any], json_safe(dict(self.__dict__)))
        out["kind"] = "local_to_zero"
        return out

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g} %"
        sds = ", ".join(_v(math.sqrt(max(self.omega[i][i], 0.0))) for i in range(len(self.omega)))
        verdict = "covers zero" if self.covers_zero else "excludes zero"
        return "\n".join(
            [
                f"Local-to-zero {level} interval for the effect of {self.treatment} with a normal prior on the "
                "direct effect",
                _rows_text(self.row_account, self.n),
                f"instrument(s): {', '.join(self.instruments)}; covariance {self.vcov}; {self.ci_reference}",
                f"prior on the direct effect: mean [{_vec(self.mu)}], SD [{sds}]",
                f"2SLS without a direct effect: {_v(self.estimate_2sls)} (SE {_v(self.se_2sls)}), "
                f"interval [{_v(self.ci_2sls[0])}, {_v(self.ci_2sls[1])}]",
                f"with the prior: {_v(self.estimate)} (SE {_v(self.se)}), interval [{_v(self.lower)}, "
                f"{_v(self.upper)}], which {verdict}",
                self.note,
                CAUTION,
            ]
        )


def local_to_zero(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instruments: str | Sequence[str],
    mu: float | Sequence[float],
    omega: float | Sequence[Sequence[float]] | Sequence[float],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> LocalToZeroResult:
    """Interval for beta when the direct effect is gamma ~ N(mu, omega) (Conley, Hansen and Rossi 2012).

    ``omega`` is the L x L prior covariance (a scalar variance for one instrument; a list of L values is read
    as a diagonal). The prior can come from :func:`ivdossier.estimation.falsification.zero_first_stage`.
    """
    prepared = _spec_options(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
    )
    core = _core(prepared, vcov=vcov, small_sample=small_sample, alpha=alpha)
    return _ltz(core, mu, omega, _account(data, prepared))


def local_to_zero_from(
    cp: CrossProducts,
    counts: SampleCounts,
    model: ModelSpec,
    *,
    mu: float | Sequence[float],
    omega: float | Sequence[Sequence[float]] | Sequence[float],
    row_account: RowAccount | None = None,
) -> LocalToZeroResult:
    """:func:`local_to_zero` from the sufficient statistics (any engine)."""
    return _ltz(sensitivity_core(cp, counts, model), mu, omega, row_account)


def _ltz(
    core: _Core,
    mu: float | Sequence[float],
    omega: float | Sequence[Sequence[float]] | Sequence[float],
    row_account: RowAccount | None,
) -> LocalToZeroResult:
    alpha, vcov = core.alpha, core.vcov
    n_inst = len(core.instruments)
    mu_v = _as_vector(mu, n_inst, "mu")
    om = np.asarray(omega, dtype=np.float64)
    if om.ndim == 0:
        om = np.eye(n_inst) * float(om) if n_inst == 1 else np.full((n_inst, n_inst), np.nan)
    elif om.ndim == 1:
        if om.size != n_inst:
            raise InvalidInputError(
                f"omega has {om.size} entries but there are {n_inst} instruments; give an L x L matrix."
            )
        om = np.diag(om)
    if om.shape != (n_inst, n_inst) or not np.all(np.isfinite(om)):
        raise InvalidInputError(
            f"omega must be a finite {n_inst} x {n_inst} covariance matrix (a scalar only with one instrument)."
        )
    if not np.allclose(om, om.T) or not is_psd(om):
        raise InvalidInputError("omega must be symmetric positive semi-definite; check the prior covariance.")
    var = core.se_hat**2 + float(core.shift @ om @ core.shift)
    centre = core.beta_hat - float(core.shift @ mu_v)
    se = math.sqrt(var)
    lower, upper = centre - core.quantile * se, centre + core.quantile * se
    return LocalToZeroResult(
        treatment=core.treatment,
        instruments=core.instruments,
        mu=tuple(map(float, mu_v)),
        omega=tuple(tuple(map(float, row)) for row in om),
        estimate=centre,
        se=se,
        lower=lower,
        upper=upper,
        covers_zero=bool(lower <= 0.0 <= upper),
        estimate_2sls=core.beta_hat,
        se_2sls=core.se_hat,
        ci_2sls=core.ci_hat,
        shift=tuple(map(float, core.shift)),
        quantile=core.quantile,
        ci_reference=core.ci_reference,
        alpha=alpha,
        vcov=vcov,
        n=core.n,
        note=NOTE,
        row_account=row_account,
    )


# ----------------------------------------------------------------------------------------------------------
# breakdown value
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class BreakdownResult(Record):
    """Smallest direct effect (along ``direction``) at which the interval first covers ``target``.

    ``magnitude`` is |t| for gamma = t * direction (direction has unit length), in outcome units per unit of
    the instrument combination Z'direction; ``gamma`` is the signed vector. ``relative_to_reduced_form`` is
    t divided by the reduced-form coefficient of Y on Z'direction: 1 means the whole reduced form would have
    to be direct effect. ``magnitude`` is 0 when the 2SLS interval already covers the target.
    """

    treatment: str
    instruments: tuple[str, ...]
    target: float
    direction: tuple[float, ...]
    t: float
    magnitude: float
    gamma: tuple[float, ...]
    reduced_form: float
    relative_to_reduced_form: float
    estimate: float
    ci: tuple[float, float]
    covered_without_direct_effect: bool
    alpha: float
    vcov: str
    n: int
    note: str
    row_account: RowAccount | None = None

    def to_dict(self) -> dict[str, Any]:
        out = cast(dict[str, Any], json_safe(dict(self.__dict__)))
        out["kind"] = "breakdown_value"
        return out

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g} %"
        if self.covered_without_direct_effect:
            finding = f"the {level} interval already covers {_v(self.target)} with no direct effect at all"
        else:
            finding = (
                f"a direct effect of {_v(self.magnitude)} per unit of the instrument"
                + ("" if len(self.instruments) == 1 else f" combination (direction [{_vec(self.direction)}])")
                + f" makes the {level} interval reach {_v(self.target)}; that is "
                f"{_v(abs(self.relative_to_reduced_form))} times the reduced form ({_v(self.reduced_form)})"
            )
        return "\n".join(
            [
                f"Breakdown value: how large a direct effect of the instrument overturns the conclusion about "
                f"{self.treatment}",
                _rows_text(self.row_account, self.n),
                f"instrument(s): {', '.join(self.instruments)}; covariance {self.vcov}",
                f"2SLS without a direct effect: {_v(self.estimate)}, interval [{_v(self.ci[0])}, {_v(self.ci[1])}]",
                finding,
                self.note,
                CAUTION,
            ]
        )


def _breakdown_t(core: _Core, direction: Array, target: float) -> float:
    """Smallest |t| with target inside the interval at gamma = t * direction (a quadratic inequality in t)."""
    a = float(core.shift @ direction)
    d0 = core.beta_hat - target
    q2 = core.quantile**2
    # Var(t) = v0 + 2 v1 t + v2 t^2 from c = (1, -t d)
    v0 = core.quad[0, 0]
    v1 = -float(core.quad[0, 1:] @ direction)
    v2 = float(direction @ core.quad[1:, 1:] @ direction)
    c2 = a * a - q2 * v2
    c1 = -2.0 * (a * d0 + q2 * v1)
    c0 = d0 * d0 - q2 * v0
    if c0 <= 0:
        return 0.0
    if abs(c2) <= 1e-14 * max(a * a, q2 * abs(v2), 1e-300):
        roots = np.array([-c0 / c1]) if c1 != 0 else np.array([])
    else:
        disc = c1 * c1 - 4.0 * c2 * c0
        if disc < 0:
            roots = np.array([])
        else:
            sq = math.sqrt(disc)
            # numerically stable pair of roots
            qq = -0.5 * (c1 + math.copysign(sq, c1))
            roots = np.array([qq / c2, c0 / qq]) if qq != 0 else np.array([0.0])
    if roots.size == 0:
        raise EstimationError(
            "No direct effect along this direction makes the interval cover the target; the instrument "
            "combination has no first stage in this direction, choose another direction."
        )
    return float(roots[int(np.argmin(np.abs(roots)))])


def breakdown_value(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instruments: str | Sequence[str],
    target: float = 0.0,
    direction: Sequence[float] | None = None,
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> BreakdownResult:
    """Smallest |gamma| at which the (1 - alpha) interval at that direct effect covers ``target``.

    This equals the half-width g of the smallest symmetric range [-g, g] whose UCI covers the target. With
    several instruments a ``direction`` (one weight per instrument, normalised to unit length) is required.
    """
    prepared = _spec_options(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
    )
    core = _core(prepared, vcov=vcov, small_sample=small_sample, alpha=alpha)
    return _breakdown(core, target, direction, _account(data, prepared))


def breakdown_value_from(
    cp: CrossProducts,
    counts: SampleCounts,
    model: ModelSpec,
    *,
    target: float = 0.0,
    direction: Sequence[float] | None = None,
    row_account: RowAccount | None = None,
) -> BreakdownResult:
    """:func:`breakdown_value` from the sufficient statistics (any engine)."""
    return _breakdown(sensitivity_core(cp, counts, model), target, direction, row_account)


def _breakdown(
    core: _Core, target: float, direction: Sequence[float] | None, row_account: RowAccount | None
) -> BreakdownResult:
    alpha, vcov = core.alpha, core.vcov
    n_inst = len(core.instruments)
    if direction is None:
        if n_inst > 1:
            raise InvalidInputError(
                f"With {n_inst} instruments the breakdown value needs direction= (one weight per instrument), "
                "e.g. all ones for an equal direct effect of each."
            )
        dvec = np.ones(1)
    else:
        dvec = _as_vector(direction, n_inst, "direction")
    norm = float(np.linalg.norm(dvec))
    if norm == 0:
        raise InvalidInputError("direction is the zero vector; give at least one non-zero weight.")
    dvec = dvec / norm
    t = _breakdown_t(core, dvec, float(target))
    rf = float(core.reduced_form @ dvec) if n_inst == 1 else _reduced_form_along(core, dvec)
    return BreakdownResult(
        treatment=core.treatment,
        instruments=core.instruments,
        target=float(target),
        direction=tuple(map(float, dvec)),
        t=t,
        magnitude=abs(t),
        gamma=tuple(map(float, t * dvec)),
        reduced_form=rf,
        relative_to_reduced_form=t / rf if rf != 0 else math.inf,
        estimate=core.beta_hat,
        ci=core.ci_hat,
        covered_without_direct_effect=t == 0.0,
        alpha=alpha,
        vcov=vcov,
        n=core.n,
        note=NOTE,
        row_account=row_account,
    )


def _reduced_form_along(core: _Core, direction: Array) -> float:
    """OLS coefficient of the partialled outcome on the instrument combination Z'direction (coordinates)."""
    zc = core.z_coords @ direction
    return float(zc @ core.y_coords) / float(zc @ zc)
