"""The weak-instrument diagnostic suite: one call that gathers first stage, strength, weak-IV-robust
inference, reduced form, over-identification and endogeneity for a fitted IV model.

All inputs are partialled on the controls and absorbed fixed effects and scaled by sqrt(weights); see the
modules ``strength``, ``robust_inference`` and ``specification`` for each statistic's conventions. Statistics
speak to relevance (and, partly, to the coherence of several instruments); none of them can establish that an
instrument is excluded or exogenous, and conclusions for policy or clinical decisions need domain review.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.robust_inference import (
    ReducedForm,
    WeakIVRobustSection,
    anderson_rubin,
    clr_inference,
    reduced_form,
    tf_inference,
)
from ivdossier.estimation.specification import Endogeneity, OverId, durbin_wu_hausman, overid_test
from ivdossier.estimation.strength import (
    FirstStageSection,
    StrengthSection,
    as_matrix,
    first_stage,
    strength_section,
)
from ivdossier.jsonsafe import Record

CAUTION = (
    "These statistics assess instrument strength and internal coherence only; they cannot establish "
    "exclusion or exogeneity, and conclusions for policy or clinical decisions need domain review."
)


@dataclass(frozen=True)
class DiagnosticSuite(Record):
    """Every weak-instrument diagnostic for one fitted model, section by section."""

    first_stage: FirstStageSection
    strength: StrengthSection
    weak_iv_robust: WeakIVRobustSection
    reduced_form: ReducedForm
    overid: OverId
    endogeneity: Endogeneity
    method: str
    kappa: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict with one key per section."""
        return {
            "first_stage": self.first_stage.to_dict(),
            "strength": self.strength.to_dict(),
            "weak_iv_robust": self.weak_iv_robust.to_dict(),
            "reduced_form": self.reduced_form.to_dict(),
            "overid": self.overid.to_dict(),
            "endogeneity": self.endogeneity.to_dict(),
            "caution": CAUTION,
        }


def weak_iv_suite(
    y: np.ndarray,
    X: np.ndarray,
    Z: np.ndarray,
    *,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int,
    beta: np.ndarray,
    method: str,
    kappa: float,
    endog_names: list[str],
    instrument_names: list[str],
    alpha: float = 0.05,
) -> DiagnosticSuite:
    """Run the whole suite on partialled, sqrt(weight)-scaled arrays; the AR test is reported at beta = 0."""
    ym, xm, zm = as_matrix(y, "y"), as_matrix(X, "X"), as_matrix(Z, "Z")
    if ym.shape[1] != 1:
        raise InvalidInputError(f"y must be one column, got {ym.shape[1]}; pass the outcome as a 1-D array.")
    if not (ym.shape[0] == xm.shape[0] == zm.shape[0]):
        raise InvalidInputError(
            f"y, X and Z have {ym.shape[0]}, {xm.shape[0]} and {zm.shape[0]} rows; "
            "pass arrays for the same rows."
        )
    b = np.asarray(beta, dtype=np.float64).ravel()
    if b.shape != (xm.shape[1],):
        raise InvalidInputError(
            f"beta has {b.size} value(s) for {xm.shape[1]} endogenous regressor(s); pass one per column of X."
        )
    if spec.kind == "cluster" and min(spec.n_clusters()) - 1 < zm.shape[1]:
        raise EstimationError(
            f"The cluster covariance has {min(spec.n_clusters())} clusters for {zm.shape[1]} instruments, "
            "so it is singular and the weak-instrument statistics are undefined; use at least one more "
            "cluster than instruments, fewer instruments, or a robust covariance."
        )
    kw: dict[str, Any] = {
        "spec": spec,
        "n_partialled": n_partialled,
        "n_partialled_nested": n_partialled_nested,
    }
    fs = first_stage(xm, zm, endog_names=endog_names, instrument_names=instrument_names, **kw)
    st = strength_section(xm, zm, method=method, endog_names=endog_names, **kw)
    robust = WeakIVRobustSection(
        anderson_rubin=anderson_rubin(ym, xm, zm, alpha=alpha, **kw),
        tf=tf_inference(ym, xm, zm, **kw),
        clr=clr_inference(ym, xm, zm, alpha=alpha, **kw),
    )
    rf = reduced_form(ym, zm, instrument_names=instrument_names, **kw)
    oid = overid_test(ym, xm, zm, beta=b, spec=spec, n_partialled=n_partialled)
    endo = durbin_wu_hausman(ym, xm, zm, **kw)
    return DiagnosticSuite(fs, st, robust, rf, oid, endo, method=method, kappa=float(kappa))
