"""Jackknife Anderson-Rubin test (Mikusheva and Sun 2022) against its definition written with explicit matrices."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.many_instruments import decision_maker_anderson_rubin, jackknife_anderson_rubin


def clerk_data(
    n: int = 150, n_dm: int = 10, n_cells: int = 1, effect: float = -0.5, seed: int = 11
) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    dm = rng.integers(0, n_dm, n)
    cell = dm % n_cells
    u = rng.normal(size=n)
    x = np.linspace(-0.5, 0.5, n_dm)[dm] + 0.3 * cell + u + rng.normal(size=n)
    y = effect * x + 0.5 * cell + u * np.abs(rng.normal(size=n)) + rng.normal(size=n)
    return pd.DataFrame({"clerk": dm, "cell": cell, "video": x, "visits": y})


def brute_force(y: np.ndarray, x: np.ndarray, z: np.ndarray, w: np.ndarray, b: float) -> tuple[float, float]:
    """Mikusheva and Sun (2022) AR(b) and F~ with explicit n x n matrices and double loops over i != j."""
    n = y.size
    m_w = np.eye(n) - w @ np.linalg.pinv(w)
    zt = m_w @ z
    p = zt @ np.linalg.pinv(zt)
    k = round(float(np.trace(p)))
    m = np.eye(n) - p

    def stat(v: np.ndarray) -> float:
        v = m_w @ v
        mv = m @ v
        num, phi = 0.0, 0.0
        for i in range(n):
            for j in range(n):
                if i != j:
                    num += p[i, j] * v[i] * v[j]
                    phi += p[i, j] ** 2 / (m[i, i] * m[j, j] + m[i, j] ** 2) * v[i] * mv[i] * v[j] * mv[j]
        return num / np.sqrt(k * (2.0 / k) * phi)

    return stat(y - b * x), stat(x)


def test_statistic_and_strength_match_the_definition_with_explicit_matrices() -> None:
    df = clerk_data(n=90, n_dm=9)
    z = pd.get_dummies(df["clerk"]).to_numpy(float)[:, 1:]
    w = np.ones((len(df), 1))
    res = jackknife_anderson_rubin(df["visits"], df["video"], z, beta0=0.2)
    ar, f = brute_force(df["visits"].to_numpy(), df["video"].to_numpy(), z, w, 0.2)
    assert res.statistic == pytest.approx(ar, rel=1e-9)  # Mikusheva and Sun (2022) definition, double loop
    assert res.strength == pytest.approx(f, rel=1e-9)  # their F~, double loop
    # one-sided normal p-value (the paper's rejection rule as recalled; not verified against stored text)
    assert res.p_value == pytest.approx(stats.norm.sf(ar), rel=1e-9)


def test_controls_are_partialled_before_the_statistic() -> None:
    rng = np.random.default_rng(4)
    n, k = 80, 6
    z = rng.normal(size=(n, k))
    w = rng.normal(size=(n, 2))
    x = z @ rng.normal(size=k) * 0.3 + w[:, 0] + rng.normal(size=n)
    y = 0.4 * x + w[:, 1] + rng.normal(size=n)
    res = jackknife_anderson_rubin(y, x, z, w, beta0=0.0)
    ar, f = brute_force(y, x, z, np.column_stack([np.ones(n), w]), 0.0)
    assert res.statistic == pytest.approx(ar, rel=1e-9)  # explicit partialling, then the definition
    assert res.strength == pytest.approx(f, rel=1e-9)


@pytest.mark.parametrize("n_cells", [1, 3])
def test_grouped_path_equals_the_dense_path(n_cells: int) -> None:
    df = clerk_data(n=240, n_dm=12, n_cells=n_cells)
    grouped = decision_maker_anderson_rubin(
        df,
        outcome="visits",
        treatment="video",
        decision_maker="clerk",
        absorb="cell" if n_cells > 1 else None,
        beta0=-0.1,
    )
    z = pd.get_dummies(df["clerk"]).to_numpy(float)
    w = pd.get_dummies(df["cell"]).to_numpy(float)[:, 1:] if n_cells > 1 else None
    dense = jackknife_anderson_rubin(df["visits"], df["video"], z, w, beta0=-0.1)
    assert grouped.path == "grouped" and dense.path == "dense"
    assert grouped.n_instruments == dense.n_instruments == 12 - n_cells
    assert grouped.statistic == pytest.approx(dense.statistic, rel=1e-9)  # two exact routes to one number
    assert grouped.strength == pytest.approx(dense.strength, rel=1e-9)
    for a, b in zip(grouped.confidence_set, dense.confidence_set, strict=True):
        assert a == pytest.approx(b, rel=1e-7)


def test_confidence_set_is_the_set_of_values_the_test_accepts() -> None:
    df = clerk_data(n=200, n_dm=10, effect=-0.5)
    z = pd.get_dummies(df["clerk"]).to_numpy(float)
    res = jackknife_anderson_rubin(df["visits"], df["video"], z)
    crit = stats.norm.ppf(0.95)
    grid = np.linspace(-6, 6, 241)
    inside = np.array([any(lo <= b <= hi for lo, hi in res.confidence_set) for b in grid])
    accepted = np.array(
        [jackknife_anderson_rubin(df["visits"], df["video"], z, beta0=b).statistic <= crit for b in grid]
    )
    np.testing.assert_array_equal(inside, accepted)  # test inversion, checked point by point
    for lo, hi in res.confidence_set:
        for edge in (lo, hi):
            if np.isfinite(edge):
                stat = jackknife_anderson_rubin(df["visits"], df["video"], z, beta0=edge).statistic
                assert stat == pytest.approx(
                    crit, rel=1e-6
                )  # a boundary is where AR equals the critical value


def test_statistic_tends_to_the_strength_measure_far_from_the_estimate() -> None:
    df = clerk_data(n=100, n_dm=10)
    z = pd.get_dummies(df["clerk"]).to_numpy(float)
    far = jackknife_anderson_rubin(df["visits"], df["video"], z, beta0=1e7)
    assert far.statistic == pytest.approx(far.strength, rel=1e-5)  # algebra: e/b -> -x as b grows
    unbounded = far.strength <= stats.norm.ppf(0.95)
    assert unbounded == (not far.bounded)  # the set is unbounded exactly when F~ is below the critical value


def test_too_large_dense_problem_is_not_applicable_and_bad_input_is_named() -> None:
    df = clerk_data(n=60, n_dm=5)
    z = pd.get_dummies(df["clerk"]).to_numpy(float)
    res = jackknife_anderson_rubin(df["visits"], df["video"], z, max_n=50)
    assert not res.applicable and "dense limit" in (res.reason or "")
    assert "not applicable" in str(res)
    json.dumps(res.to_dict())
    df.loc[len(df)] = {"clerk": 99, "cell": 0, "video": 0.0, "visits": 0.0}
    with pytest.raises(
        InvalidInputError, match=r"Decision-maker\(s\) \['99'\] in 'clerk' have a single case"
    ):
        decision_maker_anderson_rubin(df, outcome="visits", treatment="video", decision_maker="clerk")


def test_result_prints_with_the_caution() -> None:
    df = clerk_data()
    res = decision_maker_anderson_rubin(df, outcome="visits", treatment="video", decision_maker="clerk")
    text = str(res)
    assert "confidence set" in text and "cannot establish" in text
    json.dumps(res.to_dict())
