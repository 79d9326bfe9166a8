"""Running an estimation on a data file and storing it as a registry run (joins estimation and registry)."""

from __future__ import annotations

import platform
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ivdossier import __version__
from ivdossier.errors import InvalidInputError

if TYPE_CHECKING:
    from ivdossier.estimation.spec import ModelSpec

VERSIONED_PACKAGES = ("numpy", "scipy", "pandas", "statsmodels", "sqlalchemy")


def package_versions() -> dict[str, str]:
    """Versions of Python, ivdossier and the numerical libraries, recorded with every run."""
    out = {"python": platform.python_version(), "ivdossier": __version__}
    for name in VERSIONED_PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


@dataclass(frozen=True)
class FileRun:
    """One analysis of a data file: its result object, the data fingerprint, the exact spec and the timing."""

    kind: str
    result: Any  # an object with to_dict()
    path: str
    sha256: str
    rows: int
    columns: tuple[str, ...]
    seconds: float
    spec: dict[str, Any]
    extra: dict[str, Any] = field(default_factory=dict)  # stored beside the results (e.g. plot summaries)


def analyse_file(
    kind: str,
    path: Path | str,
    compute: Callable[[Any], tuple[Any, dict[str, Any]]],
    spec: Mapping[str, Any],
    *,
    load: Callable[[Path | str], Any] | None = None,
) -> FileRun:
    """Load the file (with ``load``, by default ``estimation.load_table``), run `compute(frame) -> (result, extra)`
    and record fingerprint, spec and timing."""
    from ivdossier.estimation import file_sha256, load_table

    start = time.perf_counter()
    frame = (load or load_table)(path)
    result, extra = compute(frame)
    seconds = time.perf_counter() - start
    return FileRun(
        kind=kind,
        result=result,
        path=str(path),
        sha256=file_sha256(path),
        rows=len(frame),
        columns=tuple(str(c) for c in frame.columns),
        seconds=seconds,
        spec={"data": str(path), **spec},
        extra=extra,
    )


def estimate_file(path: Path | str, spec: ModelSpec | None = None, **keywords: Any) -> FileRun:
    """Estimate a validated model spec on a data file with every diagnostic; summarise what the dossier plots.

    Without ``spec`` the keywords of :func:`~ivdossier.estimation.estimate` build one (the same checks).
    """
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.analyses import analysis

    if spec is None:
        spec = ModelSpec.build(**keywords)
    elif keywords:
        raise InvalidInputError(f"give a spec or keywords, not both (got {', '.join(sorted(keywords))}).")

    compute = analysis("estimate").compute
    assert compute is not None
    run = analyse_file("estimate", path, lambda frame: compute(frame, spec, {}), {})
    return FileRun(**{**run.__dict__, "spec": {"data": str(path), **run.result.spec}})


def estimate_with_engine(
    path: Path | str,
    spec: ModelSpec,
    *,
    engine: str,
    memory_limit: str | None = None,
    spark_master: str | None = None,
    progress: Any = None,
) -> FileRun:
    """Estimate a spec with a scanning engine (DuckDB or Spark, or the automatic choice) on a file or a directory
    of Parquet files; the engine's provenance (name, version, why chosen, fingerprint, scans) is stored with it."""
    from ivdossier.estimation.engines import EngineSettings
    from ivdossier.workflows.analyses import run_analysis

    if spec.outcome is None:
        raise InvalidInputError("an estimate needs --outcome; name the outcome column.")
    settings = EngineSettings(
        engine=engine, memory_limit=memory_limit, spark_master=spark_master, progress=progress
    )
    return run_analysis("estimate", path, spec, engine=engine, engine_settings=settings)


def stored_results(result: Any, extra: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """What a run stores as its results: the JSON view (what plan rules and ``--json`` read), what is kept
    beside it (plot summaries), and the typed record under ``record`` that reads back as the result object."""
    from ivdossier.jsonsafe import RECORD_KEY, json_safe

    out: dict[str, Any] = json_safe({**result.to_dict(), **(extra or {})})
    out[RECORD_KEY] = result.to_record()
    return out


def store_run(session: Any, run: FileRun, *, instrument: str, actor: str) -> Any:
    """Record the dataset (by SHA-256) and the run, attached to an instrument, in the caller's transaction."""
    from ivdossier.jsonsafe import json_safe
    from ivdossier.registry.runs import record_run, register_dataset

    dataset = None
    if run.sha256:
        dataset = register_dataset(
            session, actor=actor, path=run.path, sha256=run.sha256, rows=run.rows, columns=run.columns
        )
    results = stored_results(run.result, run.extra)
    return record_run(
        session,
        actor=actor,
        instrument=instrument,
        run_kind=run.kind,
        spec=json_safe(run.spec),
        results=results,
        versions=package_versions(),
        seconds=run.seconds,
        dataset=dataset,
    )


LEGACY_NOTE = (
    "stored by ivdossier 0.1 before runs kept a typed record; its numbers are shown as stored, and rerunning "
    "the analysis lets the dossier summarise it"
)


@dataclass(frozen=True)
class LegacyResult:
    """A run stored by the first release (no typed record): its results as stored, with a note that says so."""

    run_kind: str
    raw: Mapping[str, Any]
    note: str = LEGACY_NOTE


def load_result(run_kind: str, results: Mapping[str, Any]) -> Any:
    """The typed result of a stored run, or a LegacyResult for runs stored before typed records existed."""
    from ivdossier.jsonsafe import RECORD_KEY, load_record
    from ivdossier.workflows.analyses import ANALYSES

    record = results.get(RECORD_KEY) if isinstance(results, Mapping) else None
    if record is None:
        return LegacyResult(run_kind, dict(results or {}))
    expected = {a.result_class for a in ANALYSES.values() if not run_kind or a.run_kind == run_kind}
    result = load_record(record)  # the classes above are imported, so every stored type is known
    if expected and type(result) not in expected:
        names = ", ".join(sorted(c.__name__ for c in expected))
        raise InvalidInputError(
            f"a {run_kind!r} run holds a {type(result).__name__}; expected one of {names}."
        )
    return result
