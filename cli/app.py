"""The `ivdossier` command: global options, error handling and the command groups."""

from __future__ import annotations

from typing import Annotated, Any

import typer
from typer.core import TyperGroup

from ivdossier import __version__
from ivdossier.cli.common import settings
from ivdossier.errors import ConflictError, EstimationError, InvalidInputError, IvdossierError, NotFoundError

EXIT_CODES: dict[type[IvdossierError], int] = {
    InvalidInputError: 2,
    NotFoundError: 3,
    ConflictError: 4,
    EstimationError: 5,
}


def exit_code(exc: IvdossierError) -> int:
    for cls, code in EXIT_CODES.items():
        if isinstance(exc, cls):
            return code
    return 1


class ErrorReportingGroup(TyperGroup):
    """Turns library errors into one line on stderr and a non-zero exit; --debug shows the traceback."""

    def invoke(self, ctx: Any) -> Any:
        try:
            return super().invoke(ctx)
        except IvdossierError as exc:
            if settings.debug:
                raise
            typer.echo(f"error: {exc}", err=True)
            raise typer.Exit(code=exit_code(exc)) from None
        except Exception as exc:
            if settings.debug or type(exc).__module__.startswith("typer"):  # exits, aborts and usage errors
                raise
            typer.echo(
                f"error: unexpected {type(exc).__name__}: {exc} (rerun with --debug for details)", err=True
            )
            raise typer.Exit(code=1) from None


app = typer.Typer(
    cls=ErrorReportingGroup,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
    help="Keep candidate instruments, their validity arguments, threats and diagnostics in one registry.",
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"ivdossier {__version__}")
        raise typer.Exit()


@app.callback()
def _global(
    db: Annotated[
        str | None,
        typer.Option(
            "--db", envvar="IVDOSSIER_DB", help="Registry: a SQLite file path or a postgresql:// URL."
        ),
    ] = None,
    as_: Annotated[
        str | None,
        typer.Option("--as", envvar="IVDOSSIER_USER", help="Handle recorded as the author of writes."),
    ] = None,
    debug: Annotated[
        bool, typer.Option("--debug", help="Show tracebacks instead of one-line errors.")
    ] = False,
    version: Annotated[
        bool, typer.Option("--version", callback=_version, is_eager=True, help="Print the version and exit.")
    ] = False,
) -> None:
    settings.db = db
    settings.actor = as_
    settings.debug = debug


# Each module adds its commands through register(app); one line per module.
COMMAND_MODULES = (
    "general",
    "entities",
    "team",
    "portability",
    "estimation_cmds",
    "threat_cmds",
    "report_cmds",
    "evidence_cmds",
    "studies",
    "plans",
    "fragility_cmds",
)


def _register() -> None:
    import importlib

    for name in COMMAND_MODULES:
        importlib.import_module(f"ivdossier.cli.{name}").register(app)


_register()


def main() -> None:
    app()
