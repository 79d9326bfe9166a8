"""The cluster pairs bootstrap refits resampled data exactly; its summaries follow their stated definitions.

Reference: each draw is rebuilt in the test as a new data set (drawn clusters stacked, repeated clusters
renamed so that each copy is its own cluster) and refitted through the project's estimation path.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.api import estimate_prepared
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.data import prepare
from ivdossier.estimation.fragility_data import fragility_data
from ivdossier.estimation.pairs_bootstrap import _counts, pairs_bootstrap
from ivdossier.estimation.strength import first_stage


def districts(seed: int = 6, g: int = 9, n: int = 180) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cl = rng.integers(0, g, n)
    z = rng.normal(size=n) + 0.4 * rng.normal(size=g)[cl]
    c = rng.normal(size=n)
    u = rng.normal(size=n) + 0.6 * rng.normal(size=g)[cl]
    x = 0.8 * z + 0.5 * u + rng.normal(size=n) + 0.2 * c
    y = -0.4 * x + u + 0.3 * c
    quarter = rng.integers(0, 3, n)
    return pd.DataFrame({"y": y, "x": x, "z": z, "c": c, "d": cl, "quarter": quarter})


def refit_resample(frame: pd.DataFrame, clusters: list[int], **spec: object) -> tuple[float, float, float]:
    """Stack the drawn clusters (copies renamed) and refit: 2SLS estimate, first-stage coefficient, robust F."""
    pieces = [frame[frame.d == k].assign(d=f"copy{j}") for j, k in enumerate(clusters)]
    data = pd.concat(pieces, ignore_index=True)
    prep = prepare(data, outcome="y", treatment="x", instruments="z", cluster="d", **spec)  # type: ignore[arg-type]
    res = estimate_prepared(prep, vcov="clustered", diagnostics=False)
    fs = first_stage(
        prep.X,
        prep.Z,
        spec=CovSpec("clustered", prep.clusters),
        n_partialled=prep.n_partialled,
        n_partialled_nested=prep.n_partialled_nested,
        endog_names=["x"],
        instrument_names=["z"],
    )
    row = fs.rows[0]
    return float(res.coef[0]), row.coefficients["z"], row.robust_f


def test_each_draw_equals_a_refit_of_the_resampled_clusters() -> None:
    frame = districts()
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", controls="c", cluster="d")
    res = pairs_bootstrap(fd, draws=25, seed=3)
    assert res.applicable and res.draws_used == 25 and res.estimates is not None
    counts = _counts(np.random.default_rng(3), 25, 9)  # the module's draws, one block
    labels = [int(v) for v in fd.cluster_labels]
    refits = []
    for row in counts:
        drawn = [labels[k] for k in range(9) for _ in range(int(row[k]))]
        refits.append(refit_resample(frame, drawn, controls="c"))
    est = np.array([r[0] for r in refits])
    # exact identity: reweighted cross-products equal refits of the stacked resample, draw by draw
    np.testing.assert_allclose(res.estimates, est, rtol=1e-9)
    pis = np.array([r[1] for r in refits])
    # definition: bootstrapped F = pi_hat^2 / var*(pi) with one instrument
    pi_hat = refit_resample(frame, labels, controls="c")[1]
    assert res.bootstrapped_f == pytest.approx(pi_hat**2 / np.var(pis, ddof=1), rel=1e-8)
    assert res.percentile_interval == pytest.approx(tuple(np.quantile(est, [0.025, 0.975])), rel=1e-9)
    f_draws = np.array([r[2] for r in refits])
    assert res.f_percentiles == pytest.approx(tuple(np.quantile(f_draws, [0.05, 0.5, 0.95])), rel=1e-8)


def test_crossed_fixed_effects_are_partialled_again_per_draw() -> None:
    frame = districts(seed=8)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", absorb="quarter", cluster="d")
    res = pairs_bootstrap(fd, draws=6, seed=5)
    assert res.method is not None and "partialled again" in res.method and res.estimates is not None
    rng = np.random.default_rng(5)
    labels = [int(v) for v in fd.cluster_labels]
    est = [
        refit_resample(frame, [labels[k] for k in rng.integers(0, 9, size=9)], absorb="quarter")[0]
        for _ in range(6)
    ]
    # exact identity with refits of the same resamples
    np.testing.assert_allclose(res.estimates, est, rtol=1e-9)


def test_summary_states_draws_and_seed_and_options_are_checked() -> None:
    frame = districts()
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", cluster="d")
    res = pairs_bootstrap(fd, draws=50, seed=11)
    text = str(res)
    assert "50 of 50 draws" in text and "seed 11" in text
    assert res.to_dict()["resampled"] == "clusters"
    with pytest.raises(InvalidInputError, match="draws must be at least 2"):
        pairs_bootstrap(fd, draws=1)


def test_fixed_effects_nested_in_the_clusters_use_cross_products_and_match_refits() -> None:
    frame = districts(seed=12)
    frame["ward"] = frame.d * 2 + (frame.index % 2)  # nested in the districts
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", absorb="ward", cluster="d")
    res = pairs_bootstrap(fd, draws=8, seed=2)
    assert res.method == "reweighted per-cluster cross-products" and res.estimates is not None
    counts = _counts(np.random.default_rng(2), 8, 9)
    labels = [int(v) for v in fd.cluster_labels]
    est = [
        refit_resample(frame, [labels[k] for k in range(9) for _ in range(int(row[k]))], absorb="ward")[0]
        for row in counts
    ]
    # exact identity: duplicated clusters keep their within-ward demeaning, so reweighting equals refitting
    np.testing.assert_allclose(res.estimates, est, rtol=1e-9)
