"""Evidence from published per-variant summary statistics (genetic-variant instruments, Mendelian randomization).

A per-variant table holds, for each variant j, its association with the exposure (bx_j, se sx_j) and with the
outcome (by_j, se sy_j) from two studies, the alleles each study reports the effect for, and optionally sample
sizes and R² inputs. :func:`read_variant_table` reads CSV/TSV, :func:`variant_table` checks a DataFrame and
harmonises the outcome study to the exposure study's effect allele (the outcome effect changes sign where the
alleles are swapped). Estimators (first-order weights w_j = bx_j² / sy_j², i.e. the exposure effects treated as
known):

* Wald ratio by_j / bx_j with se sy_j / |bx_j| (second-order se also given);
* IVW = sum(bx by / sy²) / sum(bx² / sy²), fixed-effect se 1 / sqrt(sum(bx² / sy²)), normal intervals; the
  multiplicative random-effects se multiplies it by max(1, sqrt(Q / (J - 1))) (under-dispersion not allowed);
* MR-Egger (Bowden, Davey Smith and Burgess 2015): variants oriented so bx_j >= 0, weighted regression of by on
  bx with an intercept and weights 1 / sy²; se scaled by max(1, residual standard error), t intervals with
  J - 2 df; I²_GX (Bowden et al. 2016, IJE) from bx_j / sy_j with ses sx_j / sy_j;
* weighted median (Bowden et al. 2016, Genet Epidemiol): the 50th percentile of the ordered ratios with
  cumulative weights s_j = sum_{k<=j} w_k - w_j / 2, interpolated linearly; se from a parametric bootstrap that
  redraws both associations and keeps the weights;
* Cochran's Q = sum (by - IVW bx)² / sy² (chi² J - 1), Rücker's Q' the same around the Egger line (chi² J - 2),
  and their difference (chi² 1);
* leave-one-variant-out IVW; Steiger directionality (Hemani, Tilling and Davey Smith 2017): r² of the variants
  with exposure and outcome compared by Fisher's z for two independent samples; mean F = mean(bx² / sx²).

No statistic can establish that variants affect the outcome only through the exposure (exclusion) or share no
cause with it (exogeneity); heterogeneity and Egger tests can only reveal some violations.
"""

from __future__ import annotations

import csv
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal, cast

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.distributions import chi2_sf, norm_ppf, norm_sf, t_ppf, t_sf
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where a frame is read, so reading stored results stays light
    import pandas as pd

__all__ = [
    "CAUTION",
    "REQUIRED_COLUMNS",
    "Directionality",
    "EggerFit",
    "Harmonisation",
    "Heterogeneity",
    "IvwFit",
    "LeaveOneOut",
    "NotApplicable",
    "SummaryEvidence",
    "VariantTable",
    "WaldRatios",
    "WeightedMedian",
    "cochran_q",
    "directionality",
    "egger",
    "ivw",
    "leave_one_out",
    "read_variant_frame",
    "read_variant_table",
    "summary_evidence",
    "variant_table",
    "wald_ratios",
    "weighted_median",
    "weighted_median_point",
]

Array = NDArray[np.float64]

CAUTION = (
    "These summary-data statistics cannot establish exclusion or exogeneity of the variants: heterogeneity, "
    "the Egger intercept and directionality can only reveal some violations. Conclusions for policy or "
    "clinical decisions need domain review."
)

REQUIRED_COLUMNS = ("variant", "exposure_effect", "exposure_se", "outcome_effect", "outcome_se")
ALLELE_PAIRS = (
    ("exposure_effect_allele", "exposure_other_allele", "outcome_effect_allele", "outcome_other_allele"),
)
OPTIONAL_NUMERIC = ("exposure_n", "outcome_n", "exposure_r2", "outcome_r2")
_COMPLEMENT = str.maketrans("ACGT", "TGCA")
_ALLELE = re.compile(r"[ACGT]+|[DI]")


def _as_dict(obj: Any) -> dict[str, Any]:
    return cast(dict[str, Any], json_safe(obj.__dict__))


