"""Estimate a model straight from a file or a directory of Parquet files, with a choice of engine.

``pandas`` reads the used columns into memory (the path of :func:`~ivdossier.estimation.estimate`); ``duckdb``
and ``spark`` run the grouped scans of :mod:`ivdossier.estimation.sql_moments` (counts and means, the Gram
matrix, then row or cluster moments of the partialled columns) and hand the sums to the same
:class:`~ivdossier.estimation.crossproducts.CrossProducts` code, so coefficients, covariance and the whole
weak-instrument suite come from the same functions as in memory. ``auto`` picks pandas when the used columns
fit comfortably in memory and DuckDB above :data:`~ivdossier.estimation.sources.AUTO_PANDAS_MAX_BYTES`; the
provenance record states the choice, the engine's version and the data fingerprint.

Statistics cannot establish that an instrument is excluded or exogenous, and conclusions for policy or clinical
decisions need domain review, whichever engine computed them.
"""

from __future__ import annotations

import difflib
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import scipy.linalg
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.api import OLS_REASON, _interval_quantile, conventions, estimate
from ivdossier.estimation.crossproducts import CrossProducts
from ivdossier.estimation.data import _check_collinear, _check_roles, as_names
from ivdossier.estimation.diagnostics import DiagnosticSuite, suite_from, unidentified_reason
from ivdossier.estimation.estimators import fit_from_cross_products
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
    SQL_MIN_LENGTH,
    MomentPlan,
    counts_query,
    cross_products_from_sums,
    first_factor,
    gram_query,
    level_means_query,
    levels_summary_query,
    moments_query,
    packed,
    sample_means_query,
    solve_partialling,
    unpack,
)
from ivdossier.estimation.sql_runners import DuckDBRunner, ProgressCallback, Runner, SparkRunner, closing
from ivdossier.estimation.strength import require_distinct_instruments
from ivdossier.vocabulary import NotApplicable

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


@dataclass(frozen=True)
class _Counts:
    n: int
    n_dropped: int
    n_partialled: int
    n_nested: int
    n_absorbed: int
    fe_levels: tuple[int, ...]
    n_clusters: tuple[int, ...]


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


def _normalise(
    outcome: str,
    treatment: str | Sequence[str],
    instruments: str | Sequence[str],
    controls: str | Sequence[str],
    absorb: str | Sequence[str],
    cluster: str | Sequence[str] | None,
    weights: str | None,
    method: str,
    vcov: str,
    small_sample: bool,
    alpha: float,
    fuller_alpha: float,
) -> ModelSpec:
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
    treat, inst, clus = model.treatment, model.instruments, model.cluster
    if len(clus) > 2:
        raise InvalidInputError(
            f"At most two cluster variables are supported, got {len(clus)}; pass one or two."
        )
    roles = {
        "outcome": (outcome,),
        "treatment": treat,
        "instruments": inst,
        "controls": model.controls,
        "absorb": model.absorb,
        "weights": (weights,) if weights else (),
    }
    _check_roles(roles)
    if method != "ols" and len(inst) < len(treat):
        raise EstimationError(
            f"{len(inst)} excluded instrument(s) for {len(treat)} endogenous regressor(s): the model is not "
            "identified; add instruments or remove treatments."
        )
    return model


def refuse_unsupported(model: ModelSpec, engine: str) -> None:
    """One clear refusal for what the SQL engines cannot do in a bounded number of scans."""
    if len(model.absorb) > 1:
        raise InvalidInputError(
            f"engine={engine!r} absorbs one factor (grouped demeaning in SQL); {len(model.absorb)} factors need "
            "alternating projections until convergence, an unbounded number of scans. Use engine='pandas' (in "
            "memory), or absorb one factor and add the others' levels as controls."
        )


def _scan_counts(
    runner: Runner, plan: MomentPlan, timings: list[ScanTiming], shift: list[float] | None
) -> dict[str, Any]:
    t0 = time.monotonic()
    label = "counts and means" if shift is None else "counts, means and Gram matrix"
    groups = runner.rows(counts_query(plan, shift), label, 1)
    timings.append(ScanTiming(label, time.monotonic() - t0))
    for j, name in enumerate(plan.numeric):
        bad = sum(int(g[f"ivd_inf{j}"] or 0) for g in groups)
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
    for j, name in enumerate(plan.clusters):
        if int(row[f"ivd_ng{j}"]) < 2:
            raise InvalidInputError(
                f"Cluster variable {name!r} has a single level in the used rows; cluster on a variable with "
                "at least two levels or use vcov='heteroskedastic'."
            )
    for j, name in enumerate(plan.instruments):
        if row[f"ivd_lo{j}"] == row[f"ivd_hi{j}"]:
            raise EstimationError(f"Instrument {name!r} is constant in the used rows; drop it.")
    return row


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
    _check_collinear(r[:, 1 : 1 + p], r[:, 1 + p :], scale, model.treatment, model.instruments, p)
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


