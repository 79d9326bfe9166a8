"""The model options (data, roles of columns, covariance, level), declared once for every evidence command.

Each command lists the aliases it takes and passes them to :func:`model_spec`, which builds the same validated
:class:`~ivdossier.estimation.spec.ModelSpec` that the Python front end builds, so both refuse the same things
with the same message.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

if TYPE_CHECKING:
    from ivdossier.estimation.engines import EngineSettings
    from ivdossier.estimation.spec import ModelSpec

Data = Annotated[Path, typer.Option("--data", help="CSV, Parquet or Stata .dta file.")]
Outcome = Annotated[str, typer.Option("--outcome", help="Outcome column Y.")]
Treatment = Annotated[str, typer.Option("--treatment", help="Treatment column X.")]
Treatments = Annotated[
    list[str], typer.Option("--treatment", help="Endogenous treatment column(s) X (repeat for several).")
]
Instruments = Annotated[list[str], typer.Option("--instrument", help="Instrument column(s) Z (repeatable).")]
OptionalInstruments = Annotated[
    list[str] | None,
    typer.Option("--instrument", help="Excluded instrument column(s) Z (repeat for several; none for OLS)."),
]
Controls = Annotated[
    list[str] | None,
    typer.Option("--control", help="Exogenous control column(s): repeat the option or separate by commas."),
]
Absorb = Annotated[list[str] | None, typer.Option("--absorb", help="Fixed effect(s) to absorb (repeatable).")]
Cluster = Annotated[
    list[str] | None, typer.Option("--cluster", help="Cluster column (one, or two for two-way).")
]
Weights = Annotated[str | None, typer.Option("--weights", help="Column of non-negative analytic weights.")]
Method = Annotated[str, typer.Option("--method", help="ols, 2sls, liml or fuller.")]
Vcov = Annotated[
    str,
    typer.Option(
        "--vcov",
        help="homoskedastic, heteroskedastic or clustered: the errors' variance is the same for every row, may "
        "differ by row, or errors may be correlated within clusters.",
    ),
]
Alpha = Annotated[float, typer.Option("--alpha", help="1 - confidence level of every interval.")]
Attach = Annotated[
    str | None, typer.Option("--attach", help="Store the result as a run attached to this instrument.")
]
PlotOut = Annotated[Path | None, typer.Option("--plot", help="Also write the plot to this .svg file.")]
Engine = Annotated[
    str,
    typer.Option(
        "--engine",
        help="pandas (in memory, the default), duckdb (scans Parquet/CSV with bounded memory), spark, or auto "
        "(pandas when the data fit, DuckDB above); --data may then be a directory of Parquet files.",
    ),
]
MemoryLimit = Annotated[
    str | None,
    typer.Option(
        "--memory-limit", help='DuckDB memory cap, e.g. "1GB" (the engine spills to disk beyond it).'
    ),
]
SparkMaster = Annotated[
    str | None,
    typer.Option("--spark-master", help="Spark master URL for --engine spark (default: local mode)."),
]


def split_names(values: Sequence[str] | None) -> tuple[str, ...]:
    """Column names from a repeated option whose values may also be comma-separated lists."""
    out: list[str] = []
    for value in values or ():
        out.extend(part.strip() for part in value.split(",") if part.strip())
    return tuple(out)


def model_spec(
    *,
    outcome: str | None = None,
    treatment: str | Sequence[str] = (),
    instrument: Sequence[str] | None = None,
    control: Sequence[str] | None = None,
    absorb: Sequence[str] | None = None,
    cluster: Sequence[str] | None = None,
    weights: str | None = None,
    method: str = "2sls",
    vcov: str = "heteroskedastic",
    alpha: float = 0.05,
) -> ModelSpec:
    """The validated model spec from the command-line options (the same checks as the Python API)."""
    from ivdossier.estimation.spec import ModelSpec

    vcov = current_cov_name(vcov)
    return ModelSpec.build(
        outcome=outcome,
        treatment=treatment,
        instruments=tuple(instrument or ()),
        controls=split_names(control),
        absorb=tuple(absorb or ()),
        cluster=tuple(cluster or ()) or None,
        weights=weights,
        method=method,
        vcov=vcov,
        alpha=alpha,
    )


def engine_settings(engine: str, memory_limit: str | None, spark_master: str | None) -> EngineSettings | None:
    """The scanning engine's settings from --engine, --memory-limit and --spark-master (None for pandas)."""
    if engine == "pandas":
        if memory_limit is not None or spark_master is not None:
            from ivdossier.errors import InvalidInputError

            raise InvalidInputError(
                "--memory-limit and --spark-master apply to the scanning engines; add --engine duckdb, spark or "
                "auto, or drop them."
            )
        return None
    from ivdossier.estimation.engines import EngineSettings

    return EngineSettings(engine=engine, memory_limit=memory_limit, spark_master=spark_master)


def current_cov_name(vcov: str) -> str:
    """--vcov in the current words; an old spelling (unadjusted, robust, cluster) works with a deprecation note."""
    from ivdossier.estimation.covariance import OLD_COV_NAMES

    if vcov in OLD_COV_NAMES:
        from ivdossier.cli.deprecated import note

        note(f"--vcov {vcov}", f"--vcov {OLD_COV_NAMES[vcov]}")
        return OLD_COV_NAMES[vcov]
    return vcov