def _list(names: Sequence[str], limit: int = 5) -> str:
    shown = ", ".join(repr(n) for n in names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")


# ----------------------------------------------------------------------------------------------------------
# the table
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Harmonisation(Record):
    """What harmonising the outcome study to the exposure study's effect alleles did."""

    n_variants: int
    flipped: tuple[str, ...]
    strand_complemented: tuple[str, ...]
    palindromic: tuple[str, ...]
    alleles_given: bool

    @property
    def n_flipped(self) -> int:
        return len(self.flipped)

    def to_dict(self) -> dict[str, Any]:
        out = _as_dict(self)
        out["n_flipped"] = self.n_flipped
        return out

    def __str__(self) -> str:
        if not self.alleles_given:
            return (
                f"{self.n_variants} variants; no allele columns, so the effects are taken as already aligned."
            )
        text = f"{self.n_variants} variants; outcome effect sign flipped for {self.n_flipped} with swapped alleles"
        if self.strand_complemented:
            text += f"; {len(self.strand_complemented)} matched on the opposite strand"
        if self.palindromic:
            text += (
                f"; {len(self.palindromic)} palindromic (A/T or C/G) variant(s) aligned by their reported "
                "alleles, their strand cannot be checked without allele frequencies"
            )
        return text + "."


@dataclass(frozen=True, eq=False)
class VariantTable(Record):
    """Harmonised per-variant associations (arrays in table order) with the harmonisation report."""

    variants: tuple[str, ...]
    bx: Array
    sx: Array
    by: Array
    sy: Array
    n_exposure: Array | None
    n_outcome: Array | None
    r2_exposure: Array | None
    r2_outcome: Array | None
    harmonisation: Harmonisation
    source: str = ""

    @property
    def n_variants(self) -> int:
        return len(self.variants)

    def subset(self, keep: NDArray[np.bool_]) -> VariantTable:
        """The same table restricted to the rows where ``keep`` is True."""

        def pick(a: Array | None) -> Array | None:
            return None if a is None else a[keep]

        return VariantTable(
            variants=tuple(v for v, k in zip(self.variants, keep, strict=True) if k),
            bx=self.bx[keep],
            sx=self.sx[keep],
            by=self.by[keep],
            sy=self.sy[keep],
            n_exposure=pick(self.n_exposure),
            n_outcome=pick(self.n_outcome),
            r2_exposure=pick(self.r2_exposure),
            r2_outcome=pick(self.r2_outcome),
            harmonisation=self.harmonisation,
            source=self.source,
        )

    def to_dict(self) -> dict[str, Any]:
        rows = []
        for j, v in enumerate(self.variants):
            rows.append(
                {
                    "variant": v,
                    "exposure_effect": float(self.bx[j]),
                    "exposure_se": float(self.sx[j]),
                    "outcome_effect": float(self.by[j]),
                    "outcome_se": float(self.sy[j]),
                }
            )
        return cast(
            dict[str, Any],
            json_safe({"source": self.source, "harmonisation": self.harmonisation, "rows": rows}),
        )

    def __str__(self) -> str:
        return f"Per-variant table{f' {self.source}' if self.source else ''}: {self.harmonisation}"


VARIANT_SUFFIXES = (".csv", ".tsv", ".txt")
_SEPARATORS = {",": "comma", "\t": "tab", ";": "semicolon"}


def _variant_suffix(p: Path) -> tuple[str, str | None]:
    """The table's own extension and its compression (``.tsv.gz`` -> ``.tsv``, ``gzip``)."""
    suffixes = [x.lower() for x in p.suffixes]
    if suffixes and suffixes[-1] == ".gz":
        return (suffixes[-2] if len(suffixes) > 1 else ""), "gzip"
    return (suffixes[-1] if suffixes else ""), None


def read_variant_frame(path: str | Path) -> pd.DataFrame:
    """Read a per-variant table as text columns: a .csv (comma), .tsv (tab) or .txt (delimiter sniffed among comma,
    tab and semicolon) file, optionally gzip-compressed (.tsv.gz); one clear error for anything else.

    A file whose header holds no delimiter of its extension but another one (a tab-separated file saved as .csv)
    is refused with the delimiter found, rather than read as one column."""
    p = Path(path)
    suffix, compression = _variant_suffix(p)
    if suffix not in VARIANT_SUFFIXES:
        shown = "".join(p.suffixes[-2:]) or "(none)"
        raise InvalidInputError(
            f"Cannot read {str(p)!r}: unknown extension {shown!r}; use .csv, .tsv or .txt (optionally .gz)."
        )
    if not p.is_file():
        raise InvalidInputError(f"Cannot read {str(p)!r}: no such file; check the path.")
    try:
        if compression == "gzip":
            import gzip

            with gzip.open(p, "rt", encoding="utf-8", errors="replace") as handle:
                head = handle.read(4096)
        else:
            head = p.read_text(encoding="utf-8", errors="replace")[:4096]
    except (OSError, EOFError) as exc:
        raise InvalidInputError(f"Cannot read {str(p)!r}: {exc}; check the file.") from exc
    header = head.splitlines()[0] if head.splitlines() else ""
    if suffix == ".txt":
        try:
            sep = csv.Sniffer().sniff(head, ",\t;").delimiter
        except csv.Error as exc:
            raise InvalidInputError(
                f"Cannot tell the delimiter of {str(p)!r}; save it as .csv (commas) or .tsv (tabs)."
            ) from exc
    else:
        sep = "\t" if suffix == ".tsv" else ","
        others = [d for d in _SEPARATORS if d != sep and d in header]
        if sep not in header and others:
            raise InvalidInputError(
                f"Cannot read {str(p)!r}: a {suffix} file is {_SEPARATORS[sep]}-separated, but its header row is "
                f"{_SEPARATORS[others[0]]}-separated; rename it to "
                f"{'.tsv' if others[0] == chr(9) else '.txt'} or save it with {_SEPARATORS[sep]}s."
            )
    import pandas as pd

    packed: Literal["gzip", "infer"] = "gzip" if compression else "infer"
    try:
        return pd.read_csv(p, sep=sep, dtype={"variant": str}, keep_default_na=True, compression=packed)
    except Exception as exc:  # the parser raises many unrelated types
        raise InvalidInputError(
            f"Cannot read {str(p)!r} as a delimited table: {exc}; check the file."
        ) from exc


def read_variant_table(path: str | Path, *, columns: Mapping[str, str] | None = None) -> VariantTable:
    """Read a per-variant CSV or TSV file (delimiter from the extension or sniffed) and check it."""
    return variant_table(read_variant_frame(path), columns=columns, source=Path(path).name)


def _numeric_column(frame: pd.DataFrame, name: str, variants: Sequence[str]) -> Array:
    import pandas as pd

    col = pd.to_numeric(frame[name], errors="coerce")
    bad = col.isna() | ~np.isfinite(col.to_numpy(dtype=np.float64, na_value=np.nan))
    if bad.any():
        rows = [variants[int(i)] for i in np.flatnonzero(bad.to_numpy())]
        raw = frame[name].iloc[int(np.flatnonzero(bad.to_numpy())[0])]
        raise InvalidInputError(
            f"Column {name!r} has missing, infinite or non-numeric values (e.g. '{raw}') for variant(s) "
            f"{_list(rows)}; fill them in or drop those rows."
        )
    return col.to_numpy(dtype=np.float64)


def variant_table(
    frame: pd.DataFrame, *, columns: Mapping[str, str] | None = None, source: str = ""
) -> VariantTable:
    """Check a per-variant DataFrame and harmonise the outcome effects to the exposure effect alleles.

    ``columns`` maps our column names (``variant``, ``exposure_effect``, ...) to the names in ``frame``.
    Allele columns are optional: all four (``exposure_effect_allele``, ``exposure_other_allele``,
    ``outcome_effect_allele``, ``outcome_other_allele``) or none.
    """
    import pandas as pd

    if not isinstance(frame, pd.DataFrame):
        raise InvalidInputError(f"frame must be a pandas DataFrame, got {type(frame).__name__}.")
    rename = {src: ours for ours, src in (columns or {}).items()}
    for ours, src in (columns or {}).items():
        if src not in frame.columns:
            raise InvalidInputError(
                f"Column {src!r} (given for {ours!r}) is not in the table; check the name."
            )
    df = frame.rename(columns=rename)
    df.columns = [str(c).strip().lower() for c in df.columns]
    twice = sorted({c for c in df.columns if list(df.columns).count(c) > 1})
    if twice:
        raise InvalidInputError(
            f"Column name(s) {_list(twice)} occur more than once (ignoring case and spaces); keep one of each."
        )
    missing = [c for c in REQUIRED_COLUMNS if c not in df.columns]
    if missing:
        raise InvalidInputError(
            f"The per-variant table lacks column(s) {_list(missing)}; it has {_list(list(df.columns), 12)}. "
            "Rename the columns or pass columns={our_name: your_name}."
        )
    if len(df) == 0:
        raise InvalidInputError("The per-variant table has no rows; add at least one variant.")
    ids = df["variant"]
    if ids.isna().any():
        rows = [str(i + 1) for i in np.flatnonzero(ids.isna().to_numpy())]
        raise InvalidInputError(
            f"Column 'variant' is empty in data row(s) {_list(rows)}; name every variant."
        )
    variants = [str(v).strip() for v in ids]
    seen: dict[str, int] = {}
    dups: list[str] = []
    for v in variants:
        seen[v] = seen.get(v, 0) + 1
        if seen[v] == 2:
            dups.append(v)
    if dups:
        raise InvalidInputError(
            f"Variant(s) {_list(dups)} appear more than once; keep one row per variant (e.g. the one from the "
            "larger study)."
        )
    bx, sx, by, sy = (_numeric_column(df, c, variants) for c in REQUIRED_COLUMNS[1:])
    for name, se in (("exposure_se", sx), ("outcome_se", sy)):
        bad = se <= 0
        if bad.any():
            rows = [variants[i] for i in np.flatnonzero(bad)]
            raise InvalidInputError(
                f"Column {name!r} holds zero or negative standard errors for variant(s) {_list(rows)}; "
                "standard errors must be positive, correct or drop those rows."
            )
    zero_x = bx == 0
    if zero_x.any():
        rows = [variants[i] for i in np.flatnonzero(zero_x)]
        raise InvalidInputError(
            f"Variant(s) {_list(rows)} have an exposure effect of exactly zero, so no ratio exists; drop them."
        )
    optional: dict[str, Array | None] = {}
    for name in OPTIONAL_NUMERIC:
        optional[name] = _numeric_column(df, name, variants) if name in df.columns else None
    for name in ("exposure_n", "outcome_n"):
        arr = optional[name]
        if arr is not None and np.any(arr <= 3):
            rows = [variants[i] for i in np.flatnonzero(arr <= 3)]
            raise InvalidInputError(
                f"Column {name!r} holds sample sizes of 3 or less for variant(s) {_list(rows)}; give the "
                "number of individuals in the study."
            )
    for name in ("exposure_r2", "outcome_r2"):
        arr = optional[name]
        if arr is not None and np.any((arr < 0) | (arr >= 1)):
            rows = [variants[i] for i in np.flatnonzero((arr < 0) | (arr >= 1))]
            raise InvalidInputError(
                f"Column {name!r} must hold R² values in [0, 1), not for variant(s) {_list(rows)}; correct them."
            )
    by, harm = _harmonise(df, variants, by)
    return VariantTable(
        variants=tuple(variants),
        bx=bx,
        sx=sx,
        by=by,
        sy=sy,
        n_exposure=optional["exposure_n"],
        n_outcome=optional["outcome_n"],
        r2_exposure=optional["exposure_r2"],
        r2_outcome=optional["outcome_r2"],
        harmonisation=harm,
        source=source,
    )


def _harmonise(df: pd.DataFrame, variants: list[str], by: Array) -> tuple[Array, Harmonisation]:
    names = ALLELE_PAIRS[0]
    present = [n for n in names if n in df.columns]
    if not present:
        return by, Harmonisation(len(variants), (), (), (), alleles_given=False)
    if len(present) != len(names):
        lacking = [n for n in names if n not in df.columns]
        raise InvalidInputError(
            f"Allele columns are incomplete: {_list(lacking)} missing; give all four allele columns or none."
        )
    cols = []
    for n in names:
        col = df[n]
        if col.isna().any():
            rows = [variants[i] for i in np.flatnonzero(col.isna().to_numpy())]
            raise InvalidInputError(
                f"Column {n!r} is empty for variant(s) {_list(rows)}; fill in the alleles."
            )
        alleles = [str(a).strip().upper() for a in col]
        odd = [f"{v} ({a})" for v, a in zip(variants, alleles, strict=True) if not _ALLELE.fullmatch(a)]
        if odd:
            raise InvalidInputError(
                f"Column {n!r} holds values that are not alleles for {_list(odd)}; use the letters A, C, G and T "
                "(or D and I for deletions and insertions)."
            )
        cols.append(alleles)
    out = by.copy()
    flipped: list[str] = []
    strand: list[str] = []
    palin: list[str] = []
    bad: list[str] = []
    for j, v in enumerate(variants):
        ea, oa, eb, ob = (c[j] for c in cols)
        if ea == oa:
            bad.append(f"{v} ({ea}/{oa})")
            continue
        comp_ea, comp_oa = ea.translate(_COMPLEMENT), oa.translate(_COMPLEMENT)
        if comp_ea == oa:
            palin.append(v)
        if (eb, ob) == (ea, oa):
            continue
        if (eb, ob) == (oa, ea):
            out[j] = -out[j]
            flipped.append(v)
        elif (eb, ob) == (comp_ea, comp_oa):
            strand.append(v)
        elif (eb, ob) == (comp_oa, comp_ea):
            out[j] = -out[j]
            flipped.append(v)
            strand.append(v)
        else:
            bad.append(f"{v} (exposure {ea}/{oa}, outcome {eb}/{ob})")
    if bad:
        raise InvalidInputError(
            f"Alleles do not match between the exposure and outcome studies for {_list(bad)}; the variants may "
            "differ (check the identifiers and build) — drop those rows."
        )
    return out, Harmonisation(len(variants), tuple(flipped), tuple(strand), tuple(palin), alleles_given=True)


# ----------------------------------------------------------------------------------------------------------
# estimators
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class VariantNotApplicable(Record):
    """A summary-data statistic that does not apply to this table; ``reason`` says why."""

    statistic: str
    reason: str
    applicable: bool = False

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return f"{self.statistic}: not applicable ({self.reason})."


NotApplicable = VariantNotApplicable  # the module's name for it; the record type is VariantNotApplicable


@dataclass(frozen=True)
class WaldRatios(Record):
    """Per-variant ratio estimates by_j / bx_j with first- and second-order standard errors and F statistics."""

    variants: tuple[str, ...]
    ratio: tuple[float, ...]
    se_first_order: tuple[float, ...]
    se_second_order: tuple[float, ...]
    f_statistic: tuple[float, ...]
    mean_f: float
    min_f: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return f"Wald ratios for {len(self.variants)} variants; mean F {self.mean_f:.3g} (smallest {self.min_f:.3g})"


def wald_ratios(table: VariantTable) -> WaldRatios:
    """Ratio estimate of every variant, its standard errors and the variant's F statistic bx² / sx²."""
    ratio = table.by / table.bx
    se1 = table.sy / np.abs(table.bx)
    se2 = np.sqrt(table.sy**2 / table.bx**2 + table.by**2 * table.sx**2 / table.bx**4)
    f = (table.bx / table.sx) ** 2
    return WaldRatios(
        variants=table.variants,
        ratio=tuple(map(float, ratio)),
        se_first_order=tuple(map(float, se1)),
        se_second_order=tuple(map(float, se2)),
        f_statistic=tuple(map(float, f)),
        mean_f=float(f.mean()),
        min_f=float(f.min()),
    )


def _normal_interval(est: float, se: float, alpha: float) -> tuple[float, float, float]:
    q = float(norm_ppf(1 - alpha / 2))
    p = float(2 * norm_sf(abs(est / se))) if se > 0 else math.nan
    return est - q * se, est + q * se, p


@dataclass(frozen=True)
class IvwFit(Record):
    """Inverse-variance weighted estimate with fixed-effect and multiplicative random-effects inference."""

    estimate: float
    se_fixed: float
    ci_fixed: tuple[float, float]
    p_fixed: float
    se_random: float
    ci_random: tuple[float, float]
    p_random: float
    residual_se: float
    n_variants: int
    alpha: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"IVW {self.estimate:.4g}: fixed-effect se {self.se_fixed:.3g} "
            f"[{self.ci_fixed[0]:.4g}, {self.ci_fixed[1]:.4g}]; random-effects se {self.se_random:.3g} "
            f"[{self.ci_random[0]:.4g}, {self.ci_random[1]:.4g}] ({self.n_variants} variants)"
        )


