"""Exposure-share (shift-share) designs: build the instrument, its Rotemberg weights and exposure-robust inference.

A unit's instrument is B_i = sum_k s_ik g_k, its exposure shares s_ik to sectors k times the sector shocks g_k.
Everything here is one cross-section of units (one row per unit); controls W always include an intercept and
are partialled out (y~ = M_W y, x~ = M_W x). With incomplete shares (rows summing to less than one) the sum of
shares belongs among the controls (Borusyak, Hull and Jaravel 2022); it is reported so callers can add it.

* Rotemberg weights (Goldsmith-Pinkham, Sorkin and Swift 2020): the 2SLS estimate with B is
  b = sum_k a_k b_k with a_k = g_k s_k'x~ / sum_l g_l s_l'x~ (summing to one) and b_k = s_k'y~ / s_k'x~, the
  just-identified estimate with sector k's share as the only instrument.
* Exposure-robust inference (Adão, Kolesár and Morales 2019): with X^ = (S'S)^-1 S' M_W B (the partialled
  instrument projected on the shares), e = M_W (y - x b) and R_k = sum_i s_ik e_i,
  se(b) = sqrt(sum_k X^_k^2 R_k^2) / |B' M_W x| (sums over clusters of sectors when given). The AKM0 set inverts
  the same statistic with the residual under the null, {b0 : (B'M_W (y - x b0))^2 <= z^2 sum_k X^_k^2 R_k(b0)^2},
  a quadratic inequality solved exactly.
* The shock-level regression (Borusyak, Hull and Jaravel 2022): with exposure weights s_k = sum_i s_ik and
  exposure-weighted averages y_k = sum_i s_ik y~_i / s_k (x_k likewise), the s_k-weighted IV regression of y_k on
  x_k with instrument g_k reproduces the unit-level 2SLS estimate exactly; its shock-level robust standard error
  is exposure-robust.

No small-sample factors are applied to any standard error here (stated convention).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.jackknife_iv import orthonormal_basis
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]
SHARE_TOL = 1e-9
MAX_NAMED = 8
CAUTION = (
    "Exposure-robust inference accounts for units that share exposure to the same sectors; it cannot establish "
    "that the shocks (or the shares) are as good as randomly assigned, nor exclusion. Conclusions for policy or "
    "clinical decisions need domain review."
)


def _names(values: Sequence[Any]) -> str:
    vals = list(values)
    shown = ", ".join(repr(v) for v in vals[:MAX_NAMED])
    return shown + (f" and {len(vals) - MAX_NAMED} more" if len(vals) > MAX_NAMED else "")


# ----------------------------------------------------------------------------------------------------------
# building the instrument
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ShiftShareRecipe(Record):
    """How the exposure-share instrument was built, for a run's provenance."""

    name: str
    unit: str
    sector: str
    share: str
    shock: str
    n_units: int
    n_sectors: int
    n_share_rows: int
    n_unused_shocks: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": "exposure_share_recipe",
            "name": self.name,
            "unit": self.unit,
            "sector": self.sector,
            "share": self.share,
            "shock": self.shock,
            "n_units": self.n_units,
            "n_sectors": self.n_sectors,
            "n_share_rows": self.n_share_rows,
            "n_unused_shocks": self.n_unused_shocks,
            "description": f"{self.name}_i = sum over sectors k of {self.share}_ik * {self.shock}_k",
        }


