"""The per-instrument dossier as Markdown: the argument beside the numbers, then where everything came from.

Order: header and at-a-glance summary; the argument condition by condition with the threats that attack it; the
causal diagram; estimates and diagnostics; provenance; cautions. A section without input is left out entirely.
All user-written text goes through `mdtext` escaping.
"""

from __future__ import annotations

import json
import math
import re
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.inputs import CONDITIONS, DossierInput, LinkInfo, RunInfo
from ivdossier.reports.verdicts import Verdict, derive_verdicts, graph_status, latest_run

STATE_ORDER = {"fatal": 0, "open": 1, "accepted": 2, "mitigated": 3, "rebutted": 4}
AUDIT_RECENT = 25
CONDITION_TITLES = {
    "relevance": "Relevance — the instrument moves the treatment",
    "exclusion": "Exclusion — the instrument reaches the outcome only through the treatment",
    "exogeneity": "Exogeneity — the instrument shares no cause with the outcome",
    "monotonicity": "Monotonicity — nobody is pushed the opposite way",
}
CAUTIONS = (
    "**Statistics cannot establish exclusion or exogeneity.** Over-identification and endogeneity tests compare "
    "the instruments with one another or with ordinary least squares; every instrument can be invalid in the same "
    "direction and pass them all. These two conditions rest on the argument and the causal diagram above.",
    "**A strong first stage does not make an instrument valid.** Strength guards against weak-instrument bias "
    "and misleading intervals; an instrument can move the treatment a great deal and still reach the outcome "
    "by another path.",
    "**Conclusions for policy or clinical use need domain review.** This dossier organises the team's own "
    "claims, threat reviews and estimates. Before any result informs a policy or clinical decision, people who "
    "know the setting should review the argument and the data.",
    "**Verdicts are derived, not measured.** They follow fixed, published rules from the inputs shown here "
    "(the rule table lives in `ivdossier.reports.verdicts`); they summarise the record and can be no better than it.",
)


def dossier_markdown(inp: DossierInput) -> str:
    """Render the dossier for one instrument as Markdown (deterministic for equal inputs)."""
    verdicts = derive_verdicts(inp)
    run = latest_run(inp.runs)
    parts = [
        _header(inp),
        _summary(inp, verdicts, run),
        _argument(inp, verdicts),
        _diagram(inp),
        _estimation(inp, run),
        _provenance(inp),
        _cautions(),
    ]
    return "\n\n".join(p for p in parts if p).rstrip() + "\n"


def dossier_figures(inp: DossierInput) -> dict[str, str]:
    """The SVG for every figure the Markdown refers to (plots rendered here, the diagram as given)."""
    from ivdossier.reports import plots

    run = latest_run(inp.runs)
    out: dict[str, str] = {}
    for key, kind in figure_keys(inp).items():
        if kind == "diagram" and inp.graph is not None:
            out[key] = inp.graph.svg
        elif kind == "first-stage" and run is not None and run.first_stage_bins is not None:
            out[key] = plots.first_stage_svg(run.first_stage_bins, key=key)
        elif kind == "ar-curve" and run is not None and run.ar_curve is not None:
            ar = rv.intervals(rv.section(run.results, "weak_iv_robust", "anderson_rubin"))
            out[key] = plots.ar_curve_svg(run.ar_curve, ar_set=ar, key=key)
    return out


def dossier_html(inp: DossierInput, *, preamble: str = "") -> str:
    """The dossier as one self-contained HTML page; `preamble` is trusted Markdown placed first (site navigation)."""
    from ivdossier.reports.html import render_html

    markdown = dossier_markdown(inp)
    if preamble:
        markdown = preamble.rstrip() + "\n\n" + markdown
    title = f"Dossier: {inp.instrument.name or inp.instrument.slug}"
    return render_html(markdown, title=title, svgs=dossier_figures(inp))


def figure_keys(inp: DossierInput) -> dict[str, str]:
    """Which figures the Markdown refers to: key -> kind ("diagram", "first-stage", "ar-curve")."""
    keys: dict[str, str] = {}
    if inp.graph is not None and inp.graph.svg.strip():
        keys["causal-diagram"] = "diagram"
    run = latest_run(inp.runs)
    if run is not None and run.first_stage_bins is not None:
        keys["first-stage"] = "first-stage"
    if run is not None and run.ar_curve is not None:
        keys["ar-curve"] = "ar-curve"
    return keys


