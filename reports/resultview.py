"""Defensive readers over an estimation result's `to_dict()` and number formatting shared by all documents.

A section that is missing, null, or marked not applicable reads as None here, so documents omit it.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from ivdossier.reports.inputs import RunInfo

Interval = tuple[float, float]

_VALUE_KEYS = ("statistic", "value", "stat", "f", "estimate", "effective_f", "f_eff")
_P_KEYS = ("p_value", "pvalue", "p", "pval")


def num(value: Any) -> float | None:
    """A float from a number, an "inf"/"-inf" string or a dict holding one under a usual key; else None."""
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, int | float):
        return float(value)
    if isinstance(value, str):
        text = value.strip().lower()
        if text in ("inf", "+inf", "infinity"):
            return math.inf
        if text in ("-inf", "-infinity"):
            return -math.inf
        try:
            return float(text)
        except ValueError:
            return None
    if isinstance(value, Mapping):
        for key in _VALUE_KEYS:
            if key in value:
                return num(value[key])
    return None


def section(results: Mapping[str, Any] | None, *keys: str) -> Mapping[str, Any] | None:
    """The nested mapping at `keys`, or None when it is absent, null or marked not applicable."""
    node: Any = results
    for key in keys:
        if not isinstance(node, Mapping) or node.get(key) is None:
            return None
        node = node[key]
    if not isinstance(node, Mapping) or not_applicable_reason(node) is not None:
        return None
    return node


def not_applicable_reason(node: Any) -> str | None:
    """The reason text when a section says it does not apply (applicable false, or only a reason), else None."""
    if not isinstance(node, Mapping):
        return None
    reason = node.get("reason")
    flagged = node.get("applicable") is False or node.get("status") in ("not applicable", "not_applicable")
    only_reason = set(node) <= {"reason", "status", "applicable", "name"} and reason is not None
    if flagged or only_reason:
        return str(reason) if reason is not None else "not applicable"
    return None


def section_reason(results: Mapping[str, Any] | None, key: str) -> str | None:
    """The stated reason a top-level section is null or not applicable, when the result gives one."""
    if not isinstance(results, Mapping):
        return None
    node = results.get(key)
    if node is None:
        reasons = results.get("reasons")
        if isinstance(reasons, Mapping) and reasons.get(key):
            return str(reasons[key])
        alt = results.get(f"{key}_reason")
        return str(alt) if alt else None
    return not_applicable_reason(node)


def pvalue(node: Mapping[str, Any] | None) -> float | None:
    """The p-value of a test section under any usual key."""
    if not isinstance(node, Mapping):
        return None
    for key in _P_KEYS:
        if key in node:
            return num(node[key])
    return None


def percent_key(key: Any) -> int | None:
    """Read a critical-value key such as "10", "tau_10", "0.10", "10%" or 0.1 as a whole percentage."""
    match = re.search(r"\d+(?:\.\d+)?", str(key))
    if match is None:
        return None
    value = float(match.group())
    if value < 1:
        value *= 100
    return round(value)


def critical_values(node: Any) -> dict[int, float]:
    """Critical values keyed by whole percent (tau or size), from a mapping or list of {tau, value} rows."""
    out: dict[int, float] = {}
    if isinstance(node, Mapping):
        for key, value in node.items():
            if isinstance(value, Mapping):
                inner = num(value.get("critical_value", value.get("value")))
                pct = percent_key(value.get("tau", key))
            else:
                inner, pct = num(value), percent_key(key)
            if pct is not None and inner is not None:
                out[pct] = inner
    elif isinstance(node, Sequence) and not isinstance(node, str):
        for row in node:
            if isinstance(row, Mapping):
                pct = percent_key(row.get("tau", row.get("level", row.get("bias"))))
                value = num(row.get("critical_value", row.get("value")))
                if pct is not None and value is not None:
                    out[pct] = value
    return dict(sorted(out.items()))


def effective_f(results: Mapping[str, Any] | None) -> tuple[float | None, dict[int, float]]:
    """The Montiel Olea-Pflueger effective F and its critical values by tau percent."""
    strength = section(results, "strength")
    if strength is None:
        return None, {}
    raw = strength.get("effective_f")
    value = num(raw)
    cvs: dict[int, float] = {}
    if isinstance(raw, Mapping):
        for key, inner in raw.items():
            if "critical" in str(key):
                cvs = critical_values(inner)
    if not cvs:
        for key in ("effective_f_critical_values", "critical_values"):
            if key in strength:
                cvs = critical_values(strength[key])
                break
    return value, cvs


def intervals(value: Any) -> list[Interval] | None:
    """A confidence set as a list of (low, high): accepts [[lo, hi], ...], [lo, hi] or {"set": ...}."""
    if isinstance(value, Mapping):
        for key in ("confidence_set", "set", "intervals", "interval", "ci"):
            if key in value:
                return intervals(value[key])
        return None
    if not isinstance(value, Sequence) or isinstance(value, str):
        return None
    if len(value) == 2 and all(num(v) is not None and not isinstance(v, Sequence | Mapping) for v in value):
        low, high = num(value[0]), num(value[1])
        assert low is not None and high is not None
        return [(low, high)]
    out: list[Interval] = []
    for item in value:
        if isinstance(item, Sequence) and not isinstance(item, str) and len(item) == 2:
            low, high = num(item[0]), num(item[1])
            if low is None or high is None:
                return None
            out.append((low, high))
        else:
            return None
    return out


def first_stage_rows(results: Mapping[str, Any] | None) -> dict[str, Mapping[str, Any]]:
    """First-stage entries keyed by treatment: accepts {"by_endog": {...}}, {name: {...}} or one flat entry."""
    first = section(results, "first_stage")
    if first is None:
        return {}
    inner = first.get("by_endog", first)
    if isinstance(inner, Mapping) and inner and all(isinstance(v, Mapping) for v in inner.values()):
        return {str(k): v for k, v in inner.items()}
    return {"treatment": first}


def method_label(method: str) -> str:
    """Published estimator names for the method codes the estimation layer uses."""
    labels = {"ols": "OLS", "2sls": "2SLS", "tsls": "2SLS", "liml": "LIML", "fuller": "Fuller"}
    return labels.get(method.strip().lower(), method)


def is_bounded(sets: list[Interval] | None) -> bool:
    """True for a non-empty set whose every piece has finite ends."""
    return bool(sets) and all(math.isfinite(lo) and math.isfinite(hi) for lo, hi in sets or ())


def fmt(value: Any, digits: int = 4) -> str:
    """A number with `digits` significant digits, no exponent in the usual range, a true minus and infinity."""
    x = num(value)
    if x is None:
        return "–"  # never echo a non-numeric value: it could carry markup
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "∞" if x > 0 else "−∞"
    if x == 0:
        return "0"
    magnitude = math.floor(math.log10(abs(x)))
    if magnitude >= 6 or magnitude < -4:
        text = f"{x:.{digits - 1}e}"
    else:
        decimals = max(digits - 1 - magnitude, 0)
        text = f"{x:.{decimals}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
    return text.replace("-", "−")


def fmt_p(value: Any) -> str:
    """A p-value: three decimals, or "< 0.001"."""
    x = num(value)
    if x is None:
        return "–"
    if x < 0.001:
        return "< 0.001"
    return f"{x:.3f}"


def p_clause(value: Any) -> str:
    """ "p = 0.012" or "p < 0.001", for running text."""
    text = fmt_p(value)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


def fmt_set(sets: list[Interval] | None) -> str:
    """A union of intervals in plain notation; open brackets at infinity."""
    if sets is None:
        return "–"
    if not sets:
        return "empty set"
    pieces = []
    for low, high in sets:
        left = "(" if math.isinf(low) else "["
        right = ")" if math.isinf(high) else "]"
        pieces.append(f"{left}{fmt(low)}, {fmt(high)}{right}")
    text = " ∪ ".join(pieces)
    if len(sets) == 1 and math.isinf(sets[0][0]) and math.isinf(sets[0][1]):
        text += " (whole line)"
    return text


def parse_fmt(text: str) -> float:
    """Inverse of `fmt` for tests and tooling: reads the true minus and infinity back."""
    cleaned = text.replace("−", "-").replace("∞", "inf")
    return float(cleaned)


def get(mapping: Mapping[str, Any] | None, *keys: str | None) -> Any:
    """The nested value at `keys`, or None when any level is missing."""
    node: Any = mapping
    for key in keys:
        if not isinstance(node, Mapping) or key is None:
            return None
        node = node.get(key)
    return node


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
