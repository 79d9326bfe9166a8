"""One model's data arranged for resampling and deletion diagnostics (wild bootstrap, pairs bootstrap, jackknife).

:func:`fragility_data` validates the specification with :func:`~ivdossier.estimation.data.prepare` (one
partialling pass) and keeps, besides the partialled arrays, what re-partialling needs:

* ``base`` and ``w_basis``: the sqrt(w)-scaled columns [y, X, Z] and an explicit basis of the partialled-out
  space, such that residualising ``base`` on ``w_basis`` gives the partialled arrays. Without fixed effects
  ``base`` holds the raw columns and ``w_basis`` the intercept and controls; when every absorbed fixed effect is
  nested in the (one-way) cluster variable, ``base`` is already demeaned within the fixed-effect levels and
  ``w_basis`` holds the demeaned controls. Deleting or duplicating whole clusters then leaves the within-level
  demeaning unchanged, so per-cluster cross-products of [base, w_basis] are sufficient statistics.
* otherwise (fixed effects not nested in the clusters) ``base`` is None and ``reproject`` applies the exact
  partialling operator to any columns, which the slow, refitting paths use.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.absorb import is_nested, partial_out
from ivdossier.estimation.data import PreparedData, as_names, prepare

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]
CAUTION = (
    "These resampling and deletion checks measure how fragile the inference is; they cannot establish "
    "exclusion or exogeneity, and conclusions for policy or clinical decisions need domain review."
)


@dataclass(frozen=True, eq=False)
class FragilityData:
    """Partialled arrays of one model plus per-cluster structure and the partialling operator.

    ``cluster_codes`` are 0..G-1 (None: every row is its own cluster, heteroskedastic weights);
    ``cluster_labels`` name each cluster (the row labels when there are no clusters).
    """

    prepared: PreparedData
    cluster_codes: np.ndarray | None
    cluster_labels: tuple[str, ...]
    base: Array | None
    w_basis: Array | None
    reproject: Callable[[Array], Array]
    partialling: str
    refit_rows: Callable[[np.ndarray, np.ndarray | None], tuple[Array, int, int]]

    @property
    def n_groups(self) -> int:
        """Number of clusters (rows when there are no clusters)."""
        return len(self.cluster_labels)

    @property
    def clustered(self) -> bool:
        """True for one-way cluster weights, False for heteroskedastic (row-level) weights."""
        return self.cluster_codes is not None

    def codes(self) -> np.ndarray:
        """Cluster code of each row (0..n-1 when every row is its own cluster)."""
        if self.cluster_codes is not None:
            return self.cluster_codes
        return np.arange(self.prepared.n, dtype=np.int64)


def fragility_data(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str | Sequence[str],
    instruments: str | Sequence[str],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | None = None,
    weights: str | None = None,
) -> FragilityData:
    """Validate the model and arrange it for the fragility diagnostics; ``cluster`` is one column or None.

    Rows with a missing value in a used column are dropped first (counted in ``prepared.n_dropped``).
    """
    import pandas as pd

    if not isinstance(data, pd.DataFrame):
        raise InvalidInputError(f"data must be a pandas DataFrame, got {type(data).__name__}; load it first.")
    clus = as_names(cluster, "cluster")
    if len(clus) > 1:
        raise InvalidInputError(
            f"The fragility diagnostics take one cluster variable, got {len(clus)} ({', '.join(clus)}); "
            "pass one column to cluster=."
        )
    treat = as_names(treatment, "treatment")
    inst = as_names(instruments, "instruments")
    ctrl = as_names(controls, "controls")
    fe = as_names(absorb, "absorb")
    used = [outcome, *treat, *inst, *ctrl, *fe, *clus] + ([weights] if weights else [])
    missing = [c for c in used if c not in data.columns]
    if missing:
        # prepare() names the missing column and suggests a spelling
        prepare(
            data,
            outcome=outcome,
            treatment=treat,
            instruments=inst,
            controls=ctrl,
            absorb=fe,
            cluster=clus,
            weights=weights,
        )
        raise InvalidInputError(f"Column {missing[0]!r} is not in the data; check the spelling.")
    complete = data.loc[data[used].notna().all(axis=1)] if len(used) else data
    prepared = prepare(
        complete,
        outcome=outcome,
        treatment=treat,
        instruments=inst,
        controls=ctrl,
        absorb=fe,
        cluster=clus,
        weights=weights,
    )
    n_dropped = len(data) - len(complete)
    if n_dropped:
        prepared = _with_dropped(prepared, n_dropped)
    codes: np.ndarray | None = None
    if clus:
        raw_codes, uniques = pd.factorize(complete[clus[0]], sort=False)
        codes = raw_codes.astype(np.int64)
        labels = tuple(str(u) for u in uniques)
    else:
        labels = tuple(str(i) for i in complete.index)
    w = complete[weights].to_numpy(dtype=np.float64) if weights else None
    sw = None if w is None else np.sqrt(w)
    cmat = complete[list(ctrl)].to_numpy(dtype=np.float64) if ctrl else None
    fe_codes = [pd.factorize(complete[name], sort=False)[0].astype(np.int64) for name in fe]
    raw = complete[[outcome, *treat, *inst]].to_numpy(dtype=np.float64)

    def reproject(cols: Array) -> Array:
        """Residualise sqrt(w)-scaled columns on the partialled-out space (exactly as prepare did)."""
        c = np.asarray(cols, dtype=np.float64)
        c = c[:, None] if c.ndim == 1 else c
        target = c if sw is None else c / sw[:, None]
        out = partial_out(target, controls=cmat, fe_codes=fe_codes, weights=w).columns
        return np.asarray(out, dtype=np.float64)

    def refit_rows(rows: np.ndarray, new_clusters: np.ndarray | None) -> tuple[Array, int, int]:
        """Partial the raw [y, X, Z] of the given rows (repeats allowed) again: columns, p and nested p."""
        absorbed = partial_out(
            raw[rows],
            controls=None if cmat is None else cmat[rows],
            fe_codes=[f[rows] for f in fe_codes],
            weights=None if w is None else w[rows],
            cluster_codes=() if new_clusters is None else (new_clusters,),
        )
        return np.asarray(absorbed.columns), absorbed.n_partialled, absorbed.n_absorbed_nested

    base: Array | None
    w_basis: Array | None
    if not fe:
        base = raw if sw is None else raw * sw[:, None]
        ones = np.ones((raw.shape[0], 1))
        wb = ones if cmat is None else np.column_stack([ones, cmat])
        w_basis = wb if sw is None else wb * sw[:, None]
        how = "intercept and controls kept as explicit columns"
    elif codes is not None and all(is_nested(f, codes) for f in fe_codes):
        base = np.asarray(partial_out(raw, fe_codes=fe_codes, weights=w).columns, dtype=np.float64)
        if cmat is None:
            w_basis = np.zeros((raw.shape[0], 0))
        else:
            w_basis = np.asarray(partial_out(cmat, fe_codes=fe_codes, weights=w).columns, dtype=np.float64)
        how = "fixed effects nested in the clusters demeaned once; controls kept as explicit columns"
    else:
        base, w_basis = None, None
        how = "fixed effects not nested in the clusters: every resample or deletion is partialled again"
    return FragilityData(
        prepared=prepared,
        cluster_codes=codes,
        cluster_labels=labels,
        base=base,
        w_basis=w_basis,
        reproject=reproject,
        partialling=how,
        refit_rows=refit_rows,
    )


def _with_dropped(p: PreparedData, n_dropped: int) -> PreparedData:
    from dataclasses import replace

    return replace(p, n_dropped=p.n_dropped + n_dropped)
