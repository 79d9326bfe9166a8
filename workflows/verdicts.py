"""The verdict engine: one verdict per identifying condition, from the graph check, the linked threats, the team's
claims and the latest run's statistics, computed once and rendered by every surface.

Each condition walks its rules top to bottom; the first rule that fires decides the verdict (an
``ivdossier.vocabulary.Verdict``: status, rule, one-line reason and the graph paths behind it). "Unresolved"
threats are those in state *open* that are unrated or have a team-mean severity of at least 4 (``HIGH_SEVERITY``),
and those in state *accepted* with a team-mean severity of at least 4.

======  ==============  ============  =================================================================
rule    condition       verdict       fires when
======  ==============  ============  =================================================================
T1      any             broken        a threat linked to the condition is in state *fatal*
G1      any but mono.   broken        the graph check reports the condition broken in the diagram
T2      any             at risk       a linked threat on the condition is unresolved (see above)
G2      any but mono.   at risk       the graph check reports the condition at risk
R1      relevance       at risk       latest run: effective F below its tau = 10 % critical value
R2      relevance       at risk       latest run: Anderson-Rubin set unbounded (rays or whole line)
R3      relevance       holds         latest run: effective F at or above its tau = 10 % critical value
                                      and the AR set (when reported) is bounded
R4      relevance       at risk       no effective F: robust (else partial) first-stage F below 10
R5      relevance       holds         no effective F: robust (else partial) first-stage F of 10 or more
                                      (common-practice rule of thumb) and the AR set, if any, is bounded
R6      relevance       not assessed  no run reports instrument-strength statistics
X1      excl./exog.     at risk       latest run's over-identification test rejects at the 5 % level,
                                      or its Anderson-Rubin set is empty (no effect fits every instrument)
X2      excl./exog.     holds         the graph check reports the condition holding in the diagram
                                      AND the team has written a claim for it (no statistic involved)
X3      excl./exog.     not assessed  no graph verdict for the condition, or no written claim
M1      monotonicity    holds         the team has written a claim and no linked threat is unresolved
M2      monotonicity    not assessed  no written claim
======  ==============  ============  =================================================================

Statistics never make exclusion or exogeneity "holds" on their own: a passing over-identification test, a large
first-stage F or a non-significant endogeneity test cannot establish either condition, so those statistics can
only move a verdict to "at risk" (rule X1). "Holds" for exclusion and exogeneity needs the diagram and the team's
written argument, with every linked threat resolved.

The statistics enter through one small typed input, :class:`RunEvidence`, built from a stored run by
:func:`run_evidence` (the only place that reads a run's stored results). "Latest run" in the table means the run
the headline rests on: the one the team marked primary (`run primary`), else the latest estimate with diagnostics.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.reports import resultview as rv
from ivdossier.reports.dossier import headline_run, path_text
from ivdossier.reports.inputs import DossierInput, LinkInfo, RunInfo
from ivdossier.threats_catalog.graph import GraphVerdict
from ivdossier.vocabulary import AT_RISK, BROKEN, CONDITIONS, HOLDS, NOT_ASSESSED, Verdict

HIGH_SEVERITY = 4.0
"""Team-mean severity (1-5) from which an open or accepted threat counts as unresolved."""
RULE_OF_THUMB_F = 10.0
"""First-stage F threshold used only when no effective F is available (common practice)."""
OVERID_LEVEL = 0.05
RELEVANCE_TAU = 10

Interval = tuple[float, float]


# ------------------------------------------------------------------------------------------ the run's statistics


@dataclass(frozen=True)
class RunEvidence:
    """What the rules read from one run: effective F and its tau = 10 % critical value, the smallest first-stage F,
    the Anderson-Rubin set (None when not reported) and the over-identification p-value."""

    run: str
    effective_f: float | None = None
    effective_f_critical: float | None = None
    first_stage_f: float | None = None
    ar_set: tuple[Interval, ...] | None = None
    overid_p: float | None = None

    @property
    def ar_bounded(self) -> bool:
        """A non-empty AR set whose every piece has finite ends."""
        return bool(self.ar_set) and all(
            math.isfinite(lo) and math.isfinite(hi) for lo, hi in self.ar_set or ()
        )

    @property
    def ar_unbounded(self) -> bool:
        """A non-empty AR set with an infinite end (rays or the whole line)."""
        return bool(self.ar_set) and not self.ar_bounded

    @property
    def ar_empty(self) -> bool:
        """The AR set was reported and is empty: no effect fits every instrument."""
        return self.ar_set is not None and len(self.ar_set) == 0

    def ar_text(self) -> str:
        return rv.fmt_set(None if self.ar_set is None else list(self.ar_set))

    def to_dict(self) -> dict[str, Any]:
        return {
            "run": self.run,
            "effective_f": self.effective_f,
            "effective_f_critical": self.effective_f_critical,
            "first_stage_f": self.first_stage_f,
            "ar_set": None if self.ar_set is None else [list(piece) for piece in self.ar_set],
            "overid_p": self.overid_p,
        }


def run_evidence(run: RunInfo | None) -> RunEvidence | None:
    """The statistics the verdict rules need, read from a stored run's results (the one adapter to switch when
    stored results become typed objects)."""
    if run is None:
        return None
    feff, cvs = rv.effective_f(run.results)
    ar = rv.intervals(rv.section(run.results, "weak_iv_robust", "anderson_rubin"))
    first: list[float] = []
    for entry in rv.first_stage_rows(run.results).values():
        value = rv.num(entry.get("robust_f"))
        if value is None:
            value = rv.num(entry.get("partial_f"))
        if value is not None:
            first.append(value)
    return RunEvidence(
        run=run.slug,
        effective_f=feff,
        effective_f_critical=cvs.get(RELEVANCE_TAU),
        first_stage_f=min(first) if first else None,
        ar_set=None if ar is None else tuple(ar),
        overid_p=rv.pvalue(rv.section(run.results, "overid")),
    )


# ------------------------------------------------------------------------------------------ the graph's verdict


_GRAPH_OUTCOME = {"holds": "satisfied", "at-risk": "at risk", "broken": "violated"}


@dataclass(frozen=True)
class GraphReading:
    """What the graph check says about one condition: satisfied, at risk, violated or silent (None)."""

    outcome: str | None
    reason: str
    paths: tuple[str, ...]


def graph_reading(graph: GraphVerdict | None, condition: str) -> GraphReading:
    """The graph check's verdict on one condition with its reasons and the open paths of that condition."""
    if graph is None:
        return GraphReading(None, "", ())
    found = [c for c in graph.conditions if c.condition == condition]
    if not found:
        return GraphReading(None, "", ())
    paths = tuple(path_text(p) for p in graph.open_paths if p.is_open and p.condition == condition)
    return GraphReading(_GRAPH_OUTCOME.get(found[0].value), "; ".join(found[0].reasons), paths)


