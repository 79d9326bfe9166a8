"""The `ivdossier` command: global options, error handling and the command groups."""

from __future__ import annotations

import contextlib
import dataclasses
import functools
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

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        _flags_take_no_value(self)

    def invoke(self, ctx: Any) -> Any:
        try:
            return super().invoke(ctx)
        except BrokenPipeError:
            quiet_closed_pipe()
        except IvdossierError as exc:
            if settings.debug:
                raise
            _fail(str(exc), exit_code(exc))
        except Exception as exc:
            if settings.debug or type(exc).__module__.startswith("typer"):  # exits, aborts and usage errors
                raise
            known = describe_system_error(exc)
            if known is not None:
                _fail(known, 1)
            _fail(f"unexpected {type(exc).__name__}: {exc} (rerun with --debug for details)", 1)


def _flags_take_no_value(command: Any) -> None:
    """Show on/off flags without a value type in --help (they take none), in this group and every command below."""
    from types import SimpleNamespace

    params = list(getattr(command, "params", ()))
    # The help option is built once and cached by the command; ["--help"] is our only name for it.
    if hasattr(command, "get_help_option"):
        params.append(command.get_help_option(SimpleNamespace(help_option_names=["--help"])))
    for param in params:
        if getattr(param, "is_flag", False):
            param.metavar = ""
        _defer_value_check(param)
    for sub in getattr(command, "commands", {}).values():
        _flags_take_no_value(sub)


def _defer_value_check(param: Any) -> None:
    """Build typer's value checker of an option only when a value arrives that needs one.

    Recent typer (0.29 here) checks option values with a pydantic TypeAdapter, built (and pydantic imported, about
    a fifth of a listing's start-up) the first time an option is processed, even an option left out. Here a
    left-out option stays None (or empty), text stays the same text, a path goes through typer's own path checks,
    a number or bool that already is of the option's type (a default) stays as it is, and any other value
    (numbers given as text, dates, choices) goes to the checker typer builds then, so every value is read exactly
    as typer reads it.
    """
    descriptor: Any = getattr(param, "type_descriptor", None)
    info = getattr(descriptor, "parameter_info", None)
    if info is None or descriptor.file_annotation is not None or info.parser is not None:
        return
    deferred = _deferred_check_class()
    built = getattr(param, "_runtime_param", "absent")  # None: typer's own checker, not built yet
    if deferred is not None and built is None:
        param._runtime_param = deferred(
            parameter_info=info, annotation=descriptor.annotation, descriptor=descriptor
        )


@functools.cache
def _deferred_check_class() -> Any:
    """A typer runtime checker that stands in for typer's own until a value needs it (None for older typer)."""
    try:
        from pathlib import Path

        from typer._coercion import RuntimeParam, build_runtime_param
        from typer._param_types import coerce_cli_path
    except ImportError:  # pragma: no cover - typer without pydantic-based checks
        return None

    @dataclasses.dataclass(frozen=True)
    class DeferredCheck(RuntimeParam):
        descriptor: Any

        def _coerce_value(self, value: Any, param: Any, ctx: Any) -> Any:
            if self.annotation is str and isinstance(value, str):
                return value
            if (
                self.annotation == list[str]
                and isinstance(value, list | tuple)
                and all(isinstance(v, str) for v in value)
            ):
                return list(value)
            if (
                self.annotation is Path
                and isinstance(value, str)
                and value
                and self.parameter_info.path_type is None
            ):
                # typer's own path checks (exists, file or folder, readable...), given the Path that its pydantic
                # step would make of the text; a Path value skips that step.
                return coerce_cli_path(Path(value), self.parameter_info, path_type=Path, param=param, ctx=ctx)
            if (
                self.annotation in (int, float, bool)
                and type(value) is self.annotation
                and self.parameter_info.min is None
                and self.parameter_info.max is None
            ):
                # a default such as --alpha's 0.05, already of the option's exact type: pydantic's int, float
                # and bool checks return such a value unchanged (min/max would compare or clamp it)
                return value
            real = build_runtime_param(self.descriptor)
            param._runtime_param = real
            return real._coerce_value(value, param=param, ctx=ctx)

    return DeferredCheck


