"""Exposure-share designs: the instrument, Rotemberg weights, AKM/AKM0 intervals and the shock-level regression."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from linearmodels.iv import IV2SLS
from scipy import stats

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.exposure_share import (
    align_units,
    build_shift_share,
    exposure_robust_iv,
    rotemberg_weights,
    shift_share_from_arrays,
    shock_level_iv,
)


def invented_region_data(
    n_units: int = 60, n_sectors: int = 12, complete: bool = False, seed: int = 8
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Postal districts exposed to invented fibre-equipment sectors; shocks are sector rollout accelerations."""
    rng = np.random.default_rng(seed)
    raw = rng.dirichlet(np.full(n_sectors, 0.4), size=n_units)
    scale = 1.0 if complete else rng.uniform(0.6, 1.0, size=(n_units, 1))
    shares = raw * scale
    g = rng.normal(size=n_sectors)
    units = [f"D{u:03d}" for u in range(n_units)]
    sectors = [f"S{k:02d}" for k in range(n_sectors)]
    long = pd.DataFrame(
        [
            (units[i], sectors[k], shares[i, k])
            for i in range(n_units)
            for k in range(n_sectors)
            if shares[i, k] > (0.0 if complete else 0.01)
        ],
        columns=["district", "sector", "share"],
    )
    long_mat = np.zeros_like(shares)
    for u, s, v in long.itertuples(index=False):
        long_mat[units.index(u), sectors.index(s)] = v
    b = long_mat @ g
    income = rng.normal(size=n_units)
    x = 0.8 * b + 0.3 * income + rng.normal(size=n_units)
    y = -0.4 * x + 0.5 * income + long_mat @ rng.normal(size=n_sectors) + rng.normal(size=n_units)
    data = pd.DataFrame(
        {
            "district": units,
            "telehealth": x,
            "ed_visits": y,
            "income": income,
            "share_sum": long_mat.sum(axis=1),
        }
    ).sample(frac=1.0, random_state=1)
    shocks = pd.DataFrame({"sector": sectors, "rollout": g})
    return long, shocks, data


@pytest.fixture(scope="module")
def built() -> tuple:
    long, shocks, data = invented_region_data()
    design = build_shift_share(
        long, shocks, unit="district", share="share", shock="rollout", units=data["district"]
    )
    return design, align_units(design, data, "district"), long, shocks


def test_instrument_is_the_share_weighted_sum_of_shocks(built: tuple) -> None:
    design, data, long, shocks = built
    g = dict(zip(shocks["sector"], shocks["rollout"], strict=True))
    expected = {u: 0.0 for u in data["district"]}
    for u, s, v in long.itertuples(index=False):  # brute-force loop over the long table
        expected[u] += v * g[s]
    np.testing.assert_allclose(design.instrument, [expected[u] for u in design.units], rtol=0, atol=1e-14)
    assert list(data["district"]) == list(design.units)
    assert design.incomplete  # invented shares sum to 0.6-1
    json.dumps(design.to_dict())
    assert "cannot establish" in str(design)


def test_rotemberg_weights_sum_to_one_and_reproduce_two_sls(built: tuple) -> None:
    design, data, _, _ = built
    controls = data[["income", "share_sum"]].to_numpy()
    rw = rotemberg_weights(design, data["ed_visits"], data["telehealth"], controls)
    w, b = np.array(rw.weights), np.array(rw.estimates)
    assert w.sum() == pytest.approx(
        1.0, abs=1e-12
    )  # Goldsmith-Pinkham, Sorkin and Swift (2020): weights sum to 1
    assert float(w @ b) == pytest.approx(rw.estimate, rel=1e-12)  # GPSS (2020) identity: sum a_k b_k = 2SLS
    exog = pd.DataFrame(
        {"const": 1.0, "income": data["income"].to_numpy(), "share_sum": data["share_sum"].to_numpy()}
    )
    ref = IV2SLS(
        data["ed_visits"].to_numpy(),
        exog,
        data["telehealth"].to_numpy(),
        pd.DataFrame({"b": design.instrument}),
    ).fit(cov_type="robust", debiased=False)
    assert rw.estimate == pytest.approx(ref.params.iloc[-1], rel=1e-10)  # reference library: linearmodels
    k = design.sectors.index(rw.top[0])
    just = IV2SLS(
        data["ed_visits"].to_numpy(),
        exog,
        data["telehealth"].to_numpy(),
        pd.DataFrame({"s": design.shares[:, k]}),
    ).fit(cov_type="robust", debiased=False)
    assert rw.estimates[k] == pytest.approx(just.params.iloc[-1], rel=1e-10)  # per-sector just-identified IV
    assert rw.negative_weight_sum == pytest.approx(w[w < 0].sum())
    assert len(rw.top) == 5 and abs(w[k]) == pytest.approx(np.abs(w).max())
    json.dumps(rw.to_dict())
    assert "Rotemberg" in str(rw)


