"""The sufficient-statistics object: what it holds, chunk-by-chunk accumulation, merging, and the
out-of-core path (standardised columns with the basis applied at the end).

References: exact identities (meats rebuilt from per-row scores with the module covariance.sandwich, a direct
brute-force computation; sums over chunks equal the sum over all rows)."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.covariance import CovSpec, sandwich
from ivdossier.estimation.crossproducts import MomentAccumulator, build


def _arrays(seed: int, n: int = 3000) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 2))
    x = z @ np.array([[0.4], [0.3]]) + rng.normal(size=(n, 1))
    y = 0.5 * x[:, 0] + rng.normal(size=n) * (1 + z[:, 0] ** 2)
    g = rng.integers(0, 40, n).astype(np.int64)
    c = lambda a: a - a.mean(axis=0)  # noqa: E731
    return c(z), c(x), c(y), g


@pytest.mark.parametrize("kind", ["heteroskedastic", "clustered"])
def test_first_stage_covariance_from_the_moments_equals_the_row_sandwich(kind: str) -> None:
    z, x, y, g = _arrays(1)
    spec = CovSpec(kind, (g,) if kind == "clustered" else ())
    cp = build(z, x, y, spec, n_partialled=1)
    # coordinates: regressors are the orthonormal instrument basis, residual the first-stage residual
    v = cp.r[:, cp.ix].copy()
    v[: cp.k] = 0.0
    cov_q = cp.covariance(np.eye(cp.m)[:, : cp.k], v, np.eye(cp.k), cp.k)
    # brute force: Q explicitly, residuals as n-vectors, covariance.sandwich over the rows
    a = np.column_stack([z, x, y]) / cp.scale
    q = a @ scipy.linalg.inv(cp.r)
    resid = x[:, 0] / cp.scale[cp.k] - q[:, : cp.k] @ cp.r[: cp.k, cp.k]
    ref = sandwich(q[:, : cp.k], resid, spec, n_partialled=1)
    assert cov_q == pytest.approx(ref, rel=1e-9)


def test_accumulating_in_chunks_equals_one_pass_and_merge_adds() -> None:
    z, x, y, g = _arrays(2)
    a = np.column_stack([z, x, y])
    whole = MomentAccumulator(4, 1)
    whole.add(a, [g])
    left, right = MomentAccumulator(4, 1), MomentAccumulator(4, 1)
    for start in range(0, len(a), 700):  # chunks cut across clusters
        target = left if start < 1400 else right
        target.add(a[start : start + 700], [g[start : start + 700]])
    merged = left.merge(right)
    assert merged.n == whole.n
    assert merged.gram == pytest.approx(whole.gram, rel=1e-12)
    (k_whole,), counts = whole.finish()
    (k_merged,), counts_m = merged.finish()
    assert k_merged == pytest.approx(k_whole, rel=1e-11)  # sums are order-free up to rounding
    assert counts == counts_m == (40,)


def test_out_of_core_path_gives_the_in_memory_moments() -> None:
    """Chunks of standardised columns plus the basis applied at the end equal the exact in-memory moments."""
    z, x, y, g = _arrays(3)
    spec = CovSpec("clustered", (g,))
    exact = build(z, x, y, spec, n_partialled=1)
    a = np.column_stack([z, x, y]) / exact.scale
    acc = MomentAccumulator(4, 1)
    for start in range(0, len(a), 512):
        acc.add(a[start : start + 512], [g[start : start + 512]])
    r = np.linalg.cholesky(acc.gram).T  # the Gram of the chunks gives the basis
    (k_out,), _ = acc.finish(basis_inv=scipy.linalg.inv(r))
    assert r == pytest.approx(exact.r, rel=1e-9, abs=1e-12)
    assert k_out == pytest.approx(exact.moments[0], rel=1e-8, abs=1e-12)


def test_chunks_of_the_wrong_shape_are_rejected() -> None:
    acc = MomentAccumulator(3, 0)
    with pytest.raises(InvalidInputError, match="must have 3 columns"):
        acc.add(np.zeros((5, 2)))
    with pytest.raises(InvalidInputError, match="Expected 0 cluster code"):
        acc.add(np.zeros((5, 3)), [np.zeros(5, dtype=np.int64)])


@pytest.mark.parametrize("kind", ["unadjusted", "robust", "cluster", "two-way"])
def test_a_sub_model_from_the_sums_equals_building_it_from_its_own_columns(kind: str) -> None:
    z, x, y, g = _arrays(3)
    z = np.column_stack([z, z[:, 0] * 0.5 + np.random.default_rng(4).normal(size=len(y))])
    h = (g * 7) % 11
    clusters = {"cluster": (g,), "two-way": (g, h)}.get(kind, ())
    spec = CovSpec("cluster" if clusters else kind, clusters)
    full = build(z, x, y, spec, n_partialled=1)
    sub = full.subset([2, 0], [0])
    # exact identity: the same statistics built directly from the kept columns (a second pass over the rows)
    direct = build(z[:, [2, 0]], x, y, spec, n_partialled=1)
    np.testing.assert_allclose(sub.r, direct.r, atol=1e-13)
    np.testing.assert_allclose(sub.scale, direct.scale, rtol=1e-13)
    assert sub.n_groups == direct.n_groups and (sub.k, sub.p, sub.has_y) == (2, 1, True)
    for a, b in zip(sub.moments, direct.moments, strict=True):
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-13 * np.abs(b).max())
    no_y = full.subset([1], [0], outcome=False)
    np.testing.assert_allclose(no_y.r, build(z[:, [1]], x, None, spec, n_partialled=1).r, atol=1e-13)
