"""Finding stored runs: list them, show one in full, mark an instrument's primary run, and warn about inference
that rests on few clusters or on a t reference with few degrees of freedom."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy.orm import Session

from ivdossier.jsonsafe import RECORD_KEY, json_safe
from ivdossier.registry import records
from ivdossier.registry.models import Dataset, Instrument, Run
from ivdossier.registry.runs import mark_primary as _mark_primary
from ivdossier.registry.runs import runs_in_context
from ivdossier.workflows.evidence_runs import FALSIFICATION_KINDS, _fmt, _num
from ivdossier.workflows.run_warnings import inference_warnings, run_warnings  # noqa: F401  (also read from here)
from ivdossier.workflows.runs import LEGACY_NOTE


def warnings_of(run: Run) -> tuple[str, ...]:
    """A stored run's inference warnings, read from its JSON view (clusters and the interval's reference)."""
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
    return _summary(run, inst.slug if inst else "", dataset)


def _summary(run: Run, instrument: str, dataset: Dataset | None) -> RunSummary:
    return RunSummary(
        slug=run.slug,
        kind=run.run_kind,
        instrument=instrument,
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
    """Every run (or those of one instrument), oldest first; one query, whatever the number of runs."""
    inst = records.get(session, Instrument, instrument) if instrument else None
    return [_summary(run, slug or "", dataset) for run, slug, dataset in runs_in_context(session, inst)]


def show_run(session: Session, run: str) -> RunSummary:
    return summarise(session, records.get(session, Run, run))


def mark_primary(session: Session, *, actor: str, run: str, reason: str = "") -> RunSummary:
    """Mark `run` as its instrument's primary run (audited; the previous primary run is unmarked)."""
    return summarise(session, _mark_primary(session, actor=actor, run=run, reason=reason))


def clear_primary(session: Session, *, actor: str, instrument: str, reason: str = "") -> RunSummary:
    """Clear the primary mark of an instrument's primary run (audited); its dossier then follows the latest run."""
    from ivdossier.registry.runs import clear_primary as _clear_primary

    return summarise(session, _clear_primary(session, actor=actor, instrument=instrument, reason=reason))


# A few labelled key results per run kind, read from the JSON view every run stores beside its typed record
# (``workflows.runs.stored_results``): listings and `run show` never decode the typed record, so they load no
# numerics. ``tests/test_run_summaries.py`` checks them against the typed records of every kind of run.


def result_summary(run: Run) -> tuple[tuple[str, str], ...]:
    """A few labelled key results of a stored run, whatever its kind (the full results stay in --json)."""
    res: Mapping[str, Any] = run.results or {}
    legacy = RECORD_KEY not in res  # stored before typed records: shown as the typed reading shows it
    if run.run_kind == "estimate":
        if legacy:
            return (("results", "stored before typed records; see --json"),)
        return _estimate_summary(res)
    if run.run_kind == "sensitivity":
        kind = None if legacy else res.get("kind")
        if kind == "union_of_confidence_intervals":
            return (("union interval", f"[{_g(_num(res.get('lower')))}, {_g(_num(res.get('upper')))}]"),)
        if kind == "local_to_zero":
            return (
                ("local-to-zero interval", f"[{_g(_num(res.get('lower')))}, {_g(_num(res.get('upper')))}]"),
            )
        if kind == "breakdown_value":
            return (
                ("breakdown value", _g(_num(res.get("magnitude")))),
                ("target effect", _g(_num(res.get("target")))),
            )
        return (("breakdown value", "–"), ("target effect", "–"))
    if run.run_kind in FALSIFICATION_KINDS:
        rows, summary = ([], LEGACY_NOTE) if legacy else _falsification_rows(res)
        out = [(f"{target} on {inst}", f"{_g(est)} (p {_g(p)})") for target, inst, est, p in rows[:6]]
        return tuple(out + ([("summary", summary)] if summary else []))
    if run.run_kind == "compliers":
        shares = {} if legacy else _mapping(res.get("shares"))
        return tuple(
            (f"{name.replace('_', '-')} share", _g(_float(_mapping(shares.get(name)).get("estimate"))))
            for name in (() if legacy else ("complier", "always_taker", "never_taker"))
        )
    if run.run_kind == "power":
        target_power = 0.8 if legacy else res.get("target_power")
        return (
            ("standard error", _g(None if legacy else _num(res.get("se")))),
            (
                f"minimum detectable effect at {target_power:.0%} power",
                _g(None if legacy else _num(res.get("mde"))),
            ),
            ("power at the effect", _g(None if legacy else _num(res.get("power")))),
        )
    return ()


