"""Absorbed fixed effects: residuals equal dummy-variable regressions; absorbed degrees of freedom are counted right."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import EstimationError
from ivdossier.estimation import estimate
from ivdossier.estimation.absorb import absorbed_df, bipartite_components, demean, partial_out

linearmodels_iv = pytest.importorskip("linearmodels.iv")


def dummies(codes: np.ndarray) -> np.ndarray:
    return np.eye(int(codes.max()) + 1)[codes]


def dummy_residuals(target: np.ndarray, design: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
    """Residuals of (weighted) least squares on an explicit design, via numpy lstsq (the reference)."""
    sw = np.ones(len(target)) if w is None else np.sqrt(w)
    coef, *_ = np.linalg.lstsq(design * sw[:, None], target * sw[:, None], rcond=None)
    return (target - design @ coef) * sw[:, None]


@pytest.fixture(scope="module")
def panel():
    rng = np.random.default_rng(11)
    n = 800
    a = rng.integers(0, 40, n)
    b = rng.integers(0, 12, n)
    x = rng.normal(size=(n, 3)) + rng.normal(size=40)[a][:, None] + rng.normal(size=12)[b][:, None]
    c = rng.normal(size=(n, 2))
    w = rng.uniform(0.2, 3.0, n)
    return a, b, x, c, w


def test_one_fixed_effect_equals_dummy_regression_weighted(panel):
    a, _, x, c, w = panel
    res = partial_out(x, controls=c, fe_codes=[a], weights=w)
    # source: numpy lstsq on [dummies(a), controls] with sqrt(w) scaling (direct weighted least squares)
    ref = dummy_residuals(x, np.column_stack([dummies(a), c]), w)
    np.testing.assert_allclose(res.columns, ref, atol=1e-10)
    assert res.n_absorbed == 40 and res.n_partialled == 42 and res.iterations == 1


def test_two_fixed_effects_equal_dummy_regression(panel):
    a, b, x, c, _ = panel
    res = partial_out(x, controls=c, fe_codes=[a, b])
    # source: numpy lstsq on [dummies(a), dummies(b), controls]
    ref = dummy_residuals(x, np.column_stack([dummies(a), dummies(b), c]))
    np.testing.assert_allclose(res.columns, ref, atol=1e-8)
    # source: numpy matrix_rank of the two dummy blocks = absorbed degrees of freedom (connected: 40 + 12 - 1)
    assert res.n_absorbed == np.linalg.matrix_rank(np.column_stack([dummies(a), dummies(b)])) == 51


def test_disconnected_fixed_effects_subtract_each_component():
    # two separate worlds: levels of a in {0,1} only meet levels of b in {0,1}; a in {2,3} only meet b in {2,3}
    a = np.array([0, 0, 1, 1, 2, 2, 3, 3, 0, 3])
    b = np.array([0, 1, 0, 1, 2, 3, 2, 3, 1, 2])
    assert bipartite_components(a, b) == 2
    df, nested = absorbed_df([a, b])
    # source: numpy matrix_rank of the dummy matrix [D_a, D_b]
    assert df == np.linalg.matrix_rank(np.column_stack([dummies(a), dummies(b)])) == 6
    assert nested == 0


def test_three_fixed_effects_count_is_conservative():
    rng = np.random.default_rng(3)
    codes = [rng.integers(0, k, 300) for k in (15, 6, 4)]
    df, _ = absorbed_df(codes)
    rank = np.linalg.matrix_rank(np.column_stack([dummies(c) for c in codes]))
    # stated rule: L1 + sum_j (Lj - components(1, j)) is an upper bound on the true rank (numpy matrix_rank)
    assert df >= rank
    assert df == 15 + (6 - 1) + (4 - 1)


def test_alternating_projections_report_non_convergence(panel):
    a, b, x, _, _ = panel
    with pytest.raises(EstimationError, match=r"did not converge within 2 sweeps"):
        demean(x.copy(), [a, b], max_iter=2)


def test_nested_fixed_effect_counted_and_left_out_of_cluster_factor():
    rng = np.random.default_rng(5)
    n, g = 1200, 30
    school = rng.integers(0, g, n)
    classroom = school * 4 + rng.integers(0, 4, n)  # 120 classrooms, each inside one school
    z = rng.normal(size=n)
    u = rng.normal(size=n) + rng.normal(size=g)[school]
    x = z + rng.normal(size=120)[classroom] + 0.5 * u + rng.normal(size=n)
    y = 0.7 * x + rng.normal(size=120)[classroom] + u
    df = pd.DataFrame({"y": y, "x": x, "z": z, "school": school, "classroom": classroom})
    ours = estimate(
        df,
        outcome="y",
        treatment="x",
        instruments="z",
        absorb="classroom",
        cluster="school",
        vcov="clustered",
    )
    assert ours.n_absorbed == 120 and ours.n_absorbed_nested == 120
    exog = pd.get_dummies(df["classroom"], prefix="c", dtype=float)
    ref = linearmodels_iv.IV2SLS(df["y"], exog, df["x"], df["z"]).fit(
        cov_type="clustered", clusters=df["school"].to_numpy(), debiased=True
    )
    # source: linearmodels IV2SLS with classroom dummies (coefficient identical); its cluster factor counts the 120
    # dummies, ours does not because they are nested in the clusters, so the variances differ by exactly
    # (n - 1 - 120) / (n - 1 - 0) in the (n - 1)/(n - k - p) factor (k = 1; p = 120 vs p_c = 0).
    assert ours.coef_of("x") == pytest.approx(float(ref.params["x"]), rel=1e-9)
    ratio = (n - 1 - 120) / (n - 1)
    assert ours.se_of("x") ** 2 == pytest.approx(float(ref.std_errors["x"]) ** 2 * ratio, rel=1e-9)


def test_fixed_effect_not_nested_keeps_full_count():
    rng = np.random.default_rng(9)
    n = 500
    df = pd.DataFrame({"g": rng.integers(0, 20, n), "c": rng.integers(0, 10, n)})
    # g is crossed with c, so none of its levels is nested in a cluster
    total, nested = absorbed_df([df["g"].to_numpy()], [df["c"].to_numpy()])
    assert (total, nested) == (20, 0)
