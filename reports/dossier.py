"""The per-instrument dossier as Markdown: the argument beside the numbers, then where everything came from.

Order: header and at-a-glance summary; the argument condition by condition with the threats that attack it; the
causal diagram; estimates and diagnostics; provenance; cautions. A section without input is left out entirely.
All user-written text goes through `mdtext` escaping.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from functools import lru_cache
from typing import TYPE_CHECKING, Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.design_sections import design_figures, design_sections
from ivdossier.reports.estimates import ar_set_of, effective_f_of, estimates_markdown, treatment_of
from ivdossier.reports.evidence_doc import evidence_markdown, sensitivity_figures
from ivdossier.reports.fragility_doc import fragility_figures, fragility_markdown
from ivdossier.reports.inputs import CONDITIONS, READING_ASPECTS, DossierInput, LinkInfo, RunInfo
from ivdossier.reports.provenance import provenance_markdown
from ivdossier.vocabulary import Verdict

if TYPE_CHECKING:
    from ivdossier.reports.html import FilledSvg
    from ivdossier.threats_catalog.graph import BypassPath, GraphVerdict

STATE_ORDER = {"fatal": 0, "open": 1, "accepted": 2, "mitigated": 3, "rebutted": 4}
CONDITION_TITLES = {
    "relevance": "Relevance — the instrument moves the treatment",
    "exclusion": "Exclusion — the instrument reaches the outcome only through the treatment",
    "exogeneity": "Exogeneity — the instrument shares no cause with the outcome",
    "monotonicity": "Monotonicity — nobody is pushed the opposite way",
}
CAUTIONS = (
    "**Statistics cannot establish exclusion or exogeneity.** Over-identification and endogeneity tests compare "
    "the instruments with one another or with ordinary least squares; every instrument can be invalid in the same "
    "direction and pass them all. These two conditions rest on the team's argument and the causal diagram.",
    "**A strong first stage does not make an instrument valid.** Strength guards against weak-instrument bias "
    "and misleading intervals; an instrument can move the treatment a great deal and still reach the outcome "
    "by another path.",
    "**Conclusions for policy or clinical use need domain review.** These documents organise the team's own "
    "claims, threat reviews and estimates. Before any result informs a policy or clinical decision, people who "
    "know the setting should review the argument and the data.",
    "**Verdicts are derived, not measured.** They follow fixed, published rules from the inputs shown here "
    "(the rule table lives in `ivdossier.workflows.verdicts`); they summarise the record and can be no better than it.",
)


def figure_folder_name(document_stem: str) -> str:
    """The folder beside a Markdown dossier ``<stem>.md`` that holds its figures as SVG files."""
    return f"{document_stem}-figures"


def dossier_markdown(inp: DossierInput, *, figure_dir: str | None = None) -> str:
    """Render the dossier for one instrument as Markdown (deterministic for equal inputs).

    Figures are image links to ``<figure_dir>/<key>.svg`` (default: the folder `figure_folder_name` gives for a
    file named after the instrument's slug); `dossier_figures` gives their SVG text, and
    `ivdossier.reports.docfiles.write_document` writes the two together.
    """
    folder = figure_dir if figure_dir is not None else figure_folder_name(inp.instrument.slug)
    with mt.figures_in(folder):
        return _dossier_markdown(inp)


def _dossier_markdown(inp: DossierInput) -> str:
    run = headline_run(inp.runs)
    parts = [
        _header(inp),
        _summary(inp, run),
        _argument(inp),
        _diagram(inp),
        estimates_markdown(inp, run),
        evidence_markdown(inp),
        fragility_markdown(inp),
        *inp.extra_sections,
        *design_sections(inp),
        provenance_markdown(inp),
        _cautions(),
    ]
    return "\n\n".join(p for p in parts if p).rstrip() + "\n"


def dossier_figures(inp: DossierInput) -> dict[str, str]:
    """The SVG for every figure the Markdown refers to (plots rendered here, the diagram as given)."""
    from ivdossier.reports import plots

    run = headline_run(inp.runs)
    out: dict[str, str] = {}
    for key, kind in figure_keys(inp).items():
        if kind == "diagram" and inp.graph is not None:
            out[key] = inp.graph.svg
        elif kind == "sensitivity":
            out[key] = sensitivity_figures(inp)[key]
        elif kind == "first-stage" and run is not None and run.first_stage_bins is not None:
            out[key] = plots.first_stage_svg(run.first_stage_bins, key=key)
        elif kind == "ar-curve" and run is not None and run.ar_curve is not None:
            out[key] = plots.ar_curve_svg(run.ar_curve, ar_set=ar_set_of(run.result), key=key)
    return {**out, **design_figures(inp), **fragility_figures(inp)}


def dossier_html(inp: DossierInput, *, preamble: str = "") -> str:
    """The dossier as one self-contained HTML page; `preamble` is trusted Markdown placed first (site navigation)."""
    from ivdossier.reports.html import render_html

    with mt.for_html():
        markdown = dossier_markdown(inp)
    if preamble:
        markdown = preamble.rstrip() + "\n\n" + markdown
    title = f"Dossier: {inp.instrument.name or inp.instrument.slug}"
    return render_html(markdown, title=title, svgs=_html_figures(inp))


def _html_figures(inp: DossierInput) -> dict[str, str | FilledSvg]:
    """`dossier_figures`, with the diagram given as its template and texts when they make exactly the same SVG."""
    from ivdossier.reports.html import FilledSvg

    figures: dict[str, str | FilledSvg] = dict(dossier_figures(inp))
    graph = inp.graph
    if graph is not None and graph.svg_fills:
        filled = FilledSvg(graph.svg_template, graph.svg_fills)
        text = filled.text
        for key, kind in figure_keys(inp).items():
            if kind == "diagram" and figures.get(key) == text:
                figures[key] = filled
    return figures


def figure_keys(inp: DossierInput) -> dict[str, str]:
    """Which figures the Markdown refers to: key -> kind ("diagram", "first-stage", "ar-curve", "sensitivity")."""
    keys: dict[str, str] = {}
    if inp.graph is not None and inp.graph.svg.strip():
        keys["causal-diagram"] = "diagram"
    run = headline_run(inp.runs)
    if run is not None and run.first_stage_bins is not None:
        keys["first-stage"] = "first-stage"
    if run is not None and run.ar_curve is not None:
        keys["ar-curve"] = "ar-curve"
    keys.update(dict.fromkeys(sensitivity_figures(inp), "sensitivity"))
    return keys


def headline_run(runs: Sequence[RunInfo]) -> RunInfo | None:
    """The run the headline and the relevance verdict rest on: the one the team marked primary, else the latest
    run with diagnostics (`latest_run`)."""
    primary = [r for r in runs if r.primary]
    return primary[-1] if primary else latest_run(runs)


def latest_run(runs: Sequence[RunInfo]) -> RunInfo | None:
    """The most recent run that reports diagnostics (strength or first stage), else the most recent run; the
    headline falls back to it when no run is marked primary."""
    if not runs:
        return None
    ordered = sorted(runs, key=lambda r: (r.created_text, r.slug))
    diagnostic = [r for r in ordered if rv.section(r.results, "strength") or rv.first_stage_rows(r.results)]
    return (diagnostic or ordered)[-1]


def path_text(path: BypassPath) -> str:
    """A bypass path in words, e.g. ``fibre_wave → pharmacy → ed_visits (threat DG-E01)``."""
    parts = [path.nodes[0]]
    for arrow, node in zip(path.arrows, path.nodes[1:], strict=True):
        parts += ["→" if arrow == "->" else "←", node]
    text = " ".join(parts)
    return f"{text} (threat {', '.join(path.threats)})" if path.threats else text


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


def _summary(inp: DossierInput, run: RunInfo | None) -> str:
    out = ["## At a glance"]
    if inp.verdicts:
        out.append(
            mt.table(["Condition", "Verdict", "Why", "Rule"], [_glance_row(v) for v in _ordered(inp)], "lllc")
        )
        shapes = (
            "Verdict shapes: filled circle with a tick = holds; triangle with an exclamation mark = at risk; "
            "square with a cross = broken; dashed ring = not assessed."
            if mt.html_target()
            else mt.GLYPH_LEGEND
        )
        out.append(f"{shapes} Rules are listed in `ivdossier.workflows.verdicts`.")
    else:
        out.append(
            "No verdicts were derived for this input; build it with `ivdossier.workflows.dossiers.dossier_input` "
            "or pass it through `ivdossier.workflows.verdicts.with_verdicts`."
        )
    if run is not None:
        key = _run_key_numbers(inp, run)
        if key:
            out.append(key)
        out.extend(_warning_lines(run))
    counts = Counter(link.state for link in inp.links)
    if counts:
        text = ", ".join(f"{counts[s]} {s}" for s in STATE_ORDER if counts[s])
        out.append(f"Linked threats: {len(inp.links)} ({text}). Estimation runs: {len(inp.runs)}.")
    return "\n\n".join(out)


def _ordered(inp: DossierInput) -> list[Verdict]:
    return [v for c in CONDITIONS if (v := inp.verdict(c)) is not None]


def _glance_row(v: Verdict) -> list[str]:
    return [v.condition.capitalize(), mt.badge(v.status), mt.cell(v.reason), v.rule]


def _run_key_numbers(inp: DossierInput, run: RunInfo) -> str:
    res = run.result
    if res is None:
        return ""
    name = treatment_of(res, inp.program.treatment)
    pieces = [f"estimate {rv.fmt(res.coef_of(name))} (standard error {rv.fmt(res.se_of(name))})"]
    feff, _ = effective_f_of(res)
    if feff is not None:
        pieces.append(f"effective F {rv.fmt(feff)}")
    ar = ar_set_of(res)
    if ar is not None:
        pieces.append(f"Anderson–Rubin set {rv.fmt_set(ar)}")
    label = mt.inline(rv.method_label(run.method)) + (f", {mt.inline(run.vcov)}" if run.vcov else "")
    if run.primary:
        which = f"Primary run **{mt.inline(run.slug)}**"
        why = "The team marked it primary; the headline and the relevance verdict use it."
    else:
        which = f"Latest run **{mt.inline(run.slug)}**"
        why = (
            "No run is marked primary, so the headline and the relevance verdict use the latest estimate "
            "(mark one with `ivdossier run primary RUN`)."
        )
    return f"{which} ({label}): " + "; ".join(pieces) + ". " + why


def _warning_lines(run: RunInfo) -> list[str]:
    return [f"**Warning (run {mt.inline(run.slug)}):** {mt.inline(w)}." for w in run.warnings]


# --------------------------------------------------------------------------------------------- argument


def _argument(inp: DossierInput) -> str:
    blocks = []
    for condition in CONDITIONS:
        claim = inp.instrument.claims.get(condition, "")
        links = sorted(
            (link for link in inp.links if link.condition == condition),
            key=lambda lk: (STATE_ORDER[lk.state], -(lk.mean_severity or 0.0), lk.threat_code),
        )
        if not claim.strip() and not links:
            continue
        part = [f"### {CONDITION_TITLES[condition]}"]
        verdict = inp.verdict(condition)
        if verdict is not None:
            part.append(f"Verdict: {mt.badge(verdict.status)}")
        if claim.strip():
            part.append("**The team's claim.**\n\n" + mt.block(claim))
        if links:
            counts = Counter(link.state for link in links)
            text = ", ".join(f"{counts[s]} {s}" for s in STATE_ORDER if counts[s])
            part.append(f"**Threats attacking {condition}** — {len(links)} linked ({text}).")
            part.extend(_link_block(link) for link in links)
        blocks.append("\n\n".join(part))
    reading = _reading_block(inp)
    if reading:
        blocks.append(reading)
    if not blocks:
        return ""
    return "## The argument, condition by condition\n\n" + "\n\n".join(blocks)


READING_TITLES = {
    "target": "what the estimate is an estimate of",
    "uncertainty": "whether its stated uncertainty is right",
    "specification": "how the specification was chosen",
}


def _reading_block(inp: DossierInput) -> str:
    """Threats of kind "reading": the instrument may be valid, but how the estimate is read is at risk."""
    links = sorted(
        (link for link in inp.links if link.condition in READING_ASPECTS),
        key=lambda lk: (READING_ASPECTS.index(lk.condition), STATE_ORDER[lk.state], lk.threat_code),
    )
    if not links:
        return ""
    part = [
        "### Reading the estimate — threats beyond the four conditions",
        "These threats leave relevance, exclusion, exogeneity and monotonicity alone and put at risk "
        + "; ".join(f"{READING_TITLES[a]} ({a})" for a in READING_ASPECTS)
        + ". They do not change any condition's verdict.",
    ]
    part.extend(f"{_link_block(link)}\n\nPuts at risk: {READING_TITLES[link.condition]}." for link in links)
    return "\n\n".join(part)


def _link_block(link: LinkInfo) -> str:
    return _link_block_for(link, mt.html_target())


@lru_cache(maxsize=4096)
def _link_block_for(link: LinkInfo, html: bool) -> str:
    """A threat card; remembered by the link's value (a frozen record) and the target, since links with the same
    threat, state, argument, ratings and checks recur across the dossiers of a site."""
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
    rows = _graph_rows(inp.graph.verdict) if inp.graph.verdict is not None else []
    if rows:
        out.append("What the graph check found:")
        out.append(mt.table(["Condition", "In the diagram", "Paths found", "Explanation"], rows))
    return "\n\n".join(out) if len(out) > 1 else ""


def _graph_rows(graph: GraphVerdict) -> list[list[str]]:
    """What the graph check found for relevance, exclusion and exogeneity (the evidence behind rules G1 and G2)."""
    rows = []
    for condition in CONDITIONS[:3]:
        found = [c for c in graph.conditions if c.condition == condition]
        value = found[0].value if found else ""
        paths = [path_text(p) for p in graph.open_paths if p.is_open and p.condition == condition]
        if value in ("", "not-assessed") and not paths:
            continue
        outcome = {
            "holds": "satisfied in the diagram",
            "broken": "violated in the diagram",
            "at-risk": "at risk in the diagram",
        }.get(value, "not decided")
        reason = "; ".join(found[0].reasons) if found else ""
        rows.append(
            [
                condition.capitalize(),
                outcome,
                "; ".join(mt.inline(p) for p in paths) or "–",
                mt.inline_with_commands(reason) or "–",
            ]
        )
    return rows


def _cautions() -> str:
    return "## What this dossier cannot tell you\n\n" + "\n\n".join(CAUTIONS)
