"""Evidence beyond the first stage: `sensitivity`, `falsify`, `compliers` and `power`, each with --json/--attach.

Each command builds the model spec from the shared options (cli/model_options.py), runs one entry of the table
of analyses (workflows/analyses.py) and prints the findings that entry gives for its catalogue checks.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, writing
from ivdossier.cli.model_options import (
    Absorb,
    Alpha,
    Attach,
    Cluster,
    Controls,
    Data,
    Engine,
    Instruments,
    MemoryLimit,
    Outcome,
    PlotOut,
    SparkMaster,
    Treatment,
    Vcov,
    Weights,
    engine_settings,
    model_spec,
    split_names,
)
from ivdossier.cli.output import print_json

sensitivity_app = typer.Typer(
    help="How large a direct effect of the instrument on the outcome would change the conclusion.",
    no_args_is_help=True,
)
falsify_app = typer.Typer(help="Checks the instrument should pass if it is valid.", no_args_is_help=True)


def register(app: typer.Typer) -> None:
    app.add_typer(sensitivity_app, name="sensitivity", rich_help_panel=panels.EVIDENCE)
    app.add_typer(falsify_app, name="falsify", rich_help_panel=panels.EVIDENCE)
    app.command("compliers", rich_help_panel=panels.EVIDENCE)(compliers)
    app.command("power", rich_help_panel=panels.EVIDENCE)(power)


def _run(
    name: str,
    data: Any,
    spec: Any,
    engine: tuple[str, str | None, str | None] = ("pandas", None, None),
    **options: Any,
) -> Any:
    """Run one analysis of the table; ``engine`` is (--engine, --memory-limit, --spark-master)."""
    from ivdossier.workflows.analyses import run_analysis

    settings = engine_settings(*engine)
    run = run_analysis(name, data, spec, engine=engine[0], engine_settings=settings, **options)
    used = run.extra.get("engine")
    if used:
        typer.echo(f"engine: {used['engine']} ({used['choice']})", err=True)
    return run


def _finish(run: Any, name: str, *, attach: str | None, json_out: bool, caution: str | None = None) -> None:
    """Store the run if asked, then print JSON, or the complete summary and one finding per catalogue check the
    analysis answers; ``caution`` is printed when the result carries none of its own and its summary lacks it."""
    from ivdossier.jsonsafe import json_safe
    from ivdossier.workflows.analyses import analysis
    from ivdossier.workflows.findings import finding_of
    from ivdossier.workflows.runs import store_run

    entry = analysis(name)
    slug = None
    if attach:
        with writing() as session:
            slug = store_run(session, run, instrument=attach, actor=actor()).slug
    data = json_safe(run.result.to_dict())
    if json_out:
        print_json({**data, "run": slug} if slug else data)
        return
    summary = str(run.result)
    typer.echo(summary)
    if entry.checks:
        typer.echo("")
        typer.echo("Findings for the catalogue's checks:")
    for check in entry.checks:
        typer.echo(f"  {check}: {finding_of(check, run.result, entry.run_kind)}")
    caution = getattr(run.result, "caution", None) or getattr(run.result, "note", None) or caution
    if caution and caution not in summary:
        typer.echo(f"note: {caution}")
    if slug:
        typer.echo(f"stored as run {slug} on instrument {attach}")


# ---------------------------------------------------------------- sensitivity


@sensitivity_app.command("range")
def sensitivity_range(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    direct_effect_min: Annotated[
        list[float] | None,
        typer.Option(
            help="Lowest direct effect of the instrument on the outcome (one, or one per instrument)."
        ),
    ] = None,
    direct_effect_max: Annotated[
        list[float] | None,
        typer.Option(
            help="Highest direct effect of the instrument on the outcome (one, or one per instrument)."
        ),
    ] = None,
    gamma_min: Annotated[
        list[float] | None, typer.Option(hidden=True, help="Deprecated spelling of --direct-effect-min.")
    ] = None,
    gamma_max: Annotated[
        list[float] | None, typer.Option(hidden=True, help="Deprecated spelling of --direct-effect-max.")
    ] = None,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    plot: PlotOut = None,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Union of 2SLS intervals over a range of direct effects (Conley, Hansen and Rossi 2012)."""
    from ivdossier.cli.deprecated import either
    from ivdossier.errors import InvalidInputError
    from ivdossier.reports.sensitivity_plot import sensitivity_svg

    low = either(direct_effect_min or None, gamma_min or None, new="--direct-effect-min", old="--gamma-min")
    high = either(direct_effect_max or None, gamma_max or None, new="--direct-effect-max", old="--gamma-max")
    if low is None or high is None:
        raise InvalidInputError(
            "sensitivity range needs the assumed range of the direct effect: pass --direct-effect-min and "
            "--direct-effect-max (one value, or one per instrument)."
        )
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=vcov, alpha=alpha,
    )  # fmt: skip
    run = _run(
        "sensitivity range",
        data,
        spec,
        (engine, memory_limit, spark_master),
        direct_effect_min=low,
        direct_effect_max=high,
    )
    if plot is not None:
        plot.write_text(sensitivity_svg(run.result), encoding="utf-8")
    _finish(run, "sensitivity range", attach=attach, json_out=json_out)