@dataclass(frozen=True, eq=False)
class ShiftShareDesign:
    """Shares (units x sectors), shocks and the instrument, in the order of ``units`` and ``sectors``."""

    units: tuple[Any, ...]
    sectors: tuple[Any, ...]
    shares: Array
    shocks: Array
    recipe: ShiftShareRecipe
    instrument: Array = field(init=False)
    share_sums: Array = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "instrument", np.asarray(self.shares @ self.shocks, dtype=np.float64))
        object.__setattr__(self, "share_sums", np.asarray(self.shares.sum(axis=1), dtype=np.float64))

    @property
    def incomplete(self) -> bool:
        """True when some unit's shares sum to less than one (then control for ``share_sums``)."""
        return bool(np.any(self.share_sums < 1 - 1e-6))

    def as_series(self) -> pd.Series:
        import pandas as pd

        return pd.Series(
            self.instrument, index=pd.Index(self.units, name=self.recipe.unit), name=self.recipe.name
        )

    def to_dict(self) -> dict[str, Any]:
        b = self.instrument
        return dict(
            json_safe(
                {
                    "kind": "exposure_share_instrument",
                    "recipe": self.recipe.to_dict(),
                    "summary": {"mean": b.mean(), "sd": b.std(), "min": b.min(), "max": b.max()},
                    "share_sums": {"min": self.share_sums.min(), "max": self.share_sums.max()},
                    "incomplete_shares": self.incomplete,
                    "caution": CAUTION,
                }
            )
        )

    def __str__(self) -> str:
        r = self.recipe
        lines = [
            f"Exposure-share instrument {r.name!r}: {r.n_units:,} units, {r.n_sectors:,} sectors",
            f"  {r.to_dict()['description']}",
            f"  instrument: mean {self.instrument.mean():.4g}, sd {self.instrument.std():.4g}",
            f"  share sums: {self.share_sums.min():.4g} to {self.share_sums.max():.4g}"
            + ("  (incomplete: add the share sum as a control)" if self.incomplete else ""),
            f"  {CAUTION}",
        ]
        return "\n".join(lines)


def shift_share_from_arrays(
    shares: np.ndarray,
    shocks: np.ndarray,
    *,
    units: Sequence[Any] | None = None,
    sectors: Sequence[Any] | None = None,
    name: str = "shift_share",
) -> ShiftShareDesign:
    """Design from a dense shares matrix (units x sectors) and a shock vector; shares checked as in the table path."""
    s = np.asarray(shares, dtype=np.float64)
    g = np.asarray(shocks, dtype=np.float64).ravel()
    if s.ndim != 2 or s.shape[1] != g.size:
        raise InvalidInputError(
            f"shares must be units x sectors with one column per shock; got shape {s.shape} and {g.size} shocks."
        )
    u = tuple(units) if units is not None else tuple(range(s.shape[0]))
    k = tuple(sectors) if sectors is not None else tuple(range(s.shape[1]))
    _check_share_values(s, u)
    if not np.all(np.isfinite(g)):
        raise InvalidInputError(
            f"Shocks must be finite; check sectors {_names([k[i] for i in np.flatnonzero(~np.isfinite(g))])}."
        )
    recipe = ShiftShareRecipe(
        name, "unit", "sector", "share", "shock", len(u), len(k), int(np.count_nonzero(s)), 0
    )
    return ShiftShareDesign(u, k, s, g, recipe)


def _check_share_values(s: Array, units: Sequence[Any]) -> None:
    bad = np.flatnonzero(~np.all(np.isfinite(s) & (s >= 0) & (s <= 1 + SHARE_TOL), axis=1))
    if bad.size:
        raise InvalidInputError(
            f"Shares must lie between 0 and 1; units {_names([units[int(i)] for i in bad])} have shares outside; "
            "fix or drop those rows."
        )
    sums = s.sum(axis=1)
    over = np.flatnonzero(sums > 1 + 1e-6)
    if over.size:
        detail = ", ".join(f"{units[i]!r} ({sums[i]:.4g})" for i in over[:MAX_NAMED])
        raise InvalidInputError(
            f"Shares must sum to at most one per unit; {over.size} unit(s) exceed it: {detail}; check for "
            "duplicated rows or shares given in percent."
        )


