"""The first-stage figure shows the instrument, the real first-stage slope and n; the AR figure holds the set."""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.estimation.api import estimate_prepared
from ivdossier.estimation.data import prepare
from ivdossier.estimation.plot_data import FirstStagePlot, ar_curve_data, first_stage_bins, first_stage_plot
from ivdossier.reports.html import clean_svg
from ivdossier.reports.inputs import ArCurve
from ivdossier.reports.plots import ar_curve_svg, ar_plot_range, first_stage_svg, first_stage_texts


def _frame(seed: int, n: int, pi: float) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    z, z2, w, u = (rng.normal(size=n) for _ in range(4))
    x = pi * z + 0.1 * z2 + 0.5 * w + u + rng.normal(size=n)
    return pd.DataFrame({"y": 0.5 * x - 0.8 * u + rng.normal(size=n), "x": x, "z": z, "z2": z2, "w": w})


def test_first_stage_plot_uses_the_instrument_and_the_true_slope() -> None:
    frame = _frame(1, 3000, 0.4)
    prepared = prepare(frame, outcome="y", treatment="x", instruments=("z",), controls=("w",))
    plot = first_stage_plot(prepared)
    assert plot is not None and plot.x_kind == "instrument" and plot.n == 3000
    # Frisch-Waugh-Lovell: the slope on the partialled instrument is the coefficient on z in the first stage
    # with the controls (reference: statsmodels OLS of x on 1, z, w)
    ref = sm.OLS(frame["x"], sm.add_constant(frame[["z", "w"]])).fit()
    assert plot.slope == pytest.approx(ref.params["z"], rel=1e-10)
    assert plot.x_label == "z (controls partialled out)"
    # the bins are bins of the instrument itself: their means span its partialled range, not a fitted value's
    zp = prepared.Z[:, 0]
    assert min(plot.x_bins) == pytest.approx(np.sort(zp)[:150].mean(), rel=1e-12)  # 20 bins of 150 rows
    texts = first_stage_texts(plot)
    assert texts["line"].startswith(f"first-stage slope {ref.params['z']:.3g}")
    assert "n = 3,000 rows" in texts["title"]
    assert not re.search(r"slope 1(\.0*)?\b", " ".join(texts.values()))
    assert FirstStagePlot.from_dict(json.loads(json.dumps(plot.to_dict(), allow_nan=False))) == plot
    stored = first_stage_bins(prepared)
    assert stored is not None and stored["slope"] == plot.slope and stored["n"] == 3000
    clean_svg(first_stage_svg(plot), key="first-stage")


def test_several_instruments_are_labelled_as_a_prediction_without_a_slope() -> None:
    frame = _frame(2, 1000, 0.4)
    prepared = prepare(frame, outcome="y", treatment="x", instruments=("z", "z2"), controls=("w",))
    plot = first_stage_plot(prepared)
    assert plot is not None and plot.x_kind == "prediction" and plot.slope is None
    texts = first_stage_texts(plot)
    assert texts["x"].startswith("first-stage prediction from 2 instruments") and texts["line"] == ""
    assert "slope one by construction" in plot.note
    first_stage_svg(plot)


def test_ar_curve_holds_a_bounded_set_far_wider_than_eight_standard_errors() -> None:
    # a weak instrument (seed found by a search): the AR 95 % set is bounded but reaches ~43 SEs above the estimate
    prepared = prepare(_frame_wide(), outcome="y", treatment="x", instruments=("z",))
    result = estimate_prepared(prepared, method="2sls", vcov="heteroskedastic")
    b, se = float(result.coef[0]), float(result.se[0])
    ((low, high),) = result.to_dict()["weak_iv_robust"]["anderson_rubin"]["confidence_set"]
    assert high > b + 8 * se  # the old fixed range (8 SEs either side) would cut the set off
    curve = ar_curve_data(prepared, result)
    assert curve is not None and curve.bounded
    # numeric root finding here vs the analytic quadratic inversion of the estimation (two code paths)
    assert (curve.set_lower, curve.set_upper) == pytest.approx((low, high), rel=1e-8)
    assert curve.betas[0] < low and curve.betas[-1] > high
    inside = [
        s <= curve.critical_value for bb, s in zip(curve.betas, curve.stats, strict=True) if low < bb < high
    ]
    assert all(inside)  # by definition of the set
    svg = ar_curve_svg(ArCurve(curve.betas, curve.stats, curve.critical_value), ar_set=[(low, high)])
    clean_svg(svg, key="ar-curve")


def _frame_wide() -> pd.DataFrame:
    rng = np.random.default_rng(49)
    n = 400
    z, u = rng.normal(size=n), rng.normal(size=n)
    x = 0.12 * z + u + rng.normal(size=n)
    return pd.DataFrame({"y": 0.5 * x - 0.8 * u + rng.normal(size=n), "x": x, "z": z})


def test_plot_range_widens_an_old_narrow_curve_to_the_reported_set() -> None:
    narrow = ArCurve(betas=(-1.0, 0.0, 1.0), stats=(5.0, 1.0, 5.0), critical_value=3.84)
    lo, hi = ar_plot_range(narrow, [(-0.5, 12.0)])
    assert lo <= -1.0 and hi >= 12.0  # the whole bounded set is on the figure
    assert ar_plot_range(narrow, [(-0.5, 0.5)]) == (-1.0, 1.0)  # already inside: unchanged
    assert ar_plot_range(narrow, [(float("-inf"), 0.5)]) == (-1.0, 1.0)  # a ray cannot be shown whole


def test_unbounded_sets_keep_the_default_range() -> None:
    rng = np.random.default_rng(3)
    n = 300
    z, u = rng.normal(size=n), rng.normal(size=n)
    x = 0.01 * z + u + rng.normal(size=n)  # essentially irrelevant instrument
    frame = pd.DataFrame({"y": x - u + rng.normal(size=n), "x": x, "z": z})
    prepared = prepare(frame, outcome="y", treatment="x", instruments=("z",))
    result = estimate_prepared(prepared, method="2sls", vcov="heteroskedastic")
    curve = ar_curve_data(prepared, result)
    assert curve is not None
    ar_set = result.to_dict()["weak_iv_robust"]["anderson_rubin"]["confidence_set"]
    assert any("inf" in (str(a), str(b)) for a, b in ar_set)  # the estimation's own set runs to infinity
    assert not curve.bounded and curve.set_upper is None
    assert curve.betas[-1] - curve.betas[0] == pytest.approx(16 * float(result.se[0]), rel=1e-9)
