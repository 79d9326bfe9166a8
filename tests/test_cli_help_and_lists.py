"""`--help` of every command shows on/off flags without a value; --control takes a comma-separated list."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import typer
from typer.testing import CliRunner

from ivdossier.cli.app import app


def _command_paths() -> list[tuple[str, ...]]:
    group = typer.main.get_command(app)
    paths: list[tuple[str, ...]] = [()]

    def walk(cmd: object, prefix: tuple[str, ...]) -> None:
        for name, sub in getattr(cmd, "commands", {}).items():
            paths.append((*prefix, name))
            walk(sub, (*prefix, name))

    walk(group, ())
    return paths


def test_no_flag_shows_a_value_type_in_any_help() -> None:
    runner = CliRunner()
    paths = _command_paths()
    assert len(paths) > 60  # every group and sub-command, not just the top level
    offenders = []
    for path in paths:
        result = runner.invoke(app, [*path, "--help"], terminal_width=200)
        assert result.exit_code == 0, (path, result.output)
        for line in result.output.splitlines():
            if "<bool>" in line:
                offenders.append((" ".join(path), line.strip()))
    assert offenders == []


def test_help_still_shows_the_value_type_of_options_that_take_one() -> None:
    result = CliRunner().invoke(app, ["estimate", "--help"], terminal_width=200)

    def line(option: str) -> list[str]:
        return next(x.strip("│ ").split() for x in result.output.splitlines() if f" {option} " in x)

    assert line("--alpha")[:2] == ["--alpha", "<float>"]
    assert line("--outcome")[:3] == ["*", "--outcome", "<str>"]  # required
    assert line("--json")[:3] == ["--json", "Print", "machine-readable"]


def test_control_accepts_a_comma_separated_list_like_the_repeated_option(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(5)
    n = 300
    z, w1, w2, u = (rng.normal(size=n) for _ in range(4))
    x = z + 0.5 * w1 + u + rng.normal(size=n)
    frame = pd.DataFrame({"y": x + w1 - w2 + u, "x": x, "z": z, "w1": w1, "w2": w2})
    data = tmp_path / "d.csv"
    frame.to_csv(data, index=False)
    base = (
        "estimate",
        "--data",
        str(data),
        "--outcome",
        "y",
        "--treatment",
        "x",
        "--instrument",
        "z",
        "--json",
    )
    repeated = json.loads(cli(*base, "--control", "w1", "--control", "w2")[1])
    listed = json.loads(cli(*base, "--control", "w1, w2")[1])
    alone = json.loads(cli(*base, "--control", "w1")[1])
    assert listed["spec"]["controls"] == repeated["spec"]["controls"] == ["w1", "w2"]
    assert listed["coef"] == repeated["coef"] != alone["coef"]
