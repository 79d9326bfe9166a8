"""Typed records: every stored result type reads back from its stored form as an equal object.

The property test draws arbitrary field values (NaN, infinities, empty and odd-shaped arrays, optional fields
left empty) from each class's own type hints, so a new field or a new result class is covered without a new
strategy. The check is an exact identity: decode(encode(x)) has the same fields, of the same types, as x.
"""

from __future__ import annotations

import dataclasses
import json
import math
import types
import typing
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import ivdossier.estimation.api
import ivdossier.estimation.compliers
import ivdossier.estimation.decision_maker_checks
import ivdossier.estimation.design_results
import ivdossier.estimation.exposure_share
import ivdossier.estimation.falsification
import ivdossier.estimation.influence
import ivdossier.estimation.jackknife_iv
import ivdossier.estimation.leave_out
import ivdossier.estimation.many_instruments
import ivdossier.estimation.omitted_variable
import ivdossier.estimation.pairs_bootstrap
import ivdossier.estimation.power
import ivdossier.estimation.sensitivity
import ivdossier.estimation.subgroups
import ivdossier.estimation.subvector
import ivdossier.estimation.variant_summary
import ivdossier.estimation.wild_bootstrap  # noqa: F401
from ivdossier.errors import InvalidInputError
from ivdossier.jsonsafe import Record, load_record, record_types
from ivdossier.vocabulary import NotApplicable

# Every result a run stores, and every type nested in one; the test below fails if a stored type is not a Record.
STORED = sorted(record_types().items())
TOP_LEVEL = (
    "EstimationResult", "InstrumentRegressions", "ZeroFirstStageResult", "PerInstrumentResult", "SubgroupSigns",
    "UnionIntervalResult", "LocalToZeroResult", "BreakdownResult", "ComplierReport", "PowerAnalysis",
    "DecisionMakerDesign", "ExposureShareDesign", "SummaryEvidence", "IvRobustness", "SensitivityNotApplicable",
    "WildBootstrapResult", "PairsBootstrapResult", "InfluenceResult", "SubvectorAR",
)  # fmt: skip

FLOATS = st.floats(allow_nan=True, allow_infinity=True, width=64)
TEXT = st.text(max_size=6)


def strategy(tp: Any, depth: int = 0) -> st.SearchStrategy[Any]:
    """Values of a declared type, built from the type alone."""
    if tp is Any or tp is object:
        return st.one_of(st.none(), FLOATS, TEXT, st.dictionaries(TEXT, FLOATS, max_size=3))
    if tp is type(None):
        return st.none()
    if tp is bool:
        return st.booleans()
    if tp is int:
        return st.integers(-(2**40), 2**40)
    if tp is float:
        return FLOATS
    if tp is str:
        return TEXT
    origin, args = typing.get_origin(tp), typing.get_args(tp)
    if origin is typing.Union or origin is types.UnionType:
        return st.one_of(*(strategy(a, depth) for a in args))
    if origin is typing.Literal:
        return st.sampled_from(args)
    if tp is np.ndarray or origin is np.ndarray:
        shapes = hnp.array_shapes(min_dims=0, max_dims=2, min_side=0, max_side=3)
        return hnp.arrays(np.float64, shapes, elements=FLOATS)
    if origin is tuple:
        if args and args[-1] is Ellipsis:
            return st.lists(strategy(args[0], depth + 1), max_size=3).map(tuple)
        return st.tuples(*(strategy(a, depth + 1) for a in args))
    if origin is list:
        return st.lists(strategy(args[0] if args else Any, depth + 1), max_size=3)
    if origin in (dict, typing.Mapping) or str(origin) == "<class 'collections.abc.Mapping'>":
        kt, vt = args if args else (str, Any)
        keys = st.floats(allow_nan=False, allow_infinity=False) if kt is float else strategy(kt, depth + 1)
        return st.dictionaries(keys, strategy(vt, depth + 1), max_size=3)
    if dataclasses.is_dataclass(tp):
        hints = typing.get_type_hints(tp)
        fields = {f.name: strategy(hints[f.name], depth + 1) for f in dataclasses.fields(tp) if f.init}
        return st.builds(tp, **fields)
    raise AssertionError(f"no strategy for {tp!r}: extend strategy() in this test")


def same(a: Any, b: Any) -> bool:
    """Structural equality that treats NaN as equal to NaN and tells tuples from lists."""
    if type(a) is not type(b):
        return False
    if isinstance(a, float):
        return (math.isnan(a) and math.isnan(b)) or a == b
    if isinstance(a, np.ndarray):
        return a.dtype == b.dtype and a.shape == b.shape and np.array_equal(a, b, equal_nan=True)
    if dataclasses.is_dataclass(a):
        return all(same(getattr(a, f.name), getattr(b, f.name)) for f in dataclasses.fields(a))
    if isinstance(a, dict):
        return list(a) == list(b) and all(same(a[k], b[k]) for k in a)
    if isinstance(a, list | tuple):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b, strict=True))
    return bool(a == b)


@pytest.mark.parametrize(("name", "cls"), STORED, ids=[n for n, _ in STORED])
@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_every_record_type_round_trips_through_json(
    name: str, cls: type[Record], data: st.DataObject
) -> None:
    if cls.__module__.endswith("spec"):
        pytest.skip("ModelSpec validates its fields; it has its own tests")
    value = data.draw(strategy(cls))
    stored = json.loads(json.dumps(value.to_record(), allow_nan=False))  # strict JSON: no NaN literals
    again = load_record(stored)
    assert same(again, value), f"{name} changed in a round trip"  # exact identity


def test_every_stored_result_type_is_a_record() -> None:
    assert set(TOP_LEVEL) <= set(record_types())


def test_real_estimation_result_reads_back_with_typed_diagnostics() -> None:
    import pandas as pd

    from ivdossier.estimation import estimate
    from ivdossier.estimation.diagnostics import DiagnosticSuite

    rng = np.random.default_rng(3)
    n = 200
    z, u = rng.normal(size=(2, n))
    x = z + u + rng.normal(size=n)
    frame = pd.DataFrame({"y": 0.5 * x - u + rng.normal(size=n), "x": x, "z": z, "z2": rng.normal(size=n)})
    result = estimate(frame, outcome="y", treatment="x", instruments=["z", "z2"])
    again = load_record(json.loads(json.dumps(result.to_record())))
    assert isinstance(again.diagnostics, DiagnosticSuite)
    assert same(again, result)  # exact identity, including every diagnostic section
    assert again.to_dict() == result.to_dict()  # the JSON view is rebuilt exactly from the typed object
    ols = estimate(frame, outcome="y", treatment="x", method="ols")
    again_ols = load_record(json.loads(json.dumps(ols.to_record())))
    assert isinstance(again_ols.diagnostics, NotApplicable)
    assert again_ols.not_applicable == ols.not_applicable is not None


def test_damaged_records_are_refused_with_the_missing_field_named() -> None:
    with pytest.raises(InvalidInputError, match="lacks the field 'reason'"):
        load_record({"@type": "NotApplicable"})
    with pytest.raises(InvalidInputError, match="no record type 'Nope'"):
        load_record({"@type": "Nope"})
    with pytest.raises(InvalidInputError, match="needs a '@type'"):
        load_record({"reason": "x"})
