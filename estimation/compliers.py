"""Who the compliers are: type shares, kappa-weighted covariate means and a check of testable implications.

All three need a binary instrument Z and a binary treatment D. Under independence and monotonicity (no
defiers) the population splits into always-takers, never-takers and compliers (Angrist, Imbens and Rubin
1996): the always-taker share is P(D=1 | Z=0), the never-taker share P(D=0 | Z=1), and the complier share
the first-stage difference P(D=1 | Z=1) - P(D=1 | Z=0). Complier means of covariates use Abadie's (2003)
kappa weights. Statistics cannot establish independence or monotonicity; the check below can only reveal
some violations of them.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.light_quantiles import norm_ppf  # read from stored results: no scipy
from ivdossier.estimation.rows import RowAccount
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

__all__ = [
    "ComplierMeans",
    "ComplierReport",
    "ComplierShares",
    "CovariateProfile",
    "ImplicationCheck",
    "IntervalViolation",
    "check_testable_implications",
    "complier_means",
    "complier_report",
    "complier_shares",
]

CAUTION = (
    "Complier shares and profiles are identified only under independence and monotonicity; statistics cannot "
    "establish exclusion or exogeneity, and conclusions for policy or clinical decisions need domain review."
)


def _all_rows(n: int) -> RowAccount:
    """Complier analyses refuse missing values (naming the column), so every row of the data is used."""
    return RowAccount(n_data=n, n_used=n)


def _pct(value: float) -> str:
    return "—" if value != value else f"{100 * value:.1f} %"


FloatArray = np.ndarray[Any, np.dtype[np.float64]]


# ----------------------------------------------------------------------------------------------------
# input handling
# ----------------------------------------------------------------------------------------------------


def _frame(data: pd.DataFrame | Mapping[str, Any]) -> pd.DataFrame:
    import pandas as pd

    if isinstance(data, pd.DataFrame):
        return data
    if isinstance(data, Mapping):
        return pd.DataFrame(dict(data))
    raise InvalidInputError(
        f"data must be a pandas DataFrame or a mapping of column name to values, got {type(data).__name__}; "
        "pass a DataFrame."
    )


def _numeric_columns(frame: pd.DataFrame, names: Sequence[str], role: str) -> dict[str, FloatArray]:
    """Return the named columns as float arrays, naming any missing column or missing value."""
    import pandas as pd

    out: dict[str, FloatArray] = {}
    for name in names:
        if name not in frame.columns:
            raise InvalidInputError(
                f"{role} column {name!r} is not in the data; available columns: "
                f"{', '.join(map(str, frame.columns))}."
            )
        try:
            values = np.asarray(pd.to_numeric(frame[name]), dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InvalidInputError(
                f"{role} column {name!r} is not numeric; recode it as numbers (0/1 for a binary variable)."
            ) from exc
        if not np.all(np.isfinite(values)):
            bad = int(np.sum(~np.isfinite(values)))
            raise InvalidInputError(
                f"{role} column {name!r} has {bad} missing or infinite values; "
                "drop or impute those rows first."
            )
        out[name] = values
    return out


def _binary(values: FloatArray, name: str, role: str) -> FloatArray:
    uniq = np.unique(values)
    if not np.all(np.isin(uniq, (0.0, 1.0))):
        shown = ", ".join(f"{u:g}" for u in uniq[:5])
        raise InvalidInputError(
            f"{role} column {name!r} must be binary coded 0/1 for complier analysis, found values {shown}"
            f"{'...' if uniq.size > 5 else ''}; recode it or use the general 2SLS estimates instead."
        )
    if uniq.size < 2:
        raise InvalidInputError(
            f"{role} column {name!r} takes only the value {uniq[0]:g}; "
            "it needs both 0 and 1 to compare groups."
        )
    return values


def _cluster_codes(frame: pd.DataFrame, cluster: str | None) -> np.ndarray[Any, np.dtype[np.int64]] | None:
    import pandas as pd

    if cluster is None:
        return None
    if cluster not in frame.columns:
        raise InvalidInputError(f"cluster column {cluster!r} is not in the data; name an existing column.")
    if frame[cluster].isna().any():
        raise InvalidInputError(
            f"cluster column {cluster!r} has missing values; drop or fill those rows first."
        )
    codes, _ = pd.factorize(frame[cluster], sort=True)
    return np.asarray(codes, dtype=np.int64)


def _bootstrap_counts(
    rng: np.random.Generator, n: int, clusters: np.ndarray[Any, np.dtype[np.int64]] | None
) -> FloatArray:
    """One nonparametric bootstrap draw as row multiplicities; with clusters, whole clusters are resampled."""
    if clusters is None:
        return np.bincount(rng.integers(0, n, size=n), minlength=n).astype(np.float64)
    n_groups = int(clusters.max()) + 1
    mult = np.bincount(rng.integers(0, n_groups, size=n_groups), minlength=n_groups)
    return np.asarray(mult[clusters], dtype=np.float64)


# ----------------------------------------------------------------------------------------------------
# type shares
# ----------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ComplierShares(Record):
    """Shares of compliers, always-takers and never-takers with standard errors and (1 - alpha) intervals.

    ``se_method`` is "delta" (two independent binomial samples, Z=1 and Z=0; no clustering) or
    "cluster bootstrap" (whole clusters resampled, ``n_boot`` draws from ``seed``).
    """

    complier: float
    complier_se: float
    always_taker: float
    always_taker_se: float
    never_taker: float
    never_taker_se: float
    p_treated_given_z1: float
    p_treated_given_z0: float
    n_z1: int
    n_z0: int
    alpha: float
    se_method: str
    n_boot: int | None
    seed: int | None
    monotonicity_note: str
    row_account: RowAccount | None = None

    def interval(self, name: str) -> tuple[float, float]:
        """Normal (1 - alpha) interval for one share: "complier", "always_taker" or "never_taker"."""
        if name not in ("complier", "always_taker", "never_taker"):
            raise InvalidInputError(
                f"unknown share {name!r}; choose one of 'complier', 'always_taker', 'never_taker'."
            )
        est = float(getattr(self, name))
        se = float(getattr(self, f"{name}_se"))
        q = norm_ppf(1.0 - self.alpha / 2.0)
        return (est - q * se, est + q * se)

    def to_dict(self) -> dict[str, Any]:
        shares = {
            name: {
                "estimate": float(getattr(self, name)),
                "se": float(getattr(self, f"{name}_se")),
                "ci": list(self.interval(name)),
            }
            for name in ("complier", "always_taker", "never_taker")
        }
        return json_safe(
            {
                "shares": shares,
                "p_treated_given_z1": self.p_treated_given_z1,
                "p_treated_given_z0": self.p_treated_given_z0,
                "n_z1": self.n_z1,
                "n_z0": self.n_z0,
                "alpha": self.alpha,
                "se_method": self.se_method,
                "n_boot": self.n_boot,
                "seed": self.seed,
                "monotonicity_note": self.monotonicity_note,
                "row_account": self.row_account,
            }
        )

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g} %"
        lines = [
            f"Compliance types (binary instrument and treatment); SEs: {self.se_method}"
            + (f" ({self.n_boot} draws, seed {self.seed})" if self.n_boot else ""),
            str(self.row_account)
            if self.row_account is not None
            else f"rows: used {self.n_z1 + self.n_z0:,}",
            f"treated share with the instrument on: {_pct(self.p_treated_given_z1)} of {self.n_z1:,}; "
            f"off: {_pct(self.p_treated_given_z0)} of {self.n_z0:,}",
        ]
        for name, label in (
            ("complier", "compliers"),
            ("always_taker", "always-takers"),
            ("never_taker", "never-takers"),
        ):
            lo, hi = self.interval(name)
            lines.append(
                f"  {label}: {_pct(getattr(self, name))} (SE {100 * getattr(self, f'{name}_se'):.1f} points; "
                f"{level} interval {_pct(lo)} to {_pct(hi)})"
            )
        lines.append(self.monotonicity_note)
        return "\n".join(lines)


def _shares(d: FloatArray, z: FloatArray) -> tuple[float, float, float, float, int, int]:
    n1 = int(np.sum(z == 1.0))
    n0 = int(np.sum(z == 0.0))
    p1 = float(np.mean(d[z == 1.0]))
    p0 = float(np.mean(d[z == 0.0]))
    return p1 - p0, p0, 1.0 - p1, p1, n1, n0


def complier_shares(
    data: pd.DataFrame | Mapping[str, Any],
    *,
    treatment: str,
    instrument: str,
    cluster: str | None = None,
    alpha: float = 0.05,
    n_boot: int = 999,
    seed: int = 0,
) -> ComplierShares:
    """Estimate complier, always-taker and never-taker shares from a binary instrument and binary treatment.

    Without ``cluster`` the SEs are delta-method (exact here: each share is a linear function of the two group
    treatment rates, estimated from independent samples). With ``cluster`` they come from a seeded cluster
    bootstrap. A negative complier share means the instrument lowers treatment; recode Z as 1 - Z.
    """
    _check_alpha(alpha)
    frame = _frame(data)
    cols = _numeric_columns(frame, [treatment, instrument], "treatment/instrument")
    d = _binary(cols[treatment], treatment, "treatment")
    z = _binary(cols[instrument], instrument, "instrument")
    clusters = _cluster_codes(frame, cluster)
    comp, always, never, p1, n1, n0 = _shares(d, z)
    note = (
        "Shares are identified only under independence and monotonicity (no defiers); "
        "statistics cannot establish either."
    )
    if comp < 0:
        note += " The complier share is negative: the instrument lowers treatment, so recode it as 1 - Z."
    if clusters is None:
        var_p1 = p1 * (1.0 - p1) / n1
        var_p0 = always * (1.0 - always) / n0
        return ComplierShares(
            complier=comp,
            complier_se=float(np.sqrt(var_p1 + var_p0)),
            always_taker=always,
            always_taker_se=float(np.sqrt(var_p0)),
            never_taker=never,
            never_taker_se=float(np.sqrt(var_p1)),
            p_treated_given_z1=p1,
            p_treated_given_z0=always,
            n_z1=n1,
            n_z0=n0,
            alpha=alpha,
            se_method="delta",
            n_boot=None,
            seed=None,
            monotonicity_note=note,
            row_account=_all_rows(len(frame)),
        )
    _check_n_boot(n_boot)
    rng = np.random.default_rng(seed)
    parts = np.column_stack([z, z * d, 1.0 - z, (1.0 - z) * d])
    draws = np.empty((n_boot, 3))
    for b in range(n_boot):
        s1, s1d, s0, s0d = _bootstrap_counts(rng, d.size, clusters) @ parts
        if s1 == 0 or s0 == 0:
            draws[b] = np.nan
            continue
        p1b, p0b = s1d / s1, s0d / s0
        draws[b] = (p1b - p0b, p0b, 1.0 - p1b)
    sd = np.nanstd(draws, axis=0, ddof=1)
    return ComplierShares(
        complier=comp,
        complier_se=float(sd[0]),
        always_taker=always,
        always_taker_se=float(sd[1]),
        never_taker=never,
        never_taker_se=float(sd[2]),
        p_treated_given_z1=p1,
        p_treated_given_z0=always,
        n_z1=n1,
        n_z0=n0,
        alpha=alpha,
        se_method="cluster bootstrap",
        n_boot=n_boot,
        seed=seed,
        monotonicity_note=note,
        row_account=_all_rows(len(frame)),
    )


def _check_alpha(alpha: float) -> None:
    if not 0.0 < alpha < 1.0:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha}; use e.g. 0.05.")


def _check_n_boot(n_boot: int) -> None:
    if n_boot < 50:
        raise InvalidInputError(f"n_boot must be at least 50 for bootstrap standard errors, got {n_boot}.")


# ----------------------------------------------------------------------------------------------------
# kappa-weighted complier means
# ----------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class CovariateProfile(Record):
    """Means of one covariate in the whole sample and by compliance type, with bootstrap SEs."""

    covariate: str
    overall_mean: float
    complier_mean: float
    complier_mean_se: float
    always_taker_mean: float
    never_taker_mean: float
    complier_to_overall_ratio: float

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "covariate": self.covariate,
                "overall_mean": self.overall_mean,
                "complier_mean": self.complier_mean,
                "complier_mean_se": self.complier_mean_se,
                "always_taker_mean": self.always_taker_mean,
                "never_taker_mean": self.never_taker_mean,
                "complier_to_overall_ratio": json_safe(self.complier_to_overall_ratio),
            }
        )


@dataclass(frozen=True)
class ComplierMeans(Record):
    """Kappa-weighted complier means of covariates (Abadie 2003).

    kappa = 1 - D(1-Z)/(1-pi(X)) - (1-D)Z/pi(X), with pi(X) = P(Z=1 | X): the sample share of Z=1 when
    ``propensity_covariates`` is empty (Z taken as randomly assigned), else a logit fit of Z on those
    covariates. Complier mean of W = sum(kappa W) / sum(kappa). Always-taker means are means among D=1, Z=0
    and never-taker means among D=0, Z=1 (valid under independence and monotonicity, without covariates in
    pi). SEs: seeded nonparametric bootstrap (clusters resampled whole when given), re-estimating pi in
    every draw.
    """

    profiles: tuple[CovariateProfile, ...]
    complier_share_kappa: float
    propensity: str
    n: int
    se_method: str
    n_boot: int
    seed: int
    row_account: RowAccount | None = None

    def __str__(self) -> str:
        head = ["covariate", "all", "compliers (SE)", "always-takers", "never-takers", "compliers / all"]
        body = [
            [
                p.covariate,
                f"{p.overall_mean:.4g}",
                f"{p.complier_mean:.4g} ({p.complier_mean_se:.3g})",
                f"{p.always_taker_mean:.4g}",
                f"{p.never_taker_mean:.4g}",
                f"{p.complier_to_overall_ratio:.3g}",
            ]
            for p in self.profiles
        ]
        widths = [max(len(r[j]) for r in [head, *body]) for j in range(len(head))]
        table = [
            "  " + "  ".join(v.ljust(w) for v, w in zip(r, widths, strict=True)).rstrip()
            for r in [head, *body]
        ]
        return "\n".join(
            [
                f"Complier profile: kappa-weighted means (propensity: {self.propensity}; SEs: {self.se_method}, "
                f"seed {self.seed})",
                str(self.row_account) if self.row_account is not None else f"rows: used {self.n:,}",
                f"complier share implied by the kappa weights: {_pct(self.complier_share_kappa)}",
                *table,
            ]
        )

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "row_account": self.row_account,
                "profiles": [p.to_dict() for p in self.profiles],
                "complier_share_kappa": self.complier_share_kappa,
                "propensity": self.propensity,
                "n": self.n,
                "se_method": self.se_method,
                "n_boot": self.n_boot,
                "seed": self.seed,
            }
        )


def _instrument_propensity(z: FloatArray, x: FloatArray | None, counts: FloatArray) -> FloatArray:
    """P(Z=1 | X): the (weighted) sample share without covariates, a logit fit with them."""
    if x is None:
        return np.full(z.shape, float(counts @ z / counts.sum()))
    import statsmodels.api as sm  # local import: statsmodels is slow to import

    design = np.column_stack([np.ones(z.size), x])
    try:
        model = sm.GLM(z, design, family=sm.families.Binomial(), freq_weights=counts)
        fit = model.fit(maxiter=100)
    except Exception as exc:  # perfect separation or a singular design
        raise EstimationError(
            f"the logit of the instrument on the propensity covariates failed ({exc}); drop covariates that "
            "predict the instrument perfectly or are collinear."
        ) from exc
    return np.asarray(fit.predict(design), dtype=np.float64)


def _kappa(d: FloatArray, z: FloatArray, pz: FloatArray) -> FloatArray:
    return np.asarray(1.0 - d * (1.0 - z) / (1.0 - pz) - (1.0 - d) * z / pz, dtype=np.float64)


def _kappa_means(
    d: FloatArray, z: FloatArray, w: FloatArray, x: FloatArray | None, counts: FloatArray
) -> tuple[FloatArray, float]:
    """Kappa-weighted means of the columns of ``w`` with row multiplicities ``counts``, and mean kappa."""
    pz = _instrument_propensity(z, x, counts)
    live = counts > 0
    if np.any(pz[live] <= 1e-6) or np.any(pz[live] >= 1 - 1e-6):
        raise EstimationError(
            "the estimated instrument propensity reaches 0 or 1 for some rows, so kappa weights explode; "
            "drop propensity covariates that separate Z=0 from Z=1."
        )
    kappa = _kappa(d, z, pz) * counts
    total = float(np.sum(kappa))
    if total <= 0:
        raise EstimationError(
            "the kappa weights sum to a non-positive number, so there are no compliers to describe; "
            "check that the instrument raises the treatment (recode Z as 1 - Z if it lowers it)."
        )
    return (kappa @ w) / total, total / float(counts.sum())


def complier_means(
    data: pd.DataFrame | Mapping[str, Any],
    *,
    treatment: str,
    instrument: str,
    covariates: Sequence[str],
    propensity_covariates: Sequence[str] = (),
    cluster: str | None = None,
    n_boot: int = 499,
    seed: int = 0,
) -> ComplierMeans:
    """Describe compliers: kappa-weighted means of ``covariates`` beside sample, always- and never-taker
    means."""
    if not covariates:
        raise InvalidInputError("covariates is empty; name at least one predetermined covariate to profile.")
    _check_n_boot(n_boot)
    frame = _frame(data)
    cols = _numeric_columns(frame, [treatment, instrument], "treatment/instrument")
    d = _binary(cols[treatment], treatment, "treatment")
    z = _binary(cols[instrument], instrument, "instrument")
    wcols = _numeric_columns(frame, list(covariates), "covariate")
    w = np.column_stack([wcols[c] for c in covariates])
    x: FloatArray | None = None
    if propensity_covariates:
        xcols = _numeric_columns(frame, list(propensity_covariates), "propensity covariate")
        x = np.column_stack([xcols[c] for c in propensity_covariates])
    clusters = _cluster_codes(frame, cluster)

    means, share = _kappa_means(d, z, w, x, np.ones(d.size))
    at_mask = (d == 1.0) & (z == 0.0)
    nt_mask = (d == 0.0) & (z == 1.0)
    at_means = w[at_mask].mean(axis=0) if at_mask.any() else np.full(w.shape[1], np.nan)
    nt_means = w[nt_mask].mean(axis=0) if nt_mask.any() else np.full(w.shape[1], np.nan)
    overall = w.mean(axis=0)

    rng = np.random.default_rng(seed)
    draws = np.full((n_boot, w.shape[1]), np.nan)
    for b in range(n_boot):
        counts = _bootstrap_counts(rng, d.size, clusters)
        n1 = counts @ z
        if n1 == 0 or n1 == counts.sum():
            continue
        try:
            draws[b] = _kappa_means(d, z, w, x, counts)[0]
        except EstimationError:
            continue
    ok = np.all(np.isfinite(draws), axis=1)
    if ok.sum() < max(20, n_boot // 2):
        raise EstimationError(
            "too few bootstrap draws gave usable kappa weights for standard errors; "
            "the design may have very few compliers or a propensity model that separates Z."
        )
    se = draws[ok].std(axis=0, ddof=1)
    profiles = tuple(
        CovariateProfile(
            covariate=name,
            overall_mean=float(overall[j]),
            complier_mean=float(means[j]),
            complier_mean_se=float(se[j]),
            always_taker_mean=float(at_means[j]),
            never_taker_mean=float(nt_means[j]),
            complier_to_overall_ratio=float(means[j] / overall[j]) if overall[j] != 0 else float("nan"),
        )
        for j, name in enumerate(covariates)
    )
    method = "bootstrap" if clusters is None else "cluster bootstrap"
    propensity = (
        "sample share of Z=1" if x is None else f"logit on {', '.join(map(str, propensity_covariates))}"
    )
    return ComplierMeans(
        profiles=profiles,
        complier_share_kappa=share,
        propensity=propensity,
        n=int(d.size),
        se_method=f"{method} ({int(ok.sum())} usable of {n_boot} draws)",
        n_boot=n_boot,
        seed=seed,
        row_account=_all_rows(len(frame)),
    )


# ----------------------------------------------------------------------------------------------------
# testable implications of independence and monotonicity
# ----------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class IntervalViolation(Record):
    """Implied complier density of the outcome over an interval of bins, for treated or untreated
    compliers."""

    arm: str  # "treated": P(Y in B, D=1 | Z=1) - P(Y in B, D=1 | Z=0); "untreated": the D=0 mirror
    lower: float
    upper: float
    density: float
    se: float

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "arm": self.arm,
                "lower": json_safe(self.lower),
                "upper": json_safe(self.upper),
                "density": self.density,
                "se": self.se,
            }
        )


@dataclass(frozen=True)
class ImplicationCheck(Record):
    """Check of the testable implications of independence and monotonicity on a discretised outcome.

    Under both assumptions, for every set B: P(Y in B, D=1 | Z=1) - P(Y in B, D=1 | Z=0) >= 0 and
    P(Y in B, D=0 | Z=0) - P(Y in B, D=0 | Z=1) >= 0 (these differences are complier probability masses).
    Sets B are all intervals made of contiguous bins. The statistic is the largest standardised violation
    max_B (-density_B / max(se_B, floor)); its p-value comes from a seeded bootstrap (resampling within Z
    groups) of the recentred statistic, i.e. at the least favourable null where every inequality binds, so it
    is conservative. This is a simplified version in the spirit of Kitagawa (2015), not his full test: the
    outcome is discretised on fixed bins, there is no sweep over his trimming constant, and the weights are
    the plain standard errors of each difference.
    """

    bin_edges: tuple[float, ...]
    most_negative: IntervalViolation
    statistic: float
    p_value: float
    n_intervals: int
    n_boot: int
    seed: int
    procedure: str
    row_account: RowAccount | None = None

    def __str__(self) -> str:
        w = self.most_negative
        where = f"outcome in [{w.lower:.4g}, {w.upper:.4g})"
        return "\n".join(
            [
                "Implied complier densities of the outcome (negative mass would contradict independence or "
                "monotonicity)",
                str(self.row_account) if self.row_account is not None else "rows: all",
                f"most negative: {w.density:.4g} (SE {w.se:.3g}) for {w.arm} compliers, {where}; "
                f"{self.n_intervals} intervals checked",
                f"largest standardised violation {self.statistic:.3g}, p = {self.p_value:.3g} "
                f"({self.n_boot} bootstrap draws, seed {self.seed}; conservative)",
                self.procedure,
            ]
        )

    @property
    def violated(self) -> bool:
        """True when the most negative implied density is below zero at all (point estimate)."""
        return self.most_negative.density < 0

    def to_dict(self) -> dict[str, Any]:
        return json_safe(
            {
                "bin_edges": [json_safe(e) for e in self.bin_edges],
                "most_negative": self.most_negative.to_dict(),
                "statistic": self.statistic,
                "p_value": self.p_value,
                "n_intervals": self.n_intervals,
                "n_boot": self.n_boot,
                "seed": self.seed,
                "procedure": self.procedure,
                "row_account": self.row_account,
            }
        )


def _bin_edges(y: FloatArray, bins: int | Sequence[float]) -> FloatArray:
    if isinstance(bins, int):
        if bins < 2:
            raise InvalidInputError(f"bins must be at least 2, got {bins}; use e.g. 5 quantile bins.")
        uniq = np.unique(y)
        if uniq.size <= bins:
            # a discrete outcome: one bin per value (edges halfway between values)
            mids = (uniq[1:] + uniq[:-1]) / 2.0
            return np.concatenate([[-np.inf], mids, [np.inf]])
        inner = np.unique(np.quantile(y, np.linspace(0, 1, bins + 1)[1:-1]))
        return np.concatenate([[-np.inf], inner, [np.inf]])
    edges = np.asarray(list(bins), dtype=np.float64)
    if edges.size < 1 or np.any(np.diff(edges) <= 0):
        raise InvalidInputError("bins given as edges must be a strictly increasing list of cut points.")
    return np.concatenate([[-np.inf], edges[np.isfinite(edges)], [np.inf]])


_CELLS = ((1.0, 1.0), (1.0, 0.0), (0.0, 0.0), (0.0, 1.0))  # (d, z): treated arm pair, then untreated pair


def _cell_codes(y_bin: np.ndarray[Any, np.dtype[np.int64]], d: FloatArray, z: FloatArray, n_bins: int) -> Any:
    """Code cell * n_bins + bin for each row, cells ordered as in ``_CELLS``; one bincount then gives all."""
    cell = np.select([(d == dv) & (z == zv) for dv, zv in _CELLS], [0, 1, 2, 3])
    return cell * n_bins + y_bin


def _interval_stats(
    codes: np.ndarray[Any, np.dtype[np.int64]], z: FloatArray, n_bins: int, counts: FloatArray | None
) -> tuple[FloatArray, FloatArray]:
    """Densities and SEs for every interval of contiguous bins, treated arm first then untreated.

    Rows are weighted by ``counts`` (bootstrap multiplicities; None for the sample itself).
    """
    mass = np.bincount(codes, weights=counts, minlength=4 * n_bins).reshape(4, n_bins)
    n1 = max(float(z.sum() if counts is None else counts @ z), 1.0)
    n0 = max(float(z.size - z.sum() if counts is None else counts.sum() - counts @ z), 1.0)
    p11, p10, p00, p01 = mass[0] / n1, mass[1] / n0, mass[2] / n0, mass[3] / n1
    lo, hi = np.triu_indices(n_bins)
    dens, ses = [], []
    for a, b, na, nb in ((p11, p10, n1, n0), (p00, p01, n0, n1)):
        ca = np.concatenate([[0.0], np.cumsum(a)])
        cb = np.concatenate([[0.0], np.cumsum(b)])
        pa = ca[hi + 1] - ca[lo]
        pb = cb[hi + 1] - cb[lo]
        dens.append(pa - pb)
        ses.append(np.sqrt(pa * (1 - pa) / na + pb * (1 - pb) / nb))
    return np.concatenate(dens), np.concatenate(ses)


def check_testable_implications(
    data: pd.DataFrame | Mapping[str, Any],
    *,
    outcome: str,
    treatment: str,
    instrument: str,
    bins: int | Sequence[float] = 5,
    n_boot: int = 999,
    seed: int = 0,
) -> ImplicationCheck:
    """Look for negative implied complier densities of the outcome (independence and monotonicity violations).

    ``bins`` is a number of quantile bins (a discrete outcome with that many values or fewer gets one bin per
    value) or a list of interior cut points. See :class:`ImplicationCheck` for the statistic and p-value.
    """
    _check_n_boot(n_boot)
    frame = _frame(data)
    cols = _numeric_columns(frame, [outcome, treatment, instrument], "outcome/treatment/instrument")
    d = _binary(cols[treatment], treatment, "treatment")
    z = _binary(cols[instrument], instrument, "instrument")
    y = cols[outcome]
    edges = _bin_edges(y, bins)
    n_bins = edges.size - 1
    y_bin = np.asarray(np.searchsorted(edges[1:-1], y, side="right"), dtype=np.int64)
    codes = _cell_codes(y_bin, d, z, n_bins)
    dens, ses = _interval_stats(codes, z, n_bins, None)
    floor = 1.0 / np.sqrt(d.size)  # keeps near-empty intervals from dominating the maximum
    weights = 1.0 / np.maximum(ses, floor)
    stat = float(np.max(-dens * weights))

    rng = np.random.default_rng(seed)
    idx1 = np.flatnonzero(z == 1.0)
    idx0 = np.flatnonzero(z == 0.0)
    boot = np.empty(n_boot)
    for b in range(n_boot):
        idx = np.concatenate([rng.choice(idx1, idx1.size), rng.choice(idx0, idx0.size)])
        counts = np.bincount(idx, minlength=d.size).astype(np.float64)
        dens_b, _ = _interval_stats(codes, z, n_bins, counts)
        boot[b] = np.max(-(dens_b - dens) * weights)
    p_value = float((1 + np.sum(boot >= stat)) / (n_boot + 1))

    lo, hi = np.triu_indices(n_bins)
    n_int = lo.size
    j = int(np.argmin(dens))
    arm = "treated" if j < n_int else "untreated"
    k = j % n_int
    worst = IntervalViolation(
        arm=arm,
        lower=float(edges[lo[k]]),
        upper=float(edges[hi[k] + 1]),
        density=float(dens[j]),
        se=float(ses[j]),
    )
    return ImplicationCheck(
        bin_edges=tuple(float(e) for e in edges),
        most_negative=worst,
        statistic=stat,
        p_value=p_value,
        n_intervals=2 * n_int,
        n_boot=n_boot,
        seed=seed,
        procedure=(
            "simplified Kitagawa (2015)-style check: fixed bins, all intervals of contiguous bins, "
            "statistic = largest standardised negative implied complier density, p-value from a "
            "bootstrap within Z groups recentred at the least favourable null (conservative)"
        ),
        row_account=_all_rows(len(frame)),
    )


# ----------------------------------------------------------------------------------------------------
# everything at once, for one command
# ----------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ComplierReport(Record):
    """Shares, and where asked, the complier profile and the implied-density check, as one result."""

    shares: ComplierShares
    means: ComplierMeans | None = None
    implications: ImplicationCheck | None = None
    caution: str = CAUTION

    def to_dict(self) -> dict[str, Any]:
        out = dict(self.shares.to_dict())
        out["means"] = None if self.means is None else self.means.to_dict()
        out["implications"] = None if self.implications is None else self.implications.to_dict()
        out["caution"] = self.caution
        return out

    def __str__(self) -> str:
        parts = [str(self.shares)]
        parts.append(
            str(self.means) if self.means is not None else "Complier profile: not asked (no covariates)"
        )
        parts.append(
            str(self.implications)
            if self.implications is not None
            else "Implied complier densities: not asked (no outcome)"
        )
        parts.append(self.caution)
        return "\n\n".join(parts)


def complier_report(
    data: pd.DataFrame | Mapping[str, Any],
    *,
    treatment: str,
    instrument: str,
    covariates: Sequence[str] = (),
    outcome: str | None = None,
    bins: int | Sequence[float] = 5,
    cluster: str | None = None,
    alpha: float = 0.05,
    seed: int = 0,
) -> ComplierReport:
    """Shares always; the kappa-weighted profile when ``covariates`` are named; the density check with ``outcome``."""
    shares = complier_shares(
        data, treatment=treatment, instrument=instrument, cluster=cluster, alpha=alpha, seed=seed
    )
    means = (
        complier_means(
            data,
            treatment=treatment,
            instrument=instrument,
            covariates=covariates,
            cluster=cluster,
            seed=seed,
        )
        if covariates
        else None
    )
    check = (
        check_testable_implications(
            data, outcome=outcome, treatment=treatment, instrument=instrument, bins=bins, seed=seed
        )
        if outcome
        else None
    )
    return ComplierReport(shares=shares, means=means, implications=check)