def treatment_name(run: RunInfo, fallback: str = "") -> str | None:
    """The coefficient name of the treatment in a run: spec treatment/endogenous, the program's, or the first."""
    coef = run.results.get("coef")
    names = list(coef) if isinstance(coef, Mapping) else []
    candidates: list[str] = []
    specs = [run.spec, run.results.get("spec") if isinstance(run.results.get("spec"), Mapping) else {}]
    for key, spec in ((k, sp) for sp in specs for k in ("treatment", "endogenous", "endog")):
        value = spec.get(key)
        if isinstance(value, str):
            candidates.append(value)
        elif isinstance(value, Sequence) and value and isinstance(value[0], str):
            candidates.append(value[0])
    if fallback:
        candidates.append(fallback)
    for name in candidates:
        if name in names:
            return name
    return names[0] if names else None


# ----------------------------------------------------------------------------------------------- header


def _header(inp: DossierInput) -> str:
    ins, prog = inp.instrument, inp.program
    facts = [f"Candidate instrument for **{mt.inline(prog.title or prog.slug)}**"]
    if ins.family:
        facts.append(f"family: {mt.inline(ins.family)}")
    if ins.columns:
        facts.append("data column" + ("s" if len(ins.columns) > 1 else "") + ": " + _join(ins.columns))
    if ins.state:
        facts.append(f"lifecycle state: **{mt.inline(ins.state)}**")
    lines = [f"# Instrument dossier: {mt.inline(ins.name or ins.slug)}", " · ".join(facts) + "."]
    question = [
        (label, value)
        for label, value in (
            ("Question", prog.question),
            ("Treatment", prog.treatment),
            ("Outcome", prog.outcome),
            ("Unit", prog.unit),
            ("Population", prog.population),
        )
        if value
    ]
    if question:
        lines.append("\n".join(f"- **{label}:** {mt.inline(value)}" for label, value in question))
    lines.append(
        f"*Generated {mt.inline(inp.generated_text)} by ivdossier {mt.inline(inp.tool_version)} "
        f"from the record as it stood then.*"
    )
    return "\n\n".join(lines)


def _join(items: Sequence[Any]) -> str:
    return ", ".join(mt.inline(i) for i in items)


# ---------------------------------------------------------------------------------------------- summary


def _summary(inp: DossierInput, verdicts: Mapping[str, Verdict], run: RunInfo | None) -> str:
    rows = [[c.capitalize(), mt.badge(v.status), mt.cell(v.reason), v.rule] for c, v in verdicts.items()]
    out = [
        "## At a glance",
        mt.table(["Condition", "Verdict", "Why", "Rule"], rows, "lllc"),
        "Verdict shapes: filled circle with a tick = holds; triangle with an exclamation mark = at risk; "
        "square with a cross = broken; dashed ring = not assessed. Rules are listed in "
        "`ivdossier.reports.verdicts`.",
    ]
    if run is not None:
        key = _run_key_numbers(inp, run)
        if key:
            out.append(key)
    counts = Counter(link.state for link in inp.links)
    if counts:
        text = ", ".join(f"{counts[s]} {s}" for s in STATE_ORDER if counts[s])
        out.append(f"Linked threats: {len(inp.links)} ({text}). Estimation runs: {len(inp.runs)}.")
    return "\n\n".join(out)


def _run_key_numbers(inp: DossierInput, run: RunInfo) -> str:
    name = treatment_name(run, inp.program.treatment)
    pieces = []
    if name is not None:
        est = rv.num(_get(run.results, "coef", name))
        se = rv.num(_get(run.results, "se", name))
        if est is not None:
            pieces.append(
                f"estimate {rv.fmt(est)}" + (f" (standard error {rv.fmt(se)})" if se is not None else "")
            )
    feff, _ = rv.effective_f(run.results)
    if feff is not None:
        pieces.append(f"effective F {rv.fmt(feff)}")
    ar = rv.intervals(rv.section(run.results, "weak_iv_robust", "anderson_rubin"))
    if ar is not None:
        pieces.append(f"Anderson–Rubin set {rv.fmt_set(ar)}")
    if not pieces:
        return ""
    label = mt.inline(rv.method_label(run.method)) + (f", {mt.inline(run.vcov)}" if run.vcov else "")
    return f"Latest run **{mt.inline(run.slug)}** ({label}): " + "; ".join(pieces) + "."


def _get(mapping: Mapping[str, Any], *keys: str) -> Any:
    node: Any = mapping
    for key in keys:
        if not isinstance(node, Mapping):
            return None
        node = node.get(key)
    return node


# --------------------------------------------------------------------------------------------- argument


