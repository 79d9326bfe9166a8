"""Plot summaries agree with the diagnostics they illustrate."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ivdossier.estimation.api import estimate_prepared
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.data import prepare
from ivdossier.estimation.plot_data import ar_curve, first_stage_bins
from ivdossier.estimation.robust_inference import ar_statistics


@pytest.fixture
def prepared():  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(21)
    n = 3000
    z = rng.normal(size=(n, 2))
    u = rng.normal(size=n)
    x = z @ np.array([0.15, 0.1]) + u + rng.normal(size=n)
    y = 0.4 * x - u + rng.normal(size=n)
    frame = pd.DataFrame({"y": y, "x": x, "z1": z[:, 0], "z2": z[:, 1], "w": rng.normal(size=n)})
    return prepare(frame, outcome="y", treatment="x", instruments=("z1", "z2"), controls=("w",))


def test_ar_statistic_is_at_the_critical_value_at_each_finite_end_of_the_ar_set(prepared) -> None:  # type: ignore[no-untyped-def]
    result = estimate_prepared(prepared, method="2sls", vcov="heteroskedastic")
    ar = result.to_dict()["weak_iv_robust"]["anderson_rubin"]
    ends = [float(e) for iv in ar["confidence_set"] for e in iv if e not in ("inf", "-inf")]
    assert ends, "the simulated instrument should give a set with finite ends"
    spec = CovSpec("heteroskedastic", (), True)
    values, d = ar_statistics(
        prepared.y,
        prepared.X,
        prepared.Z,
        spec=spec,
        n_partialled=prepared.n_partialled,
        betas=np.array(ends),
    )
    crit = stats.f.ppf(0.95, 2, d)
    np.testing.assert_allclose(values, crit, rtol=1e-6)
    # and the curve's value at 0 is the reported AR statistic at the null of no effect
    at_zero, _ = ar_statistics(
        prepared.y,
        prepared.X,
        prepared.Z,
        spec=spec,
        n_partialled=prepared.n_partialled,
        betas=np.array([0.0]),
    )
    assert at_zero[0] == pytest.approx(ar["statistic"], rel=1e-10)
    curve = ar_curve(prepared, result)
    assert curve is not None and curve["critical_value"] == pytest.approx(crit, rel=1e-12)


def test_first_stage_bins_rise_with_a_positive_first_stage(prepared) -> None:  # type: ignore[no-untyped-def]
    bins = first_stage_bins(prepared)
    assert bins is not None and len(bins["x_bins"]) == 20
    assert np.corrcoef(bins["x_bins"], bins["y_bins"])[0, 1] > 0.8