def ivw(table: VariantTable, *, alpha: float = 0.05) -> IvwFit | NotApplicable:
    """IVW estimate (weighted regression of by on bx through the origin, weights 1 / sy²)."""
    if table.n_variants < 2:
        return NotApplicable("IVW", "it combines at least two variants; with one, read its Wald ratio")
    w = 1.0 / table.sy**2
    sxx = float(np.sum(w * table.bx**2))
    est = float(np.sum(w * table.bx * table.by)) / sxx
    se_f = 1.0 / math.sqrt(sxx)
    q = float(np.sum(w * (table.by - est * table.bx) ** 2))
    rse = math.sqrt(q / (table.n_variants - 1))
    se_r = se_f * max(1.0, rse)
    lo_f, hi_f, p_f = _normal_interval(est, se_f, alpha)
    lo_r, hi_r, p_r = _normal_interval(est, se_r, alpha)
    return IvwFit(est, se_f, (lo_f, hi_f), p_f, se_r, (lo_r, hi_r), p_r, rse, table.n_variants, alpha)


@dataclass(frozen=True)
class Heterogeneity(Record):
    """Cochran's Q around the IVW line and Rücker's Q' around the Egger line, with their difference."""

    q: float
    q_df: int
    q_p: float
    q_prime: float | None
    q_prime_df: int | None
    q_prime_p: float | None
    difference: float | None
    difference_p: float | None
    i2: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        text = f"Cochran's Q {self.q:.4g} on {self.q_df} df (p {self.q_p:.3g}), I² {self.i2:.3g}"
        if self.q_prime is not None:
            text += (
                f"; Rücker's Q' {self.q_prime:.4g} on {self.q_prime_df} df (p {self.q_prime_p:.3g}); "
                f"Q - Q' {self.difference:.3g} (p {self.difference_p:.3g})"
            )
        return text


