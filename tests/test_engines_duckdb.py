"""Estimating from files: the DuckDB engine equals the in-memory path, the engine choice is stated, refusals are clear.

Sources of truth: the pandas path (``estimate`` on the same rows), itself checked against linearmodels in
test_estimation_core_linearmodels.py; one design is also checked against linearmodels directly here.
"""

from __future__ import annotations

import hashlib
import time
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from engine_data import DESIGNS, assert_same, model_options, telehealth_frame

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation import estimate, sources, sql_runners
from ivdossier.estimation.engines import choose_engine, estimate_source
from ivdossier.estimation.sql_moments import DUCKDB, SPARK, MomentPlan, moments_query

pytest.importorskip("duckdb")


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return telehealth_frame()


@pytest.fixture(scope="module")
def parquet(frame: pd.DataFrame, tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("engines") / "patients.parquet"
    frame.to_parquet(path, row_group_size=500)
    return path


@pytest.mark.parametrize("design", sorted(DESIGNS))
def test_duckdb_equals_pandas_path_in_every_number(frame: pd.DataFrame, parquet: Path, design: str) -> None:
    opts = model_options(design)
    ref = estimate(frame, **opts)
    got = estimate_source(str(parquet), engine="duckdb", **opts)
    # source: the in-memory path on the same rows; every coefficient, covariance and diagnostic within 1e-10
    assert_same(got.result.to_dict(), ref.to_dict())
    assert got.provenance.engine == "duckdb"


def test_duckdb_matches_linearmodels_weighted_clustered_with_dummies(
    frame: pd.DataFrame, parquet: Path
) -> None:
    linearmodels_iv = pytest.importorskip("linearmodels.iv")
    got = estimate_source(str(parquet), engine="duckdb", **model_options("fuller-cluster-absorb")).result
    d = frame.dropna()
    exog = pd.concat(
        [
            pd.DataFrame({"const": np.ones(len(d))}, index=d.index),
            d[["age", "mast_km"]],
            pd.get_dummies(d["clinic"], prefix="c", drop_first=True, dtype=float),
        ],
        axis=1,
    )
    ref = linearmodels_iv.IVLIML(
        d["ed_visits"], exog, d[["tele_share"]], d[["fibre_wave", "clerk_pull"]], fuller=1
    ).fit(cov_type="clustered", clusters=pd.factorize(d["district"])[0], debiased=True)
    # source: linearmodels IVLIML(fuller=1) with explicit clinic dummies, clustered, debiased=True (the
    # conventions listed in test_estimation_core_linearmodels.py)
    np.testing.assert_allclose(got.coef, ref.params[["tele_share"]].to_numpy(), rtol=1e-8)
    np.testing.assert_allclose(got.se, ref.std_errors[["tele_share"]].to_numpy(), rtol=1e-8)


def test_csv_and_directory_sources_give_the_same_result(frame: pd.DataFrame, tmp_path: Path) -> None:
    csv = tmp_path / "patients.csv"
    frame.to_csv(csv, index=False)
    folder = tmp_path / "parts"
    folder.mkdir()
    for i, start in enumerate(range(0, len(frame), 800)):
        frame.iloc[start : start + 800].to_parquet(folder / f"part-{i}.parquet")
    opts = model_options("2sls-cluster-weights")
    ref = estimate(frame, **opts).to_dict()
    # source: the in-memory path on the same rows (CSV text round trip keeps 17 digits in pandas' writer)
    assert_same(estimate_source(str(folder), engine="duckdb", **opts).result.to_dict(), ref)
    got_csv = estimate_source(str(csv), engine="duckdb", **opts).result.to_dict()
    assert_same(got_csv, estimate(pd.read_csv(csv), **opts).to_dict())


def test_directory_fingerprint_covers_names_sizes_and_contents(tmp_path: Path) -> None:
    folder = tmp_path / "parts"
    (folder / "sub").mkdir(parents=True)
    (folder / "a.parquet").write_bytes(b"first")
    (folder / "sub" / "b.parquet").write_bytes(b"second file")
    src = sources.resolve_source(folder)
    lines = "".join(
        f"{name}\t{len(data)}\t{hashlib.sha256(data).hexdigest()}\n"
        for name, data in (("a.parquet", b"first"), ("sub/b.parquet", b"second file"))
    )
    # source: the definition in sources.py, recomputed with hashlib
    assert sources.fingerprint(src) == hashlib.sha256(lines.encode()).hexdigest()
    (folder / "a.parquet").write_bytes(b"First")
    assert sources.fingerprint(sources.resolve_source(folder)) != hashlib.sha256(lines.encode()).hexdigest()


def test_file_fingerprint_is_the_sha256_of_its_bytes(parquet: Path) -> None:
    got = estimate_source(str(parquet), engine="duckdb", **model_options("2sls-robust")).provenance
    # source: hashlib over the file's bytes
    assert got.fingerprint == hashlib.sha256(parquet.read_bytes()).hexdigest()
    assert got.engine_version and got.rows == 2400
    assert [s.scan for s in got.scans] == ["counts, means and Gram matrix", "row and cluster moments"]


def test_memory_cap_and_spill_folder_are_set_and_recorded(parquet: Path, tmp_path: Path) -> None:
    got = estimate_source(
        str(parquet),
        engine="duckdb",
        memory_limit="200MB",
        temp_directory=str(tmp_path),
        threads=1,
        **model_options("2sls-robust"),
    ).provenance
    assert "MiB" in got.settings["memory_limit"] or "MB" in got.settings["memory_limit"]
    assert got.settings["temp_directory"] == str(tmp_path) and got.settings["threads"] == "1"


def test_auto_uses_pandas_below_the_threshold_and_says_so(parquet: Path) -> None:
    got = estimate_source(str(parquet), engine="auto", **model_options("2sls-robust")).provenance
    assert got.engine == "pandas"
    assert "within the pandas threshold" in got.choice


def test_auto_uses_duckdb_above_the_threshold_and_says_so(
    parquet: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr("ivdossier.estimation.engines.AUTO_PANDAS_MAX_BYTES", 1000)
    got = estimate_source(str(parquet), engine="auto", **model_options("2sls-robust")).provenance
    assert got.engine == "duckdb"
    assert "above the pandas threshold of 0.00 GiB" in got.choice


def test_choice_of_unknown_engine_lists_the_valid_ones() -> None:
    with pytest.raises(
        InvalidInputError, match="Unknown engine 'polars'; choose one of auto, pandas, duckdb, spark"
    ):
        choose_engine("polars", None)


def test_pandas_engine_refused_when_the_file_would_not_fit(
    parquet: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(sources, "available_memory", lambda: 100_000)
    # 2400 rows x 6 used columns x 8 bytes x 4 copies = 460,800 bytes > 0.8 x 100,000
    with pytest.raises(
        InvalidInputError,
        match=r"engine='pandas' would need about .* for 2,400 rows x 6 columns.*"
        r"use engine='duckdb'",
    ):
        estimate_source(str(parquet), engine="pandas", **model_options("2sls-robust"))


def test_two_absorbed_factors_are_refused_naming_the_pandas_engine(parquet: Path) -> None:
    with pytest.raises(InvalidInputError, match=r"engine='duckdb' absorbs one factor.*Use engine='pandas'"):
        estimate_source(
            str(parquet),
            engine="duckdb",
            **{**model_options("2sls-robust"), "absorb": ["clinic", "district"]},
        )


def test_auto_sends_remote_storage_to_spark() -> None:
    engine, why = choose_engine("auto", None, remote=True)
    assert engine == "spark" and "not a local file" in why


def test_remote_path_needs_spark() -> None:
    with pytest.raises(InvalidInputError, match="only engine='spark' reads remote storage"):
        estimate_source("s3a://bucket/claims/", engine="duckdb", **model_options("2sls-robust"))


def _write(tmp_path: Path, frame: pd.DataFrame) -> str:
    path = tmp_path / "bad.parquet"
    frame.to_parquet(path)
    return str(path)


def test_same_errors_as_the_pandas_path(frame: pd.DataFrame, tmp_path: Path) -> None:
    opts = model_options("2sls-robust")
    cases: list[tuple[pd.DataFrame, dict[str, Any], type[Exception], str]] = [
        (
            frame.assign(age=frame["age"].where(frame.index != 7, np.inf)),
            {},
            InvalidInputError,
            "'age' holds",
        ),
        (
            frame.assign(weight=frame["weight"].where(frame.index != 9, 0.0)),
            {"weights": "weight"},
            InvalidInputError,
            "Weights column 'weight' holds 1 zero or negative",
        ),
        (frame.assign(fibre_wave=1.5), {}, EstimationError, "Instrument 'fibre_wave' is constant"),
        (
            frame.assign(age=frame["clinic"] * 2.0),
            {"absorb": "clinic"},
            EstimationError,
            r"Control\(s\) 'age' are constant, absorbed by the fixed effects",
        ),
        (
            frame.assign(extra_z=frame["fibre_wave"] - 2 * frame["clerk_pull"]),
            {"instruments": ["fibre_wave", "clerk_pull", "extra_z"]},
            EstimationError,
            r"'extra_z'.*collinear",
        ),
        (frame, {"instruments": ["fibre_wav"]}, InvalidInputError, "did you mean 'fibre_wave'"),
        (  # row 3 misses the outcome: an infinite value there is still an error on both paths
            frame.assign(age=frame["age"].where(frame.index != 3, -np.inf)),
            {"cluster": "district", "vcov": "clustered"},
            InvalidInputError,
            "Column 'age' holds an infinite value|Column 'age' holds 1 infinite value",
        ),
        (
            frame.assign(region="north"),
            {"cluster": "region", "vcov": "clustered"},
            InvalidInputError,
            "Cluster variable 'region' has a single level in the used rows",
        ),
        (frame, {"cluster": "district", "vcov": "clustered", "controls": []}, None, ""),
    ]
    for data, extra, err, pattern in cases:
        path = _write(tmp_path, data)
        if err is None:
            continue
        with pytest.raises(err, match=pattern):
            estimate(data, **{**opts, **extra})
        # the same error class and message from the SQL path (source: the in-memory path's check)
        with pytest.raises(err, match=pattern):
            estimate_source(path, engine="duckdb", **{**opts, **extra})


def test_text_treatment_column_is_refused(frame: pd.DataFrame, tmp_path: Path) -> None:
    path = _write(tmp_path, frame.assign(tele_share=frame["tele_share"].astype(str)))
    with pytest.raises(InvalidInputError, match="treatment column 'tele_share' must be numeric"):
        estimate_source(path, engine="duckdb", **model_options("2sls-robust"))


def test_too_many_sums_for_sql_is_refused_naming_pandas() -> None:
    plan = MomentPlan(
        "t", tuple(f"z{i}" for i in range(14)), ("x",), "y", (), None, (), None, "heteroskedastic", DUCKDB
    )
    # 16 columns: u = 16*17/2 = 136 packed products, u + u(u+1)/2 = 136 + 9316 = 9452 sums (arithmetic)
    with pytest.raises(EstimationError, match=r"needs 9452 sums per scan.*use engine='pandas'"):
        moments_query(plan, np.eye(16))


def test_one_generator_differs_between_engines_only_in_quoting() -> None:
    plan = MomentPlan("src", ("z 1",), ("x",), "y", ("c",), "f", ("g", "h"), "w", "clustered", DUCKDB)
    coef = np.eye(4, 3)
    duck = moments_query(plan, coef, means=[0.0] * 4, means_table="lm")
    spark = moments_query(
        MomentPlan(*[getattr(plan, f) for f in plan.__dataclass_fields__][:-1], SPARK),
        coef,
        means=[0.0] * 4,
        means_table="lm",
    )
    assert '"z 1"' in duck and "`z 1`" in spark
    assert duck.replace('"', "`") == spark
    assert "GROUPING SETS" in duck


def test_progress_reports_long_scans(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sql_runners, "PROGRESS_AFTER", 0.05)
    monkeypatch.setattr(sql_runners, "PROGRESS_EVERY", 0.05)
    seen: list[sql_runners.ScanProgress] = []
    with sql_runners._Monitor(lambda: 0.5, seen.append, "Gram matrix", 2, 3, 1000):
        time.sleep(0.4)
    assert seen and seen[0].rows_read == 500 and seen[0].fraction == 0.5
    assert seen[-1].done and seen[-1].rows_read == 1000
    assert "scan 2/3 (Gram matrix)" in str(seen[0])
    quiet: list[sql_runners.ScanProgress] = []
    with sql_runners._Monitor(lambda: 0.5, quiet.append, "counts", 1, 3, 1000):
        pass
    assert quiet == []  # a scan shorter than PROGRESS_AFTER reports nothing
