"""Estimate a model straight from a file or a directory of Parquet files, with a choice of engine.

``pandas`` reads the used columns into memory (the path of :func:`~ivdossier.estimation.estimate`); ``duckdb``
and ``spark`` run the grouped scans of :mod:`ivdossier.estimation.sql_moments` (counts and means, the Gram
matrix, then row or cluster moments of the partialled columns; a single scan grouped by cluster for well-conditioned
one-way clustered and homoskedastic models without an absorbed factor) and hand the sums to the same
:class:`~ivdossier.estimation.crossproducts.CrossProducts` code, so coefficients, covariance and the whole
weak-instrument suite come from the same functions as in memory. ``auto`` picks pandas when the used columns
fit comfortably in memory and DuckDB above :data:`~ivdossier.estimation.sources.AUTO_PANDAS_MAX_BYTES`; the
provenance record states the choice, the engine's version and the data fingerprint.

Statistics cannot establish that an instrument is excluded or exogenous, and conclusions for policy or clinical
decisions need domain review, whichever engine computed them.
"""

from __future__ import annotations

import dataclasses
import difflib
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import scipy.linalg
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.api import SampleCounts, estimate_spec, result_from_cross_products
from ivdossier.estimation.crossproducts import CrossProducts, pack_index
from ivdossier.estimation.data import as_names, check_collinear, check_roles
from ivdossier.estimation.linalg import one_blas_thread
from ivdossier.estimation.result import EstimationResult
from ivdossier.estimation.sources import (
    AUTO_PANDAS_MAX_BYTES,
    PANDAS_MEMORY_SHARE,
    MemoryEstimate,
    Source,
    check_pandas_fits,
    fingerprint,
    gib,
    pandas_memory,
    parquet_rows_and_types,
    resolve_source,
)
from ivdossier.estimation.spec import ModelSpec
from ivdossier.estimation.sql_moments import (
    ONE_SCAN_MAX_AMPLIFICATION,
    ONE_SCAN_MAX_CLUSTERS,
    ONE_SCAN_SAMPLE_MAX_DISTINCT,
    SQL_MIN_LENGTH,
    ClusterSums,
    MomentPlan,
    amplification,
    cluster_sums_moments,
    counts_query,
    cross_products_from_sums,
    first_factor,
    gram_query,
    infinite_counts_query,
    level_means_query,
    levels_summary_query,
    moments_query,
    packed,
    sample_means_query,
    solve_partialling,
    unpack,
)
from ivdossier.estimation.sql_runners import DuckDBRunner, ProgressCallback, Runner, SparkRunner, closing

Array = NDArray[np.float64]
ENGINES: tuple[str, ...] = ("auto", "pandas", "duckdb", "spark")


@dataclass(frozen=True)
class ScanTiming:
    """How long one scan took."""

    scan: str
    seconds: float


@dataclass(frozen=True)
class Provenance:
    """Where a result came from: engine, version, why it was chosen, the data fingerprint and the scans run."""

    engine: str
    engine_version: str
    choice: str
    source: str
    fingerprint: str | None
    fingerprint_method: str
    rows: int | None
    scans: tuple[ScanTiming, ...] = ()
    settings: dict[str, str] = field(default_factory=dict)
    memory: MemoryEstimate | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form for the run store."""
        return {
            "engine": self.engine,
            "engine_version": self.engine_version,
            "choice": self.choice,
            "source": self.source,
            "fingerprint": self.fingerprint,
            "fingerprint_method": self.fingerprint_method,
            "rows": self.rows,
            "scans": [{"scan": s.scan, "seconds": round(s.seconds, 3)} for s in self.scans],
            "settings": dict(self.settings),
            "pandas_memory_estimate": self.memory.to_dict() if self.memory else None,
        }

    def __str__(self) -> str:
        fp = self.fingerprint[:16] + "..." if self.fingerprint else "not computed"
        lines = [
            f"engine: {self.engine} {self.engine_version} ({self.choice})",
            f"data: {self.source}, fingerprint {fp} ({self.fingerprint_method})",
        ]
        if self.scans:
            lines.append("scans: " + ", ".join(f"{s.scan} {s.seconds:.1f} s" for s in self.scans))
        return "\n".join(lines)


@dataclass(frozen=True, eq=False)
class SourceEstimate:
    """An estimation result together with the provenance of the engine run that produced it."""

    result: EstimationResult
    provenance: Provenance

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form: the result's dict and the provenance."""
        return {"result": self.result.to_dict(), "provenance": self.provenance.to_dict()}

    def __str__(self) -> str:
        return f"{self.result}\n{self.provenance}"