def cochran_q(table: VariantTable) -> Heterogeneity | NotApplicable:
    """Cochran's Q (chi² with J - 1 df) and, with three or more variants, Rücker's Q' (J - 2 df)."""
    j = table.n_variants
    if j < 2:
        return NotApplicable("Cochran's Q", "heterogeneity needs at least two variants")
    w = 1.0 / table.sy**2
    est = float(np.sum(w * table.bx * table.by) / np.sum(w * table.bx**2))
    q = float(np.sum(w * (table.by - est * table.bx) ** 2))
    i2 = max(0.0, (q - (j - 1)) / q) if q > 0 else 0.0
    qp = qp_df = qp_p = diff = diff_p = None
    if j >= 3:
        b0, b1 = _egger_coefficients(table)
        bx, by = _oriented(table)
        qp = float(np.sum(w * (by - b0 - b1 * bx) ** 2))
        qp_df = j - 2
        qp_p = float(chi2_sf(qp, qp_df))
        diff = q - qp
        diff_p = float(chi2_sf(max(diff, 0.0), 1))
    return Heterogeneity(q, j - 1, float(chi2_sf(q, j - 1)), qp, qp_df, qp_p, diff, diff_p, i2)


def _oriented(table: VariantTable) -> tuple[Array, Array]:
    sign = np.where(table.bx < 0, -1.0, 1.0)
    return table.bx * sign, table.by * sign


