"""Pure numerics for instrumental-variable estimation: data loading, estimators, covariance and diagnostics.

The package knows nothing of the registry database; a notebook user can call :func:`estimate` on a DataFrame.
The names below are imported on first use, so reading one result type does not load pandas and scipy.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from ivdossier.estimation.api import estimate
    from ivdossier.estimation.covariance import CovSpec
    from ivdossier.estimation.data import file_sha256, load_table
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.estimation.spec import ModelSpec

_HOME = {
    "estimate": "api",
    "CovSpec": "covariance",
    "file_sha256": "data",
    "load_table": "data",
    "EstimationResult": "result",
    "ModelSpec": "spec",
}
__all__ = ["CovSpec", "EstimationResult", "ModelSpec", "estimate", "file_sha256", "load_table"]


def __getattr__(name: str) -> Any:
    home = _HOME.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{home}"), name)
    globals()[name] = value
    return value
