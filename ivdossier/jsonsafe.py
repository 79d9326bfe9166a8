"""JSON-safe values for storage and ``--json``, and typed records that round-trip result objects.

``json_safe`` writes infinities as "inf"/"-inf", NaN as null and datetimes as ISO text. ``Record`` gives a frozen
result dataclass a stored form that reads back as an equal object (see the notes above ``Record``).
"""

from __future__ import annotations

import collections.abc
import dataclasses
import math
import sys
import types
import typing
from collections.abc import Mapping
from datetime import datetime
from typing import Any, TypeVar, cast

from ivdossier.errors import InvalidInputError


def json_safe(value: Any) -> Any:
    """Make a value JSON-safe, recursing into mappings, sequences and objects with ``to_dict()``."""
    if isinstance(value, bool) or value is None or isinstance(value, int | str):
        return value
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return value
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    if isinstance(value, datetime):
        return value.isoformat()
    if hasattr(value, "to_dict"):
        return json_safe(value.to_dict())
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        return json_safe(value.tolist())
    return value


# ---------------------------------------------------------------- typed records
#
# A result class gains a stored form by inheriting from Record (a one-line change):
# ``to_record()`` writes every dataclass field by name, driven by the field types, and
# ``from_record(data)`` rebuilds an equal object. Non-finite floats are written as "nan", "inf", "-inf";
# numpy arrays as {"@ndarray": dtype, "shape": [...], "data": [...]}; a field whose declared type admits
# several record classes (or Any) carries the class name under "@type". Unknown keys are ignored on reading
# (so a stored form may carry extra, derived keys) and fields missing from old records take their defaults.

RECORD_KEY = "record"
"""Key of a stored run's results under which its typed record sits, beside the JSON view that plan rules read."""

TYPE_TAG = "@type"
ARRAY_TAG = "@ndarray"
FLOAT_TAG = "@float"

_RECORD_TYPES: dict[str, type[Record]] = {}
_HINTS: dict[type, dict[str, Any]] = {}

R = TypeVar("R", bound="Record")