def _argument(inp: DossierInput, verdicts: Mapping[str, Verdict]) -> str:
    blocks = []
    for condition in CONDITIONS:
        claim = inp.instrument.claims.get(condition, "")
        links = sorted(
            (link for link in inp.links if link.condition == condition),
            key=lambda lk: (STATE_ORDER[lk.state], -(lk.mean_severity or 0.0), lk.threat_code),
        )
        if not claim.strip() and not links:
            continue
        part = [f"### {CONDITION_TITLES[condition]}", f"Verdict: {mt.badge(verdicts[condition].status)}"]
        if claim.strip():
            part.append("**The team's claim.**\n\n" + mt.block(claim))
        if links:
            counts = Counter(link.state for link in links)
            text = ", ".join(f"{counts[s]} {s}" for s in STATE_ORDER if counts[s])
            part.append(f"**Threats attacking {condition}** — {len(links)} linked ({text}).")
            part.extend(_link_block(link) for link in links)
        blocks.append("\n\n".join(part))
    if not blocks:
        return ""
    return "## The argument, condition by condition\n\n" + "\n\n".join(blocks)


def _link_block(link: LinkInfo) -> str:
    head = f"#### {mt.inline(link.threat_code)} · {mt.inline(link.title)}"
    facts = [f"State {mt.chip(link.state)}"]
    if link.ratings:
        lik, sev = link.mean_likelihood, link.mean_severity
        facts.append(f"{len(link.ratings)} rating{'s' if len(link.ratings) > 1 else ''}")
        facts.append(f"team mean likelihood {rv.fmt(lik, 2)}, severity {rv.fmt(sev, 2)} (scale 1–5)")
        facts.append(_disagreement(link))
    else:
        facts.append("not yet rated")
    out = [head, " · ".join(facts) + "."]
    if link.argument.strip():
        out.append("**Argument.** " + mt.block(link.argument))
    if link.evidence.strip():
        out.append("**Evidence.** " + mt.block(link.evidence))
    if link.checks:
        items = [
            f"- {mt.inline(c.name)}" + (f": {mt.inline(c.finding)}" if c.finding.strip() else "")
            for c in link.checks
        ]
        out.append("**Checks that speak to it:**\n\n" + "\n".join(items))
    if link.ratings:
        rows = [
            [mt.cell(r.reviewer), str(r.likelihood), str(r.severity), mt.cell(r.comment)]
            for r in link.ratings
        ]
        out.append(mt.table(["Reviewer", "Likelihood", "Severity", "Comment"], rows, "lrrl"))
    return "\n\n".join(out)


def _disagreement(link: LinkInfo) -> str:
    sev = [r.severity for r in link.ratings]
    lik = [r.likelihood for r in link.ratings]
    spread = max(max(sev) - min(sev), max(lik) - min(lik))
    if len(link.ratings) < 2:
        return "disagreement: one reviewer only"
    word = "low" if spread <= 1 else ("marked" if spread == 2 else "high")
    return f"disagreement {word} (severity {min(sev)}–{max(sev)}, likelihood {min(lik)}–{max(lik)})"


# ---------------------------------------------------------------------------------------------- diagram


def _diagram(inp: DossierInput) -> str:
    if inp.graph is None:
        return ""
    out = ["## Causal diagram"]
    if inp.graph.svg.strip():
        out.append(
            mt.figure(
                "causal-diagram",
                f"The team's causal diagram for {inp.instrument.name or 'the instrument'}, "
                "with the paths that linked threats add.",
            )
        )
    rows = []
    for condition in CONDITIONS[:3]:
        status = graph_status(inp.graph.verdict, condition)
        if status.outcome is None and not status.paths:
            continue
        outcome = {
            "satisfied": "satisfied in the diagram",
            "violated": "violated in the diagram",
            "at risk": "at risk in the diagram",
        }.get(status.outcome or "", "not decided")
        paths = "; ".join(mt.inline(p) for p in status.paths) or "–"
        rows.append([condition.capitalize(), outcome, paths, mt.cell(status.reason)])
    if rows:
        out.append("What the graph check found:")
        out.append(mt.table(["Condition", "In the diagram", "Paths found", "Explanation"], rows))
    return "\n\n".join(out) if len(out) > 1 else ""


# ------------------------------------------------------------------------------------------- estimation


def _estimation(inp: DossierInput, run: RunInfo | None) -> str:
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
    keys = figure_keys(inp)
    out = []
    if "first-stage" in keys:
        out.append(
            mt.figure(
                "first-stage",
                "First stage: binned means of the treatment against the instrument, "
                "with the least-squares line through them.",
            )
        )
    if "ar-curve" in keys:
        out.append(
            mt.figure(
                "ar-curve",
                "Anderson–Rubin statistic against the hypothesised effect; effects "
                "below the dashed critical value form the confidence set (shaded).",
            )
        )
    return "#### Plots\n\n" + "\n\n".join(out) if out else ""


# ------------------------------------------------------------------------------------------- provenance


_SHA = re.compile(r"[0-9a-f]{64}")


