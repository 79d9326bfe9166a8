"""The scalar distribution functions of `ivdossier.estimation.distributions` agree exactly with scipy.stats.

Reference: scipy.stats itself (test-only). The module calls the scipy.special routine behind each distribution's
quantile or tail, so the two must agree bit for bit, not merely within a tolerance.
"""

from __future__ import annotations

import itertools

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