def build_shift_share(
    shares: pd.DataFrame,
    shocks: pd.DataFrame,
    *,
    unit: str = "unit",
    sector: str = "sector",
    share: str = "share",
    shock: str = "shock",
    units: Sequence[Any] | pd.Series | pd.Index | None = None,
    name: str | None = None,
) -> ShiftShareDesign:
    """Build the instrument from a long shares table (unit, sector, share) and a shocks table (sector, shock).

    ``units`` (e.g. the unit column of the outcome data) fixes the unit order and must match the shares table's
    units exactly. Shares must lie in [0, 1] and sum to at most one per unit; every sector with a share needs a
    shock. Shocks of sectors no unit is exposed to are ignored (counted in the recipe).
    """
    import pandas as pd

    for table, label, cols in (
        (shares, "shares", (unit, sector, share)),
        (shocks, "shocks", (sector, shock)),
    ):
        missing = [c for c in cols if c not in table.columns]
        if missing:
            raise InvalidInputError(
                f"The {label} table has no column(s) {_names(missing)}; its columns are {_names(list(table.columns))}."
            )
        for c in cols:
            na = table[c].isna().to_numpy()
            if na.any():
                raise InvalidInputError(
                    f"Column {c!r} of the {label} table is missing in row(s) {_names(table.index[na].tolist())}; "
                    "drop or fill them."
                )
    for table, label, c in ((shares, "shares", share), (shocks, "shocks", shock)):
        if not pd.api.types.is_numeric_dtype(table[c]):
            raise InvalidInputError(
                f"Column {c!r} of the {label} table must be numeric; got {table[c].dtype}."
            )
    dup_sector = shocks[sector].duplicated(keep=False).to_numpy()
    if dup_sector.any():
        raise InvalidInputError(
            f"The shocks table lists sector(s) {_names(sorted(set(shocks[sector][dup_sector].tolist()), key=str))} "
            "more than once; keep one shock per sector."
        )
    dup_pair = shares.duplicated(subset=[unit, sector], keep=False).to_numpy()
    if dup_pair.any():
        raise InvalidInputError(
            f"The shares table has repeated ({unit}, {sector}) pairs in rows {_names(shares.index[dup_pair].tolist())}; "
            "keep one share per unit and sector."
        )
    shock_map = pd.Series(shocks[shock].to_numpy(dtype=np.float64), index=shocks[sector].to_numpy())
    used_sectors = pd.unique(shares[sector])
    absent = [k for k in used_sectors if k not in shock_map.index]
    if absent:
        raise InvalidInputError(
            f"{len(absent)} sector(s) in the shares table have no shock: {_names(absent)}; add their shocks to the "
            "shocks table or drop their shares."
        )
    share_units = pd.unique(shares[unit])
    if units is None:
        unit_order = list(share_units)
    else:
        unit_order = list(pd.unique(pd.Index(units)))
        in_data = set(unit_order)
        in_shares = set(share_units)
        no_shares = [x for x in unit_order if x not in in_shares]
        no_data = [x for x in share_units if x not in in_data]
        if no_shares or no_data:
            parts = []
            if no_shares:
                parts.append(f"{len(no_shares)} unit(s) of the data have no shares ({_names(no_shares)})")
            if no_data:
                parts.append(
                    f"{len(no_data)} unit(s) of the shares table are not in the data ({_names(no_data)})"
                )
            raise InvalidInputError(
                "Unit ids do not match: "
                + "; ".join(parts)
                + "; make both use the same unit ids (type and spelling)."
            )
    sector_order = list(used_sectors)
    ui = pd.Index(unit_order).get_indexer(shares[unit])
    ki = pd.Index(sector_order).get_indexer(shares[sector])
    mat = np.zeros((len(unit_order), len(sector_order)))
    mat[ui, ki] = shares[share].to_numpy(dtype=np.float64)
    _check_share_values(mat, unit_order)
    g = shock_map.loc[sector_order].to_numpy(dtype=np.float64)
    bad_g = np.flatnonzero(~np.isfinite(g))
    if bad_g.size:
        raise InvalidInputError(
            f"Shocks must be finite; check sectors {_names([sector_order[i] for i in bad_g])}."
        )
    recipe = ShiftShareRecipe(
        name=name or f"{shock}_exposure",
        unit=unit,
        sector=sector,
        share=share,
        shock=shock,
        n_units=len(unit_order),
        n_sectors=len(sector_order),
        n_share_rows=len(shares),
        n_unused_shocks=int(len(shock_map) - len(sector_order)),
    )
    return ShiftShareDesign(tuple(unit_order), tuple(sector_order), mat, g, recipe)


