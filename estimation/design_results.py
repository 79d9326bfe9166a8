"""One stored result per design analysis: a decision-maker design and an exposure-share design.

Each gathers the pieces its own modules compute (leave_out, jackknife_iv, many_instruments; exposure_share) on
one data set, so a run stores one typed record and the dossier shows them together.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.absorb import partial_out
from ivdossier.estimation.exposure_share import CAUTION as EXPOSURE_CAUTION
from ivdossier.estimation.exposure_share import (
    ExposureRobustIV,
    RotembergWeights,
    ShiftShareRecipe,
    ShockLevelIV,
    align_units,
    build_shift_share,
    exposure_robust_iv,
    rotemberg_weights,
    shock_level_iv,
)
from ivdossier.estimation.jackknife_iv import (
    JackknifeEstimate,
    JackknifeIVResult,
    decision_maker_jackknife_iv,
)
from ivdossier.estimation.leave_out import (
    CAUTION,
    DEFAULT_MIN_CASES,
    PropensityRecipe,
    decision_maker_propensity,
)
from ivdossier.estimation.many_instruments import JackknifeAR, decision_maker_anderson_rubin
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd


@dataclass(frozen=True)
class DecisionMakerDesign(Record):
    """The leave-out propensity (summarised; the column itself is written to a derived data file), 2SLS with that
    propensity as the one instrument, JIVE1 and UJIVE beside 2SLS on the decision-maker dummies, and the
    jackknife Anderson–Rubin test."""

    recipe: PropensityRecipe
    decision_makers: tuple[str, ...]
    cases: tuple[int, ...]
    small: tuple[str, ...]
    instrument_mean: float
    instrument_sd: float
    estimates: JackknifeIVResult
    anderson_rubin: JackknifeAR
    derived_file: str = ""
    caution: str = CAUTION
    leave_out_estimate: JackknifeEstimate | None = (
        None  # 2SLS with the leave-out propensity (runs before it: None)
    )

    def to_dict(self) -> dict[str, Any]:
        out = {
            "kind": "decision_maker_design",
            "leave_out_2sls": self.leave_out_estimate.to_dict() if self.leave_out_estimate else None,
            "propensity": {
                "recipe": self.recipe.to_dict(),
                "mean": self.instrument_mean,
                "sd": self.instrument_sd,
                "cases_per_decision_maker": {
                    "min": min(self.cases, default=0),
                    "median": float(np.median(self.cases)) if self.cases else None,
                    "max": max(self.cases, default=0),
                },
                "small": list(self.small),
                "derived_file": self.derived_file or None,
            },
            "estimates": self.estimates.to_dict(),
            "anderson_rubin": self.anderson_rubin.to_dict(),
            "caution": self.caution,
        }
        return dict(json_safe(out))

    def __str__(self) -> str:
        r = self.recipe
        lines = [
            f"Decision-maker design: {r.n_cases:,} cases, {r.n_decision_makers:,} decision-makers "
            f"(cases each: min {min(self.cases, default=0):,}, max {max(self.cases, default=0):,})",
            f"  leave-out measure: {r.description}",
            f"  measure: mean {self.instrument_mean:.4g}, sd {self.instrument_sd:.4g}"
            + (f"; written to {self.derived_file}" if self.derived_file else ""),
        ]
        if self.small:
            lines.append(
                f"  flagged: {len(self.small)} decision-maker(s) with fewer than {r.min_cases} cases: "
                + ", ".join(self.small[:8])
                + (" ..." if len(self.small) > 8 else "")
            )
        if self.leave_out_estimate is not None:
            e = self.leave_out_estimate
            lines.append(
                f"  2SLS with the leave-out measure: {e.estimate:.4g} (se {e.std_error:.4g}), "
                f"[{e.ci_low:.4g}, {e.ci_high:.4g}]"
            )
        lines += ["  " + line for line in str(self.estimates).splitlines() if "caution" not in line.lower()]
        lines += ["  " + line for line in str(self.anderson_rubin).splitlines()[:-1]]
        lines.append(f"  {self.caution}")
        return "\n".join(dict.fromkeys(lines))


def decision_maker_design(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    decision_maker: str,
    absorb: str | None = None,
    controls: Sequence[str] = (),
    leave_out: str = "case",
    cluster: str | None = None,
    min_cases: int = DEFAULT_MIN_CASES,
    beta0: float = 0.0,
    alpha: float = 0.05,
    name: str | None = None,
) -> tuple[DecisionMakerDesign, pd.Series]:
    """The design result and the leave-out propensity per case (a Series named after its recipe)."""
    import pandas as pd

    if outcome not in data.columns:
        raise InvalidInputError(f"Column {outcome!r} not found in the data; check --outcome.")
    prop = decision_maker_propensity(
        data,
        decision_maker=decision_maker,
        treatment=treatment,
        leave_out=leave_out,
        cluster=cluster,
        controls=tuple(controls),
        absorb=(absorb,) if absorb else (),
        min_cases=min_cases,
        name=name,
    )
    jive = decision_maker_jackknife_iv(
        data,
        outcome=outcome,
        treatment=treatment,
        decision_maker=decision_maker,
        absorb=absorb,
        controls=tuple(controls),
        alpha=alpha,
    )
    ar = decision_maker_anderson_rubin(
        data, outcome=outcome, treatment=treatment, decision_maker=decision_maker, absorb=absorb,
        controls=tuple(controls), beta0=beta0, alpha=alpha,
    )  # fmt: skip
    loo = leave_out_2sls(
        data[outcome].to_numpy(dtype=np.float64),
        data[treatment].to_numpy(dtype=np.float64),
        prop.values,
        controls=data[list(controls)].to_numpy(dtype=np.float64) if controls else None,
        fe_codes=[pd.factorize(data[absorb], sort=False)[0].astype(np.int64)] if absorb else [],
        alpha=alpha,
    )
    result = DecisionMakerDesign(
        recipe=prop.recipe,
        decision_makers=tuple(str(d) for d in prop.decision_makers),
        cases=tuple(int(c) for c in prop.cases),
        small=tuple(str(s) for s in prop.small),
        instrument_mean=float(np.mean(prop.values)),
        instrument_sd=float(np.std(prop.values)),
        estimates=jive,
        anderson_rubin=ar,
        leave_out_estimate=loo,
    )
    return result, prop.as_series()


def leave_out_2sls(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    controls: np.ndarray | None = None,
    fe_codes: Sequence[np.ndarray] = (),
    alpha: float = 0.05,
) -> JackknifeEstimate:
    """Just-identified 2SLS of ``y`` on ``x`` with the one instrument ``z`` (e.g. a leave-out propensity), an
    intercept, ``controls`` and fixed-effect cells partialled out (Frisch-Waugh-Lovell).

    b = z~'y~ / z~'x~; the standard error is heteroskedasticity-robust with no small-sample factor and treats
    ``z`` as fixed, as for the jackknife estimators: sqrt(sum_i z~_i^2 u_i^2) / |z~'x~| with u = y~ - b x~.
    """
    from scipy import stats

    cols = np.column_stack([y, x, z]).astype(np.float64)
    yt, xt, zt = (
        partial_out(cols, controls=controls, fe_codes=list(fe_codes)).columns[:, j] for j in range(3)
    )
    denom = float(zt @ xt)
    if not np.isfinite(denom) or abs(denom) <= 1e-12 * float(np.linalg.norm(zt) * np.linalg.norm(xt)):
        nan = float("nan")
        return JackknifeEstimate("2sls-leave-out", nan, nan, nan, nan)
    b = float(zt @ yt) / denom
    u = yt - b * xt
    se = float(np.sqrt(np.sum((zt * u) ** 2)) / abs(denom))
    crit = float(stats.norm.ppf(1 - alpha / 2))
    return JackknifeEstimate("2sls-leave-out", b, se, b - crit * se, b + crit * se)


@dataclass(frozen=True)
class ExposureShareDesign(Record):
    """The exposure-share instrument's recipe, its Rotemberg weights, the AKM/AKM0 intervals beside the
    conventional one, and the equivalent shock-level regression."""

    recipe: ShiftShareRecipe
    outcome: str
    treatment: str
    controls: tuple[str, ...]
    share_sum_control: bool
    rotemberg: RotembergWeights
    robust: ExposureRobustIV
    shock_level: ShockLevelIV
    caution: str = EXPOSURE_CAUTION

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "kind": "exposure_share_design",
                    "recipe": self.recipe.to_dict(),
                    "outcome": self.outcome,
                    "treatment": self.treatment,
                    "controls": list(self.controls),
                    "share_sum_control": self.share_sum_control,
                    "rotemberg": self.rotemberg.to_dict(),
                    "robust": self.robust.to_dict(),
                    "shock_level": self.shock_level.to_dict(),
                    "caution": self.caution,
                }
            )
        )

    def __str__(self) -> str:
        r = self.recipe
        head = [
            f"Exposure-share design: {r.n_units:,} units, {r.n_sectors:,} sectors; {self.treatment} -> {self.outcome}",
            f"  {r.to_dict()['description']}",
        ]
        if self.share_sum_control:
            head.append("  shares sum to less than one for some units: the share sum is added as a control")
        body = [str(self.rotemberg), str(self.robust), str(self.shock_level)]
        lines = head + [
            "  " + line for part in body for line in part.splitlines() if line.strip() != EXPOSURE_CAUTION
        ]
        lines.append(f"  {self.caution}")
        return "\n".join(lines)


def exposure_share_design(
    data: pd.DataFrame,
    shares: pd.DataFrame,
    shocks: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    unit: str = "unit",
    sector: str = "sector",
    share: str = "share",
    shock: str = "shock",
    controls: Sequence[str] = (),
    alpha: float = 0.05,
    top: int = 5,
) -> ExposureShareDesign:
    """Build the instrument from the two tables, align the unit data to it and run the three analyses."""
    for c in (unit, outcome, treatment, *controls):
        if c not in data.columns:
            raise InvalidInputError(
                f"Column {c!r} not found in the unit data; its columns are {', '.join(map(str, data.columns))}."
            )
    design = build_shift_share(
        shares, shocks, unit=unit, sector=sector, share=share, shock=shock, units=data[unit]
    )
    rows = align_units(design, data, unit)
    y = rows[outcome].to_numpy(dtype=np.float64)
    x = rows[treatment].to_numpy(dtype=np.float64)
    cols = [rows[c].to_numpy(dtype=np.float64) for c in controls]
    if design.incomplete:
        cols.append(design.share_sums)
    w = np.column_stack(cols) if cols else None
    return ExposureShareDesign(
        recipe=design.recipe,
        outcome=outcome,
        treatment=treatment,
        controls=tuple(controls),
        share_sum_control=design.incomplete,
        rotemberg=rotemberg_weights(design, y, x, w, top=top),
        robust=exposure_robust_iv(design, y, x, w, alpha=alpha),
        shock_level=shock_level_iv(design, y, x, w, alpha=alpha),
    )
