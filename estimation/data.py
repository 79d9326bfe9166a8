"""Load a data table and turn its columns into validated, partialled arrays for estimation.

:func:`prepare` checks the specification against the table (names, types, missing and infinite values,
weights, clusters, instrument counts), deletes incomplete rows listwise, partials out the controls and fixed
effects (:mod:`ivdossier.estimation.absorb`) and then checks what is left for constant or collinear columns.
Every problem raises one :class:`~ivdossier.errors.InvalidInputError` or
:class:`~ivdossier.errors.EstimationError` that names the column and the fix.
"""

from __future__ import annotations

import difflib
import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.absorb import DEFAULT_MAX_ITER, DEFAULT_TOL, partial_out
from ivdossier.estimation.estimators import collinear_columns

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]
READERS = {".csv": "CSV", ".parquet": "Parquet", ".dta": "Stata .dta"}


def load_table(path: str | Path) -> pd.DataFrame:
    """Read a .csv, .parquet or .dta file into a DataFrame; InvalidInputError names the path on failure."""
    import pandas as pd

    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in READERS:
        raise InvalidInputError(
            f"Cannot read {str(p)!r}: unknown file extension {suffix or '(none)'!r}; "
            f"use one of {', '.join(READERS)}."
        )
    if not p.is_file():
        raise InvalidInputError(f"Cannot read {str(p)!r}: no such file; check the path.")
    try:
        if suffix == ".csv":
            # pandas renames a repeated header ("z" -> "z.1"), so read the header row as plain data first.
            header = pd.read_csv(p, header=None, nrows=1, dtype=str, keep_default_na=False)
            names = [str(v) for v in header.iloc[0]] if len(header) else []
            frame = pd.read_csv(p)
        elif suffix == ".parquet":
            frame = pd.read_parquet(p)
            names = [str(c) for c in frame.columns]
        else:
            frame = pd.read_stata(p)
            names = [str(c) for c in frame.columns]
    except Exception as exc:  # the readers raise many unrelated types
        raise InvalidInputError(
            f"Cannot read {str(p)!r} as {READERS[suffix]}: {exc}; check that the file is a valid "
            f"{READERS[suffix]} file."
        ) from exc
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        shown = ", ".join(f"{n!r} ({names.count(n)} times)" for n in repeated[:10])
        raise InvalidInputError(
            f"Cannot read {str(p)!r}: column names must be unique, but {shown} repeat; rename the columns so "
            "each name says which variable it holds."
        )
    return frame