def _egger_coefficients(table: VariantTable) -> tuple[float, float]:
    bx, by = _oriented(table)
    sw = np.sqrt(1.0 / table.sy**2)
    design = np.column_stack([sw, sw * bx])
    coef, *_ = np.linalg.lstsq(design, sw * by, rcond=None)
    return float(coef[0]), float(coef[1])


@dataclass(frozen=True)
class EggerFit(Record):
    """MR-Egger slope (causal estimate under InSIDE) and intercept (average directional pleiotropy)."""

    estimate: float
    se: float
    ci: tuple[float, float]
    p: float
    intercept: float
    intercept_se: float
    intercept_ci: tuple[float, float]
    intercept_p: float
    residual_se: float
    i2_gx: float
    n_variants: int
    n_reoriented: int
    alpha: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"MR-Egger slope {self.estimate:.4g} (se {self.se:.3g}, [{self.ci[0]:.4g}, {self.ci[1]:.4g}]); "
            f"intercept {self.intercept:.3g} (se {self.intercept_se:.3g}, p {self.intercept_p:.3g}); "
            f"I²_GX {self.i2_gx:.3g}"
        )


def egger(table: VariantTable, *, alpha: float = 0.05) -> EggerFit | NotApplicable:
    """MR-Egger regression on variants oriented to positive exposure effects, with I²_GX."""
    j = table.n_variants
    if j < 3:
        return NotApplicable(
            "MR-Egger", f"it fits a line with an intercept and needs at least three variants, got {j}"
        )
    bx, by = _oriented(table)
    if np.ptp(bx) == 0:
        return NotApplicable("MR-Egger", "all oriented exposure effects are equal, so no slope can be fitted")
    w = 1.0 / table.sy**2
    b0, b1 = _egger_coefficients(table)
    resid = by - b0 - b1 * bx
    rse = math.sqrt(float(np.sum(w * resid**2)) / (j - 2))
    xtwx = np.array([[w.sum(), (w * bx).sum()], [(w * bx).sum(), (w * bx * bx).sum()]])
    cov = np.linalg.inv(xtwx) * max(1.0, rse) ** 2
    se0, se1 = float(math.sqrt(cov[0, 0])), float(math.sqrt(cov[1, 1]))
    tq = float(t_ppf(1 - alpha / 2, j - 2))
    return EggerFit(
        estimate=b1,
        se=se1,
        ci=(b1 - tq * se1, b1 + tq * se1),
        p=float(2 * t_sf(abs(b1 / se1), j - 2)),
        intercept=b0,
        intercept_se=se0,
        intercept_ci=(b0 - tq * se0, b0 + tq * se0),
        intercept_p=float(2 * t_sf(abs(b0 / se0), j - 2)),
        residual_se=rse,
        i2_gx=_i2_gx(bx, table.sx, table.sy),
        n_variants=j,
        n_reoriented=int(np.sum(table.bx < 0)),
        alpha=alpha,
    )


