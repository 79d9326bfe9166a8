"""Power, minimum detectable effect and sample size for a planned 2SLS design with one treatment.

Formula (strong-instrument asymptotics, homoskedastic structural error; common practice):

    Var(beta_2sls) = DEFF * sigma_u^2 / (N * R2 * Var(X))

with sigma_u the SD of the structural error u in Y = X beta + controls + u, R2 the population partial R^2
of the excluded instruments in the first stage (after the controls), Var(X) the variance of the treatment
after the controls (so N * R2 * Var(X) is the explained first-stage variation), and DEFF = 1 + (m - 1) *
ICC the design effect of clusters of average size m with intra-cluster correlation ICC of the
instrument-times-error score (for an instrument assigned at cluster level, the ICC of the error). Power of
the two-sided level-alpha t-test at effect b: Phi(|b|/se - z) + Phi(-|b|/se - z), z = Phi^{-1}(1 - alpha/2)
(both tails counted).

First stage: with k excluded instruments, c controls and df2 = N - k - c - 1, the homoskedastic first-stage F
is noncentral F(k, df2, lambda) with lambda = N * R2 / (1 - R2) (conditioning on the instruments' sample
variance equal to its population value). Its mean is E[F] = df2 / (df2 - 2) * (k + lambda) / k, about
1 + N R2 / (k (1 - R2)). The "plug-in" F is the value the sample would show if its partial R^2 equalled R2:
F = (R2 / k) / ((1 - R2) / df2). With clusters, lambda and the plug-in F are divided by DEFF (approximation
for the cluster-robust F). These numbers
plan a study; they do not say whether the instrument is valid, which no power calculation can establish.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, stats

from ivdossier.errors import InvalidInputError
from ivdossier.jsonsafe import Record, json_safe

__all__ = [
    "FirstStageOutlook",
    "IVDesign",
    "PowerAnalysis",
    "expected_first_stage",
    "iv_design",
    "mde_2sls",
    "n_for_power",
    "power_2sls",
    "power_analysis",
    "se_2sls",
]

FORMULA = "Var(beta) = DEFF * sigma_u^2 / (N * R2_partial * Var(X)), DEFF = 1 + (m - 1) * ICC"


@dataclass(frozen=True)
class IVDesign(Record):
    """A planned 2SLS design; build it with :func:`iv_design`, which validates and fills in R2 from an F."""

    n: int
    partial_r2: float
    residual_sd: float
    treatment_sd: float
    n_instruments: int
    n_controls: int
    cluster_size: float
    icc: float
    alpha: float
    residual_sd_source: str
    partial_r2_source: str

    @property
    def design_effect(self) -> float:
        """DEFF = 1 + (m - 1) * ICC."""
        return 1.0 + (self.cluster_size - 1.0) * self.icc

    @property
    def df2(self) -> int:
        """Denominator degrees of freedom of the first-stage F: N - k - c - 1."""
        return self.n - self.n_instruments - self.n_controls - 1

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "n": self.n,
                "partial_r2": self.partial_r2,
                "residual_sd": self.residual_sd,
                "treatment_sd": self.treatment_sd,
                "n_instruments": self.n_instruments,
                "n_controls": self.n_controls,
                "cluster_size": self.cluster_size,
                "icc": self.icc,
                "design_effect": self.design_effect,
                "alpha": self.alpha,
                "residual_sd_source": self.residual_sd_source,
                "partial_r2_source": self.partial_r2_source,
            }
        )


def _mean_ncf(k: int, df2: int, lam: float) -> float:
    """Mean of the noncentral F(k, df2, lam): df2 / (df2 - 2) * (k + lam) / k (df2 > 2)."""
    return df2 / (df2 - 2.0) * (k + lam) / k


def iv_design(
    *,
    n: int,
    partial_r2: float | None = None,
    first_stage_f: float | None = None,
    residual_sd: float | None = None,
    outcome_sd: float | None = None,
    treatment_sd: float = 1.0,
    n_instruments: int = 1,
    n_controls: int = 0,
    cluster_size: float = 1.0,
    icc: float = 0.0,
    alpha: float = 0.05,
) -> IVDesign:
    """Validate a planned design, converting an expected first-stage F to a partial R^2 when needed.

    Give exactly one of ``partial_r2`` or ``first_stage_f`` (read as the expected first-stage F, E[F], and
    converted to R2 by inverting the mean of the noncentral F; with clusters it is the F of the
    cluster-robust test, noncentrality lambda / DEFF), and one of ``residual_sd`` (sigma_u) or
    ``outcome_sd`` (used as sigma_u: an approximation, conservative when the treatment and controls explain
    part of Y and confounding is modest).
    """
    if n_instruments < 1:
        raise InvalidInputError(f"n_instruments must be at least 1, got {n_instruments}.")
    if n_controls < 0:
        raise InvalidInputError(f"n_controls must be non-negative, got {n_controls}.")
    if n - n_instruments - n_controls - 1 < 3:
        raise InvalidInputError(
            f"n = {n} leaves fewer than 3 residual degrees of freedom with {n_instruments} instrument(s) and "
            f"{n_controls} control(s); plan a larger sample."
        )
    if not 0.0 < alpha < 1.0:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha}; use e.g. 0.05.")
    if not treatment_sd > 0:
        raise InvalidInputError(f"treatment_sd must be positive, got {treatment_sd}.")
    if cluster_size < 1.0:
        raise InvalidInputError(f"cluster_size must be at least 1 (1 = no clustering), got {cluster_size}.")
    if not 0.0 <= icc <= 1.0:
        raise InvalidInputError(f"icc must lie in [0, 1], got {icc}.")
    if (partial_r2 is None) == (first_stage_f is None):
        raise InvalidInputError(
            "give exactly one of partial_r2 (first-stage partial R^2) or first_stage_f "
            "(expected first-stage F)."
        )
    df2 = n - n_instruments - n_controls - 1
    if partial_r2 is not None:
        if not 0.0 < partial_r2 <= 1.0:
            raise InvalidInputError(f"partial_r2 must lie in (0, 1], got {partial_r2}.")
        r2 = float(partial_r2)
        r2_source = "given"
    else:
        assert first_stage_f is not None
        floor = _mean_ncf(n_instruments, df2, 0.0)
        if not first_stage_f > floor:
            raise InvalidInputError(
                f"first_stage_f = {first_stage_f} is not above {floor:.3f}, the mean F with an irrelevant "
                "instrument; give a larger expected F or a partial_r2."
            )
        # E[F] = df2/(df2-2) (k + lambda/DEFF)/k, so the given F round-trips through expected_first_stage
        lam = (first_stage_f * n_instruments * (df2 - 2.0) / df2 - n_instruments) * (
            1.0 + (cluster_size - 1.0) * icc
        )
        r2 = lam / (n + lam)
        r2_source = f"from expected first-stage F = {first_stage_f:g}"
    if (residual_sd is None) == (outcome_sd is None):
        raise InvalidInputError("give exactly one of residual_sd (SD of the structural error) or outcome_sd.")
    sd = float(residual_sd if residual_sd is not None else outcome_sd)  # type: ignore[arg-type]
    if not sd > 0:
        raise InvalidInputError(f"the error/outcome SD must be positive, got {sd}.")
    source = "residual_sd (structural error)" if residual_sd is not None else "outcome_sd used as sigma_u"
    return IVDesign(
        n=int(n),
        partial_r2=r2,
        residual_sd=sd,
        treatment_sd=float(treatment_sd),
        n_instruments=int(n_instruments),
        n_controls=int(n_controls),
        cluster_size=float(cluster_size),
        icc=float(icc),
        alpha=float(alpha),
        residual_sd_source=source,
        partial_r2_source=r2_source,
    )


def se_2sls(design: IVDesign, *, n: int | None = None) -> float:
    """Asymptotic SE of the 2SLS coefficient: sqrt(DEFF sigma_u^2 / (N R2 Var(X))); ``n`` overrides N."""
    size = design.n if n is None else n
    var = design.design_effect * design.residual_sd**2 / (size * design.partial_r2 * design.treatment_sd**2)
    return float(math.sqrt(var))


def _power_at(ratio: float, alpha: float) -> float:
    z = stats.norm.ppf(1.0 - alpha / 2.0)
    r = abs(ratio)
    return float(stats.norm.cdf(r - z) + stats.norm.cdf(-r - z))


def _ratio_for_power(power: float, alpha: float) -> float:
    """Effect in SE units at which the two-sided test reaches ``power`` (both tails counted)."""
    if not alpha < power < 1.0:
        raise InvalidInputError(f"target power must lie in (alpha, 1) = ({alpha}, 1), got {power}.")
    z = stats.norm.ppf(1.0 - alpha / 2.0)
    hi = z + stats.norm.ppf(power) + 1.0
    return float(optimize.brentq(lambda r: _power_at(r, alpha) - power, 0.0, hi, xtol=1e-12))


def power_2sls(design: IVDesign, effect: float) -> float:
    """Power of the two-sided level-alpha 2SLS t-test when the true effect is ``effect`` (outcome units)."""
    return _power_at(effect / se_2sls(design), design.alpha)


def mde_2sls(design: IVDesign, *, power: float = 0.8) -> float:
    """Minimum detectable effect (absolute, outcome units per unit of treatment) at the target power."""
    return _ratio_for_power(power, design.alpha) * se_2sls(design)


def n_for_power(design: IVDesign, effect: float, *, power: float = 0.8) -> int:
    """Smallest N (rounded up) at which the test reaches ``power`` for ``effect``, other inputs fixed."""
    if effect == 0:
        raise InvalidInputError("effect must be non-zero to compute a required sample size.")
    ratio = _ratio_for_power(power, design.alpha)
    var_one = design.design_effect * design.residual_sd**2 / (design.partial_r2 * design.treatment_sd**2)
    return math.ceil(var_one * ratio**2 / effect**2 - 1e-9)


@dataclass(frozen=True)
class FirstStageOutlook(Record):
    """What first stage the plan should expect and how likely it is to clear the thresholds it will use.

    ``critical_values`` maps a label to (critical value, probability that the planned F exceeds it), where the
    probability uses the noncentral F(k, df2, lambda / DEFF) distribution of the first-stage F (the
    heteroskedasticity-robust effective F behaves like it under homoskedasticity; with clusters this is an
    approximation).
    """

    plug_in_f: float
    expected_f: float
    noncentrality: float
    critical_values: tuple[tuple[str, float | None, float | None, str], ...]
    tf_critical_value_at_expected_f: float

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "plug_in_f": json_safe(self.plug_in_f),
                "expected_f": json_safe(self.expected_f),
                "noncentrality": json_safe(self.noncentrality),
                "critical_values": [
                    {
                        "label": label,
                        "critical_value": json_safe(value),
                        "probability_exceeded": json_safe(prob),
                        "source": source,
                    }
                    for label, value, prob, source in self.critical_values
                ],
                "tf_critical_value_at_expected_f": json_safe(self.tf_critical_value_at_expected_f),
            }
        )


def expected_first_stage(design: IVDesign) -> FirstStageOutlook:
    """Plug-in and expected first-stage F, compared with the Stock–Yogo and MOP critical values."""
    from ivdossier.estimation import critical_values as cv  # the weak-IV tables live there

    k, df2, r2 = design.n_instruments, design.df2, design.partial_r2
    if r2 >= 1.0:
        plug_in, lam, mean_f = math.inf, math.inf, math.inf
    else:
        plug_in = (r2 / k) / ((1.0 - r2) / df2) / design.design_effect
        lam = design.n * r2 / (1.0 - r2) / design.design_effect
        mean_f = _mean_ncf(k, df2, lam)

    def prob_above(c: float | None) -> float | None:
        if c is None:
            return None
        if math.isinf(lam):
            return 1.0
        return float(stats.ncf.sf(c, k, df2, lam))

    rows: list[tuple[str, float | None, float | None, str]] = []
    sy = cv.stock_yogo_critical_value(estimator="2sls", criterion="size", n_endog=1, k2=k, level=0.10)
    rows.append(
        (
            "Stock–Yogo 2SLS 10 % maximal size",
            sy.critical_value,
            prob_above(sy.critical_value),
            cv.STOCK_YOGO_SOURCE if sy.reason is None else f"{cv.STOCK_YOGO_SOURCE}: {sy.reason}",
        )
    )
    for tau in (0.10, 0.20):
        # homoskedastic design with orthonormal instruments: S is proportional to I_k, so K_eff = k
        k_eff = cv.mop_k_eff(np.eye(k), tau)
        c = cv.mop_critical_value(k_eff, tau)
        rows.append((f"MOP effective F, tau = {tau:.0%}", c, prob_above(c), cv.MOP_SOURCE))
    tf_c = cv.tf_critical_value(mean_f) if k == 1 else math.nan
    return FirstStageOutlook(
        plug_in_f=plug_in,
        expected_f=mean_f,
        noncentrality=lam,
        critical_values=tuple(rows),
        tf_critical_value_at_expected_f=tf_c,
    )


@dataclass(frozen=True)
class PowerAnalysis(Record):
    """Everything a plan reports about power: SE, power at the effect, MDE, N needed and the first stage."""

    design: IVDesign
    se: float
    effect: float | None
    power: float | None
    target_power: float
    mde: float
    n_required: int | None
    clusters_required: int | None
    first_stage: FirstStageOutlook
    formula: str
    assumptions: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "design": self.design.to_dict(),
                "se": self.se,
                "effect": self.effect,
                "power": self.power,
                "target_power": self.target_power,
                "mde": self.mde,
                "n_required": self.n_required,
                "clusters_required": self.clusters_required,
                "first_stage": self.first_stage.to_dict(),
                "formula": self.formula,
                "assumptions": list(self.assumptions),
            }
        )


ASSUMPTIONS: tuple[str, ...] = (
    "strong-instrument asymptotics: the normal approximation to the 2SLS t-ratio "
    "(poor when the first-stage F is small; see the tF critical value)",
    "homoskedastic structural error; clustering enters only through DEFF = 1 + (m - 1) * ICC",
    "R2 is the population partial R^2 of the excluded instruments after the controls; "
    "Var(X) is the treatment variance after the controls",
    "the instruments are valid (relevance, exclusion, independence): statistics and power "
    "calculations cannot establish exclusion or exogeneity",
)


def power_analysis(
    design: IVDesign, *, effect: float | None = None, target_power: float = 0.8
) -> PowerAnalysis:
    """Power at ``effect`` (if given), MDE and required N at ``target_power``, and the first-stage outlook."""
    se = se_2sls(design)
    n_req = None if effect is None else n_for_power(design, effect, power=target_power)
    return PowerAnalysis(
        design=design,
        se=se,
        effect=effect,
        power=None if effect is None else power_2sls(design, effect),
        target_power=target_power,
        mde=mde_2sls(design, power=target_power),
        n_required=n_req,
        clusters_required=None if n_req is None else math.ceil(n_req / design.cluster_size - 1e-9),
        first_stage=expected_first_stage(design),
        formula=FORMULA,
        assumptions=ASSUMPTIONS,
    )
