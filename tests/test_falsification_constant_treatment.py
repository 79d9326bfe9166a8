"""Zero-first-stage subsample where nobody can take the treatment: the first stage is exactly zero."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.estimation.falsification import zero_first_stage


@pytest.fixture
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(11)
    n = 3000
    able = (rng.random(n) < 0.7).astype(int)
    z = rng.normal(size=n)
    w = rng.normal(size=n)
    g = rng.integers(0, 60, size=n)
    d = able * (0.8 * z + rng.normal(size=n) > 0).astype(int)
    y = 0.5 * d + 0.2 * z + 0.3 * w + rng.normal(size=n)  # 0.2 * z is a direct effect
    return pd.DataFrame({"y": y, "d": d, "z": z, "w": w, "g": g, "able": able})


def test_constant_treatment_gives_exact_zero_first_stage_and_the_reduced_form(frame: pd.DataFrame) -> None:
    res = zero_first_stage(
        frame,
        outcome="y",
        treatment="d",
        instruments="z",
        query="able == 0",
        controls="w",
        cluster="g",
        vcov="clustered",
    )
    assert res.first_stage.coefficients[0].coef == 0.0
    assert res.first_stage_p_value == 1.0 and res.warning is None
    sub = frame[frame.able == 0]
    # Reference: statsmodels OLS with cluster-robust covariance (its default small-sample correction,
    # G/(G-1)*(n-1)/(n-k), the convention this project uses too).
    ref = sm.OLS(sub.y, sm.add_constant(sub[["z", "w"]])).fit(cov_type="cluster", cov_kwds={"groups": sub.g})
    coef = res.reduced_form.coefficients[0]
    assert coef.coef == pytest.approx(ref.params["z"], rel=1e-10)
    assert coef.se == pytest.approx(ref.bse["z"], rel=1e-10)
    assert res.direct_effect_prior_mean[0] == pytest.approx(ref.params["z"], rel=1e-10)
    assert res.direct_effect_prior_covariance[0][0] == pytest.approx(ref.bse["z"] ** 2, rel=1e-10)
    assert "constant in the subsample" in res.assumption
