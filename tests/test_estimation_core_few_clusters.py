"""With as few as two clusters the coefficients still come back, and each diagnostic that cannot be computed
says why instead of raising (a cluster covariance from G clusters has rank at most G - 1 for scores that sum
to zero, so some statistics are undefined; common practice)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ivdossier.estimation import estimate


def _frame(seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 200
    frame = pd.DataFrame({"z1": rng.normal(size=n), "z2": rng.normal(size=n), "g": rng.integers(0, 2, n)})
    frame["x"] = frame.z1 + frame.z2 + rng.normal(size=n)
    frame["y"] = 0.5 * frame.x + rng.normal(size=n)
    return frame


def test_two_clusters_two_instruments_keeps_the_estimate_and_names_the_singular_covariance() -> None:
    res = estimate(
        _frame(5), outcome="y", treatment="x", instruments=["z1", "z2"], cluster="g", vcov="clustered"
    )
    out = res.to_dict()
    assert np.isfinite(out["coef"]["x"])
    ar = out["weak_iv_robust"]
    assert ar["status"] == "not applicable"
    assert "singular (rank 1 of 2)" in ar["reason"]
    row = out["first_stage"]["by_endog"]["x"]
    assert row["robust_f"] is None and "singular" in row["robust_f_reason"]
    assert np.isfinite(row["partial_f"])  # the unadjusted first stage does not need the clusters


def test_two_clusters_one_instrument_reports_why_clr_is_absent() -> None:
    res = estimate(_frame(6), outcome="y", treatment="x", instruments="z1", cluster="g", vcov="clustered")
    out = res.to_dict()
    assert np.isfinite(out["coef"]["x"])
    clr = out["weak_iv_robust"]["clr"]
    assert clr["applicable"] is False
    assert "rank 1 of 2" in clr["reason"] and "2 clusters" in clr["reason"]
    assert out["weak_iv_robust"]["anderson_rubin"]["shape"] is not None
