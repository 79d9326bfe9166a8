"""Fragility analyses of one model from a data file: the wild (and pairs) bootstrap, the delete-one-cluster
jackknife and the subvector Anderson–Rubin test, computed by the numerics in estimation/ and stored as runs.

The table of analyses (analyses.py) holds one entry per kind; :func:`run_fragility` runs an entry like
``run_analysis`` does, and also passes a ``progress(done, total)`` callback to the numerics (not stored).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ivdossier.errors import InvalidInputError

if TYPE_CHECKING:
    import pandas as pd

    from ivdossier.estimation.fragility_data import FragilityData
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.runs import FileRun

Options = Mapping[str, Any]
Progress = Callable[[int, int], None]
WEIGHT_TYPES = ("rademacher", "webb")


def _spec(spec: ModelSpec | None, name: str) -> ModelSpec:
    if spec is None or spec.outcome is None:
        raise InvalidInputError(f"{name} needs a model with an outcome; pass outcome=.")
    return spec


def _data(frame: pd.DataFrame, s: ModelSpec, *, one_treatment: bool) -> FragilityData:
    from ivdossier.estimation.fragility_data import fragility_data

    treatment: Any = s.single_treatment() if one_treatment else s.treatment
    assert s.outcome is not None
    return fragility_data(
        frame,
        outcome=s.outcome,
        treatment=treatment,
        instruments=s.instruments,
        controls=s.controls,
        absorb=s.absorb,
        cluster=s.cluster[0] if len(s.cluster) == 1 else (s.cluster or None),
        weights=s.weights,
    )


def bootstrap_compute(
    frame: pd.DataFrame, spec: ModelSpec | None, o: Options, progress: Progress | None = None
) -> tuple[Any, dict[str, Any]]:
    """Wild restricted efficient bootstrap t and AR tests and sets; the analytic ones; optional pairs bootstrap."""
    from ivdossier.estimation.api import estimate_prepared
    from ivdossier.estimation.diagnostics import DiagnosticSuite
    from ivdossier.estimation.fragility_bundle import BootstrapBundle
    from ivdossier.estimation.pairs_bootstrap import pairs_bootstrap
    from ivdossier.estimation.wild_bootstrap import wild_bootstrap

    s = _spec(spec, "fragility bootstrap")
    weight_type = o.get("weight_type", "rademacher")
    if weight_type not in WEIGHT_TYPES:
        raise InvalidInputError(
            f"Unknown wild weight type {weight_type!r}; choose one of {', '.join(WEIGHT_TYPES)}."
        )
    pairs_draws = int(o.get("pairs_draws") or 0)
    if pairs_draws == 1 or pairs_draws < 0:
        raise InvalidInputError(
            f"--pairs-draws must be 0 (no pairs bootstrap) or at least 2, got {pairs_draws}."
        )
    fd = _data(frame, s, one_treatment=True)
    seed = o.get("seed", 0)
    wild = wild_bootstrap(
        fd,
        null=float(o.get("null", 0.0)),
        draws=int(o.get("draws", 999)),
        weights=weight_type,
        seed=seed,
        alpha=s.alpha,
        progress=progress,
    )
    pairs = (
        pairs_bootstrap(fd, draws=pairs_draws, seed=seed, alpha=s.alpha, progress=progress)
        if pairs_draws
        else None
    )
    interval: tuple[float, float] | None = None
    ar_set = None
    if wild.applicable:
        analytic = estimate_prepared(fd.prepared, method="2sls", vcov=s.vcov, alpha=s.alpha)
        interval = (float(analytic.ci[0, 0]), float(analytic.ci[0, 1]))
        if isinstance(analytic.diagnostics, DiagnosticSuite):
            ar_set = analytic.diagnostics.weak_iv_robust.anderson_rubin.intervals
    bundle = BootstrapBundle(
        wild=wild, pairs=pairs, vcov=s.vcov, analytic_interval=interval, analytic_ar_set=ar_set
    )
    return bundle, {}


def influence_compute(
    frame: pd.DataFrame, spec: ModelSpec | None, o: Options, progress: Progress | None = None
) -> tuple[Any, dict[str, Any]]:
    """Delete-one-cluster (delete-one-row without clusters) jackknife of one treatment's 2SLS result."""
    from ivdossier.estimation.influence import jackknife_influence

    s = _spec(spec, "fragility influence")
    fd = _data(frame, s, one_treatment=True)
    top = int(o.get("top", 5))
    if top < 1:
        raise InvalidInputError(f"--top must be at least 1, got {top}.")
    result = jackknife_influence(
        fd, null=float(o.get("null", 0.0)), alpha=s.alpha, top=top, progress=progress
    )
    return result, {}


def subvector_compute(
    frame: pd.DataFrame, spec: ModelSpec | None, o: Options, progress: Progress | None = None
) -> tuple[Any, dict[str, Any]]:
    """Subvector Anderson–Rubin test and set for one of several treatments (the others unrestricted)."""
    from ivdossier.estimation.api import prepare_spec
    from ivdossier.estimation.subvector import subvector_ar_prepared

    s = _spec(spec, "fragility subvector")
    of = o.get("of")
    if not of:
        raise InvalidInputError(
            f"name the treatment to test with --of; choose one of {', '.join(s.treatment)}."
        )
    prepared = prepare_spec(frame, s)
    result = subvector_ar_prepared(
        prepared, treatment=str(of), vcov=s.vcov, alpha=s.alpha, null=float(o.get("null", 0.0))
    )
    return result, {}


KINDS = ("fragility-bootstrap", "fragility-influence", "fragility-subvector")
COMPUTE = {
    "fragility bootstrap": bootstrap_compute,
    "fragility influence": influence_compute,
    "fragility subvector": subvector_compute,
}


def run_fragility(
    name: str, path: Path | str, spec: ModelSpec | None, progress: Progress | None = None, **options: Any
) -> FileRun:
    """Run one fragility analysis on a data file, reporting progress; stored like any analysis run."""
    from ivdossier.workflows.analyses import analysis
    from ivdossier.workflows.runs import analyse_file

    entry = analysis(name)
    compute = COMPUTE[name]
    return analyse_file(
        entry.run_kind,
        path,
        lambda frame: compute(frame, spec, options, progress),
        entry.stored_spec(spec, options),
    )


def fragility_runs(runs: Any) -> tuple[Any, ...]:
    """The stored fragility runs of an instrument as the dossier reads them (typed results, oldest first)."""
    from ivdossier.reports.fragility_doc import FragilityRun
    from ivdossier.workflows.runs import LegacyResult, load_result

    out = []
    for run in runs:
        if run.run_kind not in KINDS:
            continue
        result = load_result(run.run_kind, run.results or {})
        if isinstance(result, LegacyResult):
            continue
        created = run.created_at.isoformat(timespec="seconds") if run.created_at else ""
        out.append(FragilityRun(slug=run.slug, run_kind=run.run_kind, created_text=created, result=result))
    return tuple(out)
