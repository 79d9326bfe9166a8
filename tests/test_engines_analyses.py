"""The analyses that need only cross-products, run by DuckDB, equal the in-memory path on the same rows.

Source of truth: the pandas path of each analysis (balance, placebo outcomes, per-instrument estimates, union of
intervals, local to zero, breakdown value), itself checked against statsmodels and linearmodels in
test_falsification_checks.py and test_sensitivity_plausibly_exogenous.py. Every number within 1e-10 relative
(engine_data.RTOL); the SQL engines count rows left out in total, not per column, which is checked apart.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from engine_data import assert_same, telehealth_frame

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.engines import EngineSettings
from ivdossier.estimation.spec import ModelSpec
from ivdossier.workflows.analyses import ANALYSES, engine_refusal, run_analysis

pytest.importorskip("duckdb")

ADJUSTMENTS: dict[str, dict[str, Any]] = {
    "robust": {"vcov": "heteroskedastic"},
    "cluster-weights": {"vcov": "clustered", "cluster": "district", "weights": "weight"},
    "unadjusted-absorb": {"vcov": "homoskedastic", "absorb": "clinic"},
    "twoway": {"vcov": "clustered", "cluster": ["district", "clinic"]},
    "nested-absorb-cluster": {"vcov": "clustered", "cluster": "clinic", "absorb": "clinic"},
    "large-sample": {"vcov": "heteroskedastic", "small_sample": False},
}

#: analysis name -> (roles of the spec, its options)
COVERED: dict[str, tuple[str, dict[str, Any]]] = {
    "falsify balance": ("instruments", {"covariates": ["mast_km", "age"]}),
    "falsify placebo": ("instruments", {"outcomes": ["tele_visits"]}),
    "falsify per-instrument": ("model", {}),
    "sensitivity range": ("model", {"gamma_min": [-0.1], "gamma_max": [0.2]}),
    "sensitivity prior": ("model", {"prior_mean": [0.05, 0.0], "prior_sd": [0.1, 0.02]}),
    "sensitivity breakdown": ("model-one-instrument", {"target": 0.0}),
}


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> tuple[pd.DataFrame, Path]:
    frame = telehealth_frame()
    frame["early_fibre"] = (frame["fibre_wave"] > 2.5).astype(float)  # a binary instrument
    path = tmp_path_factory.mktemp("analyses") / "patients.parquet"
    frame.to_parquet(path, row_group_size=500)
    return frame, path


def spec_for(roles: str, adjustment: dict[str, Any], instruments: list[str] | None = None) -> ModelSpec:
    inst = instruments or (
        ["fibre_wave"] if roles.endswith("one-instrument") else ["fibre_wave", "clerk_pull"]
    )
    controls = [] if roles == "instruments" else ["age"]
    if roles == "instruments":
        return ModelSpec.build(instruments=inst, controls=controls, **adjustment)
    return ModelSpec.build(
        outcome="ed_visits", treatment="tele_share", instruments=inst, controls=controls, **adjustment
    )


def compare(scanned: Any, memory: Any) -> None:
    got, ref = scanned.result.to_dict(), memory.result.to_dict()
    got_rows, ref_rows = got.pop("row_account"), ref.pop("row_account")
    # source: the in-memory path on the same rows; every number within 1e-10 relative
    assert_same(got, ref)
    for key in ("n_data", "n_used", "n_left_out", "n_missing"):
        assert got_rows[key] == ref_rows[key], key


@pytest.mark.parametrize("adjustment", sorted(ADJUSTMENTS))
@pytest.mark.parametrize("name", sorted(COVERED))
def test_duckdb_equals_pandas_for_every_covered_analysis(
    data: tuple[pd.DataFrame, Path], name: str, adjustment: str
) -> None:
    _, path = data
    roles, options = COVERED[name]
    spec = spec_for(roles, ADJUSTMENTS[adjustment])
    memory = run_analysis(name, path, spec, **options)
    scanned = run_analysis(name, path, spec, engine="duckdb", **options)
    compare(scanned, memory)
    assert scanned.extra["engine"]["engine"] == "duckdb" and scanned.spec["engine"] == "duckdb"
    assert scanned.sha256 == memory.sha256  # the same file fingerprint (SHA-256 of its bytes) both ways


@pytest.mark.parametrize("name", ["falsify balance", "falsify placebo"])
def test_standardised_differences_of_one_binary_instrument(
    data: tuple[pd.DataFrame, Path], name: str
) -> None:
    _, path = data
    roles, options = COVERED[name]
    spec = spec_for(roles, {"vcov": "clustered", "cluster": "district"}, ["early_fibre"])
    memory = run_analysis(name, path, spec, **options)
    scanned = run_analysis(name, path, spec, engine="duckdb", **options)
    compare(scanned, memory)
    kinds = {c["std_diff_kind"] for r in scanned.result.to_dict()["rows"] for c in r["coefficients"]}
    assert kinds == {"binary: (mean1 - mean0) / pooled SD"}


def test_auto_on_a_small_file_runs_in_memory_and_says_why(data: tuple[pd.DataFrame, Path]) -> None:
    _, path = data
    spec = spec_for("model", ADJUSTMENTS["robust"])
    run = run_analysis("falsify per-instrument", path, spec, engine="auto")
    assert run.extra["engine"]["engine"] == "pandas"
    assert "within the pandas threshold" in run.extra["engine"]["choice"]
    compare(run, run_analysis("falsify per-instrument", path, spec))


def test_analyses_that_need_the_rows_are_refused_naming_the_engine_that_can(
    data: tuple[pd.DataFrame, Path],
) -> None:
    _, path = data
    spec = ModelSpec.build(treatment="tele_share", instruments=["fibre_wave"])
    with pytest.raises(
        InvalidInputError, match=r"falsify first-stage-signs runs on engine 'pandas' only: it cuts"
    ):
        run_analysis("falsify first-stage-signs", path, spec, engine="duckdb", by="age")
    covered = {name for name, entry in ANALYSES.items() if entry.scan is not None}
    assert covered == {"estimate", *COVERED}
    for name in ANALYSES:
        refusal = engine_refusal(name, "spark")
        assert (refusal is None) == (name in covered), name
        if refusal is not None:
            assert "'pandas'" in refusal and "--engine spark" in refusal


def test_unknown_engine_and_engine_options_without_an_engine_are_refused(
    data: tuple[pd.DataFrame, Path],
) -> None:
    _, path = data
    spec = spec_for("model", ADJUSTMENTS["robust"])
    with pytest.raises(InvalidInputError, match=r"Unknown engine 'gpu'; choose one of auto, pandas"):
        run_analysis("falsify per-instrument", path, spec, engine="gpu")
    with pytest.raises(InvalidInputError, match=r"--memory-limit and --spark-master apply to the scanning"):
        run_analysis(
            "falsify per-instrument", path, spec, engine_settings=EngineSettings("pandas", memory_limit="1GB")
        )
