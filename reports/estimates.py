"""The estimates part of the dossier: OLS beside IV runs, then the latest run's first stage, reduced form,
instrument strength, weak-instrument-robust sets, over-identification and endogeneity tests, and plots.

A section the run does not report is left out; a section the estimation marked not applicable gives its reason.
"""

from __future__ import annotations

import math
import sys
from typing import TYPE_CHECKING, Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.inputs import DossierInput, RunInfo
from ivdossier.vocabulary import NotApplicable

if TYPE_CHECKING:  # the result types load scipy: a dossier without runs never needs them
    from ivdossier.estimation.diagnostics import DiagnosticSuite
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.estimation.robust_inference import AndersonRubin, CLRResult, TFResult
    from ivdossier.estimation.strength import StrengthSection


def _is(value: Any, module: str, *names: str) -> bool:
    """isinstance against result classes of ``ivdossier.estimation.<module>``, without importing it: when the
    module is not loaded, no object of its classes can exist."""
    loaded = sys.modules.get(f"ivdossier.estimation.{module}")
    return loaded is not None and isinstance(value, tuple(getattr(loaded, n) for n in names))


LEGACY_RUN = (
    "stored by ivdossier 0.1 before runs kept a typed result; its numbers are left out here (rerun it to show "
    "them, or read them with `ivdossier run show`)"
)


def estimates_markdown(inp: DossierInput, run: RunInfo | None) -> str:
    """The estimates section for `run` (the latest run with diagnostics), or empty text without runs."""
    if not inp.runs or run is None:
        return ""
    out = ["## Estimates and diagnostics", _runs_overview(inp)]
    res = run.result
    if res is None:
        note = f"### Run {mt.inline(run.slug)} in detail\n\nRun {mt.inline(run.slug)} was {LEGACY_RUN}."
        out.extend(d for d in (note, _plots(inp, run)) if d)
        return "\n\n".join(out)
    suite = res.diagnostics
    detail = [
        _first_stage(suite),
        _reduced_form(suite),
        _strength(suite),
        _robust_inference(inp, run, res),
        _tests(suite, "overid", "Over-identification", _OVERID_NOTE),
        _tests(suite, "endogeneity", "Endogeneity of the treatment", _ENDOG_NOTE),
        _plots(inp, run),
    ]
    detail = [d for d in detail if d]
    if detail:
        meta = [f"method {mt.inline(rv.method_label(run.method))}"]
        if run.vcov:
            meta.append(f"covariance {mt.inline(run.vcov)}")
        for value, label in ((res.n, "observations"), (res.n_dropped, "incomplete rows left out")):
            if value:
                meta.append(f"{label} {rv.fmt(value, 12)}")
        if res.n_clusters:
            meta.append("clusters " + " × ".join(rv.fmt(v, 12) for v in res.n_clusters))
        out.append(f"### Run {mt.inline(run.slug)} in detail\n\n" + "; ".join(meta) + ".")
        out.extend(detail)
    return "\n\n".join(out)


def _stat(value: float | None, digits: int = 4) -> str:
    """A statistic, or a dash when the run has none (absent or not a number)."""
    return "–" if value is None or math.isnan(value) else rv.fmt(value, digits)


def _level_text(res: EstimationResult) -> str:
    return f"{rv.fmt(100 * (1 - res.alpha), 3)} %" if 0 < res.alpha < 1 else ""


def treatment_of(res: EstimationResult, fallback: str = "") -> str:
    """The coefficient name of the treatment: the spec's treatment, the program's, or the first regressor."""
    stated = res.spec.get("treatment")
    first = stated[0] if isinstance(stated, list | tuple) and stated else stated
    for name in (first, fallback):
        if isinstance(name, str) and name in res.names:
            return name
    return res.names[0]


def wald_interval(res: EstimationResult, name: str) -> list[rv.Interval]:
    """The conventional (1 - alpha) interval of one coefficient, as a one-piece set."""
    low, high = res.ci[res.names.index(name)]
    return [(float(low), float(high))]


