"""`ivdossier estimate`: run an IV estimation on a data file, print it, and optionally attach it as a run."""

from __future__ import annotations

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
    MemoryLimit,
    Method,
    OptionalInstruments,
    Outcome,
    SparkMaster,
    Treatments,
    Vcov,
    Weights,
    engine_settings,
    model_spec,
)
from ivdossier.cli.output import print_json


def register(app: typer.Typer) -> None:
    app.command("estimate", rich_help_panel=panels.EVIDENCE)(estimate)


def estimate(
    data: Data,
    outcome: Outcome,
    treatment: Treatments,
    instrument: OptionalInstruments = None,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    method: Method = "2sls",
    vcov: Vcov = "heteroskedastic",
    alpha: Alpha = 0.05,
    attach: Attach = None,
    json_out: JsonFlag = False,
    engine: Engine = "pandas",
    memory_limit: MemoryLimit = None,
    spark_master: SparkMaster = None,
) -> None:
    """Estimate the effect with the full weak-instrument diagnostic suite."""
    from ivdossier.workflows.runs import estimate_file, estimate_with_engine

    spec = model_spec(
        outcome=outcome,
        treatment=treatment,
        instrument=instrument,
        control=control,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        method=method,
        vcov=vcov,
        alpha=alpha,
    )
    settings = engine_settings(engine, memory_limit, spark_master)
    if settings is None:
        outcome_run = estimate_file(data, spec)
    else:
        outcome_run = estimate_with_engine(
            data, spec, engine=engine, memory_limit=memory_limit, spark_master=spark_master
        )
        if not json_out:
            used = outcome_run.extra["engine"]
            typer.echo(f"engine: {used['engine']} ({used['choice']})")
    from ivdossier.workflows.run_warnings import inference_warnings

    result = outcome_run.result
    for warning in inference_warnings(result.n_clusters, result.ref_df):
        typer.echo(f"warning: {warning}", err=True)
    slug = None
    if attach:
        from ivdossier.workflows.runs import store_run

        with writing() as session:
            slug = store_run(session, outcome_run, instrument=attach, actor=actor()).slug
    if json_out:
        payload = outcome_run.result.to_dict()
        if slug:
            payload = {**payload, "run": slug}
        print_json(payload)
        return
    typer.echo(str(outcome_run.result))
    if slug:
        typer.echo(f"\nstored as run {slug} on instrument {attach}")
