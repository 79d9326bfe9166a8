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
    # rcond: partialled dummies are rank deficient (singular values ~1e-16), which pinv's default keeps
    m_w = np.eye(n) - w @ np.linalg.pinv(w, rcond=1e-10)
    zt = m_w @ z
    p = zt @ np.linalg.pinv(zt, rcond=1e-10)
    k = round(float(np.trace(p)))
    np.testing.assert_allclose(p @ p, p, atol=1e-10)  # a projection: idempotent, trace K
    assert abs(np.trace(p) - k) < 1e-9
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
    res = jackknife_anderson_rubin(
        y, x, z, w, beta0=0.0, max_shift=np.inf
    )  # small n: checks the formula only
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


def _dummies(codes: np.ndarray) -> np.ndarray:
    return pd.get_dummies(codes).to_numpy(float)


@pytest.mark.parametrize("nested", [True, False])
def test_decision_maker_test_partials_controls_and_cells_as_the_explicit_matrices_do(nested: bool) -> None:
    # Controls are partialled out of y, x and the dummies before the statistic (Mikusheva and Sun 2022 treat a fixed
    # number of covariates this way); checked against explicit n x n P and M matrices and a double loop.
    df = clerk_data(n=120, n_dm=12, n_cells=3, seed=5)
    rng = np.random.default_rng(8)
    df["age"] = rng.normal(50, 10, len(df))
    df["frail"] = rng.uniform(size=len(df))
    if not nested:
        df["cell"] = rng.integers(0, 3, len(df))  # clerks now work in several cells
    res = decision_maker_anderson_rubin(
        df, outcome="visits", treatment="video", decision_maker="clerk", absorb="cell", controls=("age", "frail"),
        beta0=-0.3, max_shift=np.inf,  # small n: checks the formula only
    )  # fmt: skip
    w = np.column_stack([np.ones(len(df)), _dummies(df["cell"].to_numpy()), df[["age", "frail"]].to_numpy()])
    ar, f = brute_force(
        df["visits"].to_numpy(), df["video"].to_numpy(), _dummies(df["clerk"].to_numpy()), w, -0.3
    )
    assert res.applicable and res.path == "dense"
    assert res.statistic == pytest.approx(ar, rel=1e-9)  # explicit M_W, P, M; double loop over i != j
    assert res.strength == pytest.approx(f, rel=1e-9)
    # K = rank of the partialled dummies: 12 clerks less the 3 cells they are nested in, or less one when crossed
    assert res.n_instruments == (12 - 3 if nested else 12 - 1)


def test_crossed_cells_without_controls_use_the_dense_path_too() -> None:
    df = clerk_data(n=100, n_dm=8, seed=9)
    df["cell"] = np.random.default_rng(2).integers(0, 3, len(df))
    res = decision_maker_anderson_rubin(
        df,
        outcome="visits",
        treatment="video",
        decision_maker="clerk",
        absorb="cell",
        beta0=0.1,
        max_shift=np.inf,
    )
    w = np.column_stack([np.ones(len(df)), _dummies(df["cell"].to_numpy())])
    ar, _ = brute_force(
        df["visits"].to_numpy(), df["video"].to_numpy(), _dummies(df["clerk"].to_numpy()), w, 0.1
    )
    assert res.path == "dense"
    assert res.statistic == pytest.approx(ar, rel=1e-9)  # explicit matrices, double loop


def test_controls_beyond_the_dense_limit_are_not_applicable_with_the_fix_named() -> None:
    df = clerk_data(n=120, n_dm=12, n_cells=3)
    df["age"] = np.arange(len(df), dtype=float)
    res = decision_maker_anderson_rubin(
        df,
        outcome="visits",
        treatment="video",
        decision_maker="clerk",
        absorb="cell",
        controls="age",
        max_n=100,
    )
    assert not res.applicable
    assert "controls ['age']" in (res.reason or "") and "absorb the controls as cells" in (res.reason or "")
    df["site"] = "a"
    with pytest.raises(InvalidInputError, match=r"Column 'site' must be numeric"):
        decision_maker_anderson_rubin(
            df, outcome="visits", treatment="video", decision_maker="clerk", controls="site"
        )


