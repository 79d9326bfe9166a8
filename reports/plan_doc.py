"""The pre-analysis plan as a document (Markdown, or HTML through the shared renderer) and checks of exported copies.

The document is rendered from the plan's sealed form (``ivdossier.registry.plans.sealed_document``) plus its state and hash,
so the same plan always gives the same text; ``verify_document`` re-renders it from the sealed record and names
every line of an exported Markdown or HTML copy that differs. User text is escaped with ``mdtext``.
"""

from __future__ import annotations

import difflib
import json
import re
from collections.abc import Mapping, Sequence
from typing import Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports.inputs import Difference
from ivdossier.vocabulary import Verdict

CAUTIONS = (
    "**Statistics cannot establish exclusion or exogeneity.** The diagnostics planned here speak to instrument "
    "strength and to agreement between instruments; exclusion and exogeneity rest on the argument, the causal graph "
    "and the threats listed above.",
    "**Conclusions for policy or clinical use need domain review.** People who know the setting should review the "
    "plan and the results before any finding informs a policy or clinical decision.",
)
CONDITION_ORDER = ("relevance", "exclusion", "exogeneity", "monotonicity")


def _value(value: Any) -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, list):
        return ", ".join(mt.inline(v) for v in value) if value else "none"
    return mt.inline(value)


def condition_text(cond: Mapping[str, Any]) -> str:
    """A condition tree in words, e.g. 'strength.effective_f.statistic ≥ strength.effective_f.critical_values.tau_10pct'."""
    if "all" in cond:
        return "(" + " and ".join(condition_text(c) for c in cond["all"]) + ")"
    if "any" in cond:
        return "(" + " or ".join(condition_text(c) for c in cond["any"]) + ")"
    if "not" in cond:
        return "not " + condition_text(cond["not"])
    symbol = {">=": "≥", "<=": "≤", "!=": "≠", "==": "="}.get(str(cond.get("op")), str(cond.get("op")))
    right = cond["compare_to"] if "compare_to" in cond else json.dumps(cond.get("value"), ensure_ascii=False)
    return f"{cond.get('statistic')} {symbol} {right}"


def _run_kinds(cond: Any) -> set[str]:
    """The kinds of run a condition's qualified paths read (``fragility-influence:...``); empty for an estimate's."""
    if not isinstance(cond, Mapping):
        return set()
    out: set[str] = set()
    for key in ("all", "any"):
        for item in cond.get(key) or []:
            out |= _run_kinds(item)
    if "not" in cond:
        out |= _run_kinds(cond["not"])
    for key in ("statistic", "compare_to"):
        if isinstance(cond.get(key), str) and ":" in cond[key]:
            out.add(cond[key].split(":", 1)[0])
    return out


def _code(text: str) -> str:
    """A code span for generated values (hashes, the power formula); anything else is escaped as plain text."""
    if not re.fullmatch(r"[A-Za-z0-9 ()*/^+=_,.\-]+", text) or text.startswith(mt.BADGE_PREFIX):
        return mt.inline(text)
    return "`" + text + "`"


def plan_markdown(sealed: Mapping[str, Any], *, state: str, sha256: str = "") -> str:
    """Render a plan from its sealed form (draft plans pass the same shape with empty freeze fields)."""
    content: Mapping[str, Any] = sealed.get("content") or {}
    q = content.get("question") or {}
    parts = [f"# {mt.inline(sealed.get('title') or 'Pre-analysis plan')}"]
    if state == "frozen":
        parts.append(
            f"**Frozen** {mt.inline(sealed.get('frozen_at'))} by {mt.inline(sealed.get('frozen_by'))}. "
            f"SHA-256 of the canonical form: {_code(sha256)}. Check a copy with `ivdossier plan verify "
            f"{mt.inline(sealed.get('plan'))} --file COPY`."
        )
    else:
        parts.append("**Draft — not sealed.** Nothing in this plan is fixed until it is frozen.")
    ident = [
        ("Plan", sealed.get("plan")),
        ("Program", sealed.get("program")),
        ("Instrument", sealed.get("instrument")),
    ]
    parts.append("\n".join(f"- **{k}:** {_value(v)}" for k, v in ident if v))
    parts.append(_question(q))
    parts.append(_data(content.get("data") or {}))
    parts.append(_instruments(content.get("instruments") or []))
    parts.append(_graph(content.get("graph") or {}, content.get("threats") or []))
    parts.append(_specs(content.get("specs") or []))
    parts.append(_diagnostics(content.get("diagnostics") or []))
    parts.append(_rules(content.get("decision_rules") or []))
    parts.append(_power(content.get("power")))
    parts.append("## Deviations\n\n" + mt.block(content.get("deviations") or "Not stated."))
    parts.append("## What this plan cannot settle\n\n" + "\n\n".join(CAUTIONS))
    return "\n\n".join(p for p in parts if p).rstrip() + "\n"


