"""Moving a registry around: `export` / `import` as a folder of text files, `backup` / `restore` for SQLite."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, reading, settings, writing
from ivdossier.cli.output import print_json

OnConflict = Annotated[
    str,
    typer.Option(
        "--on-conflict",
        help="When an entity differs from the registry's copy: stop (apply nothing), keep-registry, take-import.",
    ),
]


def register(app: typer.Typer) -> None:
    app.command("export", rich_help_panel=panels.MOVING)(export)
    app.command("import", rich_help_panel=panels.MOVING)(import_)
    app.command("backup", rich_help_panel=panels.MOVING)(backup)
    app.command("restore", rich_help_panel=panels.MOVING)(restore)


def _counts(counts: dict[str, int]) -> str:
    return ", ".join(f"{n} {kind}" for kind, n in sorted(counts.items())) or "nothing"


def export(
    directory: Annotated[Path, typer.Argument(help="Folder to write (new, empty, or an earlier export).")],
    json_out: JsonFlag = False,
) -> None:
    """Write the whole registry as text files, one per entity, plus the audit trail and a manifest."""
    from ivdossier.registry.portability import export_registry

    with reading() as s:
        summary = export_registry(s, directory)
    if json_out:
        print_json(summary)
        return
    typer.echo(
        f"exported {_counts(summary.counts)} and {summary.audit_events} audit events to {directory} "
        f"({summary.written} files written, {summary.unchanged} unchanged, {summary.removed} removed)"
    )


def import_(
    directory: Annotated[Path, typer.Argument(help="A folder written by `ivdossier export`.")],
    on_conflict: OnConflict = "stop",
    dry_run: Annotated[bool, typer.Option("--dry-run", help="Check and report; write nothing.")] = False,
    json_out: JsonFlag = False,
) -> None:
    """Merge an exported folder into this registry by UUID; everything is checked first, then written at once."""
    from ivdossier.registry.portability import read_export
    from ivdossier.workflows.import_checks import import_checked

    content = read_export(directory)
    with writing() as s:
        report = import_checked(s, content, actor=actor(), on_conflict=on_conflict, dry_run=dry_run)
    if json_out:
        print_json(report)
        return
    verb = "would add" if dry_run else "added"
    typer.echo(f"{verb} {_counts(report.added)} and {report.audit_events_added} audit events")
    if report.replaced:
        typer.echo(f"replaced from the export: {_counts(report.replaced)}")
    if report.kept:
        typer.echo(f"kept as in the registry: {_counts(report.kept)}")
    typer.echo(f"already identical: {_counts(report.unchanged)}")
    for conflict in report.conflicts:
        typer.echo(f"conflict: {conflict.describe()}")


def backup(
    file: Annotated[Path, typer.Argument(help="The backup file to create.")],
    replace: Annotated[bool, typer.Option("--replace", help="Overwrite FILE if it exists.")] = False,
    json_out: JsonFlag = False,
) -> None:
    """Copy a SQLite registry to FILE as one consistent snapshot, safe while others are writing."""
    from ivdossier.registry.backup import backup_registry

    summary = backup_registry(settings.db, file, replace=replace)
    print_json(summary) if json_out else typer.echo(
        f"backed up {summary.source} to {summary.destination} (schema {summary.schema}, "
        f"{summary.audit_events} audit events)"
    )


def restore(
    file: Annotated[Path, typer.Argument(help="A file written by `ivdossier backup`.")],
    replace: Annotated[
        bool, typer.Option("--replace", help="Overwrite a registry that already holds changes.")
    ] = False,
    allow_unfreeze: Annotated[
        bool,
        typer.Option(
            "--allow-unfreeze",
            help="Restore even if the backup would unfreeze, change or remove a frozen plan (named on stderr).",
        ),
    ] = False,
    json_out: JsonFlag = False,
) -> None:
    """Replace the SQLite registry with a backup file (checked first), upgrading its schema if it is older."""
    from ivdossier.registry.backup import restore_registry

    summary = restore_registry(file, settings.db, replace=replace, allow_unfreeze=allow_unfreeze)
    for note in summary.unfrozen:
        typer.echo(f"warning: {note}; its earlier seal is no longer in this registry", err=True)
    print_json(summary) if json_out else typer.echo(
        f"restored {summary.source} into {summary.destination} (schema {summary.schema}, "
        f"{summary.audit_events} audit events)"
    )
