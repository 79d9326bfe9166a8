"""Leave-one-out influence equals refitting the model without each cluster (or row), exactly.

The reference is a brute-force refit per deletion through the project's full estimation path (validation,
partialling, 2SLS, sandwich covariance, Anderson–Rubin and first-stage F), which shares no code with the
cross-product downdating under test.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ivdossier.estimation.api import estimate_prepared
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.data import prepare
from ivdossier.estimation.fragility_data import fragility_data
from ivdossier.estimation.influence import jackknife_influence
from ivdossier.estimation.robust_inference import anderson_rubin
from ivdossier.estimation.strength import first_stage


def hospitals(seed: int = 4, g: int = 12, n: int = 300, two_instruments: bool = False) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cl = rng.integers(0, g, n)
    ward = cl * 3 + rng.integers(0, 3, n)  # nested in hospitals
    year = rng.integers(0, 4, n)  # crosses hospitals
    c = rng.normal(size=n)
    z1 = rng.normal(size=n) + 0.5 * rng.normal(size=g)[cl]
    z2 = rng.normal(size=n)
    u = rng.normal(size=n) + 0.7 * rng.normal(size=g)[cl]
    x = 0.7 * z1 + (0.4 * z2 if two_instruments else 0) + 0.6 * u + rng.normal(size=n) + 0.3 * c
    y = 0.3 * x + u + 0.5 * c + 0.2 * year
    w = rng.uniform(0.5, 2.0, n)
    return pd.DataFrame(
        {
            "y": y,
            "x": x,
            "z1": z1,
            "z2": z2,
            "c": c,
            "hosp": [f"H{k:02d}" for k in cl],
            "ward": ward,
            "year": year,
            "w": w,
        }
    )


def refit(frame: pd.DataFrame, null: float, **spec: object) -> tuple[float, float, float, float]:
    """Brute force: the full estimation path on the given rows; returns estimate, se, AR F and first-stage F."""
    vcov = "clustered" if spec.get("cluster") else "heteroskedastic"
    prep = prepare(frame, outcome="y", treatment="x", **spec)  # type: ignore[arg-type]
    res = estimate_prepared(prep, vcov=vcov, diagnostics=False)
    cov = CovSpec(vcov, prep.clusters if vcov == "clustered" else ())  # type: ignore[arg-type]
    ar = anderson_rubin(
        prep.y,
        prep.X,
        prep.Z,
        spec=cov,
        n_partialled=prep.n_partialled,
        n_partialled_nested=prep.n_partialled_nested,
        null=np.array([null]),
    )
    fs = first_stage(
        prep.X,
        prep.Z,
        spec=cov,
        n_partialled=prep.n_partialled,
        n_partialled_nested=prep.n_partialled_nested,
        endog_names=["x"],
        instrument_names=list(prep.instruments),
    )
    return float(res.coef[0]), float(res.se[0]), ar.statistic, fs.rows[0].robust_f


CASES = [
    ({"instruments": "z1", "controls": "c", "cluster": "hosp"}, "exact downdating"),
    ({"instruments": ["z1", "z2"], "controls": "c", "cluster": "hosp", "weights": "w"}, "exact downdating"),
    ({"instruments": "z1", "controls": "c", "absorb": "ward", "cluster": "hosp"}, "exact downdating"),
    ({"instruments": "z1", "controls": "c", "absorb": "year", "cluster": "hosp"}, "partialled again"),
]


@pytest.mark.parametrize(("spec", "how"), CASES)
def test_every_cluster_deletion_equals_a_refit_without_that_cluster(
    spec: dict[str, object], how: str
) -> None:
    frame = hospitals(two_instruments=isinstance(spec["instruments"], list))
    fd = fragility_data(frame, outcome="y", treatment="x", **spec)  # type: ignore[arg-type]
    res = jackknife_influence(fd, null=0.0)
    assert res.applicable and how in (res.method or "") and len(res.deletions) == 12
    full = refit(frame, 0.0, **spec)
    assert res.full is not None
    # exact identity: the full-sample row equals the estimation path
    assert (res.full.estimate, res.full.std_error) == pytest.approx(full[:2], rel=1e-9)
    n_inst = 2 if isinstance(spec["instruments"], list) else 1
    for d in res.deletions:
        est, se, ar_f, fs_f = refit(frame[frame.hosp != d.label], 0.0, **spec)
        # exact identity: downdated cross-products equal a brute-force refit without cluster d
        assert d.estimate == pytest.approx(est, rel=1e-9, abs=1e-12)
        assert d.std_error == pytest.approx(se, rel=1e-8)
        assert d.first_stage_f == pytest.approx(fs_f, rel=1e-8)
        # the AR p-value refers the refit's F statistic to F(L, G - 2) (11 clusters left)
        assert d.ar_p_value == pytest.approx(stats.f.sf(ar_f, n_inst, 10), rel=1e-7)
        q = stats.t.ppf(0.975, 10)
        assert d.interval == pytest.approx((est - q * se, est + q * se), rel=1e-8)
    ests = np.array([d.estimate for d in res.deletions])
    # definitions: jackknife variance and the largest change
    assert res.jackknife_variance == pytest.approx(11 / 12 * np.sum((ests - ests.mean()) ** 2), rel=1e-12)
    changes = np.abs(ests - res.full.estimate)
    assert res.largest_change == pytest.approx(changes.max())
    assert res.most_influential[0] == res.deletions[int(np.argmax(changes))].label == res.largest_change_label


def test_delete_one_row_without_clusters_matches_refits() -> None:
    frame = hospitals(seed=9, n=40)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z1", controls="c")
    res = jackknife_influence(fd, null=0.3)
    assert res.unit == "row" and len(res.deletions) == 40
    for d in res.deletions[::7]:
        est, se, _, fs_f = refit(frame.drop(index=int(d.label)), 0.3, instruments="z1", controls="c")
        # exact identity: downdating one row equals the robust (HC1) refit without it
        assert (d.estimate, d.std_error, d.first_stage_f) == pytest.approx((est, se, fs_f), rel=1e-8)


def test_significance_flips_are_counted_against_the_full_sample() -> None:
    frame = hospitals(seed=13)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z1", controls="c", cluster="hosp")
    res = jackknife_influence(fd, null=0.0, alpha=0.05)
    assert res.full is not None
    full_sig = res.full.t_p_value < 0.05
    # definition: a flip is a deletion whose 5 % decision differs from the full sample's
    assert res.t_flips == sum((d.t_p_value < 0.05) != full_sig for d in res.deletions)
    assert res.ar_flips == sum((d.ar_p_value < 0.05) != (res.full.ar_p_value < 0.05) for d in res.deletions)
    lo, hi = res.first_stage_f_range or (math.nan, math.nan)
    assert lo == min(d.first_stage_f for d in res.deletions) and hi == max(
        d.first_stage_f for d in res.deletions
    )
    text = str(res)
    assert "Leave-one-cluster-out" in text and res.largest_change_label in text
    out = res.to_dict()
    assert len(out["deletions"]) == 12 and out["most_influential"][0] == res.largest_change_label


def test_not_applicable_cases_say_why() -> None:
    frame = hospitals(n=6000, seed=1)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z1")
    res = jackknife_influence(fd, max_rows=5000)
    assert not res.applicable and "6000 rows" in (res.reason or "")
    frame2 = hospitals()
    fd2 = fragility_data(frame2, outcome="y", treatment=["x", "c"], instruments=["z1", "z2"], cluster="hosp")
    assert "one treatment" in (jackknife_influence(fd2).reason or "")
