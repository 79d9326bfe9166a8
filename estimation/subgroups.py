"""First stage within subgroups: under monotonicity the instrument pushes the treatment the same way everywhere.

A first stage that is significantly of the opposite sign in some subgroup is evidence of defiers (a failure of
monotonicity); same signs everywhere are consistent with monotonicity but cannot establish it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.data import as_names
from ivdossier.estimation.falsification import TargetRegression, placebo_outcomes
from ivdossier.estimation.rows import RowAccount
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

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
    row_account: RowAccount | None = None
    rows_without_group: int = 0  # rows used overall whose ``by`` value is missing, so in no subgroup

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
        out["row_account"] = None if self.row_account is None else self.row_account.to_dict()
        out["rows_without_group"] = self.rows_without_group
        return out

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g} % interval"
        head = ["subgroup", "n", "instrument", "coef", "SE", level, "p", "reversed"]
        body = []
        for label, n, reg, opposite in [("all", self.overall.n, self.overall, ())] + [
            (g.group, g.n, g.regression, g.opposite) for g in self.groups
        ]:
            for c in reg.coefficients:
                body.append(
                    [
                        f"{self.by} = {label}" if label != "all" else "all rows",
                        f"{n:,}",
                        c.instrument,
                        f"{c.coef:.4g}",
                        f"{c.se:.4g}",
                        f"[{c.ci_lower:.4g}, {c.ci_upper:.4g}]",
                        f"{c.p_value:.3g}",
                        "yes" if c.instrument in opposite else "",
                    ]
                )
        widths = [max(len(row[j]) for row in [head, *body]) for j in range(len(head))]
        table = [
            "  " + "  ".join(v.ljust(w) for v, w in zip(row, widths, strict=True)).rstrip()
            for row in [head, *body]
        ]
        rows = str(self.row_account) if self.row_account is not None else f"rows: used {self.overall.n:,}"
        if self.rows_without_group:
            rows += f"; {self.rows_without_group:,} of them have no value of {self.by} and sit in no subgroup"
        verdict = (
            f"reversed and significant at {self.alpha:g} in: {', '.join(self.flagged)} (evidence of defiers)"
            if self.flagged
            else "no subgroup shows a significantly reversed first stage"
        )
        return "\n".join(
            [
                f"First stage of {self.treatment} by subgroup of {self.by} ({self.grouping}); covariance {self.vcov}",
                rows,
                *table,
                verdict,
                self.caution,
            ]
        )


def _groups(column: pd.Series, bins: int) -> tuple[pd.Series, list[str], str]:
    """Subgroup labels in their natural order: the values themselves when there are few, else quantile bins."""
    import pandas as pd

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
    vcov: str = "heteroskedastic",
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
    overall_result = placebo_outcomes(data, **spec)
    overall = overall_result.rows[0]
    signs = {c.instrument: np.sign(c.coef) for c in overall.coefficients}
    labels, order, grouping = _groups(data[by], bins)
    used_columns = [treatment, *inst, *as_names(controls, "controls"), *as_names(absorb, "absorb")]
    used_columns += [*as_names(cluster, "cluster"), *((weights,) if weights else ())]
    complete = data[[c for c in dict.fromkeys(used_columns) if c in data.columns]].notna().all(axis=1)
    without_group = int((complete & labels.isna()).sum())
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
        row_account=overall_result.row_account,
        rows_without_group=without_group,
    )