def suite_of(res: EstimationResult | None) -> DiagnosticSuite | None:
    """The run's diagnostics when they were computed (None for OLS, failures and old runs)."""
    return (
        res.diagnostics
        if res is not None and _is(res.diagnostics, "diagnostics", "DiagnosticSuite")
        else None
    )


def section_of(suite: DiagnosticSuite | None, name: str) -> Any:
    """One section of the suite, or None when the suite or that section was not computed."""
    node = getattr(suite, name, None) if suite is not None else None
    return None if isinstance(node, NotApplicable) else node


def section_reason(suite: DiagnosticSuite | None, name: str) -> str | None:
    """Why a section of a computed suite is absent (None when it is present or there is no suite)."""
    node = getattr(suite, name, None) if suite is not None else None
    return node.reason if isinstance(node, NotApplicable) else None


def effective_f_of(res: EstimationResult | None) -> tuple[float | None, dict[int, float]]:
    """The effective F and its critical values keyed by whole-percent tau (None when not computed)."""
    strength = section_of(suite_of(res), "strength")
    eff = strength.effective_f if strength is not None else None
    if eff is None or math.isnan(eff.statistic):
        return None, {}
    cvs = {round(t * 100): c for t, c in eff.critical_values.items() if not math.isnan(c)}
    return eff.statistic, dict(sorted(cvs.items()))


def ar_set_of(res: EstimationResult | None) -> list[rv.Interval] | None:
    """The Anderson–Rubin confidence set (None when not computed or not available)."""
    robust = section_of(suite_of(res), "weak_iv_robust")
    if robust is None or robust.anderson_rubin.intervals is None:
        return None
    return [(float(lo), float(hi)) for lo, hi in robust.anderson_rubin.intervals]


def _runs_overview(inp: DossierInput) -> str:
    rows = []
    levels = set()
    legacy = []
    for run in sorted(inp.runs, key=lambda r: (r.created_text, r.slug)):
        res = run.result
        label = mt.cell(rv.method_label(run.method) + (f" · {run.vcov}" if run.vcov else ""))
        if res is None:
            legacy.append(mt.inline(run.slug))
            rows.append([mt.cell(run.slug), label, "–", "–", "–", "–", "–", "–"])
            continue
        name = treatment_of(res, inp.program.treatment)
        levels.add(_level_text(res))
        feff, _ = effective_f_of(res)
        ar = ar_set_of(res)
        rows.append(
            [
                mt.cell(run.slug),
                label,
                rv.fmt(res.coef_of(name)),
                rv.fmt(res.se_of(name)),
                rv.fmt_set(wald_interval(res, name)),
                rv.fmt(feff) if feff is not None else "–",
                rv.fmt_set(ar) if ar is not None else "–",
                rv.fmt(res.n, 12),
            ]
        )
    title = mt.inline(inp.program.treatment) if inp.program.treatment else "the treatment"
    level = next(iter(levels)) if len(levels) == 1 and "" not in levels else ""
    sets = f" Intervals and Anderson–Rubin (AR) sets are at the {level} level." if level else ""
    text = (
        f"### Effect of {title} across runs\n\n"
        "Ordinary least squares rows sit beside the instrumental-variable rows, so the gap between them shows."
        + sets
        + "\n\n"
        + mt.table(
            [
                "Run",
                "Method · covariance",
                "Estimate",
                "s.e.",
                "Wald interval",
                "Effective F",
                "AR set",
                "n",
            ],
            rows,
            "llrrrrrr",
        )
    )
    if legacy:
        text += f"\n\nRun(s) {', '.join(legacy)} were {LEGACY_RUN}."
    return text


def _coef_with_se(value: float, se: float | None) -> str:
    text = rv.fmt(value)
    return f"{text} ({rv.fmt(se)})" if se is not None and not math.isnan(se) else text