def align_units(design: ShiftShareDesign, data: pd.DataFrame, unit: str) -> pd.DataFrame:
    """Rows of ``data`` (one per unit) reordered like ``design.units``; mismatched or repeated ids are named."""
    import pandas as pd

    if unit not in data.columns:
        raise InvalidInputError(f"Column {unit!r} not found in the data; name the unit id column.")
    dup = data[unit].duplicated(keep=False).to_numpy()
    if dup.any():
        raise InvalidInputError(
            f"Unit ids repeat in {unit!r} ({_names(sorted(set(data[unit][dup].tolist()), key=str))}); the exposure-share "
            "analyses take one row per unit."
        )
    pos = pd.Index(data[unit]).get_indexer(pd.Index(design.units))
    if np.any(pos < 0) or len(data) != len(design.units):
        missing = [design.units[i] for i in np.flatnonzero(pos < 0)]
        extra = sorted(set(data[unit]) - set(design.units), key=str)
        parts = [f"missing from the data: {_names(missing)}"] if missing else []
        parts += [f"not in the design: {_names(extra)}"] if extra else []
        raise InvalidInputError(
            "Unit ids do not match (" + "; ".join(parts) + "); make both use the same unit ids."
        )
    return data.iloc[pos]


# ----------------------------------------------------------------------------------------------------------
# shared partialling
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Partialled:
    y: Array
    x: Array
    b: Array  # M_W B
    n_controls: int


def _partial(
    design: ShiftShareDesign, y: np.ndarray, x: np.ndarray, controls: np.ndarray | None
) -> _Partialled:
    n = len(design.units)
    yv = np.asarray(y, dtype=np.float64).ravel()
    xv = np.asarray(x, dtype=np.float64).ravel()
    if yv.size != n or xv.size != n:
        raise InvalidInputError(
            f"outcome ({yv.size}) and treatment ({xv.size}) must have one value per unit of the design ({n}); "
            "align them with align_units."
        )
    w = np.ones((n, 1))
    if controls is not None:
        c = np.asarray(controls, dtype=np.float64)
        w = np.column_stack([w, c[:, None] if c.ndim == 1 else c])
    for label, v in (("outcome", yv), ("treatment", xv), ("controls", w)):
        if not np.all(np.isfinite(v)):
            raise InvalidInputError(f"The {label} must be finite; drop or fill missing values first.")
    q = orthonormal_basis(w)

    def resid(v: Array) -> Array:
        return np.asarray(v - q @ (q.T @ v), dtype=np.float64)

    return _Partialled(resid(yv), resid(xv), resid(design.instrument), q.shape[1])


def _iv(p: _Partialled) -> tuple[float, float]:
    den = float(p.b @ p.x)
    if abs(den) <= 1e-12 * np.sqrt(float(p.b @ p.b) * float(p.x @ p.x)) or not np.isfinite(den):
        raise EstimationError(
            "The exposure-share instrument is orthogonal to the treatment after the controls (no first stage)."
        )
    return float(p.b @ p.y) / den, den


# ----------------------------------------------------------------------------------------------------------
# Rotemberg weights
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RotembergWeights(Record):
    """Per-sector Rotemberg weights and just-identified estimates whose weighted sum is the 2SLS estimate."""

    sectors: tuple[str, ...]
    weights: tuple[float, ...]
    estimates: tuple[float, ...]  # NaN where sector k's share is orthogonal to the treatment
    shocks: tuple[float, ...]
    estimate: float
    negative_weight_sum: float
    negative_weight_share: float
    top: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "kind": "rotemberg_weights",
                    "estimate": self.estimate,
                    "negative_weight_sum": self.negative_weight_sum,
                    "negative_weight_share": self.negative_weight_share,
                    "top": list(self.top),
                    "sectors": [
                        {"sector": s, "weight": w, "estimate": b, "shock": g}
                        for s, w, b, g in zip(
                            self.sectors, self.weights, self.estimates, self.shocks, strict=True
                        )
                    ],
                    "plot": {
                        "x": "weight",
                        "y": "estimate",
                        "points": [[w, b] for w, b in zip(self.weights, self.estimates, strict=True)],
                    },
                    "caution": CAUTION,
                }
            )
        )

    def __str__(self) -> str:
        index = {s: i for i, s in enumerate(self.sectors)}
        lines = [
            f"Rotemberg weights: {len(self.sectors):,} sectors; 2SLS estimate {self.estimate:.4g} = "
            "sum of weight x per-sector estimate",
            f"  negative weights sum to {self.negative_weight_sum:.4g} "
            f"({100 * self.negative_weight_share:.1f}% of total absolute weight)",
            f"  {'sector':<20}{'weight':>10}{'estimate':>12}{'shock':>10}",
        ]
        for s in self.top:
            i = index[s]
            lines.append(
                f"  {s:<20}{self.weights[i]:>10.4g}{self.estimates[i]:>12.4g}{self.shocks[i]:>10.4g}"
            )
        lines.append(f"  {CAUTION}")
        return "\n".join(lines)


