"""Which rows of the data an analysis used, and why it left the others out.

Every evidence result carries one :class:`RowAccount`, so the terminal, the JSON and the dossier can say "used
9,812 of 10,000 rows; left out 188: 150 with a missing value (educ 120, exper 40), 38 outside the subsample"
instead of dropping rows silently. Reasons are counted in order: first rows outside the chosen subsample or
subgroup, then, among the rows in scope, rows with a missing value in any column the analysis uses.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # only named in signatures: reading a stored row account needs no pandas
    import pandas as pd

__all__ = ["RowAccount", "count_rows"]


@dataclass(frozen=True)
class RowAccount(Record):
    """Rows in the data, rows used, and the rows left out by reason.

    ``missing`` lists, per used column, the rows in scope with a missing value there (a row can miss several
    columns, so these counts can add up to more than ``n_missing``, the rows left out for any missing value).
    ``outside`` counts rows outside the subsample or subgroup, described by ``scope``.
    """

    n_data: int
    n_used: int
    n_missing: int = 0
    missing: tuple[tuple[str, int], ...] = ()
    outside: int = 0
    scope: str = ""

    @property
    def n_left_out(self) -> int:
        """Rows of the data the analysis did not use, for any reason."""
        return self.n_data - self.n_used

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "n_data": self.n_data,
                "n_used": self.n_used,
                "n_left_out": self.n_left_out,
                "n_missing": self.n_missing,
                "missing_by_column": {name: count for name, count in self.missing},
                "outside_scope": self.outside,
                "scope": self.scope,
            }
        )

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> RowAccount:
        """Rebuild from :meth:`to_dict` output."""
        return cls(
            n_data=int(data["n_data"]),
            n_used=int(data["n_used"]),
            n_missing=int(data.get("n_missing", 0)),
            missing=tuple((str(k), int(v)) for k, v in (data.get("missing_by_column") or {}).items()),
            outside=int(data.get("outside_scope", 0)),
            scope=str(data.get("scope", "")),
        )

    def __str__(self) -> str:
        head = f"rows: used {self.n_used:,} of {self.n_data:,}"
        if self.n_left_out == 0:
            return head + "; none left out"
        reasons = []
        if self.outside:
            reasons.append(f"{self.outside:,} outside {self.scope or 'the subsample'}")
        if self.n_missing:
            cols = ", ".join(f"{name} {count:,}" for name, count in self.missing if count)
            reasons.append(f"{self.n_missing:,} with a missing value ({cols})")
        other = self.n_left_out - self.outside - self.n_missing
        if other > 0:
            reasons.append(f"{other:,} for other reasons")
        return f"{head}; left out {self.n_left_out:,}: " + "; ".join(reasons)


def count_rows(
    data: pd.DataFrame,
    columns: Sequence[str],
    *,
    in_scope: Any = None,
    scope: str = "",
    n_used: int | None = None,
) -> RowAccount:
    """Count the rows of ``data`` in scope (``in_scope``: boolean mask, None = all) and complete over ``columns``.

    ``n_used`` overrides the complete-row count when the analysis itself reports how many rows it used.
    """
    names = [c for c in dict.fromkeys(columns) if c in data.columns]
    mask = np.ones(len(data), dtype=bool) if in_scope is None else np.asarray(in_scope, dtype=bool)
    frame = data.loc[mask, names]
    missing_cells = frame.isna()
    incomplete = missing_cells.any(axis=1)
    per_column = tuple((str(c), int(missing_cells[c].sum())) for c in names if int(missing_cells[c].sum()))
    complete = int((~incomplete).sum())
    return RowAccount(
        n_data=len(data),
        n_used=complete if n_used is None else int(n_used),
        n_missing=int(incomplete.sum()),
        missing=per_column,
        outside=int((~mask).sum()),
        scope=scope,
    )
