"""Every evidence result says which rows it used and why it left the others out, and prints a full summary."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.estimation.compliers import complier_report
from ivdossier.estimation.falsification import balance, per_instrument, placebo_outcomes, zero_first_stage
from ivdossier.estimation.rows import RowAccount, count_rows
from ivdossier.estimation.sensitivity import breakdown_value, local_to_zero, union_of_intervals
from ivdossier.estimation.subgroups import subgroup_first_stages

CAUTION_WORDS = "cannot establish"


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(42)
    n = 600
    w = rng.normal(size=n)
    z1, z2 = rng.normal(size=n), rng.normal(size=n)
    u = rng.normal(size=n)
    x = 0.6 * z1 + 0.4 * z2 + 0.5 * w + 0.5 * u + rng.normal(size=n)
    data = pd.DataFrame(
        {
            "y": 0.3 * x + w + u,
            "x": x,
            "z1": z1,
            "z2": z2,
            "w": w,
            "cov": rng.normal(size=n),
            "group": rng.integers(0, 3, size=n).astype(float),
            "sub": rng.random(n) < 0.5,
        }
    )
    data.loc[[0, 1, 2], "w"] = np.nan
    data.loc[[2, 3], "cov"] = np.nan
    data.loc[[4], "y"] = np.nan
    data.loc[[10, 11], "group"] = np.nan
    return data


def _statsmodels_nobs(data: pd.DataFrame, y: str, xs: list[str]) -> int:
    """Rows statsmodels keeps with missing='drop' (the outside reference for listwise deletion)."""
    return int(sm.OLS(data[y], sm.add_constant(data[xs]), missing="drop").fit().nobs)


def test_balance_counts_rows_left_out_per_column(frame: pd.DataFrame) -> None:
    res = balance(frame, instruments=["z1"], covariates=["cov"], controls=["w"])
    acc = res.row_account
    assert acc is not None
    assert acc.n_used == res.n == _statsmodels_nobs(frame, "cov", ["z1", "w"])
    assert acc.n_data == len(frame) and acc.n_left_out == 4  # rows 0, 1, 2, 3
    assert dict(acc.missing) == {"cov": int(frame["cov"].isna().sum()), "w": int(frame["w"].isna().sum())}
    data = json.loads(json.dumps(res.to_dict(), allow_nan=False))
    assert data["row_account"]["missing_by_column"] == {"cov": 2, "w": 3}
    text = str(res)
    assert "rows: used 596 of 600; left out 4: 4 with a missing value (cov 2, w 3)" in text
    assert "std. diff." in text and "joint test" in text and CAUTION_WORDS in text


def test_placebo_and_per_instrument_report_rows_ses_and_intervals(frame: pd.DataFrame) -> None:
    placebo = placebo_outcomes(frame, instruments=["z1", "z2"], outcomes=["cov"])
    assert placebo.row_account is not None and placebo.row_account.n_used == _statsmodels_nobs(
        frame, "cov", ["z1", "z2"]
    )
    res = per_instrument(frame, outcome="y", treatment="x", instruments=["z1", "z2"], controls=["w"])
    assert res.row_account is not None
    assert res.row_account.n_used == _statsmodels_nobs(frame, "y", ["x", "z1", "z2", "w"])
    text = str(res)
    for row in res.rows:
        assert f"{row.se:.4g}" in text and f"[{row.ci_lower:.4g}, {row.ci_upper:.4g}]" in text
    assert f"{res.se_all:.4g}" in text and "over-identification" in text and CAUTION_WORDS in text


def test_zero_first_stage_counts_rows_outside_the_subsample(frame: pd.DataFrame) -> None:
    res = zero_first_stage(
        frame, outcome="y", treatment="x", instruments=["z1"], subsample="sub", controls=["w"]
    )
    acc = res.row_account
    assert acc is not None
    sub = frame[frame["sub"]]
    assert acc.outside == int((~frame["sub"]).sum())  # brute-force count of the rows outside
    assert acc.n_used == res.n == _statsmodels_nobs(sub, "y", ["z1", "w"])
    assert acc.n_missing == int(sub[["y", "x", "z1", "w"]].isna().any(axis=1).sum())
    text = str(res)
    assert f"p = {res.first_stage_p_value:.3g}" in text and f"subsample n = {res.n:,}" in text
    assert "outside rows where sub is true" in text and CAUTION_WORDS in text


def test_subgroups_say_which_rows_sit_in_no_subgroup(frame: pd.DataFrame) -> None:
    res = subgroup_first_stages(frame, treatment="x", instruments=["z1"], by="group")
    complete = frame[["x", "z1"]].notna().all(axis=1)
    assert res.rows_without_group == int((complete & frame["group"].isna()).sum()) == 2
    assert res.row_account is not None and res.row_account.n_used == res.overall.n
    assert sum(g.n for g in res.groups) == res.overall.n - res.rows_without_group
    text = str(res)
    assert "2 of them have no value of group" in text and "group = 0.0" in text and CAUTION_WORDS in text


def test_sensitivity_results_carry_rows(frame: pd.DataFrame) -> None:
    spec = {"outcome": "y", "treatment": "x", "instruments": ["z1"], "controls": ["w"]}
    expected = _statsmodels_nobs(frame, "y", ["x", "z1", "w"])
    for res in (
        union_of_intervals(frame, gamma_min=-0.05, gamma_max=0.05, **spec),
        local_to_zero(frame, mu=0.0, omega=0.01, **spec),
        breakdown_value(frame, **spec),
    ):
        assert res.row_account is not None and res.row_account.n_used == expected == res.n
        assert json.loads(json.dumps(res.to_dict(), allow_nan=False))["row_account"]["n_left_out"] == 4
        assert "left out 4" in str(res) and CAUTION_WORDS in str(res)


def test_complier_summary_shows_each_share_once_with_profile_and_density_check() -> None:
    rng = np.random.default_rng(0)
    n = 1500
    z = rng.integers(0, 2, n)
    kind = rng.integers(0, 3, n)  # 0 never-taker, 1 complier, 2 always-taker
    d = ((kind == 2) | ((kind == 1) & (z == 1))).astype(int)
    data = pd.DataFrame(
        {"z": z, "d": d, "age": 40 + 5 * kind + rng.normal(size=n), "y": d + rng.normal(size=n)}
    )
    report = complier_report(data, treatment="d", instrument="z", covariates=["age"], outcome="y")
    text = str(report)
    assert text.count("compliers: ") == 1 and text.count("always-takers: ") == 1
    assert "kappa-weighted" in text and "Implied complier densities" in text and CAUTION_WORDS in text
    assert "rows: used 1,500 of 1,500; none left out" in text
    out = json.loads(json.dumps(report.to_dict(), allow_nan=False))
    assert out["shares"]["complier"]["estimate"] == pytest.approx(report.shares.complier)
    assert out["means"]["row_account"]["n_used"] == n


def test_row_account_round_trips_and_counts_by_reason() -> None:
    data = pd.DataFrame({"a": [1.0, None, 3.0, 4.0, None], "b": [1.0, 2.0, None, 4.0, None]})
    acc = count_rows(data, ["a", "b"], in_scope=[True, True, True, True, False], scope="the first four rows")
    # brute force: row 4 is outside; rows 1 and 2 miss a value; row 0 and 3 are used
    assert (acc.n_used, acc.outside, acc.n_missing, dict(acc.missing)) == (2, 1, 2, {"a": 1, "b": 1})
    assert RowAccount.from_dict(acc.to_dict()) == acc
    assert str(acc) == (
        "rows: used 2 of 5; left out 3: 1 outside the first four rows; 2 with a missing value (a 1, b 1)"
    )
