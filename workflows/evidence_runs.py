"""Stored evidence runs read back as report inputs: one reader per kind (sensitivity, falsification, compliers,
power), the only place that reads those runs' stored results."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
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


def _num(value: Any) -> float | None:
    if isinstance(value, bool) or value is None:
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if not math.isnan(x) else None


def _or(value: Any, default: float) -> float:
    x = _num(value)
    return default if x is None else x


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


def _int(value: Any) -> int | None:
    x = _num(value)
    return int(x) if x is not None else None


# ---------------------------------------------------------------------------------------------- sensitivity


def sensitivity_info(run: Run) -> ri.SensitivityInfo:
    """A sensitivity run (union of intervals, local to zero or breakdown value) with the union's plot."""
    res: Mapping[str, Any] = run.results or {}
    spec: Mapping[str, Any] = run.spec or {}
    kind = res.get("kind")
    common: dict[str, Any] = {
        "slug": run.slug,
        "created_at": run.created_at,
        "treatment": str(res.get("treatment", "")),
        "instruments": tuple(str(i) for i in res.get("instruments") or ()),
        "alpha": _or(res.get("alpha"), 0.05),
    }
    if kind == "union_of_confidence_intervals":
        return ri.SensitivityInfo(
            method="union",
            estimate=_num(res.get("estimate")),
            ci=_pair(res.get("ci")),
            lower=_num(res.get("lower")),
            upper=_num(res.get("upper")),
            direct_effect_min=_nums(res.get("gamma_min")),
            direct_effect_max=_nums(res.get("gamma_max")),
            covered_without_direct_effect=None,
            svg=_union_svg(res),
            **common,
        )
    if kind == "local_to_zero":
        return ri.SensitivityInfo(
            method="local-to-zero",
            estimate=_num(res.get("estimate_2sls")),
            ci=_pair(res.get("ci_2sls")),
            lower=_num(res.get("lower")),
            upper=_num(res.get("upper")),
            prior_mean=_nums(res.get("mu")),
            prior_sd=_nums(spec.get("prior_sd")),
            **common,
        )
    return ri.SensitivityInfo(
        method="breakdown",
        estimate=_num(res.get("estimate")),
        ci=_pair(res.get("ci")),
        target=_num(res.get("target")),
        breakdown=_num(res.get("magnitude")),
        breakdown_direct_effect=_nums(res.get("gamma")),
        breakdown_share_of_reduced_form=_num(res.get("relative_to_reduced_form")),
        covered_without_direct_effect=bool(res.get("covered_without_direct_effect")),
        **common,
    )


def _union_svg(res: Mapping[str, Any]) -> str:
    """The existing plot of the interval against the assumed direct effect, drawn from the stored union result."""
    from dataclasses import fields

    from ivdossier.estimation.sensitivity import GammaInterval, UnionIntervalResult, plot_sensitivity_svg

    grid = res.get("grid") or []
    if len(grid) < 2:
        return ""
    nan = float("nan")
    points = tuple(
        GammaInterval(
            position=_or(g.get("position"), 0.0),
            gamma=_nums(g.get("gamma")),
            estimate=_or(g.get("estimate"), nan),
            lower=_or(g.get("lower"), nan),
            upper=_or(g.get("upper"), nan),
        )
        for g in grid
    )
    names = {f.name for f in fields(UnionIntervalResult)} - {"grid"}
    values = {k: (tuple(v) if isinstance(v, list) else v) for k, v in res.items() if k in names}
    if names - set(values):
        return ""
    result = UnionIntervalResult(grid=points, **values)
    return plot_sensitivity_svg(result)


# -------------------------------------------------------------------------------------------- falsification