# ------------------------------------------------------------------------------------------------ the rules


def _unresolved(link: LinkInfo) -> str | None:
    severity = link.mean_severity
    if link.state == "open" and severity is None:
        return "is open and not yet rated"
    if link.state in ("open", "accepted") and severity is not None and severity >= HIGH_SEVERITY:
        return f"is {link.state} with team-mean severity {rv.fmt(severity, 2)}"
    return None


def _name(link: LinkInfo) -> str:
    return f"{link.threat_code} ({link.title})" if link.title else link.threat_code


def _list_reason(items: list[str], what: str) -> str:
    extra = f" and {len(items) - 1} more" if len(items) > 1 else ""
    return f"{items[0]}{extra} {what}"


def _relevance(ev: RunEvidence | None, paths: tuple[str, ...]) -> Verdict:
    """Rules R1-R6, in the order of the table."""
    c = "relevance"
    if ev is None:
        return Verdict(c, NOT_ASSESSED, "R6", "no estimation run has been recorded yet", paths)
    feff, cv = ev.effective_f, ev.effective_f_critical
    if feff is not None and cv is not None and feff < cv:
        reason = f"effective F {rv.fmt(feff)} is below the τ = 10 % critical value {rv.fmt(cv)}"
        return Verdict(c, AT_RISK, "R1", reason, paths)
    if ev.ar_unbounded:
        return Verdict(c, AT_RISK, "R2", f"the Anderson–Rubin set {ev.ar_text()} is unbounded", paths)
    if ev.ar_set is None:
        tail = "(no Anderson–Rubin set reported)"
    else:
        tail = "and the Anderson–Rubin set is bounded" if ev.ar_set else "(the Anderson–Rubin set is empty)"
    if feff is not None and cv is not None:
        reason = f"effective F {rv.fmt(feff)} ≥ τ = 10 % critical value {rv.fmt(cv)} {tail}"
        return Verdict(c, HOLDS, "R3", reason, paths)
    fs = ev.first_stage_f
    if fs is not None and fs < RULE_OF_THUMB_F:
        return Verdict(c, AT_RISK, "R4", f"first-stage F {rv.fmt(fs)} is below the rule-of-thumb 10", paths)
    if fs is not None:
        reason = f"first-stage F {rv.fmt(fs)} ≥ 10 (no effective F reported; rule of thumb) {tail}"
        return Verdict(c, HOLDS, "R5", reason, paths)
    return Verdict(c, NOT_ASSESSED, "R6", f"run {ev.run} reports no instrument-strength statistics", paths)


