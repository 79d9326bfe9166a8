"""The dossier section "How fragile is the result": the leave-one-out figure and table summary, and the bootstrap
sets beside the analytic ones, from the typed results of the latest attached fragility runs."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv

if TYPE_CHECKING:
    from ivdossier.reports.inputs import DossierInput

FIGURE_KEY = "leave-one-out"
CAUTION = (
    "These resampling and deletion checks measure how fragile the inference is; they cannot establish exclusion "
    "or exogeneity, and conclusions for policy or clinical decisions need domain review."
)


@dataclass(frozen=True)
class FragilityRun:
    """One stored fragility run as the dossier reads it: its slug, run kind and typed result."""

    slug: str
    run_kind: str
    created_text: str
    result: Any


def _latest(inp: DossierInput, kind: str) -> FragilityRun | None:
    runs = [r for r in getattr(inp, "fragility", ()) if r.run_kind == kind]
    return sorted(runs, key=lambda r: (r.created_text, r.slug))[-1] if runs else None


def fragility_figures(inp: DossierInput) -> dict[str, str]:
    """The SVG of the leave-one-out figure when the section shows it."""
    from ivdossier.reports.jackknife_plot import jackknife_svg

    run = _latest(inp, "fragility-influence")
    if run is None or not run.result.applicable:
        return {}
    return {FIGURE_KEY: jackknife_svg(run.result, key=FIGURE_KEY)}


def fragility_markdown(inp: DossierInput) -> str:
    """The section, or "" when no fragility run is attached to the instrument."""
    infl = _latest(inp, "fragility-influence")
    boot = _latest(inp, "fragility-bootstrap")
    sub = _latest(inp, "fragility-subvector")
    if infl is None and boot is None and sub is None:
        return ""
    out = ["## How fragile is the result"]
    if infl is not None:
        out.append(_influence_block(infl))
    if boot is not None:
        out.append(_bootstrap_block(boot))
    if sub is not None:
        out.append(_subvector_block(sub))
    out.append(f"*{CAUTION}*")
    return "\n\n".join(out)


def _influence_block(run: FragilityRun) -> str:
    r = run.result
    head = f"### Leaving one {mt.inline(r.unit or 'cluster')} out (run {mt.inline(run.slug)})"
    if not r.applicable:
        return f"{head}\n\nNot applicable: {mt.inline(r.reason or '')}."
    from ivdossier.reports.jackknife_plot import LIMIT, rows_shown

    lo, hi = r.first_stage_f_range
    level = f"{100 * r.alpha:g} %"
    facts = [
        f"- deletions: {len(r.deletions)}; full-sample estimate {rv.fmt(r.full.estimate)} "
        f"(interval {rv.fmt_set([r.full.interval])})",
        f"- largest change in the estimate: {rv.fmt(r.largest_change)}, leaving out "
        f"{mt.inline(r.largest_change_label or '')}",
        f"- deletions that flip {level} significance of H0 β = {rv.fmt(r.null)}: t test {r.t_flips}, "
        f"Anderson–Rubin {r.ar_flips}",
        f"- first-stage F with one {mt.inline(r.unit)} left out: {rv.fmt(lo)} to {rv.fmt(hi)}; "
        f"jackknife standard error {rv.fmt(r.jackknife_se)}",
        f"- most influential: {', '.join(mt.inline(x) for x in r.most_influential)}",
    ]
    shown = len(rows_shown(r))
    more = (
        f" The {shown} deletions that move the estimate most are drawn (of {len(r.deletions)})."
        if len(r.deletions) > LIMIT
        else ""
    )
    caption = (
        f"Estimate (diamond) and interval with each {r.unit} left out, sorted by estimate; the band is the "
        f"full-sample interval, the solid line its estimate, the dashed line the null; crosses mark deletions "
        f"that flip significance.{more}"
    )
    return "\n\n".join([head, "\n".join(facts), mt.figure(FIGURE_KEY, caption)])


def _bootstrap_block(run: FragilityRun) -> str:
    b = run.result
    w = b.wild
    head = f"### Bootstrap sets beside the analytic ones (run {mt.inline(run.slug)})"
    if not w.applicable:
        return f"{head}\n\nNot applicable: {mt.inline(w.reason or '')}."
    how = "every sign vector enumerated (exact)" if w.enumerated else f"random draws, seed {w.seed}"
    by = f"{w.n_clusters} clusters" if w.clustered else f"{w.n_clusters} rows"
    intro = (
        f"Wild restricted efficient bootstrap (Davidson and MacKinnon 2010): B = {w.draws} draws, "
        f"{mt.inline(w.weights or '')} weights by {by}, {how}."
    )
    level = f"{100 * (1 - (w.t_test or w.anderson_rubin).alpha):g} %"
    rows = []
    if w.t_test is not None:
        analytic = rv.fmt_set([b.analytic_interval]) if b.analytic_interval else "–"
        rows.append(
            [
                "t test (2SLS)",
                rv.fmt(w.t_test.p_value),
                rv.fmt_set(w.t_test.intervals),
                analytic,
            ]
        )
    if w.anderson_rubin is not None:
        rows.append(
            [
                "Anderson–Rubin",
                rv.fmt(w.anderson_rubin.p_value),
                rv.fmt_set(w.anderson_rubin.intervals),
                rv.fmt_set(b.analytic_ar_set),
            ]
        )
    table = mt.table(
        ["Test", f"Bootstrap p (H0 β = {rv.fmt(w.t_test.null if w.t_test else w.anderson_rubin.null)})",
         f"Bootstrap {level} set", f"Analytic {level} set ({mt.inline(b.vcov)})"],
        rows,
    )  # fmt: skip
    parts = [head, intro, table]
    p = b.pairs
    if p is not None and p.applicable:
        lo, hi = p.percentile_interval
        f5, f50, f95 = p.f_percentiles
        parts.append(
            f"Pairs bootstrap of whole {mt.inline(p.resampled or 'clusters')} ({p.draws_used} of {p.draws} draws "
            f"used, seed {p.seed}): percentile interval {rv.fmt_set([(lo, hi)])}; first-stage F "
            f"{rv.fmt(p.first_stage_f)}, bootstrapped F {rv.fmt(p.bootstrapped_f)}, the draws' F at 5/50/95 %: "
            f"{rv.fmt(f5)} / {rv.fmt(f50)} / {rv.fmt(f95)} (Lal, Lockhart, Xu and Zu 2024)."
        )
    return "\n\n".join(parts)


def _subvector_block(run: FragilityRun) -> str:
    s = run.result
    head = f"### One treatment among several (run {mt.inline(run.slug)})"
    if not s.applicable:
        return f"{head}\n\nNot applicable: {mt.inline(s.reason or '')}."
    level = f"{100 * (1 - (s.alpha or 0.05)):g} %"
    return (
        f"{head}\n\nAnderson–Rubin for {mt.inline(s.treatment or '')} with "
        f"{', '.join(mt.inline(n) for n in s.nuisance) or 'no other treatment'} unrestricted "
        f"({mt.inline(s.version or '')}): p = {rv.fmt(s.p_value)} for H0 β = {rv.fmt(s.null)}; "
        f"{level} set {rv.fmt_set(s.intervals)}."
    )