def falsification_info(run: Run) -> ri.FalsificationInfo:
    """A falsification run as a table of its coefficients and one line on its joint test or assumption."""
    res: Mapping[str, Any] = run.results or {}
    rows: list[ri.FalsificationRow] = []
    summary = ""
    if run.run_kind == "falsify-per-instrument":
        for r in res.get("rows") or []:
            rows.append(
                ri.FalsificationRow(
                    target=f"own estimate (first-stage F {_fmt(r.get('first_stage_f'))})",
                    instrument=str(r.get("instrument", "")),
                    estimate=_num(r.get("estimate")),
                    se=_num(r.get("se")),
                    p_value=None,
                    n=_int(res.get("n")),
                )
            )
        rows.append(
            ri.FalsificationRow(
                target="estimate with all instruments",
                instrument=", ".join(str(i) for i in res.get("instruments") or ()),
                estimate=_num(res.get("estimate_all")),
                se=_num(res.get("se_all")),
                p_value=None,
                n=_int(res.get("n")),
            )
        )
        overid = res.get("overid") or {}
        if _num(overid.get("p_value")) is not None:
            summary = f"Over-identification test: p = {_fmt(overid.get('p_value'))}."
    elif run.run_kind == "falsify-zero-first-stage":
        where = str(res.get("subsample", "the subsample"))
        rows.extend(_coefficient_rows(res.get("reduced_form"), suffix=f" in {where}"))
        summary = (
            f"First stage in {where}: p = {_fmt((res.get('first_stage') or {}).get('wald_p_value'))} "
            f"({_int(res.get('n'))} of {_int(res.get('n_full'))} rows). Assumption: "
            f"{res.get('assumption', 'the treatment does not respond to the instrument there')}."
        )
    elif run.run_kind == "falsify-first-stage-signs":
        for g in res.get("groups") or []:
            rows.extend(_coefficient_rows(g, suffix=f" where {res.get('by', '')} in {g.get('group', '')}"))
        flagged = res.get("flagged") or []
        summary = (
            f"Subgroups with a significantly reversed first stage: {', '.join(map(str, flagged))}."
            if flagged
            else "No subgroup has a significantly reversed first stage."
        )
    else:  # balance and placebo outcomes: one regression per target
        for r in res.get("rows") or []:
            rows.extend(_coefficient_rows(r))
        joint = res.get("joint") or {}
        if _num(joint.get("p_value")) is not None:
            summary = f"Joint test of all coefficients: p = {_fmt(joint.get('p_value'))}."
    return ri.FalsificationInfo(
        slug=run.slug, created_at=run.created_at, check=run.run_kind, rows=tuple(rows), summary=summary
    )


def _coefficient_rows(regression: Any, suffix: str = "") -> list[ri.FalsificationRow]:
    if not isinstance(regression, Mapping):
        return []
    return [
        ri.FalsificationRow(
            target=f"{regression.get('target', '')}{suffix}",
            instrument=str(c.get("instrument", "")),
            estimate=_num(c.get("coef")),
            se=_num(c.get("se")),
            p_value=_num(c.get("p_value")),
            n=_int(regression.get("n")),
        )
        for c in regression.get("coefficients") or []
    ]


def _fmt(value: Any) -> str:
    x = _num(value)
    return "–" if x is None else f"{x:.3g}"


# -------------------------------------------------------------------------------------------------- compliers


def compliers_info(run: Run) -> ri.CompliersInfo:
    """A compliers run: the three compliance types' shares and the complier profile when it was asked for."""
    res: Mapping[str, Any] = run.results or {}
    spec: Mapping[str, Any] = run.spec or {}
    shares = tuple(
        ri.ComplierShare(
            group=name.replace("_", "-"),
            estimate=_or(entry.get("estimate"), 0.0),
            se=_num(entry.get("se")),
            ci=_pair(entry.get("ci")),
        )
        for name, entry in (res.get("shares") or {}).items()
        if isinstance(entry, Mapping)
    )
    means = res.get("means") or {}
    profile = tuple(
        ri.ComplierProfileRow(
            covariate=str(p.get("covariate", "")),
            overall=_num(p.get("overall_mean")),
            complier=_num(p.get("complier_mean")),
            complier_se=_num(p.get("complier_mean_se")),
            always_taker=_num(p.get("always_taker_mean")),
            never_taker=_num(p.get("never_taker_mean")),
        )
        for p in means.get("profiles") or []
    )
    return ri.CompliersInfo(
        slug=run.slug,
        created_at=run.created_at,
        treatment=str(spec.get("treatment", "")),
        instrument=str(spec.get("instrument", "")),
        shares=shares,
        profile=profile,
        alpha=_or(res.get("alpha"), 0.05),
        se_method=str(res.get("se_method", "")),
    )


# ------------------------------------------------------------------------------------------------------ power


def power_info(run: Run) -> ri.PowerInfo:
    """A power run: standard error, power at the effect, minimum detectable effect and observations needed."""
    res: Mapping[str, Any] = run.results or {}
    design = res.get("design") or {}
    return ri.PowerInfo(
        slug=run.slug,
        created_at=run.created_at,
        n=_int(design.get("n")),
        se=_num(res.get("se")),
        mde=_num(res.get("mde")),
        target_power=_or(res.get("target_power"), 0.8),
        alpha=_or(design.get("alpha"), 0.05),
        effect=_num(res.get("effect")),
        power=_num(res.get("power")),
        n_required=_int(res.get("n_required")),
        expected_f=_num((res.get("first_stage") or {}).get("expected_f")),
        assumptions=tuple(str(a) for a in res.get("assumptions") or ()),
    )


# ------------------------------------------------------------------------------------------------- together


def evidence_fields(runs: Sequence[Run]) -> dict[str, tuple[Any, ...]]:
    """Every evidence run of an instrument, by kind, as the dossier input's fields."""
    return {
        "sensitivity": tuple(sensitivity_info(r) for r in runs if r.run_kind == "sensitivity"),
        "falsification": tuple(falsification_info(r) for r in runs if r.run_kind in FALSIFICATION_KINDS),
        "compliers": tuple(compliers_info(r) for r in runs if r.run_kind == "compliers"),
        "power": tuple(power_info(r) for r in runs if r.run_kind == "power"),
    }