def test_shock_level_regression_reproduces_the_unit_level_estimate(built: tuple) -> None:
    design, data, _, _ = built
    y, x = data["ed_visits"].to_numpy(), data["telehealth"].to_numpy()
    # no shock-level intercept: equal to the unit-level 2SLS with any unit controls (Borusyak, Hull, Jaravel 2022)
    unit = exposure_robust_iv(design, y, x, data[["income"]].to_numpy())
    shock = shock_level_iv(design, y, x, data[["income"]].to_numpy(), shock_intercept=False)
    assert shock.estimate == pytest.approx(unit.estimate, rel=1e-12)  # BHJ (2022) equivalence, exact
    # with a shock-level intercept the unit-level model needs the share sum as a control (BHJ 2022)
    ctrl = data[["income", "share_sum"]].to_numpy()
    unit2 = exposure_robust_iv(design, y, x, ctrl)
    shock2 = shock_level_iv(design, y, x, ctrl, shock_intercept=True)
    assert shock2.estimate == pytest.approx(unit2.estimate, rel=1e-12)  # BHJ (2022) equivalence, exact
    json.dumps(shock2.to_dict())
    assert "Shock-level" in str(shock2)


def test_akm_equals_the_shock_level_error_with_complete_shares_and_no_controls() -> None:
    long, shocks, data = invented_region_data(complete=True, seed=3)
    design = build_shift_share(long, shocks, unit="district", shock="rollout", units=data["district"])
    data = align_units(design, data, "district")
    assert np.allclose(design.share_sums, 1.0)  # the premise of the identity below
    y, x = data["ed_visits"].to_numpy(), data["telehealth"].to_numpy()
    akm = exposure_robust_iv(design, y, x)
    bhj = shock_level_iv(design, y, x, shock_intercept=True)
    # algebra: with shares summing to one and only an intercept, X^_k = g_k - mean(B) = BHJ's demeaned shock and
    # R_k = s_k times BHJ's shock-level residual, so the two standard errors coincide
    assert akm.se_akm == pytest.approx(bhj.std_error, rel=1e-9)
    assert akm.estimate == pytest.approx(bhj.estimate, rel=1e-12)


def test_akm_is_sector_clustering_when_each_unit_has_one_sector() -> None:
    rng = np.random.default_rng(21)
    n, k = 200, 25
    sector = rng.integers(0, k, n)
    shares = np.zeros((n, k))
    shares[np.arange(n), sector] = 1.0
    g = rng.normal(size=k)
    design = shift_share_from_arrays(shares, g)
    nu = rng.normal(size=k)
    x = 0.7 * shares @ g + rng.normal(size=n) + 0.5 * nu[sector]
    y = 0.3 * x + nu[sector] + rng.normal(size=n)
    res = exposure_robust_iv(design, y, x)
    ref = IV2SLS(y, np.ones((n, 1)), x, shares @ g).fit(cov_type="clustered", clusters=sector, debiased=False)
    # Adão, Kolesár and Morales (2019): with one sector per unit AKM is clustering by sector; linearmodels reference
    assert res.estimate == pytest.approx(float(ref.params.iloc[-1]), rel=1e-10)
    assert res.se_akm == pytest.approx(float(ref.std_errors.iloc[-1]), rel=1e-8)
    robust = IV2SLS(y, np.ones((n, 1)), x, shares @ g).fit(cov_type="robust", debiased=False)
    assert res.se_conventional == pytest.approx(
        float(robust.std_errors.iloc[-1]), rel=1e-8
    )  # linearmodels HC0


def akm0_statistic(design, y: np.ndarray, x: np.ndarray, w: np.ndarray, b0: float) -> float:
    """AKM0 statistic from the formula with explicit matrices: (B'M e)^2 / sum_k X^_k^2 R_k(b0)^2."""
    m = np.eye(y.size) - w @ np.linalg.pinv(w)
    s = design.shares
    xhat = np.linalg.inv(s.T @ s) @ s.T @ (m @ design.instrument)
    e = m @ (y - b0 * x)
    r = s.T @ e
    return float((design.instrument @ e) ** 2 / np.sum(xhat**2 * r**2))


