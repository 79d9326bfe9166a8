"""The estimates part of the dossier: OLS beside IV runs, then the latest run's first stage, reduced form,
instrument strength, weak-instrument-robust sets, over-identification and endogeneity tests, and plots.

A section the run does not report is left out; a section the estimation marked not applicable gives its reason.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.inputs import DossierInput, RunInfo
from ivdossier.reports.resultview import get as _get
from ivdossier.reports.resultview import treatment_name


def estimates_markdown(inp: DossierInput, run: RunInfo | None) -> str:
    """The estimates section for `run` (the latest run with diagnostics), or empty text without runs."""
    if not inp.runs or run is None:
        return ""
    out = ["## Estimates and diagnostics", _runs_overview(inp)]
    res = run.results
    detail = [
        _first_stage(res),
        _reduced_form(res),
        _strength(res),
        _robust_inference(inp, run),
        _tests(res, "overid", "Over-identification", _OVERID_NOTE),
        _tests(res, "endogeneity", "Endogeneity of the treatment", _ENDOG_NOTE),
        _plots(inp, run),
    ]
    detail = [d for d in detail if d]
    if detail:
        meta = [f"method {mt.inline(rv.method_label(run.method))}"]
        if run.vcov:
            meta.append(f"covariance {mt.inline(run.vcov)}")
        for key, label in (("n", "observations"), ("n_dropped", "incomplete rows left out")):
            if rv.num(res.get(key)):
                meta.append(f"{label} {rv.fmt(res.get(key), 12)}")
        clusters = _clusters(res)
        if clusters:
            meta.append(f"clusters {clusters}")
        out.append(f"### Run {mt.inline(run.slug)} in detail\n\n" + "; ".join(meta) + ".")
        out.extend(detail)
    return "\n\n".join(out)


def _clusters(res: Mapping[str, Any]) -> str:
    raw = res.get("n_clusters")
    values = raw if isinstance(raw, Sequence) and not isinstance(raw, str) else [raw]
    nums = [rv.num(v) for v in values]
    return " × ".join(rv.fmt(v, 12) for v in nums if v is not None)


def _level_text(res: Mapping[str, Any]) -> str:
    alpha = rv.num(res.get("alpha"))
    return f"{rv.fmt(100 * (1 - alpha), 3)} %" if alpha is not None and 0 < alpha < 1 else ""


def _runs_overview(inp: DossierInput) -> str:
    rows = []
    levels = set()
    for run in sorted(inp.runs, key=lambda r: (r.created_text, r.slug)):
        name = treatment_name(run, inp.program.treatment)
        res = run.results
        levels.add(_level_text(res))
        est = rv.num(_get(res, "coef", name)) if name else None
        se = rv.num(_get(res, "se", name)) if name else None
        ci = rv.intervals(_get(res, "ci", name)) if name else None
        ar = rv.intervals(rv.section(res, "weak_iv_robust", "anderson_rubin"))
        feff, _ = rv.effective_f(res)
        rows.append(
            [
                mt.cell(run.slug),
                mt.cell(rv.method_label(run.method) + (f" · {run.vcov}" if run.vcov else "")),
                rv.fmt(est),
                rv.fmt(se),
                rv.fmt_set(ci) if ci else "–",
                rv.fmt(feff) if feff is not None else "–",
                rv.fmt_set(ar) if ar is not None else "–",
                rv.fmt(res.get("n"), 12) if rv.num(res.get("n")) is not None else "–",
            ]
        )
    title = mt.inline(inp.program.treatment) if inp.program.treatment else "the treatment"
    level = next(iter(levels)) if len(levels) == 1 and "" not in levels else ""
    sets = f" Intervals and Anderson–Rubin (AR) sets are at the {level} level." if level else ""
    return (
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


def _coef_with_se(value: Any, se: Any) -> str:
    text = rv.fmt(value)
    se_num = rv.num(value.get("se")) if isinstance(value, Mapping) else rv.num(se)
    return f"{text} ({rv.fmt(se_num)})" if se_num is not None else text


def _ses(entry: Mapping[str, Any]) -> Mapping[str, Any]:
    for key in ("std_errors", "se"):
        if isinstance(entry.get(key), Mapping):
            return entry[key]  # type: ignore[no-any-return]
    return {}


def _first_stage(res: Mapping[str, Any]) -> str:
    entries = rv.first_stage_rows(res)
    if not entries:
        return ""
    rows = []
    for endog, entry in entries.items():
        coefs = entry.get("coefficients", entry.get("coef"))
        ses = _ses(entry)
        stats = [rv.fmt(entry.get(k)) if entry.get(k) is not None else "–" for k in ("partial_f", "robust_f")]
        stats.append(rv.fmt(entry.get("partial_r2"), 3) if entry.get("partial_r2") is not None else "–")
        if isinstance(coefs, Mapping) and coefs:
            for i, (inst, value) in enumerate(coefs.items()):
                lead = [mt.cell(endog) if i == 0 else "", mt.cell(inst), _coef_with_se(value, ses.get(inst))]
                rows.append(lead + (stats if i == 0 else ["", "", ""]))
        else:
            rows.append([mt.cell(endog), "–", "–", *stats])
    return (
        "#### First stage (treatment on instruments)\n\n"
        + mt.table(
            ["Treatment", "Instrument", "Coefficient (s.e.)", "Partial F", "Robust F", "Partial R²"],
            rows,
            "llrrrr",
        )
        + "\n\nPartial F uses homoskedastic errors; robust F uses the run's covariance."
    )


def _reduced_form(res: Mapping[str, Any]) -> str:
    red = rv.section(res, "reduced_form")
    if red is None:
        return ""
    coefs = red.get("coefficients", red.get("coef"))
    ses = _ses(red)
    rows = []
    if isinstance(coefs, Mapping):
        rows = [[mt.cell(inst), _coef_with_se(value, ses.get(inst))] for inst, value in coefs.items()]
    if not rows:
        return ""
    text = "#### Reduced form (outcome on instruments)\n\n" + mt.table(
        ["Instrument", "Coefficient (s.e.)"], rows, "lr"
    )
    wald, p = rv.num(red.get("wald_f")), rv.pvalue(red)
    if wald is not None:
        text += (
            f"\n\nJoint test that every reduced-form coefficient is zero: F = {rv.fmt(wald)}, {rv.p_clause(p)}. "
            "With valid instruments this is also a weak-instrument-robust test of no effect."
        )
    return text


_STRENGTH_ROWS = (
    ("kp_rk_wald_f", "Kleibergen–Paap rk Wald F", "kp_rk_wald_reason"),
    ("cragg_donald_f", "Cragg–Donald F", "cragg_donald_reason"),
    ("sanderson_windmeijer_f", "Sanderson–Windmeijer F", "sanderson_windmeijer_reason"),
)


def _stock_yogo_rows(strength: Mapping[str, Any]) -> list[list[str]]:
    raw = strength.get("stock_yogo")
    if isinstance(raw, Mapping):
        raw = raw.get("values")
    rows = []
    if isinstance(raw, Sequence) and not isinstance(raw, str):
        for entry in raw:
            if not isinstance(entry, Mapping) or rv.num(entry.get("critical_value")) is None:
                continue
            level = rv.num(entry.get("level"))
            level_text = f"{rv.fmt(level * 100 if level is not None and level < 1 else level, 3)} %"
            criterion = str(entry.get("criterion", "")).replace("_", " ")
            rows.append(
                [
                    mt.cell(rv.method_label(str(entry.get("estimator", "")))),
                    mt.cell(f"{criterion} at most {level_text}"),
                    rv.fmt(entry.get("critical_value")),
                ]
            )
    return rows


def _strength(res: Mapping[str, Any]) -> str:
    strength = rv.section(res, "strength")
    if strength is None:
        return ""
    rows = []
    sentences = []
    skipped = []
    feff, cvs = rv.effective_f(res)
    if feff is not None:
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
    elif strength.get("effective_f_reason"):
        skipped.append(f"effective F — {mt.inline(strength['effective_f_reason'])}")
    for key, label, reason_key in _STRENGTH_ROWS:
        value = strength.get(key)
        if isinstance(value, Mapping) and rv.num(value) is None:
            for endog, inner in value.items():
                if rv.num(inner) is not None:
                    rows.append([f"{label}, {mt.inline(endog)}", rv.fmt(inner), "–"])
        elif rv.num(value) is not None:
            rows.append([label, rv.fmt(value), "–"])
        elif strength.get(reason_key):
            skipped.append(f"{label} — {mt.inline(strength[reason_key])}")
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


def _robust_inference(inp: DossierInput, run: RunInfo) -> str:
    res = run.results
    rows = []
    name = treatment_name(run, inp.program.treatment)
    ci = rv.intervals(_get(res, "ci", name)) if name else None
    if ci:
        rows.append(["Conventional Wald interval", rv.fmt_set(ci), "–", "–"])
    labels = (
        ("anderson_rubin", "Anderson–Rubin"),
        ("clr", "Conditional likelihood ratio (CLR)"),
        ("tf", "tF"),
    )
    skipped = []
    for key, label in labels:
        node = rv.section(res, "weak_iv_robust", key)
        if node is None:
            reason = rv.not_applicable_reason(_get(res, "weak_iv_robust", key))
            if reason:
                skipped.append(f"{label} — {mt.inline(reason)}")
            continue
        sets = rv.intervals(node)
        if key == "tf":
            cv = rv.num(node.get("critical_value"))
            stat = f"critical value {rv.fmt(cv)}" if cv is not None else "–"
            rows.append([label, rv.fmt_set(sets), stat, "–"])
        else:
            stat_num = rv.num(node.get("statistic", node.get("stat")))
            stat = rv.fmt(stat_num) if stat_num is not None else "–"
            rows.append([label, rv.fmt_set(sets), stat, rv.fmt_p(rv.pvalue(node))])
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


def _tests(res: Mapping[str, Any], key: str, title: str, note: str) -> str:
    node = rv.section(res, key)
    if node is None:
        reason = rv.section_reason(res, key)
        return f"#### {title}\n\nNot computed: {mt.inline(reason)}." if reason else ""
    items: list[tuple[str, Mapping[str, Any]]] = []
    if "statistic" in node:
        if rv.num(node.get("statistic")) is None:
            reason = node.get("reason")
            return f"#### {title}\n\nNot computed: {mt.inline(reason)}." if reason else ""
        items.append((str(node.get("test", node.get("name", key))), node))
    else:
        for sub, inner in node.items():
            if isinstance(inner, Mapping) and rv.num(inner.get("statistic")) is not None:
                items.append((str(inner.get("test", inner.get("name", sub))), inner))
    if not items:
        return ""
    rows = [
        [
            mt.cell(_pretty(label)),
            rv.fmt(inner.get("statistic")),
            rv.fmt(inner.get("df")) if rv.num(inner.get("df")) is not None else "–",
            rv.fmt_p(rv.pvalue(inner)),
        ]
        for label, inner in items
    ]
    return (
        f"#### {title}\n\n" + mt.table(["Test", "Statistic", "df", "p-value"], rows, "lrrr") + "\n\n" + note
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
