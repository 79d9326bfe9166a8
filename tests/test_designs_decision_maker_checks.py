"""Outcome profile across decision-makers; the Frandsen-Lefgren-Leslie test is reported as not applicable."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.decision_maker_checks import fll_test, outcome_profile
from ivdossier.estimation.jackknife_iv import decision_maker_jackknife_iv


def test_profile_slope_is_the_two_sls_estimate_with_decision_maker_dummies() -> None:
    rng = np.random.default_rng(9)
    n = 500
    clerk = rng.integers(0, 8, n)
    x = (rng.uniform(size=n) < np.linspace(0.2, 0.8, 8)[clerk]).astype(float)
    y = 0.5 - 0.6 * x + rng.normal(size=n)
    df = pd.DataFrame({"clerk": clerk, "video": x, "visits": y})
    prof = outcome_profile(df, outcome="visits", treatment="video", decision_maker="clerk")
    tsls = decision_maker_jackknife_iv(df, outcome="visits", treatment="video", decision_maker="clerk")
    # grouped-data IV identity (Angrist 1991): 2SLS on group dummies = cases-weighted slope of group means
    assert prof.slope == pytest.approx(tsls.get("2sls").estimate, rel=1e-10)
    counts = df["clerk"].value_counts().sort_index()
    assert list(prof.cases) == counts.tolist()  # outside count: pandas value_counts
    json.dumps(prof.to_dict())
    assert "cannot establish" in str(prof)


def test_fll_test_is_not_applicable_and_says_why() -> None:
    res = fll_test()
    assert not res.applicable
    assert "not implemented" in res.reason and "first stage by case type" in res.reason
    assert res.to_dict()["applicable"] is False
    assert str(res).startswith("Frandsen-Lefgren-Leslie test: not applicable")


def test_missing_columns_are_named() -> None:
    with pytest.raises(InvalidInputError, match="Column 'judge' not found"):
        outcome_profile(pd.DataFrame({"a": [1]}), outcome="a", treatment="a", decision_maker="judge")
