"""Number formatting shared by every document, and strict readers of the stored JSON view.

Documents read typed results (``RunInfo.result``); the JSON-view readers below serve only
``reports/verdicts.py`` until it reads its typed run evidence, and read the exact keys our own ``to_dict()``
writes, never synonyms.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from ivdossier.vocabulary import NOT_APPLICABLE

Interval = tuple[float, float]


def num(value: Any) -> float | None:
    """A float from a number or an "inf"/"-inf"/"nan" text (how the JSON view writes them); else None."""
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, int | float):
        return float(value)
    if isinstance(value, str):
        try:
            return float(value.strip())
        except ValueError:
            return None
    return None


# ---------------------------------------------------------------- the JSON view (for reports/verdicts.py only)


def section(results: Mapping[str, Any] | None, *keys: str) -> Mapping[str, Any] | None:
    """The nested mapping at `keys` of a run's JSON view, or None when absent or marked not applicable."""
    node: Any = results
    for key in keys:
        if not isinstance(node, Mapping) or node.get(key) is None:
            return None
        node = node[key]
    if (
        not isinstance(node, Mapping)
        or node.get("status") == NOT_APPLICABLE
        or node.get("applicable") is False
    ):
        return None
    return node


def pvalue(node: Mapping[str, Any] | None) -> float | None:
    """The p-value of a test section of the JSON view."""
    return num(node.get("p_value")) if isinstance(node, Mapping) else None


def effective_f(results: Mapping[str, Any] | None) -> tuple[float | None, dict[int, float]]:
    """The effective F of the JSON view and its critical values keyed by whole-percent tau."""
    eff = section(results, "strength", "effective_f")
    if eff is None:
        return None, {}
    cvs: dict[int, float] = {}
    for key, value in (eff.get("critical_values") or {}).items():
        match = re.fullmatch(r"tau_(\d+)pct", str(key))
        if match and num(value) is not None:
            cvs[int(match.group(1))] = num(value)  # type: ignore[assignment]
    return num(eff.get("statistic")), dict(sorted(cvs.items()))


def intervals(node: Mapping[str, Any] | None) -> list[Interval] | None:
    """The confidence set of a test section of the JSON view, as (low, high) pairs."""
    raw = node.get("confidence_set") if isinstance(node, Mapping) else None
    if not isinstance(raw, Sequence) or isinstance(raw, str):
        return None
    out: list[Interval] = []
    for pair in raw:
        low, high = (num(v) for v in pair)
        if low is None or high is None:
            return None
        out.append((low, high))
    return out


def first_stage_rows(results: Mapping[str, Any] | None) -> dict[str, Mapping[str, Any]]:
    """First-stage entries of the JSON view keyed by treatment."""
    first = section(results, "first_stage")
    rows = first.get("by_endog") if first is not None else None
    return {str(k): v for k, v in rows.items()} if isinstance(rows, Mapping) else {}


# ---------------------------------------------------------------- formatting


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
