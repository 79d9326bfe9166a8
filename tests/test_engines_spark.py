"""The Spark engine (local mode, one session for the module) equals the in-memory path on the same rows.

Source of truth: the pandas path (``estimate``), itself checked against linearmodels elsewhere. Skipped locally
only when pyspark or Java is missing; with ``CI`` set the tests must run (CI installs Java).
"""

from __future__ import annotations

import os
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from engine_data import assert_same, model_options, telehealth_frame

from ivdossier.estimation import estimate
from ivdossier.estimation.engines import estimate_source

pytestmark = pytest.mark.slow
IN_CI = bool(os.environ.get("CI"))


@pytest.fixture(scope="module")
def spark(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    missing = None
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        missing = "pyspark is not installed"
    if missing is None and shutil.which("java") is None and not os.environ.get("JAVA_HOME"):
        missing = "no Java runtime (Debian package default-jre-headless)"
    if missing is not None:
        if IN_CI:
            pytest.fail(f"CI must run the Spark engine tests, but {missing}")
        pytest.skip(f"{missing}; CI runs these tests")
    session = (
        SparkSession.builder.master("local[2]")
        .appName("ivdossier-tests")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .config("spark.driver.host", "127.0.0.1")
        .config("spark.sql.shuffle.partitions", "2")
        .config("spark.sql.warehouse.dir", str(tmp_path_factory.mktemp("warehouse")))
        .getOrCreate()
    )
    yield session
    session.stop()


@pytest.fixture(scope="module")
def data(tmp_path_factory: pytest.TempPathFactory) -> tuple[pd.DataFrame, Path]:
    frame = telehealth_frame()
    path = tmp_path_factory.mktemp("spark") / "patients.parquet"
    frame.to_parquet(path, row_group_size=600)
    return frame, path


@pytest.mark.parametrize(
    "design", ["liml-robust-absorb-weights", "2sls-twoway", "fuller-cluster-absorb", "2sls-cluster-weights"]
)
def test_spark_equals_pandas_path_in_every_number(
    spark: Any, data: tuple[pd.DataFrame, Path], design: str
) -> None:
    frame, path = data
    opts = model_options(design)
    got = estimate_source(str(path), engine="spark", spark_session=spark, **opts)
    # source: the in-memory path on the same rows; every coefficient, covariance and diagnostic within 1e-10
    assert_same(got.result.to_dict(), estimate(frame, **opts).to_dict())
    assert got.provenance.engine == "spark" and got.provenance.engine_version == spark.version
    assert got.provenance.settings["master"] == "local[2]"
    # the runner dropped its views and kept the caller's session running
    assert not [t for t in spark.catalog.listTables() if t.name.startswith("ivd_")]
    assert spark.conf.get("spark.sql.codegen.maxFields") == "100"  # the session's setting is restored
    # one-way clustered without an absorbed factor: the cluster moments come from scan 1 grouped by cluster
    one_scan = design == "2sls-cluster-weights"
    assert ("row and cluster moments" not in [s.scan for s in got.provenance.scans]) is one_scan


@pytest.mark.parametrize(
    ("name", "adjustment"),
    [
        ("falsify balance", "twoway"),
        ("falsify placebo", "cluster-weights"),
        ("falsify per-instrument", "unadjusted-absorb"),
        ("sensitivity range", "nested-absorb-cluster"),
        ("sensitivity prior", "robust"),
        ("sensitivity breakdown", "cluster-weights"),
    ],
)
def test_spark_equals_pandas_for_the_analyses_that_need_only_cross_products(
    spark: Any, data: tuple[pd.DataFrame, Path], name: str, adjustment: str
) -> None:
    from test_engines_analyses import ADJUSTMENTS, COVERED, compare, spec_for

    from ivdossier.estimation.engines import EngineSettings
    from ivdossier.workflows.analyses import run_analysis

    _, path = data
    roles, options = COVERED[name]
    spec = spec_for(roles, ADJUSTMENTS[adjustment])
    settings = EngineSettings("spark", spark_session=spark)
    scanned = run_analysis(name, path, spec, engine="spark", engine_settings=settings, **options)
    # source: the in-memory path of the same analysis on the same rows; every number within 1e-10 relative
    compare(scanned, run_analysis(name, path, spec, **options))
    assert scanned.extra["engine"]["engine"] == "spark"
