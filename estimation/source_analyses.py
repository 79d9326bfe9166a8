"""Evidence analyses over a file or a directory of Parquet files, with a choice of engine.

The analyses here need only the sufficient statistics of one model (:class:`CrossProducts`): the falsification
regressions of placebo outcomes and covariates on the instruments (plus the raw means and variances of their
standardised differences, one more grouped query), each instrument's just-identified estimate, and the
plausibly-exogenous sensitivity analyses. ``duckdb`` and ``spark`` sum those statistics in SQL
(:func:`~ivdossier.estimation.engines.scan_source`) and hand them to the same ``*_from`` functions the in-memory
path uses; ``pandas`` reads the used columns and runs the in-memory function; ``auto`` chooses by size, as
:func:`~ivdossier.estimation.engines.estimate_source` does.

Rows left out are counted in total on the SQL engines (not per column). Statistics cannot establish that an
instrument is excluded or exogenous, and conclusions for policy or clinical decisions need domain review.
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.engines import (
    EngineSettings,
    Provenance,
    ScanTiming,
    auto_choice,
    read_source_frame,
    scan_source,
)
from ivdossier.estimation.rows import RowAccount
from ivdossier.estimation.spec import ModelSpec
from ivdossier.estimation.sql_moments import MomentPlan, raw_summary_query
from ivdossier.estimation.sql_runners import Runner

__all__ = [
    "SourceAnalysis",
    "balance_source",
    "breakdown_value_source",
    "local_to_zero_source",
    "per_instrument_source",
    "placebo_outcomes_source",
    "union_of_intervals_source",
]


@dataclass(frozen=True, eq=False)
class SourceAnalysis:
    """An analysis result together with the provenance of the engine run that produced it."""

    result: Any
    provenance: Provenance


def _row_account(n: int, n_dropped: int) -> RowAccount:
    return RowAccount(n_data=n + n_dropped, n_used=n, n_missing=n_dropped)


def _run(
    path: str,
    model: ModelSpec,
    settings: EngineSettings,
    in_memory: Callable[[Any], Any],
    from_sums: Callable[[Any], Any],
    *,
    extra: Callable[[Runner, MomentPlan], Any] | None = None,
) -> SourceAnalysis:
    """Scan with DuckDB or Spark and compute ``from_sums(scan)``; or, for pandas (named or chosen by ``auto``),
    read the used columns and compute ``in_memory(frame)``."""
    scan = None if settings.engine == "pandas" else scan_source(path, model, settings, extra=extra)
    if scan is None:
        frame, prov = read_source_frame(path, model, settings, choice=auto_choice(path, model, settings))
        t0 = time.monotonic()
        result = in_memory(frame)
        scans = (*prov.scans, ScanTiming("analysis", time.monotonic() - t0))
        return SourceAnalysis(result, dataclasses.replace(prov, scans=scans))
    return SourceAnalysis(from_sums(scan), scan.provenance)


def _one_treatment(spec: ModelSpec, what: str) -> str:
    if spec.outcome is None:
        raise InvalidInputError(f"{what} needs an outcome column; pass outcome=.")
    return spec.single_treatment()


# ---------------------------------------------------------------- falsification regressions


def _raw_summary(runner: Runner, plan: MomentPlan, targets: Sequence[str], instruments: Sequence[str]) -> Any:
    """The unweighted statistics of the standardised differences, from one grouped query (arms of a single
    binary instrument combined exactly into the overall mean and variance)."""
    from ivdossier.estimation.falsification import RawSummary

    k = len(instruments)
    names = [*instruments, *targets]  # positions in plan.demeaned: instruments, then the targets
    rows = runner.rows(raw_summary_query(plan, range(len(names)), 0 if k == 1 else None), "summary", 0)
    groups = [r for r in rows if int(r["ivd_n"] or 0) > 0]
    n = sum(int(r["ivd_n"]) for r in groups)

    def stat(r: dict[str, Any], prefix: str, j: int) -> float:
        v = r[f"ivd_{prefix}{j}"]
        return math.nan if v is None else float(v)

    sd: dict[str, float] = {}
    for j, name in enumerate(names):
        mean = sum(int(r["ivd_n"]) * stat(r, "mean", j) for r in groups) / n
        ss = sum(
            (int(r["ivd_n"]) - 1) * (stat(r, "var", j) if int(r["ivd_n"]) > 1 else 0.0)
            + int(r["ivd_n"]) * (stat(r, "mean", j) - mean) ** 2
            for r in groups
        )
        sd[name] = math.sqrt(ss / (n - 1)) if n > 1 else math.nan

    def arm(r: dict[str, Any] | None, j: int) -> tuple[int, float, float]:
        return (
            (0, math.nan, math.nan) if r is None else (int(r["ivd_n"]), stat(r, "mean", j), stat(r, "var", j))
        )

    arms = None
    by_arm = {int(r["ivd_arm"]): r for r in groups}
    if k == 1 and set(by_arm) <= {0, 1}:
        arms = {t: (arm(by_arm.get(1), j), arm(by_arm.get(0), j)) for j, t in enumerate(targets, start=k)}
    return RawSummary(sd, arms)


def _regressions_source(
    kind: str, path: str, spec: ModelSpec, targets: Sequence[str], settings: EngineSettings
) -> SourceAnalysis:
    from ivdossier.estimation.falsification import (
        balance,
        placebo_outcomes,
        regressions_from,
        stacked_from,
    )

    tgts = tuple(targets)
    if not spec.instruments:
        raise InvalidInputError("instruments= is empty; name at least one instrument column.")
    if not tgts:
        raise InvalidInputError("No target columns were given; name at least one covariate or outcome.")
    # the targets fill the treatment and outcome slots of the sums: [Z, targets[:-1], targets[-1]]
    model = ModelSpec.build(
        outcome=tgts[-1],
        treatment=tgts[:-1],
        instruments=spec.instruments,
        controls=spec.controls,
        absorb=spec.absorb,
        cluster=spec.cluster or None,
        weights=spec.weights,
        vcov=spec.vcov,
        small_sample=spec.small_sample,
        alpha=spec.alpha,
    )
    kw = dict(spec.adjustment(), instruments=spec.instruments)

    def in_memory(frame: Any) -> Any:
        if kind == "balance":
            return balance(frame, covariates=tgts, **kw)
        return placebo_outcomes(frame, outcomes=tgts, **kw)

    def from_sums(scan: Any) -> Any:
        st = stacked_from(
            scan.cross_products,
            targets=tgts,
            instruments=spec.instruments,
            n_dropped=scan.counts.n_dropped,
            alpha=spec.alpha,
            summary=scan.extra,
            controls=spec.controls,
            absorb=spec.absorb,
        )
        return regressions_from(
            kind, st, vcov=spec.vcov, alpha=spec.alpha, row_account=_row_account(st.n, st.n_dropped)
        )

    return _run(
        path,
        model,
        settings,
        in_memory,
        from_sums,
        extra=lambda runner, plan: _raw_summary(runner, plan, tgts, spec.instruments),
    )


def balance_source(
    path: str, spec: ModelSpec, *, covariates: Sequence[str], settings: EngineSettings
) -> SourceAnalysis:
    """:func:`~ivdossier.estimation.falsification.balance` on a file with the engine of ``settings``."""
    return _regressions_source("balance", path, spec, covariates, settings)


def placebo_outcomes_source(
    path: str, spec: ModelSpec, *, outcomes: Sequence[str], settings: EngineSettings
) -> SourceAnalysis:
    """:func:`~ivdossier.estimation.falsification.placebo_outcomes` on a file with the engine of ``settings``."""
    return _regressions_source("placebo_outcomes", path, spec, outcomes, settings)


def per_instrument_source(path: str, spec: ModelSpec, *, settings: EngineSettings) -> SourceAnalysis:
    """:func:`~ivdossier.estimation.falsification.per_instrument` on a file with the engine of ``settings``."""
    from ivdossier.estimation.falsification import per_instrument, per_instrument_from

    treatment = _one_treatment(spec, "per_instrument")
    if len(spec.instruments) < 2:
        raise InvalidInputError(
            f"per_instrument compares instruments and needs at least two, got {len(spec.instruments)}; add "
            "instruments."
        )
    model = dataclasses.replace(spec, method="2sls")
    assert spec.outcome is not None

    def in_memory(frame: Any) -> Any:
        return per_instrument(
            frame,
            outcome=spec.outcome,
            treatment=treatment,
            instruments=spec.instruments,
            **spec.adjustment(),
        )

    def from_sums(scan: Any) -> Any:
        result = per_instrument_from(scan.cross_products, scan.counts, model)
        return dataclasses.replace(result, row_account=_row_account(scan.counts.n, scan.counts.n_dropped))

    return _run(path, model, settings, in_memory, from_sums)


# ---------------------------------------------------------------- plausibly exogenous instruments


def _sensitivity_source(
    path: str,
    spec: ModelSpec,
    settings: EngineSettings,
    in_memory_fn: Callable[..., Any],
    from_fn: Callable[..., Any],
    options: dict[str, Any],
) -> SourceAnalysis:
    treatment = _one_treatment(spec, "The plausibly-exogenous analysis")
    if not spec.instruments:
        raise InvalidInputError(
            "The plausibly-exogenous analysis needs instruments=; name at least one column."
        )
    model = dataclasses.replace(spec, method="2sls")

    def in_memory(frame: Any) -> Any:
        return in_memory_fn(
            frame,
            outcome=spec.outcome,
            treatment=treatment,
            instruments=spec.instruments,
            **spec.adjustment(),
            **options,
        )

    def from_sums(scan: Any) -> Any:
        account = _row_account(scan.counts.n, scan.counts.n_dropped)
        return from_fn(scan.cross_products, scan.counts, model, row_account=account, **options)

    return _run(path, model, settings, in_memory, from_sums)


def union_of_intervals_source(
    path: str,
    spec: ModelSpec,
    *,
    gamma_min: float | Sequence[float],
    gamma_max: float | Sequence[float],
    settings: EngineSettings,
) -> SourceAnalysis:
    """:func:`~ivdossier.estimation.sensitivity.union_of_intervals` on a file with the engine of ``settings``."""
    from ivdossier.estimation.sensitivity import union_of_intervals, union_of_intervals_from

    options = {"gamma_min": gamma_min, "gamma_max": gamma_max}
    return _sensitivity_source(path, spec, settings, union_of_intervals, union_of_intervals_from, options)


def local_to_zero_source(
    path: str,
    spec: ModelSpec,
    *,
    mu: float | Sequence[float],
    omega: float | Sequence[Sequence[float]] | Sequence[float],
    settings: EngineSettings,
) -> SourceAnalysis:
    """:func:`~ivdossier.estimation.sensitivity.local_to_zero` on a file with the engine of ``settings``."""
    from ivdossier.estimation.sensitivity import local_to_zero, local_to_zero_from

    return _sensitivity_source(
        path, spec, settings, local_to_zero, local_to_zero_from, {"mu": mu, "omega": omega}
    )


def breakdown_value_source(
    path: str,
    spec: ModelSpec,
    *,
    target: float = 0.0,
    direction: Sequence[float] | None = None,
    settings: EngineSettings,
) -> SourceAnalysis:
    """:func:`~ivdossier.estimation.sensitivity.breakdown_value` on a file with the engine of ``settings``."""
    from ivdossier.estimation.sensitivity import breakdown_value, breakdown_value_from

    options = {"target": target, "direction": direction}
    return _sensitivity_source(path, spec, settings, breakdown_value, breakdown_value_from, options)
