"""Option values read through the deferred checks of cli/app.py equal what typer's own checks give.

cli/app.py keeps typer from building its pydantic-based checker of an option until a value needs one; the
reference here is typer's own checker (`typer._coercion.build_runtime_param`), built for the same option.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

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
    int: ("3", "-1"),
    float: ("0.05", "1e-3"),
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
            got = param._runtime_param._coerce_value(value, param=param, ctx=ctx)
            assert (got, type(got)) == (expected, type(expected)), (name, value)
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