def _provenance(inp: DossierInput) -> str:
    out = []
    runs = sorted(inp.runs, key=lambda r: (r.created_text, r.slug))
    if runs:
        rows = [
            [
                mt.cell(r.slug),
                mt.cell(r.created_text),
                mt.cell(r.dataset_path),
                f"`{r.dataset_sha256}`" if _SHA.fullmatch(r.dataset_sha256) else mt.cell(r.dataset_sha256),
                rv.fmt(r.seconds, 3) if r.seconds is not None else "–",
            ]
            for r in runs
        ]
        out.append(
            "### Data and runs\n\n" + mt.table(["Run", "Created", "Dataset", "SHA-256", "Seconds"], rows)
        )
        specs = _spec_tables(runs)
        if specs:
            out.append("### Exact specifications\n\n" + specs)
        versions: dict[str, set[str]] = {}
        for r in runs:
            for pkg, ver in r.package_versions.items():
                versions.setdefault(str(pkg), set()).add(str(ver))
        if versions:
            rows = [[mt.cell(pkg), mt.cell(", ".join(sorted(v)))] for pkg, v in sorted(versions.items())]
            out.append("### Software\n\n" + mt.table(["Package", "Version(s) across runs"], rows))
    if inp.audit:
        out.append(_audit(inp))
    if not out:
        return ""
    return "## Provenance\n\n" + "\n\n".join(out)


def _spec_value(value: Any) -> str:
    if value is None:
        return "(none)"
    if isinstance(value, str):
        return value
    if isinstance(value, Sequence):
        return ", ".join(_spec_value(v) for v in value) or "(none)"
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    try:
        return json.dumps(value, sort_keys=True, default=str)
    except (TypeError, ValueError):
        return str(value)


MAX_DIFFERING_OPTIONS = 6


def _spec_tables(runs: Sequence[RunInfo]) -> str:
    """Options every run shares in one table; options that differ in a second table with one row per run."""
    with_spec = [r for r in runs if r.spec]
    if not with_spec:
        return ""
    keys: list[str] = []
    for run in with_spec:
        keys.extend(str(k) for k in run.spec if str(k) not in keys)
    values = {k: [_spec_value(r.spec.get(k)) if k in r.spec else "–" for r in with_spec] for k in keys}
    shared = [k for k in keys if len(set(values[k])) == 1]
    differing = [k for k in keys if k not in shared]
    if len(differing) > MAX_DIFFERING_OPTIONS:
        blocks = []
        for run in with_spec:
            rows = [[mt.cell(k), mt.cell(_spec_value(v))] for k, v in run.spec.items()]
            blocks.append(f"Run **{mt.inline(run.slug)}**:\n\n" + mt.table(["Option", "Value"], rows))
        return "\n\n".join(blocks)
    parts = []
    if shared:
        label = (
            "Options shared by every run:"
            if len(with_spec) > 1
            else f"Run **{mt.inline(with_spec[0].slug)}**:"
        )
        rows = [[mt.cell(k), mt.cell(values[k][0])] for k in shared]
        parts.append(label + "\n\n" + mt.table(["Option", "Value"], rows))
    if differing:
        rows = [
            [mt.cell(r.slug), *[mt.cell(values[k][i]) for k in differing]] for i, r in enumerate(with_spec)
        ]
        parts.append(
            "Options that differ between runs:\n\n"
            + mt.table(["Run", *[mt.cell(k) for k in differing]], rows)
        )
    return "\n\n".join(parts)


def _audit(inp: DossierInput) -> str:
    events = sorted(inp.audit, key=lambda e: (e.when_text, e.actor, e.action))
    by_actor: dict[str, Counter[str]] = {}
    first: dict[str, str] = {}
    last: dict[str, str] = {}
    for e in events:
        by_actor.setdefault(e.actor, Counter())[e.action] += 1
        first.setdefault(e.actor, e.when_text)
        last[e.actor] = e.when_text
    rows = [
        [
            mt.cell(actor),
            mt.cell(", ".join(f"{action} ×{n}" for action, n in sorted(counts.items()))),
            mt.cell(first[actor]),
            mt.cell(last[actor]),
        ]
        for actor, counts in sorted(by_actor.items())
    ]
    text = "### Who did what\n\n" + mt.table(["Who", "Actions", "First", "Last"], rows)
    recent = events[-AUDIT_RECENT:]
    heading = (
        "All events"
        if len(recent) == len(events)
        else f"The {len(recent)} most recent of {len(events)} events"
    )
    rows = [
        [mt.cell(e.when_text), mt.cell(e.actor), mt.cell(e.action), mt.cell(e.entity), mt.cell(e.summary)]
        for e in reversed(recent)
    ]
    return text + f"\n\n{heading}:\n\n" + mt.table(["When", "Who", "Action", "Entity", "Summary"], rows)


def _cautions() -> str:
    return "## What this dossier cannot tell you\n\n" + "\n\n".join(CAUTIONS)