def rotemberg_weights(
    design: ShiftShareDesign,
    y: np.ndarray,
    x: np.ndarray,
    controls: np.ndarray | None = None,
    *,
    top: int = 5,
) -> RotembergWeights:
    """Goldsmith-Pinkham, Sorkin and Swift (2020) decomposition of the exposure-share 2SLS estimate by sector."""
    p = _partial(design, y, x, controls)
    beta, den = _iv(p)
    sy = design.shares.T @ p.y
    sx = design.shares.T @ p.x
    g = design.shocks
    weights = g * sx / den
    with np.errstate(divide="ignore", invalid="ignore"):
        per = np.where(sx != 0, sy / np.where(sx != 0, sx, 1.0), np.nan)
    neg = float(weights[weights < 0].sum())
    total_abs = float(np.abs(weights).sum())
    order = np.argsort(-np.abs(weights), kind="stable")[: max(0, top)]
    names = tuple(str(s) for s in design.sectors)
    return RotembergWeights(
        sectors=names,
        weights=tuple(float(w) for w in weights),
        estimates=tuple(float(b) for b in per),
        shocks=tuple(float(v) for v in g),
        estimate=beta,
        negative_weight_sum=neg,
        negative_weight_share=-neg / total_abs if total_abs > 0 else 0.0,
        top=tuple(names[i] for i in order),
    )


# ----------------------------------------------------------------------------------------------------------
# exposure-robust inference (AKM, AKM0) and the conventional comparison
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ExposureRobustIV(Record):
    """2SLS with the exposure-share instrument: conventional, AKM and AKM0 intervals (NaN when not applicable)."""

    estimate: float
    se_conventional: float
    ci_conventional: tuple[float, float]
    se_akm: float
    ci_akm: tuple[float, float]
    akm0_set: tuple[tuple[float, float], ...]
    alpha: float
    n_units: int
    n_sectors: int
    n_sector_clusters: int | None
    applicable: bool
    reason: str | None
    conventions: str = "no small-sample factors; conventional = heteroskedasticity-robust (HC0) over units"
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "kind": "exposure_robust_iv",
                    "estimate": self.estimate,
                    "conventional": {"se": self.se_conventional, "ci": list(self.ci_conventional)},
                    "akm": {"se": self.se_akm, "ci": list(self.ci_akm)},
                    "akm0": {"set": [list(i) for i in self.akm0_set]},
                    "alpha": self.alpha,
                    "n_units": self.n_units,
                    "n_sectors": self.n_sectors,
                    "n_sector_clusters": self.n_sector_clusters,
                    "applicable": self.applicable,
                    "reason": self.reason,
                    "conventions": self.conventions,
                    "caution": self.caution,
                }
            )
        )

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g}%"
        lo, hi = self.ci_conventional
        lines = [
            f"Exposure-share 2SLS: {self.n_units:,} units, {self.n_sectors:,} sectors; estimate {self.estimate:.4g}",
            f"  conventional (robust over units): se {self.se_conventional:.4g}, {level} [{lo:.4g}, {hi:.4g}]",
        ]
        if self.applicable:
            a_lo, a_hi = self.ci_akm
            akm0 = " U ".join(f"[{a:.4g}, {b:.4g}]" for a, b in self.akm0_set) or "empty"
            clus = f" ({self.n_sector_clusters} sector clusters)" if self.n_sector_clusters else ""
            lines += [
                f"  AKM exposure-robust{clus}: se {self.se_akm:.4g}, {level} [{a_lo:.4g}, {a_hi:.4g}]",
                f"  AKM0 {level} set: {akm0}",
            ]
        else:
            lines.append(f"  AKM and AKM0: not applicable: {self.reason}")
        lines.append(f"  {self.caution}")
        return "\n".join(lines)


