"""Checks of decision-maker designs beyond the first stage: the outcome profile across decision-makers.

Under random assignment, exclusion and monotonicity, a decision-maker's mean outcome is a smooth function of
their treatment propensity (Frandsen, Lefgren and Leslie 2023, AER); :func:`outcome_profile` returns the
per-decision-maker points (propensity, mean outcome, cases) that such a check and its plot start from.

The formal two-part test of Frandsen, Lefgren and Leslie is not implemented (see :data:`FLL_REASON`): its
exact statistic, smoothing choice and critical values could not be verified from the paper for this build, and
an approximation would be presented under their name. :func:`fll_test` returns a not-applicable result.
What the stored public material holds (searched again for this build): the abstract of the working paper (NBER
w25528): standard assumptions imply that the conditional expectation of the outcome given judge assignment is a
continuous function with bounded slope of the judge propensity; the test has two parts, one generalising the
Sargan-Hansen overidentification test, one asking whether the implied treatment effects across the range of
propensities are possible given the outcome's domain; asymptotic validity is shown. Missing: the function class
(and its smoothing or order choice), the statistic and its weighting, its limiting distribution or critical values,
how the slope bound is formed from the outcome's domain and tested, how the two parts are combined, and how
estimated propensities and controls enter. Third-party package pages that describe a reduced version were not used.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ivdossier.errors import InvalidInputError
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

FLL_REASON = (
    "the test of Frandsen, Lefgren and Leslie (2023, AER) is not implemented: its exact statistic (a "
    "generalised overidentification test that mean outcomes by decision-maker lie on a continuous, "
    "bounded-slope function of the propensity, joined with a check that implied effects fit the outcome's "
    "range), smoothing choice and critical values could not be verified from the paper for this build; "
    "use the first stage by case type and the outcome profile across decision-makers instead"
)
CAUTION = (
    "A smooth outcome profile across decision-makers is consistent with exclusion and monotonicity but cannot "
    "establish them. Conclusions for policy or clinical decisions need domain review."
)


@dataclass(frozen=True)
class OutcomeProfile(Record):
    """Per decision-maker: treatment rate, mean outcome and number of cases (the points of the profile plot)."""

    decision_makers: tuple[str, ...]
    propensity: tuple[float, ...]
    mean_outcome: tuple[float, ...]
    cases: tuple[int, ...]
    slope: (
        float  # cases-weighted least-squares slope of mean outcome on propensity (equals the Wald-type 2SLS)
    )
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "kind": "decision_maker_outcome_profile",
                    "points": [
                        {"id": d, "propensity": p, "mean_outcome": m, "cases": c}
                        for d, p, m, c in zip(
                            self.decision_makers, self.propensity, self.mean_outcome, self.cases, strict=True
                        )
                    ],
                    "slope": self.slope,
                    "caution": self.caution,
                }
            )
        )

    def __str__(self) -> str:
        p = np.asarray(self.propensity)
        return "\n".join(
            [
                f"Outcome profile: {len(self.decision_makers):,} decision-makers, propensity "
                f"{p.min():.3g} to {p.max():.3g}; weighted slope {self.slope:.4g}",
                f"  {self.caution}",
            ]
        )


@dataclass(frozen=True)
class FLLTest(Record):
    """Result slot for the Frandsen-Lefgren-Leslie test; currently always not applicable, with the reason."""

    applicable: bool = False
    reason: str = FLL_REASON

    def to_dict(self) -> dict[str, Any]:
        return {"kind": "fll_test", "applicable": self.applicable, "reason": self.reason}

    def __str__(self) -> str:
        return f"Frandsen-Lefgren-Leslie test: not applicable: {self.reason}"


def fll_test() -> FLLTest:
    """The Frandsen, Lefgren and Leslie (2023) test: not implemented, so a not-applicable result with the reason."""
    return FLLTest()


def outcome_profile(
    data: pd.DataFrame, *, outcome: str, treatment: str, decision_maker: str
) -> OutcomeProfile:
    """Treatment rate and mean outcome per decision-maker, with the cases-weighted slope between them.

    With one dummy per decision-maker and no controls, that weighted slope is the 2SLS estimate (grouped-data
    IV), so the profile shows which decision-makers drive it.
    """
    for c in (outcome, treatment, decision_maker):
        if c not in data.columns:
            raise InvalidInputError(f"Column {c!r} not found in the data; check the name.")
    na = data[[outcome, treatment, decision_maker]].isna().any(axis=1).to_numpy()
    if na.any():
        raise InvalidInputError(
            f"{int(na.sum())} row(s) have missing values (index {data.index[na][:8].tolist()}); drop or fill them."
        )
    g = data.groupby(decision_maker, sort=True)
    means = g[[treatment, outcome]].mean()
    counts = g.size()
    p = means[treatment].to_numpy(dtype=np.float64)
    m = means[outcome].to_numpy(dtype=np.float64)
    w = counts.to_numpy(dtype=np.float64)
    pc = p - np.average(p, weights=w)
    den = float(np.sum(w * pc * pc))
    slope = float(np.sum(w * pc * m) / den) if den > 0 else float("nan")
    return OutcomeProfile(
        decision_makers=tuple(str(i) for i in means.index),
        propensity=tuple(float(v) for v in p),
        mean_outcome=tuple(float(v) for v in m),
        cases=tuple(int(c) for c in w),
        slope=slope,
    )
