"""`run list`, `run show` and `run primary`: find stored runs and mark the one a dossier rests on."""

from __future__ import annotations

from typing import Annotated

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, reading, writing
from ivdossier.cli.output import print_json, print_record, print_table

run_app = typer.Typer(
    help="Stored runs: list them, show one, mark or clear an instrument's primary run.", no_args_is_help=True
)


def register(app: typer.Typer) -> None:
    app.add_typer(run_app, name="run", rich_help_panel=panels.EVIDENCE)


@run_app.command("list")
def run_list(
    instrument: Annotated[
        str | None, typer.Argument(help="Only the runs attached to this instrument.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Every stored run, oldest first: its kind, when, on which data, and which one is primary."""
    from ivdossier.workflows.run_records import list_runs

    with reading() as s:
        runs = list_runs(s, instrument)
    if json_out:
        print_json([r.to_dict() for r in runs])
        return
    if not runs:
        typer.echo(
            "no runs yet" + (f" for {instrument}" if instrument else "") + "; attach one with --attach."
        )
        return
    rows = [{**r.row(), "warnings": str(len(r.warnings)) if r.warnings else ""} for r in runs]
    print_table(rows, ["run", "kind", "instrument", "created", "dataset", "primary", "warnings"])
    _warn(runs)


@run_app.command("show")
def run_show(
    run: Annotated[str, typer.Argument(help="The run's name (see `run list`).")], json_out: JsonFlag = False
) -> None:
    """One run in full: spec, data fingerprint, software versions, timing and its key results."""
    from ivdossier.workflows.run_records import show_run

    with reading() as s:
        summary = show_run(s, run)
    if json_out:
        print_json(summary.to_dict())
        return
    pairs: list[tuple[str, object]] = [
        ("run", summary.slug),
        ("kind", summary.kind),
        ("instrument", summary.instrument or "(none)"),
        ("primary", "yes" if summary.primary else "no"),
        ("created", summary.created),
        ("dataset", summary.dataset or "(no data file)"),
        ("data SHA-256", summary.dataset_sha256 or "–"),
        ("data rows", summary.dataset_rows if summary.dataset_rows is not None else "–"),
        ("seconds", f"{summary.seconds:.3f}"),
    ]
    pairs += [(f"spec: {k}", _text(v)) for k, v in summary.spec.items()]
    pairs += list(summary.summary)
    pairs += [("versions", ", ".join(f"{k} {v}" for k, v in summary.versions.items()) or "–")]
    print_record(pairs)
    _warn([summary])


@run_app.command("primary")
def run_primary(
    run: Annotated[str, typer.Argument(help="The run the instrument's dossier should rest on.")],
    reason: Annotated[str, typer.Option(help="Why this run (kept in the audit trail).")] = "",
    json_out: JsonFlag = False,
) -> None:
    """Mark a run as its instrument's primary run: the dossier headline and the relevance verdict use it."""
    from ivdossier.workflows.run_records import mark_primary

    with writing() as s:
        summary = mark_primary(s, actor=actor(), run=run, reason=reason)
    if json_out:
        print_json(summary.to_dict())
        return
    typer.echo(f"{summary.slug} is now the primary run of {summary.instrument}.")
    _warn([summary])


@run_app.command("clear-primary")
def run_clear_primary(
    instrument: Annotated[str, typer.Argument(help="The instrument whose primary mark to clear.")],
    reason: Annotated[str, typer.Option(help="Why (kept in the audit trail).")] = "",
    json_out: JsonFlag = False,
) -> None:
    """Clear an instrument's primary run mark: its dossier headline and verdicts follow the latest run again."""
    from ivdossier.workflows.run_records import clear_primary

    with writing() as s:
        summary = clear_primary(s, actor=actor(), instrument=instrument, reason=reason)
    if json_out:
        print_json(summary.to_dict())
        return
    typer.echo(
        f"{summary.slug} is no longer the primary run of {summary.instrument}; its dossier follows the latest run."
    )


def _warn(runs: list[object]) -> None:
    for r in runs:
        for w in getattr(r, "warnings", ()):
            typer.echo(f"warning: run {getattr(r, 'slug', '')}: {w}", err=True)


def _text(value: object) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, list | tuple):
        return ", ".join(str(v) for v in value) or "–"
    return "–" if value is None else str(value)