def test_design_run_passes_its_controls_to_the_jackknife_test() -> None:
    from ivdossier.estimation.design_results import decision_maker_design

    df = clerk_data(n=400, n_dm=16, n_cells=4, seed=3)
    df["age"] = np.random.default_rng(1).normal(50, 10, len(df))
    res, _ = decision_maker_design(
        df, outcome="visits", treatment="video", decision_maker="clerk", absorb="cell", controls=("age",),
        min_cases=2, beta0=0.2,
    )  # fmt: skip
    w = np.column_stack([np.ones(len(df)), _dummies(df["cell"].to_numpy()), df[["age"]].to_numpy()])
    ar, _ = brute_force(
        df["visits"].to_numpy(), df["video"].to_numpy(), _dummies(df["clerk"].to_numpy()), w, 0.2
    )
    assert res.anderson_rubin.statistic == pytest.approx(ar, rel=1e-9)  # explicit matrices with the control
    without, _ = decision_maker_design(
        df, outcome="visits", treatment="video", decision_maker="clerk", absorb="cell", min_cases=2, beta0=0.2
    )
    assert without.anderson_rubin.path == "grouped"
    assert without.anderson_rubin.statistic != pytest.approx(
        ar, rel=1e-6
    )  # the control changes the statistic


def test_centring_shift_from_partialling_is_the_explicit_trace() -> None:
    # Exact identity: with e = M_W u, u independent with variance 1, E[sum_{i != j} P_ij e_i e_j] =
    # tr(M_W (P - diag P) M_W) = sum_i P_ii (P_W)_ii; the shift divides it by sqrt(2 sum_{i != j} P_ij^2).
    from ivdossier.estimation.many_instruments import _dense_pieces, _grouped_pieces, _partial

    df = clerk_data(n=90, n_dm=15, n_cells=5, seed=4)
    n = len(df)
    d, c = _dummies(df["clerk"].to_numpy()), _dummies(df["cell"].to_numpy())
    w = np.column_stack([np.ones(n), c])
    m_w = np.eye(n) - w @ np.linalg.pinv(w, rcond=1e-10)
    zt = m_w @ d
    p = zt @ np.linalg.pinv(zt, rcond=1e-10)
    b = m_w @ (p - np.diag(np.diag(p))) @ m_w
    off = p - np.diag(np.diag(p))
    expected = np.trace(b) / np.sqrt(2.0 * np.sum(off**2))
    assert np.trace(b) == pytest.approx(np.sum(np.diag(p) * np.diag(np.eye(n) - m_w)), rel=1e-10)
    parts, pw_diag = _partial(c[:, 1:], n, df["visits"].to_numpy(), df["video"].to_numpy(), *d.T)
    dense = _dense_pieces(parts[0], parts[1], np.column_stack(parts[2:]), pw_diag)
    cells = pd.factorize(df["cell"])[0]
    grouped = _grouped_pieces(parts[0], parts[1], pd.factorize(df["clerk"])[0], cells)
    assert dense.shift == pytest.approx(expected, rel=1e-9)  # explicit matrices
    assert grouped.shift == pytest.approx(expected, rel=1e-9)


def test_many_small_cells_make_the_test_not_applicable() -> None:
    # 40 cells of 2 clerks with 5 cases each: partialling the cells shifts the numerator by sum_i P_ii (P_W)_ii =
    # sum_c K_c / n_c = 40 / 10 = 4 over sqrt(2 (K - sum_i P_ii^2)) = sqrt(2 (40 - 400 / 100)): 0.47 standard
    # deviations (benchmarks/sim_jackknife_ar_many_cells.py shows the over-rejection this causes)
    rng = np.random.default_rng(0)
    dm = np.repeat(np.arange(80), 5)
    df = pd.DataFrame(
        {"clerk": dm, "cell": dm // 2, "video": rng.normal(size=400), "visits": rng.normal(size=400)}
    )
    res = decision_maker_anderson_rubin(
        df, outcome="visits", treatment="video", decision_maker="clerk", absorb="cell"
    )
    assert not res.applicable and res.n_instruments == 40
    assert "'cell' cells" in (res.reason or "") and "0.47 of its standard deviation" in (res.reason or "")
    assert "coarser cells" in (res.reason or "")
    one_cell = decision_maker_anderson_rubin(df, outcome="visits", treatment="video", decision_maker="clerk")
    assert one_cell.applicable  # the intercept alone: shift K / n / sqrt(2 K), about 0.02
