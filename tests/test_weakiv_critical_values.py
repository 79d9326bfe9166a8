"""Critical-value tables and functions: Stock–Yogo cells, the tF function, MOP effective-F critical values."""

from __future__ import annotations

import math

import numpy as np
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation import critical_values as cv

# Stock and Yogo (2005), Table 5.2, one endogenous regressor (values as in REFERENCE_VALUES.md).
SY_2SLS_SIZE = {
    1: (16.38, 8.96, 6.66, 5.53),
    2: (19.93, 11.59, 8.75, 7.25),
    3: (22.30, 12.83, 9.54, 7.80),
    4: (24.58, 13.96, 10.26, 8.31),
    5: (26.87, 15.09, 10.98, 8.84),
}
# Stock and Yogo (2005), Table 5.1, one endogenous regressor (REFERENCE_VALUES.md).
SY_2SLS_BIAS = {3: (13.91, 9.08, 6.46, 5.39), 4: (16.85, 10.27, 6.71, 5.34), 5: (18.37, 10.83, 6.77, 5.25)}
# Stock and Yogo (2005), Table 5.4, one endogenous regressor (REFERENCE_VALUES.md).
SY_LIML_SIZE = {1: (16.38, 8.96, 6.66, 5.53), 2: (8.68, 5.33, 4.42, 3.92), 3: (6.46, 4.36, 3.69, 3.32)}


@pytest.mark.parametrize("k2", sorted(SY_2SLS_SIZE))
def test_stock_yogo_2sls_size_cells_match_published_table(k2: int) -> None:
    for level, expected in zip((0.10, 0.15, 0.20, 0.25), SY_2SLS_SIZE[k2], strict=True):
        got = cv.stock_yogo_critical_value(estimator="2sls", criterion="size", n_endog=1, k2=k2, level=level)
        assert got.critical_value == expected  # Stock and Yogo (2005) Table 5.2
        assert got.table.startswith("Table 5.2")


@pytest.mark.parametrize("k2", sorted(SY_2SLS_BIAS))
def test_stock_yogo_2sls_bias_cells_match_published_table(k2: int) -> None:
    for level, expected in zip((0.05, 0.10, 0.20, 0.30), SY_2SLS_BIAS[k2], strict=True):
        got = cv.stock_yogo_critical_value(
            estimator="2sls", criterion="relative_bias", n_endog=1, k2=k2, level=level
        )
        assert got.critical_value == expected  # Stock and Yogo (2005) Table 5.1


@pytest.mark.parametrize("k2", sorted(SY_LIML_SIZE))
def test_stock_yogo_liml_size_cells_match_published_table(k2: int) -> None:
    for level, expected in zip((0.10, 0.15, 0.20, 0.25), SY_LIML_SIZE[k2], strict=True):
        got = cv.stock_yogo_critical_value(estimator="liml", criterion="size", n_endog=1, k2=k2, level=level)
        assert got.critical_value == expected  # Stock and Yogo (2005) Table 5.4


def test_stock_yogo_cells_not_carried_are_reported_not_available_with_a_reason() -> None:
    bias_k2_two = cv.stock_yogo_critical_value(
        estimator="2sls", criterion="relative_bias", n_endog=1, k2=2, level=0.10
    )
    assert bias_k2_two.critical_value is None
    assert bias_k2_two.reason is not None and "K2 >= n_endog + 2" in bias_k2_two.reason
    many = cv.stock_yogo_critical_value(estimator="2sls", criterion="size", n_endog=2, k2=7, level=0.10)
    assert many.critical_value is None and many.reason is not None and "not carried" in many.reason
    fuller = cv.stock_yogo_applicable(method="fuller", n_endog=1, k2=3)
    assert all(v.critical_value is None for v in fuller)


def test_stock_yogo_applicable_picks_tables_by_method() -> None:
    tsls = cv.stock_yogo_applicable(method="2SLS", n_endog=1, k2=3)
    assert {v.table[:9] for v in tsls} == {"Table 5.1", "Table 5.2"}
    liml = cv.stock_yogo_applicable(method="liml", n_endog=1, k2=2)
    assert [v.critical_value for v in liml] == [8.68, 5.33, 4.42, 3.92]  # Stock and Yogo (2005) Table 5.4
    assert liml[0].to_dict()["source"].startswith("Stock and Yogo (2005)")


