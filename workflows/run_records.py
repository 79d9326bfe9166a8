"""Finding stored runs: list them, show one in full, mark an instrument's primary run, and warn about inference
that rests on few clusters or on a t reference with few degrees of freedom."""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlmodel import Session

from ivdossier.jsonsafe import json_safe
from ivdossier.registry import records
from ivdossier.registry.models import Dataset, Instrument, Run
from ivdossier.registry.runs import all_runs
from ivdossier.registry.runs import mark_primary as _mark_primary

FEW_CLUSTERS = 42
"""Below this many clusters, cluster-robust inference can over-reject (common practice; a rule of thumb, not a
theorem: with few or unbalanced clusters a wild cluster bootstrap is the usual remedy)."""
FEW_T_DF = 30
"""Below this many degrees of freedom the t reference is far from normal and the interval leans on the error
distribution (common practice)."""
_T_DF = re.compile(r"t quantiles with (\d+) degrees of freedom")


def inference_warnings(n_clusters: Sequence[int], ref_df: float | None) -> tuple[str, ...]:
    """Warnings about a run's inference: few clusters (G < 42) or a t reference with few degrees of freedom."""
    out = []
    if n_clusters and min(n_clusters) < FEW_CLUSTERS:
        out.append(
            f"few clusters: {min(n_clusters)} (fewer than {FEW_CLUSTERS}); cluster-robust standard errors can be "
            "too small with few clusters, so confirm the inference with a wild cluster bootstrap or "
            "randomization inference"
        )
    if ref_df is not None and ref_df < FEW_T_DF:
        out.append(
            f"the t reference has only {int(ref_df)} degrees of freedom (fewer than {FEW_T_DF}); intervals and "
            "p-values lean on that small-sample reference"
        )
    return tuple(out)


def run_warnings(results: Mapping[str, Any] | None) -> tuple[str, ...]:
    """`inference_warnings` read from a run's stored JSON view (any kind that reports clusters or its reference)."""
    res = results or {}
    clusters = [int(g) for g in res.get("n_clusters") or () if isinstance(g, int | float)]
    df = res.get("ref_df")
    if df is None:
        match = _T_DF.search(str(res.get("ci_reference") or res.get("reference") or ""))
        df = int(match.group(1)) if match else None
    return inference_warnings(clusters, df if isinstance(df, int | float) else None)


def warnings_of(run: Run) -> tuple[str, ...]:
    """A stored run's inference warnings, from its typed estimation result when it has one."""
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.workflows.evidence_runs import typed_result

    if run.run_kind == "estimate":
        res = typed_result(run)
        if isinstance(res, EstimationResult):
            return inference_warnings(tuple(res.n_clusters), res.ref_df)
    return run_warnings(run.results)


@dataclass(frozen=True)
class RunSummary:
    """One stored run as `run list` and `run show` print it."""

    slug: str
    kind: str
    instrument: str
    created: str
    primary: bool
    dataset: str
    dataset_sha256: str
    dataset_rows: int | None
    spec: Mapping[str, Any] = field(default_factory=dict)
    versions: Mapping[str, Any] = field(default_factory=dict)
    seconds: float = 0.0
    summary: tuple[tuple[str, str], ...] = ()
    warnings: tuple[str, ...] = ()

    def row(self) -> dict[str, Any]:
        """The short form `run list` shows."""
        return {
            "run": self.slug,
            "kind": self.kind,
            "instrument": self.instrument,
            "created": self.created,
            "dataset": self.dataset,
            "primary": "primary" if self.primary else "",
        }

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    **self.row(),
                    "primary": self.primary,
                    "dataset_sha256": self.dataset_sha256,
                    "dataset_rows": self.dataset_rows,
                    "spec": dict(self.spec),
                    "versions": dict(self.versions),
                    "seconds": self.seconds,
                    "summary": dict(self.summary),
                    "warnings": list(self.warnings),
                }
            )
        )


