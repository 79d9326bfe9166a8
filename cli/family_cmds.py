"""`ivdossier family list`: the instrument families of the threat catalogue."""

from __future__ import annotations

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, reading
from ivdossier.cli.output import print_json, print_table

family_app = typer.Typer(help="Instrument families of the threat catalogue.", no_args_is_help=True)


def register(app: typer.Typer) -> None:
    app.add_typer(family_app, name="family", rich_help_panel=panels.THREATS)


@family_app.command("list")
def family_list(json_out: JsonFlag = False) -> None:
    """Every family an instrument may have, with its code prefix and how many catalogue entries name it."""
    from ivdossier.workflows.families import family_rows

    with reading() as s:
        rows = family_rows(s)
    if json_out:
        print_json(rows)
        return
    print_table(rows, ["family", "prefix", "entries", "suggested", "instruments"])
    typer.echo(
        "\nentries: catalogue entries written for the family; suggested: what `threat suggest` offers an "
        "instrument of it (its entries plus those for any family)."
    )
