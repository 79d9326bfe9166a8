"""Running an estimation on a data file and storing it as a registry run (joins estimation and registry)."""

from __future__ import annotations

import platform
import time
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Any

from ivdossier import __version__

VERSIONED_PACKAGES = ("numpy", "scipy", "pandas", "statsmodels", "sqlmodel", "networkx", "matplotlib")


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
    """An estimation on a file: the result, the plot summaries, the data fingerprint and the timing."""

    result: Any  # EstimationResult
    path: str
    sha256: str
    rows: int
    columns: tuple[str, ...]
    plot_data: dict[str, Any]
    seconds: float
    spec: dict[str, Any]


def estimate_file(
    path: Path | str,
    *,
    outcome: str,
    treatment: str | Sequence[str],
    instruments: Sequence[str] = (),
    controls: Sequence[str] = (),
    absorb: Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    method: str = "2sls",
    vcov: str = "robust",
    alpha: float = 0.05,
) -> FileRun:
    """Load the file, estimate with every diagnostic, and summarise what the dossier plots."""
    from ivdossier.estimation import file_sha256, load_table
    from ivdossier.estimation.api import estimate_prepared
    from ivdossier.estimation.data import as_names, prepare
    from ivdossier.estimation.plot_data import ar_curve, first_stage_bins

    start = time.perf_counter()
    frame = load_table(path)
    clus = as_names(cluster, "cluster")
    prepared = prepare(
        frame,
        outcome=outcome,
        treatment=treatment,
        instruments=tuple(instruments),
        controls=tuple(controls),
        absorb=tuple(absorb),
        cluster=clus,
        weights=weights,
        require_instruments=method != "ols",
    )
    result = estimate_prepared(prepared, method=method, vcov=vcov, alpha=alpha)
    plots: dict[str, Any] = {}
    if method != "ols":
        plots = {"first_stage_bins": first_stage_bins(prepared), "ar_curve": ar_curve(prepared, result)}
    seconds = time.perf_counter() - start
    spec = {"data": str(path), **result.spec}
    return FileRun(
        result=result,
        path=str(path),
        sha256=file_sha256(path),
        rows=len(frame),
        columns=tuple(str(c) for c in frame.columns),
        plot_data=plots,
        seconds=seconds,
        spec=spec,
    )


def store_run(session: Any, run: FileRun, *, instrument: str, actor: str, run_kind: str = "estimate") -> Any:
    """Record the dataset (by SHA-256) and the run, attached to an instrument, in the caller's transaction."""
    from ivdossier.jsonsafe import json_safe
    from ivdossier.registry.runs import record_run, register_dataset

    dataset = register_dataset(
        session, actor=actor, path=run.path, sha256=run.sha256, rows=run.rows, columns=run.columns
    )
    results = json_safe({**run.result.to_dict(), "plot_data": run.plot_data})
    return record_run(
        session,
        actor=actor,
        instrument=instrument,
        run_kind=run_kind,
        spec=json_safe(run.spec),
        results=results,
        versions=package_versions(),
        seconds=run.seconds,
        dataset=dataset,
    )
