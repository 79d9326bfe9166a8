"""Design toolkits and further evidence: `design decision-makers`, `design exposure-share`, `variants` and
`confounder-strength`, each with --json/--attach.

Each command runs one entry of the table of analyses (workflows/analyses.py) and prints its summary and the
findings that entry gives for its catalogue checks, like the other evidence commands.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag
from ivdossier.cli.evidence_cmds import _finish, _run
from ivdossier.cli.model_options import (
    Absorb,
    Alpha,
    Attach,
    Controls,
    Data,
    Instruments,
    Outcome,
    Treatment,
    Weights,
    model_spec,
    split_names,
)

design_app = typer.Typer(
    help="Build and check the instrument of a decision-maker or exposure-share design.", no_args_is_help=True
)


def register(app: typer.Typer) -> None:
    app.add_typer(design_app, name="design", rich_help_panel=panels.EVIDENCE)
    app.command("variants", rich_help_panel=panels.EVIDENCE)(variants)
    app.command("confounder-strength", rich_help_panel=panels.EVIDENCE)(confounder_strength)


def _one_absorb(absorb: list[str] | None) -> str | None:
    from ivdossier.errors import InvalidInputError

    cells = split_names(absorb)
    if len(cells) > 1:
        raise InvalidInputError(
            f"--absorb takes one column of cells here (e.g. court-by-month), got {', '.join(cells)}; "
            "combine them into one column first."
        )
    return cells[0] if cells else None


def _instrument_exists(slug: str) -> None:
    from ivdossier.cli.common import reading
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument

    with reading() as session:
        records.get(session, Instrument, slug)


@design_app.command("decision-makers")
def design_decision_makers(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    decision_maker: Annotated[
        str, typer.Option("--decision-maker", help="Column naming the decision-maker assigned to each case.")
    ],
    control: Controls = None,
    absorb: Absorb = None,
    leave_out_cluster: Annotated[
        str | None,
        typer.Option(help="Leave the case's own cluster out (column of clusters) instead of the case alone."),
    ] = None,
    min_cases: Annotated[int, typer.Option(help="Flag decision-makers with fewer cases than this.")] = 20,
    null: Annotated[
        float, typer.Option("--null", help="Effect tested by the jackknife Anderson–Rubin.")
    ] = 0.0,
    name: Annotated[
        str | None, typer.Option(help="Name of the derived column (default: <treatment>_leave_out).")
    ] = None,
    derived_out: Annotated[
        Path | None,
        typer.Option(help="Write the data with the leave-out measure added to this new .csv file."),
    ] = None,
    alpha: Alpha = 0.05,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Leave-out decision-maker measure, JIVE1 and UJIVE beside 2SLS, and the jackknife Anderson–Rubin test."""
    if attach and derived_out:
        _instrument_exists(attach)  # refuse before the derived file is written
    run = _run(
        "design decision-makers", data, None, outcome=outcome, treatment=treatment, decision_maker=decision_maker,
        controls=list(split_names(control)), absorb=_one_absorb(absorb),
        leave_out="cluster" if leave_out_cluster else "case", leave_out_cluster=leave_out_cluster,
        min_cases=min_cases, beta0=null, alpha=alpha, column_name=name,
        derived_out=str(derived_out) if derived_out else None, input_data=str(data),
    )  # fmt: skip
    _finish(run, "design decision-makers", attach=attach, json_out=json_out)


@design_app.command("exposure-share")
def design_exposure_share(
    data: Annotated[
        Path, typer.Option("--data", help="Unit-level data: one row per unit (CSV, Parquet, .dta).")
    ],
    shares: Annotated[Path, typer.Option("--shares", help="Long table of shares: unit, sector, share.")],
    shocks: Annotated[Path, typer.Option("--shocks", help="Table of shocks: sector, shock.")],
    outcome: Outcome,
    treatment: Treatment,
    unit: Annotated[str, typer.Option(help="Unit id column (in the data and the shares table).")] = "unit",
    sector: Annotated[str, typer.Option(help="Sector column (in the shares and shocks tables).")] = "sector",
    share: Annotated[str, typer.Option(help="Share column of the shares table.")] = "share",
    shock: Annotated[str, typer.Option(help="Shock column of the shocks table.")] = "shock",
    control: Controls = None,
    top: Annotated[int, typer.Option(help="How many sectors of largest weight to list.")] = 5,
    alpha: Alpha = 0.05,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Exposure-share instrument: Rotemberg weights, AKM/AKM0 intervals and the shock-level regression."""
    run = _run(
        "design exposure-share", data, None, shares=str(shares), shocks=str(shocks), outcome=outcome,
        treatment=treatment, unit=unit, sector=sector, share=share, shock=shock,
        controls=list(split_names(control)), top=top, alpha=alpha,
    )  # fmt: skip
    _finish(run, "design exposure-share", attach=attach, json_out=json_out)


def variants(
    data: Annotated[
        Path,
        typer.Option(
            "--data",
            help="Per-variant table (.csv, .tsv, or .txt with the delimiter sniffed; .gz allowed): variant, "
            "exposure_effect, exposure_se, outcome_effect, outcome_se, optional alleles and sample sizes.",
        ),
    ],
    draws: Annotated[int, typer.Option(help="Bootstrap draws for the weighted median's SE.")] = 1000,
    seed: Annotated[int, typer.Option(help="Seed of the bootstrap.")] = 20260101,
    alpha: Alpha = 0.05,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Evidence from per-variant summary statistics: IVW, MR-Egger, weighted median, Q, leave-one-out, Steiger."""
    run = _run("variants", data, None, draws=draws, seed=seed, alpha=alpha, source=data.name)
    _finish(run, "variants", attach=attach, json_out=json_out)


def confounder_strength(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    control: Controls = None,
    absorb: Absorb = None,
    weights: Weights = None,
    benchmark: Annotated[
        list[str] | None,
        typer.Option(help="Control to compare the confounder with (repeatable; must be among --control)."),
    ] = None,
    k: Annotated[
        list[float] | None, typer.Option("--k", help="Multiples of the benchmark's strength.")
    ] = None,
    null: Annotated[
        float, typer.Option("--null", help="The effect the confounder would have to reach.")
    ] = 0.0,
    alpha: Alpha = 0.05,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """How strong a confounder of the instrument would have to be to move the IV estimate (robustness value)."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        weights=weights, alpha=alpha,
    )  # fmt: skip
    run = _run(
        "confounder-strength",
        data,
        spec,
        benchmarks=list(split_names(benchmark)),
        k=list(k or [1.0]),
        null=null,
    )
    _finish(run, "confounder-strength", attach=attach, json_out=json_out)