def _check_columns(kinds: dict[str, str], model: ModelSpec) -> None:
    columns = list(kinds)
    for name in model.used:
        if name not in kinds:
            close = difflib.get_close_matches(name, columns, n=3, cutoff=0.6)
            hint = (
                f"; did you mean {', '.join(repr(c) for c in close)}?" if close else "; check the spelling."
            )
            raise InvalidInputError(f"Column {name!r} is not in the data{hint}")
    roles = [(model.outcome, "outcome")] + [(t, "treatment") for t in model.treatment]
    roles += [(z, "instrument") for z in model.instruments] + [(c, "control") for c in model.controls]
    roles += [(model.weights, "weights")] if model.weights else []
    for name, role in roles:
        if kinds[name] not in ("number", "bool"):
            raise InvalidInputError(
                f"The {role} column {name!r} must be numeric but its type in the file is not a number; recode it "
                "as numbers."
            )


def _check_model_roles(model: ModelSpec) -> None:
    """No column may play two roles in the model (outcome, treatment, instrument, control, absorbed, weights)."""
    check_roles(
        {
            "outcome": (model.outcome,) if model.outcome else (),
            "treatment": model.treatment,
            "instruments": model.instruments,
            "controls": model.controls,
            "absorb": model.absorb,
            "weights": (model.weights,) if model.weights else (),
        }
    )


def _check_model(model: ModelSpec) -> None:
    """What a scanning estimate needs of its model beyond the spec's own checks: one outcome, a treatment, at most
    two cluster variables, distinct roles and enough instruments."""
    if not model.outcome:
        raise InvalidInputError("Option outcome= must name one column.")
    if not model.treatment:
        raise InvalidInputError("Option treatment= must name at least one column.")
    treat, inst, clus = model.treatment, model.instruments, model.cluster
    if len(clus) > 2:
        raise InvalidInputError(
            f"At most two cluster variables are supported, got {len(clus)}; pass one or two."
        )
    _check_model_roles(model)
    if model.method != "ols" and len(inst) < len(treat):
        raise EstimationError(
            f"{len(inst)} excluded instrument(s) for {len(treat)} endogenous regressor(s): the model is not "
            "identified; add instruments or remove treatments."
        )


def refuse_unsupported(model: ModelSpec, engine: str) -> None:
    """One clear refusal for what the SQL engines cannot do in a bounded number of scans."""
    if len(model.absorb) > 1:
        raise InvalidInputError(
            f"engine={engine!r} absorbs one factor (grouped demeaning in SQL); {len(model.absorb)} factors need "
            "alternating projections until convergence, an unbounded number of scans. Use engine='pandas' (in "
            "memory), or absorb one factor and add the others' levels as controls."
        )


def _merge_groups(rows: list[dict[str, Any]]) -> dict[str, Any]:
    """One row of scan 1 from several (per cluster) with the same completeness flag: minima of ``ivd_lo``,
    maxima of ``ivd_hi``, sums of the rest (NULL, the sum of no values, counts as nothing)."""
    out: dict[str, Any] = {}
    for row in rows:
        for key, value in row.items():
            if key == "ivd_ok" or value is None:
                out.setdefault(key, value)
                continue
            old = out.get(key)
            if old is None:
                out[key] = value
            elif key.startswith("ivd_lo"):
                out[key] = min(old, value)
            elif key.startswith("ivd_hi"):
                out[key] = max(old, value)
            else:
                out[key] = old + value
    return out


