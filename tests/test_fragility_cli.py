"""`ivdossier fragility bootstrap|influence|subvector`: the happy path, JSON, attached runs read back typed, and
the likely mistakes refused with one line."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

G = 10  # few clusters: the Rademacher draws are enumerated (2^10 = 1024)


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(11)
    n = 400
    g = rng.integers(0, G, n)
    z = rng.normal(size=n) + 0.3 * rng.normal(size=G)[g]
    u = rng.normal(size=n) + 0.5 * rng.normal(size=G)[g]
    x = 0.8 * z + 0.5 * u + rng.normal(size=n)
    x2 = 0.6 * z + rng.normal(size=n)
    z2 = rng.normal(size=n)
    x2 = x2 + 0.7 * z2
    y = 1.0 * x + 0.5 * x2 + u
    frame = pd.DataFrame({"y": y, "x": x, "x2": x2, "z": z, "z2": z2, "w": rng.normal(size=n),
                          "district": [f"d{k}" for k in g]})  # fmt: skip
    path = tmp_path / "f.csv"
    frame.to_csv(path, index=False)
    return path


BASE = ("--outcome", "y", "--treatment", "x", "--instrument", "z", "--control", "w", "--cluster", "district")


def _tsls(frame: pd.DataFrame) -> float:
    """2SLS by the normal equations (numpy), the brute-force reference for every refit below."""
    ones = np.ones(len(frame))
    xmat = np.column_stack([frame.x, ones, frame.w])
    zmat = np.column_stack([frame.z, ones, frame.w])
    xhat = zmat @ np.linalg.lstsq(zmat, xmat, rcond=None)[0]
    return float(np.linalg.solve(xhat.T @ xmat, xhat.T @ frame.y.to_numpy())[0])


def test_bootstrap_enumerates_few_clusters_and_states_draws_weights_and_enumeration(
    cli, data_file: Path
) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli("fragility", "bootstrap", "--data", str(data_file), *BASE, "--json")
    assert code == 0, err
    wild = json.loads(out)["wild"]
    assert wild["draws"] == 2**G and wild["enumerated"] is True  # full enumeration of 2^G sign vectors
    assert wild["weights"] == "rademacher" and wild["n_clusters"] == G
    assert wild["estimate"] == pytest.approx(
        _tsls(pd.read_csv(data_file)), rel=1e-9
    )  # numpy normal equations
    p = wild["t_test"]["p_value"]
    assert p * 2**G == pytest.approx(round(p * 2**G))  # an exact share of the 1024 enumerated draws
    again = json.loads(
        cli("fragility", "bootstrap", "--data", str(data_file), *BASE, "--seed", "9", "--json")[1]
    )
    assert again["wild"]["t_test"] == wild["t_test"]  # enumeration does not depend on the seed
    analytic = json.loads(out)["analytic"]
    lo, hi = analytic["t_interval"]
    assert lo < wild["estimate"] < hi and analytic["vcov"] == "clustered"


def test_bootstrap_with_webb_weights_and_pairs_draws_prints_the_summary(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "fragility", "bootstrap", "--data", str(data_file), *BASE, "--weight-type", "webb", "--draws", "199",
        "--pairs-draws", "99", "--seed", "4",
    )  # fmt: skip
    assert code == 0, err
    assert "199 draws, webb weights by 10 clusters, seed 4" in out
    assert "Pairs bootstrap for x: " in out and "of 99 draws used" in out
    assert "analytic (clustered) beside them: t interval [" in out
    assert "cannot establish exclusion or exogeneity" in out


def test_influence_matches_brute_force_refits_and_attaches_a_typed_run(
    cli, data_file: Path, sqlite_path: str
) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z")[0] == 0
    code, out, err = cli("fragility", "influence", "--data", str(data_file), *BASE, "--attach", "zz")
    assert code == 0, err
    assert "Findings for the catalogue's checks:\n  leave-one-cluster-out: leaving one cluster out" in out
    assert "stored as run zz-fragility-influence-1" in out
    code, out, err = cli("fragility", "influence", "--data", str(data_file), *BASE, "--json")
    frame = pd.read_csv(data_file)
    deletions = {d["left_out"]: d["estimate"] for d in json.loads(out)["deletions"]}
    for label, estimate in deletions.items():
        assert estimate == pytest.approx(_tsls(frame[frame.district != label]), rel=1e-8)  # brute-force refit
    from sqlalchemy import select

    from ivdossier.estimation.influence import InfluenceResult
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run
    from ivdossier.workflows.runs import load_result

    registry = open_registry(sqlite_path)
    try:
        with registry.reading() as s:
            row = s.scalars(select(Run)).one()
            assert row.run_kind == "fragility-influence"
            result = load_result(row.run_kind, row.results)
    finally:
        registry.dispose()
    assert isinstance(result, InfluenceResult)  # the stored run reads back as the typed result
    assert {d.label: d.estimate for d in result.deletions} == deletions


def test_subvector_tests_one_treatment_with_the_other_unrestricted(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "fragility", "subvector", "--data", str(data_file), "--outcome", "y", "--treatment", "x",
        "--treatment", "x2", "--instrument", "z", "--instrument", "z2", "--of", "x", "--vcov", "homoskedastic",
        "--json",
    )  # fmt: skip
    assert code == 0, err
    result = json.loads(out)
    assert result["treatment"] == "x" and result["unrestricted"] == ["x2"]
    assert result["df"][0] == 1  # L - m_W = 2 - 1 (Guggenberger et al. 2012)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (
            ("--weight-type", "normal"),
            "error: Unknown wild weight type 'normal'; choose one of rademacher, webb.\n",
        ),
        (
            ("--pairs-draws", "1"),
            "error: --pairs-draws must be 0 (no pairs bootstrap) or at least 2, got 1.\n",
        ),
        (("--draws", "0"), "error: draws must be a positive number of bootstrap draws, got 0.\n"),
    ],
)
def test_bootstrap_mistakes_get_one_line(cli, data_file: Path, args: tuple[str, ...], message: str) -> None:  # type: ignore[no-untyped-def]
    code, _, err = cli(
        "fragility", "bootstrap", "--data", str(data_file), *BASE, "--weight-type", "webb", *args
    )
    assert code == 2 and err == message


def test_influence_and_subvector_mistakes_get_one_line(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, _, err = cli("fragility", "influence", "--data", str(data_file), *BASE, "--top", "0")
    assert (code, err) == (2, "error: --top must be at least 1, got 0.\n")
    code, _, err = cli(
        "fragility", "influence", "--data", str(data_file), *BASE, "--vcov", "heteroskedastic",
    )  # fmt: skip
    assert code == 2 and err.startswith("error: cluster= was given with vcov='heteroskedastic'")
    code, _, err = cli(
        "fragility", "subvector", "--data", str(data_file), "--outcome", "y", "--treatment", "x",
        "--treatment", "x2", "--instrument", "z", "--instrument", "z2", "--of", "x3",
    )  # fmt: skip
    assert (code, err) == (2, "error: 'x3' is not a treatment of this model; choose one of x, x2.\n")
    code, _, err = cli(
        "fragility", "bootstrap", "--data", str(data_file), "--outcome", "y", "--treatment", "x",
        "--instrument", "z", "--cluster", "district", "--cluster", "w",
    )  # fmt: skip
    assert code == 2 and err.startswith("error: The fragility diagnostics take one cluster variable, got 2")


def test_the_progress_bar_appears_only_after_the_run_passes_its_threshold() -> None:
    from ivdossier.cli.fragility_cmds import TerminalProgress

    quiet = TerminalProgress("fragility bootstrap", after=3600.0)
    quiet.enabled = True  # as on a terminal
    quiet(1, 10)
    assert quiet.bar is None  # a short run draws nothing
    shown = TerminalProgress("fragility bootstrap", after=0.0)
    shown.enabled = True
    shown(3, 10)
    assert shown.bar is not None and shown.bar.tasks[0].completed == 3 and shown.bar.tasks[0].total == 10
    shown.close()
    assert shown.bar is None
