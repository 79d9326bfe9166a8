"""The dossier's evidence sections: every attached sensitivity, falsification, compliers and power run, whether or
not a linked threat asks for it. Each kind gets one "##" section; a kind without runs is left out."""

from __future__ import annotations

from ivdossier.reports import mdtext as mt
from ivdossier.reports.inputs import (
    CompliersInfo,
    DossierInput,
    FalsificationInfo,
    PowerInfo,
    SensitivityInfo,
)
from ivdossier.reports.resultview import fmt, fmt_p

CHECK_TITLES = {
    "falsify-balance": "balance of the instrument on predetermined covariates",
    "falsify-placebo": "placebo outcomes the instrument cannot have caused",
    "falsify-zero-first-stage": "reduced form where the instrument cannot move the treatment",
    "falsify-per-instrument": "each instrument's own estimate",
    "falsify-first-stage-signs": "first-stage signs within subgroups",
}
SENSITIVITY_CAUTION = (
    "These runs ask how far the estimate moves if the instrument had a direct effect on the outcome of an assumed "
    "size; they cannot tell whether it has one, and the assumed range is the team's judgement."
)
FALSIFICATION_CAUTION = (
    "A falsification check can reveal some failures of exclusion or independence; passing every check cannot "
    "establish either condition."
)


def evidence_markdown(inp: DossierInput) -> str:
    """The four evidence sections for the runs attached to the instrument (empty text without any)."""
    parts = [
        _sensitivity(inp.sensitivity),
        _falsification(inp.falsification),
        _compliers(inp.compliers),
        _power(inp.power),
    ]
    return "\n\n".join(p for p in parts if p)


def sensitivity_figures(inp: DossierInput) -> dict[str, str]:
    """Figure key -> SVG for every sensitivity run that has a plot."""
    return {_figure_key(s): s.svg for s in inp.sensitivity if s.svg.strip()}


def _figure_key(s: SensitivityInfo) -> str:
    key = "".join(ch if ch.isalnum() else "-" for ch in s.slug.lower()).strip("-")
    return f"sensitivity-{key}"


def _interval(low: float | None, high: float | None) -> str:
    return f"[{fmt(low)}, {fmt(high)}]"


def _run_head(slug: str, created: str, what: str) -> str:
    return f"### Run {mt.inline(slug)} · {what}\n\n*Recorded {mt.inline(created)}.*"


# ---------------------------------------------------------------------------------------------- sensitivity


def _sensitivity(runs: tuple[SensitivityInfo, ...]) -> str:
    if not runs:
        return ""
    out = ["## Sensitivity to a direct effect of the instrument", SENSITIVITY_CAUTION]
    for s in runs:
        instruments = ", ".join(mt.inline(i) for i in s.instruments) or "the instrument"
        level = f"{100 * (1 - s.alpha):g} %"
        base = (
            f"Without a direct effect: estimate {fmt(s.estimate)}, {level} interval {_interval(*s.ci)}."
            if s.ci is not None
            else ""
        )
        if s.method == "union":
            what = "union of intervals over a range of direct effects"
            rows = [
                [
                    "Assumed direct effect of " + instruments,
                    f"from {_vec(s.direct_effect_min)} to {_vec(s.direct_effect_max)}",
                ],
                [f"Union of the {level} intervals", _interval(s.lower, s.upper)],
                [
                    "Excludes zero",
                    _yes_no(s.lower is not None and s.upper is not None and (s.lower > 0 or s.upper < 0)),
                ],
            ]
        elif s.method == "local-to-zero":
            what = "interval with a prior on the direct effect"
            rows = [
                [
                    "Prior on the direct effect of " + instruments,
                    f"mean {_vec(s.prior_mean)}, SD {_vec(s.prior_sd)}",
                ],
                [f"{level} interval", _interval(s.lower, s.upper)],
            ]
        else:
            what = "breakdown value"
            rows = [
                [
                    "Smallest direct effect at which the interval reaches " + fmt(s.target),
                    f"size {fmt(s.breakdown)} (outcome units per unit of {instruments}), "
                    f"reached at a direct effect of {_vec(s.breakdown_direct_effect)}",
                ],
                ["As a share of the reduced form", fmt(s.breakdown_share_of_reduced_form, 3)],
                [
                    f"Interval already reaches {fmt(s.target)} with no direct effect",
                    _yes_no(bool(s.covered_without_direct_effect)),
                ],
            ]
        block = [_run_head(s.slug, s.created_text, what)]
        if s.note:
            out.append("\n\n".join([*block, mt.inline(s.note) + "."]))
            continue
        if base:
            block.append(base)
        block.append(mt.table(["Quantity", "Value"], rows, "ll"))
        if s.svg.strip():
            block.append(
                mt.figure(
                    _figure_key(s),
                    f"Run {s.slug}: the {level} interval for the effect of {s.treatment or 'the treatment'} "
                    "against the assumed direct effect of the instrument on the outcome.",
                )
            )
        out.append("\n\n".join(block))
    breakdowns = [s for s in runs if s.method == "breakdown"]
    unions = [s for s in runs if s.method == "union"]
    if unions and not breakdowns:
        out.append(
            "No breakdown value is attached (`ivdossier sensitivity breakdown ... --attach INSTRUMENT`)."
        )
    if breakdowns and not unions:
        out.append(
            "No interval over a range of direct effects is attached, so there is no plot "
            "(`ivdossier sensitivity range ... --attach INSTRUMENT`)."
        )
    return "\n\n".join(out)


