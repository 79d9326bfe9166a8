"""Decision-maker propensity: the leave-out mean of the assigned decision-maker's treatment over other cases."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.leave_out import decision_maker_propensity, leave_out_means


@pytest.fixture(scope="module")
def cases() -> pd.DataFrame:
    rng = np.random.default_rng(17)
    n = 400
    clerk = rng.integers(0, 12, n)
    month = rng.integers(0, 5, n)
    age = rng.normal(50, 10, n)
    leniency = np.linspace(-0.3, 0.3, 12)[clerk]
    video = (rng.uniform(size=n) < 0.4 + leniency + 0.02 * month).astype(float)
    return pd.DataFrame(
        {
            "clerk": [f"c{k:02d}" for k in clerk],
            "video": video,
            "month": month,
            "age": age,
            "clinic": rng.integers(0, 30, n),
        },
        index=pd.RangeIndex(1000, 1000 + n),
    )


def brute_force(values: np.ndarray, groups: np.ndarray, clusters: np.ndarray | None = None) -> np.ndarray:
    """Loop over cases: mean over the same group's other cases (other clusters when clusters are given)."""
    out = np.empty(values.size)
    for i in range(values.size):
        same = groups == groups[i]
        keep = same & (np.arange(values.size) != i) if clusters is None else same & (clusters != clusters[i])
        out[i] = values[keep].mean()
    return out


def test_leave_one_out_matches_a_brute_force_loop(cases: pd.DataFrame) -> None:
    res = decision_maker_propensity(cases, decision_maker="clerk", treatment="video")
    expected = brute_force(cases["video"].to_numpy(), cases["clerk"].to_numpy())
    np.testing.assert_allclose(res.values, expected, rtol=0, atol=1e-12)  # exact identity: brute-force loop
    assert res.as_series().index.equals(cases.index)


def test_leave_own_cluster_out_matches_a_brute_force_loop(cases: pd.DataFrame) -> None:
    res = decision_maker_propensity(
        cases, decision_maker="clerk", treatment="video", leave_out="cluster", cluster="clinic"
    )
    expected = brute_force(cases["video"].to_numpy(), cases["clerk"].to_numpy(), cases["clinic"].to_numpy())
    np.testing.assert_allclose(res.values, expected, rtol=0, atol=1e-12)  # exact identity: brute-force loop


def test_residualised_propensity_is_the_leave_out_mean_of_the_least_squares_residual(
    cases: pd.DataFrame,
) -> None:
    res = decision_maker_propensity(
        cases, decision_maker="clerk", treatment="video", controls="age", absorb="month"
    )
    # outside computation: residual of video on month dummies and age by numpy least squares, then the loop
    design = np.column_stack([pd.get_dummies(cases["month"]).to_numpy(float), cases["age"].to_numpy()])
    coef, *_ = np.linalg.lstsq(design, cases["video"].to_numpy(), rcond=None)
    resid = cases["video"].to_numpy() - design @ coef
    expected = brute_force(resid, cases["clerk"].to_numpy())
    np.testing.assert_allclose(res.values, expected, rtol=0, atol=1e-10)  # exact identity up to rounding
    assert res.recipe.to_dict()["residualised"] is True
    assert "fixed-effect cells ['month']" in res.recipe.description
    assert res.recipe.dropped_controls == ()


def test_counts_and_small_decision_makers_are_reported(cases: pd.DataFrame) -> None:
    res = decision_maker_propensity(cases, decision_maker="clerk", treatment="video", min_cases=35)
    counts = cases["clerk"].value_counts()
    for dm, c in zip(res.decision_makers, res.cases, strict=True):
        assert counts[dm] == c  # outside count: pandas value_counts
    assert set(res.small) == set(counts[counts < 35].index)  # the flag is exactly "fewer than min_cases"
    d = res.to_dict()
    json.dumps(d)
    assert d["recipe"]["n_decision_makers"] == 12
    assert "cannot establish" in str(res)


def test_a_decision_maker_with_one_case_is_named_in_one_error(cases: pd.DataFrame) -> None:
    bad = pd.concat(
        [
            cases,
            pd.DataFrame(
                {"clerk": ["lonely"], "video": [1.0], "month": [0], "age": [40.0], "clinic": [1]}, index=[9]
            ),
        ]
    )
    with pytest.raises(InvalidInputError, match=r"single case \('lonely'; row index 9\).*drop those cases"):
        decision_maker_propensity(bad, decision_maker="clerk", treatment="video")


def test_a_decision_maker_inside_one_cluster_is_named_when_leaving_clusters_out(cases: pd.DataFrame) -> None:
    bad = cases.copy()
    bad.loc[bad["clerk"] == "c03", "clinic"] = 99
    with pytest.raises(InvalidInputError, match=r"all their cases in one 'clinic' cluster \('c03'\)"):
        decision_maker_propensity(
            bad, decision_maker="clerk", treatment="video", leave_out="cluster", cluster="clinic"
        )


