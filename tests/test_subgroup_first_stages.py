"""First stage by subgroup: matches statsmodels within each group and flags a planted group of defiers."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.subgroups import subgroup_first_stages


def _frame(defier_region: int | None) -> pd.DataFrame:
    rng = np.random.default_rng(8)
    n = 4000
    region = rng.integers(0, 4, n)
    z = rng.normal(size=n)
    slope = np.where(region == defier_region, -0.6, 0.6) if defier_region is not None else np.full(n, 0.6)
    d = slope * z + rng.normal(size=n)
    return pd.DataFrame(
        {"d": d, "z": z, "w": rng.normal(size=n), "region": region, "age": rng.integers(18, 90, n)}
    )


def test_each_subgroup_matches_statsmodels_hc1() -> None:
    frame = _frame(None)
    res = subgroup_first_stages(frame, treatment="d", instruments="z", by="region", controls="w")
    assert [g.group for g in res.groups] == ["0", "1", "2", "3"] and res.grouping == "values"
    for g in res.groups:
        sub = frame[frame.region == int(g.group)]
        # Reference: statsmodels OLS with HC1 (the robust convention used throughout, common practice).
        ref = sm.OLS(sub.d, sm.add_constant(sub[["z", "w"]])).fit(cov_type="HC1")
        assert g.regression.coefficients[0].coef == pytest.approx(ref.params["z"], rel=1e-10)
        assert g.regression.coefficients[0].se == pytest.approx(ref.bse["z"], rel=1e-10)
    assert res.flagged == ()


def test_a_group_pushed_the_other_way_is_flagged_as_possible_defiers() -> None:
    res = subgroup_first_stages(_frame(2), treatment="d", instruments="z", by="region")
    assert res.flagged == ("2",)
    assert res.to_dict()["groups"][2]["opposite"] == ["z"]


def test_many_valued_covariate_is_cut_into_ordered_quantile_bins() -> None:
    res = subgroup_first_stages(_frame(None), treatment="d", instruments="z", by="age", bins=3)
    assert res.grouping == "3 quantile bins"
    lows = [float(g.group.split(",")[0].strip("([")) for g in res.groups]
    assert lows == sorted(lows)


def test_missing_by_column_is_a_clear_error() -> None:
    with pytest.raises(InvalidInputError, match=r"Column 'regon' \(--by\) is not in the data"):
        subgroup_first_stages(_frame(None), treatment="d", instruments="z", by="regon")