class Record:
    """Mixin for frozen result dataclasses: a typed, round-tripping stored form (``to_record``/``from_record``)."""

    def __init_subclass__(cls, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        name = cls.__name__
        known = _RECORD_TYPES.get(name)
        if known is not None and known.__module__ != cls.__module__:
            raise TypeError(f"two record classes are called {name!r}; rename one of them.")
        _RECORD_TYPES[name] = cls

    def to_record(self) -> dict[str, Any]:
        """Every field by name, JSON-safe, tagged with the class name (read back by :meth:`from_record`)."""
        out = encode(self, type(self))
        assert isinstance(out, dict)
        return {TYPE_TAG: type(self).__name__, **out}

    @classmethod
    def from_record(cls: type[R], data: Mapping[str, Any]) -> R:
        """Rebuild the object from :meth:`to_record` output (or a record of a subclass named in ``@type``)."""
        value = decode(data, cls)
        return cast(R, value)


def record_type(name: str) -> type[Record]:
    """The record class stored under a type tag; the error lists the known names."""
    try:
        return _RECORD_TYPES[name]
    except KeyError:
        known = ", ".join(sorted(_RECORD_TYPES))
        raise InvalidInputError(f"no record type {name!r}; known types: {known}.") from None


def record_types() -> dict[str, type[Record]]:
    """Every record class defined so far, by name."""
    return dict(_RECORD_TYPES)


def load_record(data: Mapping[str, Any]) -> Record:
    """Rebuild a record from its stored form, choosing the class by its ``@type`` tag."""
    tag = data.get(TYPE_TAG) if isinstance(data, Mapping) else None
    if not isinstance(tag, str):
        raise InvalidInputError(
            f"a stored record needs a {TYPE_TAG!r} naming its class; got keys {sorted(data)}."
        )
    return record_type(tag).from_record(data)


def _hints(cls: type) -> dict[str, Any]:
    hints = _HINTS.get(cls)
    if hints is None:
        hints = typing.get_type_hints(cls)
        _HINTS[cls] = hints
    return hints


def _float_text(value: float) -> Any:
    if math.isnan(value):
        return "nan"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return value


def _numpy() -> Any:
    """numpy when it is loaded (no value can be a numpy object otherwise); keeps ``--help`` free of it."""
    return sys.modules.get("numpy")


def _key_text(key: Any) -> str:
    np = _numpy()
    if np is not None and isinstance(key, np.generic):
        key = key.item()
    return repr(key) if isinstance(key, float) else str(key)


def _union_args(tp: Any) -> tuple[Any, ...] | None:
    origin = typing.get_origin(tp)
    if origin is typing.Union or origin is types.UnionType:
        return typing.get_args(tp)
    return None


def _needs_tag(tp: Any) -> bool:
    """A value of this declared type may be one of several classes, so its class name is written."""
    if tp is Any or tp is object:
        return True
    args = _union_args(tp)
    if args is None:
        return False
    return sum(1 for a in args if dataclasses.is_dataclass(a)) > 1 or any(a is Any for a in args)


def encode(value: Any, tp: Any = Any) -> Any:
    """JSON-safe form of ``value`` read as declared type ``tp`` (see the module notes on records)."""
    if value is None or isinstance(value, bool | str):
        return value
    np = _numpy()
    if np is not None and isinstance(value, np.generic):
        value = value.item()  # a numpy scalar as the Python number it holds
        if isinstance(value, bool):
            return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        text = _float_text(value)
        if isinstance(text, str) and (tp is Any or tp is object or _union_args(tp) is not None):
            return {FLOAT_TAG: text}
        return text
    if np is not None and isinstance(value, np.ndarray):
        flat = [encode(v, float) if value.dtype.kind == "f" else encode(v) for v in value.ravel().tolist()]
        return {ARRAY_TAG: str(value.dtype), "shape": list(value.shape), "data": flat}
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        hints = _hints(type(value))
        out: dict[str, Any] = {}
        if _needs_tag(tp):
            out[TYPE_TAG] = type(value).__name__
        for f in dataclasses.fields(value):
            out[f.name] = encode(getattr(value, f.name), hints.get(f.name, Any))
        return out
    if isinstance(value, datetime):
        return value.isoformat()
    if isinstance(value, Mapping):
        vt = _item_types(tp)[1]
        return {_key_text(k): encode(v, vt) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [encode(v, t) for v, t in zip(value, _sequence_types(tp, len(value)), strict=True)]
    raise InvalidInputError(f"cannot store a value of type {type(value).__name__} in a record: {value!r}.")


def _item_types(tp: Any) -> tuple[Any, Any]:
    args = typing.get_args(tp)
    if typing.get_origin(tp) in (dict, Mapping, collections.abc.Mapping) and len(args) == 2:
        return args[0], args[1]
    args_u = _union_args(tp)
    if args_u:
        for a in args_u:
            if typing.get_origin(a) in (dict, Mapping, collections.abc.Mapping):
                return _item_types(a)
    return Any, Any


def _sequence_types(tp: Any, n: int) -> list[Any]:
    args_u = _union_args(tp)
    if args_u:
        for a in args_u:
            if typing.get_origin(a) in (tuple, list, collections.abc.Sequence):
                return _sequence_types(a, n)
        return [Any] * n
    origin, args = typing.get_origin(tp), typing.get_args(tp)
    if origin is tuple and args and args[-1] is not Ellipsis:
        return list(args) if len(args) == n else [Any] * n
    if origin in (tuple, list, collections.abc.Sequence) and args:
        return [args[0]] * n
    return [Any] * n


def _fail(tp: Any, data: Any) -> InvalidInputError:
    name = getattr(tp, "__name__", str(tp))
    return InvalidInputError(
        f"a stored record has {data!r} where a {name} was expected; the record is damaged."
    )


def _decode_float(data: Any, tp: Any) -> float:
    if isinstance(data, Mapping) and FLOAT_TAG in data:
        data = data[FLOAT_TAG]
    if isinstance(data, str) and data in ("nan", "inf", "-inf"):
        return float(data)
    if isinstance(data, int | float) and not isinstance(data, bool):
        return float(data)
    raise _fail(tp, data)


def _decode_any(data: Any) -> Any:
    if isinstance(data, Mapping):
        if TYPE_TAG in data:
            return record_type(str(data[TYPE_TAG])).from_record(data)
        if ARRAY_TAG in data:
            return _decode_array(data, Any)
        if set(data) == {FLOAT_TAG}:
            return _decode_float(data, float)
        return {k: _decode_any(v) for k, v in data.items()}
    if isinstance(data, list):
        return [_decode_any(v) for v in data]
    return data


def _fits(tp: Any, data: Any) -> bool:
    """Whether stored ``data`` can be a value of the declared type (used to pick a member of a union)."""
    if tp is type(None):
        return data is None
    if tp is Any or tp is object:
        return True
    if tp is bool:
        return isinstance(data, bool)
    if tp is int:
        return isinstance(data, int) and not isinstance(data, bool)
    if tp is float:
        return (isinstance(data, int | float) and not isinstance(data, bool)) or (
            isinstance(data, Mapping) and FLOAT_TAG in data
        )
    if tp is str:
        return isinstance(data, str)
    origin = typing.get_origin(tp) or tp
    if dataclasses.is_dataclass(origin):
        name = cast(type, origin).__name__
        return isinstance(data, Mapping) and data.get(TYPE_TAG, name) == name
    if _is_array_type(origin):
        return isinstance(data, Mapping) and ARRAY_TAG in data
    if origin in (dict, Mapping, collections.abc.Mapping):
        return isinstance(data, Mapping) and TYPE_TAG not in data and ARRAY_TAG not in data
    if origin in (tuple, list, collections.abc.Sequence):
        return isinstance(data, list)
    if origin is typing.Literal:
        return data in typing.get_args(tp)
    return False


def decode(data: Any, tp: Any) -> Any:
    """Rebuild a value of declared type ``tp`` from its :func:`encode` form."""
    if tp is Any or tp is object:
        return _decode_any(data)
    args_u = _union_args(tp)
    if args_u is not None:
        if data is None and type(None) in args_u:
            return None
        if isinstance(data, Mapping) and TYPE_TAG in data:
            return record_type(str(data[TYPE_TAG])).from_record(data)
        for member in args_u:
            if member is not type(None) and _fits(member, data):
                return decode(data, member)
        raise _fail(tp, data)
    if tp is type(None):
        if data is not None:
            raise _fail(tp, data)
        return None
    if tp is float:
        return _decode_float(data, tp)
    if tp is bool or tp is int or tp is str:
        if not _fits(tp, data):
            raise _fail(tp, data)
        return data
    origin, args = typing.get_origin(tp) or tp, typing.get_args(tp)
    if origin is typing.Literal:
        return data
    if _is_array_type(origin):
        return _decode_array(data, tp)
    if origin is datetime:
        return datetime.fromisoformat(str(data))
    if dataclasses.is_dataclass(origin):
        return _decode_dataclass(data, cast(type, origin))
    if origin in (dict, Mapping, collections.abc.Mapping):
        if not isinstance(data, Mapping):
            raise _fail(tp, data)
        kt, vt = args if len(args) == 2 else (Any, Any)
        return {_decode_key(k, kt): decode(v, vt) for k, v in data.items()}
    if origin in (tuple, list, collections.abc.Sequence):
        if not isinstance(data, list):
            raise _fail(tp, data)
        if origin is tuple and args and args[-1] is not Ellipsis:
            if len(args) != len(data):
                raise _fail(tp, data)
            return tuple(decode(v, t) for v, t in zip(data, args, strict=True))
        item = args[0] if args else Any
        items = [decode(v, item) for v in data]
        return items if origin is list else tuple(items)
    raise _fail(tp, data)


def _is_array_type(origin: Any) -> bool:
    np = _numpy()
    return np is not None and origin is np.ndarray


def _decode_array(data: Any, tp: Any) -> Any:
    import numpy as np

    if not isinstance(data, Mapping) or ARRAY_TAG not in data:
        raise _fail(tp, data)
    dtype = np.dtype(str(data[ARRAY_TAG]))
    values = [_decode_float(v, float) if dtype.kind == "f" else v for v in data["data"]]
    return np.asarray(values, dtype=dtype).reshape([int(s) for s in data["shape"]])


def _decode_key(key: str, tp: Any) -> Any:
    if tp is float:
        return float(key)
    if tp is int:
        return int(key)
    return key


def _decode_dataclass(data: Any, cls: type) -> Any:
    if not isinstance(data, Mapping):
        raise _fail(cls, data)
    tag = data.get(TYPE_TAG)
    if isinstance(tag, str) and tag != cls.__name__:
        target = record_type(tag)
        if not issubclass(target, cls):
            raise InvalidInputError(
                f"a stored record of type {tag!r} was read where a {cls.__name__} was expected."
            )
        cls = target
    hints = _hints(cls)
    renamed: Mapping[str, str] = getattr(cls, "RENAMED_FIELDS", {})  # old stored name -> field name
    if any(old in data for old in renamed):
        data = {**{renamed.get(k, k): v for k, v in data.items() if renamed.get(k, k) not in data}, **data}
    kwargs: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        if not f.init:
            continue
        if f.name not in data:
            if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                raise InvalidInputError(
                    f"a stored {cls.__name__} lacks the field {f.name!r}; the record is damaged or from an "
                    "incompatible version."
                )
            continue
        kwargs[f.name] = decode(data[f.name], hints.get(f.name, Any))
    return cls(**kwargs)