def test_stock_yogo_rejects_unknown_estimator_and_level() -> None:
    with pytest.raises(InvalidInputError, match="Unknown estimator 'ols'"):
        cv.stock_yogo_applicable(method="ols", n_endog=1, k2=1)
    with pytest.raises(InvalidInputError, match="tabulated at levels"):
        cv.stock_yogo_critical_value(estimator="2sls", criterion="size", n_endog=1, k2=1, level=0.05)


# Lee, McCrary, Moreira and Porter (2022), Table 3 subset (REFERENCE_VALUES.md).
TF_ROWS = [
    (4.00, 18.66), (4.41, 9.74), (4.84, 7.37), (5.29, 6.18), (5.76, 5.43), (6.25, 4.92),
    (6.76, 4.54), (7.29, 4.25), (7.84, 4.01), (8.41, 3.82), (9.00, 3.65), (9.61, 3.51),
    (10.24, 3.39), (12.25, 3.11), (16.00, 2.80), (20.25, 2.60), (25.00, 2.46), (30.25, 2.35),
    (36.00, 2.27), (49.00, 2.16), (64.00, 2.08), (81.00, 2.02), (100.00, 1.97), (106.09, 1.96),
]  # fmt: skip


@pytest.mark.parametrize(("f", "expected"), TF_ROWS)
def test_tf_grid_rows_match_published_table(f: float, expected: float) -> None:
    assert cv.tf_critical_value(f) == pytest.approx(expected, abs=1e-12)  # LMMP (2022) Table 3


def test_tf_headline_values() -> None:
    # LMMP (2022) abstract/introduction: at F = 10 the 5 % critical value is 3.43, and 1.96 needs F > 104.7.
    assert cv.tf_critical_value(10.0) == pytest.approx(3.43, abs=0.01)
    assert cv.tf_critical_value(104.67) == 1.96
    assert cv.tf_critical_value(1e6) == 1.96
    assert cv.tf_critical_value(104.0) > 1.96


def test_tf_is_unbounded_below_four_and_monotone_above() -> None:
    # LMMP (2022): below F = 4 the tF interval is the whole line.
    assert math.isinf(cv.tf_critical_value(3.999))
    f_values = np.linspace(4.0, 120.0, 2000)
    c_values = np.array([cv.tf_critical_value(float(f)) for f in f_values])
    assert np.all(np.diff(c_values) <= 1e-12)
    assert c_values[0] == pytest.approx(18.66)


def test_tf_interpolates_linearly_in_sqrt_f() -> None:
    # Midpoint in sqrt(F) between the 16.00 and 20.25 rows (sqrt 4.0 and 4.5) is sqrt(F) = 4.25.
    assert cv.tf_critical_value(4.25**2) == pytest.approx((2.80 + 2.60) / 2, abs=1e-12)


@pytest.mark.parametrize(
    ("tau", "expected", "tol"),
    [(0.05, 37.418, 5e-4), (0.10, 23.109, 5e-4), (0.20, 15.062, 5e-4), (0.30, 12.045, 5e-4)],
)
def test_mop_just_identified_critical_values(tau: float, expected: float, tol: float) -> None:
    # Montiel Olea and Pflueger (2013) simplified procedure, values computed from the formula in
    # REFERENCE_VALUES.md; for tau = 30 % the x = 10/3 value 12.045 (12.039 with x = 3.33).
    k_eff = cv.mop_k_eff(np.array([[3.7]]), tau)
    assert k_eff == pytest.approx(1.0)
    assert cv.mop_critical_value(k_eff, tau) == pytest.approx(expected, abs=tol)


def test_mop_k_eff_equals_k_for_spherical_moments_and_is_scale_free() -> None:
    # With S proportional to the identity, K_eff = (1 + 2x) k^2 / (k + 2 x k) = k (formula in MOP 2013).
    assert cv.mop_k_eff(np.eye(4) * 2.5, 0.1) == pytest.approx(4.0)
    s = np.array([[2.0, 0.3, 0.1], [0.3, 1.0, 0.2], [0.1, 0.2, 0.5]])
    assert cv.mop_k_eff(s, 0.1) == pytest.approx(cv.mop_k_eff(17 * s, 0.1))
    assert 1.0 <= cv.mop_k_eff(s, 0.1) <= 3.0


def test_mop_rejects_bad_tau() -> None:
    with pytest.raises(InvalidInputError, match="tau must lie in"):
        cv.mop_k_eff(np.eye(2), 1.5)
