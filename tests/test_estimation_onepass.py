"""The two-pass route to the sufficient statistics (estimation/onepass.py) against the exact path.

References: exact identities. The exact path (prepare: explicit partialled columns; build: CholeskyQR2 or
Householder QR on them) computes the same statistics from the same data, so on well-conditioned designs every
number of the result must agree to the bound stated in the module docstring (asked here: 1e-11 relative);
accumulating in blocks of any size gives the same sums up to rounding. On the edge cases of issue 12 the rule
must send the model to the exact path (the reason is checked), and the result is then the exact path's.
Outside references (linearmodels, statsmodels, pyfixest, NIST) are checked through ``estimate`` in the other
estimation test files, which now take this route whenever the rule allows.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation import estimate, onepass
from ivdossier.estimation.api import estimate_prepared
from ivdossier.estimation.data import prepare, read_columns
from ivdossier.estimation.onepass import one_pass_cross_products

AGREE = 1e-11  # the fast path's stated agreement with the exact path on well-conditioned designs


def _design(seed: int, n: int = 2000, *, weights: bool = False) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 3))
    c = rng.normal(size=(n, 3)) + np.array([5.0, -2.0, 100.0])  # means far from zero: the shift matters
    u = rng.normal(size=n)
    x = z @ np.array([0.3, -0.2, 0.1]) + 0.2 * c[:, 0] + 0.6 * u + rng.normal(size=n)
    x2 = z @ np.array([0.1, 0.3, -0.2]) + rng.normal(size=n)
    y = 0.7 * x - 0.4 * x2 + c @ np.array([0.3, -0.1, 0.02]) + u * (1 + 0.5 * np.abs(z[:, 0]))
    out = pd.DataFrame({"y": y, "x": x, "x2": x2, "z1": z[:, 0], "z2": z[:, 1], "z3": z[:, 2]})
    for j in range(3):
        out[f"c{j}"] = c[:, j]
    out["g"] = rng.integers(0, 60, n)
    out["h"] = rng.integers(0, 7, n)
    if weights:
        out["w"] = rng.uniform(0.2, 3.0, n)
    return out


def _flat(d: Any, pre: str = "") -> dict[str, Any]:
    out: dict[str, Any] = {}
    if isinstance(d, dict):
        for k, v in d.items():
            out.update(_flat(v, f"{pre}/{k}"))
    elif isinstance(d, list | tuple):
        for i, v in enumerate(d):
            out.update(_flat(v, f"{pre}[{i}]"))
    else:
        out[pre] = d
    return out


def _kwargs(case: str) -> dict[str, Any]:
    base: dict[str, Any] = {
        "outcome": "y",
        "treatment": "x",
        "instruments": ["z1", "z2"],
        "controls": ["c0", "c1", "c2"],
    }
    if case == "clustered":
        return {**base, "vcov": "clustered", "cluster": "g"}
    if case == "two-way":
        return {**base, "vcov": "clustered", "cluster": ["g", "h"]}
    if case == "weighted":
        return {**base, "vcov": "heteroskedastic", "weights": "w"}
    if case == "two treatments":
        return {
            **base,
            "treatment": ["x", "x2"],
            "instruments": ["z1", "z2", "z3"],
            "vcov": "heteroskedastic",
        }
    if case == "liml":
        return {**base, "method": "liml", "vcov": "clustered", "cluster": "g"}
    if case == "ols":
        return {**base, "instruments": (), "method": "ols", "vcov": "heteroskedastic"}
    if case == "no controls":
        return {**base, "controls": (), "vcov": "homoskedastic"}
    return {**base, "vcov": case}


def _exact(df: pd.DataFrame, kw: dict[str, Any]) -> Any:
    """The exact path: explicit partialled columns, then the sufficient statistics built from them."""
    spec = {k: v for k, v in kw.items() if k not in ("vcov", "method")}
    prepared = prepare(df, require_instruments=kw.get("method", "2sls") != "ols", **spec)
    return estimate_prepared(prepared, method=kw.get("method", "2sls"), vcov=kw["vcov"])


def _fast_reason(df: pd.DataFrame, kw: dict[str, Any]) -> str:
    cols = read_columns(
        df,
        outcome=kw["outcome"],
        treatment=kw["treatment"],
        instruments=kw.get("instruments", ()),
        controls=kw.get("controls", ()),
        absorb=kw.get("absorb", ()),
        cluster=kw.get("cluster"),
        weights=kw.get("weights"),
        require_instruments=kw.get("method", "2sls") != "ols",
        check_finite=False,
    )
    cp, reason = one_pass_cross_products(cols, kind=kw["vcov"], small_sample=True)
    assert (cp is None) == bool(reason)
    return reason


def _assert_agree(new: Any, old: Any, rel: float) -> None:
    fn, fo = _flat(new.to_dict()), _flat(old.to_dict())
    assert fn.keys() == fo.keys()
    for key, b in fo.items():
        a = fn[key]
        if isinstance(b, float) and isinstance(a, float):
            if math.isnan(b) or math.isinf(b):
                assert a == b or (math.isnan(a) and math.isnan(b)), key
            elif "p_value" in key:  # a p-value near 0 is a tail area: compare on the absolute scale
                assert a == pytest.approx(b, rel=rel, abs=1e-13), key
            else:
                assert a == pytest.approx(b, rel=rel, abs=rel * 1e-3), key
        else:
            assert a == b, key


@pytest.mark.parametrize(
    "case",
    [
        "homoskedastic",
        "heteroskedastic",
        "clustered",
        "two-way",
        "weighted",
        "two treatments",
        "liml",
        "ols",
        "no controls",
    ],
)
def test_the_fast_path_agrees_with_the_exact_path_on_well_conditioned_designs(case: str) -> None:
    df = _design(11, weights=case == "weighted")
    kw = _kwargs(case)
    assert _fast_reason(df, kw) == ""  # the rule takes the fast path here
    _assert_agree(estimate(df, **kw), _exact(df, kw), AGREE)


def test_blocks_of_any_size_give_the_same_statistics(monkeypatch: pytest.MonkeyPatch) -> None:
    """Chunk-by-chunk accumulation: blocks of 37 rows (clusters spanning blocks) against one block."""
    df = _design(12)
    kw = _kwargs("two-way")
    monkeypatch.setattr(onepass, "BLOCK_ROWS", 37)
    small = estimate(df, **kw)
    monkeypatch.setattr(onepass, "BLOCK_ROWS", 1 << 20)
    whole = estimate(df, **kw)
    _assert_agree(small, whole, 1e-12)


def test_the_rule_is_the_same_in_any_units() -> None:
    """Every test of the rule is a ratio: rescaling any column by 1e8 or 1e-8 keeps the fast path."""
    df = _design(13)
    kw = _kwargs("clustered")
    for col in ("y", "x", "z1", "c2"):
        for s in (1e8, 1e-8):
            assert _fast_reason(df.assign(**{col: df[col] * s}), kw) == ""


def _mroz_like(seed: int = 3, n: int = 500) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=n)
    c = rng.normal(size=n)
    x = 0.5 * z + 0.3 * c + rng.normal(size=n)
    y = 0.4 * x + c + rng.normal(size=n)
    return pd.DataFrame(
        {"y": y, "x": x, "z1": z, "c0": c, "noise": rng.normal(size=n), "g": rng.integers(0, 20, n)}
    )


BASE = {
    "outcome": "y",
    "treatment": "x",
    "instruments": ["z1", "z2"],
    "controls": ["c0"],
    "vcov": "heteroskedastic",
}


@pytest.mark.parametrize(
    ("change", "reason"),
    [
        ({"z2": lambda d: d.z1 + 1e-7 * d.noise}, "nearly collinear"),  # issue 12: near-collinear instruments
        ({"z2": lambda d: d.z1 + 1e-4 * d.noise}, "nearly collinear"),  # Cholesky diagonal 1e-4 < 1e-3
        ({"c0": lambda d: 1e7 + d.c0}, "constant or nearly so"),  # mean 1e7 x its spread
        ({"c1": lambda d: 0.0 * d.c0 + 3.0}, "constant or nearly so"),  # a constant control
        ({"c1": lambda d: 2.0 * d.c0 + 1e-5 * d.noise}, "controls are nearly collinear"),
        ({"x": lambda d: d.c0 * 2.0 + 1e-9 * d.noise}, "keeps (nearly) nothing"),
        ({"y": lambda d: d.c0 + 1e-12 * d.noise}, "outcome"),
        ({"y": lambda d: d.y.where(d.index != 5)}, "missing or infinite"),
        ({"z1": lambda d: d.z1.where(d.index != 7, np.inf)}, "missing or infinite"),
    ],
)
def test_the_rule_sends_the_edge_cases_to_the_exact_path(change: dict[str, Any], reason: str) -> None:
    df = _mroz_like().assign(z2=lambda d: d.noise + 0.5 * d.z1)
    kw = dict(BASE)
    df = df.assign(**change)
    if "c1" in change:
        kw["controls"] = ["c0", "c1"]
    assert reason in _fast_reason(df, kw)


def test_after_the_switch_the_result_is_the_exact_paths() -> None:
    """Nearly collinear instruments (issue 12): estimate() gives exactly what prepare + build give."""
    df = _mroz_like().assign(z2=lambda d: d.z1 + 1e-7 * d.noise)
    kw = dict(BASE)
    _assert_agree(estimate(df, **kw), _exact(df, kw), 0.0)


def test_the_exact_path_still_names_the_problems_the_fast_path_skips() -> None:
    df = _mroz_like().assign(z2=lambda d: d.noise)
    kw = dict(BASE)
    with pytest.raises(InvalidInputError, match="'z1' holds an infinite value at row 7"):
        estimate(df.assign(z1=df.z1.where(df.index != 7, np.inf)), **kw)
    with pytest.raises(InvalidInputError, match="'w' holds 1 zero or negative value"):
        estimate(df.assign(w=np.where(df.index == 3, 0.0, 1.0)), **kw, weights="w")
    # a non-positive weight on a row that is dropped for a missing value is not an error (as before)
    dropped = df.assign(w=np.where(df.index == 3, -1.0, 1.0), y=df.y.where(df.index != 3))
    assert estimate(dropped, **kw, weights="w").n_dropped == 1
    with pytest.raises(EstimationError, match="Instrument 'z1' is constant"):
        estimate(df.assign(z1=1.0), **kw)
    with pytest.raises(InvalidInputError, match="single level"):
        estimate(df.assign(g=1), **{**kw, "vcov": "clustered", "cluster": "g"})


def test_a_zero_first_stage_on_the_fast_path_is_not_identified() -> None:
    """Issue 12: the fast path keeps the exact-zero first stage exact (x and z orthogonal after centring)."""
    rng = np.random.default_rng(4)
    n = 300
    x, z = rng.normal(size=n), rng.normal(size=n)
    xc, zc = x - x.mean(), z - z.mean()
    z = zc - (zc @ xc) / (xc @ xc) * xc
    df = pd.DataFrame({"y": 0.5 * x + rng.normal(size=n), "x": x, "z": z})
    kw = {"outcome": "y", "treatment": "x", "instruments": "z", "vcov": "heteroskedastic"}
    assert _fast_reason(df, kw) == ""
    res = estimate(df, **kw)
    assert res.identification is not None and "'z'" in res.identification
    assert math.isnan(res.coef_of("x"))


def test_cluster_ids_already_coded_are_used_as_they_are_and_define_the_same_clusters() -> None:
    """Exact identity: the codes define the same partition of the rows as pandas.factorize's."""
    from ivdossier.estimation.data import _codes

    rng = np.random.default_rng(5)
    ids = pd.Series(np.r_[np.arange(50), rng.integers(0, 50, 950)].astype(np.int64))
    codes, g = _codes(ids, any_order=True)
    ref, uniques = pd.factorize(ids)
    assert g == len(uniques) == 50 and np.shares_memory(codes, ids.to_numpy())
    assert len(set(zip(codes.tolist(), ref.tolist(), strict=True))) == 50  # one-to-one
    gappy = ids.where(ids != 7, 49)  # level 7 absent: factorised as before
    codes2, g2 = _codes(gappy, any_order=True)
    assert g2 == 49 and np.array_equal(codes2, pd.factorize(gappy)[0])


def test_string_cluster_ids_give_the_same_result_as_integer_ids() -> None:
    df = _design(14)
    kw = _kwargs("clustered")
    as_text = df.assign(g="site-" + df.g.astype(str))
    _assert_agree(estimate(as_text, **kw), estimate(df, **kw), AGREE)
    _assert_agree(estimate(as_text, **kw), _exact(as_text, kw), AGREE)
