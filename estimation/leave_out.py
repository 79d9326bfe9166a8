"""Decision-maker propensity: the leave-out mean treatment of the decision-maker a case was assigned to.

Judges, examiners, clerks or prescribers differ in how often they give the treatment; a case's instrument is its
decision-maker's treatment rate over the *other* cases (leave-one-out) or over the cases outside the case's own
cluster (leave-own-cluster-out), so that a case's own treatment never enters its instrument. When controls or
fixed-effect cells (e.g. court-by-month) are stated, the treatment is first residualised on them (Frisch-Waugh-
Lovell) and the leave-out mean is taken of the residual, the construction common in judge designs.

The grouped pass is two ``np.bincount`` calls (sums and counts per decision-maker; per decision-maker-by-cluster
cell for the cluster version), so a million cases take well under a second.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.absorb import partial_out
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]
LEAVE_OUT_KINDS = ("case", "cluster")
DEFAULT_MIN_CASES = 20  # project convention for flagging small decision-makers, not a published rule
MAX_NAMED = 8
CAUTION = (
    "A leave-out propensity measures how a decision-maker treats other cases; it cannot establish that "
    "assignment was as good as random, that decision-makers affect outcomes only through the treatment, "
    "or monotonicity. Conclusions for policy or clinical decisions need domain review."
)


def _names(values: Sequence[Any]) -> str:
    shown = ", ".join(repr(v) for v in list(values)[:MAX_NAMED])
    more = len(values) - MAX_NAMED
    return shown + (f" and {more} more" if more > 0 else "")


def leave_out_means(values: np.ndarray, groups: np.ndarray, *, clusters: np.ndarray | None = None) -> Array:
    """Mean of ``values`` over the other cases of each case's group (or over the group's other clusters).

    ``groups`` and ``clusters`` are non-negative integer codes. Raises InvalidInputError naming the groups for
    which the leave-out mean is undefined (one case; or, with clusters, every case in a single cluster).
    """
    import pandas as pd

    v = np.asarray(values, dtype=np.float64)
    g = np.asarray(groups)
    n_groups = int(g.max()) + 1 if g.size else 0
    sums = np.bincount(g, weights=v, minlength=n_groups)
    counts = np.bincount(g, minlength=n_groups).astype(np.float64)
    if clusters is None:
        own_sum, own_count = v, np.ones(v.shape, dtype=np.float64)
    else:
        c = np.asarray(clusters).astype(np.int64)
        cell = g.astype(np.int64) * (int(c.max()) + 1) + c
        cell_codes, _ = pd.factorize(cell, sort=False)
        cell_sums = np.bincount(cell_codes, weights=v)
        cell_counts = np.bincount(cell_codes).astype(np.float64)
        own_sum = np.asarray(cell_sums[cell_codes], dtype=np.float64)
        own_count = np.asarray(cell_counts[cell_codes], dtype=np.float64)
    denom = counts[g] - own_count
    bad = denom <= 0
    if bad.any():
        bad_groups = np.unique(g[bad])
        raise InvalidInputError(
            f"{bad_groups.size} group code(s) have no other "
            f"{'case' if clusters is None else 'cluster'} to average over: {_names(bad_groups.tolist())}; "
            "drop their cases or merge them with another group."
        )
    return np.asarray((sums[g] - own_sum) / denom, dtype=np.float64)


@dataclass(frozen=True)
class PropensityRecipe(Record):
    """How a decision-maker propensity was built, for a run's provenance."""

    name: str
    decision_maker: str
    treatment: str
    leave_out: str
    cluster: str | None
    controls: tuple[str, ...]
    absorb: tuple[str, ...]
    min_cases: int
    n_cases: int
    n_decision_makers: int
    dropped_controls: tuple[str, ...] = ()  # constant, absorbed by the cells or collinear: left out

    @property
    def description(self) -> str:
        """One sentence stating the construction."""
        resid = (
            f"the residual of {self.treatment!r} on an intercept"
            + (f", controls {list(self.controls)}" if self.controls else "")
            + (f" and fixed-effect cells {list(self.absorb)}" if self.absorb else "")
            if (self.controls or self.absorb)
            else repr(self.treatment)
        )
        over = (
            "the decision-maker's other cases"
            if self.leave_out == "case"
            else f"the decision-maker's cases outside the case's own {self.cluster!r} cluster"
        )
        return f"{self.name} = mean of {resid} over {over} (grouped by {self.decision_maker!r})"

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": "decision_maker_propensity_recipe",
            "name": self.name,
            "decision_maker": self.decision_maker,
            "treatment": self.treatment,
            "leave_out": self.leave_out,
            "cluster": self.cluster,
            "controls": list(self.controls),
            "absorb": list(self.absorb),
            "residualised": bool(self.controls or self.absorb),
            "min_cases": self.min_cases,
            "n_cases": self.n_cases,
            "n_decision_makers": self.n_decision_makers,
            "dropped_controls": list(self.dropped_controls),
            "description": self.description,
        }


