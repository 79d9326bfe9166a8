"""Markdown sections for summary-data evidence and the omitted-variable robustness value.

Both take the stored form of a result (its ``to_dict()``, as a run keeps it) or the result itself, so a dossier
can render a run read back from the registry. Numbers are formatted here; every word from users (variant names,
covariate names) goes through the Markdown escaping of :mod:`ivdossier.reports.mdtext`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from ivdossier.reports.mdtext import cell, inline, table

__all__ = ["robustness_markdown", "summary_evidence_markdown"]

LIMITS = "Statistics cannot establish exclusion or exogeneity. Conclusions for policy or clinical use need domain review."


def _stored(result: Any) -> Any:
    """The stored (dict) form of a result object, or the mapping itself."""
    return result.to_dict() if hasattr(result, "to_dict") else dict(result)


def _num(value: Any, digits: int = 4) -> str:
    if value is None:
        return "–"
    if isinstance(value, str):  # json_safe writes infinities as text
        return value
    x = float(value)
    return f"{x:.{digits}g}" if math.isfinite(x) else "–"


def _ci(pair: Any) -> str:
    return f"[{_num(pair[0])}, {_num(pair[1])}]" if pair else "–"


def _applies(part: Mapping[str, Any] | None) -> bool:
    return part is not None and bool(part) and part.get("applicable", True) is not False


def summary_evidence_markdown(result: Any) -> str:
    """Section for one per-variant table: estimates side by side, heterogeneity, directionality, alignment."""
    ev = _stored(result)
    out = ["## Evidence from per-variant summary statistics", ""]
    harm = ev.get("table", {}).get("harmonisation", {})
    n = harm.get("n_variants", len(ev.get("table", {}).get("rows", [])))
    text = f"{n} variants"
    if harm.get("alleles_given"):
        text += (
            f"; the outcome effect changed sign for {harm.get('n_flipped', 0)} variant(s) whose alleles were "
            f"swapped between the studies; {len(harm.get('palindromic', []))} palindromic variant(s) could not "
            "be checked for strand"
        )
    else:
        text += "; no allele columns, effects taken as already aligned"
    ratios = ev.get("ratios", {})
    text += (
        f". Mean F of the variants {_num(ratios.get('mean_f'), 3)} (smallest {_num(ratios.get('min_f'), 3)})."
    )
    out += [text, ""]
    rows: list[list[str]] = []
    fit = ev.get("ivw")
    if _applies(fit):
        rows.append(
            ["IVW, fixed effect", _num(fit["estimate"]), _num(fit["se_fixed"], 3), _ci(fit["ci_fixed"])]
        )
        rows.append(
            [
                "IVW, multiplicative random effects",
                _num(fit["estimate"]),
                _num(fit["se_random"], 3),
                _ci(fit["ci_random"]),
            ]
        )
    eg = ev.get("egger")
    if _applies(eg):
        rows.append(["MR-Egger slope", _num(eg["estimate"]), _num(eg["se"], 3), _ci(eg["ci"])])
        rows.append(
            [
                "MR-Egger intercept",
                _num(eg["intercept"]),
                _num(eg["intercept_se"], 3),
                _ci(eg["intercept_ci"]),
            ]
        )
    wm = ev.get("weighted_median")
    if _applies(wm):
        rows.append(["Weighted median", _num(wm["estimate"]), _num(wm["se"], 3), _ci(wm["ci"])])
    level = f"{100 * (1 - float(ev.get('alpha', 0.05))):g}%"
    if rows:
        out += [table(["estimator", "estimate", "se", f"{level} interval"], rows, "lrrr"), ""]
    notes = []
    het = ev.get("heterogeneity")
    if _applies(het):
        line = f"Cochran's Q {_num(het['q'])} on {het['q_df']} df (p {_num(het['q_p'], 3)})"
        if het.get("q_prime") is not None:
            line += f"; Rücker's Q' {_num(het['q_prime'])} on {het['q_prime_df']} df (p {_num(het['q_prime_p'], 3)})"
        notes.append(line + ".")
    if _applies(eg):
        notes.append(
            f"I²_GX {_num(eg['i2_gx'], 3)}: values well below 1 mean the Egger slope is diluted towards zero."
        )
    loo = ev.get("leave_one_out")
    if _applies(loo):
        notes.append(
            f"Leaving one variant out moves the IVW estimate most when {inline(loo['most_influential'])} is "
            f"dropped ({_num(loo['largest_shift'], 3)})."
        )
    d = ev.get("directionality")
    if _applies(d):
        notes.append(
            f"Steiger directionality: the variants explain R² {_num(d['r2_exposure'], 3)} of the exposure and "
            f"{_num(d['r2_outcome'], 3)} of the outcome, pointing {inline(d['direction'])} (p {_num(d['p'], 3)})."
        )
    for part in (ev.get(k) for k in ("ivw", "egger", "weighted_median", "heterogeneity", "directionality")):
        if part and part.get("applicable") is False:
            notes.append(
                f"{inline(part.get('statistic', ''))}: not applicable ({inline(part.get('reason', ''))})."
            )
    out += [f"- {n}" for n in notes]
    out += ["", LIMITS]
    return "\n".join(out) + "\n"


def robustness_markdown(result: Any) -> str:
    """Section for the omitted-variable sensitivity of one IV estimate (Cinelli and Hazlett 2025)."""
    r = _stored(result)
    out = ["## How strong would an omitted confounder of the instrument have to be?", ""]
    if r.get("applicable") is False:
        return "\n".join([*out, f"Not applicable: {inline(r.get('reason', ''))}.", "", LIMITS]) + "\n"
    alpha = float(r["alpha"])
    level = f"{100 * (1 - alpha):g}%"
    iv = r["iv"]
    out += [
        f"IV estimate {_num(r['iv_estimate'])} of {inline(r['treatment'])} on {inline(r['outcome'])} with "
        f"instrument {inline(r['instrument'])} ({r['n']} rows, {r['dof']} residual degrees of freedom).",
        "",
        f"A confounder that explains {_pct(iv['rv'])} of the residual variance of both the instrument and the "
        f"outcome would move the estimate to {_num(r['null'])}; one explaining {_pct(iv['rv_alpha'])} would "
        f"bring {_num(r['null'])} into the {level} Anderson–Rubin interval. Whatever its association with the "
        f"outcome, a confounder explaining less than {_pct(iv['xrv_alpha'])} of the instrument's residual "
        "variance could not do so (extreme robustness value).",
        "",
    ]
    rows = []
    for key, name in (
        ("reduced_form", "reduced form (outcome on instrument)"),
        ("first_stage", "first stage"),
    ):
        v = r[key]
        rows.append(
            [
                name,
                _num(v["estimate"]),
                _num(v["t_value"], 3),
                _pct(v["partial_r2"]),
                _pct(v["rv"]),
                _pct(v["rv_alpha"]),
                _pct(v["xrv"]),
                _pct(v["xrv_alpha"]),
            ]
        )
    out += [
        table(
            ["regression", "estimate", "t", "partial R²", "RV", f"RV, {level}", "XRV", f"XRV, {level}"],
            rows,
            "lrrrrrrr",
        ),
        "",
    ]
    if r.get("iv_benchmarks"):
        brows = []
        for b in r["iv_benchmarks"]:
            brows.append(
                [
                    cell(f"{_num(b['k'], 3)} × {b['covariate']}"),
                    _pct(b["r2_instrument"]),
                    _sets(b["estimate_set"]),
                    _sets(b["interval_set"]) + (" (to the search edge)" if b["reaches_grid_edge"] else ""),
                    "no" if b["excludes_null"] else "yes",
                ]
            )
        out += [
            "Confounders as strong as multiples of observed controls (assumed unrelated to that control given "
            "the others):",
            "",
            table(
                [
                    "confounder",
                    "R² with instrument",
                    "possible IV estimates",
                    f"{level} interval",
                    f"includes {_num(r['null'])}",
                ],
                brows,
                "lrllc",
            ),
            "",
        ]
    out.append(LIMITS)
    return "\n".join(out) + "\n"


def _pct(value: Any) -> str:
    if value is None or isinstance(value, str):
        return "–"
    return f"{100 * float(value):.3g}%"


def _sets(parts: Any) -> str:
    return " ∪ ".join(f"[{_num(a)}, {_num(b)}]" for a, b in parts) or "empty"
