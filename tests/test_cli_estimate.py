"""`ivdossier estimate`: JSON output, attaching a run with its data fingerprint, and no write on failure."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(7)
    n = 600
    z = rng.normal(size=n)
    u = rng.normal(size=n)
    x = 0.8 * z + u + rng.normal(size=n)
    y = 0.5 * x - u + rng.normal(size=n)
    path = tmp_path / "d.csv"
    pd.DataFrame({"y": y, "x": x, "z": z, "w": rng.normal(size=n), "g": rng.integers(0, 30, n)}).to_csv(
        path, index=False
    )
    return path


def _program(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "A program")[0] == 0
    assert cli("instrument", "add", "zed", "--program", "p", "--name", "Zed", "--column", "z")[0] == 0


def test_json_output_has_the_documented_sections(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "estimate", "--data", str(data_file), "--outcome", "y", "--treatment", "x", "--instrument", "z",
        "--control", "w", "--json",
    )  # fmt: skip
    assert code == 0, err
    payload = json.loads(out)
    for key in ("method", "vcov", "n", "n_clusters", "coef", "se", "ci", "first_stage", "strength",
                "weak_iv_robust", "reduced_form", "overid", "endogeneity"):  # fmt: skip
        assert key in payload
    assert payload["method"] == "2sls" and payload["n"] == 600


def test_attach_stores_the_run_with_sha256_versions_and_plot_data(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    code, out, err = cli(
        "estimate", "--data", str(data_file), "--outcome", "y", "--treatment", "x", "--instrument", "z",
        "--cluster", "g", "--vcov", "clustered", "--attach", "zed", "--json",
    )  # fmt: skip
    assert code == 0, err
    slug = json.loads(out)["run"]
    from ivdossier.cli.common import settings
    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Dataset, Run

    registry = open_registry(settings.db)
    try:
        with registry.reading() as s:
            run = records.get(s, Run, slug)
            dataset = s.get(Dataset, run.dataset_id)
            assert dataset.sha256 == hashlib.sha256(data_file.read_bytes()).hexdigest()
            assert dataset.rows == 600
            assert run.spec["instruments"] == ["z"] and run.spec["vcov"] == "clustered"
            assert {"python", "numpy", "ivdossier"} <= set(run.versions)
            assert len(run.results["plot_data"]["ar_curve"]["betas"]) > 10
            assert run.results["n_clusters"] == [30]
    finally:
        registry.dispose()


def test_failed_estimate_with_attach_writes_nothing(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    _program(cli)
    code, _, err = cli(
        "estimate", "--data", str(data_file), "--outcome", "y", "--treatment", "x", "--instrument", "nope",
        "--attach", "zed",
    )  # fmt: skip
    assert code == 2
    assert "'nope'" in err
    code, out, _ = cli("history", "--json")
    # the built-in catalogue is loaded on first open and credited to the tool; the user's writes are these two
    assert [e["entity_kind"] for e in json.loads(out) if e["actor"] != "ivdossier-catalogue"] == [
        "program",
        "instrument",
    ]


def test_few_clusters_are_warned_about_on_standard_error(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    # 30 clusters of g: fewer than 42 (a common-practice threshold), so the terminal warns; JSON stays clean
    n_groups = pd.read_csv(data_file)["g"].nunique()
    assert n_groups == 30
    args = ["estimate", "--data", str(data_file), "--outcome", "y", "--treatment", "x", "--instrument", "z"]
    code, out, err = cli(*args, "--cluster", "g", "--vcov", "clustered", "--json")
    assert code == 0, err
    assert "warning: few clusters: 30 (fewer than 42)" in err
    json.loads(out)
    code, _, err = cli(*args, "--vcov", "heteroskedastic")
    assert code == 0 and "few clusters" not in err
