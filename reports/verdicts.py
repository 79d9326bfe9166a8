"""Derive one verdict per identifying condition from the graph check, the linked threats and the latest run.

Verdicts are derived, never typed in. Each condition walks its rules top to bottom; the first rule that fires
decides the verdict and supplies the one-line reason. "Unresolved" threats are those in state *open* that are
unrated or have a team-mean severity of at least 4 (``HIGH_SEVERITY``), and those in state *accepted* with a
team-mean severity of at least 4.

======  ==============  ============  =================================================================
rule    condition       verdict       fires when
======  ==============  ============  =================================================================
T1      any             broken        a threat linked to the condition is in state *fatal*
G1      any but mono.   broken        the graph verdict reports the condition violated in the diagram
T2      any             at risk       a linked threat on the condition is unresolved (see above)
G2      any but mono.   at risk       the graph verdict reports the condition at risk
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
X2      excl./exog.     holds         the graph verdict reports the condition satisfied in the diagram
                                      AND the team has written a claim for it (no statistic involved)
X3      excl./exog.     not assessed  no graph verdict for the condition, or no written claim
M1      monotonicity    holds         the team has written a claim and no linked threat is unresolved
M2      monotonicity    not assessed  no written claim
======  ==============  ============  =================================================================

Statistics never make exclusion or exogeneity "holds" on their own: a passing over-identification test, a large
first-stage F or a non-significant endogeneity test cannot establish either condition, so those statistics can
only move a verdict to "at risk" (rule X1). "Holds" for exclusion and exogeneity needs the diagram and the team's
written argument, with every linked threat resolved.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.reports import resultview as rv
from ivdossier.reports.inputs import CONDITIONS, DossierInput, LinkInfo, RunInfo
from ivdossier.vocabulary import AT_RISK, BROKEN, HOLDS, NOT_ASSESSED, VERDICTS

STATUSES = VERDICTS

HIGH_SEVERITY = 4.0
"""Team-mean severity (1-5) from which an open or accepted threat counts as unresolved."""
RULE_OF_THUMB_F = 10.0
"""First-stage F threshold used only when no effective F is available (common practice)."""
OVERID_LEVEL = 0.05
RELEVANCE_TAU = 10


@dataclass(frozen=True)
class Verdict:
    """The derived status of one condition, the rule that decided it and a one-line reason."""

    condition: str
    status: str
    reason: str
    rule: str

    def to_dict(self) -> dict[str, str]:
        return {"condition": self.condition, "status": self.status, "reason": self.reason, "rule": self.rule}


@dataclass(frozen=True)
class GraphStatus:
    """What the graph verdict says about one condition: satisfied, violated or silent (None)."""

    outcome: str | None
    reason: str
    paths: tuple[str, ...]


_GOOD = {"holds", "satisfied", "ok", "pass", "passes", "passed", "valid", "true", "blocked", "closed"}
_BAD = {"violated", "fails", "fail", "failed", "broken", "invalid", "false", "open", "unblocked"}
_RISKY = {"at risk", "risky", "warning"}


def _path_text(path: Any) -> str:
    if isinstance(path, Sequence) and not isinstance(path, str):
        return " → ".join(str(node) for node in path)
    if isinstance(path, Mapping):
        nodes = path.get("nodes")
        text = _path_text(nodes) if nodes else str(path.get("path") or path.get("text") or "")
        via = path.get("threats") or path.get("threat") or path.get("threat_code")
        if isinstance(via, Sequence) and not isinstance(via, str):
            via = ", ".join(str(v) for v in via)
        return f"{text} (threat {via})" if via else text
    return str(path)


def graph_status(verdict: Mapping[str, Any] | None, condition: str) -> GraphStatus:
    """Read the graph checker's verdict for one condition, tolerating the usual shapes of its to_dict().

    Outcomes: "satisfied", "at risk", "violated", or None when the graph says nothing (or "not assessed").
    """
    if not verdict:
        return GraphStatus(None, "", ())
    node: Any = None
    for container in (verdict.get("conditions"), verdict.get("verdicts"), verdict):
        if isinstance(container, Mapping) and condition in container:
            node = container[condition]
            break
        if isinstance(container, Sequence) and not isinstance(container, str):
            for item in container:
                if isinstance(item, Mapping) and item.get("condition") == condition:
                    node = item
                    break
            if node is not None:
                break
    if node is None:
        return GraphStatus(None, "", ())
    outcome: str | None = None
    reason = ""
    paths: tuple[str, ...] = ()
    if isinstance(node, bool):
        outcome = "satisfied" if node else "violated"
    elif isinstance(node, str):
        outcome = _word_outcome(node)
    elif isinstance(node, Mapping):
        for key in ("holds", "satisfied", "ok", "passes", "valid"):
            if isinstance(node.get(key), bool):
                outcome = "satisfied" if node[key] else "violated"
                break
        if outcome is None and isinstance(node.get("violated"), bool):
            outcome = "violated" if node["violated"] else "satisfied"
        if outcome is None:
            for key in ("value", "status", "verdict", "outcome", "result"):
                if isinstance(node.get(key), str):
                    outcome = _word_outcome(node[key])
                    break
        reasons = node.get("reasons")
        if isinstance(reasons, Sequence) and not isinstance(reasons, str) and reasons:
            reason = "; ".join(str(r) for r in reasons)
        else:
            reason = str(node.get("reason") or node.get("explanation") or node.get("message") or "")
        for key in ("paths", "open_paths", "violating_paths", "offending_paths", "backdoor_paths"):
            raw = node.get(key)
            if isinstance(raw, Sequence) and not isinstance(raw, str) and raw:
                paths = tuple(_path_text(p) for p in raw)
                break
    if not paths and isinstance(verdict.get("open_paths"), Sequence):
        paths = tuple(
            _path_text(p)
            for p in verdict["open_paths"]
            if isinstance(p, Mapping) and p.get("condition") == condition and p.get("open", True)
        )
    return GraphStatus(outcome, reason, paths)


def _word_outcome(word: str) -> str | None:
    lowered = word.strip().lower().replace("_", " ").replace("-", " ")
    if lowered in _GOOD:
        return "satisfied"
    if lowered in _RISKY:
        return "at risk"
    if lowered in _BAD:
        return "violated"
    return None


def latest_run(runs: Sequence[RunInfo]) -> RunInfo | None:
    """The most recent run that reports diagnostics (strength or first stage), else the most recent run."""
    if not runs:
        return None
    ordered = sorted(runs, key=lambda r: (r.created_text, r.slug))
    diagnostic = [r for r in ordered if rv.section(r.results, "strength") or rv.first_stage_rows(r.results)]
    return (diagnostic or ordered)[-1]


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


def _ar_sets(run: RunInfo) -> list[rv.Interval] | None:
    return rv.intervals(rv.section(run.results, "weak_iv_robust", "anderson_rubin"))


def _first_stage_f(run: RunInfo) -> float | None:
    values: list[float] = []
    for entry in rv.first_stage_rows(run.results).values():
        value = rv.num(entry.get("robust_f"))
        if value is None:
            value = rv.num(entry.get("partial_f"))
        if value is not None:
            values.append(value)
    return min(values) if values else None


def _relevance_from_run(run: RunInfo | None) -> Verdict:
    """Rules R1-R6, in the order of the table."""
    c = "relevance"
    if run is None:
        return Verdict(c, NOT_ASSESSED, "no estimation run has been recorded yet", "R6")
    sets = _ar_sets(run)
    unbounded = sets is not None and len(sets) > 0 and not rv.is_bounded(sets)
    feff, cvs = rv.effective_f(run.results)
    cv = cvs.get(RELEVANCE_TAU)
    if feff is not None and cv is not None and feff < cv:
        reason = f"effective F {rv.fmt(feff)} is below the τ = 10 % critical value {rv.fmt(cv)}"
        return Verdict(c, AT_RISK, reason, "R1")
    if unbounded:
        return Verdict(c, AT_RISK, f"the Anderson–Rubin set {rv.fmt_set(sets)} is unbounded", "R2")
    if sets is None:
        tail = "(no Anderson–Rubin set reported)"
    else:
        tail = "and the Anderson–Rubin set is bounded" if sets else "(the Anderson–Rubin set is empty)"
    if feff is not None and cv is not None:
        return Verdict(
            c, HOLDS, f"effective F {rv.fmt(feff)} ≥ τ = 10 % critical value {rv.fmt(cv)} {tail}", "R3"
        )
    fs = _first_stage_f(run)
    if fs is not None and fs < RULE_OF_THUMB_F:
        return Verdict(c, AT_RISK, f"first-stage F {rv.fmt(fs)} is below the rule-of-thumb 10", "R4")
    if fs is not None:
        reason = f"first-stage F {rv.fmt(fs)} ≥ 10 (no effective F reported; rule of thumb) {tail}"
        return Verdict(c, HOLDS, reason, "R5")
    return Verdict(c, NOT_ASSESSED, f"run {run.slug} reports no instrument-strength statistics", "R6")


def derive_verdict(
    condition: str,
    *,
    links: Sequence[LinkInfo] = (),
    claim: str = "",
    graph_verdict: Mapping[str, Any] | None = None,
    run: RunInfo | None = None,
) -> Verdict:
    """Apply the rule table of this module to one condition."""
    mine = [link for link in links if link.condition == condition]
    fatal = [_name(link) for link in mine if link.state == "fatal"]
    if fatal:
        return Verdict(condition, BROKEN, _list_reason(fatal, "judged fatal by the team"), "T1")
    gstat = (
        graph_status(graph_verdict, condition) if condition != "monotonicity" else GraphStatus(None, "", ())
    )
    if gstat.outcome == "violated":
        detail = f": {gstat.paths[0]}" if gstat.paths else (f": {gstat.reason}" if gstat.reason else "")
        return Verdict(condition, BROKEN, f"the causal diagram violates it{detail}", "G1")
    unresolved = [f"{_name(link)} {why}" for link in mine if (why := _unresolved(link)) is not None]
    if unresolved:
        first, rest = unresolved[0], len(unresolved) - 1
        return Verdict(condition, AT_RISK, first + (f"; {rest} more unresolved" if rest else ""), "T2")
    if gstat.outcome == "at risk":
        detail = f": {gstat.paths[0]}" if gstat.paths else (f": {gstat.reason}" if gstat.reason else "")
        return Verdict(condition, AT_RISK, f"the causal diagram puts it at risk{detail}", "G2")
    if condition == "relevance":
        return _relevance_from_run(run)
    if condition == "monotonicity":
        if claim.strip():
            return Verdict(
                condition, HOLDS, "the team's claim stands and no linked threat is unresolved", "M1"
            )
        return Verdict(condition, NOT_ASSESSED, "the team has not written a monotonicity claim", "M2")
    overid = rv.section(run.results, "overid") if run is not None else None
    p = rv.pvalue(overid)
    if p is not None and p < OVERID_LEVEL and run is not None:
        return Verdict(
            condition,
            AT_RISK,
            f"the over-identification test in run {run.slug} rejects (p = {rv.fmt_p(p)})",
            "X1",
        )
    if run is not None and _ar_sets(run) == []:
        return Verdict(
            condition,
            AT_RISK,
            f"the Anderson–Rubin set in run {run.slug} is empty: no effect fits every instrument",
            "X1",
        )
    if gstat.outcome == "satisfied" and claim.strip():
        return Verdict(
            condition,
            HOLDS,
            "the causal diagram supports it, the claim is written and no threat is unresolved",
            "X2",
        )
    missing = []
    if gstat.outcome is None:
        missing.append("no graph check")
    if not claim.strip():
        missing.append("no written claim")
    return Verdict(condition, NOT_ASSESSED, " and ".join(missing) + " yet", "X3")


def derive_verdicts(inp: DossierInput) -> dict[str, Verdict]:
    """Verdicts for all four conditions, in the standard order."""
    run = latest_run(inp.runs)
    graph_verdict = inp.graph.verdict if inp.graph is not None else None
    return {
        c: derive_verdict(
            c, links=inp.links, claim=inp.instrument.claims.get(c, ""), graph_verdict=graph_verdict, run=run
        )
        for c in CONDITIONS
    }
