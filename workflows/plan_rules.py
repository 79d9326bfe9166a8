"""Decision rules of a pre-analysis plan as data: validation, evaluation on a run's results, and the defaults.

A rule is ``{"id", "description", "when", "then", "otherwise"}``; ``when`` is a condition tree of ``all``/``any``/
``not`` over comparison leaves ``{"statistic": dotted.path, "op": ..., "value" | "compare_to": ...}``. A path of a
run other than an estimate is qualified by its run kind (``fragility-influence:t_significance_flips``; see
``plan_quantities``). Evaluating a rule on a run gives its prescribed action; when a statistic is empty because the
part of the analysis that reports it does not apply to the run, the rule is "not applicable" with that part's
reason; when a statistic is missing for another reason, "not evaluable" with the reason.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.vocabulary import NOT_APPLICABLE, NotApplicable

OPS: tuple[str, ...] = (">=", ">", "<=", "<", "==", "!=", "excludes", "includes")


def _bare(path: str) -> str:
    """The path inside the run's results (without the run-kind qualifier of ``plan_quantities``)."""
    return path.partition(":")[2] if ":" in path else path


def _step(node: Any, part: str) -> tuple[bool, Any]:
    if isinstance(node, Mapping) and part in node:
        return True, node[part]
    if isinstance(node, list) and part.isdigit() and int(part) < len(node):
        return True, node[int(part)]
    if isinstance(node, list) and not part.isdigit():  # a record of a list named by its method
        named = [v for v in node if isinstance(v, Mapping) and v.get("method") == part]
        if len(named) == 1:
            return True, named[0]
    return False, None


def lookup(results: Mapping[str, Any], path: str) -> tuple[bool, Any]:
    """Value at a dotted path in a run's results dict; (False, None) when any part is missing."""
    node: Any = results
    for part in _bare(path).split("."):
        found, node = _step(node, part)
        if not found:
            return False, None
    return True, node


def _is_empty(value: Any) -> bool:
    return value is None or value == "nan" or (isinstance(value, float) and math.isnan(value))


def not_applicable_reason(results: Mapping[str, Any], path: str) -> str | None:
    """Why the statistic at ``path`` is empty or missing, when the part of the analysis that reports it does not
    apply to this run: the reason of the innermost enclosing not-applicable section (either stored shape, read as
    ``vocabulary.NotApplicable``), or the ``<name>_reason`` an estimate stores beside an empty statistic."""
    node: Any = results
    reason: str | None = None
    parts = _bare(path).split(".")
    for i, part in enumerate(parts):
        na = NotApplicable.from_view(node)
        if na is not None:
            reason = na.reason
        if (
            isinstance(node, Mapping)
            and isinstance(node.get(f"{part}_reason"), str)
            and node[f"{part}_reason"]
        ):
            empty_here = part not in node or _is_empty(node[part])
            if empty_here:
                return str(node[f"{part}_reason"])
        parent = node
        found, node = _step(node, part)
        if not found:
            return reason
        if i == len(parts) - 1:
            inner = NotApplicable.from_view(node)
            if inner is not None:
                return inner.reason
            own = parent.get("reason") if isinstance(parent, Mapping) and part != "reason" else None
            if reason is None and _is_empty(node) and isinstance(own, str) and own:
                return own  # a section that states why its statistics are empty (overid when just identified)
    return reason


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
    not_applicable: bool = False  # empty because the part of the analysis reporting it does not apply

    def to_dict(self) -> dict[str, Any]:
        return {
            "statistic": self.statistic,
            "value": self.value,
            "op": self.op,
            "threshold": self.threshold,
            "threshold_from": self.threshold_from,
            "result": self.result,
            "reason": self.reason,
            "not_applicable": self.not_applicable,
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
    if not found or _is_empty(value):
        why = not_applicable_reason(results, stat)
        if why is not None:
            note = f"{stat}: {NOT_APPLICABLE} ({why})"
            out.append(Comparison(stat, None, op, threshold, ref, None, note, not_applicable=True))
        elif not found:
            out.append(Comparison(stat, None, op, threshold, ref, None, f"the run has no {stat}"))
        else:
            out.append(Comparison(stat, None, op, threshold, ref, None, f"{stat} is empty in this run"))
        return None
    if ref is not None:
        ok, threshold = lookup(results, ref)
        if not ok or _is_empty(threshold):
            why = not_applicable_reason(results, ref)
            if why is not None:
                note = f"{ref}: {NOT_APPLICABLE} ({why})"
                out.append(Comparison(stat, value, op, None, ref, None, note, not_applicable=True))
            else:
                missing = f"the run has no {ref}" if not ok else f"{ref} is empty in this run"
                out.append(Comparison(stat, value, op, None, ref, None, missing))
            return None
    result, reason = _compare(value, op, threshold)
    out.append(Comparison(stat, value, op, threshold, ref, result, reason))
    return result


@dataclass(frozen=True)
class RuleOutcome:
    """A decision rule applied to one run: whether its condition held and the action it prescribes.

    ``status`` is "holds", "fails", "not applicable" (a statistic it needs is empty because that part of the
    analysis does not apply to the run; the action names the reason) or "not evaluable" (a statistic is missing
    for another reason)."""

    rule_id: str
    holds: bool | None
    action: str
    comparisons: tuple[Comparison, ...]
    status: str = ""

    def to_dict(self) -> dict[str, Any]:
        return {
            "rule": self.rule_id,
            "holds": self.holds,
            "status": self.status,
            "action": self.action,
            "comparisons": [c.to_dict() for c in self.comparisons],
        }


def evaluate_rule(rule: Mapping[str, Any], results: Mapping[str, Any]) -> RuleOutcome:
    """Apply one rule to a run's results; a statistic that does not apply makes it 'not applicable' with the
    reason, a statistic missing for another reason 'not evaluable'."""
    comps: list[Comparison] = []
    holds = _evaluate(rule["when"], results, comps)
    if holds is None:
        undecided = [c for c in comps if c.result is None]
        if undecided and all(c.not_applicable for c in undecided):
            status = NOT_APPLICABLE
            action = "; ".join(c.reason or "" for c in undecided)
        else:
            status = "not evaluable"
            reasons = "; ".join(c.reason for c in comps if c.reason) or "a statistic is missing"
            action = f"not evaluable: {reasons}"
    else:
        status = "holds" if holds else "fails"
        action = str(rule["then"] if holds else rule["otherwise"])
    return RuleOutcome(str(rule["id"]), holds, action, tuple(comps), status)


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