@dataclass(frozen=True, eq=False)
class DecisionMakerPropensity:
    """The leave-out propensity per case (``values``, aligned with ``index``) and per-decision-maker counts."""

    values: Array
    index: pd.Index
    decision_makers: tuple[str, ...]
    cases: tuple[int, ...]
    small: tuple[str, ...]
    recipe: PropensityRecipe
    caution: str = CAUTION

    def as_series(self) -> pd.Series:
        """The instrument as a Series named after the recipe, indexed like the input rows."""
        import pandas as pd

        return pd.Series(self.values, index=self.index, name=self.recipe.name)

    def to_dict(self) -> dict[str, Any]:
        v = self.values
        out: dict[str, Any] = {
            "kind": "decision_maker_propensity",
            "recipe": self.recipe.to_dict(),
            "summary": {
                "mean": float(v.mean()),
                "sd": float(v.std()),
                "min": float(v.min()),
                "max": float(v.max()),
            },
            "cases_per_decision_maker": {
                "min": int(min(self.cases)),
                "median": float(np.median(self.cases)),
                "max": int(max(self.cases)),
            },
            "decision_makers": [
                {"id": d, "cases": c, "small": c < self.recipe.min_cases}
                for d, c in zip(self.decision_makers, self.cases, strict=True)
            ],
            "small": list(self.small),
            "caution": self.caution,
        }
        return dict(json_safe(out))

    def __str__(self) -> str:
        r = self.recipe
        lines = [
            f"Decision-maker propensity {r.name!r}: {r.n_cases:,} cases, {r.n_decision_makers:,} decision-makers",
            f"  construction: {r.description}",
            f"  cases per decision-maker: min {min(self.cases):,}, median {np.median(self.cases):,.0f}, "
            f"max {max(self.cases):,}",
            f"  instrument: mean {self.values.mean():.4g}, sd {self.values.std():.4g}, "
            f"range [{self.values.min():.4g}, {self.values.max():.4g}]",
        ]
        if self.small:
            lines.append(
                f"  flagged: {len(self.small)} decision-maker(s) with fewer than {r.min_cases} cases: "
                f"{_names(self.small)}"
            )
        lines.append(f"  {self.caution}")
        return "\n".join(lines)


def _as_tuple(value: str | Sequence[str] | None, option: str) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):
        return (value,)
    out = tuple(value)
    for v in out:
        if not isinstance(v, str):
            raise InvalidInputError(f"Option {option}= takes column names, got {v!r}; pass strings.")
    return out


def _check_frame(data: pd.DataFrame, columns: Sequence[str], numeric: Sequence[str]) -> None:
    import pandas as pd

    missing_cols = [c for c in columns if c not in data.columns]
    if missing_cols:
        raise InvalidInputError(
            f"Column(s) {_names(missing_cols)} not found in the data; available: {_names(list(data.columns))}."
        )
    for col in numeric:
        if not (pd.api.types.is_numeric_dtype(data[col]) or pd.api.types.is_bool_dtype(data[col])):
            raise InvalidInputError(
                f"Column {col!r} must be numeric (0/1 for a treatment), got dtype {data[col].dtype}; "
                "recode it as numbers."
            )
    for col in columns:
        na = data[col].isna().to_numpy()
        if na.any():
            rows = data.index[na].tolist()
            raise InvalidInputError(
                f"Column {col!r} is missing in {int(na.sum())} row(s) (index {_names(rows)}); "
                "drop or fill those rows before building the propensity."
            )
    for col in numeric:
        vals = data[col].to_numpy(dtype=np.float64)
        bad = ~np.isfinite(vals)
        if bad.any():
            raise InvalidInputError(
                f"Column {col!r} has infinite values in row(s) {_names(data.index[bad].tolist())}; "
                "drop or fix those rows."
            )


