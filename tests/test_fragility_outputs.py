"""Fragility results print, serialise to JSON (infinite set ends as text) and carry the caution text."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.fragility_data import CAUTION, fragility_data
from ivdossier.estimation.influence import jackknife_influence
from ivdossier.estimation.pairs_bootstrap import pairs_bootstrap
from ivdossier.estimation.subvector import subvector_anderson_rubin
from ivdossier.estimation.wild_bootstrap import wild_bootstrap


def weak_design(seed: int = 1, g: int = 15, n: int = 300) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cl = rng.integers(0, g, n)
    z = rng.normal(size=n)
    u = rng.normal(size=n) + rng.normal(size=g)[cl]
    x = 0.0 * z + 0.8 * u + rng.normal(size=n)  # the instrument is irrelevant
    return pd.DataFrame({"y": 0.5 * x + u, "x": x, "z": z, "cl": cl})


def test_irrelevant_instrument_gives_an_unbounded_bootstrap_anderson_rubin_set() -> None:
    fd = fragility_data(weak_design(), outcome="y", treatment="x", instruments="z", cluster="cl")
    res = wild_bootstrap(fd, null=0.5, draws=499, seed=3, tests=("ar",))
    ar = res.anderson_rubin
    assert ar is not None and ar.intervals is not None
    # theory (Dufour 1997, Econometrica, recalled): without identification a valid set is unbounded with positive
    # probability; here far nulls are accepted because AR(b) tends to the first-stage Wald statistic (near 0)
    assert ar.shape in ("whole_line", "two_rays", "ray")
    text = json.dumps(res.to_dict())
    assert '"inf"' in text or '"-inf"' in text


def test_every_result_serialises_and_carries_the_caution() -> None:
    rng = np.random.default_rng(0)
    frame = weak_design(seed=4)
    frame["x"] = frame.x + 0.8 * frame.z
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", cluster="cl")
    results = [
        wild_bootstrap(fd, draws=99, seed=1, confidence_sets=False),
        pairs_bootstrap(fd, draws=49, seed=1),
        jackknife_influence(fd),
        subvector_anderson_rubin(
            frame.y.to_numpy() - frame.y.mean(),
            np.column_stack([frame.x - frame.x.mean(), rng.normal(size=300)]),
            np.column_stack([frame.z - frame.z.mean(), rng.normal(size=300)]),
            index=0,
            spec=CovSpec("heteroskedastic"),
            n_partialled=1,
            confidence_set=False,
        ),
    ]
    for res in results:
        out = json.loads(json.dumps(res.to_dict()))
        assert out["caution"] == CAUTION and "exclusion or exogeneity" in CAUTION
        assert str(res).strip()