def test_missing_values_and_wrong_options_are_named(cases: pd.DataFrame) -> None:
    bad = cases.copy()
    bad.loc[1003, "video"] = np.nan
    with pytest.raises(InvalidInputError, match=r"'video' is missing in 1 row\(s\) \(index 1003\)"):
        decision_maker_propensity(bad, decision_maker="clerk", treatment="video")
    with pytest.raises(InvalidInputError, match="leave_out='cluster' needs cluster="):
        decision_maker_propensity(cases, decision_maker="clerk", treatment="video", leave_out="cluster")
    with pytest.raises(InvalidInputError, match=r"Column\(s\) 'judge' not found"):
        decision_maker_propensity(cases, decision_maker="judge", treatment="video")
    with pytest.raises(InvalidInputError, match="must be numeric"):
        decision_maker_propensity(cases, decision_maker="video", treatment="clerk")


def test_array_core_names_groups_without_other_cases() -> None:
    with pytest.raises(InvalidInputError, match=r"1 group code\(s\) have no other case to average over: 2"):
        leave_out_means(np.array([1.0, 0.0, 1.0, 1.0, 0.0]), np.array([0, 0, 2, 1, 1]))


def test_a_control_absorbed_by_the_cells_is_reported_as_dropped(cases: pd.DataFrame) -> None:
    df = cases.assign(month_twice=2.0 * cases["month"])  # constant within each month cell
    res = decision_maker_propensity(
        df, decision_maker="clerk", treatment="video", controls="month_twice", absorb="month"
    )
    assert res.recipe.dropped_controls == (
        "month_twice",
    )  # exact collinearity with the cells, by construction


def _design_data(nested: bool) -> pd.DataFrame:
    rng = np.random.default_rng(23)
    n, n_dm = 600, 20
    clerk = rng.integers(0, n_dm, n)
    cell = clerk % 4 if nested else rng.integers(0, 4, n)  # nested: each clerk works in one cell
    u = rng.normal(size=n)
    x = (rng.uniform(size=n) < 0.3 + 0.4 * (clerk / n_dm) + 0.05 * cell + 0.1 * u).astype(float)
    age = rng.normal(50, 10, n)
    y = -0.5 * x + 0.2 * cell + 0.01 * age + u + rng.normal(size=n)
    return pd.DataFrame({"clerk": clerk, "cell": cell, "x": x, "y": y, "age": age})


@pytest.mark.parametrize("controls", [(), ("age",)])
def test_two_sls_with_the_leave_out_measure_matches_linearmodels(controls: tuple[str, ...]) -> None:
    from linearmodels.iv import IV2SLS

    from ivdossier.estimation.design_results import decision_maker_design

    df = _design_data(nested=True)  # nested: the many-instrument test takes its grouped path
    res, column = decision_maker_design(
        df, outcome="y", treatment="x", decision_maker="clerk", absorb="cell", controls=controls
    )
    exog = pd.get_dummies(df["cell"], drop_first=True, dtype=float)
    exog.insert(0, "const", 1.0)
    for c in controls:
        exog[c] = df[c]
    ref = IV2SLS(df["y"], exog, df["x"], column.rename("z")).fit(cov_type="robust")
    est = res.leave_out_estimate
    assert est is not None
    assert est.estimate == pytest.approx(float(ref.params["x"]), rel=1e-9)  # linearmodels IV2SLS
    assert est.std_error == pytest.approx(float(ref.std_errors["x"]), rel=1e-9)  # its robust (HC0) s.e.


def test_leave_out_2sls_with_crossed_cells_matches_linearmodels() -> None:
    from linearmodels.iv import IV2SLS

    from ivdossier.estimation.design_results import leave_out_2sls

    df = _design_data(nested=False)
    prop = decision_maker_propensity(df, decision_maker="clerk", treatment="x", absorb="cell", controls="age")
    codes = pd.factorize(df["cell"])[0]
    est = leave_out_2sls(df["y"].to_numpy(), df["x"].to_numpy(), prop.values, controls=df[["age"]].to_numpy(),
                         fe_codes=[codes])  # fmt: skip
    exog = pd.get_dummies(df["cell"], drop_first=True, dtype=float)
    exog.insert(0, "const", 1.0)
    exog["age"] = df["age"]
    ref = IV2SLS(df["y"], exog, df["x"], pd.Series(prop.values, name="z")).fit(cov_type="robust")
    assert est.estimate == pytest.approx(float(ref.params["x"]), rel=1e-9)  # linearmodels IV2SLS
    assert est.std_error == pytest.approx(float(ref.std_errors["x"]), rel=1e-9)
    lo, hi = ref.conf_int().loc["x"]
    assert (est.ci_low, est.ci_high) == pytest.approx((lo, hi), rel=1e-9)  # normal 95% interval


def test_with_nested_cells_and_no_controls_leave_out_2sls_is_jive1() -> None:
    from ivdossier.estimation.design_results import decision_maker_design

    # Exact identity: the leave-one-out mean of the cell-demeaned treatment differs from JIVE1's instrument (the
    # leave-one-out decision-maker mean, Kolesar 2013) by the cell mean, which the cells partial out.
    res, _ = decision_maker_design(
        _design_data(nested=True), outcome="y", treatment="x", decision_maker="clerk", absorb="cell"
    )
    jive1 = res.estimates.get("jive1")
    assert res.leave_out_estimate is not None
    assert res.leave_out_estimate.estimate == pytest.approx(jive1.estimate, rel=1e-10)
    assert res.leave_out_estimate.std_error == pytest.approx(jive1.std_error, rel=1e-10)