def sql_cross_products(runner: Runner, model: ModelSpec) -> tuple[CrossProducts, _Counts, list[ScanTiming]]:
    """Run the scans on ``runner`` and build the sufficient statistics of ``model``."""
    refuse_unsupported(model, runner.name)
    _check_columns(runner.columns(), model)
    absorb = model.absorb[0] if model.absorb else None
    plan = MomentPlan(
        relation=runner.relation,
        instruments=model.instruments,
        treatments=model.treatment,
        outcome=model.outcome,
        controls=model.controls,
        absorb=absorb,
        clusters=model.cluster,
        weights=model.weights,
        kind=model.vcov,
        dialect=runner.dialect,
    )
    runner.scans_total = 3 if absorb else 2
    timings: list[ScanTiming] = []
    n_cols = len(plan.demeaned)
    shift: list[float] | None = None
    if absorb is None:
        sample = runner.one(sample_means_query(plan), "centring sample", 1)
        # an infinite value in the sample is reported by the counts scan; any finite shift will do until then
        shift = [v if np.isfinite(v) else 0.0 for v in packed(sample, "a", n_cols)]
    row = _scan_counts(runner, plan, timings, shift)
    n = int(row["ivd_complete"])
    wsum = float(row["ivd_wsum"])
    means = [float(row[f"ivd_s{j}"]) / wsum for j in range(n_cols)]
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
    t0 = time.monotonic()
    mrows = runner.rows(
        moments_query(plan, coef, means=means, means_table=means_table), "row and cluster moments", index
    )
    timings.append(ScanTiming("row and cluster moments", time.monotonic() - t0))
    m = n_targets
    u = m * (m + 1) // 2
    n_k = u * (u + 1) // 2
    first = mrows[0]
    moment_sums: list[list[float]] = []
    groups: list[int] = []
    if model.vcov == "heteroskedastic":
        moment_sums = [packed(first, "k", n_k)]
    elif model.vcov == "clustered":
        moment_sums = [packed(r, "k", n_k) for r in mrows]
        groups = [int(r["ivd_groups"]) for r in mrows]
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
    counts = _Counts(
        n=n,
        n_dropped=int(row["ivd_rows"]) - n,
        n_partialled=n_partialled,
        n_nested=nested,
        n_absorbed=levels,
        fe_levels=(levels,) if absorb else (),
        n_clusters=tuple(int(row[f"ivd_ng{j}"]) for j in range(len(plan.clusters)))
        if model.vcov == "clustered"
        else (),
    )
    return cp, counts, timings


def _ols_from(cp: CrossProducts) -> tuple[Array, Array, float]:
    """OLS of the outcome on the treatments from the sufficient statistics: beta, covariance, SSR."""
    rx, ry = cp.coords(cp.ix), cp.coords(cp.iy)
    qq, rr = np.linalg.qr(rx)
    beta = scipy.linalg.solve_triangular(rr, qq.T @ ry, check_finite=False)
    rinv = scipy.linalg.solve_triangular(rr, np.eye(cp.p), check_finite=False)
    u = ry - rx @ beta
    cov = cp.covariance(rx, u, rinv @ rinv.T, cp.p)
    unit = cp.scale[cp.iy] / cp.scale[cp.ix]
    ssr = float(u @ u) * float(cp.scale[cp.iy]) ** 2
    return np.asarray(beta * unit, dtype=np.float64), np.asarray(cov * np.outer(unit, unit)), ssr


