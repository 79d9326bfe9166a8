"""Documents: `ivdossier dossier`, `ivdossier site` and `ivdossier table`."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import reading
from ivdossier.errors import InvalidInputError


def register(app: typer.Typer) -> None:
    app.command("dossier", rich_help_panel=panels.DOCUMENTS)(dossier)
    app.command("site", rich_help_panel=panels.DOCUMENTS)(site)
    app.command("table", rich_help_panel=panels.DOCUMENTS)(table)


def _now() -> str:
    from datetime import UTC, datetime

    return datetime.now(UTC).isoformat(timespec="seconds")


def dossier(
    instrument: str,
    out: Annotated[
        Path, typer.Option("--out", help="File to write: .md for Markdown, .html for one HTML page.")
    ],
) -> None:
    """Write one instrument's dossier: argument, threats, causal diagram, estimates and provenance."""
    from ivdossier.workflows.dossiers import write_dossier

    suffix = out.suffix.lower()
    if suffix not in (".md", ".html"):
        raise InvalidInputError(f"--out {str(out)!r} must end in .md or .html.")
    from ivdossier.workflows.run_records import headline_warnings

    with reading() as s:
        write_dossier(s, instrument, out, generated_at=_now())
        headline, warnings = headline_warnings(s, instrument)
    typer.echo(f"dossier for {instrument} written to {out}")
    for warning in warnings:
        typer.echo(f"warning: the headline run {headline}: {warning}", err=True)


def site(
    out: Annotated[Path, typer.Argument(help="Folder for the static site (created if missing).")],
) -> None:
    """Write a static, linked HTML site of the whole registry."""
    from ivdossier.workflows.dossiers import write_site

    with reading() as s:
        pages = write_site(s, out, generated_at=_now())
    typer.echo(f"site with {len(pages)} pages written to {out} (open {out / 'index.html'})")


def table(
    runs: Annotated[list[str], typer.Argument(help="Run slugs, one column each.")],
    fmt: Annotated[str, typer.Option("--format", help="latex (booktabs) or markdown.")] = "latex",
    out: Annotated[
        Path | None, typer.Option("--out", help="Write to this file instead of the terminal.")
    ] = None,
) -> None:
    """A publication table of selected runs: estimates, standard errors, first-stage statistics, AR set."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Run
    from ivdossier.reports.tables import runs_table
    from ivdossier.workflows.dossiers import run_info

    with reading() as s:
        infos = [run_info(s, records.get(s, Run, slug)) for slug in runs]
    text = runs_table(infos, fmt)
    if out is None:
        typer.echo(text)
    else:
        out.write_text(text, encoding="utf-8")
        typer.echo(f"table written to {out}")
