"""Pure numerics for instrumental-variable estimation: data loading, estimators, covariance and diagnostics.

The package knows nothing of the registry database; a notebook user can call :func:`estimate` on a DataFrame.
"""

from __future__ import annotations

from ivdossier.estimation.api import estimate
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.data import file_sha256, load_table
from ivdossier.estimation.result import EstimationResult
from ivdossier.estimation.spec import ModelSpec

__all__ = ["CovSpec", "EstimationResult", "ModelSpec", "estimate", "file_sha256", "load_table"]
