"""Stored evidence runs read back as report inputs: one reader per kind (sensitivity, falsification, compliers,
power), each reading the run's typed result through ``workflows.runs.load_result``."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from ivdossier.registry.models import Run
from ivdossier.reports import inputs as ri

FALSIFICATION_KINDS = (
    "falsify-balance",
    "falsify-placebo",
    "falsify-zero-first-stage",
    "falsify-per-instrument",
    "falsify-first-stage-signs",
)
EVIDENCE_KINDS = ("sensitivity", *FALSIFICATION_KINDS, "compliers", "power")


def typed_result(run: Run) -> Any:
    """The run's typed result (a LegacyResult for runs stored before typed records)."""
    from ivdossier.workflows.runs import load_result

    return load_result(run.run_kind, run.results or {})


def _legacy(result: Any) -> str:
    """The note of a run stored before typed records, else empty text."""
    from ivdossier.workflows.runs import LegacyResult

    return result.note if isinstance(result, LegacyResult) else ""


def _num(value: Any) -> float | None:
    if isinstance(value, bool) or value is None:
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(x) else x


def _nums(values: Any) -> tuple[float, ...]:
    if values is None:
        return ()
    if not isinstance(values, list | tuple):
        values = [values]
    return tuple(x for x in (_num(v) for v in values) if x is not None)


def _pair(values: Any) -> tuple[float, float] | None:
    if isinstance(values, list | tuple) and len(values) == 2:
        low, high = _num(values[0]), _num(values[1])
        if low is not None and high is not None:
            return (low, high)
    return None


def _fmt(value: Any) -> str:
    x = _num(value)
    return "–" if x is None else f"{x:.3g}"


# ---------------------------------------------------------------------------------------------- sensitivity


def sensitivity_info(run: Run, *, figures: bool = True) -> ri.SensitivityInfo:
    """A sensitivity run (union of intervals, local to zero or breakdown value) with the union's plot (drawn only
    with `figures`: callers that show no figure, such as `graph check`, skip drawing it)."""
    from ivdossier.estimation.sensitivity import (
        BreakdownResult,
        LocalToZeroResult,
        UnionIntervalResult,
    )
    from ivdossier.reports.sensitivity_plot import sensitivity_svg

    res = typed_result(run)
    common: dict[str, Any] = {"slug": run.slug, "created_at": run.created_at}
    if isinstance(res, UnionIntervalResult):
        return ri.SensitivityInfo(
            method="union",
            treatment=res.treatment,
            instruments=res.instruments,
            alpha=res.alpha,
            estimate=_num(res.estimate),
            ci=_pair(res.ci),
            lower=_num(res.lower),
            upper=_num(res.upper),
            direct_effect_min=_nums(res.gamma_min),
            direct_effect_max=_nums(res.gamma_max),
            svg=sensitivity_svg(res) if figures and len(res.grid) >= 2 else "",
            **common,
        )
    if isinstance(res, LocalToZeroResult):
        return ri.SensitivityInfo(
            method="local-to-zero",
            treatment=res.treatment,
            instruments=res.instruments,
            alpha=res.alpha,
            estimate=_num(res.estimate_2sls),
            ci=_pair(res.ci_2sls),
            lower=_num(res.lower),
            upper=_num(res.upper),
            prior_mean=_nums(res.mu),
            prior_sd=tuple(math.sqrt(max(row[i], 0.0)) for i, row in enumerate(res.omega)),
            **common,
        )
    if isinstance(res, BreakdownResult):
        return ri.SensitivityInfo(
            method="breakdown",
            treatment=res.treatment,
            instruments=res.instruments,
            alpha=res.alpha,
            estimate=_num(res.estimate),
            ci=_pair(res.ci),
            target=_num(res.target),
            breakdown=_num(res.magnitude),
            breakdown_direct_effect=_nums(res.gamma),
            breakdown_share_of_reduced_form=_num(res.relative_to_reduced_form),
            covered_without_direct_effect=bool(res.covered_without_direct_effect),
            **common,
        )
    return ri.SensitivityInfo(method="breakdown", note=_legacy(res) or "not a sensitivity result", **common)


# -------------------------------------------------------------------------------------------- falsification


