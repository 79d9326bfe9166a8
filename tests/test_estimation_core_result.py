"""EstimationResult: JSON-safe dict with the agreed keys, diagnostics wired in, readable summary."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from ivdossier.estimation import EstimationResult, estimate
from ivdossier.estimation.api import estimate_prepared, fit_arrays
from ivdossier.estimation.data import prepare
from ivdossier.jsonsafe import json_safe as json_value

TOP_KEYS = {
    "method",
    "vcov",
    "n",
    "n_dropped",
    "n_clusters",
    "coef",
    "se",
    "ci",
    "first_stage",
    "strength",
    "weak_iv_robust",
    "reduced_form",
    "overid",
    "endogeneity",
    "spec",
    "conventions",
}


@pytest.fixture(scope="module")
def telehealth() -> pd.DataFrame:
    """Invented scenario: fibre-rollout wave and clerk propensity instrument telehealth use; outcome ED visits."""
    rng = np.random.default_rng(2026)
    n = 1500
    district = rng.integers(0, 50, n)
    wave = rng.integers(0, 4, 50)[district].astype(float)
    clerk = rng.uniform(0, 1, n)
    frailty = rng.normal(size=n)
    telehealth = 0.4 * wave + 1.5 * clerk + 0.5 * frailty + rng.normal(size=n)
    visits = 2.0 - 0.3 * telehealth + 0.8 * frailty + rng.normal(size=n)
    return pd.DataFrame(
        {
            "ed_visits": visits,
            "telehealth": telehealth,
            "fibre_wave": wave + rng.normal(scale=0.3, size=n),
            "clerk_rate": clerk,
            "age": rng.normal(50, 10, n),
            "district": district,
        }
    )


def test_to_dict_is_json_with_agreed_keys_and_diagnostics(telehealth):
    res = estimate(
        telehealth,
        outcome="ed_visits",
        treatment="telehealth",
        instruments=["fibre_wave", "clerk_rate"],
        controls="age",
        cluster="district",
        vcov="clustered",
    )
    assert isinstance(res, EstimationResult)
    d = res.to_dict()
    text = json.dumps(d, allow_nan=False)  # raises on NaN/inf: the dict must be JSON-safe
    assert set(d) >= TOP_KEYS
    assert set(d["coef"]) == {"telehealth"} and len(d["ci"]["telehealth"]) == 2
    assert d["n_clusters"] == [50]
    assert d["spec"]["instruments"] == ["fibre_wave", "clerk_rate"]
    # the diagnostics sections come from ivdossier.estimation.diagnostics.weak_iv_suite when it is installed
    pytest.importorskip("ivdossier.estimation.diagnostics")
    for key in ("first_stage", "strength", "weak_iv_robust", "reduced_form", "overid", "endogeneity"):
        assert isinstance(d[key], dict), key
    assert "telehealth" in json.loads(text)["first_stage"]["by_endog"]
    assert d["overid"]["test"] == "hansen_j"


def test_ols_marks_diagnostics_not_applicable(telehealth):
    res = estimate(telehealth, outcome="ed_visits", treatment="telehealth", controls="age", method="ols")
    d = res.to_dict()
    for key in ("first_stage", "strength", "weak_iv_robust", "reduced_form", "overid", "endogeneity"):
        assert d[key]["status"] == "not applicable"
        assert "OLS uses no excluded instruments" in d[key]["reason"]
    assert "not applicable" in res.summary()


def test_summary_names_estimate_rows_and_caution(telehealth):
    df = telehealth.copy()
    df.loc[:9, "age"] = np.nan
    res = estimate(df, outcome="ed_visits", treatment="telehealth", instruments="fibre_wave", controls="age")
    text = str(res)
    assert "two-stage least squares" in text
    assert "1,490" in text and "10 incomplete rows left out" in text
    assert f"{res.coef[0]:.6g}" in text
    assert "cannot establish that an instrument is excluded or exogenous" in text


def test_json_value_encodes_non_finite():
    # project rule: +/-inf as the strings "inf"/"-inf"; NaN as null
    assert json_value([np.inf, -np.inf, np.nan, np.float64(1.5)]) == ["inf", "-inf", None, 1.5]


def test_low_level_paths_agree_with_estimate(telehealth):
    res = estimate(
        telehealth,
        outcome="ed_visits",
        treatment="telehealth",
        instruments=["fibre_wave", "clerk_rate"],
        controls="age",
        absorb="district",
        method="liml",
        vcov="heteroskedastic",
    )
    prepared = prepare(
        telehealth,
        outcome="ed_visits",
        treatment="telehealth",
        instruments=["fibre_wave", "clerk_rate"],
        controls="age",
        absorb="district",
    )
    again = estimate_prepared(prepared, method="liml", vcov="heteroskedastic", diagnostics=False)
    assert again.diagnostics is None and again.to_dict()["first_stage"] is None
    codes = pd.factorize(telehealth["district"])[0].astype(np.int64)
    beta, cov = fit_arrays(
        telehealth["ed_visits"].to_numpy(),
        telehealth["telehealth"].to_numpy(),
        telehealth[["fibre_wave", "clerk_rate"]].to_numpy(),
        controls=telehealth[["age"]].to_numpy(),
        fe_codes=[codes],
        method="liml",
        vcov="heteroskedastic",
    )
    np.testing.assert_allclose(again.coef, res.coef, rtol=1e-12)
    np.testing.assert_allclose(beta, res.coef, rtol=1e-10)
    np.testing.assert_allclose(cov, res.cov, rtol=1e-10)


def test_summary_names_the_tests_in_words_not_json_identifiers(telehealth):
    res = estimate(
        telehealth, outcome="ed_visits", treatment="telehealth", instruments=["fibre_wave", "clerk_rate"]
    )
    text = str(res)
    # the JSON keeps its identifier; the terminal says it in words
    assert res.to_dict()["endogeneity"]["test"] == "durbin_wu_hausman_control_function"
    assert "endogeneity (Durbin-Wu-Hausman test, control-function form): p = " in text
    assert f"over-identification (Hansen J test): p = {res.to_dict()['overid']['p_value']:.4g}" in text
    assert "durbin_wu_hausman" not in text and "hansen_j" not in text
