"""`estimate --engine`: the scanning engines on the command line give the in-memory numbers, record provenance."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def parquet_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(11)
    n = 2000
    z1, z2, w = rng.normal(size=(3, n))
    g = rng.integers(0, 40, n)
    u = rng.normal(size=n)
    x = 0.6 * z1 + 0.3 * z2 + 0.5 * w + u + rng.normal(size=n)
    y = 0.4 * x + 0.2 * w - u + rng.normal(size=n)
    path = tmp_path / "d.parquet"
    pd.DataFrame({"y": y, "x": x, "z1": z1, "z2": z2, "w": w, "g": g}).to_parquet(path)
    return path


def _args(path: Path) -> list[str]:
    return [
        "estimate", "--data", str(path), "--outcome", "y", "--treatment", "x", "--instrument", "z1",
        "--instrument", "z2", "--control", "w", "--cluster", "g", "--vcov", "clustered", "--json",
    ]  # fmt: skip


def test_duckdb_engine_equals_the_in_memory_path(cli, parquet_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(*_args(parquet_file))
    assert code == 0, err
    memory = json.loads(out)
    code, out, err = cli(*_args(parquet_file), "--engine", "duckdb", "--memory-limit", "500MB")
    assert code == 0, err
    scanned = json.loads(out)
    # the reference is the in-memory (pandas) path of the same command: identical numbers to 1e-10 relative
    assert scanned["coef"]["x"] == pytest.approx(memory["coef"]["x"], rel=1e-10)
    assert scanned["se"]["x"] == pytest.approx(memory["se"]["x"], rel=1e-10)
    eff = ("strength", "effective_f", "statistic")
    assert scanned[eff[0]][eff[1]][eff[2]] == pytest.approx(memory[eff[0]][eff[1]][eff[2]], rel=1e-10)


def test_attached_engine_run_keeps_the_engine_and_the_file_fingerprint(cli, parquet_file: Path) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z", "--column", "z1")[0] == 0
    code, out, err = cli(*_args(parquet_file), "--engine", "duckdb", "--attach", "zz")
    assert code == 0, err
    slug = json.loads(out)["run"]
    code, out, err = cli("run", "show", slug, "--json")
    assert code == 0, err
    shown = json.dumps(json.loads(out))
    assert hashlib.sha256(parquet_file.read_bytes()).hexdigest() in shown  # fingerprint of the file (hashlib)
    assert '"duckdb"' in shown


def test_engine_options_without_an_engine_are_refused(cli, parquet_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, _, err = cli(*_args(parquet_file), "--memory-limit", "1GB")
    assert code == 2 and "--memory-limit and --spark-master apply to the scanning engines" in err
    code, _, err = cli(*_args(parquet_file), "--engine", "gpu")
    assert code == 2 and "Unknown engine 'gpu'" in err


def test_evidence_commands_take_the_engine_option(cli, parquet_file: Path) -> None:  # type: ignore[no-untyped-def]
    args = [
        "falsify", "per-instrument", "--data", str(parquet_file), "--outcome", "y", "--treatment", "x",
        "--instrument", "z1", "--instrument", "z2", "--control", "w", "--vcov", "clustered", "--cluster", "g",
        "--json",
    ]  # fmt: skip
    code, out, err = cli(*args)
    assert code == 0, err
    memory = json.loads(out)
    code, out, err = cli(*args, "--engine", "duckdb", "--memory-limit", "500MB")
    assert code == 0, err
    scanned = json.loads(out)
    # the reference is the in-memory path of the same command: identical numbers to 1e-10 relative
    for got, ref in zip(scanned["rows"], memory["rows"], strict=True):
        assert got["estimate"] == pytest.approx(ref["estimate"], rel=1e-10)
        assert got["first_stage_f"] == pytest.approx(ref["first_stage_f"], rel=1e-10)
    assert scanned["overid"]["statistic"] == pytest.approx(memory["overid"]["statistic"], rel=1e-10)
    assert "engine: duckdb (chosen by the caller)" in err


def test_an_analysis_that_needs_the_rows_refuses_a_scanning_engine(cli, parquet_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, _, err = cli(
        "falsify", "first-stage-signs", "--data", str(parquet_file), "--treatment", "x", "--instrument", "z1",
        "--by", "w", "--engine", "duckdb",
    )  # fmt: skip
    assert code == 2
    assert "ivdossier falsify first-stage-signs runs on engine 'pandas' only" in err
    assert "Drop --engine duckdb" in err