def decision_maker_propensity(
    data: pd.DataFrame,
    *,
    decision_maker: str,
    treatment: str,
    leave_out: str = "case",
    cluster: str | None = None,
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    min_cases: int = DEFAULT_MIN_CASES,
    name: str | None = None,
) -> DecisionMakerPropensity:
    """Build the leave-one-out (``leave_out="case"``) or leave-own-cluster-out (``"cluster"``) propensity.

    The treatment is residualised on an intercept, ``controls`` and the ``absorb`` cells when any are given.
    Decision-makers with fewer than ``min_cases`` cases are flagged in ``small``; one with a single case (or,
    leaving clusters out, with all cases in one cluster) has no defined propensity and raises InvalidInputError.
    """
    import pandas as pd

    if leave_out not in LEAVE_OUT_KINDS:
        raise InvalidInputError(f"Unknown leave_out {leave_out!r}; choose 'case' or 'cluster'.")
    if leave_out == "cluster" and cluster is None:
        raise InvalidInputError(
            "leave_out='cluster' needs cluster= (the column of case clusters); pass cluster=."
        )
    if leave_out == "case" and cluster is not None:
        raise InvalidInputError(
            "cluster= was given with leave_out='case'; use leave_out='cluster' to leave the own cluster out, "
            "or drop cluster=."
        )
    if not isinstance(min_cases, int) or min_cases < 2:
        raise InvalidInputError(f"min_cases must be an integer of at least 2, got {min_cases!r}.")
    ctrl = _as_tuple(controls, "controls")
    fes = _as_tuple(absorb, "absorb")
    roles = [decision_maker, treatment, *ctrl, *fes] + ([cluster] if cluster else [])
    if len(set(roles)) != len(roles):
        raise InvalidInputError(f"A column is used in two roles among {roles}; give each column one role.")
    _check_frame(data, roles, [treatment, *ctrl])
    if len(data) < 2:
        raise InvalidInputError("The data have fewer than two rows; a leave-out propensity needs more cases.")
    dm_codes, dm_ids = pd.factorize(data[decision_maker], sort=False)
    counts = np.bincount(dm_codes)
    singles = np.flatnonzero(counts == 1)
    if singles.size:
        single_ids = [dm_ids[int(i)] for i in singles]
        rows = data.index[np.isin(dm_codes, singles)].tolist()
        raise InvalidInputError(
            f"{singles.size} decision-maker(s) in {decision_maker!r} have a single case "
            f"({_names(single_ids)}; row index {_names(rows)}), so their leave-one-out propensity is undefined; "
            "drop those cases or merge the decision-makers before building the instrument."
        )
    t = data[treatment].to_numpy(dtype=np.float64)
    dropped: tuple[str, ...] = ()
    if ctrl or fes:
        fe_codes = [pd.factorize(data[f], sort=False)[0].astype(np.int64) for f in fes]
        cvals = data[list(ctrl)].to_numpy(dtype=np.float64) if ctrl else None
        absorbed = partial_out(t[:, None], controls=cvals, fe_codes=fe_codes)
        t = absorbed.columns[:, 0]
        dropped = tuple(ctrl[i] for i in absorbed.dropped_controls)
    clus = None
    if cluster is not None:
        clus = pd.factorize(data[cluster], sort=False)[0]
        try:
            values = leave_out_means(t, dm_codes, clusters=clus)
        except InvalidInputError:
            cell = pd.factorize(dm_codes.astype(np.int64) * (int(clus.max()) + 1) + clus)[0]
            n_clus_per_dm = np.bincount(dm_codes[np.unique(cell, return_index=True)[1]])
            lonely = [dm_ids[int(i)] for i in np.flatnonzero(n_clus_per_dm == 1)]
            raise InvalidInputError(
                f"{len(lonely)} decision-maker(s) in {decision_maker!r} have all their cases in one "
                f"{cluster!r} cluster ({_names(lonely)}), so leaving the own cluster out leaves nothing; "
                "use leave_out='case' or drop those decision-makers."
            ) from None
    else:
        values = leave_out_means(t, dm_codes)
    ids = tuple(str(d) for d in dm_ids)
    small = tuple(ids[i] for i in np.flatnonzero(counts < min_cases))
    recipe = PropensityRecipe(
        name=name or f"{treatment}_propensity_of_{decision_maker}",
        decision_maker=decision_maker,
        treatment=treatment,
        leave_out=leave_out,
        cluster=cluster,
        controls=ctrl,
        absorb=fes,
        min_cases=min_cases,
        n_cases=len(data),
        n_decision_makers=len(ids),
        dropped_controls=dropped,
    )
    return DecisionMakerPropensity(
        values=values,
        index=data.index,
        decision_makers=ids,
        cases=tuple(int(c) for c in counts),
        small=small,
        recipe=recipe,
    )