def _first_stage(suite: Any) -> str:
    if not _is(suite, "diagnostics", "DiagnosticSuite"):
        return ""
    reason = section_reason(suite, "first_stage")
    if reason is not None:
        return f"#### First stage (treatment on instruments)\n\nNot computed: {mt.inline(reason)}."
    if not suite.first_stage.rows:
        return ""
    rows = []
    for entry in suite.first_stage.rows:
        stats = [_stat(entry.partial_f), _stat(entry.robust_f), _stat(entry.partial_r2, 3)]
        if entry.coefficients:
            for i, (inst, value) in enumerate(entry.coefficients.items()):
                lead = [
                    mt.cell(entry.endog) if i == 0 else "",
                    mt.cell(inst),
                    _coef_with_se(value, entry.std_errors.get(inst)),
                ]
                rows.append(lead + (stats if i == 0 else ["", "", ""]))
        else:
            rows.append([mt.cell(entry.endog), "–", "–", *stats])
    return (
        "#### First stage (treatment on instruments)\n\n"
        + mt.table(
            ["Treatment", "Instrument", "Coefficient (s.e.)", "Partial F", "Robust F", "Partial R²"],
            rows,
            "llrrrr",
        )
        + "\n\nPartial F uses homoskedastic errors; robust F uses the run's covariance."
    )


def _reduced_form(suite: Any) -> str:
    if not _is(suite, "diagnostics", "DiagnosticSuite"):
        return ""
    reason = section_reason(suite, "reduced_form")
    if reason is not None:
        return f"#### Reduced form (outcome on instruments)\n\nNot computed: {mt.inline(reason)}."
    red = suite.reduced_form
    rows = [
        [mt.cell(inst), _coef_with_se(value, red.std_errors.get(inst))]
        for inst, value in red.coefficients.items()
    ]
    if not rows:
        return ""
    text = "#### Reduced form (outcome on instruments)\n\n" + mt.table(
        ["Instrument", "Coefficient (s.e.)"], rows, "lr"
    )
    if not math.isnan(red.wald_f):
        text += (
            f"\n\nJoint test that every reduced-form coefficient is zero: F = {rv.fmt(red.wald_f)}, "
            f"{rv.p_clause(None if math.isnan(red.p_value) else red.p_value)}. "
            "With valid instruments this is also a weak-instrument-robust test of no effect."
        )
    return text


def _stock_yogo_rows(strength: StrengthSection) -> list[list[str]]:
    rows = []
    for entry in strength.stock_yogo:
        if entry.critical_value is None or math.isnan(entry.critical_value):
            continue
        level = entry.level * 100 if entry.level < 1 else entry.level
        criterion = entry.criterion.replace("_", " ")
        rows.append(
            [
                mt.cell(rv.method_label(entry.estimator)),
                mt.cell(f"{criterion} at most {rv.fmt(level, 3)} %"),
                rv.fmt(entry.critical_value),
            ]
        )
    return rows


