"""The vectorised CLR pieces used to scan the set's grid agree with the scalar versions they stand in for
(exact identity for the statistics; the p-value quadrature against the adaptive scalar integral)."""

from __future__ import annotations

import numpy as np
import pytest

from ivdossier.estimation import robust_inference as ri
from ivdossier.estimation.covariance import CovSpec


def _moments(kind: str) -> ri._Moments:
    rng = np.random.default_rng(3)
    n = 300
    z = rng.normal(size=(n, 3))
    x = z @ np.array([0.2, 0.1, 0.0]) + rng.normal(size=n)
    y = x + rng.normal(size=n) * (1 + np.abs(z[:, 0]))
    c = lambda a: a - a.mean(axis=0)  # noqa: E731
    return ri._moments(c(y)[:, None], c(x)[:, None], c(z), CovSpec(kind), 1, 0)


def test_vectorised_statistics_equal_the_scalar_ones() -> None:
    thetas = np.linspace(-np.pi / 2, np.pi / 2, 41)
    m = _moments("heteroskedastic")
    lr, r = ri._clr_stats_robust_many(m, thetas)
    for i, t in enumerate(thetas):
        assert (lr[i], r[i]) == pytest.approx(ri._clr_stats_robust(m, float(t)), rel=1e-10, abs=1e-12)
    m = _moments("unadjusted")
    omega = np.array([[np.trace(m.v_yy), np.trace(m.v_yx)], [np.trace(m.v_yx.T), np.trace(m.v_xx)]]) / m.k
    lr, qt = ri._clr_stats_many(m, omega, thetas)
    for i, t in enumerate(thetas):
        assert (lr[i], qt[i]) == pytest.approx(ri._clr_stats(m, omega, float(t)), rel=1e-10, abs=1e-12)


@pytest.mark.parametrize("k", [2, 3, 4, 6])
def test_vectorised_p_values_agree_with_the_adaptive_integral(k: int) -> None:
    rng = np.random.default_rng(k)
    lr, qt = rng.uniform(0, 20, 40), rng.uniform(0, 60, 40)
    fast = ri.clr_p_values(lr, qt, k)
    slow = np.array([ri.clr_p_value(a, b, k) for a, b in zip(lr, qt, strict=True)])
    assert fast == pytest.approx(slow, abs=1e-6)  # the scalar quad's own default tolerance is 1.5e-8 absolute
