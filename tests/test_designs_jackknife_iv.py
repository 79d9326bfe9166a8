"""JIVE1 and UJIVE (Kolesár 2013 definitions) against explicit hat matrices, brute-force loops and 2SLS identities."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from linearmodels.iv import IV2SLS

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.jackknife_iv import decision_maker_jackknife_iv, jackknife_iv


def judge_data(n: int = 300, n_dm: int = 15, n_cells: int = 1, seed: int = 5) -> pd.DataFrame:
    """Invented clerk assignment: clerks work within one scheduling cell; video uptake depends on the clerk."""
    rng = np.random.default_rng(seed)
    dm = rng.integers(0, n_dm, n)
    cell = dm % n_cells
    u = rng.normal(size=n)
    rate = np.linspace(0.15, 0.85, n_dm)[dm] + 0.05 * cell
    x = (rng.uniform(size=n) + 0.2 * u < rate).astype(float)
    y = 1.0 - 0.7 * x + 0.3 * cell + u + rng.normal(size=n)
    return pd.DataFrame({"clerk": dm, "cell": cell, "video": x, "visits": y, "age": rng.normal(size=n)})


def hat(a: np.ndarray) -> np.ndarray:
    """Projection onto the column space of a (pseudo-inverse, so redundant columns are harmless)."""
    return a @ np.linalg.pinv(a)


def closed_forms(y: np.ndarray, x: np.ndarray, z: np.ndarray, w: np.ndarray) -> dict[str, float]:
    """Kolesár (2013) definitions written with explicit n x n hat matrices (small data only)."""
    n = y.size
    h_a, h_w = hat(np.column_stack([w, z])), hat(w)
    d_a, d_w = np.diag(np.diag(h_a)), np.diag(np.diag(h_w))
    eye = np.eye(n)
    x_jive = np.linalg.inv(eye - d_a) @ (h_a - d_a) @ x
    m_w = eye - h_w
    g = np.linalg.inv(eye - d_a) @ (h_a - d_a) - np.linalg.inv(eye - d_w) @ (h_w - d_w)
    x_ujive = g @ x
    return {
        "jive1": float(x_jive @ m_w @ y / (x_jive @ m_w @ x)),
        "ujive": float(x_ujive @ y / (x_ujive @ x)),
    }


def test_jive1_and_ujive_match_their_closed_forms_with_explicit_hat_matrices() -> None:
    df = judge_data(n=160, n_dm=8)
    z = pd.get_dummies(df["clerk"]).to_numpy(float)[:, 1:]
    w = np.column_stack([np.ones(len(df)), df["age"].to_numpy()])
    res = jackknife_iv(df["visits"], df["video"], z, df[["age"]].to_numpy())
    ref = closed_forms(df["visits"].to_numpy(), df["video"].to_numpy(), z, w)
    assert res.get("jive1").estimate == pytest.approx(
        ref["jive1"], rel=1e-10
    )  # Kolesár (2013) JIVE1, explicit H
    assert res.get("ujive").estimate == pytest.approx(
        ref["ujive"], rel=1e-10
    )  # Kolesár (2013) UJIVE, explicit H


def test_two_sls_estimate_and_robust_error_match_linearmodels() -> None:
    df = judge_data(n=200, n_dm=10)
    z = pd.get_dummies(df["clerk"], prefix="c").astype(float).iloc[:, 1:]
    res = jackknife_iv(df["visits"], df["video"], z.to_numpy(), df[["age"]].to_numpy())
    exog = pd.DataFrame({"const": 1.0, "age": df["age"]})
    ref = IV2SLS(df["visits"], exog, df["video"], z).fit(cov_type="robust", debiased=False)
    tsls = res.get("2sls")
    assert tsls.estimate == pytest.approx(ref.params["video"], rel=1e-10)  # reference library: linearmodels
    assert tsls.std_error == pytest.approx(ref.std_errors["video"], rel=1e-8)  # linearmodels HC0


def test_with_decision_maker_dummies_jive1_is_iv_with_the_leave_one_out_rate() -> None:
    df = judge_data(n=120, n_dm=6)
    y, x, dm = df["visits"].to_numpy(), df["video"].to_numpy(), df["clerk"].to_numpy()
    idx = np.arange(x.size)
    loo_dm = np.array([x[(dm == dm[i]) & (idx != i)].mean() for i in idx])  # brute-force loop
    loo_all = np.array([x[idx != i].mean() for i in idx])
    res = decision_maker_jackknife_iv(df, outcome="visits", treatment="video", decision_maker="clerk")
    # Angrist, Imbens and Krueger (1999): JIVE1 = just-identified IV (with intercept) on the leave-one-out fit
    zc = loo_dm - loo_dm.mean()
    assert res.get("jive1").estimate == pytest.approx(float(zc @ y / (zc @ x)), rel=1e-10)
    # Kolesár (2013): UJIVE's instrument is the difference of the two leave-one-out predictions (no intercept)
    q = loo_dm - loo_all
    assert res.get("ujive").estimate == pytest.approx(float(q @ y / (q @ x)), rel=1e-10)


def test_with_two_decision_makers_two_sls_is_the_wald_estimator() -> None:
    df = judge_data(n=150, n_dm=2)
    res = decision_maker_jackknife_iv(df, outcome="visits", treatment="video", decision_maker="clerk")
    g = df.groupby("clerk")[["visits", "video"]].mean()
    wald = (g.loc[1, "visits"] - g.loc[0, "visits"]) / (g.loc[1, "video"] - g.loc[0, "video"])
    assert res.get("2sls").estimate == pytest.approx(wald, rel=1e-10)  # Wald (1940) grouping estimator, exact


def test_grouped_path_equals_the_dense_path_with_nested_cells() -> None:
    df = judge_data(n=240, n_dm=12, n_cells=3)
    grouped = decision_maker_jackknife_iv(
        df, outcome="visits", treatment="video", decision_maker="clerk", absorb="cell"
    )
    z = pd.get_dummies(df["clerk"]).to_numpy(float)
    w = pd.get_dummies(df["cell"]).to_numpy(float)[:, 1:]
    dense = jackknife_iv(df["visits"], df["video"], z, w)
    assert grouped.path == "grouped" and dense.path == "dense"
    assert grouped.n_instruments == dense.n_instruments == 9  # 12 clerks minus 3 cells they are nested in
    ref = closed_forms(
        df["visits"].to_numpy(), df["video"].to_numpy(), z[:, 1:], np.column_stack([np.ones(240), w])
    )
    for m in ("2sls", "jive1", "ujive"):
        assert grouped.get(m).estimate == pytest.approx(dense.get(m).estimate, rel=1e-10)  # two exact routes
        assert grouped.get(m).std_error == pytest.approx(dense.get(m).std_error, rel=1e-8)
    assert grouped.get("ujive").estimate == pytest.approx(ref["ujive"], rel=1e-10)  # explicit hat matrices


def test_result_prints_and_serialises() -> None:
    res = decision_maker_jackknife_iv(
        judge_data(), outcome="visits", treatment="video", decision_maker="clerk"
    )
    json.dumps(res.to_dict())
    text = str(res)
    assert "UJIVE" in text and "JIVE1" in text and "cannot establish" in text


def test_a_decision_maker_with_one_case_is_refused_by_name() -> None:
    df = judge_data(n=60, n_dm=4)
    df.loc[len(df)] = {"clerk": 77, "cell": 0, "video": 1.0, "visits": 0.0, "age": 0.0}
    with pytest.raises(InvalidInputError, match=r"single case \(\['77'\]\).*drop those cases"):
        decision_maker_jackknife_iv(df, outcome="visits", treatment="video", decision_maker="clerk")
    z = pd.get_dummies(df["clerk"]).to_numpy(float)[:, 1:]
    with pytest.raises(EstimationError, match=r"leverage one on the instruments \(positions \[60\]\)"):
        jackknife_iv(df["visits"], df["video"], z)