def _i2_gx(bx: Array, sx: Array, sy: Array) -> float:
    g = bx / sy
    s = sx / sy
    w = 1.0 / s**2
    mean = float(np.sum(w * g) / np.sum(w))
    q = float(np.sum(w * (g - mean) ** 2))
    j = len(bx)
    return max(0.0, (q - (j - 1)) / q) if q > 0 else 0.0


def weighted_median_point(ratio: Array, weight: Array) -> float:
    """Weighted median of ``ratio``: linear interpolation of the ordered ratios at cumulative weight 1/2."""
    order = np.argsort(ratio, kind="mergesort")
    b = ratio[order]
    w = weight[order] / weight.sum()
    s = np.cumsum(w) - 0.5 * w
    below = int(np.searchsorted(s, 0.5, side="left")) - 1  # last index with s < 0.5
    if below < 0:
        return float(b[0])
    if below >= len(b) - 1:
        return float(b[-1])
    return float(b[below] + (b[below + 1] - b[below]) * (0.5 - s[below]) / (s[below + 1] - s[below]))


@dataclass(frozen=True)
class WeightedMedian(Record):
    """Weighted median estimate with a parametric-bootstrap standard error (normal interval)."""

    estimate: float
    se: float
    ci: tuple[float, float]
    p: float
    draws: int
    seed: int
    n_variants: int
    alpha: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"Weighted median {self.estimate:.4g} (bootstrap se {self.se:.3g} from {self.draws} draws, "
            f"[{self.ci[0]:.4g}, {self.ci[1]:.4g}])"
        )


