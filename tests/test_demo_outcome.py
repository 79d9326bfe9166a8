"""The demo's emergency-visit outcome is a count with a known effect, and the planted story still holds."""

from __future__ import annotations

import math

import numpy as np
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.api import estimate
from ivdossier.estimation.falsification import zero_first_stage
from ivdossier.workflows.demo_data import AVOIDABLE_RATE, TRUE_EFFECT, simulate_telehealth

CONTROLS = ["age", "chronic_conditions"]  # the demo's controls (workflows/demo.py)
MODEL = {"outcome": "ed_visits", "treatment": "telehealth", "controls": CONTROLS}
CLUSTERED = {"cluster": "district", "vcov": "clustered"}


@pytest.fixture(scope="module")
def demo() -> object:
    return simulate_telehealth()


def test_emergency_visits_are_non_negative_whole_numbers(demo) -> None:  # type: ignore[no-untyped-def]
    for column in ("ed_visits", "prior_ed_visits"):
        values = demo[column].to_numpy()
        assert np.issubdtype(values.dtype, np.integer)
        assert values.min() >= 0
    # a count a health economist would recognise: overdispersed (variance above the mean, unlike a Poisson)
    assert demo["ed_visits"].var() > demo["ed_visits"].mean()


def test_planted_effect_on_the_mean_count_is_minus_0_6_for_the_same_patients() -> None:
    # Simulation check of the documented truth: the same patients with telehealth forced to 1 and to 0. The
    # only difference is the avoidable-visit count, Poisson(0.6), so the mean difference is -0.6 with Monte
    # Carlo SE sqrt(0.6 / n) = 0.0035 at n = 50 000; tolerance 4 SE.
    n = 50_000
    treated = simulate_telehealth(n, set_telehealth=1)["ed_visits"].to_numpy()
    untreated = simulate_telehealth(n, set_telehealth=0)["ed_visits"].to_numpy()
    assert TRUE_EFFECT == -AVOIDABLE_RATE == -0.6
    assert (treated - untreated).mean() == pytest.approx(TRUE_EFFECT, abs=4 * math.sqrt(0.6 / n))
    assert (treated <= untreated).all()  # telehealth only removes avoidable visits
    with pytest.raises(InvalidInputError, match="set_telehealth must be 0, 1 or None"):
        simulate_telehealth(100, set_telehealth=2)


def test_fibre_recovers_the_truth_and_ols_is_biased_by_frailty(demo) -> None:  # type: ignore[no-untyped-def]
    fibre = estimate(demo, instruments=["fibre_months"], **MODEL, **CLUSTERED)
    low, high = fibre.ci[0]
    assert low < TRUE_EFFECT < high
    assert abs(fibre.coef[0] - TRUE_EFFECT) < 2 * fibre.se[0]
    ols = estimate(demo, instruments=[], method="ols", **MODEL, **CLUSTERED)
    # unobserved frailty raises both adoption and visits: OLS is pulled up, its interval misses the truth
    assert ols.ci[0][0] > TRUE_EFFECT


def test_clerk_instrument_is_biased_and_the_zero_first_stage_check_flags_it(demo) -> None:  # type: ignore[no-untyped-def]
    clerk = estimate(demo, instruments=["clerk_video_rate"], **MODEL, **CLUSTERED)
    assert clerk.ci[0][1] < TRUE_EFFECT  # the follow-up path adds a direct effect: the interval misses -0.6
    checks = {
        z: zero_first_stage(
            demo, instruments=[z], query="has_device == 0", **MODEL, **CLUSTERED
        ).reduced_form.coefficients[0]
        for z in ("clerk_video_rate", "fibre_months")
    }
    assert checks["clerk_video_rate"].p_value < 0.01 and checks["clerk_video_rate"].coef < 0
    assert checks["fibre_months"].p_value > 0.05


def test_mast_instrument_is_weak(demo) -> None:  # type: ignore[no-untyped-def]
    mast = estimate(demo, instruments=["mast_km"], **MODEL, **CLUSTERED).to_dict()
    # below the Montiel Olea-Pflueger 30 % critical value 12.04 (REFERENCE_VALUES.md), let alone 23.1
    assert mast["strength"]["effective_f"]["statistic"] < 12.04