@sensitivity_app.command("prior")
def sensitivity_prior(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    prior_mean: Annotated[
        list[float], typer.Option(help="Prior mean of the direct effect (one per instrument).")
    ],
    prior_sd: Annotated[list[float], typer.Option(help="Prior standard deviation (one per instrument).")],
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Local-to-zero interval with a normal prior on the direct effect (independent across instruments)."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=vcov, alpha=alpha,
    )  # fmt: skip
    run = _run(
        "sensitivity prior",
        data,
        spec,
        (engine, memory_limit, spark_master),
        prior_mean=prior_mean,
        prior_sd=prior_sd,
    )
    _finish(run, "sensitivity prior", attach=attach, json_out=json_out)


@sensitivity_app.command("breakdown")
def sensitivity_breakdown(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    target: Annotated[
        float, typer.Option(help="The effect size the interval should reach (default 0).")
    ] = 0.0,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """The smallest direct effect at which the interval first reaches the target effect."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=vcov, alpha=alpha,
    )  # fmt: skip
    run = _run("sensitivity breakdown", data, spec, (engine, memory_limit, spark_master), target=target)
    _finish(run, "sensitivity breakdown", attach=attach, json_out=json_out)


# ---------------------------------------------------------------- falsification


@falsify_app.command("balance")
def falsify_balance(
    data: Data,
    instrument: Instruments,
    covariate: Annotated[
        list[str], typer.Option(help="Predetermined covariate(s): repeat the option or separate by commas.")
    ],
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Balance of the instrument on predetermined covariates: per covariate and jointly."""
    spec = model_spec(
        instrument=instrument, control=control, absorb=absorb, cluster=cluster, weights=weights, vcov=vcov,
        alpha=alpha,
    )  # fmt: skip
    run = _run(
        "falsify balance",
        data,
        spec,
        (engine, memory_limit, spark_master),
        covariates=list(split_names(covariate)),
    )
    _finish(run, "falsify balance", attach=attach, json_out=json_out)


@falsify_app.command("placebo")
def falsify_placebo(
    data: Data,
    instrument: Instruments,
    placebo_outcome: Annotated[
        list[str],
        typer.Option(
            help="Outcome(s) the instrument cannot have caused: repeat the option or separate by commas."
        ),
    ],
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Reduced form of placebo outcomes on the instrument(s); each should be null."""
    spec = model_spec(
        instrument=instrument, control=control, absorb=absorb, cluster=cluster, weights=weights, vcov=vcov,
        alpha=alpha,
    )  # fmt: skip
    run = _run(
        "falsify placebo",
        data,
        spec,
        (engine, memory_limit, spark_master),
        outcomes=list(split_names(placebo_outcome)),
    )
    _finish(run, "falsify placebo", attach=attach, json_out=json_out)


@falsify_app.command("zero-first-stage")
def falsify_zero_first_stage(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    where: Annotated[str | None, typer.Option(help='Rows of the subsample, e.g. "has_device == 0".')] = None,
    subsample: Annotated[str | None, typer.Option(help="Boolean column marking the subsample.")] = None,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Reduced form where the instrument cannot move the treatment; an effect there points to another path."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=vcov, alpha=alpha,
    )  # fmt: skip
    run = _run("falsify zero-first-stage", data, spec, (engine, None, None), query=where, subsample=subsample)
    _finish(run, "falsify zero-first-stage", attach=attach, json_out=json_out)


@falsify_app.command("per-instrument")
def falsify_per_instrument(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Each instrument's own just-identified estimate beside the estimate using all of them."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=vcov, alpha=alpha,
    )  # fmt: skip
    run = _run("falsify per-instrument", data, spec, (engine, memory_limit, spark_master))
    _finish(run, "falsify per-instrument", attach=attach, json_out=json_out)


@falsify_app.command("first-stage-signs")
def falsify_first_stage_signs(
    data: Data,
    treatment: Treatment,
    instrument: Instruments,
    by: Annotated[str, typer.Option(help="Covariate that defines the subgroups.")],
    bins: Annotated[int, typer.Option(help="Quantile bins when --by has many values.")] = 4,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """First stage within subgroups; a significantly reversed sign somewhere is evidence of defiers."""
    spec = model_spec(
        treatment=treatment, instrument=instrument, control=control, absorb=absorb, cluster=cluster,
        weights=weights, vcov=vcov, alpha=alpha,
    )  # fmt: skip
    run = _run("falsify first-stage-signs", data, spec, (engine, None, None), by=by, bins=bins)
    _finish(run, "falsify first-stage-signs", attach=attach, json_out=json_out)


# ---------------------------------------------------------------- compliers and power


def compliers(
    data: Data,
    treatment: Annotated[str, typer.Option(help="Binary treatment column (0/1).")],
    instrument: Annotated[str, typer.Option(help="Binary instrument column (0/1).")],
    covariate: Annotated[
        list[str] | None,
        typer.Option(help="Covariates to profile compliers on: repeat the option or separate by commas."),
    ] = None,
    outcome: Annotated[str | None, typer.Option(help="Outcome for the implied-density check.")] = None,
    bins: Annotated[int, typer.Option(help="Outcome bins for the implied-density check.")] = 5,
    cluster: Annotated[str | None, typer.Option(help="Cluster column for bootstrap resampling.")] = None,
    seed: Annotated[int, typer.Option(help="Seed of the bootstrap.")] = 0,
    engine: Engine = "pandas",
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Complier, always-taker and never-taker shares; complier profile; implied complier densities."""
    run = _run(
        "compliers", data, None, treatment=treatment, instrument=instrument, covariates=list(split_names(covariate)),
        outcome=outcome, bins=bins, cluster=cluster, seed=seed,
    )  # fmt: skip
    _finish(run, "compliers", attach=attach, json_out=json_out)


def power(
    n: Annotated[int, typer.Option(help="Planned number of observations.")],
    partial_r2: Annotated[
        float | None, typer.Option(help="First-stage partial R² of the instruments.")
    ] = None,
    first_stage_f: Annotated[
        float | None, typer.Option(help="Expected first-stage F (instead of R²).")
    ] = None,
    outcome_sd: Annotated[float | None, typer.Option(help="Standard deviation of the outcome.")] = None,
    residual_sd: Annotated[
        float | None, typer.Option(help="Standard deviation of the structural error.")
    ] = None,
    treatment_sd: Annotated[
        float | None,
        typer.Option(
            help="Standard deviation of the treatment (or give --data and --treatment to derive it)."
        ),
    ] = None,
    data: Annotated[
        Path | None, typer.Option(help="Pilot or earlier data to derive the treatment's SD from.")
    ] = None,
    treatment: Annotated[str | None, typer.Option(help="Treatment column of --data.")] = None,
    control: Controls = None,
    error_correlation: Annotated[
        float | None,
        typer.Option(
            help="Correlation of the structural and first-stage errors: also simulate 2SLS and Anderson–Rubin power."
        ),
    ] = None,
    reps: Annotated[int, typer.Option(help="Replications of the simulation.")] = 2000,
    seed: Annotated[int, typer.Option(help="Seed of the simulation.")] = 0,
    instruments: Annotated[int, typer.Option(help="Number of instruments.")] = 1,
    cluster_size: Annotated[float, typer.Option(help="Average cluster size (1 = no clustering).")] = 1.0,
    icc: Annotated[float, typer.Option(help="Intra-cluster correlation of the outcome.")] = 0.0,
    effect: Annotated[float | None, typer.Option(help="Effect to compute power for.")] = None,
    target_power: Annotated[float, typer.Option("--power", help="Target power for MDE and N.")] = 0.8,
    alpha: Alpha = 0.05,
    engine: Engine = "pandas",
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Power, minimum detectable effect and required N of a planned 2SLS design, with its expected first stage."""
    from ivdossier.estimation.power import iv_design, power_analysis
    from ivdossier.workflows.runs import FileRun

    spec: dict[str, Any] = {
        "n": n,
        "partial_r2": partial_r2,
        "first_stage_f": first_stage_f,
        "outcome_sd": outcome_sd,
        "residual_sd": residual_sd,
        "treatment_sd": treatment_sd,
        "n_instruments": instruments,
        "cluster_size": cluster_size,
        "icc": icc,
        "alpha": alpha,
    }
    frame = None
    sha = ""
    if data is not None:
        from ivdossier.estimation.data import file_sha256, load_table

        frame = load_table(data)
        sha = file_sha256(data)
        spec["data"] = {"path": str(data), "sha256": sha, "treatment": treatment}
    controls = split_names(control)
    design = iv_design(
        **{k: v for k, v in spec.items() if k != "data"}, data=frame, treatment=treatment, controls=controls
    )
    analysis = power_analysis(
        design,
        effect=effect,
        target_power=target_power,
        error_correlation=error_correlation,
        reps=reps,
        seed=seed,
    )
    run = FileRun(
        kind="power",
        result=analysis,
        path=str(data or ""),
        sha256=sha,
        rows=0 if frame is None else len(frame),
        columns=() if frame is None else tuple(str(c) for c in frame.columns),
        seconds=0.0,
        spec={
            **spec,
            "treatment_sd": design.treatment_sd,
            "controls": controls,
            "effect": effect,
            "target_power": target_power,
            "error_correlation": error_correlation,
            "reps": reps,
            "seed": seed,
        },
    )
    _finish(run, "power", attach=attach, json_out=json_out)