def _quadratic_set(a2: float, a1: float, a0: float) -> tuple[tuple[float, float], ...]:
    """{b : a2 b^2 + a1 b + a0 <= 0} as a tuple of intervals (bounded, two rays, the whole line or empty)."""
    inf = float("inf")
    scale = max(abs(a2), abs(a1), abs(a0), 1e-300)
    if abs(a2) <= 1e-12 * scale:
        if abs(a1) <= 1e-12 * scale:
            return ((-inf, inf),) if a0 <= 0 else ()
        root = -a0 / a1
        return ((-inf, root),) if a1 > 0 else ((root, inf),)
    disc = a1 * a1 - 4 * a2 * a0
    if disc < 0:
        return () if a2 > 0 else ((-inf, inf),)
    sq = np.sqrt(disc)
    r1, r2 = sorted(((-a1 - sq) / (2 * a2), (-a1 + sq) / (2 * a2)))
    return ((r1, r2),) if a2 > 0 else ((-inf, r1), (r2, inf))


def exposure_robust_iv(
    design: ShiftShareDesign,
    y: np.ndarray,
    x: np.ndarray,
    controls: np.ndarray | None = None,
    *,
    sector_clusters: np.ndarray | Sequence[Any] | None = None,
    alpha: float = 0.05,
) -> ExposureRobustIV:
    """2SLS with the exposure-share instrument and the intervals of Adão, Kolesár and Morales (2019).

    ``sector_clusters`` (one label per sector, in ``design.sectors`` order) allows shocks to be correlated
    within clusters of sectors. AKM needs the shares matrix to have full column rank (no more sectors than
    units); otherwise only the conventional interval is returned with the reason.
    """
    import pandas as pd
    from scipy import stats

    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    p = _partial(design, y, x, controls)
    beta, den = _iv(p)
    z = float(stats.norm.ppf(1 - alpha / 2))
    eps = p.y - beta * p.x
    se_conv = float(np.sqrt(np.sum((p.b * eps) ** 2)) / abs(den))
    n, k = design.shares.shape
    nan = float("nan")
    clusters = None
    if sector_clusters is not None:
        labels = np.asarray(sector_clusters, dtype=object)
        if labels.size != k:
            raise InvalidInputError(
                f"sector_clusters needs one label per sector ({k}), got {labels.size}; order them like design.sectors."
            )
        clusters = pd.factorize(labels)[0]
    base: dict[str, Any] = {
        "estimate": beta,
        "se_conventional": se_conv,
        "ci_conventional": (beta - z * se_conv, beta + z * se_conv),
        "alpha": alpha,
        "n_units": n,
        "n_sectors": k,
        "n_sector_clusters": None if clusters is None else int(clusters.max()) + 1,
    }
    q = orthonormal_basis(design.shares)
    if q.shape[1] < k:
        reason = (
            f"the shares matrix has rank {q.shape[1]} below its {k} sectors (more sectors than units, or collinear "
            "sectors); aggregate or drop sectors"
        )
        return ExposureRobustIV(
            se_akm=nan, ci_akm=(nan, nan), akm0_set=(), applicable=False, reason=reason, **base
        )
    xhat, *_ = np.linalg.lstsq(design.shares, p.b, rcond=None)

    def per_cluster(v: Array) -> Array:
        return v if clusters is None else np.asarray(np.bincount(clusters, weights=v), dtype=np.float64)

    r_y = design.shares.T @ p.y
    r_x = design.shares.T @ p.x
    u = per_cluster(xhat * (r_y - beta * r_x))
    se_akm = float(np.sqrt(np.sum(u * u)) / abs(den))
    u1, u2 = per_cluster(xhat * r_y), per_cluster(xhat * r_x)
    a, b = float(p.b @ p.y), den
    z2 = z * z
    akm0 = _quadratic_set(
        b * b - z2 * float(u2 @ u2), -2 * a * b + 2 * z2 * float(u1 @ u2), a * a - z2 * float(u1 @ u1)
    )
    return ExposureRobustIV(
        se_akm=se_akm,
        ci_akm=(beta - z * se_akm, beta + z * se_akm),
        akm0_set=akm0,
        applicable=True,
        reason=None,
        **base,
    )