def _fail(message: str, code: int) -> None:
    from ivdossier.cli.output import safe_text

    lines = message.strip().splitlines() or [""]
    typer.echo(f"error: {safe_text(lines[0])}", err=True)
    raise typer.Exit(code=code) from None


def describe_system_error(exc: BaseException) -> str | None:
    """One sentence for failures of the file system or the database driver, or None when not one of them."""
    if type(exc).__module__.split(".")[0] == "sqlalchemy":
        orig = getattr(exc, "orig", None)
        detail = str(orig if orig is not None else exc).strip().splitlines()[0] if str(exc).strip() else ""
        where = settings.db or "the registry"
        if "file is not a database" in detail or "not a database" in detail:
            return f"{where!s} is not an ivdossier registry (SQLite says: {detail}); check --db."
        return f"the registry at {where!s} could not be used ({detail}); check --db and that the database is reachable."
    if isinstance(exc, OSError) and exc.strerror:
        target = f" {exc.filename!s}" if exc.filename else ""
        return f"cannot use{target}: {exc.strerror}; check the path and its permissions."
    return None


def quiet_closed_pipe() -> None:
    """The reader of our output went away (e.g. `| head`): stop quietly, without a traceback at exit."""
    import os
    import sys

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):
        pass
    raise typer.Exit(code=0)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"ivdossier {__version__}")
        raise typer.Exit()


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


# Each module adds its commands through register(app), in this order; beside each, the top-level commands and
# groups it adds (tests/test_cli_documented.py keeps this table in step with the modules).
COMMAND_MODULES: dict[str, tuple[str, ...]] = {
    "general": ("init", "history", "demo"),
    "entities": ("program", "instrument", "member", "link"),
    "team": ("review", "comment"),
    "portability": ("export", "import", "backup", "restore"),
    "estimation_cmds": ("estimate",),
    "threat_cmds": ("threat", "graph"),
    "family_cmds": ("family",),
    "report_cmds": ("dossier", "site", "table"),
    "evidence_cmds": ("sensitivity", "falsify", "compliers", "power"),
    "studies": ("study", "audit"),
    "plans": ("plan",),
    "design_cmds": ("design", "variants", "confounder-strength"),
    "run_cmds": ("run",),
    "fragility_cmds": ("fragility",),
}
MODULE_OF = {command: module for module, commands in COMMAND_MODULES.items() for command in commands}
# Root options that take a value: the command name is the first word that is neither one of them nor its value.
_VALUE_OPTIONS = ("--db", "--as")


def build_app(modules: tuple[str, ...] | None = None) -> typer.Typer:
    """The `ivdossier` application with the commands of `modules` (all of them when None)."""
    import importlib

    built = typer.Typer(
        cls=ErrorReportingGroup,
        no_args_is_help=True,
        pretty_exceptions_enable=False,
        add_completion=False,
        help="Keep candidate instruments, their validity arguments, threats and diagnostics in one registry.",
    )
    built.callback()(_global)
    for name in COMMAND_MODULES if modules is None else modules:
        importlib.import_module(f"ivdossier.cli.{name}").register(built)
    return built


def command_modules(argv: list[str]) -> tuple[str, ...] | None:
    """The one command module a command line needs, or None (all of them: root help, unknown names)."""
    args = iter(argv)
    for arg in args:
        if arg in _VALUE_OPTIONS:
            next(args, None)
        elif not arg.startswith("-"):
            module = MODULE_OF.get(arg)
            return None if module is None else (module,)
    return None


def __getattr__(name: str) -> typer.Typer:
    """`app`, the application with every command, built on first use (tests and tools import it)."""
    if name == "app":
        full = globals()["app"] = build_app()
        return full
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def main() -> None:
    """The console entry point: loads only the module of the command being run (start-up stays short)."""
    import sys

    try:
        build_app(command_modules(sys.argv[1:]))()
    except BrokenPipeError:  # raised while flushing after the command finished
        with contextlib.suppress(typer.Exit):
            quiet_closed_pipe()
