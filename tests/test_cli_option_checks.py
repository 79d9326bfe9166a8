"""Option values read through the deferred checks of cli/app.py equal what typer's own checks give.

cli/app.py keeps typer from building its pydantic-based checker of an option until a value needs one; the
reference here is typer's own checker (`typer._coercion.build_runtime_param`), built for the same option.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import pytest
import typer

from ivdossier.cli.app import app

_coercion = pytest.importorskip("typer._coercion")  # typer versions that check values with pydantic


def _params() -> list[tuple[str, Any]]:
    out: list[tuple[str, Any]] = []

    def walk(cmd: Any, path: str) -> None:
        params = list(getattr(cmd, "params", ()))
        out.extend((f"{path} {p.name}", p) for p in params if getattr(p, "type_descriptor", None) is not None)
        for name, sub in getattr(cmd, "commands", {}).items():
            walk(sub, f"{path} {name}")

    walk(typer.main.get_command(app), "ivdossier")
    return out


PARAMS = _params()
SAMPLES: dict[Any, tuple[Any, ...]] = {
    str: ("fibre-wave", "", "ü and spaces", "@notes.txt"),
    list[str]: ([], ("age",), ["age", "chronic_conditions"]),
    # numbers and bools also as values of the option's own type, as defaults arrive (e.g. --alpha's 0.05)
    int: ("3", "-1", 3, 0, -7, 10**30),
    float: ("0.05", "1e-3", 0.05, 0.0, -0.0, 1e-300, float("inf"), 2.5e300),
    bool: ("true", "0", True, False),
    # an existing file, an existing folder, a missing file, a relative name, "-", and text pydantic reads as is
    Path: (
        __file__,
        str(Path(__file__).parent),
        "/no/such/folder/x.html",
        "out/dossier.md",
        "-",
        " a b ",
        "ü.md",
    ),
}


def test_every_option_with_a_value_check_is_deferred() -> None:
    deferred = [name for name, p in PARAMS if type(p._runtime_param).__name__ == "DeferredCheck"]
    assert len(deferred) > 300  # nearly every option of every command
    assert {"ivdossier db", "ivdossier program list json_out"} <= set(deferred)


@pytest.mark.parametrize("annotation", list(SAMPLES), ids=str)
def test_values_read_as_typer_reads_them(annotation: Any) -> None:
    ctx = None
    checked = 0
    for name, param in PARAMS:
        if param.type_descriptor.annotation != annotation or param.multiple != isinstance(
            annotation, type(list[str])
        ):
            continue
        reference = _coercion.build_runtime_param(param.type_descriptor)
        for value in SAMPLES[annotation]:
            expected = reference._coerce_value(value, param=param, ctx=ctx)
            deferred = param._runtime_param
            try:  # a value that needs typer's checker installs it on the option: put the deferred one back
                got = deferred._coerce_value(value, param=param, ctx=ctx)
            finally:
                param._runtime_param = deferred
            assert (got, type(got), repr(got)) == (expected, type(expected), repr(expected)), (name, value)
            checked += 1
    assert checked > 0


def test_path_options_never_build_typers_pydantic_checker() -> None:
    """A path value is checked by typer's own path checks without the pydantic-based checker being built."""
    name, param = next((n, p) for n, p in PARAMS if p.type_descriptor.annotation is Path)
    assert type(param._runtime_param).__name__ == "DeferredCheck", name
    assert param._runtime_param._coerce_value("x.html", param=param, ctx=None) == Path("x.html")
    assert type(param._runtime_param).__name__ == "DeferredCheck", name  # not replaced by typer's own checker


def test_a_bad_number_gets_typers_message() -> None:
    """A value that needs typer's checker gets it, with typer's own error message."""
    name, param = next((n, p) for n, p in PARAMS if p.type_descriptor.annotation is int and not p.multiple)
    reference = _coercion.build_runtime_param(param.type_descriptor)
    with pytest.raises(Exception) as ours:
        param._runtime_param._coerce_value("seven", param=param, ctx=None)
    with pytest.raises(Exception) as theirs:
        reference._coerce_value("seven", param=param, ctx=None)
    assert (type(ours.value), str(ours.value)) == (type(theirs.value), str(theirs.value)), name


def test_a_number_with_bounds_goes_to_typers_checker() -> None:
    """With min/max typer compares or clamps even a value of the right type, so the value is not passed through.

    No option of ivdossier has bounds today; a small typer command stands in for one. Reference: typer's checker.
    """
    from ivdossier.cli.app import _defer_value_check

    probe = typer.Typer()

    @probe.command()
    def cmd(
        clamped: Annotated[float, typer.Option(min=0.0, max=1.0, clamp=True)] = 5.0,
        bounded: Annotated[int, typer.Option(min=1)] = 3,
    ) -> None:
        pass  # pragma: no cover

    params = {p.name: p for p in typer.main.get_command(probe).params}
    for p in params.values():
        _defer_value_check(p)
    clamped = params["clamped"]
    assert type(clamped._runtime_param).__name__ == "DeferredCheck"
    reference = _coercion.build_runtime_param(clamped.type_descriptor)
    assert reference._coerce_value(5.0, param=clamped, ctx=None) == 1.0
    assert clamped._runtime_param._coerce_value(5.0, param=clamped, ctx=None) == 1.0
    bounded = params["bounded"]
    reference = _coercion.build_runtime_param(bounded.type_descriptor)
    with pytest.raises(Exception) as theirs:
        reference._coerce_value(0, param=bounded, ctx=None)
    with pytest.raises(Exception) as ours:
        bounded._runtime_param._coerce_value(0, param=bounded, ctx=None)
    assert (type(ours.value), str(ours.value)) == (type(theirs.value), str(theirs.value))
