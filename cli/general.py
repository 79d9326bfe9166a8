"""Registry-wide commands: init, history and the demo."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, reading, settings, writing
from ivdossier.cli.output import print_json, print_table
from ivdossier.errors import InvalidInputError


def register(app: typer.Typer) -> None:
    app.command("init", rich_help_panel=panels.REGISTRY)(init)
    app.command("history", rich_help_panel=panels.REGISTRY)(history)
    app.command("demo", rich_help_panel=panels.MOVING)(demo)


def init() -> None:
    """Create the registry (or upgrade its schema) and load the built-in threat catalogue."""
    from ivdossier.registry.db import resolve_url
    from ivdossier.workflows.catalog_sync import CATALOG_ACTOR, ensure_builtin

    with writing(sync=False, create=True) as s:
        added = ensure_builtin(s, actor=CATALOG_ACTOR)

    typer.echo(f"registry ready at {resolve_url(settings.db)} ({added} catalogue entries added or refreshed)")


def _parse_date(value: str | None, option: str) -> datetime | None:
    if value is None:
        return None
    try:
        parsed = datetime.fromisoformat(value)
    except ValueError as exc:
        raise InvalidInputError(
            f"{option} {value!r} is not a date; use YYYY-MM-DD or YYYY-MM-DDTHH:MM."
        ) from exc
    return parsed if parsed.tzinfo else parsed.replace(tzinfo=UTC)


def history(
    slug: Annotated[
        str | None, typer.Argument(help="An entity's slug (or code/handle/key); omit for all.")
    ] = None,
    since: Annotated[str | None, typer.Option(help="From this date/time (UTC), e.g. 2026-01-31.")] = None,
    until: Annotated[str | None, typer.Option(help="Before this date/time (UTC).")] = None,
    by: Annotated[str | None, typer.Option("--by", help="Only changes made by this actor.")] = None,
    json_out: JsonFlag = False,
) -> None:
    """Show the audit trail of one entity, or of the whole registry in a date range."""
    from ivdossier.registry.history import event_to_dict
    from ivdossier.registry.history import history as read_history
    from ivdossier.registry.lookup import find_any

    with reading() as s:
        uuid = find_any(s, slug).uuid if slug else None
        events = read_history(
            s,
            entity_uuid=uuid,
            since=_parse_date(since, "--since"),
            until=_parse_date(until, "--until"),
            actor=by,
        )
        rows = [event_to_dict(e) for e in events]
    if json_out:
        print_json(rows)
        return
    for row in rows:
        changed = ", ".join(sorted((row["after"] or row["before"] or {}).keys()))  # type: ignore[union-attr]
        row["when"] = str(row["at"])[:19].replace("T", " ")
        row["fields"] = changed if row["action"] not in {"create", "delete"} else ""
    print_table(
        rows, ["when", "actor", "action", "entity_kind", "entity", "fields", "reason"], widths={"reason": 40}
    )


def demo(
    out: Annotated[Path, typer.Option("--out", help="Folder for the demo registry, data and documents.")],
    replace: Annotated[
        bool, typer.Option("--replace", help="Delete and rebuild an existing demo folder.")
    ] = False,
    json_out: JsonFlag = False,
) -> None:
    """Build the invented telehealth scenario end to end: data, registry, threats, runs and documents."""
    from ivdossier.workflows.demo import build_demo

    summary = build_demo(out, replace=replace, db=settings.db, actor=actor(), progress=typer.echo)
    if json_out:
        print_json(summary)
    else:
        typer.echo(f"demo ready in {out}")