def _pct(share: float) -> str:
    return f"{100 * share:g} %"


def _vec(values: tuple[float, ...]) -> str:
    return ", ".join(fmt(v) for v in values) or "–"


def _yes_no(value: bool) -> str:
    return "yes" if value else "no"


# -------------------------------------------------------------------------------------------- falsification


def _falsification(runs: tuple[FalsificationInfo, ...]) -> str:
    if not runs:
        return ""
    out = ["## Falsification checks", FALSIFICATION_CAUTION]
    for f in runs:
        block = [_run_head(f.slug, f.created_text, CHECK_TITLES.get(f.check, mt.inline(f.check)))]
        if f.rows:
            rows = [
                [
                    mt.cell(r.target),
                    mt.cell(r.instrument),
                    fmt(r.estimate),
                    fmt(r.se),
                    fmt_p(r.p_value),
                    str(r.n) if r.n is not None else "–",
                ]
                for r in f.rows
            ]
            block.append(
                mt.table(
                    ["Regressed", "Instrument", "Coefficient", "Std. error", "p", "Rows"], rows, "llrrrr"
                )
            )
        if f.summary:
            block.append(mt.inline(f.summary))
        out.append("\n\n".join(block))
    return "\n\n".join(out)


# ------------------------------------------------------------------------------------------------ compliers


def _compliers(runs: tuple[CompliersInfo, ...]) -> str:
    if not runs:
        return ""
    out = [
        "## Compliers",
        "Shares assume monotonicity (no defiers); the complier profile shows whom the estimate speaks for.",
    ]
    for c in runs:
        what = f"compliance types for {mt.inline(c.instrument)} → {mt.inline(c.treatment)}"
        block = [_run_head(c.slug, c.created_text, what)]
        if c.note:
            out.append("\n\n".join([*block, mt.inline(c.note) + "."]))
            continue
        level = f"{100 * (1 - c.alpha):g} %"
        rows = [
            [mt.cell(s.group), fmt(s.estimate, 3), fmt(s.se, 3), _interval(*s.ci) if s.ci else "–"]
            for s in c.shares
        ]
        block.append(mt.table(["Group", "Share", "Std. error", f"{level} interval"], rows, "lrrr"))
        if c.profile:
            prof = [
                [
                    mt.cell(p.covariate),
                    fmt(p.overall),
                    fmt(p.complier) + (f" ({fmt(p.complier_se)})" if p.complier_se is not None else ""),
                    fmt(p.always_taker),
                    fmt(p.never_taker),
                ]
                for p in c.profile
            ]
            block.append("Complier profile (means; complier standard error in brackets):")
            block.append(
                mt.table(
                    ["Covariate", "Everyone", "Compliers", "Always-takers", "Never-takers"], prof, "lrrrr"
                )
            )
        else:
            block.append("No complier profile in this run (add `--covariate` to profile the compliers).")
        if c.se_method:
            block.append(f"Standard errors: {mt.inline(c.se_method)}.")
        out.append("\n\n".join(block))
    return "\n\n".join(out)


# ---------------------------------------------------------------------------------------------------- power


def _power(runs: tuple[PowerInfo, ...]) -> str:
    if not runs:
        return ""
    out = ["## Power and minimum detectable effect"]
    for p in runs:
        block = [_run_head(p.slug, p.created_text, "planned 2SLS design")]
        if p.note:
            out.append("\n\n".join([*block, mt.inline(p.note) + "."]))
            continue
        rows = [
            ["Observations", str(p.n) if p.n is not None else "–"],
            ["Standard error of 2SLS", fmt(p.se)],
            [f"Minimum detectable effect ({_pct(p.target_power)} power, level {fmt(p.alpha)})", fmt(p.mde)],
            ["Expected first-stage F", fmt(p.expected_f, 3)],
        ]
        if p.effect is not None:
            rows.append([f"Power at an effect of {fmt(p.effect)}", fmt(p.power, 3)])
            rows.append(
                [f"Observations for {_pct(p.target_power)} power", str(p.n_required) if p.n_required else "–"]
            )
        block.append(mt.table(["Quantity", "Value"], rows, "lr"))
        if p.reliability:
            block.append("**How far to trust the analytic figure.** " + mt.inline(p.reliability))
        if p.assumptions:
            block.append("Assumptions:\n\n" + "\n".join(f"- {mt.inline(a)}" for a in p.assumptions))
        out.append("\n\n".join(block))
    return "\n\n".join(out)
