"""Pre-analysis plans: drafting from the registry, structured decision rules, freezing, verifying and comparing.

A plan's content is plain JSON (see ``draft_content``). Freezing seals a document made of the plan's identity, its
content, the time and the author: canonical JSON (sorted keys, no insignificant whitespace, UTF-8, integral floats
written as integers, infinities as "inf"/"-inf") hashed with SHA-256. The sealed document is also written to the
audit trail, so ``verify_plan`` can say which field changed, not only that something did. Frozen plans are
read-only: any ORM update or delete of a frozen row raises ConflictError (a mapper event registered here).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import event, inspect
from sqlmodel import Session, select

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry import records
from ivdossier.registry.models import (
    AuditEvent,
    Covariate,
    Dataset,
    GraphEdge,
    Instrument,
    Plan,
    Program,
    Run,
    utcnow,
)

PLAN_SCHEMA = "ivdossier-plan/1"
EXPORT_FORMAT = "ivdossier-frozen-plan/1"
OPS: tuple[str, ...] = (">=", ">", "<=", "<", "==", "!=", "excludes", "includes")
SPEC_FIELDS: tuple[str, ...] = (
    "outcome",
    "treatment",
    "instruments",
    "controls",
    "absorb",
    "cluster",
    "weights",
    "method",
    "vcov",
    "small_sample",
    "alpha",
)
SET_FIELDS = {"treatment", "instruments", "controls", "absorb", "cluster"}
DEVIATION_KIND = {
    "outcome": "spec",
    "treatment": "spec",
    "instruments": "instrument set",
    "controls": "controls",
    "absorb": "controls",
    "cluster": "vcov",
    "weights": "spec",
    "method": "spec",
    "vcov": "vcov",
    "small_sample": "vcov",
    "alpha": "spec",
}
INACTIVE_STATES = ("rejected", "shelved")
DEFAULT_DIAGNOSTICS: tuple[str, ...] = (
    "first-stage coefficients, partial R-squared and first-stage F for each instrument",
    "effective F (Montiel Olea and Pflueger 2013) with its tau = 5, 10, 20 and 30 % critical values",
    "Anderson–Rubin test and confidence set (valid however weak the instruments)",
    "tF interval (Lee, McCrary, Moreira and Porter 2022) when there is one instrument",
    "Hansen J / Sargan over-identification test when there are more instruments than treatments",
    "Durbin–Wu–Hausman endogeneity test",
)
DEVIATIONS_TEXT = (
    "Every estimation run is compared with this frozen plan by the plan comparison command, which lists each "
    "difference in specification, sample, controls, covariance and instrument set. The report will show "
    "results under the planned specification first; any other specification will be labelled as a deviation, "
    "with the reason and the date it was decided. The decision rules are applied exactly as written in this plan."
)


# ---------------------------------------------------------------- canonical form


def normalise(value: Any, path: str = "") -> Any:
    """JSON-ready copy with normalised numbers: integral floats as int, -0.0 as 0, +/-inf as strings."""
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        if math.isnan(value):
            raise InvalidInputError(
                f"plan value at {path or 'top level'} is NaN; replace it with a number or null."
            )
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        if value.is_integer() and abs(value) < 2**53:
            return int(value)
        return value
    if isinstance(value, Mapping):
        return {str(k): normalise(v, f"{path}.{k}" if path else str(k)) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [normalise(v, f"{path}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, datetime):
        return iso(value)
    raise InvalidInputError(
        f"plan value at {path or 'top level'} has type {type(value).__name__}; use JSON data."
    )


def canonical_json(value: Any) -> bytes:
    """Canonical serialisation: sorted keys, no insignificant whitespace, UTF-8, normalised numbers."""
    return json.dumps(
        normalise(value), sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def sha256_of(value: Any) -> str:
    return hashlib.sha256(canonical_json(value)).hexdigest()


def iso(moment: datetime) -> str:
    """UTC timestamp to the second, e.g. 2026-01-31T09:30:00Z (naive datetimes are read as UTC)."""
    aware = moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)
    return aware.strftime("%Y-%m-%dT%H:%M:%SZ")


# ---------------------------------------------------------------- decision rules


def lookup(results: Mapping[str, Any], path: str) -> tuple[bool, Any]:
    """Value at a dotted path in a run's results dict; (False, None) when any part is missing."""
    node: Any = results
    for part in path.split("."):
        if isinstance(node, Mapping) and part in node:
            node = node[part]
        elif isinstance(node, list) and part.isdigit() and int(part) < len(node):
            node = node[int(part)]
        else:
            return False, None
    return True, node