def weighted_median(
    table: VariantTable, *, draws: int = 1000, seed: int = 20260101, alpha: float = 0.05
) -> WeightedMedian | NotApplicable:
    """Weighted median of the Wald ratios (weights bx² / sy²) with a parametric bootstrap se."""
    j = table.n_variants
    if j < 3:
        return NotApplicable("Weighted median", f"it needs at least three variants, got {j}")
    if draws < 2:
        raise InvalidInputError(f"draws must be at least 2 for a bootstrap standard error, got {draws}.")
    weight = (table.bx / table.sy) ** 2
    est = weighted_median_point(table.by / table.bx, weight)
    rng = np.random.default_rng(seed)
    boot = np.empty(draws)
    for b in range(draws):
        bx = rng.normal(table.bx, table.sx)
        by = rng.normal(table.by, table.sy)
        boot[b] = weighted_median_point(by / bx, weight)
    se = float(boot.std(ddof=1))
    lo, hi, p = _normal_interval(est, se, alpha)
    return WeightedMedian(est, se, (lo, hi), p, draws, seed, j, alpha)


@dataclass(frozen=True)
class LeaveOneOut(Record):
    """IVW estimate (random-effects interval) with each variant left out in turn."""

    variants: tuple[str, ...]
    estimate: tuple[float, ...]
    se: tuple[float, ...]
    lower: tuple[float, ...]
    upper: tuple[float, ...]
    full_estimate: float
    most_influential: str
    largest_shift: float

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"Leave one variant out: IVW from {min(self.estimate):.4g} to {max(self.estimate):.4g}; leaving out "
            f"{self.most_influential} moves it most ({self.largest_shift:+.3g})"
        )


def leave_one_out(table: VariantTable, *, alpha: float = 0.05) -> LeaveOneOut | NotApplicable:
    """IVW refitted without each variant (needs three or more variants)."""
    j = table.n_variants
    if j < 3:
        return NotApplicable("Leave one variant out", f"it needs at least three variants, got {j}")
    full = ivw(table, alpha=alpha)
    assert isinstance(full, IvwFit)
    est, se, lo, hi = [], [], [], []
    for i in range(j):
        keep = np.ones(j, dtype=bool)
        keep[i] = False
        fit = ivw(table.subset(keep), alpha=alpha)
        assert isinstance(fit, IvwFit)
        est.append(fit.estimate)
        se.append(fit.se_random)
        lo.append(fit.ci_random[0])
        hi.append(fit.ci_random[1])
    shifts = np.asarray(est) - full.estimate
    k = int(np.argmax(np.abs(shifts)))
    return LeaveOneOut(
        table.variants,
        tuple(est),
        tuple(se),
        tuple(lo),
        tuple(hi),
        full.estimate,
        table.variants[k],
        float(shifts[k]),
    )


