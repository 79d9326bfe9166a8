"""The weak-instrument diagnostic suite: one call that gathers first stage, strength, weak-IV-robust
inference, reduced form, over-identification and endogeneity for a fitted IV model.

All inputs are partialled on the controls and absorbed fixed effects and scaled by sqrt(weights); see the
modules ``strength``, ``robust_inference`` and ``specification`` for each statistic's conventions. Statistics
speak to relevance (and, partly, to the coherence of several instruments); none of them can establish that an
instrument is excluded or exogenous, and conclusions for policy or clinical decisions need domain review.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.covariance import CovSpec
from ivdossier.estimation.crossproducts import ZERO_RTOL, CrossProducts, NotComputable, build
from ivdossier.estimation.robust_inference import (
    AndersonRubin,
    CLRResult,
    ReducedForm,
    TFResult,
    WeakIVRobustSection,
    anderson_rubin_from,
    clr_from,
    reduced_form_from,
    tf_from,
)
from ivdossier.estimation.specification import Endogeneity, OverId, endogeneity_from, overid_from
from ivdossier.estimation.strength import (
    FirstStageSection,
    StrengthSection,
    as_matrix,
    first_stage_from,
    require_distinct_instruments,
    strength_from,
)
from ivdossier.jsonsafe import Record
from ivdossier.vocabulary import NotApplicable

CAUTION = (
    "These statistics assess instrument strength and internal coherence only; they cannot establish "
    "exclusion or exogeneity, and conclusions for policy or clinical decisions need domain review."
)


@dataclass(frozen=True)
class DiagnosticSuite(Record):
    """Every weak-instrument diagnostic for one fitted model, section by section.

    A section that cannot be computed is a :class:`NotApplicable` with its own reason; the others stand.
    """

    first_stage: FirstStageSection | NotApplicable
    strength: StrengthSection | NotApplicable
    weak_iv_robust: WeakIVRobustSection | NotApplicable
    reduced_form: ReducedForm | NotApplicable
    overid: OverId | NotApplicable
    endogeneity: Endogeneity | NotApplicable
    method: str
    kappa: float
    identification: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict with one key per section."""
        return {
            "first_stage": self.first_stage.to_dict(),
            "strength": self.strength.to_dict(),
            "weak_iv_robust": self.weak_iv_robust.to_dict(),
            "reduced_form": self.reduced_form.to_dict(),
            "overid": self.overid.to_dict(),
            "endogeneity": self.endogeneity.to_dict(),
            "identification": self.identification,
            "caution": CAUTION,
        }


def unidentified_reason(cp: CrossProducts, endog_names: list[str], instrument_names: list[str]) -> str | None:
    """Why the effect is not identified (a first stage that is zero to working precision), or None.

    Scale-free: the first-stage coefficients on the orthonormal instrument basis, in units of each treatment's
    length, are compared with ZERO_RTOL; with several treatments the first-stage matrix's smallest singular
    value is.
    """
    pi = cp.r[: cp.k, cp.ix]
    inst = ", ".join(repr(n) for n in instrument_names)
    if cp.p == 1:
        if float(np.linalg.norm(pi)) <= ZERO_RTOL:
            return (
                f"the effect of {endog_names[0]!r} is not identified: its first stage on the instrument(s) "
                f"{inst} is exactly zero (after partialling); only the Anderson–Rubin test remains valid, and its "
                "confidence set is then unbounded (the whole line or two rays)"
            )
        return None
    sv = np.linalg.svd(pi, compute_uv=False)
    if sv[-1] <= ZERO_RTOL:
        _, _, vt = np.linalg.svd(pi)
        involved = [endog_names[j] for j in range(cp.p) if abs(vt[-1, j]) > 1e-3]
        return (
            f"the effects of {', '.join(repr(n) for n in involved)} are not identified: the first stage on the "
            f"instrument(s) {inst} has rank {int(np.count_nonzero(sv > ZERO_RTOL))} for {cp.p} treatments"
        )
    return None


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
    cross_products: CrossProducts | None = None,
) -> DiagnosticSuite:
    """Run the whole suite on partialled, sqrt(weight)-scaled arrays; the AR test is reported at beta = 0.

    Every section is derived from one :class:`CrossProducts` (built here unless given) and fails alone.
    """
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
    if len(endog_names) != xm.shape[1] or len(instrument_names) != zm.shape[1]:
        raise InvalidInputError(
            f"Got {len(endog_names)} endogenous and {len(instrument_names)} instrument names for "
            f"{xm.shape[1]} and {zm.shape[1]} columns; pass one name per column."
        )
    if zm.shape[1] < xm.shape[1]:
        raise EstimationError(
            f"{zm.shape[1]} excluded instrument(s) for {xm.shape[1]} endogenous regressor(s): the model is "
            "under-identified; add instruments or drop endogenous regressors."
        )
    cp = cross_products or build(
        zm, xm, ym, spec, n_partialled=n_partialled, n_partialled_nested=n_partialled_nested
    )
    require_distinct_instruments(cp, list(instrument_names))
    return suite_from(
        cp,
        beta=b,
        method=method,
        kappa=kappa,
        endog_names=endog_names,
        instrument_names=instrument_names,
        alpha=alpha,
    )


def _guard(fn: Callable[[], Any]) -> Any:
    try:
        return fn()
    except (NotComputable, np.linalg.LinAlgError, FloatingPointError, ZeroDivisionError) as exc:
        return NotApplicable(f"not computed: {exc}")


def suite_from(
    cp: CrossProducts,
    *,
    beta: np.ndarray,
    method: str,
    kappa: float,
    endog_names: list[str],
    instrument_names: list[str],
    alpha: float = 0.05,
) -> DiagnosticSuite:
    """The suite from the sufficient statistics; each section is computed alone and fails alone."""
    unident = unidentified_reason(cp, endog_names, instrument_names)
    ar = _guard(lambda: anderson_rubin_from(cp, alpha=alpha))
    if unident is not None:
        na = NotApplicable(unident)
        return DiagnosticSuite(
            first_stage=_guard(
                lambda: first_stage_from(cp, endog_names=endog_names, instrument_names=instrument_names)
            ),
            strength=na,
            weak_iv_robust=WeakIVRobustSection(ar, TFResult(False, unident), CLRResult(False, unident))
            if isinstance(ar, AndersonRubin)
            else ar,
            reduced_form=_guard(lambda: reduced_form_from(cp, instrument_names=instrument_names)),
            overid=na,
            endogeneity=na,
            method=method,
            kappa=float(kappa),
            identification=unident,
        )
    robust: WeakIVRobustSection | NotApplicable
    if isinstance(ar, AndersonRubin):
        tf = _guard(lambda: tf_from(cp))
        clr = _guard(lambda: clr_from(cp, alpha=alpha))
        robust = WeakIVRobustSection(
            anderson_rubin=ar,
            tf=tf if isinstance(tf, TFResult) else TFResult(False, tf.reason),
            clr=clr if isinstance(clr, CLRResult) else CLRResult(False, clr.reason),
        )
    else:
        robust = ar
    return DiagnosticSuite(
        first_stage=_guard(
            lambda: first_stage_from(cp, endog_names=endog_names, instrument_names=instrument_names)
        ),
        strength=_guard(lambda: strength_from(cp, method=method, endog_names=endog_names)),
        weak_iv_robust=robust,
        reduced_form=_guard(lambda: reduced_form_from(cp, instrument_names=instrument_names)),
        overid=_guard(lambda: overid_from(cp, beta=beta)),
        endogeneity=_guard(lambda: endogeneity_from(cp)),
        method=method,
        kappa=float(kappa),
    )