def _as_number(value: Any) -> float | None:
    if isinstance(value, bool):
        return None
    if isinstance(value, int | float):
        return float(value)
    if value == "inf":
        return math.inf
    if value == "-inf":
        return -math.inf
    return None


def check_condition(cond: Any, where: str) -> None:
    """Validate a condition tree: {"all"|"any": [...]}, {"not": cond} or a comparison leaf."""
    if not isinstance(cond, Mapping):
        raise InvalidInputError(f"{where}: a condition must be an object, got {cond!r}.")
    if "all" in cond or "any" in cond:
        key = "all" if "all" in cond else "any"
        items = cond[key]
        if not isinstance(items, list) or not items:
            raise InvalidInputError(f"{where}: '{key}' needs a non-empty list of conditions.")
        for i, item in enumerate(items):
            check_condition(item, f"{where}.{key}[{i}]")
        return
    if "not" in cond:
        check_condition(cond["not"], f"{where}.not")
        return
    stat = cond.get("statistic")
    if not isinstance(stat, str) or not stat:
        raise InvalidInputError(
            f"{where}: give 'statistic', a dotted path into the run results, e.g. strength.effective_f.statistic."
        )
    op = cond.get("op")
    if op not in OPS:
        raise InvalidInputError(f"{where}: op {op!r} is not known; use one of {', '.join(OPS)}.")
    has_value, has_ref = "value" in cond, "compare_to" in cond
    if has_value == has_ref:
        raise InvalidInputError(
            f"{where}: give exactly one of 'value' (a number, true/false or text) or 'compare_to' (a path)."
        )
    if has_ref and not isinstance(cond["compare_to"], str):
        raise InvalidInputError(
            f"{where}: 'compare_to' must be a dotted path such as strength.effective_f.critical_values.tau_10pct."
        )
    extra = set(cond) - {"statistic", "op", "value", "compare_to"}
    if extra:
        raise InvalidInputError(f"{where}: unknown key(s) {', '.join(sorted(extra))} in a comparison.")


def check_rule(rule: Any, index: int = 0) -> dict[str, Any]:
    """Validate one decision rule: id, when (condition), then, otherwise, optional description."""
    where = f"decision rule #{index + 1}"
    if not isinstance(rule, Mapping):
        raise InvalidInputError(f"{where} must be an object with id, when, then and otherwise.")
    rid = rule.get("id")
    if not isinstance(rid, str) or not rid:
        raise InvalidInputError(f"{where} needs an 'id' (short text such as 'strength-gate').")
    where = f"decision rule {rid!r}"
    for key in ("then", "otherwise"):
        if not isinstance(rule.get(key), str) or not rule[key].strip():
            raise InvalidInputError(
                f"{where} needs '{key}': the action taken when the condition {'holds' if key == 'then' else 'fails'}."
            )
    extra = set(rule) - {"id", "description", "when", "then", "otherwise"}
    if extra:
        raise InvalidInputError(f"{where} has unknown key(s) {', '.join(sorted(extra))}.")
    check_condition(rule.get("when"), f"{where}: when")
    return dict(rule)


def check_rules(rules: Any) -> list[dict[str, Any]]:
    if not isinstance(rules, list):
        raise InvalidInputError("decision rules must be a JSON list of rule objects.")
    out = [check_rule(r, i) for i, r in enumerate(rules)]
    ids = [r["id"] for r in out]
    dup = sorted({i for i in ids if ids.count(i) > 1})
    if dup:
        raise InvalidInputError(f"decision rule id(s) {', '.join(dup)} are used twice; make each id unique.")
    return out


@dataclass(frozen=True)
class Comparison:
    """One evaluated comparison inside a rule."""

    statistic: str
    value: Any
    op: str
    threshold: Any
    threshold_from: str | None
    result: bool | None
    reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "statistic": self.statistic,
            "value": self.value,
            "op": self.op,
            "threshold": self.threshold,
            "threshold_from": self.threshold_from,
            "result": self.result,
            "reason": self.reason,
        }


