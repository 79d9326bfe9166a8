"""Dossier sections for the design and summary-data runs: one section per kind (the newest run of each), and the
figures they refer to.

Decision-maker designs (leave-out measure, JIVE1/UJIVE beside 2SLS, jackknife Anderson–Rubin), exposure-share
designs (Rotemberg weights with a figure, AKM/AKM0, shock level), per-variant summary evidence and the
robustness value (the sections and figures of :mod:`variant_sections` and :mod:`variant_plots`), and the
reporting checklist of a genetic-variant instrument (:mod:`variant_checklist`, filled from the registry and runs). The one-line
findings under the threats come from the table of analyses; these sections show the numbers behind them.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Sequence
from pathlib import PurePath
from typing import TYPE_CHECKING, Any

from ivdossier.jsonsafe import RECORD_KEY, load_record
from ivdossier.reports import mdtext as mt
from ivdossier.reports.inputs import DossierInput, RunInfo

if TYPE_CHECKING:  # the result types load pandas and scipy: imported only when a design run is shown
    from ivdossier.estimation.design_results import DecisionMakerDesign, ExposureShareDesign

__all__ = ["design_figures", "design_sections"]

#: Run kinds shown here, in section order.
KINDS = ("design-decision-makers", "design-exposure-share", "variants", "confounder-strength")
EMPTY_SET = (
    "An empty set means that no single effect fits every decision-maker's data: their differences in outcomes "
    "are not proportional to their differences in treatment. With valid instruments and one effect for every "
    "case this is unlikely; a path from the decision-maker to the outcome other than the treatment, or effects "
    "that differ across cases, can produce it."
)
LIMITS = "Statistics cannot establish exclusion or exogeneity. Conclusions for policy or clinical use need domain review."


def _num(value: Any, digits: int = 4) -> str:
    if isinstance(value, int | float) and not isinstance(value, bool):
        return f"{value:.{digits}g}" if math.isfinite(value) else "–"
    return "–"


def _set(intervals: Sequence[Sequence[float]]) -> str:
    if not intervals:
        return "empty"
    return " ∪ ".join(f"[{_num(lo)}, {_num(hi)}]" for lo, hi in intervals)


def _newest(inp: DossierInput) -> dict[str, tuple[RunInfo, Any]]:
    """The newest run of each kind shown here, with its typed result (runs without a typed record are skipped)."""
    out: dict[str, tuple[RunInfo, Any]] = {}
    for run in sorted(inp.evidence_runs, key=lambda r: (r.created_text, r.slug)):
        record = run.results.get(RECORD_KEY) if hasattr(run.results, "get") else None
        if record is None:
            continue
        out[_kind_of(run)] = (run, load_record(record))
    return out


def _kind_of(run: RunInfo) -> str:
    kind = str(run.results.get("kind", ""))
    return {
        "decision_maker_design": "design-decision-makers",
        "exposure_share_design": "design-exposure-share",
        "summary_data_evidence": "variants",
        "omitted_variable_sensitivity": "confounder-strength",
    }.get(kind, kind)


def _decision_makers(run: RunInfo, r: DecisionMakerDesign) -> str:
    rec = r.recipe
    lines = [
        "## Decision-maker design",
        "",
        f"Run {mt.inline(run.slug)}: {rec.n_cases:,} cases, {rec.n_decision_makers:,} decision-makers "
        f"(cases each from {min(r.cases, default=0):,} to {max(r.cases, default=0):,}, median "
        f"{_num(statistics.median(r.cases) if r.cases else float('nan'))}).",
        "",
        f"Leave-out measure: {mt.inline(rec.description)}."
        + (
            f" Written with the data to {mt.inline(PurePath(r.derived_file).name)} (path, recipe and SHA-256 "
            "in the run's provenance)."
            if r.derived_file
            else ""
        ),
    ]
    if r.small:
        lines += [
            "",
            f"Flagged: {len(r.small)} decision-maker(s) with fewer than {rec.min_cases} cases: "
            + ", ".join(mt.inline(s) for s in r.small[:10])
            + (" …" if len(r.small) > 10 else "")
            + ".",
        ]
    level = f"{100 * (1 - r.estimates.alpha):g}%"
    loo = r.leave_out_estimate
    if loo is not None:
        lines += [
            "",
            f"2SLS with the leave-out measure as the one instrument: {_num(loo.estimate)} (std. error "
            f"{_num(loo.std_error)}), {level} interval [{_num(loo.ci_low)}, {_num(loo.ci_high)}].",
        ]
    rows = [
        [
            mt.cell(e.method.upper()),
            _num(e.estimate),
            _num(e.std_error),
            f"[{_num(e.ci_low)}, {_num(e.ci_high)}]",
        ]
        for e in r.estimates.estimates
    ]
    lines += [
        "",
        f"Estimates with one dummy per decision-maker as instruments ({r.estimates.n_instruments} instruments):",
        "",
        mt.table(["estimator", "estimate", "std. error", f"{level} interval"], rows, "lrrl"),
        "",
        f"Standard errors: {mt.inline(r.estimates.se_note)}.",
    ]
    ar = r.anderson_rubin
    if ar.applicable:
        strong = "above" if ar.strength > ar.strength_cutoff else "not above"
        lines += [
            "",
            f"Jackknife Anderson–Rubin (valid with many weak instruments): {100 * (1 - ar.alpha):g}% set "
            f"{_set(ar.confidence_set)}; test of β = {_num(ar.beta0)}: p = {_num(ar.p_value)}. Strength "
            f"{_num(ar.strength)}, {strong} the cut-off {_num(ar.strength_cutoff)}.",
        ]
        if not ar.confidence_set:
            lines += ["", EMPTY_SET]
    else:
        lines += ["", f"Jackknife Anderson–Rubin: not applicable ({mt.inline(ar.reason or '')})."]
    return "\n".join([*lines, "", mt.inline(r.caution)])


def _exposure(run: RunInfo, r: ExposureShareDesign) -> str:
    rec, rw, rob, sl = r.recipe, r.rotemberg, r.robust, r.shock_level
    index = {s: i for i, s in enumerate(rw.sectors)}
    rows = [
        [mt.cell(s), _num(rw.weights[index[s]]), _num(rw.estimates[index[s]]), _num(rw.shocks[index[s]])]
        for s in rw.top
    ]
    level = f"{100 * (1 - rob.alpha):g}%"
    lines = [
        "## Exposure-share design",
        "",
        f"Run {mt.inline(run.slug)}: {rec.n_units:,} units, {rec.n_sectors:,} sectors; instrument "
        f"{mt.inline(rec.to_dict()['description'])}"
        + ("; the share sum is a control because shares sum to less than one" if r.share_sum_control else "")
        + ".",
        "",
        f"Rotemberg weights: the 2SLS estimate {_num(rw.estimate)} is the weighted sum of the per-sector "
        f"estimates; negative weights make up {100 * rw.negative_weight_share:.1f}% of the total absolute weight. "
        "Sectors of largest weight:",
        "",
        mt.table(["sector", "weight", "per-sector estimate", "shock"], rows, "lrrr"),
        "",
        mt.figure(
            "rotemberg-weights", "Per-sector estimate against Rotemberg weight; dashed: the 2SLS estimate."
        ),
        "",
        f"Intervals ({level}): conventional [{_num(rob.ci_conventional[0])}, {_num(rob.ci_conventional[1])}]; "
        + (
            f"exposure-robust (AKM) [{_num(rob.ci_akm[0])}, {_num(rob.ci_akm[1])}]; AKM0 {_set(rob.akm0_set)}."
            if rob.applicable
            else f"AKM not applicable ({mt.inline(rob.reason or '')})."
        ),
        "",
        f"Shock-level regression: estimate {_num(sl.estimate)} (se {_num(sl.std_error)}) over {sl.n_sectors} "
        f"sectors, effective number {_num(sl.effective_sectors, 3)}, largest exposure share "
        f"{100 * sl.largest_exposure_share:.1f}%.",
    ]
    return "\n".join([*lines, "", mt.inline(r.caution)])


def design_sections(inp: DossierInput) -> tuple[str, ...]:
    """One Markdown section per kind of design or summary-data run attached to the instrument (newest run)."""
    from ivdossier.reports.variant_checklist import checklist_markdown, dossier_checklist

    newest = _newest(inp)
    checklist = dossier_checklist(inp)  # a genetic-variant instrument has one even before any run
    if not newest and checklist is None:
        return ()
    from ivdossier.estimation.design_results import DecisionMakerDesign, ExposureShareDesign
    from ivdossier.estimation.omitted_variable import IvRobustness
    from ivdossier.estimation.variant_summary import SummaryEvidence
    from ivdossier.reports.variant_sections import robustness_markdown, summary_evidence_markdown

    out: list[str] = []
    for _kind, (run, result) in sorted(
        newest.items(), key=lambda kv: KINDS.index(kv[0]) if kv[0] in KINDS else 99
    ):
        if isinstance(result, DecisionMakerDesign):
            out.append(_decision_makers(run, result))
        elif isinstance(result, ExposureShareDesign):
            out.append(_exposure(run, result))
        elif isinstance(result, SummaryEvidence):
            figures = "\n\n".join(
                mt.figure(k, c)
                for k, c in (
                    (
                        "variant-scatter",
                        "Outcome effect against exposure effect per variant, with fitted lines.",
                    ),
                    ("variant-funnel", "Funnel: per-variant estimate against its precision."),
                    ("variant-loo", "IVW estimate leaving out one variant at a time."),
                )
                if k in design_figure_keys(inp)
            )
            out.append(
                summary_evidence_markdown(result).rstrip()
                + f"\n\nRun {mt.inline(run.slug)}."
                + (f"\n\n{figures}" if figures else "")
            )
        elif isinstance(result, IvRobustness):
            out.append(
                robustness_markdown(result).rstrip()
                + f"\n\nRun {mt.inline(run.slug)}.\n\n"
                + mt.figure("robustness-contour", "Adjusted estimate over the strength of a confounder.")
            )
    if checklist is not None:
        out.append(checklist_markdown(checklist).rstrip())  # it states the limits itself
    elif out:
        out.append(LIMITS)
    return tuple(out)


def design_figure_keys(inp: DossierInput) -> dict[str, str]:
    """Figure keys the sections refer to -> run kind."""
    keys: dict[str, str] = {}
    newest = _newest(inp)
    if not newest:
        return keys
    from ivdossier.estimation.design_results import ExposureShareDesign
    from ivdossier.estimation.omitted_variable import IvRobustness
    from ivdossier.estimation.variant_summary import SummaryEvidence

    for kind, (_, result) in newest.items():
        if isinstance(result, ExposureShareDesign):
            keys["rotemberg-weights"] = kind
        elif isinstance(result, SummaryEvidence):
            keys["variant-scatter"] = kind
            keys["variant-funnel"] = kind
            if getattr(result.leave_one_out, "applicable", True) is not False:
                keys["variant-loo"] = kind
        elif isinstance(result, IvRobustness):
            keys["robustness-contour"] = kind
    return keys


def design_figures(inp: DossierInput) -> dict[str, str]:
    """The SVG of every figure the design sections refer to."""
    keys = design_figure_keys(inp)
    if not keys:
        return {}
    from ivdossier.reports.rotemberg_plot import rotemberg_svg
    from ivdossier.reports.variant_plots import (
        funnel_svg,
        leave_one_out_svg,
        robustness_contour_svg,
        variant_scatter_svg,
    )

    newest = _newest(inp)
    out: dict[str, str] = {}
    for key, kind in keys.items():
        result = newest[kind][1]
        if key == "rotemberg-weights":
            out[key] = rotemberg_svg(result.rotemberg, key=key)
        elif key == "variant-scatter":
            out[key] = variant_scatter_svg(result, key=key)
        elif key == "variant-funnel":
            out[key] = funnel_svg(result, key=key)
        elif key == "variant-loo":
            out[key] = leave_one_out_svg(result, key=key)
        elif key == "robustness-contour":
            out[key] = robustness_contour_svg(result.contour, key=key)
    return out
