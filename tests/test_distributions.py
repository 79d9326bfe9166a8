"""The scalar distribution functions of `ivdossier.estimation.distributions` agree exactly with scipy.stats.

Reference: scipy.stats itself (test-only). The module calls the scipy.special routine behind each distribution's
quantile or tail, so the two must agree bit for bit, not merely within a tolerance.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from ivdossier.estimation import distributions as d

PROBABILITIES = (1e-12, 1e-4, 0.005, 0.025, 0.05, 0.3, 0.5, 0.8, 0.95, 0.975, 0.995, 1 - 1e-9)
POINTS = (-40.0, -3.2, -1.0, 0.0, 0.4, 1.959963984540054, 2.7, 9.5, 60.0)
DFS = (1, 2, 3.5, 7, 30, 250, 10_000)


@pytest.mark.parametrize("q", PROBABILITIES)
def test_normal(q: float) -> None:
    assert d.norm_ppf(q) == float(stats.norm.ppf(q))
    for x in POINTS:
        assert d.norm_sf(x) == float(stats.norm.sf(x))


@pytest.mark.parametrize("df", DFS)
def test_chi2_and_t(df: float) -> None:
    for q in PROBABILITIES:
        assert d.chi2_ppf(q, df) == float(stats.chi2.ppf(q, df))
        assert d.t_ppf(q, df) == float(stats.t.ppf(q, df))
    for x in POINTS:
        assert d.t_sf(x, df) == float(stats.t.sf(x, df))
        if x >= 0:
            assert d.chi2_sf(x, df) == float(stats.chi2.sf(x, df))


def test_f() -> None:
    for q, dfn, dfd in itertools.product(PROBABILITIES, (1, 2, 5, 40), (1, 3, 17, 500, 1e6)):
        assert d.f_ppf(q, dfn, dfd) == float(stats.f.ppf(q, dfn, dfd))


def test_noncentral_chi2() -> None:
    for q, df, nc in itertools.product((0.05, 0.5, 0.95, 0.99), (1, 2.5, 6), (0.0, 0.3, 10.0, 100.0)):
        assert d.ncx2_ppf(q, df, nc) == float(stats.ncx2.ppf(q, df, nc))


# The array functions and the edges: scipy.stats' sf/ppf wrappers return 1 below the support, the support's ends
# at q = 0 and 1, and nan for bad parameters, where the bare scipy.special routine can differ (chdtrc at x < 0 is
# nan); the module must follow the wrapper. Reference: scipy.stats itself (test-only), compared bit for bit.

EDGE_X = np.array(
    [-np.inf, -40.0, -1.0, -1e-300, -0.0, 0.0, 1e-300, 0.4, 1.959963984540054, 9.5, 1e3, np.inf, np.nan]
)
EDGE_Q = np.array([-0.5, -0.0, 0.0, 1e-300, 1e-12, 0.025, 0.5, 0.975, 1 - 1e-9, 1.0, 1.5, np.nan])
EDGE_DF = (1, 2.5, 30, 299, 1e6, np.inf, 0, -1, np.nan)


def _bits(values: object) -> list[object]:
    """Bit patterns, with every nan as one value (scipy does not promise a nan payload)."""
    arr = np.asarray(values).ravel()
    return ["nan" if np.isnan(v) else v.tobytes() for v in arr]


def _same(ours: object, ref: object) -> bool:
    same_type = np.asarray(ours).dtype == np.asarray(ref).dtype == np.float64
    return same_type and np.shape(ours) == np.shape(ref) and _bits(ours) == _bits(ref)


def test_tails_over_arrays_and_edges() -> None:
    assert _same(d.norm_sf_array(EDGE_X), stats.norm.sf(EDGE_X))
    for df in EDGE_DF:
        assert _same(d.t_sf_array(EDGE_X, df), stats.t.sf(EDGE_X, df)), df
        assert _same(d.chi2_sf_array(EDGE_X, df), stats.chi2.sf(EDGE_X, df)), df
        for dfd in (1, 7, 299, 1e6, np.inf, 0, np.nan):
            assert _same(d.f_sf_array(EDGE_X, df, dfd), stats.f.sf(EDGE_X, df, dfd)), (df, dfd)


def test_tails_broadcast_parameters() -> None:
    x = np.array([[0.3], [2.0], [7.5]])
    df = np.array([1.0, 4.0, 49.0, 299.0])
    assert _same(d.t_sf_array(x, df), stats.t.sf(x, df))
    assert _same(d.chi2_sf_array(x, df), stats.chi2.sf(x, df))
    assert _same(d.f_sf_array(x, 2, df), stats.f.sf(x, 2, df))
    assert _same(d.t_sf_array(np.array([1, 3]), 5), stats.t.sf(np.array([1, 3]), 5))  # integer input
    assert _same(d.t_sf_array(2.5, 12), stats.t.sf(2.5, 12))  # 0-d in, 0-d out


def test_scalar_edges() -> None:
    for x in EDGE_X:
        assert _same(d.norm_sf(x), stats.norm.sf(x))
        for df in EDGE_DF:
            assert _same(d.t_sf(x, df), stats.t.sf(x, df)), (x, df)
            assert _same(d.chi2_sf(x, df), stats.chi2.sf(x, df)), (x, df)
            assert _same(d.f_sf(x, df, 17), stats.f.sf(x, df, 17)), (x, df)
    for q in EDGE_Q:
        assert _same(d.norm_ppf(q), stats.norm.ppf(q)), q
        for df in EDGE_DF:
            assert _same(d.t_ppf(q, df), stats.t.ppf(q, df)), (q, df)
            assert _same(d.chi2_ppf(q, df), stats.chi2.ppf(q, df)), (q, df)
            assert _same(d.f_ppf(q, df, 17), stats.f.ppf(q, df, 17)), (q, df)
            assert _same(d.f_ppf(q, 3, df), stats.f.ppf(q, 3, df)), (q, df)


@pytest.mark.parametrize("dfn", (1, 2, 5, 40))
def test_f_tail(dfn: float) -> None:
    for x, dfd in itertools.product(POINTS, (1, 3, 17, 299, 500, 1e6)):
        assert _same(d.f_sf(x, dfn, dfd), stats.f.sf(x, dfn, dfd))