def _compare(value: Any, op: str, threshold: Any) -> tuple[bool | None, str | None]:
    if op in ("excludes", "includes"):
        point = _as_number(threshold)
        if not isinstance(value, list) or point is None:
            return None, "'excludes'/'includes' need a list of [low, high] intervals and a number"
        inside = False
        for pair in value:
            if not isinstance(pair, list) or len(pair) != 2:
                return None, "the statistic is not a list of [low, high] intervals"
            lo, hi = _as_number(pair[0]), _as_number(pair[1])
            if lo is None or hi is None:
                return None, "an interval end is not a number"
            inside = inside or lo <= point <= hi
        return (not inside) if op == "excludes" else inside, None
    if op in ("==", "!="):
        a, b = _as_number(value), _as_number(threshold)
        same = (a == b) if a is not None and b is not None else value == threshold
        return same if op == "==" else not same, None
    a, b = _as_number(value), _as_number(threshold)
    if a is None or b is None:
        return None, f"cannot order {value!r} and {threshold!r}: both must be numbers"
    return {">=": a >= b, ">": a > b, "<=": a <= b, "<": a < b}[op], None


def _evaluate(cond: Mapping[str, Any], results: Mapping[str, Any], out: list[Comparison]) -> bool | None:
    if "all" in cond or "any" in cond:
        parts = [_evaluate(c, results, out) for c in cond.get("all", cond.get("any", []))]
        if "all" in cond:
            return False if False in parts else (None if None in parts else True)
        return True if True in parts else (None if None in parts else False)
    if "not" in cond:
        inner = _evaluate(cond["not"], results, out)
        return None if inner is None else not inner
    stat, op = str(cond["statistic"]), str(cond["op"])
    found, value = lookup(results, stat)
    ref = cond.get("compare_to")
    threshold = cond.get("value")
    if not found:
        out.append(Comparison(stat, None, op, threshold, ref, None, f"the run has no {stat}"))
        return None
    if ref is not None:
        ok, threshold = lookup(results, ref)
        if not ok:
            out.append(Comparison(stat, value, op, None, ref, None, f"the run has no {ref}"))
            return None
    if value is None:
        out.append(
            Comparison(stat, None, op, threshold, ref, None, f"{stat} is empty in this run (not applicable)")
        )
        return None
    result, reason = _compare(value, op, threshold)
    out.append(Comparison(stat, value, op, threshold, ref, result, reason))
    return result


@dataclass(frozen=True)
class RuleOutcome:
    """A decision rule applied to one run: whether its condition held and the action it prescribes."""

    rule_id: str
    holds: bool | None
    action: str
    comparisons: tuple[Comparison, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "rule": self.rule_id,
            "holds": self.holds,
            "action": self.action,
            "comparisons": [c.to_dict() for c in self.comparisons],
        }


def evaluate_rule(rule: Mapping[str, Any], results: Mapping[str, Any]) -> RuleOutcome:
    """Apply one rule to a run's results; a missing statistic makes it 'not evaluable' with the reason."""
    comps: list[Comparison] = []
    holds = _evaluate(rule["when"], results, comps)
    if holds is None:
        reasons = "; ".join(c.reason for c in comps if c.reason) or "a statistic is missing"
        action = f"not evaluable: {reasons}"
    else:
        action = str(rule["then"] if holds else rule["otherwise"])
    return RuleOutcome(str(rule["id"]), holds, action, tuple(comps))


def default_rules(n_instruments: int) -> list[dict[str, Any]]:
    """Rules a draft starts with; the team edits them before freezing."""
    rules: list[dict[str, Any]] = [
        {
            "id": "strength-gate",
            "description": "Use 2SLS t-based inference only with an instrument strong enough for a 10 % worst-case "
            "bias (Montiel Olea–Pflueger effective F against its tau = 10 % critical value).",
            "when": {
                "statistic": "strength.effective_f.statistic",
                "op": ">=",
                "compare_to": "strength.effective_f.critical_values.tau_10pct",
            },
            "then": "report 2SLS with t-based inference (tF-adjusted critical value with one instrument)",
            "otherwise": "report the Anderson–Rubin set as the primary interval; do not use 2SLS t-inference",
        },
        {
            "id": "effect-claim",
            "description": "Call the effect distinguishable from zero only if the weak-instrument-robust "
            "Anderson–Rubin 95 % set excludes zero.",
            "when": {
                "statistic": "weak_iv_robust.anderson_rubin.confidence_set",
                "op": "excludes",
                "value": 0,
            },
            "then": "describe the effect as distinguishable from zero at the 5 % level",
            "otherwise": "describe the effect as not distinguishable from zero at the 5 % level",
        },
    ]
    if n_instruments > 1:
        rules.append(
            {
                "id": "instrument-agreement",
                "description": "With several instruments, check whether they agree (which cannot establish "
                "that any of them is valid).",
                "when": {"statistic": "overid.p_value", "op": ">=", "value": 0.05},
                "then": "report the pooled estimate together with each instrument's own estimate",
                "otherwise": "report instrument disagreement and lead with each instrument's own estimate",
            }
        )
    return rules