def file_sha256(path: str | Path) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks (the data fingerprint stored with a run)."""
    p = Path(path)
    if not p.is_file():
        raise InvalidInputError(f"Cannot fingerprint {str(p)!r}: no such file; check the path.")
    h = hashlib.sha256()
    with p.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


@dataclass(frozen=True, eq=False)
class PreparedData:
    """Partialled, sqrt(w)-scaled arrays of one model with the names and counts that describe them.

    ``y`` (n,), ``X`` (n x k endogenous or treatment regressors) and ``Z`` (n x L excluded instruments, L may
    be 0) are residualised on the intercept, the controls and the absorbed fixed effects.
    """

    y: Array
    X: Array
    Z: Array
    outcome: str
    treatment: tuple[str, ...]
    instruments: tuple[str, ...]
    controls: tuple[str, ...]
    absorb: tuple[str, ...]
    cluster: tuple[str, ...]
    weights: str | None
    n: int
    n_dropped: int
    clusters: tuple[np.ndarray, ...]
    n_partialled: int
    n_partialled_nested: int
    n_absorbed: int
    fe_levels: tuple[int, ...]
    absorb_iterations: int


def as_names(value: str | Sequence[str] | None, option: str) -> tuple[str, ...]:
    """Normalise an option that takes one column name or a list of them into a tuple of names."""
    if value is None:
        return ()
    if isinstance(value, str):
        return (value,)
    names = tuple(value)
    for v in names:
        if not isinstance(v, str):
            raise InvalidInputError(f"Option {option}= takes column names, got {v!r}; pass strings.")
    return names


def check_roles(roles: dict[str, tuple[str, ...]]) -> None:
    """Refuse a column given two roles (or one role twice), naming the column and both roles."""
    seen: dict[str, str] = {}
    for role, names in roles.items():
        for name in names:
            if name in seen:
                where = "twice in " + role if seen[name] == role else f"as both {seen[name]} and {role}"
                raise InvalidInputError(f"Column {name!r} is used {where}; give each column one role.")
            seen[name] = role


def _check_present(data: pd.DataFrame, names: Sequence[str]) -> None:
    columns = [str(c) for c in data.columns]
    for name in names:
        if name not in data.columns:
            close = difflib.get_close_matches(name, columns, n=3, cutoff=0.6)
            hint = (
                f"; did you mean {', '.join(repr(c) for c in close)}?" if close else "; check the spelling."
            )
            raise InvalidInputError(f"Column {name!r} is not in the data{hint}")


def _numeric(data: pd.DataFrame, name: str, role: str) -> Array:
    import pandas as pd

    col = data[name]
    if pd.api.types.is_bool_dtype(col):
        return col.to_numpy(dtype=np.float64, na_value=np.nan)
    if not pd.api.types.is_numeric_dtype(col):
        converted = pd.to_numeric(col, errors="coerce")
        bad = col[converted.isna() & col.notna()]
        example = bad.iloc[0] if len(bad) else col.dropna().iloc[0] if col.notna().any() else None
        raise InvalidInputError(
            f"The {role} column {name!r} must be numeric but holds values such as {example!r}; "
            "recode it as numbers."
        )
    return col.to_numpy(dtype=np.float64, na_value=np.nan)


def _codes(values: pd.Series, *, any_order: bool = False) -> tuple[np.ndarray, int]:
    """Codes 0..G-1 of a grouping column (first appearance order) and G, from one factorisation.

    ``any_order=True`` allows codes in another order: an int64 column whose values are already 0..G-1, every
    one present, is then used as it is (no copy; the common layout of cluster identifiers)."""
    import pandas as pd

    if any_order and values.dtype == np.int64 and len(values):
        v = values.to_numpy()
        lo, hi = int(v.min()), int(v.max())
        if lo == 0 and hi < v.shape[0] and bool(np.all(np.bincount(v) > 0)):
            view = v.view()
            view.flags.writeable = False  # the caller's data: never written through this view
            return view, hi + 1
    codes, uniques = pd.factorize(values, sort=False)
    return codes.astype(np.int64, copy=False), len(uniques)


@dataclass(frozen=True, eq=False)
class ModelColumns:
    """The validated columns of one model before partialling: ``targets`` = [y, X..., Z...] and ``controls``
    (float64 1-D arrays over the rows kept; views of the data where pandas allows), ``weights``, the codes of
    the absorbed factors and cluster variables (0..G-1) with the number of levels of each cluster variable.

    ``finite_checked`` is False when :func:`read_columns` was asked to skip the scan for missing and infinite
    values: then the caller must find them itself (a non-finite cross-product) and fall back to :func:`prepare`.
    """

    outcome: str
    treatment: tuple[str, ...]
    instruments: tuple[str, ...]
    controls: tuple[str, ...]
    absorb: tuple[str, ...]
    cluster: tuple[str, ...]
    weights_name: str | None
    targets: list[Array]
    control_cols: list[Array]
    weights: Array | None
    fe_codes: list[np.ndarray]
    cl_codes: list[np.ndarray]
    cl_levels: tuple[int, ...]
    n: int
    n_dropped: int
    finite_checked: bool


def read_columns(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str | Sequence[str],
    instruments: str | Sequence[str] = (),
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    require_instruments: bool = True,
    check_finite: bool = True,
) -> ModelColumns:
    """Validate the specification against ``data`` and read its columns, deleting incomplete rows listwise.

    ``check_finite=False`` skips the per-column scan for missing and infinite values (and so drops no row
    for them) and the checks whose outcome depends on the rows dropped (positive weights, constant
    instruments, clusters with a single level): the caller must detect those cases itself and then call
    :func:`prepare`; see :class:`ModelColumns`. The cluster codes may then be in another order than the
    first-appearance order :func:`prepare` gives (an int64 column already coded 0..G-1 is used as it is).
    """
    import pandas as pd

    if not isinstance(data, pd.DataFrame):
        raise InvalidInputError(f"data must be a pandas DataFrame, got {type(data).__name__}; load it first.")
    if not isinstance(outcome, str) or not outcome:
        raise InvalidInputError("Option outcome= must name one column.")
    treat = as_names(treatment, "treatment")
    inst = as_names(instruments, "instruments")
    ctrl = as_names(controls, "controls")
    fe = as_names(absorb, "absorb")
    clus = as_names(cluster, "cluster")
    wname = weights
    if not treat:
        raise InvalidInputError("Option treatment= must name at least one column.")
    if len(clus) > 2:
        raise InvalidInputError(
            f"At most two cluster variables are supported, got {len(clus)}; pass one or two."
        )
    roles = {
        "outcome": (outcome,),
        "treatment": treat,
        "instruments": inst,
        "controls": ctrl,
        "absorb": fe,
        "cluster": clus,
        "weights": (wname,) if wname else (),
    }
    # a fixed effect may also define the clusters, that is a common and valid design
    check_roles({k: v for k, v in roles.items() if k != "cluster"})
    _check_present(data, [n for names in roles.values() for n in names])
    if require_instruments and len(inst) < len(treat):
        raise EstimationError(
            f"{len(inst)} excluded instrument(s) for {len(treat)} endogenous regressor(s): the model is not "
            "identified; add instruments or remove treatments."
        )
    numeric_names = [(outcome, "outcome")] + [(t, "treatment") for t in treat]
    numeric_names += [(z, "instrument") for z in inst] + [(c, "control") for c in ctrl]
    if wname:
        numeric_names.append((wname, "weights"))
    cols = [_numeric(data, name, role) for name, role in numeric_names]
    n_all = len(data)
    keep = np.ones(n_all, dtype=bool)
    for (name, _), col in zip(numeric_names, cols, strict=True):
        if not check_finite or np.isfinite(col).all():  # the common case: one pass, nothing to drop
            continue
        inf = np.isinf(col)
        if inf.any():
            row = data.index[int(np.argmax(inf))]
            raise InvalidInputError(
                f"Column {name!r} holds an infinite value at row {row!r}; replace it or mark it missing."
            )
        keep &= ~np.isnan(col)
    for name in fe + clus:
        keep &= data[name].notna().to_numpy()
    n = int(keep.sum())
    n_dropped = n_all - n
    if n == 0:
        raise InvalidInputError("No row is complete over the used columns; check for missing values.")
    all_rows = n_dropped == 0
    cols = [c if all_rows else c[keep] for c in cols]
    w: Array | None = None
    if wname:
        w = cols.pop()
        bad = w <= 0
        if check_finite and bad.any():
            row = data.index[np.flatnonzero(keep)[int(np.argmax(bad))]]
            raise InvalidInputError(
                f"Weights column {wname!r} holds {int(bad.sum())} zero or negative value(s), e.g. at row "
                f"{row!r}; weights must be positive, drop those rows first."
            )
    fe_codes = [_codes(data[name] if all_rows else data[name][keep])[0] for name in fe]
    cl_read = [
        _codes(data[name] if all_rows else data[name][keep], any_order=not check_finite) for name in clus
    ]
    for name, (_, levels) in zip(clus, cl_read, strict=True):
        if check_finite and levels < 2:
            raise InvalidInputError(
                f"Cluster variable {name!r} has a single level in the used rows; cluster on a variable with "
                "at least two levels or use vcov='heteroskedastic'."
            )
    k, n_inst = len(treat), len(inst)
    for name, col in zip(inst, cols[1 + k : 1 + k + n_inst], strict=True):
        if check_finite and np.ptp(col) == 0:
            raise EstimationError(f"Instrument {name!r} is constant in the used rows; drop it.")
    return ModelColumns(
        outcome=outcome,
        treatment=treat,
        instruments=inst,
        controls=ctrl,
        absorb=fe,
        cluster=clus,
        weights_name=wname,
        targets=cols[: 1 + k + n_inst],
        control_cols=cols[1 + k + n_inst :],
        weights=w,
        fe_codes=fe_codes,
        cl_codes=[c for c, _ in cl_read],
        cl_levels=tuple(g for _, g in cl_read),
        n=n,
        n_dropped=n_dropped,
        finite_checked=check_finite,
    )


def prepare(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str | Sequence[str],
    instruments: str | Sequence[str] = (),
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    require_instruments: bool = True,
    tol: float = DEFAULT_TOL,
    max_iter: int = DEFAULT_MAX_ITER,
) -> PreparedData:
    """Validate the specification against ``data``, drop incomplete rows and partial out controls and effects.

    ``require_instruments`` is False for OLS (no excluded instruments). Rows with a missing value in any used
    column are dropped and counted; an infinite value is an error naming the column and row label.
    """
    cols = read_columns(
        data,
        outcome=outcome,
        treatment=treatment,
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        require_instruments=require_instruments,
    )
    return partial_columns(cols, tol=tol, max_iter=max_iter)


def partial_columns(
    cols: ModelColumns, *, tol: float = DEFAULT_TOL, max_iter: int = DEFAULT_MAX_ITER
) -> PreparedData:
    """Partial the controls and fixed effects out of checked columns and check what is left for constant or
    collinear columns (the second half of :func:`prepare`)."""
    if not cols.finite_checked:
        raise InvalidInputError(
            "These columns were read without the scan for missing values; read them again."
        )
    treat, inst, ctrl = cols.treatment, cols.instruments, cols.controls
    k = len(treat)
    absorbed = partial_out(
        cols.targets,
        controls=cols.control_cols or None,
        fe_codes=cols.fe_codes,
        weights=cols.weights,
        cluster_codes=cols.cl_codes,
        tol=tol,
        max_iter=max_iter,
    )
    if absorbed.dropped_controls:
        listed = ", ".join(repr(ctrl[j]) for j in absorbed.dropped_controls)
        raise EstimationError(
            f"Control(s) {listed} are constant, absorbed by the fixed effects or collinear with other "
            "controls; "
            "drop them."
        )
    cols_out = absorbed.columns
    scale = absorbed.scale
    y = cols_out[:, 0]
    x = cols_out[:, 1 : 1 + k]
    z = cols_out[:, 1 + k :]
    if np.sqrt(y @ y) <= 1e-9 * max(scale[0], 1e-300):
        raise EstimationError(
            f"The outcome {cols.outcome!r} has no variation left after partialling out the controls and fixed "
            "effects; check the specification."
        )
    if not _clearly_full_rank(cols_out[:, 1:], scale[1:]):
        check_collinear(x, z, scale, treat, inst, k)
    return PreparedData(
        y=y,
        X=x,
        Z=z,
        outcome=cols.outcome,
        treatment=treat,
        instruments=inst,
        controls=ctrl,
        absorb=cols.absorb,
        cluster=cols.cluster,
        weights=cols.weights_name,
        n=cols.n,
        n_dropped=cols.n_dropped,
        clusters=tuple(cols.cl_codes),
        n_partialled=absorbed.n_partialled,
        n_partialled_nested=absorbed.n_absorbed_nested,
        n_absorbed=absorbed.n_absorbed,
        fe_levels=absorbed.fe_levels,
        absorb_iterations=absorbed.iterations,
    )


def _clearly_full_rank(mat: Array, scale: Array) -> bool:
    """One Gram pass: True when no column lost more than 1 - 1e-6 of its length to partialling and the
    unit-length columns are far from collinear (Cholesky diagonal above 1e-3), so no detailed check is needed."""
    if mat.shape[1] == 0:
        return True
    gram = mat.T @ mat
    norms = np.sqrt(np.clip(np.diag(gram), 0.0, None))
    if np.any(scale <= 0) or np.any(norms <= 1e-6 * scale):
        return False
    try:
        chol = np.linalg.cholesky(gram / np.outer(norms, norms))
    except np.linalg.LinAlgError:
        return False
    return bool(np.diag(chol).min() > 1e-3)


def check_collinear(
    x: Array, z: Array, scale: Array, treat: tuple[str, ...], inst: tuple[str, ...], k: int
) -> None:
    """Name the treatments and instruments that are constant, partialled away or collinear.

    ``x`` and ``z`` are the partialled columns (or any matrices with the same R factor, such as a square root
    of their Gram matrix); ``scale`` holds [y, X, Z] lengths before partialling.
    """
    n_inst = len(inst)
    _name_collinear(x, scale[1 : 1 + k], treat, "treatment", "controls or fixed effects")
    _name_collinear(z, scale[1 + k :], inst, "instrument", "controls or fixed effects")
    if n_inst:
        both = np.column_stack([x, z])
        bad_inst = [j - k for j in collinear_columns(both, scale=scale[1:]) if j >= k]
        if bad_inst:
            listed = ", ".join(repr(inst[j]) for j in bad_inst)
            raise EstimationError(
                f"Instrument(s) {listed} are collinear with the other instruments or treatments after "
                "partialling; drop the redundant instrument."
            )


def _name_collinear(mat: Array, scale: Array, names: Sequence[str], role: str, others: str) -> None:
    if not names:
        return
    norms = np.sqrt(np.einsum("ij,ij->j", mat, mat))
    for j, name in enumerate(names):
        if scale[j] == 0:
            raise EstimationError(f"The {role} {name!r} is constant in the used rows; drop it.")
        if norms[j] <= 1e-9 * scale[j]:
            raise EstimationError(
                f"The {role} {name!r} is collinear with the {others} (nothing is left after partialling them "
                "out); drop it or the variables that explain it."
            )
    bad = collinear_columns(mat, scale=scale)
    if bad:
        listed = ", ".join(repr(names[j]) for j in bad)
        raise EstimationError(f"The {role} columns {listed} are collinear with each other; drop one of them.")
