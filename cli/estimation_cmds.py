"""`ivdossier estimate`: run an IV estimation on a data file, print it, and optionally attach it as a run."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, writing
from ivdossier.cli.output import print_json


def register(app: typer.Typer) -> None:
    app.command("estimate", rich_help_panel=panels.EVIDENCE)(estimate)


DataOpt = Annotated[Path, typer.Option("--data", help="CSV, Parquet or Stata .dta file.")]


def estimate(
    data: DataOpt,
    outcome: Annotated[str, typer.Option(help="Outcome column Y.")],
    treatment: Annotated[list[str], typer.Option(help="Endogenous treatment column(s) X.")],
    instrument: Annotated[
        list[str] | None, typer.Option(help="Excluded instrument column(s) Z (repeat for several).")
    ] = None,
    control: Annotated[
        list[str] | None, typer.Option(help="Exogenous control column(s) (repeatable).")
    ] = None,
    absorb: Annotated[list[str] | None, typer.Option(help="Fixed effect(s) to absorb (repeatable).")] = None,
    cluster: Annotated[
        list[str] | None, typer.Option(help="Cluster column (one, or two for two-way).")
    ] = None,
    weights: Annotated[str | None, typer.Option(help="Column of non-negative analytic weights.")] = None,
    method: Annotated[str, typer.Option(help="ols, 2sls, liml or fuller.")] = "2sls",
    vcov: Annotated[str, typer.Option(help="unadjusted, robust or cluster.")] = "robust",
    alpha: Annotated[float, typer.Option(help="1 - confidence level of every interval.")] = 0.05,
    attach: Annotated[
        str | None, typer.Option(help="Store the run in the registry, attached to this instrument.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Estimate the effect with the full weak-instrument diagnostic suite."""
    from ivdossier.workflows.runs import estimate_file

    outcome_run = estimate_file(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=instrument or [],
        controls=control or [],
        absorb=absorb or [],
        cluster=cluster or None,
        weights=weights,
        method=method,
        vcov=vcov,
        alpha=alpha,
    )
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
