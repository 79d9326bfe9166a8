"""The pure-Python quantiles used where stored numbers are read agree with scipy.stats (reference library,
test-only) to the relative accuracy stated for each; identities are checked exactly where they hold."""

from __future__ import annotations

import itertools
import math

import pytest
from scipy import stats

from ivdossier.estimation import light_quantiles as lq

LEVELS = (0.5, 0.9, 0.95, 0.975, 0.99, 0.995, 0.999)


def _rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b)


def test_normal_and_chi2_one() -> None:
    for q in (1e-9, 0.005, 0.025, *LEVELS[1:], 1 - 1e-9):
        assert _rel(lq.norm_ppf(q), float(stats.norm.ppf(q))) <= 1e-15
    assert lq.norm_ppf(0.5) == 0.0
    for q in LEVELS:  # critical values: q from 0.5 up
        assert _rel(lq.chi2_1_ppf(q), float(stats.chi2.ppf(q, 1))) <= 1e-14


@pytest.mark.parametrize("d", [1, 2, 3, 7, 17, 30, 120, 499, 4198, 100_000])
def test_f_with_one_numerator_degree(d: float) -> None:
    # agreement measured when written: <= 1e-13 up to d = 4198, <= 1e-12 at d = 1e5 (both sides are iterative
    # approximations, so which one holds the last digits at large d is not decided here)
    bound = 1e-13 if d <= 5000 else 1e-12
    for q in LEVELS:
        assert _rel(lq.f_1_ppf(q, d), float(stats.f.ppf(q, 1, d))) <= bound, q


def test_f_one_is_a_squared_t() -> None:
    # identity F(1, d) = t_d^2 checked against scipy's t quantile (a different scipy routine than fdtri)
    for q, d in itertools.product((0.95, 0.99), (5, 40, 300)):
        t = float(stats.t.ppf((1 + q) / 2, d))
        assert _rel(lq.f_1_ppf(q, d), t * t) <= 1e-13


def test_noncentral_chi2_one() -> None:
    for q, nc in itertools.product((0.05, 0.5, 0.9, 0.95, 0.99), (0.3, 1.0, 10 / 3, 5.0, 10.0, 20.0, 100.0)):
        assert _rel(lq.ncx2_1_ppf(q, nc), float(stats.ncx2.ppf(q, 1, nc))) <= 1e-13
    assert _rel(lq.ncx2_1_ppf(0.95, 0.0), float(stats.chi2.ppf(0.95, 1))) <= 1e-14


def test_simplified_effective_f_critical_values_with_one_instrument() -> None:
    # Montiel Olea-Pflueger simplified critical values for K_eff = 1 at 5 %, tau = 5/10/20/30 %: about 37.4,
    # 23.1, 15.1 and 12.0 (recalled from memory, common practice); here against the scipy-based function
    from ivdossier.estimation.critical_values import mop_critical_value

    for tau, rounded in ((0.05, 37.418), (0.10, 23.109), (0.20, 15.062), (0.30, 12.045)):
        value = lq.ncx2_1_ppf(0.95, 1 / tau)
        assert _rel(value, mop_critical_value(1.0, tau)) <= 1e-13
        assert round(value, 3) == rounded


def test_bad_arguments_are_refused() -> None:
    with pytest.raises(ValueError, match="need 0 < q < 1"):
        lq.f_1_ppf(1.0, 3)
    with pytest.raises(ValueError, match="need 0 < q < 1"):
        lq.ncx2_1_ppf(0.5, -1.0)
    assert math.isfinite(lq.f_1_ppf(0.999, 1))
