"""First stage within subgroups: under monotonicity the instrument pushes the treatment the same way everywhere.

A first stage that is significantly of the opposite sign in some subgroup is evidence of defiers (a failure of
monotonicity); same signs everywhere are consistent with monotonicity but cannot establish it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.data import as_names
from ivdossier.estimation.falsification import TargetRegression, placebo_outcomes
from ivdossier.jsonsafe import Record, json_safe

MAX_LEVELS = 20
CAUTION = (
    "Same-signed first stages in every subgroup are consistent with monotonicity but cannot establish it: defiers "
    "can hide inside any subgroup. Conclusions for policy or clinical decisions need domain review."
)


@dataclass(frozen=True)
class SubgroupFirstStage(Record):
    """The first stage in one subgroup, and whether it runs against the full-sample direction."""

    group: str
    n: int
    regression: TargetRegression
    opposite: tuple[str, ...]  # instruments whose coefficient has the opposite sign and p < alpha

    def to_dict(self) -> dict[str, Any]:
        return {
            "group": self.group,
            "n": self.n,
            "opposite": list(self.opposite),
            **self.regression.to_dict(),
        }


@dataclass(frozen=True)
class SubgroupSigns(Record):
    """First stages overall and by subgroup of ``by``; ``flagged`` lists subgroups with a reversed, significant sign."""

    by: str
    grouping: str
    treatment: str
    instruments: tuple[str, ...]
    overall: TargetRegression
    groups: tuple[SubgroupFirstStage, ...]
    flagged: tuple[str, ...]
    alpha: float
    vcov: str
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = json_safe(
            {
                "kind": "subgroup_first_stages",
                "by": self.by,
                "grouping": self.grouping,
                "treatment": self.treatment,
                "instruments": list(self.instruments),
                "flagged": list(self.flagged),
                "alpha": self.alpha,
                "vcov": self.vcov,
                "caution": self.caution,
            }
        )
        out["overall"] = self.overall.to_dict()
        out["groups"] = [g.to_dict() for g in self.groups]
        return out


def _groups(column: pd.Series, bins: int) -> tuple[pd.Series, list[str], str]:
    """Subgroup labels in their natural order: the values themselves when there are few, else quantile bins."""
    values = column.dropna()
    if values.nunique() <= MAX_LEVELS:
        order = [str(v) for v in sorted(values.unique())]
        return column.astype("string"), order, "values"
    numeric = pd.to_numeric(column, errors="coerce")
    if numeric.notna().sum() < len(values):
        raise InvalidInputError(
            f"Column {column.name!r} has more than {MAX_LEVELS} text values; group it into fewer categories first."
        )
    cut = pd.qcut(numeric, q=bins, duplicates="drop")
    order = [str(c) for c in cut.cat.categories]
    return cut.astype("string"), order, f"{len(order)} quantile bins"


def subgroup_first_stages(
    data: pd.DataFrame,
    *,
    treatment: str,
    instruments: str | Sequence[str],
    by: str,
    bins: int = 4,
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "robust",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> SubgroupSigns:
    """The first stage of ``treatment`` on the instruments overall and within each subgroup of ``by``."""
    if by not in data.columns:
        raise InvalidInputError(f"Column {by!r} (--by) is not in the data; name a covariate to split on.")
    if bins < 2:
        raise InvalidInputError(f"bins must be at least 2, got {bins}.")
    inst = as_names(instruments, "instruments")
    spec: dict[str, Any] = {
        "instruments": inst,
        "outcomes": [treatment],
        "controls": controls,
        "absorb": absorb,
        "cluster": cluster,
        "weights": weights,
        "vcov": vcov,
        "small_sample": small_sample,
        "alpha": alpha,
    }
    overall = placebo_outcomes(data, **spec).rows[0]
    signs = {c.instrument: np.sign(c.coef) for c in overall.coefficients}
    labels, order, grouping = _groups(data[by], bins)
    groups = []
    for label in order:
        sub = data.loc[labels == label]
        try:
            row = placebo_outcomes(sub, **spec).rows[0]
        except EstimationError as exc:  # a subgroup can be too small or lose variation; say which
            raise EstimationError(
                f"the first stage cannot be estimated in the subgroup {by} = {label} ({exc}); use fewer --bins."
            ) from exc
        opposite = tuple(
            c.instrument
            for c in row.coefficients
            if np.sign(c.coef) == -signs[c.instrument] and c.p_value < alpha
        )
        groups.append(SubgroupFirstStage(group=str(label), n=row.n, regression=row, opposite=opposite))
    return SubgroupSigns(
        by=by,
        grouping=grouping,
        treatment=treatment,
        instruments=inst,
        overall=overall,
        groups=tuple(groups),
        flagged=tuple(g.group for g in groups if g.opposite),
        alpha=alpha,
        vcov=vcov,
    )