@dataclass(frozen=True)
class Directionality(Record):
    """Steiger directionality: do the variants explain more of the exposure than of the outcome?"""

    r2_exposure: float
    r2_outcome: float
    z: float
    p: float
    direction: str
    r2_source: str
    per_variant_reversed: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return _as_dict(self)

    def __str__(self) -> str:
        return (
            f"Steiger directionality: variants explain R² {self.r2_exposure:.3g} of the exposure and "
            f"{self.r2_outcome:.3g} of the outcome (z {self.z:.3g}, p {self.p:.3g}): {self.direction}; "
            f"{len(self.per_variant_reversed)} variant(s) explain more of the outcome ({self.r2_source})"
        )


def _r2_from_t(b: Array, s: Array, n: Array) -> Array:
    t2 = (b / s) ** 2
    return cast(Array, t2 / (t2 + n - 2.0))


def directionality(table: VariantTable) -> Directionality | NotApplicable:
    """Steiger test comparing the summed r² of the variants with exposure and outcome (Fisher z, two samples).

    r² comes from the table's R² columns when given, otherwise from t² / (t² + n - 2) (continuous traits; give
    liability-scale R² columns for binary traits).
    """
    if table.n_exposure is None or table.n_outcome is None:
        return NotApplicable(
            "Steiger directionality", "the table has no exposure_n and outcome_n columns (sample sizes)"
        )
    nx, ny = table.n_exposure, table.n_outcome
    given = table.r2_exposure is not None and table.r2_outcome is not None
    rx = table.r2_exposure if table.r2_exposure is not None else _r2_from_t(table.bx, table.sx, nx)
    ry = table.r2_outcome if table.r2_outcome is not None else _r2_from_t(table.by, table.sy, ny)
    sum_x, sum_y = float(rx.sum()), float(ry.sum())
    if sum_x >= 1 or sum_y >= 1:
        return NotApplicable("Steiger directionality", "the summed R² reaches 1; check the R² inputs")
    n_x, n_y = float(np.median(nx)), float(np.median(ny))
    z = (math.atanh(math.sqrt(sum_x)) - math.atanh(math.sqrt(sum_y))) / math.sqrt(
        1 / (n_x - 3) + 1 / (n_y - 3)
    )
    p = float(2 * norm_sf(abs(z)))
    direction = "exposure to outcome" if sum_x > sum_y else "outcome to exposure (reverse)"
    reversed_ = tuple(v for v, a, b in zip(table.variants, rx, ry, strict=True) if b >= a)
    source = "R² columns" if given else "R² from t-values and sample sizes"
    return Directionality(sum_x, sum_y, z, p, direction, source, reversed_)


# ----------------------------------------------------------------------------------------------------------
# everything at once
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class SummaryEvidence(Record):
    """All summary-data estimates and diagnostics for one per-variant table."""

    table: VariantTable
    ratios: WaldRatios
    ivw: IvwFit | NotApplicable
    egger: EggerFit | NotApplicable
    weighted_median: WeightedMedian | NotApplicable
    heterogeneity: Heterogeneity | NotApplicable
    leave_one_out: LeaveOneOut | NotApplicable
    directionality: Directionality | NotApplicable
    alpha: float
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        out = {k: v for k, v in self.__dict__.items()}
        result = cast(dict[str, Any], json_safe(out))
        result["kind"] = "summary_data_evidence"
        return result

    def __str__(self) -> str:
        lines = [
            "Summary-data evidence for genetic-variant instruments",
            f"  {self.table}",
            f"  {self.ratios}",
            f"  {self.ivw}",
            f"  {self.egger}",
            f"  {self.weighted_median}",
            f"  {self.heterogeneity}",
            f"  {self.leave_one_out}",
            f"  {self.directionality}",
            self.caution,
        ]
        return "\n".join(lines)


def summary_evidence(
    table: VariantTable, *, alpha: float = 0.05, draws: int = 1000, seed: int = 20260101
) -> SummaryEvidence:
    """Every estimator and diagnostic of this module on one harmonised table."""
    if not 0.0 < alpha < 1.0:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    return SummaryEvidence(
        table=table,
        ratios=wald_ratios(table),
        ivw=ivw(table, alpha=alpha),
        egger=egger(table, alpha=alpha),
        weighted_median=weighted_median(table, draws=draws, seed=seed, alpha=alpha),
        heterogeneity=cochran_q(table),
        leave_one_out=leave_one_out(table, alpha=alpha),
        directionality=directionality(table),
        alpha=alpha,
    )