def result_from_cross_products(cp: CrossProducts, counts: _Counts, model: ModelSpec) -> EstimationResult:
    """The estimation result (coefficients, covariance, intervals, diagnostic suite) from the sums alone."""
    n, k = counts.n, len(model.treatment)
    df_resid = n - k - counts.n_partialled
    common: dict[str, Any] = {
        "method": model.method,
        "vcov": model.vcov,
        "outcome": model.outcome,
        "names": model.treatment,
        "alpha": model.alpha,
        "n": n,
        "n_dropped": counts.n_dropped,
        "n_clusters": counts.n_clusters,
        "df_resid": df_resid,
        "n_partialled": counts.n_partialled,
        "n_absorbed": counts.n_absorbed,
        "n_absorbed_nested": counts.n_nested,
        "fe_levels": counts.fe_levels,
        "spec": model.echo(),
        "conventions": conventions(model.vcov, model.small_sample),
    }
    q, ci_ref, ref_df = _interval_quantile(
        model.vcov, model.small_sample, df_resid, counts.n_clusters, model.alpha
    )
    names, inst = list(model.treatment), list(model.instruments)
    if model.method == "ols":
        beta, cov, ssr = _ols_from(cp)
        kappa, kappa_liml = 0.0, None
    else:
        unident = unidentified_reason(cp, names, inst)
        if unident is not None:
            nan = np.full(k, np.nan)
            unidentified_suite = suite_from(
                cp,
                beta=nan,
                method=model.method,
                kappa=float("nan"),
                endog_names=names,
                instrument_names=inst,
                alpha=model.alpha,
            )
            return EstimationResult(
                coef=nan,
                se=nan.copy(),
                cov=np.full((k, k), np.nan),
                ci=np.full((k, 2), np.nan),
                ci_reference=ci_ref,
                ref_df=ref_df,
                kappa=float("nan"),
                kappa_liml=None,
                sigma=float("nan"),
                diagnostics=unidentified_suite,
                identification=unident,
                **common,
            )
        mfit = fit_from_cross_products(cp, method=model.method, fuller_alpha=model.fuller_alpha)
        beta, cov, kappa, kappa_liml, ssr = mfit.beta, mfit.cov, mfit.kappa, mfit.kappa_liml, mfit.ssr
    se = np.sqrt(np.diag(cov))
    ci = np.column_stack([beta - q * se, beta + q * se])
    suite: DiagnosticSuite | NotApplicable | None = (
        NotApplicable(OLS_REASON) if model.method == "ols" else None
    )
    if model.method != "ols":
        try:
            require_distinct_instruments(cp, inst)
            suite = suite_from(
                cp,
                beta=beta,
                method=model.method,
                kappa=kappa,
                endog_names=names,
                instrument_names=inst,
                alpha=model.alpha,
            )
        except EstimationError as exc:
            suite = NotApplicable(f"instrument diagnostics not computed: {exc}")
    return EstimationResult(
        coef=beta,
        se=se,
        cov=cov,
        ci=ci,
        ci_reference=ci_ref,
        ref_df=ref_df,
        kappa=kappa,
        kappa_liml=kappa_liml,
        sigma=float(np.sqrt(ssr / df_resid)),
        diagnostics=suite,
        **common,
    )


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
    if engine not in ENGINES:
        raise InvalidInputError(f"Unknown engine {engine!r}; choose one of {', '.join(ENGINES)}.")
    model = _normalise(
        outcome,
        treatment,
        instruments,
        controls,
        absorb,
        cluster,
        weights,
        method,
        vcov,
        small_sample,
        alpha,
        fuller_alpha,
    )
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
    fp = fingerprint(source) if (with_fingerprint and source is not None) else None
    fp_method = (
        "not computed"
        if fp is None
        else "SHA-256 over each file's relative name, size and SHA-256"
        if source is not None and source.is_directory
        else "SHA-256 of the file's bytes"
    )
    rows = memory.rows if memory and not memory.rows_estimated else None
    rows_hint = memory.rows if memory else None
    if chosen == "pandas":
        if memory is not None:
            check_pandas_fits(memory)
        assert source is not None
        t0 = time.monotonic()
        frame = _read_for_pandas(source, model.used)
        read_s = time.monotonic() - t0
        t0 = time.monotonic()
        result = estimate(
            frame,
            outcome=outcome,
            treatment=model.treatment,
            instruments=model.instruments,
            controls=model.controls,
            absorb=model.absorb,
            cluster=model.cluster or None,
            weights=weights,
            method=method,
            vcov=vcov,
            small_sample=small_sample,
            alpha=alpha,
            fuller_alpha=fuller_alpha,
        )
        prov = Provenance(
            "pandas",
            pd.__version__,
            why,
            str(path),
            fp,
            fp_method,
            len(frame),
            (ScanTiming("read", read_s), ScanTiming("estimate", time.monotonic() - t0)),
            {},
            memory,
        )
        return SourceEstimate(result, prov)
    runner: Runner
    settings: dict[str, str] = {}
    if chosen == "duckdb":
        assert source is not None
        duck = DuckDBRunner(
            [str(f) for f in source.files],
            source.format,
            memory_limit=memory_limit,
            temp_directory=temp_directory,
            threads=threads,
            rows_total=rows_hint,
            progress=progress,
        )
        settings = duck.settings()
        runner = duck
    else:
        target = str(path) if source is None or source.format == "csv" else str(source.path)
        runner = SparkRunner(
            target,
            source.format if source else _remote_format(str(path)),
            session=spark_session,
            master=spark_master,
            rows_total=rows_hint,
            progress=progress,
        )
        settings = {"master": str(runner.spark.sparkContext.master)}  # type: ignore[attr-defined]
    with closing(runner), one_blas_thread():
        version = runner.version()
        cp, counts, timings = sql_cross_products(runner, model)
        result = result_from_cross_products(cp, counts, model)
    prov = Provenance(
        chosen,
        version,
        why,
        str(path),
        fp,
        fp_method,
        rows or counts.n + counts.n_dropped,
        tuple(timings),
        settings,
        memory,
    )
    return SourceEstimate(result, prov)


def _remote_format(path: str) -> str:
    return "csv" if path.lower().endswith(".csv") else "parquet"
