"""Shared test data for the engine tests: an invented telehealth scenario and a deep comparison of results.

Rows are patients; ``district`` (postal district, the cluster) and ``clinic`` (the absorbed factor) are
categorical; ``fibre_wave`` and ``clerk_pull`` are the instruments, ``tele_share`` (and ``tele_visits``) the
treatments, ``ed_visits`` the outcome, ``age`` and ``mast_km`` controls and ``weight`` an analytic weight.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

RTOL = 1e-10


def telehealth_frame(n: int = 2400, seed: int = 20261202) -> pd.DataFrame:
    """A seeded simulation with confounding (v), clinic effects and a few missing values."""
    rng = np.random.default_rng(seed)
    district = rng.integers(0, 48, n)
    clinic = rng.integers(0, 30, n)
    fibre_wave = rng.integers(1, 5, n) + 0.2 * rng.normal(size=n)
    clerk_pull = rng.normal(size=n) + 0.05 * district
    extra_z = rng.normal(size=n)
    age = 50 + 12 * rng.normal(size=n)
    mast_km = np.abs(8 + 3 * rng.normal(size=n))
    v = rng.normal(size=n)
    tele_share = 0.4 * fibre_wave + 0.3 * clerk_pull + 0.01 * age + 0.1 * clinic / 10 + v
    tele_visits = 0.2 * fibre_wave - 0.4 * extra_z + 0.5 * rng.normal(size=n) + 0.3 * v
    ed_visits = 2.0 - 0.7 * tele_share + 0.2 * tele_visits + 0.02 * age + 0.05 * mast_km + 0.8 * v
    ed_visits += 0.1 * (clinic % 7) + rng.normal(size=n)
    frame = pd.DataFrame(
        {
            "ed_visits": ed_visits,
            "tele_share": tele_share,
            "tele_visits": tele_visits,
            "fibre_wave": fibre_wave,
            "clerk_pull": clerk_pull,
            "extra_z": extra_z,
            "age": age,
            "mast_km": mast_km,
            "weight": rng.uniform(0.5, 3.0, n),
            "district": [f"D{d:02d}" for d in district],
            "clinic": clinic.astype(np.int64),
        }
    )
    frame.loc[[3, 17], "ed_visits"] = np.nan
    frame.loc[40, "age"] = np.nan
    return frame


DESIGNS: dict[str, dict[str, Any]] = {
    "2sls-robust": {"vcov": "heteroskedastic"},
    "2sls-unadjusted": {"vcov": "homoskedastic"},
    "2sls-cluster-weights": {"vcov": "clustered", "cluster": "district", "weights": "weight"},
    "liml-robust-absorb-weights": {"method": "liml", "absorb": "clinic", "weights": "weight"},
    "fuller-cluster-absorb": {
        "method": "fuller",
        "vcov": "clustered",
        "cluster": "district",
        "absorb": "clinic",
    },
    "2sls-twoway": {"vcov": "clustered", "cluster": ["district", "clinic"]},
    "two-treatments-robust": {
        "treatment": ["tele_share", "tele_visits"],
        "instruments": ["fibre_wave", "clerk_pull", "extra_z"],
    },
    "ols-cluster-absorb": {
        "method": "ols",
        "instruments": [],
        "vcov": "clustered",
        "cluster": "district",
        "absorb": "clinic",
    },
    "2sls-cluster-nested-absorb": {
        "vcov": "clustered",
        "cluster": "clinic",
        "absorb": "clinic",
        "weights": "weight",
    },
    "large-sample-robust": {"small_sample": False, "controls": []},
}


def model_options(design: str) -> dict[str, Any]:
    """Full keyword options of one design."""
    opts: dict[str, Any] = {
        "outcome": "ed_visits",
        "treatment": "tele_share",
        "instruments": ["fibre_wave", "clerk_pull"],
        "controls": ["age", "mast_km"],
    }
    opts.update(DESIGNS[design])
    return opts


def assert_same(a: Any, b: Any, path: str = "result") -> None:
    """Every number of ``a`` within RTOL (relative) of ``b``; every other leaf equal."""
    if isinstance(b, dict):
        assert isinstance(a, dict) and set(a) == set(b), f"{path}: keys {sorted(a)} != {sorted(b)}"
        for key in b:
            assert_same(a[key], b[key], f"{path}.{key}")
    elif isinstance(b, (list, tuple)):
        assert isinstance(a, (list, tuple)) and len(a) == len(b), f"{path}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            assert_same(x, y, f"{path}[{i}]")
    elif isinstance(b, float) and not isinstance(b, bool):
        assert isinstance(a, (float, int)), f"{path}: {a!r} is not a number"
        if math.isnan(b) or math.isinf(b):
            assert a == b or (math.isnan(a) and math.isnan(b)), f"{path}: {a!r} != {b!r}"
        else:
            assert abs(a - b) <= RTOL * abs(b) + 1e-300, (
                f"{path}: {a!r} != {b!r} (relative {abs(a - b) / abs(b):.2e})"
            )
    else:
        assert a == b, f"{path}: {a!r} != {b!r}"