# ---------------------------------------------------------------- drafting


def _threat_rows(session: Session, inst: Instrument) -> list[dict[str, Any]]:
    from ivdossier.registry.threats import links_of
    from ivdossier.threats_catalog.checks import get_check

    rows = []
    for link, threat in links_of(session, inst):
        checks = []
        for name in threat.checks or []:
            try:
                chk = get_check(name)
                checks.append({"name": name, "description": chk.description, "command": chk.how_to_run})
            except NotFoundError:
                checks.append({"name": name, "description": "", "command": ""})
        rows.append(
            {
                "instrument": inst.slug,
                "code": threat.code,
                "title": threat.title,
                "condition": threat.condition
                if threat.threat_kind != "reading"
                else f"reading: {threat.condition}",
                "state": link.state,
                "testability": threat.testability,
                "checks": checks,
            }
        )
    return rows


def _names(values: Sequence[str] | None) -> list[str]:
    return [v for v in (values or []) if v]


def draft_content(
    session: Session,
    program: Program,
    instruments: Sequence[Instrument],
    *,
    controls: Sequence[str] = (),
    absorb: Sequence[str] = (),
    cluster: Sequence[str] = (),
    method: str = "2sls",
    vcov: str | None = None,
    alpha: float = 0.05,
    data_description: str = "",
    sample: str = "",
    expected_n: int | None = None,
    power: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The content of a new plan, assembled from the registry and the given specification options."""
    cov = vcov or ("cluster" if cluster else "robust")
    if cov == "cluster" and not cluster:
        raise InvalidInputError("vcov 'cluster' needs --cluster COLUMN; name the clustering column.")
    specs = []
    for inst in instruments:
        cols = _names(inst.columns)
        if not cols:
            raise InvalidInputError(
                f"instrument {inst.slug!r} has no data column; add one with `ivdossier instrument edit` first."
            )
        specs.append(
            {
                "id": inst.slug,
                "outcome": program.outcome,
                "treatment": [program.treatment] if program.treatment else [],
                "instruments": cols,
                "controls": list(controls),
                "absorb": list(absorb),
                "cluster": list(cluster),
                "weights": None,
                "method": method,
                "vcov": cov,
                "small_sample": True,
                "alpha": alpha,
            }
        )
    covs = session.exec(select(Covariate).where(Covariate.program_id == program.id).order_by(Covariate.name))
    edges = session.exec(select(GraphEdge).where(GraphEdge.program_id == program.id).order_by(GraphEdge.slug))
    n_cols = max((len(_names(i.columns)) for i in instruments), default=1)
    return {
        "schema": PLAN_SCHEMA,
        "question": {
            "program": program.slug,
            "title": program.title,
            "question": program.question,
            "treatment": program.treatment,
            "outcome": program.outcome,
            "unit": program.unit,
            "population": program.population,
        },
        "data": {"description": data_description, "sample": sample, "expected_n": expected_n},
        "instruments": [
            {
                "slug": i.slug,
                "name": i.name,
                "family": i.family,
                "columns": _names(i.columns),
                "state": i.state,
                "claims": {
                    "relevance": i.claim_relevance,
                    "exclusion": i.claim_exclusion,
                    "exogeneity": i.claim_exogeneity,
                    "monotonicity": i.claim_monotonicity,
                },
            }
            for i in instruments
        ],
        "graph": {
            "roles": {"instrument": "Z", "treatment": program.treatment, "outcome": program.outcome},
            "covariates": [{"name": c.name, "measured": c.measured} for c in covs],
            "edges": [{"from": e.source, "to": e.target, "note": e.note} for e in edges],
        },
        "threats": [row for inst in instruments for row in _threat_rows(session, inst)],
        "specs": specs,
        "diagnostics": list(DEFAULT_DIAGNOSTICS),
        "decision_rules": default_rules(n_cols),
        "power": None if power is None else dict(power),
        "deviations": DEVIATIONS_TEXT,
    }


def draft_plan(
    session: Session,
    *,
    actor: str,
    target: str,
    slug: str | None = None,
    title: str | None = None,
    **options: Any,
) -> Plan:
    """Draft a plan for a program (all its active candidates) or for one instrument."""
    inst = records.find(session, Instrument, target)
    if inst is not None:
        program = records.get_by_id(session, Program, inst.program_id)
        chosen = [inst]
    else:
        found = records.find(session, Program, target)
        if found is None:
            raise NotFoundError(
                f"no program or instrument named {target!r}; see `ivdossier program list` and `ivdossier instrument list`."
            )
        program = found
        chosen = list(
            session.exec(
                select(Instrument)
                .where(Instrument.program_id == program.id, Instrument.state.not_in(INACTIVE_STATES))  # type: ignore[attr-defined]
                .order_by(Instrument.slug)
            )
        )
        if not chosen:
            raise InvalidInputError(f"program {target!r} has no active candidate instrument; add one first.")
    plan_slug = records.check_slug(slug or _next_slug(session, f"{target}-plan"), what="plan")
    content = draft_content(session, program, chosen, **options)
    normalise(content)
    plan = Plan(
        slug=plan_slug,
        program_id=program.id or 0,
        instrument_id=inst.id if inst is not None else None,
        title=records.check_text(
            title or f"Pre-analysis plan: {program.title}", field="title", max_length=300
        ),
        content=content,
        state="draft",
    )
    return records.create(session, plan, actor=actor)


def _next_slug(session: Session, base: str) -> str:
    base = base[:60].rstrip("-")
    taken = set(session.exec(select(Plan.slug).where(Plan.slug.startswith(base))))  # type: ignore[attr-defined]
    if base not in taken:
        return base
    n = 2
    while f"{base}-{n}" in taken:
        n += 1
    return f"{base}-{n}"


EDITABLE_SECTIONS = (
    "data",
    "specs",
    "diagnostics",
    "decision_rules",
    "power",
    "deviations",
    "threats",
    "graph",
)


def edit_plan(
    session: Session,
    *,
    actor: str,
    slug: str,
    title: str | None = None,
    sections: Mapping[str, Any] | None = None,
    expected_version: int | None = None,
) -> Plan:
    """Replace whole sections of a draft plan's content (decision rules are validated); frozen plans refuse."""
    plan = records.get(session, Plan, slug)
    _refuse_if_frozen(plan)
    content = dict(plan.content or {})
    for name, value in (sections or {}).items():
        if name not in EDITABLE_SECTIONS:
            raise InvalidInputError(
                f"plan section {name!r} cannot be edited; use one of {', '.join(EDITABLE_SECTIONS)}."
            )
        content[name] = check_rules(value) if name == "decision_rules" else value
    normalise(content)
    changes: dict[str, Any] = {"content": content}
    if title is not None:
        changes["title"] = records.check_text(title, field="title", max_length=300)
    return records.edit(session, plan, changes, actor=actor, expected_version=expected_version)


# ---------------------------------------------------------------- freezing


def _refuse_if_frozen(plan: Plan) -> None:
    if plan.state == "frozen":
        raise ConflictError(
            f"plan {plan.slug!r} is frozen (sealed {plan.frozen_at and iso(plan.frozen_at)} by {plan.frozen_by}) "
            "and cannot be changed; draft a new plan and report the differences as deviations."
        )


@event.listens_for(Plan, "before_update")
def _guard_update(_mapper: Any, _conn: Any, target: Plan) -> None:
    history = inspect(target).attrs.state.history
    before = history.deleted[0] if history.deleted else target.state
    if before == "frozen":
        raise ConflictError(
            f"plan {target.slug!r} is frozen and cannot be changed; draft a new plan and report the differences "
            "as deviations."
        )


@event.listens_for(Plan, "before_delete")
def _guard_delete(_mapper: Any, _conn: Any, target: Plan) -> None:
    if target.state == "frozen":
        raise ConflictError(f"plan {target.slug!r} is frozen and cannot be deleted.")


def sealed_document(
    session: Session, plan: Plan, *, frozen_at: datetime | None = None, frozen_by: str | None = None
) -> dict[str, Any]:
    """What the hash covers: identity, title, content, and the freeze time and author (overridable at freeze)."""
    moment = frozen_at if frozen_at is not None else plan.frozen_at
    author = frozen_by if frozen_by is not None else plan.frozen_by
    program = session.get(Program, plan.program_id)
    inst = session.get(Instrument, plan.instrument_id) if plan.instrument_id else None
    return normalise(
        {
            "schema": EXPORT_FORMAT,
            "plan": plan.slug,
            "program": program.slug if program else None,
            "instrument": inst.slug if inst else None,
            "title": plan.title,
            "content": plan.content or {},
            "frozen_at": iso(moment) if moment else None,
            "frozen_by": author,
        }
    )


def freeze_plan(session: Session, *, actor: str, slug: str, at: datetime | None = None) -> Plan:
    """Seal a draft: store time, author and the SHA-256 of its canonical form; record the sealed document."""
    plan = records.get(session, Plan, slug)
    _refuse_if_frozen(plan)
    check_rules((plan.content or {}).get("decision_rules", []))
    moment = (at or utcnow()).astimezone(UTC).replace(microsecond=0)
    sealed = sealed_document(session, plan, frozen_at=moment, frozen_by=actor)
    digest = sha256_of(sealed)
    records.edit(
        session,
        plan,
        {"state": "frozen", "frozen_at": moment, "frozen_by": actor, "sha256": digest},
        actor=actor,
        action="freeze",
    )
    records.audit(
        session,
        actor=actor,
        action="sealed",
        obj=plan,
        before=None,
        after={"sha256": digest, "sealed": sealed},
    )
    return plan


def export_document(session: Session, slug: str) -> str:
    """The frozen plan as a JSON file: format, SHA-256 and the sealed document (indented, sorted keys)."""
    plan = records.get(session, Plan, slug)
    if plan.state != "frozen":
        raise InvalidInputError(f"plan {slug!r} is a draft; freeze it before exporting a sealed copy.")
    data = {"format": EXPORT_FORMAT, "sha256": plan.sha256, "sealed": sealed_document(session, plan)}
    return json.dumps(data, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


# ---------------------------------------------------------------- verification


@dataclass(frozen=True)
class Difference:
    """One field that differs: its path, the frozen value and the value found now."""

    where: str
    path: str
    frozen: Any
    found: Any

    def to_dict(self) -> dict[str, Any]:
        return {"where": self.where, "path": self.path, "frozen": self.frozen, "found": self.found}


_MISSING = "<missing>"


def diff(frozen: Any, found: Any, path: str = "", *, where: str = "registry") -> list[Difference]:
    """Every leaf path where two JSON values differ (missing keys and list lengths included)."""
    if isinstance(frozen, dict) and isinstance(found, dict):
        out: list[Difference] = []
        for key in sorted(set(frozen) | set(found)):
            sub = f"{path}.{key}" if path else key
            out += (
                diff(frozen.get(key, _MISSING), found.get(key, _MISSING), sub, where=where)
                if (key in frozen and key in found)
                else [Difference(where, sub, frozen.get(key, _MISSING), found.get(key, _MISSING))]
            )
        return out
    if isinstance(frozen, list) and isinstance(found, list):
        out = []
        for i in range(max(len(frozen), len(found))):
            sub = f"{path}[{i}]"
            if i >= len(frozen) or i >= len(found):
                out.append(Difference(where, sub, frozen[i] if i < len(frozen) else _MISSING,
                                      found[i] if i < len(found) else _MISSING))  # fmt: skip
            else:
                out += diff(frozen[i], found[i], sub, where=where)
        return out
    if type(frozen) is not type(found) or frozen != found:
        return [Difference(where, path or "(whole document)", frozen, found)]
    return []


@dataclass(frozen=True)
class VerifyReport:
    """Outcome of verifying a frozen plan (and optionally an exported copy)."""

    plan: str
    sha256: str
    intact: bool
    differences: tuple[Difference, ...] = field(default=())
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        return {
            "plan": self.plan,
            "sha256": self.sha256,
            "intact": self.intact,
            "differences": [d.to_dict() for d in self.differences],
            "notes": list(self.notes),
        }


def recorded_seal(session: Session, plan: Plan) -> dict[str, Any] | None:
    """The sealed document written to the audit trail when the plan was frozen (latest), or None."""
    event_row = session.exec(
        select(AuditEvent)
        .where(AuditEvent.entity_uuid == plan.uuid, AuditEvent.action == "sealed")
        .order_by(AuditEvent.id.desc())  # type: ignore[union-attr]
    ).first()
    if event_row is None or not isinstance(event_row.after, dict):
        return None
    sealed = event_row.after.get("sealed")
    return sealed if isinstance(sealed, dict) else None


def verify_plan(session: Session, slug: str, *, exported: str | None = None) -> VerifyReport:
    """Check the plan row (and an exported JSON copy) against the seal; name every differing field."""
    plan = records.get(session, Plan, slug)
    if plan.state != "frozen":
        raise InvalidInputError(
            f"plan {slug!r} is a draft; only frozen plans can be verified. Freeze it first."
        )
    current = sealed_document(session, plan)
    reference = recorded_seal(session, plan)
    notes: list[str] = []
    diffs: list[Difference] = []
    if reference is None:
        notes.append("the sealed document is missing from the audit trail; only the hash can be compared")
    elif sha256_of(reference) != plan.sha256:
        diffs.append(Difference("registry", "sha256", sha256_of(reference), plan.sha256))
        notes.append("the stored hash does not match the sealed document in the audit trail")
    if sha256_of(current) != plan.sha256 or (reference is not None and reference != current):
        if reference is not None:
            diffs += diff(reference, current, where="registry")
        if not diffs:
            diffs.append(Difference("registry", "(hash)", plan.sha256, sha256_of(current)))
    if exported is not None:
        diffs += _verify_export(exported, reference or current, plan.sha256)
    return VerifyReport(plan.slug, plan.sha256, not diffs, tuple(diffs), tuple(notes))


def parse_export(text: str) -> dict[str, Any]:
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidInputError(
            f"the exported plan is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}); "
            "pass the file written by `ivdossier plan export`."
        ) from None
    if not isinstance(data, dict) or not isinstance(data.get("sealed"), dict):
        raise InvalidInputError(
            f"the file is not an exported frozen plan (format {EXPORT_FORMAT}); use `ivdossier plan export`."
        )
    return data


def _verify_export(text: str, reference: Mapping[str, Any], sha: str) -> list[Difference]:
    data = parse_export(text)
    out = diff(dict(reference), normalise(data["sealed"]), where="exported file")
    if data.get("format") != EXPORT_FORMAT:
        out.insert(0, Difference("exported file", "format", EXPORT_FORMAT, data.get("format")))
    if data.get("sha256") != sha:
        out.append(Difference("exported file", "sha256", sha, data.get("sha256")))
    elif sha256_of(data["sealed"]) != sha and not out:
        out.append(Difference("exported file", "(hash)", sha, sha256_of(data["sealed"])))
    return out


# ---------------------------------------------------------------- comparing runs with the plan


@dataclass(frozen=True)
class RunView:
    """What plan comparison needs from a run."""

    slug: str
    spec: Mapping[str, Any]
    results: Mapping[str, Any]
    dataset_sha256: str | None = None
    created_at: datetime | None = None


@dataclass(frozen=True)
class Deviation:
    """One way a run departs from the plan."""

    run: str
    kind: str
    field: str
    planned: Any
    actual: Any

    def to_dict(self) -> dict[str, Any]:
        return {
            "run": self.run,
            "kind": self.kind,
            "field": self.field,
            "planned": self.planned,
            "actual": self.actual,
        }


@dataclass(frozen=True)
class RunComparison:
    """A run against the plan: the spec it was matched with, deviations and evaluated decision rules."""

    run: str
    matched_spec: str | None
    deviations: tuple[Deviation, ...]
    rules: tuple[RuleOutcome, ...]
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "run": self.run,
            "matched_spec": self.matched_spec,
            "deviations": [d.to_dict() for d in self.deviations],
            "decision_rules": [r.to_dict() for r in self.rules],
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class PlanComparison:
    """All runs compared with one plan."""

    plan: str
    state: str
    sha256: str
    runs: tuple[RunComparison, ...]
    notes: tuple[str, ...] = ()

    @property
    def n_deviations(self) -> int:
        return sum(len(r.deviations) for r in self.runs)

    def to_dict(self) -> dict[str, Any]:
        return {
            "plan": self.plan,
            "state": self.state,
            "sha256": self.sha256,
            "n_deviations": self.n_deviations,
            "runs": [r.to_dict() for r in self.runs],
            "notes": list(self.notes),
        }


def _norm_field(name: str, value: Any) -> Any:
    if name in SET_FIELDS:
        if value is None:
            return []
        items = [value] if isinstance(value, str) else list(value)
        return sorted(str(v) for v in items if v not in ("", None))
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


def _match_spec(specs: Sequence[Mapping[str, Any]], run_spec: Mapping[str, Any]) -> Mapping[str, Any] | None:
    if not specs:
        return None
    insts = _norm_field("instruments", run_spec.get("instruments"))
    for spec in specs:
        if _norm_field("instruments", spec.get("instruments")) == insts:
            return spec
    for spec in specs:
        if spec.get("outcome") == run_spec.get("outcome"):
            return spec
    return specs[0]


def compare_runs(
    content: Mapping[str, Any], runs: Sequence[RunView], *, plan: str = "", frozen_at: datetime | None = None
) -> tuple[RunComparison, ...]:
    """Deviations of each run from the plan's closest spec and sample, and the plan's rules on its results."""
    specs = list(content.get("specs") or [])
    rules = list(content.get("decision_rules") or [])
    data = content.get("data") or {}
    out = []
    for run in runs:
        spec = _match_spec(specs, run.spec)
        devs: list[Deviation] = []
        notes: list[str] = []
        if spec is None:
            notes.append("the plan has no estimation spec to compare with")
        else:
            for name in SPEC_FIELDS:
                planned, actual = _norm_field(name, spec.get(name)), _norm_field(name, run.spec.get(name))
                if planned != actual:
                    devs.append(Deviation(run.slug, DEVIATION_KIND[name], name, planned, actual))
        expected_n = data.get("expected_n")
        found_n = run.results.get("n")
        if expected_n is not None and found_n is not None and int(found_n) != int(expected_n):
            devs.append(Deviation(run.slug, "sample", "n", expected_n, found_n))
        planned_data = data.get("dataset_sha256")
        if planned_data and run.dataset_sha256 and planned_data != run.dataset_sha256:
            devs.append(Deviation(run.slug, "sample", "dataset_sha256", planned_data, run.dataset_sha256))
        if frozen_at is not None and run.created_at is not None and _utc(run.created_at) < _utc(frozen_at):
            notes.append(f"run {run.slug} was made before the plan was frozen ({iso(frozen_at)})")
        outcomes = tuple(evaluate_rule(r, run.results) for r in rules)
        out.append(
            RunComparison(
                run.slug,
                None if spec is None else str(spec.get("id", "")),
                tuple(devs),
                outcomes,
                tuple(notes),
            )
        )
    return tuple(out)


def _utc(moment: datetime) -> datetime:
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def compare_plan(session: Session, slug: str, run_slugs: Sequence[str]) -> PlanComparison:
    """Compare runs (by slug) with a plan; a draft plan is compared too, with a note that it is not sealed."""
    plan = records.get(session, Plan, slug)
    if not run_slugs:
        raise InvalidInputError("name at least one run to compare; see `ivdossier run list`.")
    views = []
    for rs in run_slugs:
        run = records.get(session, Run, rs)
        dataset = session.get(Dataset, run.dataset_id) if run.dataset_id else None
        views.append(
            RunView(
                run.slug,
                dict(run.spec or {}),
                dict(run.results or {}),
                dataset.sha256 if dataset else None,
                run.created_at,
            )
        )
    notes = (
        []
        if plan.state == "frozen"
        else [f"plan {slug!r} is a draft: deviations are measured against an unsealed plan"]
    )
    runs = compare_runs(plan.content or {}, views, plan=slug, frozen_at=plan.frozen_at)
    return PlanComparison(plan.slug, plan.state, plan.sha256, runs, tuple(notes))


def plan_dict(session: Session, plan: Plan) -> dict[str, Any]:
    """JSON-safe view of a plan row."""
    data = records.snapshot(plan, bookkeeping=True)
    program = session.get(Program, plan.program_id)
    inst = session.get(Instrument, plan.instrument_id) if plan.instrument_id else None
    data["program"] = program.slug if program else None
    data["instrument"] = inst.slug if inst else None
    if plan.frozen_at is not None:
        data["frozen_at"] = iso(plan.frozen_at)
    return data
