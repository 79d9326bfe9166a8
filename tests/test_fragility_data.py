"""Arranging a model for the fragility diagnostics: which re-partialling path applies, and clear errors."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.fragility_data import fragility_data


def frame(n: int = 120, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cl = rng.integers(0, 6, n)
    out = pd.DataFrame(
        {
            "y": rng.normal(size=n),
            "x": rng.normal(size=n),
            "z": rng.normal(size=n),
            "c": rng.normal(size=n),
            "clinic": [f"clinic-{k}" for k in cl],
            "room": cl * 2 + rng.integers(0, 2, n),
            "week": rng.integers(0, 4, n),
        }
    )
    out.loc[3, "c"] = np.nan
    return out


def test_residualising_base_on_the_basis_reproduces_the_partialled_arrays() -> None:
    data = frame()
    for absorb in ((), ("room",)):
        fd = fragility_data(
            data, outcome="y", treatment="x", instruments="z", controls="c", absorb=absorb, cluster="clinic"
        )
        assert fd.base is not None and fd.w_basis is not None
        coef = np.linalg.lstsq(fd.w_basis, fd.base, rcond=None)[0]
        resid = fd.base - fd.w_basis @ coef
        p = fd.prepared
        # Frisch–Waugh–Lovell identity: the explicit basis spans what prepare() partialled out
        np.testing.assert_allclose(resid, np.column_stack([p.y, p.X, p.Z]), atol=1e-10)
        assert p.n_dropped == 1 and fd.n_groups == 6 and fd.cluster_labels[0].startswith("clinic-")


def test_crossed_fixed_effects_use_the_exact_reprojection() -> None:
    data = frame()
    fd = fragility_data(
        data, outcome="y", treatment="x", instruments="z", controls="c", absorb="week", cluster="clinic"
    )
    assert fd.base is None and "not nested" in fd.partialling
    p = fd.prepared
    raw = data.dropna()[["y", "x", "z"]].to_numpy()
    # identity: reprojecting the raw columns gives prepare()'s partialled arrays
    np.testing.assert_allclose(fd.reproject(raw), np.column_stack([p.y, p.X, p.Z]), atol=1e-10)


def test_errors_name_the_problem() -> None:
    data = frame()
    with pytest.raises(InvalidInputError, match="one cluster variable, got 2"):
        fragility_data(data, outcome="y", treatment="x", instruments="z", cluster=["clinic", "week"])  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="Column 'zz' is not in the data"):
        fragility_data(data, outcome="y", treatment="x", instruments="zz")
    with pytest.raises(InvalidInputError, match="must be a pandas DataFrame"):
        fragility_data(data.to_numpy(), outcome="y", treatment="x", instruments="z")  # type: ignore[arg-type]