def summarise(session: Session, run: Run) -> RunSummary:
    """A stored run with its instrument, dataset fingerprint, key results and inference warnings."""
    dataset = session.get(Dataset, run.dataset_id) if run.dataset_id else None
    inst = session.get(Instrument, run.instrument_id) if run.instrument_id else None
    return RunSummary(
        slug=run.slug,
        kind=run.run_kind,
        instrument=inst.slug if inst else "",
        created=run.created_at.isoformat(timespec="seconds"),
        primary=bool(run.is_primary),
        dataset=dataset.path if dataset else "",
        dataset_sha256=dataset.sha256 if dataset else "",
        dataset_rows=dataset.rows if dataset else None,
        spec=run.spec or {},
        versions=run.versions or {},
        seconds=run.seconds,
        summary=result_summary(run),
        warnings=warnings_of(run),
    )


def list_runs(session: Session, instrument: str | None = None) -> list[RunSummary]:
    """Every run (or those of one instrument), oldest first."""
    inst = records.get(session, Instrument, instrument) if instrument else None
    return [summarise(session, r) for r in all_runs(session, inst)]


def show_run(session: Session, run: str) -> RunSummary:
    return summarise(session, records.get(session, Run, run))


def mark_primary(session: Session, *, actor: str, run: str, reason: str = "") -> RunSummary:
    """Mark `run` as its instrument's primary run (audited; the previous primary run is unmarked)."""
    return summarise(session, _mark_primary(session, actor=actor, run=run, reason=reason))


def clear_primary(session: Session, *, actor: str, instrument: str, reason: str = "") -> RunSummary:
    """Clear the primary mark of an instrument's primary run (audited); its dossier then follows the latest run."""
    from ivdossier.registry.runs import clear_primary as _clear_primary

    return summarise(session, _clear_primary(session, actor=actor, instrument=instrument, reason=reason))


def result_summary(run: Run) -> tuple[tuple[str, str], ...]:
    """A few labelled key results of a stored run, whatever its kind (the full results stay in --json)."""
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.workflows import evidence_runs as ev

    if run.run_kind == "estimate":
        res = ev.typed_result(run)
        if not isinstance(res, EstimationResult):
            return (("results", "stored before typed records; see --json"),)
        out = [
            (f"estimate of {name}", f"{_g(res.coef_of(name))} (standard error {_g(res.se_of(name))})")
            for name in res.names[:3]
        ]
        out.append(("method", f"{res.method}, {res.vcov}"))
        out.append(("rows used", f"{res.n} ({res.n_dropped} left out)"))
        if res.n_clusters:
            out.append(("clusters", ", ".join(str(g) for g in res.n_clusters)))
        out.append(("interval reference", res.ci_reference))
        return tuple(out)
    if run.run_kind == "sensitivity":
        s = ev.sensitivity_info(run)
        if s.method == "breakdown":
            return (("breakdown value", _g(s.breakdown)), ("target effect", _g(s.target)))
        return ((f"{s.method} interval", f"[{_g(s.lower)}, {_g(s.upper)}]"),)
    if run.run_kind in ev.FALSIFICATION_KINDS:
        f = ev.falsification_info(run)
        out = [(f"{r.target} on {r.instrument}", f"{_g(r.estimate)} (p {_g(r.p_value)})") for r in f.rows[:6]]
        return tuple(out + ([("summary", f.summary)] if f.summary else []))
    if run.run_kind == "compliers":
        c = ev.compliers_info(run)
        return tuple((f"{s.group} share", _g(s.estimate)) for s in c.shares)
    if run.run_kind == "power":
        p = ev.power_info(run)
        return (
            ("standard error", _g(p.se)),
            (f"minimum detectable effect at {p.target_power:.0%} power", _g(p.mde)),
            ("power at the effect", _g(p.power)),
        )
    return ()


def _g(value: Any) -> str:
    if isinstance(value, int | float) and not isinstance(value, bool):
        return f"{value:.4g}"
    return "–" if value is None else str(value)


def headline_warnings(session: Session, instrument: str) -> tuple[str, tuple[str, ...]]:
    """The run an instrument's dossier headline rests on (primary, else the latest estimate with diagnostics)
    and its inference warnings; ("", ()) without estimate runs."""
    from ivdossier.registry.runs import runs_of
    from ivdossier.reports.dossier import headline_run
    from ivdossier.workflows.dossiers import run_info

    inst = records.get(session, Instrument, instrument)
    run = headline_run([run_info(session, r) for r in runs_of(session, inst, "estimate")])
    return (run.slug, run.warnings) if run is not None else ("", ())