def _question(q: Mapping[str, Any]) -> str:
    rows = [("Title", q.get("title")), ("Question", q.get("question")), ("Treatment", q.get("treatment")),
            ("Outcome", q.get("outcome")), ("Unit", q.get("unit")), ("Population", q.get("population"))]  # fmt: skip
    lines = [f"- **{k}:** {_value(v)}" for k, v in rows if v]
    return "## Question\n\n" + ("\n".join(lines) if lines else "Not stated.")


def _data(data: Mapping[str, Any]) -> str:
    lines = ["## Data and sample"]
    if data.get("description"):
        lines.append(mt.block(data["description"]))
    if data.get("sample"):
        lines.append("**Sample.** " + mt.block(data["sample"]))
    facts = []
    if data.get("expected_n") is not None:
        facts.append(f"- Expected number of observations: {_value(data['expected_n'])}")
    if data.get("dataset_sha256"):
        facts.append(f"- Data file SHA-256: {_code(str(data['dataset_sha256']))}")
    if facts:
        lines.append("\n".join(facts))
    if len(lines) == 1:
        lines.append("Not described yet.")
    return "\n\n".join(lines)


def _instruments(insts: Sequence[Mapping[str, Any]]) -> str:
    out = ["## Instruments and claims"]
    for inst in insts:
        head = f"### {mt.inline(inst.get('name') or inst.get('slug'))} ({mt.inline(inst.get('slug'))})"
        facts = f"Family: {_value(inst.get('family'))}; data columns: {_value(inst.get('columns'))}."
        claims = inst.get("claims") or {}
        lines = [
            f"- **{c.capitalize()}:** {mt.inline(claims.get(c)) if claims.get(c) else '*not written*'}"
            for c in CONDITION_ORDER
        ]
        block = [head, facts, "\n".join(lines)]
        if inst.get("verdicts"):
            block.append(_verdicts(inst["verdicts"]))
        out.append("\n\n".join(block))
    return "\n\n".join(out)


def _verdicts(items: Sequence[Mapping[str, Any]]) -> str:
    """The verdicts recorded when the plan was drafted (``ivdossier.vocabulary.Verdict`` objects as dicts)."""
    rows = []
    for item in items:
        v = Verdict.from_dict(item)
        rows.append([v.condition.capitalize(), mt.badge(v.status), mt.cell(v.reason), mt.cell(v.rule)])
    return (
        "Verdicts when the plan was drafted (derived from the record at that time by the rules in "
        "`ivdossier.workflows.verdicts`; they describe the argument, they are not decision rules):\n\n"
        + mt.table(["Condition", "Verdict", "Why", "Rule"], rows, "lllc")
    )


def _graph(graph: Mapping[str, Any], threats: Sequence[Mapping[str, Any]]) -> str:
    out = ["## Causal graph and threats"]
    roles = graph.get("roles") or {}
    out.append(
        f"Base graph: instrument Z → treatment {_value(roles.get('treatment'))} → outcome "
        f"{_value(roles.get('outcome'))}, with an unmeasured confounder of treatment and outcome."
    )
    covs = graph.get("covariates") or []
    if covs:
        out.append(
            "Declared covariates: "
            + ", ".join(
                f"{mt.inline(c.get('name'))}{'' if c.get('measured') else ' (unmeasured)'}" for c in covs
            )
            + "."
        )
    edges = graph.get("edges") or []
    if edges:
        out.append(
            "\n".join(f"- {mt.inline(e.get('from'))} → {mt.inline(e.get('to'))}{_scope(e)}" for e in edges)
        )
    if threats:
        rows = []
        for t in threats:
            checks = "; ".join(
                f"{mt.inline(c.get('name'))}"
                + (f" ({mt.inline(c.get('command'))})" if c.get("command") else "")
                for c in t.get("checks") or []
            )
            rows.append([mt.cell(t.get("instrument")), mt.cell(t.get("code")), mt.cell(t.get("title")),
                         mt.cell(t.get("condition")), mt.cell(t.get("state")), checks or "argument only"])  # fmt: skip
        out.append(mt.table(["Instrument", "Code", "Threat", "Condition", "State", "Planned check"], rows))
    else:
        out.append("No threats are linked to these instruments yet.")
    return "\n\n".join(out)


SPEC_LABELS = (
    ("outcome", "Outcome"),
    ("treatment", "Treatment"),
    ("instruments", "Instruments"),
    ("controls", "Controls"),
    ("absorb", "Absorbed fixed effects"),
    ("cluster", "Cluster"),
    ("weights", "Weights"),
    ("method", "Estimator"),
    ("vcov", "Covariance"),
    ("small_sample", "Small-sample corrections"),
    ("alpha", "Level"),
)


