"""One-scan moments of the SQL engines: one-way clustered and homoskedastic models without an absorbed factor take
their moments from scan 1's sums (grouped by cluster), and fall back to the row-by-row moments scan when the
design is ill-conditioned or has too many clusters; every path gives the in-memory path's numbers.

Sources of truth: the pandas path (``estimate`` on the same rows) and a brute-force computation of the cluster
moments row by row with numpy (exact identity: the per-cluster Gram matrix of the centred columns, multiplied by
the coefficients, is the Gram matrix of the transformed rows).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from engine_data import assert_same, model_options, telehealth_frame

from ivdossier.estimation import engines, estimate
from ivdossier.estimation.crossproducts import pack_index
from ivdossier.estimation.engines import estimate_source
from ivdossier.estimation.sql_moments import ClusterSums, amplification, cluster_sums_moments

pytest.importorskip("duckdb")

MOMENTS_SCAN = "row and cluster moments"


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return telehealth_frame()


def _write(tmp_path: Path, frame: pd.DataFrame, name: str = "d.parquet") -> str:
    path = tmp_path / name
    frame.to_parquet(path, row_group_size=500)
    return str(path)


def _scans(got: engines.SourceEstimate) -> list[str]:
    return [s.scan for s in got.provenance.scans]


@pytest.mark.parametrize("design", ["2sls-cluster-weights", "2sls-unadjusted"])
def test_one_scan_and_moments_scan_both_equal_the_pandas_path(
    frame: pd.DataFrame, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, design: str
) -> None:
    opts = model_options(design)
    path = _write(tmp_path, frame)
    ref = estimate(frame, **opts).to_dict()
    one = estimate_source(path, engine="duckdb", **opts)
    assert MOMENTS_SCAN not in _scans(one) and len(_scans(one)) == 1
    # source: the in-memory path on the same rows, every number within 1e-10 relative
    assert_same(one.result.to_dict(), ref)
    monkeypatch.setattr(engines, "ONE_SCAN_MAX_AMPLIFICATION", 0.0)
    two = estimate_source(path, engine="duckdb", **opts)
    assert _scans(two)[-1] == MOMENTS_SCAN
    assert_same(two.result.to_dict(), ref)


def test_ill_conditioned_design_falls_back_to_the_moments_scan(frame: pd.DataFrame, tmp_path: Path) -> None:
    # a control that is the instrument plus 0.1% noise: the partialled instrument keeps about 1e-3 of its length,
    # so the one-scan amplification (about 1e3) is above its bound of 100
    rng = np.random.default_rng(5)
    data = frame.assign(mast_km=frame["fibre_wave"] + 1e-3 * rng.normal(size=len(frame)))
    opts = model_options("2sls-cluster-weights")
    got = estimate_source(_write(tmp_path, data), engine="duckdb", **opts)
    assert _scans(got) == ["counts, means and Gram matrix by cluster", MOMENTS_SCAN]
    assert_same(got.result.to_dict(), estimate(data, **opts).to_dict())  # source: the in-memory path


def test_too_many_clusters_fall_back_to_the_moments_scan(
    frame: pd.DataFrame, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    opts = model_options("2sls-cluster-weights")
    path = _write(tmp_path, frame)
    ref = estimate(frame, **opts).to_dict()
    # more clusters than are kept in memory (48 districts, limit 10): the grouped scan's totals, then the moments
    monkeypatch.setattr(engines, "ONE_SCAN_MAX_CLUSTERS", 10)
    got = estimate_source(path, engine="duckdb", **opts)
    assert _scans(got) == ["counts, means and Gram matrix by cluster", MOMENTS_SCAN]
    assert_same(got.result.to_dict(), ref)
    # the centring sample already shows many clusters (48 > 5): scan 1 is not grouped at all
    monkeypatch.setattr(engines, "ONE_SCAN_SAMPLE_MAX_DISTINCT", 5)
    got = estimate_source(path, engine="duckdb", **opts)
    assert _scans(got) == ["counts, means and Gram matrix", MOMENTS_SCAN]
    assert_same(got.result.to_dict(), ref)


def test_incomplete_rows_and_missing_cluster_keys_are_dropped_as_in_memory(
    frame: pd.DataFrame, tmp_path: Path
) -> None:
    # NaN outcome (rows 3, 17) and age (row 40) come with the frame; add a missing cluster key, a NULL control and
    # a NaN instrument, each in a different row
    data = frame.copy()
    data.loc[5, "district"] = None
    data.loc[11, "mast_km"] = None
    data.loc[23, "fibre_wave"] = np.nan
    opts = model_options("2sls-cluster-weights")
    ref = estimate(data, **opts)
    got = estimate_source(_write(tmp_path, data), engine="duckdb", **opts)
    assert _scans(got) == ["counts, means and Gram matrix by cluster"]
    assert ref.n == len(frame) - 6
    assert_same(got.result.to_dict(), ref.to_dict())  # source: the in-memory path


def test_cluster_sums_moments_equal_the_row_by_row_sums() -> None:
    # brute force: b = sqrt(w) (v - mean) @ coef row by row, t_g its packed Gram per cluster
    rng = np.random.default_rng(7)
    n, n_d, m, groups = 400, 5, 3, 9
    v = rng.normal(size=(n, n_d)) * [1.0, 2.0, 0.5, 3.0, 1.0] + [10.0, -4.0, 0.0, 2.0, 1.0]
    w = rng.uniform(0.5, 2.0, n)
    key = rng.integers(0, groups, n)
    coef = rng.normal(size=(n_d, m))
    shift = v[:20].mean(axis=0)
    means = (w[:, None] * v).sum(axis=0) / w.sum()
    x = np.sqrt(w)[:, None] * (v - shift)
    ia, ib = pack_index(n_d)
    sums = ClusterSums(
        np.array([w[key == g].sum() for g in range(groups)]),
        np.array([(np.sqrt(w)[key == g, None] * x[key == g]).sum(axis=0) for g in range(groups)]),
        np.array([(x[key == g][:, ia] * x[key == g][:, ib]).sum(axis=0) for g in range(groups)]),
    )
    total, outer = cluster_sums_moments(sums, means - shift, coef)
    b = (np.sqrt(w)[:, None] * (v - means)) @ coef
    ta, tb = pack_index(m)
    t = np.array([(b[key == g][:, ta] * b[key == g][:, tb]).sum(axis=0) for g in range(groups)])
    ka, kb = pack_index(len(ta))
    np.testing.assert_allclose(total, t.sum(axis=0), rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(outer, (t[:, ka] * t[:, kb]).sum(axis=0), rtol=1e-12, atol=1e-6)


def test_amplification_is_about_one_for_orthonormal_columns() -> None:
    # columns already orthonormal (identity Gram, coefficients the identity): nothing is magnified
    assert amplification(np.eye(4), np.eye(4)) == pytest.approx(1.0)
    # a column combined as 1000 x a - 1000 x b of two unit columns: magnified 2000 times
    assert amplification(np.array([[1000.0], [-1000.0]]), np.eye(2)) == pytest.approx(2000.0)