def _strength(suite: Any) -> str:
    if not _is(suite, "diagnostics", "DiagnosticSuite"):
        return ""
    reason = section_reason(suite, "strength")
    if reason is not None:
        return f"#### Instrument strength\n\nNot computed: {mt.inline(reason)}."
    strength = suite.strength
    rows = []
    sentences = []
    skipped = []
    eff = strength.effective_f
    if eff is not None and not math.isnan(eff.statistic):
        feff = eff.statistic
        cvs = dict(sorted((round(t * 100), c) for t, c in eff.critical_values.items() if not math.isnan(c)))
        cv_text = "; ".join(f"τ = {tau} %: {rv.fmt(v)}" for tau, v in cvs.items()) or "–"
        rows.append(["Effective F (Montiel Olea–Pflueger)", rv.fmt(feff), cv_text])
        passed = [tau for tau, v in cvs.items() if feff >= v]
        if cvs and passed:
            sentences.append(
                f"The effective F of {rv.fmt(feff)} exceeds the critical value for τ = {min(passed)} %: at the "
                f"5 % level the data reject that the estimator's approximate bias is more than {min(passed)} % "
                "of a worst-case benchmark, so the instruments are not weak in that sense."
            )
        elif cvs:
            sentences.append(
                f"The effective F of {rv.fmt(feff)} is below every listed critical value: the instruments may be "
                "weak, so the conventional interval can mislead — lean on the weak-instrument-robust sets."
            )
    elif strength.effective_f_reason:
        skipped.append(f"effective F — {mt.inline(strength.effective_f_reason)}")
    if strength.kp_rk is not None and not math.isnan(strength.kp_rk.f_form):
        rows.append(["Kleibergen–Paap rk Wald F", rv.fmt(strength.kp_rk.f_form), "–"])
    elif strength.reasons.get("kp_rk"):
        skipped.append(f"Kleibergen–Paap rk Wald F — {mt.inline(strength.reasons['kp_rk'])}")
    if strength.cragg_donald_f is not None and not math.isnan(strength.cragg_donald_f):
        rows.append(["Cragg–Donald F", rv.fmt(strength.cragg_donald_f), "–"])
    elif strength.reasons.get("cragg_donald_f"):
        skipped.append(f"Cragg–Donald F — {mt.inline(strength.reasons['cragg_donald_f'])}")
    label = "Sanderson–Windmeijer F"
    if strength.sanderson_windmeijer_f is not None:
        for endog, value in strength.sanderson_windmeijer_f.items():
            if not math.isnan(value):
                rows.append([f"{label}, {mt.inline(endog)}", rv.fmt(value), "–"])
    elif strength.sanderson_windmeijer_reason:
        skipped.append(f"{label} — {mt.inline(strength.sanderson_windmeijer_reason)}")
    sy_rows = _stock_yogo_rows(strength)
    if not rows and not sy_rows:
        return ""
    if sy_rows:
        rows = [[r[0], r[1], "Stock–Yogo, below"] if r[0] == "Cragg–Donald F" else r for r in rows]
    text = "#### Instrument strength\n\n"
    if rows:
        text += mt.table(["Statistic", "Value", "Critical values (5 % test)"], rows, "lrl")
    if sy_rows:
        text += "\n\nStock–Yogo critical values for these dimensions, to compare with the Cragg–Donald F:\n\n"
        text += mt.table(["Estimator", "Weak if", "Critical value"], sy_rows, "llr")
    sentences.append(
        "Cragg–Donald assumes homoskedastic errors; Kleibergen–Paap and the effective F allow for the run's "
        "covariance. Stock–Yogo values were derived for homoskedastic errors, so holding a robust statistic "
        "against them is only indicative (common practice)."
    )
    text += "\n\n" + " ".join(sentences)
    if skipped:
        text += "\n\nNot computed: " + "; ".join(skipped) + "."
    return text


def _p(value: float | None) -> str:
    return rv.fmt_p(None if value is None or math.isnan(value) else value)