def _estimate_summary(res: Mapping[str, Any]) -> tuple[tuple[str, str], ...]:
    coef, se = _mapping(res.get("coef")), _mapping(res.get("se"))
    out = [
        (f"estimate of {name}", f"{_g(_float(coef[name]))} (standard error {_g(_float(se.get(name)))})")
        for name in list(coef)[:3]
    ]
    out.append(("method", f"{res.get('method')}, {res.get('vcov')}"))
    out.append(("rows used", f"{res.get('n')} ({res.get('n_dropped')} left out)"))
    if res.get("n_clusters"):
        out.append(("clusters", ", ".join(str(g) for g in res["n_clusters"])))
    out.append(("interval reference", str(res.get("ci_reference"))))
    return tuple(out)


_Row = tuple[str, str, float | None, float | None]  # target, instrument, estimate, p-value


def _falsification_rows(res: Mapping[str, Any]) -> tuple[list[_Row], str]:
    """The coefficient rows and the one-line summary of a falsification run (as `evidence_runs` reads them)."""
    kind = res.get("kind")
    rows: list[_Row] = []
    summary = ""
    if kind == "per_instrument":
        for r in res.get("rows") or ():
            target = f"own estimate (first-stage F {_fmt(r.get('first_stage_f'))})"
            rows.append((target, str(r.get("instrument")), _num(r.get("estimate")), None))
        instruments = ", ".join(str(i) for i in res.get("instruments") or ())
        rows.append(("estimate with all instruments", instruments, _num(res.get("estimate_all")), None))
        p = _num(_mapping(res.get("overid")).get("p_value"))
        if p is not None:
            summary = f"Over-identification test: p = {_fmt(p)}."
    elif kind == "zero_first_stage":
        rows.extend(
            _coefficient_rows(_mapping(res.get("reduced_form")), suffix=f" in {res.get('subsample')}")
        )
        summary = (
            f"First stage in {res.get('subsample')}: p = {_fmt(res.get('first_stage_p_value'))} "
            f"({res.get('n')} of {res.get('n_full')} rows). Assumption: {res.get('assumption')}."
        )
    elif kind == "subgroup_first_stages":
        for g in res.get("groups") or ():
            rows.extend(_coefficient_rows(g, suffix=f" where {res.get('by')} in {g.get('group')}"))
        flagged = [str(f) for f in res.get("flagged") or ()]
        summary = (
            f"Subgroups with a significantly reversed first stage: {', '.join(flagged)}."
            if flagged
            else "No subgroup has a significantly reversed first stage."
        )
    elif kind in ("balance", "placebo_outcomes"):
        for r in res.get("rows") or ():
            rows.extend(_coefficient_rows(r))
        p = _num(_mapping(res.get("joint")).get("p_value"))
        if p is not None:
            summary = f"Joint test of all coefficients: p = {_fmt(p)}."
    return rows, summary


def _coefficient_rows(regression: Mapping[str, Any], suffix: str = "") -> list[_Row]:
    return [
        (
            f"{regression.get('target')}{suffix}",
            str(c.get("instrument")),
            _num(c.get("coef")),
            _num(c.get("p_value")),
        )
        for c in regression.get("coefficients") or ()
    ]


def _mapping(value: Any) -> Mapping[str, Any]:
    return value if isinstance(value, Mapping) else {}


def _float(value: Any) -> float:
    """A number the typed record always holds as a float: the JSON view writes NaN as null and infinities as text."""
    return math.nan if value is None else float(value)


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
