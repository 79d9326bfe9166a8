"""The sandwich covariance against direct textbook formulas written out observation by observation."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation import CovSpec, estimate
from ivdossier.estimation.covariance import group_sums, is_psd, sandwich


@pytest.fixture(scope="module")
def arrays():
    rng = np.random.default_rng(42)
    n, k = 120, 3
    r = rng.normal(size=(n, k))
    e = rng.normal(size=(n, 2)) * (1 + np.abs(r[:, :1]))
    c1 = rng.integers(0, 9, n)
    c2 = rng.integers(0, 5, n)
    return r, e, c1, c2


def direct_meat(r, e, codes=None):
    """sum over clusters (or rows) of s_g s_g' with s_g = sum_i e_i ⊗ r_i, written as an explicit loop."""
    n, k = r.shape
    m = e.shape[1]
    groups = np.arange(n) if codes is None else codes
    meat = np.zeros((m * k, m * k))
    for g in np.unique(groups):
        s = np.zeros(m * k)
        for i in np.flatnonzero(groups == g):
            s += np.kron(e[i], r[i])
        meat += np.outer(s, s)
    return meat


def test_robust_two_equations_equals_direct_hc1(arrays):
    r, e, _, _ = arrays
    n, k = r.shape
    bread = np.linalg.inv(r.T @ r)
    big = np.kron(np.eye(2), bread)
    # source: HC1 formula written out (common practice): bread (sum_i (e_i e_i') ⊗ (r_i r_i')) bread n/(n-k-p)
    expected = big @ direct_meat(r, e) @ big * n / (n - k - 4)
    got = sandwich(r, e, CovSpec("heteroskedastic"), n_partialled=4)
    np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_unadjusted_two_equations_is_kronecker(arrays):
    r, e, _, _ = arrays
    n, k = r.shape
    # source: homoskedastic SUR formula (common practice): kron(E'E/(n-k-p), (R'R)^-1)
    expected = np.kron(e.T @ e / (n - k - 1), np.linalg.inv(r.T @ r))
    np.testing.assert_allclose(sandwich(r, e, CovSpec("homoskedastic"), n_partialled=1), expected, rtol=1e-12)
    large = np.kron(e.T @ e / n, np.linalg.inv(r.T @ r))
    got = sandwich(r, e, CovSpec("homoskedastic", small_sample=False), n_partialled=1)
    np.testing.assert_allclose(got, large, rtol=1e-12)


def test_one_way_cluster_with_nested_levels(arrays):
    r, e, c1, _ = arrays
    n, k = r.shape
    bread = np.linalg.inv(r.T @ r)
    big = np.kron(np.eye(2), bread)
    g = len(np.unique(c1))
    # source: CR1 formula (common practice) with p_c = n_partialled - nested = 10 - 6
    factor = g / (g - 1) * (n - 1) / (n - k - 4)
    expected = big @ direct_meat(r, e, c1) @ big * factor
    got = sandwich(r, e, CovSpec("clustered", (c1,)), n_partialled=10, n_partialled_nested=6)
    np.testing.assert_allclose(got, expected, rtol=1e-12)


def test_two_way_cluster_is_v1_plus_v2_minus_v12(arrays):
    r, e, c1, c2 = arrays
    n, k = r.shape
    e1 = e[:, :1]
    bread = np.linalg.inv(r.T @ r)
    inter = np.unique(c1 * 100 + c2, return_inverse=True)[1].ravel()  # independent intersection coding

    def part(codes):
        g = len(np.unique(codes))
        return bread @ direct_meat(r, e1, codes) @ bread * g / (g - 1) * (n - 1) / (n - k)

    # source: Cameron, Gelbach and Miller (2011) two-way estimator, each term with its own G
    expected = part(c1) + part(c2) - part(inter)
    got = sandwich(r, e1, CovSpec("clustered", (c1, c2)), n_partialled=0)
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert is_psd(np.eye(2)) and not is_psd(-np.eye(2))


def test_group_sums_and_cluster_counts():
    codes = np.array([0, 2, 2, 1, 0], dtype=np.int64)
    vals = np.arange(10.0).reshape(5, 2)
    # source: hand sums of rows {0,4}, {3}, {1,2}
    np.testing.assert_array_equal(group_sums(codes, vals), [[8, 10], [6, 7], [6, 8]])
    assert CovSpec("clustered", (codes, np.array([0, 0, 1, 1, 1]))).n_clusters() == (3, 2)
    assert CovSpec("heteroskedastic").n_clusters() == ()


def test_covspec_rejects_bad_input():
    with pytest.raises(
        InvalidInputError,
        match=r"Unknown covariance 'hc2'; choose one of homoskedastic, heteroskedastic, clustered",
    ):
        CovSpec("hc2")  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match=r"needs one or two cluster code arrays, got 0"):
        CovSpec("clustered")
    with pytest.raises(InvalidInputError, match=r"integer arrays; encode the cluster variable"):
        CovSpec("clustered", (np.array([0.5, 1.0]),))
    with pytest.raises(
        InvalidInputError, match=r"Cluster codes were given with covariance kind 'heteroskedastic'"
    ):
        CovSpec("heteroskedastic", (np.array([0, 1]),))


def test_no_residual_degrees_of_freedom():
    r = np.eye(3)
    with pytest.raises(EstimationError, match=r"No residual degrees of freedom: 3 rows but 3 regressors"):
        sandwich(r, np.ones(3), CovSpec("heteroskedastic"), n_partialled=0)


def test_cluster_interval_uses_t_with_g_minus_1():
    rng = np.random.default_rng(1)
    n = 400
    g = rng.integers(0, 25, n)
    z = rng.normal(size=n)
    x = z + rng.normal(size=n)
    df = pd.DataFrame({"y": x + rng.normal(size=n), "x": x, "z": z, "g": g})
    res = estimate(df, outcome="y", treatment="x", instruments="z", vcov="clustered", cluster="g")
    # stated convention (common practice): t quantile with G - 1 = 24 degrees of freedom (scipy.stats.t)
    q = stats.t.ppf(0.975, 24)
    np.testing.assert_allclose(
        res.ci[0], [res.coef[0] - q * res.se[0], res.coef[0] + q * res.se[0]], rtol=1e-12
    )