class _ClusterCollector:
    """Collects scan 1's rows grouped by (completeness, cluster): merged rows per flag and, for the complete
    rows, the per-cluster sums as arrays (dropped, leaving the moments to their own scan, beyond
    ONE_SCAN_MAX_CLUSTERS clusters)."""

    def __init__(self, n_cols: int) -> None:
        self.n_cols = n_cols
        self.merged: dict[bool, dict[str, Any]] = {}
        self.parts: list[tuple[Array, Array, Array]] | None = []
        self.clusters = 0

    def __call__(self, batch: list[dict[str, Any]]) -> None:
        for flag in (True, False):
            rows = [r for r in batch if bool(r["ivd_ok"]) is flag]
            if not rows:
                continue
            prev = [self.merged[flag]] if flag in self.merged else []
            self.merged[flag] = _merge_groups([*prev, _merge_groups(rows)])
            if not flag:
                continue
            self.clusters += len(rows)
            if self.parts is None or self.clusters > ONE_SCAN_MAX_CLUSTERS:
                self.parts = None
                continue
            n_g = self.n_cols * (self.n_cols + 1) // 2
            self.parts.append(
                (
                    np.array([float(r["ivd_wsum"]) for r in rows]),
                    np.array([packed(r, "h", self.n_cols) for r in rows]).reshape(len(rows), self.n_cols),
                    np.array([packed(r, "g", n_g) for r in rows]).reshape(len(rows), n_g),
                )
            )

    def sums(self) -> ClusterSums | None:
        if not self.parts:
            return None
        return ClusterSums(*(np.concatenate([p[i] for p in self.parts]) for i in range(3)))


def _scan_counts(
    runner: Runner,
    plan: MomentPlan,
    timings: list[ScanTiming],
    shift: list[float] | None,
    *,
    by_cluster: bool = False,
) -> tuple[dict[str, Any], ClusterSums | None]:
    t0 = time.monotonic()
    label = "counts and means" if shift is None else "counts, means and Gram matrix"
    per_cluster = None
    if by_cluster:
        label += " by cluster"
        collect = _ClusterCollector(len(plan.demeaned))
        runner.each_batch(counts_query(plan, shift, by_cluster=True), label, 1, collect)
        groups = list(collect.merged.values())
        per_cluster = collect.sums()
    else:
        groups = runner.rows(counts_query(plan, shift), label, 1)
    timings.append(ScanTiming(label, time.monotonic() - t0))
    infinite = groups
    if (
        groups
        and "ivd_inf0" not in groups[0]
        and not all(_finite_sums(g, len(plan.demeaned)) for g in groups)
    ):
        # a non-finite sum: an infinite value, or a NaN (missing) one; count the infinite values exactly
        infinite = runner.rows(infinite_counts_query(plan), "infinite values", 1)
    for j, name in enumerate(plan.numeric):
        bad = sum(int(g.get(f"ivd_inf{j}") or 0) for g in infinite)
        if bad:
            raise InvalidInputError(
                f"Column {name!r} holds {bad} infinite value(s); replace them or mark them missing."
            )
    complete = [g for g in groups if g["ivd_ok"]]
    row = dict(complete[0]) if complete else {}
    row["ivd_complete"] = int(row.get("ivd_rows", 0))
    row["ivd_rows"] = sum(int(g["ivd_rows"]) for g in groups)
    n = int(row["ivd_complete"] or 0)
    if n == 0:
        raise InvalidInputError("No row is complete over the used columns; check for missing values.")
    if plan.weights and int(row["ivd_badw"] or 0):
        raise InvalidInputError(
            f"Weights column {plan.weights!r} holds {int(row['ivd_badw'])} zero or negative value(s); weights must "
            "be positive, drop those rows first."
        )
    for j, name in enumerate(plan.instruments):
        if row[f"ivd_lo{j}"] == row[f"ivd_hi{j}"]:
            raise EstimationError(f"Instrument {name!r} is constant in the used rows; drop it.")
    return row, per_cluster