def _robust_inference(inp: DossierInput, run: RunInfo, res: EstimationResult) -> str:
    rows = [
        [
            "Conventional Wald interval",
            rv.fmt_set(wald_interval(res, treatment_of(res, inp.program.treatment))),
            "–",
            "–",
        ]
    ]
    suite = suite_of(res)
    if suite is None:
        return ""
    reason = section_reason(suite, "weak_iv_robust")
    if reason is not None:
        return (
            "#### Intervals that stay honest when instruments are weak\n\n"
            + mt.table(["Procedure", "Set for the effect", "Statistic", "p-value (no effect)"], rows, "llrr")
            + f"\n\nNot computed: Anderson–Rubin, CLR and tF — {mt.inline(reason)}."
        )
    skipped = []
    procedures: tuple[tuple[str, AndersonRubin | CLRResult | TFResult], ...] = (
        ("Anderson–Rubin", suite.weak_iv_robust.anderson_rubin),
        ("Conditional likelihood ratio (CLR)", suite.weak_iv_robust.clr),
        ("tF", suite.weak_iv_robust.tf),
    )
    for label, node in procedures:
        if _is(node, "robust_inference", "TFResult", "CLRResult") and not node.applicable:
            if node.reason:
                skipped.append(f"{label} — {mt.inline(node.reason)}")
            continue
        if _is(node, "robust_inference", "TFResult"):
            sets = None if node.interval is None else [(float(node.interval[0]), float(node.interval[1]))]
            cv = node.critical_value
            stat = f"critical value {rv.fmt(cv)}" if cv is not None and not math.isnan(cv) else "–"
            rows.append([label, rv.fmt_set(sets), stat, "–"])
        else:
            sets = None if node.intervals is None else [(float(lo), float(hi)) for lo, hi in node.intervals]
            rows.append([label, rv.fmt_set(sets), _stat(node.statistic), _p(node.p_value)])
    if len(rows) < 2:
        return ""
    level = _level_text(res)
    text = (
        "#### Intervals that stay honest when instruments are weak\n\n"
        + mt.table(
            [
                "Procedure",
                f"Set for the effect ({level})" if level else "Set for the effect",
                "Statistic",
                "p-value (no effect)",
            ],
            rows,
            "llrr",
        )
        + "\n\nThe Anderson–Rubin and CLR sets keep their coverage however weak the instruments are; tF widens "
        "the t-test's critical value according to the first-stage F. When these sets are much wider than the "
        "conventional interval, or unbounded, the conventional interval overstates what the data say."
    )
    if skipped:
        text += "\n\nNot computed: " + "; ".join(skipped) + "."
    return text


_OVERID_NOTE = (
    "A rejection says the instruments disagree about the effect, so at least one is invalid or effects differ "
    "across compliers; a non-rejection does not show that any instrument is valid."
)
_ENDOG_NOTE = (
    "This compares the instrumental-variable estimate with ordinary least squares. It presumes the instruments "
    "are valid and says nothing about whether they are."
)


def _tests(suite: Any, key: str, title: str, note: str) -> str:
    if isinstance(suite, NotApplicable):
        return f"#### {title}\n\nNot computed: {mt.inline(suite.reason)}."
    if not _is(suite, "diagnostics", "DiagnosticSuite"):
        return ""
    reason = section_reason(suite, key)
    if reason is not None:
        return f"#### {title}\n\nNot computed: {mt.inline(reason)}."
    node: Any = getattr(suite, key)
    if node.statistic is None or math.isnan(node.statistic):
        reason = getattr(node, "reason", None)
        return f"#### {title}\n\nNot computed: {mt.inline(reason)}." if reason else ""
    label = node.test if _is(node, "specification", "OverId") else "durbin_wu_hausman_control_function"
    row = [
        mt.cell(_pretty(str(label or key))),
        rv.fmt(node.statistic),
        rv.fmt(node.df) if node.df is not None else "–",
        _p(node.p_value),
    ]
    return (
        f"#### {title}\n\n" + mt.table(["Test", "Statistic", "df", "p-value"], [row], "lrrr") + "\n\n" + note
    )


_PRETTY = {
    "hansen_j": "Hansen J",
    "sargan": "Sargan",
    "basmann": "Basmann",
    "durbin": "Durbin",
    "wu_hausman": "Wu–Hausman",
    "dwh": "Durbin–Wu–Hausman",
    "durbin_wu_hausman": "Durbin–Wu–Hausman",
    "durbin_wu_hausman_control_function": "Durbin–Wu–Hausman (control function)",
    "robust_score": "Robust score",
    "control_function": "Control function",
}


def _pretty(label: str) -> str:
    return _PRETTY.get(label.lower(), label.replace("_", " "))


def _plots(inp: DossierInput, run: RunInfo) -> str:
    out = []
    if run.first_stage_bins is not None:
        out.append(
            mt.figure(
                "first-stage",
                "First stage: binned means of the treatment against the instrument, "
                "with the least-squares line through them.",
            )
        )
    if run.ar_curve is not None:
        out.append(
            mt.figure(
                "ar-curve",
                "Anderson–Rubin statistic against the hypothesised effect; effects "
                "below the dashed critical value form the confidence set (shaded).",
            )
        )
    return "#### Plots\n\n" + "\n\n".join(out) if out else ""
