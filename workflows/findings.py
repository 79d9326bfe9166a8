"""One-line findings: what a stored run says about each catalogue check, for the dossier's threat blocks."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

Results = Mapping[str, Any]


def run_kind_for_command(command: str) -> str:
    """The run kind stored for a check's command: "ivdossier falsify balance" -> "falsify-balance"."""
    return command.removeprefix("ivdossier ").replace(" ", "-")


def _num(value: Any, digits: int = 3) -> str:
    if isinstance(value, int | float):
        return f"{value:.{digits}g}"
    return str(value)


def _set_text(intervals: Any) -> str:
    if not intervals:
        return "empty"
    return " ∪ ".join(f"[{_num(lo, 4)}, {_num(hi, 4)}]" for lo, hi in intervals)


def _strength(res: Results) -> str:
    eff = (res.get("strength") or {}).get("effective_f") or {}
    stat, crit = eff.get("statistic"), (eff.get("critical_values") or {}).get("tau_10pct")
    if stat is None:
        return "no effective F in this run"
    verdict = "above" if crit is not None and stat >= crit else "below"
    return f"effective F {_num(stat, 4)}, {verdict} the τ = 10 % critical value {_num(crit, 4)}"


def _robust(res: Results) -> str:
    ar = (res.get("weak_iv_robust") or {}).get("anderson_rubin") or {}
    if ar.get("confidence_set") is None:
        return f"Anderson–Rubin test p = {_num(ar.get('p_value'))}" if ar else "no Anderson–Rubin result"
    return f"Anderson–Rubin {ar.get('confidence_level', 0.95):.0%} set {_set_text(ar['confidence_set'])}"


def _overid(res: Results) -> str:
    over = res.get("overid") or {}
    if "rows" in res:  # per-instrument run
        parts = [f"{r['instrument']}: {_num(r['estimate'], 4)}" for r in res["rows"]]
        test = (
            f"; {over.get('test', 'J')} p = {_num(over.get('p_value'))}"
            if over.get("p_value") is not None
            else ""
        )
        return "just-identified estimates " + "; ".join(parts) + test
    if over.get("p_value") is None:
        return "just identified: no over-identification test"
    return f"{over.get('test', 'J')} = {_num(over.get('statistic'))}, p = {_num(over.get('p_value'))}"


def _endogeneity(res: Results) -> str:
    endo = res.get("endogeneity") or {}
    return f"Durbin–Wu–Hausman p = {_num(endo.get('p_value'))}" if endo else "no endogeneity test"


def _joint(res: Results) -> str:
    joint = res.get("joint") or {}
    targets = ", ".join(r["target"] for r in res.get("rows", []))
    return f"joint test on {targets}: χ²({joint.get('df')}) = {_num(joint.get('statistic'))}, p = {_num(joint.get('p_value'))}"


def _zero_first_stage(res: Results) -> str:
    rows = (res.get("reduced_form") or {}).get("coefficients") or []
    parts = [
        f"{c['instrument']} {_num(c['coef'])} (se {_num(c['se'])}, p = {_num(c['p_value'])})" for c in rows
    ]
    return f"reduced form in {res.get('subsample', 'the subsample')}: " + "; ".join(parts)


def _sensitivity(res: Results) -> str:
    kind = res.get("kind")
    if kind == "breakdown_value":
        return (
            f"a direct effect of {_num(res.get('magnitude'))} per unit of the instrument "
            f"({_num(res.get('relative_to_reduced_form'))} of the reduced form) brings the interval to "
            f"{_num(res.get('target'))}"
        )
    low, high = res.get("lower"), res.get("upper")
    covers = "covers" if res.get("covers_zero") else "excludes"
    label = "union of intervals" if kind == "union_of_confidence_intervals" else "local-to-zero interval"
    return f"{label} [{_num(low, 4)}, {_num(high, 4)}] {covers} zero"


def _compliers(res: Results) -> str:
    shares = res.get("shares") or {}
    if shares:
        return "complier share " + _num((shares.get("complier") or {}).get("estimate"))
    if "p_value" in res:
        return f"implied complier densities: p = {_num(res.get('p_value'))} for a negative density"
    return "complier profile computed"


def _subgroup_signs(res: Results) -> str:
    groups = res.get("groups") or []
    flagged = res.get("flagged") or []
    if not flagged:
        return f"first stage of the same sign (or not significantly reversed) in all {len(groups)} subgroups of {res.get('by')}"
    return f"first stage significantly reversed where {res.get('by')} is in {', '.join(flagged)}: possible defiers"


def _power(res: Results) -> str:
    return f"power {_num(res.get('power'))} for effect {_num(res.get('effect'))}; MDE {_num(res.get('mde'))}"


FINDERS: dict[str, Callable[[Results], str]] = {
    "first-stage-strength": _strength,
    "weak-iv-robust-inference": _robust,
    "over-identification": _overid,
    "endogeneity-test": _endogeneity,
    "covariate-balance": _joint,
    "placebo-outcome": _joint,
    "zero-first-stage-reduced-form": _zero_first_stage,
    "per-instrument-estimates": _overid,
    "exclusion-sensitivity": _sensitivity,
    "complier-profile": _compliers,
    "complier-density-sign": _compliers,
    "subgroup-first-stage-signs": _subgroup_signs,
    "power-analysis": _power,
}


def finding(check: str, results: Results) -> str:
    """What a run's results say for one catalogue check, in one line."""
    finder = FINDERS.get(check)
    if finder is None:
        return "no summary for this check"
    try:
        return finder(results)
    except (KeyError, TypeError, ValueError):
        return "run stored; its results could not be summarised"