def _finite_sums(group: dict[str, Any], n_cols: int) -> bool:
    """Whether the shifted sums and squares of every column in one group of scan 1 are finite."""
    values = [group.get(f"ivd_h{j}") for j in range(n_cols)]
    values += [group.get(f"ivd_g{i}") for i in range(n_cols * (n_cols + 1) // 2)]
    return all(v is None or np.isfinite(float(v)) for v in values)


def _named(prefix: str, values: Array) -> dict[str, float]:
    """Packed sums as the named columns ``ivd_{prefix}{i}`` of a scan's result row."""
    return {f"ivd_{prefix}{i}": float(v) for i, v in enumerate(values)}


def _check_cluster_counts(plan: MomentPlan, counts: tuple[int, ...]) -> None:
    for name, count in zip(plan.clusters, counts, strict=True):
        if count < 2:
            raise InvalidInputError(
                f"Cluster variable {name!r} has a single level in the used rows; cluster on a variable with "
                "at least two levels or use vcov='heteroskedastic'."
            )


def _targets_order(model: ModelSpec) -> list[int]:
    """Positions, in the [y, X, Z] order of the in-memory checks, of plan.targets = [Z, X, y]."""
    k, p = len(model.instruments), len(model.treatment)
    return [k + p, *range(k, k + p), *range(k)]


def _check_partialled(model: ModelSpec, root: Array, pre: Array, *, exact: bool) -> None:
    """The in-memory path's checks for constant or collinear columns, on a square root of the partialled Gram
    matrix (same norms and R factor as the n-row columns); ``pre`` holds the lengths before partialling."""
    order = _targets_order(model)
    r = root[:, order]
    scale = pre[order]
    p = len(model.treatment)
    limit = 1e-9 if exact else SQL_MIN_LENGTH
    if np.linalg.norm(r[:, 0]) <= limit * max(scale[0], 1e-300):
        raise EstimationError(
            f"The outcome {model.outcome!r} has no variation left after partialling out the controls and fixed "
            "effects; check the specification."
        )
    check_collinear(r[:, 1 : 1 + p], r[:, 1 + p :], scale, model.treatment, model.instruments, p)
    if not exact:
        lengths = np.linalg.norm(r, axis=0)
        names = (model.outcome, *model.treatment, *model.instruments)
        for j, name in enumerate(names):
            if lengths[j] <= SQL_MIN_LENGTH * scale[j]:
                raise EstimationError(
                    f"The column {name!r} keeps less than {SQL_MIN_LENGTH:g} of its length after partialling out "
                    "the controls and fixed effects, too little for the SQL engines' normal equations; drop the "
                    "controls that explain it or use engine='pandas'."
                )


def _psd_root(gram: Array) -> Array:
    vals, vecs = np.linalg.eigh((gram + gram.T) / 2)
    return np.asarray(np.sqrt(np.clip(vals, 0.0, None))[:, None] * vecs.T, dtype=np.float64)


def moment_plan(runner: Runner, model: ModelSpec) -> MomentPlan:
    """The query plan of ``model`` on the runner's relation."""
    if model.outcome is None:
        raise InvalidInputError("The SQL engines need an outcome column; pass outcome=.")
    return MomentPlan(
        relation=runner.relation,
        instruments=model.instruments,
        treatments=model.treatment,
        outcome=model.outcome,
        controls=model.controls,
        absorb=model.absorb[0] if model.absorb else None,
        clusters=model.cluster,
        weights=model.weights,
        kind=model.vcov,
        dialect=runner.dialect,
    )


def sql_cross_products(
    runner: Runner, model: ModelSpec
) -> tuple[CrossProducts, SampleCounts, list[ScanTiming]]:
    """Run the scans on ``runner`` and build the sufficient statistics of ``model``."""
    refuse_unsupported(model, runner.name)
    _check_columns(runner.columns(), model)
    absorb = model.absorb[0] if model.absorb else None
    plan = moment_plan(runner, model)
    # without an absorbed factor, homoskedastic and one-way clustered covariances usually need scan 1 only
    one_pass = model.vcov == "homoskedastic" or (model.vcov == "clustered" and len(plan.clusters) == 1)
    runner.scans_total = 3 if absorb else 1 if one_pass else 2
    timings: list[ScanTiming] = []
    n_cols = len(plan.demeaned)
    shift: list[float] | None = None
    # clustered by one variable, scan 1 can group by cluster and give the cluster moments too (no moments scan)
    by_cluster = absorb is None and model.vcov == "clustered" and len(plan.clusters) == 1
    if absorb is None:
        sample = runner.one(sample_means_query(plan, distinct_clusters=by_cluster), "centring sample", 1)
        # an infinite value in the sample is reported by the counts scan; any finite shift will do until then
        shift = [v if np.isfinite(v) else 0.0 for v in packed(sample, "a", n_cols)]
        by_cluster = by_cluster and int(sample["ivd_distinct"] or 0) <= ONE_SCAN_SAMPLE_MAX_DISTINCT
    row, per_cluster = _scan_counts(runner, plan, timings, shift, by_cluster=by_cluster)
    n = int(row["ivd_complete"])
    wsum = float(row["ivd_wsum"])
    means = [float(row[f"ivd_s{j}"]) / wsum for j in range(n_cols)] if shift is None else []
    n_targets = len(plan.targets)
    index = 2
    means_table = None
    levels, nested = 0, 0
    if shift is not None:
        h = np.asarray(packed(row, "h", n_cols))
        gram = unpack(packed(row, "g", n_cols * (n_cols + 1) // 2), n_cols) - np.outer(h, h) / wsum
        means = [mu + hj / wsum for mu, hj in zip(shift, h, strict=True)]
        pre = np.sqrt(np.clip(np.diag(gram), 0.0, None))
    else:
        t0 = time.monotonic()
        means_table = runner.materialise(level_means_query(plan), "level means", index)
        timings.append(ScanTiming("level means", time.monotonic() - t0))
        index += 1
        summary = runner.one(levels_summary_query(plan, means_table), "level means", index - 1)
        levels = int(summary["ivd_levels"])
        if any(int(summary[f"ivd_notnested{j}"]) == 0 for j in range(len(plan.clusters))):
            nested = levels
        t0 = time.monotonic()
        grow = runner.one(gram_query(plan, means=means, means_table=means_table), "Gram matrix", index)
        timings.append(ScanTiming("Gram matrix", time.monotonic() - t0))
        index += 1
        gram = unpack(packed(grow, "g", n_cols * (n_cols + 1) // 2), n_cols)
        pre = np.sqrt(np.clip(np.asarray(packed(grow, "pre", n_cols)), 0.0, None))
    part = solve_partialling(gram, pre, n_targets)
    if part.dropped_controls:
        listed = ", ".join(repr(model.controls[j]) for j in part.dropped_controls)
        raise EstimationError(
            f"Control(s) {listed} are constant, absorbed by the fixed effects or collinear with other controls; "
            "drop them."
        )
    _check_partialled(model, _psd_root(part.schur), pre[:n_targets], exact=False)
    try:
        r1d1 = first_factor(part.approx_len, part.schur)
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "The partialled treatments and instruments are collinear; drop the redundant column or use "
            "engine='pandas' to have it named."
        ) from exc
    coef = part.coef @ scipy.linalg.solve_triangular(r1d1, np.eye(n_targets), check_finite=False)
    m = n_targets
    u = m * (m + 1) // 2
    n_k = u * (u + 1) // 2
    one_scan = shift is not None and model.vcov != "heteroskedastic"
    one_scan = one_scan and (model.vcov == "homoskedastic" or per_cluster is not None)
    if one_scan and amplification(coef, gram) <= ONE_SCAN_MAX_AMPLIFICATION:
        # the moments follow from scan 1's sums (error about amplification^2 x machine epsilon, see
        # ONE_SCAN_MAX_AMPLIFICATION); the layout is that of the moments scan's single result row
        first: dict[str, Any] = {"ivd_n": n}
        mrows = [first]
        if per_cluster is None:
            t_sums = (coef.T @ gram @ coef)[pack_index(m)]
        else:
            delta = np.asarray(means) - np.asarray(shift)
            t_sums, k_sums = cluster_sums_moments(per_cluster, delta, coef)
            first.update({"ivd_groups": len(per_cluster.wsum), **_named("k", k_sums)})
        first.update(_named("t", t_sums))
    else:
        runner.scans_total = index
        t0 = time.monotonic()
        mrows = runner.rows(
            moments_query(plan, coef, means=means, means_table=means_table), "row and cluster moments", index
        )
        timings.append(ScanTiming("row and cluster moments", time.monotonic() - t0))
        first = mrows[0]
    moment_sums: list[list[float]] = []
    groups: list[int] = []
    if model.vcov == "heteroskedastic":
        moment_sums = [packed(first, "k", n_k)]
    elif model.vcov == "clustered":
        moment_sums = [packed(r, "k", n_k) for r in mrows]
        groups = [int(r["ivd_groups"]) for r in mrows]
    cluster_counts = tuple(groups[: len(plan.clusters)])
    _check_cluster_counts(plan, cluster_counts)
    n_used_controls = len(model.controls)
    n_partialled = (0 if absorb else 1) + n_used_controls + levels
    cp = cross_products_from_sums(
        k=len(model.instruments),
        p=len(model.treatment),
        has_y=True,
        r1_scaled=r1d1,
        n=int(first["ivd_n"]),
        gram_sums=packed(first, "t", u),
        moment_sums=moment_sums,
        n_groups=groups,
        kind=model.vcov,
        small_sample=model.small_sample,
        n_partialled=n_partialled,
        n_partialled_nested=nested,
    )
    _check_partialled(model, cp.r * cp.scale[None, :], pre[:n_targets], exact=True)
    counts = SampleCounts(
        n=n,
        n_dropped=int(row["ivd_rows"]) - n,
        n_partialled=n_partialled,
        n_partialled_nested=nested,
        n_absorbed=levels,
        fe_levels=(levels,) if absorb else (),
        n_clusters=cluster_counts,
    )
    return cp, counts, timings


def choose_engine(engine: str, memory: MemoryEstimate | None, *, remote: bool = False) -> tuple[str, str]:
    """The engine to run and the reason, stated (``auto``: pandas up to the threshold, DuckDB above it)."""
    if engine not in ENGINES:
        raise InvalidInputError(f"Unknown engine {engine!r}; choose one of {', '.join(ENGINES)}.")
    if engine != "auto":
        return engine, "chosen by the caller"
    if remote or memory is None:
        return "spark", "auto: the source is not a local file, so it is read by Spark"
    limit = min(AUTO_PANDAS_MAX_BYTES, PANDAS_MEMORY_SHARE * memory.bytes_available or AUTO_PANDAS_MAX_BYTES)
    if memory.bytes_needed <= limit:
        return "pandas", (
            f"auto: about {gib(memory.bytes_needed)} in memory for {memory.rows:,} rows x {memory.columns} "
            f"columns, within the pandas threshold of {gib(limit)}"
        )
    return "duckdb", (
        f"auto: about {gib(memory.bytes_needed)} in memory for {memory.rows:,} rows x {memory.columns} columns, "
        f"above the pandas threshold of {gib(limit)}, so DuckDB scans the file with bounded memory"
    )


def _read_for_pandas(source: Source, used: list[str]) -> pd.DataFrame:
    if source.format == "parquet":
        _, types = parquet_rows_and_types(source)
        missing = [c for c in used if c not in types]
        if missing:
            close = difflib.get_close_matches(missing[0], list(types), n=3, cutoff=0.6)
            hint = (
                f"; did you mean {', '.join(repr(c) for c in close)}?" if close else "; check the spelling."
            )
            raise InvalidInputError(f"Column {missing[0]!r} is not in the data{hint}")
        target = str(source.path)
        return pd.read_parquet(target, columns=used)
    header = pd.read_csv(source.files[0], nrows=0).columns
    present = [c for c in used if c in header]
    return pd.read_csv(source.files[0], usecols=present)


@dataclass(frozen=True)
class EngineSettings:
    """How to run a scan: the engine (``auto``, ``pandas``, ``duckdb``, ``spark``) and its options (DuckDB's
    memory cap, spill folder and threads; Spark's master URL or an existing session), progress and whether to
    fingerprint the data."""

    engine: str = "auto"
    memory_limit: str | None = None
    temp_directory: str | None = None
    threads: int | None = None
    spark_master: str | None = None
    spark_session: Any = None
    progress: ProgressCallback | None = None
    with_fingerprint: bool = True


@dataclass(frozen=True)
class _SourcePlan:
    source: Source | None
    memory: MemoryEstimate | None
    chosen: str
    why: str
    fingerprint: str | None
    fingerprint_method: str
    rows: int | None
    rows_hint: int | None


def _plan_source(path: str, model: ModelSpec, settings: EngineSettings) -> _SourcePlan:
    """Resolve the file or folder, estimate its in-memory size, choose the engine and fingerprint the data."""
    engine = settings.engine
    if engine not in ENGINES:
        raise InvalidInputError(f"Unknown engine {engine!r}; choose one of {', '.join(ENGINES)}.")
    remote = "://" in str(path)
    if remote and engine not in ("spark", "auto"):
        raise InvalidInputError(
            f"{path!r} is not a local path; only engine='spark' reads remote storage. Copy the data locally "
            "or use engine='spark'."
        )
    source = None if remote else resolve_source(path)
    memory = None if source is None else pandas_memory(source, model.used)
    chosen, why = choose_engine(engine, memory, remote=remote)
    if chosen != "pandas":
        refuse_unsupported(model, chosen)
    rows = memory.rows if memory and not memory.rows_estimated else None
    return _SourcePlan(
        source, memory, chosen, why, None, "not computed", rows, memory.rows if memory else None
    )


def _fingerprinted(plan: _SourcePlan, settings: EngineSettings) -> _SourcePlan:
    """The plan with the data fingerprint (a pass over the bytes, so taken once the engine is settled)."""
    source = plan.source
    if not settings.with_fingerprint or source is None:
        return plan
    method = (
        "SHA-256 over each file's relative name, size and SHA-256"
        if source.is_directory
        else "SHA-256 of the file's bytes"
    )
    return dataclasses.replace(plan, fingerprint=fingerprint(source), fingerprint_method=method)


def read_source_frame(
    path: str, model: ModelSpec, settings: EngineSettings, *, choice: str | None = None
) -> tuple[pd.DataFrame, Provenance]:
    """The used columns of a file (or Parquet folder) in memory, for the pandas engine; refused when they would
    not fit. The provenance states the choice (``choice``: why, when ``auto`` chose pandas) and times the read."""
    plan = _plan_source(path, model, dataclasses.replace(settings, engine="pandas"))
    plan = _fingerprinted(dataclasses.replace(plan, why=choice or plan.why), settings)
    if plan.memory is not None:
        check_pandas_fits(plan.memory)
    assert plan.source is not None
    t0 = time.monotonic()
    frame = _read_for_pandas(plan.source, model.used)
    prov = Provenance(
        "pandas",
        pd.__version__,
        plan.why,
        str(path),
        plan.fingerprint,
        plan.fingerprint_method,
        len(frame),
        (ScanTiming("read", time.monotonic() - t0),),
        {},
        plan.memory,
    )
    return frame, prov


def _open_runner(path: str, plan: _SourcePlan, settings: EngineSettings) -> tuple[Runner, dict[str, str]]:
    if plan.chosen == "duckdb":
        assert plan.source is not None
        duck = DuckDBRunner(
            [str(f) for f in plan.source.files],
            plan.source.format,
            memory_limit=settings.memory_limit,
            temp_directory=settings.temp_directory,
            threads=settings.threads,
            rows_total=plan.rows_hint,
            progress=settings.progress,
        )
        return duck, duck.settings()
    source = plan.source
    target = str(path) if source is None or source.format == "csv" else str(source.path)
    spark = SparkRunner(
        target,
        source.format if source else _remote_format(str(path)),
        session=settings.spark_session,
        master=settings.spark_master,
        rows_total=plan.rows_hint,
        progress=settings.progress,
    )
    return spark, {"master": str(spark.spark.sparkContext.master)}  # type: ignore[attr-defined]


def auto_choice(path: str, model: ModelSpec, settings: EngineSettings) -> str | None:
    """Why ``auto`` chose pandas (None for an engine named by the caller): the stated size and threshold."""
    if settings.engine != "auto":
        return None
    return _plan_source(str(path), model, settings).why


@dataclass(frozen=True, eq=False)
class SourceScan:
    """The sufficient statistics of a model summed by a scanning engine, with the sample counts, the
    provenance of the run and what an extra query on the same rows returned (None without one)."""

    cross_products: CrossProducts
    counts: SampleCounts
    provenance: Provenance
    extra: Any = None


ExtraQuery = Callable[[Runner, MomentPlan], Any]


def scan_source(
    path: str, model: ModelSpec, settings: EngineSettings, *, extra: ExtraQuery | None = None
) -> SourceScan | None:
    """Sum the sufficient statistics of ``model`` over a file or Parquet folder with DuckDB or Spark; None when
    ``settings.engine`` is ``auto`` and chose pandas (read the data with :func:`read_source_frame` instead).
    ``extra(runner, plan)`` runs one more query on the same rows before the runner closes."""
    _check_model_roles(model)
    plan = _plan_source(str(path), model, settings)
    if plan.chosen == "pandas":
        if settings.engine == "pandas":
            raise InvalidInputError("scan_source runs the SQL engines; read the data with read_source_frame.")
        return None
    plan = _fingerprinted(plan, settings)
    runner, run_settings = _open_runner(str(path), plan, settings)
    extra_out = None
    with closing(runner), one_blas_thread():
        version = runner.version()
        cp, counts, timings = sql_cross_products(runner, model)
        if extra is not None:
            t0 = time.monotonic()
            extra_out = extra(runner, moment_plan(runner, model))
            timings.append(ScanTiming("summary", time.monotonic() - t0))
    prov = Provenance(
        plan.chosen,
        version,
        plan.why,
        str(path),
        plan.fingerprint,
        plan.fingerprint_method,
        plan.rows or counts.n + counts.n_dropped,
        tuple(timings),
        run_settings,
        plan.memory,
    )
    return SourceScan(cp, counts, prov, extra_out)


def estimate_source(
    path: str,
    *,
    outcome: str,
    treatment: str | Sequence[str],
    instruments: str | Sequence[str] = (),
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    method: str = "2sls",
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
    fuller_alpha: float = 1.0,
    engine: str = "auto",
    spark_master: str | None = None,
    spark_session: Any = None,
    memory_limit: str | None = None,
    temp_directory: str | None = None,
    threads: int | None = None,
    progress: ProgressCallback | None = None,
    with_fingerprint: bool = True,
) -> SourceEstimate:
    """Estimate a model from a .parquet/.csv file or a directory of Parquet files with the chosen engine.

    ``engine``: "pandas" (in memory; refused when the file would not fit), "duckdb" (``memory_limit`` such as
    "1GB", spilling to ``temp_directory``), "spark" (``spark_master`` URL or ``spark_session``; a path Spark can
    read, e.g. hdfs://...) or "auto". ``progress`` receives a :class:`ScanProgress` for scans over two seconds.
    """
    if not isinstance(outcome, str) or not outcome:
        raise InvalidInputError("Option outcome= must name one column.")
    if not as_names(treatment, "treatment"):
        raise InvalidInputError("Option treatment= must name at least one column.")
    model = ModelSpec.build(
        outcome=outcome,
        treatment=treatment,
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        method=method,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
        fuller_alpha=fuller_alpha,
    )
    settings = EngineSettings(
        engine=engine,
        memory_limit=memory_limit,
        temp_directory=temp_directory,
        threads=threads,
        spark_master=spark_master,
        spark_session=spark_session,
        progress=progress,
        with_fingerprint=with_fingerprint,
    )
    return estimate_model_source(str(path), model, settings)


def estimate_model_source(path: str, model: ModelSpec, settings: EngineSettings) -> SourceEstimate:
    """:func:`estimate_source` for a model spec and engine settings already built."""
    if settings.engine not in ENGINES:
        raise InvalidInputError(f"Unknown engine {settings.engine!r}; choose one of {', '.join(ENGINES)}.")
    _check_model(model)
    scan = None if settings.engine == "pandas" else scan_source(path, model, settings)
    if scan is None:
        frame, prov = read_source_frame(path, model, settings, choice=auto_choice(path, model, settings))
        t0 = time.monotonic()
        result = estimate_spec(frame, model)
        prov = dataclasses.replace(prov, scans=(*prov.scans, ScanTiming("estimate", time.monotonic() - t0)))
        return SourceEstimate(result, prov)
    result = result_from_cross_products(scan.cross_products, scan.counts, model)
    return SourceEstimate(result, scan.provenance)


def _remote_format(path: str) -> str:
    return "csv" if path.lower().endswith(".csv") else "parquet"