# ----------------------------------------------------------------------------------------------------------
# shock-level regression (Borusyak, Hull and Jaravel 2022)
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ShockLevelIV(Record):
    """The exposure-weighted shock-level IV regression and its shock-level robust standard error."""

    estimate: float
    std_error: float
    ci: tuple[float, float]
    alpha: float
    n_sectors: int
    effective_sectors: float
    largest_exposure_share: float
    shock_intercept: bool
    n_sector_clusters: int | None
    conventions: str = (
        "weights s_k = sum_i s_ik; heteroskedasticity-robust over sectors (HC0), no small-sample factor"
    )
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "kind": "shock_level_iv",
                    "estimate": self.estimate,
                    "std_error": self.std_error,
                    "ci": list(self.ci),
                    "alpha": self.alpha,
                    "n_sectors": self.n_sectors,
                    "effective_sectors": self.effective_sectors,
                    "largest_exposure_share": self.largest_exposure_share,
                    "shock_intercept": self.shock_intercept,
                    "n_sector_clusters": self.n_sector_clusters,
                    "conventions": self.conventions,
                    "caution": self.caution,
                }
            )
        )

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g}%"
        return "\n".join(
            [
                f"Shock-level IV regression: {self.n_sectors:,} sectors with exposure, effective number "
                f"{self.effective_sectors:.1f} (largest exposure share {100 * self.largest_exposure_share:.1f}%)",
                f"  estimate {self.estimate:.4g}, se {self.std_error:.4g}, {level} [{self.ci[0]:.4g}, {self.ci[1]:.4g}]",
                f"  {self.caution}",
            ]
        )


def shock_level_iv(
    design: ShiftShareDesign,
    y: np.ndarray,
    x: np.ndarray,
    controls: np.ndarray | None = None,
    *,
    shock_intercept: bool = True,
    sector_clusters: np.ndarray | Sequence[Any] | None = None,
    alpha: float = 0.05,
) -> ShockLevelIV:
    """Borusyak, Hull and Jaravel (2022) shock-level regression equivalent to the unit-level exposure-share 2SLS.

    With ``shock_intercept`` (their recommendation when shocks have a common mean) the unit-level equivalence
    needs the share sum among ``controls`` when shares are incomplete. Sectors no unit is exposed to are dropped.
    """
    import pandas as pd
    from scipy import stats

    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    p = _partial(design, y, x, controls)
    s_k = design.shares.sum(axis=0)
    keep = s_k > 0
    sh, g = design.shares[:, keep], design.shocks[keep]
    s_k = s_k[keep]
    ybar = (sh.T @ p.y) / s_k
    xbar = (sh.T @ p.x) / s_k
    if shock_intercept:
        gt = g - float(s_k @ g) / float(s_k.sum())

        def demean(v: Array) -> Array:
            return v - float(s_k @ v) / float(s_k.sum())
    else:
        gt = g

        def demean(v: Array) -> Array:
            return v

    den = float(np.sum(s_k * gt * xbar))
    if abs(den) <= 1e-12 * np.sqrt(float(np.sum(s_k * gt * gt)) * float(np.sum(s_k * xbar * xbar))):
        raise EstimationError(
            "The shocks are orthogonal to the exposure-weighted treatment (no first stage)."
        )
    beta = float(np.sum(s_k * gt * ybar)) / den
    resid = demean(ybar - beta * xbar)
    score = s_k * gt * resid
    n_clusters = None
    if sector_clusters is not None:
        labels = np.asarray(sector_clusters, dtype=object)
        if labels.size != design.shocks.size:
            raise InvalidInputError(
                f"sector_clusters needs one label per sector ({design.shocks.size}), got {labels.size}."
            )
        codes = pd.factorize(labels[keep])[0]
        score = np.bincount(codes, weights=score)
        n_clusters = int(codes.max()) + 1
    se = float(np.sqrt(np.sum(score * score)) / abs(den))
    z = float(stats.norm.ppf(1 - alpha / 2))
    w = s_k / s_k.sum()
    return ShockLevelIV(
        estimate=beta,
        std_error=se,
        ci=(beta - z * se, beta + z * se),
        alpha=alpha,
        n_sectors=int(keep.sum()),
        effective_sectors=float(1.0 / np.sum(w * w)),
        largest_exposure_share=float(w.max()),
        shock_intercept=shock_intercept,
        n_sector_clusters=n_clusters,
    )