def _detail(reading: GraphReading) -> str:
    if reading.paths:
        return f": {reading.paths[0]}"
    return f": {reading.reason}" if reading.reason else ""


def derive_verdict(
    condition: str,
    *,
    links: Sequence[LinkInfo] = (),
    claim: str = "",
    graph: GraphVerdict | None = None,
    evidence: RunEvidence | None = None,
) -> Verdict:
    """Apply the rule table of this module to one condition."""
    mine = [link for link in links if link.condition == condition]
    reading = graph_reading(graph, condition) if condition != "monotonicity" else GraphReading(None, "", ())
    paths = reading.paths
    fatal = [_name(link) for link in mine if link.state == "fatal"]
    if fatal:
        return Verdict(condition, BROKEN, "T1", _list_reason(fatal, "judged fatal by the team"), paths)
    if reading.outcome == "violated":
        return Verdict(condition, BROKEN, "G1", f"the causal diagram violates it{_detail(reading)}", paths)
    unresolved = [f"{_name(link)} {why}" for link in mine if (why := _unresolved(link)) is not None]
    if unresolved:
        first, rest = unresolved[0], len(unresolved) - 1
        reason = first + (f"; {rest} more unresolved" if rest else "")
        return Verdict(condition, AT_RISK, "T2", reason, paths)
    if reading.outcome == "at risk":
        return Verdict(
            condition, AT_RISK, "G2", f"the causal diagram puts it at risk{_detail(reading)}", paths
        )
    if condition == "relevance":
        return _relevance(evidence, paths)
    if condition == "monotonicity":
        if claim.strip():
            reason = "the team's claim stands and no linked threat is unresolved"
            return Verdict(condition, HOLDS, "M1", reason)
        return Verdict(condition, NOT_ASSESSED, "M2", "the team has not written a monotonicity claim")
    if evidence is not None and evidence.overid_p is not None and evidence.overid_p < OVERID_LEVEL:
        reason = (
            f"the over-identification test in run {evidence.run} rejects (p = {rv.fmt_p(evidence.overid_p)})"
        )
        return Verdict(condition, AT_RISK, "X1", reason, paths)
    if evidence is not None and evidence.ar_empty:
        reason = f"the Anderson–Rubin set in run {evidence.run} is empty: no effect fits every instrument"
        return Verdict(condition, AT_RISK, "X1", reason, paths)
    if reading.outcome == "satisfied" and claim.strip():
        reason = "the causal diagram supports it, the claim is written and no threat is unresolved"
        return Verdict(condition, HOLDS, "X2", reason, paths)
    missing = []
    if reading.outcome is None:
        missing.append("no graph check")
    if not claim.strip():
        missing.append("no written claim")
    return Verdict(condition, NOT_ASSESSED, "X3", " and ".join(missing) + " yet", paths)


def derive_verdicts(inp: DossierInput) -> tuple[Verdict, ...]:
    """Verdicts for all four conditions, in the standard order, from everything one dossier shows."""
    evidence = run_evidence(headline_run(inp.runs))
    graph = inp.graph.verdict if inp.graph is not None else None
    return tuple(
        derive_verdict(
            c, links=inp.links, claim=inp.instrument.claims.get(c, ""), graph=graph, evidence=evidence
        )
        for c in CONDITIONS
    )


def with_verdicts(inp: DossierInput) -> DossierInput:
    """The same dossier input carrying its derived verdicts (what every renderer shows)."""
    return dataclasses.replace(inp, verdicts=derive_verdicts(inp))