def _specs(specs: Sequence[Mapping[str, Any]]) -> str:
    out = ["## Estimation specifications"]
    for spec in specs:
        rows = [[label, _value(spec.get(key))] for key, label in SPEC_LABELS]
        out.append(
            f"### Specification {mt.inline(spec.get('id'))}\n\n" + mt.table(["Setting", "Value"], rows)
        )
    if not specs:
        out.append("None yet.")
    return "\n\n".join(out)


def _diagnostics(items: Sequence[Any]) -> str:
    return "## Diagnostics\n\n" + ("\n".join(f"- {mt.inline(d)}" for d in items) if items else "None listed.")


def _rules(rules: Sequence[Mapping[str, Any]]) -> str:
    out = ["## Decision rules fixed in advance"]
    for rule in rules:
        lines = [f"### Rule {mt.inline(rule.get('id'))}"]
        if rule.get("description"):
            lines.append(mt.block(rule["description"]))
        kinds = sorted(_run_kinds(rule.get("when")))
        reads = f"- **Applies to:** {mt.inline(', '.join(kinds))} runs\n" if kinds else ""
        lines.append(
            reads + f"- **When:** {mt.inline(condition_text(rule.get('when') or {}))}\n"
            f"- **Then:** {mt.inline(rule.get('then'))}\n"
            f"- **Otherwise:** {mt.inline(rule.get('otherwise'))}"
        )
        out.append("\n\n".join(lines))
    if not rules:
        out.append("None.")
    out.append("The rules are stored as data and applied to each run by `ivdossier plan compare`.")
    return "\n\n".join(out)


def _power(power: Mapping[str, Any] | None) -> str:
    if not power:
        return "## Power and minimum detectable effect\n\nNot computed yet (draft the plan with the design options)."
    design = power.get("design") or {}
    rows = [
        ["Observations", _value(design.get("n"))],
        ["Standard error of the 2SLS estimate", _value(_round(power.get("se")))],
        ["Minimum detectable effect", _value(_round(power.get("mde")))],
        ["Target power", _value(power.get("target_power"))],
    ]
    if power.get("effect") is not None:
        rows += [["Effect assumed", _value(power.get("effect"))], ["Power at that effect", _value(_round(power.get("power")))],
                 ["Observations needed", _value(power.get("n_required"))]]  # fmt: skip
    fs = power.get("first_stage") or {}
    if fs.get("expected_f") is not None:
        rows.append(["Expected first-stage F", _value(_round(fs.get("expected_f")))])
    text = "## Power and minimum detectable effect\n\n" + mt.table(["Quantity", "Value"], rows, "lr")
    if power.get("formula"):
        text += f"\n\nFormula: {_code(str(power['formula']))}."
    assumptions = power.get("assumptions") or []
    if assumptions:
        text += "\n\n" + "\n".join(f"- {mt.inline(a)}" for a in assumptions)
    return text


def _round(value: Any) -> Any:
    return round(value, 4) if isinstance(value, float) else value


def plan_html(sealed: Mapping[str, Any], *, state: str, sha256: str = "") -> str:
    """The plan as one self-contained HTML page."""
    from ivdossier.reports.html import render_html

    with mt.for_html():
        markdown = plan_markdown(sealed, state=state, sha256=sha256)
    return render_html(markdown, title=str(sealed.get("title") or "Pre-analysis plan"))


def verify_document(text: str, sealed: Mapping[str, Any], *, sha256: str, fmt: str) -> list[Difference]:
    """Lines of an exported Markdown or HTML copy that differ from a fresh rendering of the sealed plan."""
    expected = (
        plan_markdown(sealed, state="frozen", sha256=sha256)
        if fmt == "md"
        else plan_html(sealed, state="frozen", sha256=sha256)
    )
    want, got = expected.splitlines(), text.splitlines()
    out: list[Difference] = []
    matcher = difflib.SequenceMatcher(a=want, b=got, autojunk=False)
    for tag, i1, i2, j1, j2 in matcher.get_opcodes():
        if tag == "equal":
            continue
        span = max(i2 - i1, j2 - j1)
        for k in range(span):
            old = want[i1 + k] if i1 + k < i2 else "<missing>"
            new = got[j1 + k] if j1 + k < j2 else "<missing>"
            line = j1 + k + 1 if j1 + k < j2 else j1 + 1
            out.append(Difference("exported file", f"line {line}", old, new))
    return out


def _scope(edge: Mapping[str, Any]) -> str:
    """Where a team edge is drawn: every instrument's graph, or one instrument's (plans drafted before scopes: none)."""
    scope = edge.get("scope")
    if scope is None:
        return ""
    return " (every instrument's graph)" if scope == "program" else f" (only in {mt.inline(scope)}'s graph)"