def test_akm0_set_is_where_its_statistic_is_below_the_critical_value(built: tuple) -> None:
    design, data, _, _ = built
    y, x = data["ed_visits"].to_numpy(), data["telehealth"].to_numpy()
    w = np.column_stack([np.ones(len(y)), data["share_sum"].to_numpy()])
    res = exposure_robust_iv(design, y, x, data[["share_sum"]].to_numpy())
    crit = stats.chi2.ppf(0.95, 1)
    grid = np.linspace(res.estimate - 3, res.estimate + 3, 121)
    inside = [any(lo <= b <= hi for lo, hi in res.akm0_set) for b in grid]
    accepted = [akm0_statistic(design, y, x, w, b) <= crit for b in grid]
    assert inside == accepted  # test inversion checked point by point against the explicit formula
    for lo, hi in res.akm0_set:
        for edge in (lo, hi):
            if np.isfinite(edge):
                assert akm0_statistic(design, y, x, w, edge) == pytest.approx(crit, rel=1e-8)
    assert any(lo <= res.estimate <= hi for lo, hi in res.akm0_set)  # the statistic is zero at the estimate
    json.dumps(res.to_dict())
    assert "AKM0" in str(res)


def test_more_sectors_than_units_makes_akm_not_applicable() -> None:
    rng = np.random.default_rng(2)
    shares = rng.dirichlet(np.ones(30), size=20) * 0.9
    design = shift_share_from_arrays(shares, rng.normal(size=30))
    x = shares @ design.shocks + rng.normal(size=20)
    res = exposure_robust_iv(design, x + rng.normal(size=20), x)
    assert not res.applicable and "rank 20 below its 30 sectors" in (res.reason or "")
    assert "not applicable" in str(res)


def test_bad_tables_raise_one_error_naming_the_rows() -> None:
    long, shocks, data = invented_region_data(n_units=10, n_sectors=4)
    over = pd.concat([long, pd.DataFrame({"district": ["D001"], "sector": ["S99"], "share": [0.9]})])
    shocks99 = pd.concat([shocks, pd.DataFrame({"sector": ["S99"], "rollout": [0.0]})])
    with pytest.raises(
        InvalidInputError, match=r"sum to at most one per unit; 1 unit\(s\) exceed it: 'D001'"
    ):
        build_shift_share(over, shocks99, unit="district", shock="rollout")
    with pytest.raises(InvalidInputError, match=r"1 sector\(s\) in the shares table have no shock: 'S99'"):
        build_shift_share(over, shocks, unit="district", shock="rollout")
    with pytest.raises(
        InvalidInputError, match=r"Unit ids do not match: 1 unit\(s\) of the data have no shares \('D777'\)"
    ):
        build_shift_share(long, shocks, unit="district", shock="rollout", units=[*data["district"], "D777"])
    with pytest.raises(InvalidInputError, match=r"repeated \(district, sector\) pairs"):
        build_shift_share(pd.concat([long, long.iloc[:1]]), shocks, unit="district", shock="rollout")
    with pytest.raises(InvalidInputError, match=r"lists sector\(s\) 'S00' more than once"):
        build_shift_share(long, pd.concat([shocks, shocks.iloc[:1]]), unit="district", shock="rollout")
    design = build_shift_share(long, shocks, unit="district", shock="rollout")
    with pytest.raises(InvalidInputError, match=r"Unit ids do not match \(missing from the data: 'D0\d\d'\)"):
        align_units(design, data.iloc[1:], "district")


def test_sector_clusters_of_one_sector_change_nothing_and_clustered_akm_matches_bhj() -> None:
    long, shocks, data = invented_region_data(complete=True, seed=5)
    design = build_shift_share(long, shocks, unit="district", shock="rollout", units=data["district"])
    data = align_units(design, data, "district")
    y, x = data["ed_visits"].to_numpy(), data["telehealth"].to_numpy()
    own = list(design.sectors)  # every sector its own cluster
    assert exposure_robust_iv(design, y, x, sector_clusters=own).se_akm == pytest.approx(
        exposure_robust_iv(design, y, x).se_akm, rel=1e-12
    )  # algebra: a sum over one-sector clusters is the unclustered sum
    groups = [int(s[1:]) % 3 for s in design.sectors]
    akm = exposure_robust_iv(design, y, x, sector_clusters=groups)
    bhj = shock_level_iv(design, y, x, sector_clusters=groups)
    # same algebra as the unclustered identity above, summed within clusters of sectors
    assert akm.se_akm == pytest.approx(bhj.std_error, rel=1e-9)
    assert akm.n_sector_clusters == bhj.n_sector_clusters == 3
    with pytest.raises(InvalidInputError, match=r"one label per sector \(12\), got 2"):
        exposure_robust_iv(design, y, x, sector_clusters=[0, 1])