def falsification_info(run: Run) -> ri.FalsificationInfo:
    """A falsification run as a table of its coefficients and one line on its joint test or assumption."""
    from ivdossier.estimation.falsification import (
        InstrumentRegressions,
        PerInstrumentResult,
        ZeroFirstStageResult,
    )
    from ivdossier.estimation.subgroups import SubgroupSigns

    res = typed_result(run)
    rows: list[ri.FalsificationRow] = []
    summary = ""
    if isinstance(res, PerInstrumentResult):
        for r in res.rows:
            rows.append(
                ri.FalsificationRow(
                    target=f"own estimate (first-stage F {_fmt(r.first_stage_f)})",
                    instrument=r.instrument,
                    estimate=_num(r.estimate),
                    se=_num(r.se),
                    p_value=None,
                    n=res.n,
                )
            )
        rows.append(
            ri.FalsificationRow(
                target="estimate with all instruments",
                instrument=", ".join(res.instruments),
                estimate=_num(res.estimate_all),
                se=_num(res.se_all),
                p_value=None,
                n=res.n,
            )
        )
        if _num((res.overid or {}).get("p_value")) is not None:
            summary = f"Over-identification test: p = {_fmt(res.overid['p_value'])}."
    elif isinstance(res, ZeroFirstStageResult):
        rows.extend(_coefficient_rows(res.reduced_form, suffix=f" in {res.subsample}"))
        summary = (
            f"First stage in {res.subsample}: p = {_fmt(res.first_stage_p_value)} "
            f"({res.n} of {res.n_full} rows). Assumption: {res.assumption}."
        )
    elif isinstance(res, SubgroupSigns):
        for g in res.groups:
            rows.extend(_coefficient_rows(g.regression, suffix=f" where {res.by} in {g.group}"))
        summary = (
            f"Subgroups with a significantly reversed first stage: {', '.join(res.flagged)}."
            if res.flagged
            else "No subgroup has a significantly reversed first stage."
        )
    elif isinstance(res, InstrumentRegressions):  # balance and placebo outcomes: one regression per target
        for r in res.rows:
            rows.extend(_coefficient_rows(r))
        if _num(res.joint.p_value) is not None:
            summary = f"Joint test of all coefficients: p = {_fmt(res.joint.p_value)}."
    else:
        summary = _legacy(res)
    return ri.FalsificationInfo(
        slug=run.slug, created_at=run.created_at, check=run.run_kind, rows=tuple(rows), summary=summary
    )


def _coefficient_rows(regression: Any, suffix: str = "") -> list[ri.FalsificationRow]:
    return [
        ri.FalsificationRow(
            target=f"{regression.target}{suffix}",
            instrument=c.instrument,
            estimate=_num(c.coef),
            se=_num(c.se),
            p_value=_num(c.p_value),
            n=regression.n,
        )
        for c in regression.coefficients
    ]


# -------------------------------------------------------------------------------------------------- compliers


def compliers_info(run: Run) -> ri.CompliersInfo:
    """A compliers run: the three compliance types' shares and the complier profile when it was asked for."""
    from ivdossier.estimation.compliers import ComplierReport

    res = typed_result(run)
    spec = run.spec or {}
    common: dict[str, Any] = {
        "slug": run.slug,
        "created_at": run.created_at,
        "treatment": str(spec.get("treatment", "")),
        "instrument": str(spec.get("instrument", "")),
    }
    if not isinstance(res, ComplierReport):
        return ri.CompliersInfo(note=_legacy(res), **common)
    sh = res.shares
    shares = tuple(
        ri.ComplierShare(
            group=name.replace("_", "-"),
            estimate=float(getattr(sh, name)),
            se=_num(getattr(sh, f"{name}_se")),
            ci=_pair(sh.interval(name)),
        )
        for name in ("complier", "always_taker", "never_taker")
    )
    profile = tuple(
        ri.ComplierProfileRow(
            covariate=p.covariate,
            overall=_num(p.overall_mean),
            complier=_num(p.complier_mean),
            complier_se=_num(p.complier_mean_se),
            always_taker=_num(p.always_taker_mean),
            never_taker=_num(p.never_taker_mean),
        )
        for p in (res.means.profiles if res.means is not None else ())
    )
    return ri.CompliersInfo(shares=shares, profile=profile, alpha=sh.alpha, se_method=sh.se_method, **common)


# ------------------------------------------------------------------------------------------------------ power


def power_info(run: Run) -> ri.PowerInfo:
    """A power run: standard error, power at the effect, minimum detectable effect and observations needed."""
    from ivdossier.estimation.power import PowerAnalysis

    res = typed_result(run)
    if not isinstance(res, PowerAnalysis):
        return ri.PowerInfo(
            slug=run.slug, created_at=run.created_at, n=None, se=None, mde=None, target_power=0.8,
            note=_legacy(res),
        )  # fmt: skip
    return ri.PowerInfo(
        slug=run.slug,
        created_at=run.created_at,
        n=res.design.n,
        se=_num(res.se),
        mde=_num(res.mde),
        target_power=res.target_power,
        alpha=res.design.alpha,
        effect=_num(res.effect),
        power=_num(res.power),
        n_required=res.n_required,
        expected_f=_num(res.first_stage.expected_f),
        assumptions=res.assumptions,
        reliability=res.reliability,
    )


# ------------------------------------------------------------------------------------------------- together


def evidence_fields(runs: Sequence[Run], *, figures: bool = True) -> dict[str, tuple[Any, ...]]:
    """Every evidence run of an instrument, by kind, as the dossier input's fields (without plots unless
    `figures`)."""
    return {
        "sensitivity": tuple(
            sensitivity_info(r, figures=figures) for r in runs if r.run_kind == "sensitivity"
        ),
        "falsification": tuple(falsification_info(r) for r in runs if r.run_kind in FALSIFICATION_KINDS),
        "compliers": tuple(compliers_info(r) for r in runs if r.run_kind == "compliers"),
        "power": tuple(power_info(r) for r in runs if r.run_kind == "power"),
    }
