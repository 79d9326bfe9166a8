"""The literature audit as a document: a scope's prior uses of an instrument re-examined from what they reported.

``audit_markdown`` renders a stand-alone document and ``audit_section_markdown`` the same content as one section
for the instrument dossier. Every user- or BibTeX-supplied text goes through ``mdtext`` escaping.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from ivdossier.estimation.audit import VERDICTS, AuditSummary, StudyAudit
from ivdossier.estimation.critical_values import TF_NORMAL_FROM
from ivdossier.reports import mdtext as mt
from ivdossier.reports.inputs import AuditInputs

CAUTIONS = (
    "**Statistics cannot establish exclusion or exogeneity.** A prior use whose significance survives every "
    "re-examination here may still rest on an invalid instrument; the critiques listed are where that argument "
    "happens.",
    "**The numbers are only as good as their transcription.** Every value was entered from the studies by hand "
    "or from a file; check them against the original tables before citing this audit.",
    "**Conclusions for policy or clinical use need domain review.** People who know the setting should review "
    "the studies and the critiques before any result informs a policy or clinical decision.",
)
METHOD_NOTES = (
    "**tF (5 %).** The 2SLS t-ratio is compared with the critical value c(F) of Lee, McCrary, Moreira and Porter "
    f"(2022, Table 3), interpolated in sqrt(F); c(F) = 1.96 only for F at or above {TF_NORMAL_FROM}, and the "
    "interval is the whole line below F = 4. It applies to studies with one instrument and a reported first-stage F.",
    "**Anderson–Rubin (95 % and 99 %).** Inverted from the reported reduced-form and first-stage coefficients and "
    "standard errors. Their covariance is taken as reported when given; otherwise it is the value implied by the "
    "reported 2SLS standard error (delta method), and failing that zero (the independence approximation, flagged). "
    "The reference distribution is F(1, G − 1) with G reported clusters, F(1, n − 2) with n reported, else "
    "chi-square(1).",
    "**The 1 % level.** The project does not carry the 1 % tF critical values, so significance at 1 % is judged by "
    "the Anderson–Rubin 99 % set; a result that loses 5 % significance under tF is counted as not significant "
    "under tF at 1 % too.",
    "**Each procedure keeps its own verdict.** tF and Anderson–Rubin answer different questions, so the audit "
    "reports both (for example “not significant under tF; significant under Anderson–Rubin”). A result "
    "“survives” or is “lost” only when every procedure that applies agrees; otherwise the verdict is "
    "“procedures disagree”.",
    "**Strength.** The reported first-stage F is set against Stock–Yogo (2005) critical values (derived for "
    "homoskedastic errors, so indicative only for robust or cluster F) and against Montiel Olea–Pflueger "
    "effective-F critical values (exact with one instrument).",
)

VARIANT_NOTE = (
    "**Per-variant tables.** When a study's published per-variant summary table is attached, it is re-analysed "
    "with the summary-data estimators of the `variants` command (inverse-variance weighted with multiplicative "
    "random effects, MR-Egger with its intercept, weighted median with a seeded bootstrap SE, Cochran's Q, mean F) "
    "and the reported estimate is set against the IVW interval. These statistics can reveal some pleiotropy; they "
    "cannot show that the variants satisfy exclusion."
)


def _num(value: float | None, digits: int = 4) -> str:
    if value is None:
        return "–"
    if math.isinf(value):
        return "∞" if value > 0 else "−∞"
    return f"{value:.{digits}g}"


def _interval(lo: float, hi: float) -> str:
    return f"[{_num(lo)}, {_num(hi)}]"


def _set_text(intervals: Sequence[tuple[float, float]] | None) -> str:
    if intervals is None:
        return "–"
    if not intervals:
        return "empty"
    return " ∪ ".join(_interval(lo, hi) for lo, hi in intervals)


def _short(a: StudyAudit, level: float) -> str:
    """Compact per-procedure answers for a table cell, e.g. "tF no; AR yes"."""
    names = {"tF": "tF", "Anderson–Rubin": "AR"}
    parts = [
        f"{names[p.procedure]} {'yes' if p.significant else 'no'}"
        for p in a.procedures
        if p.level == level and p.procedure in names and p.significant is not None
    ]
    return "; ".join(parts) or "–"


def _study_row(a: StudyAudit) -> list[str]:
    rep = a.reported
    est = f"{_num(rep.estimate)} ({_num(rep.std_error)})" if rep.estimate is not None else "–"
    f_text = f"{_num(rep.first_stage_f)} ({mt.inline(rep.f_kind)})" if rep.first_stage_f is not None else "–"
    tf = a.tf
    tf_text = (
        f"c = {_num(tf.critical_value)}; {_interval(*tf.interval)}" if tf.applicable and tf.interval else "–"
    )
    ar = a.ar
    ar_text = f"{_set_text(ar.set_95)} ({ar.cov_source})" if ar.applicable else "–"
    return [
        f"{mt.cell(a.citation or a.key)} ({mt.inline(a.key)})",
        est,
        f_text,
        _num(tf.t_ratio, 3) if tf.t_ratio is not None else "–",
        tf_text,
        ar_text,
        f"{a.verdict_5pct} ({_short(a, 0.05)})" if a.procedures else a.verdict_5pct,
        f"{a.verdict_1pct} ({_short(a, 0.01)})" if a.procedures else a.verdict_1pct,
    ]


def _summary_lines(summary: AuditSummary) -> list[str]:
    v5, v1 = summary.verdicts_5pct, summary.verdicts_1pct
    mixed5, mixed1 = v5.get("procedures disagree", 0), v1.get("procedures disagree", 0)
    sig5 = v5["survives"] + v5["lost"] + mixed5 + v5["cannot be re-examined"]
    lines = [
        f"- **Studies in scope:** {summary.n_studies}; with reported statistics: {summary.n_with_statistics}.",
        f"- **5 % level:** {v5['survives']} of {sig5} results reported as significant survive re-examination, "
        f"{v5['lost']} lose significance"
        + (f", for {mixed5} tF and Anderson–Rubin disagree" if mixed5 else "")
        + f" and {v5['cannot be re-examined']} cannot be re-examined; "
        f"{v5['not significant as reported']} were not significant as reported.",
        f"- **1 % level:** {v1['survives']} survive, {v1['lost']} lose significance, "
        + (f"for {mixed1} the procedures disagree, " if mixed1 else "")
        + f"{v1['cannot be re-examined']} cannot be re-examined; {v1['not significant as reported']} were not "
        "significant at 1 % as reported.",
    ]
    sp = summary.estimates
    if sp.n:
        lines.append(
            f"- **Reported estimates ({sp.n}):** median {_num(sp.median)}, quartiles {_num(sp.q1)} to "
            f"{_num(sp.q3)}, range {_num(sp.minimum)} to {_num(sp.maximum)}; {sp.positive} positive, "
            f"{sp.negative} negative."
        )
    return lines


def _body(summary: AuditSummary, inputs: AuditInputs, h: str) -> list[str]:
    parts = ["\n".join(_summary_lines(summary))]
    table = [[f"{v}", str(summary.verdicts_5pct[v]), str(summary.verdicts_1pct[v])] for v in VERDICTS]
    parts.append(mt.table(["Verdict", "5 %", "1 %"], table, "lrr"))
    if summary.top_threats:
        rows = [
            [mt.cell(t.code), mt.cell(t.title), mt.cell(t.condition), str(t.count)]
            for t in summary.top_threats
        ]
        parts.append(
            f"{h}# Threats most often raised\n\n"
            + mt.table(["Code", "Threat", "Condition", "Times"], rows, "lllr")
        )
    if summary.studies:
        headers = [
            "Study",
            "Estimate (SE)",
            "First-stage F",
            "t",
            "tF 95 %",
            "AR 95 % (covariance)",
            "5 % (each procedure)",
            "1 % (each procedure)",
        ]
        rows = [_study_row(a) for a in summary.studies]
        parts.append(f"{h}# Study by study\n\n" + mt.table(headers, rows, "lrrrllll"))
    critiques = {key: crit for key, _, _, crit in inputs.studies}
    details = []
    for a in summary.studies:
        lines = [f"{h}## {mt.inline(a.citation or a.key)}"]
        if a.procedures:
            lines.append(
                f"At 5 %: {mt.inline(a.procedure_text(0.05))}. At 1 %: {mt.inline(a.procedure_text(0.01))}."
            )
        if a.flags:
            lines.append("\n".join(f"- {mt.inline(f)}" for f in a.flags))
        if a.strength.applicable:
            reached = [t.name for t in (*a.strength.stock_yogo, *a.strength.effective) if t.exceeds]
            missed = [t.name for t in (*a.strength.stock_yogo, *a.strength.effective) if t.exceeds is False]
            text = f"First-stage F {_num(a.strength.first_stage_f)}: above {', '.join(reached) or 'none'}"
            text += f"; below {', '.join(missed)}." if missed else "."
            notes = [n for n in (a.strength.stock_yogo_note, a.strength.effective_note) if n]
            lines.append(
                mt.inline(text) + ("" if not notes else " " + mt.inline(" ".join(f"({n})" for n in notes)))
            )
        if a.ar.applicable:
            lines.append(
                f"Anderson–Rubin 99 % set: {_set_text(a.ar.set_99)}; reference {mt.inline(a.ar.reference)}."
            )
        if a.variants is not None:
            sha = mt.inline(a.variants.sha256[:12])
            lines.append(
                f"**Its per-variant table re-analysed** (SHA-256 {sha}…):\n"
                + "\n".join(f"- {mt.inline(line)}" for line in a.variants.lines())
            )
        for c in critiques.get(a.key, ()):
            by = f" (raised by {mt.inline(c.raised_by)})" if c.raised_by else ""
            note = f": {mt.inline(c.note)}" if c.note else ""
            lines.append(f"- Critique **{mt.inline(c.threat_code)}** {mt.inline(c.threat_title)}{by}{note}")
        details.append("\n\n".join(lines))
    without = [
        (k, cite, crit) for k, cite, rep, crit in inputs.studies if not rep and k not in inputs.variant_tables
    ]
    if without:
        rows = [
            [mt.cell(cite or k), ", ".join(mt.inline(c.threat_code) for c in crit) or "–"]
            for k, cite, crit in without
        ]
        details.append(
            f"{h}## Studies without reported statistics\n\n" + mt.table(["Study", "Critiques raised"], rows)
        )
    parts.extend(details)
    method_notes: tuple[str, ...] = METHOD_NOTES
    if any(a.variants for a in summary.studies):
        method_notes = (*METHOD_NOTES, VARIANT_NOTE)
    parts.append(f"{h}# How the re-examination works\n\n" + "\n\n".join(f"- {n}" for n in method_notes))
    return parts


def audit_markdown(
    summary: AuditSummary, inputs: AuditInputs, *, generated_at: str = "", tool_version: str = ""
) -> str:
    """The stand-alone audit document (deterministic for equal inputs; timestamps are passed in)."""
    stamp = " ".join(
        p
        for p in (
            f"Generated {generated_at}" if generated_at else "",
            f"by ivdossier {tool_version}" if tool_version else "",
        )
        if p
    )
    parts = [f"# Literature audit: {mt.inline(summary.scope)}"]
    if stamp:
        parts.append(f"*{mt.inline(stamp)}.*")
    parts.append("## Summary")
    parts += _body(summary, inputs, "#")
    parts.append("## What this audit cannot tell you\n\n" + "\n\n".join(CAUTIONS))
    return "\n\n".join(parts).rstrip() + "\n"


def audit_section_markdown(summary: AuditSummary, inputs: AuditInputs) -> str:
    """The audit as one ``##`` section (with ``###`` subsections) for inclusion in an instrument dossier."""
    parts = ["## Prior uses and critiques", *_body(summary, inputs, "##")]
    parts.append("\n\n".join(CAUTIONS[:2]))
    return "\n\n".join(parts).rstrip() + "\n"


def audit_html(
    summary: AuditSummary, inputs: AuditInputs, *, generated_at: str = "", tool_version: str = ""
) -> str:
    """The audit document as one self-contained HTML page (raw HTML disabled in the Markdown)."""
    from ivdossier.reports.html import render_html

    with mt.for_html():
        markdown = audit_markdown(summary, inputs, generated_at=generated_at, tool_version=tool_version)
    return render_html(markdown, title=f"Literature audit: {summary.scope}", badges={})


def audit_json(summary: AuditSummary, inputs: AuditInputs) -> dict[str, Any]:
    """JSON-safe audit with each study's critiques."""
    data = summary.to_dict()
    crit = {key: [c.to_dict() for c in cs] for key, _, _, cs in inputs.studies}
    for study in data["studies"]:
        study["critiques"] = crit.get(study["key"], [])
    data["studies_without_statistics"] = [
        {"key": key, "citation": cite, "critiques": crit.get(key, [])}
        for key, cite, rep, _ in inputs.studies
        if not rep and key not in inputs.variant_tables
    ]
    data["cautions"] = [c.replace("**", "") for c in CAUTIONS]
    return data
