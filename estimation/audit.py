"""Re-examining published IV results from the statistics a study reported (no data needed).

For each study: the tF-adjusted interval and whether 5 % significance survives it (Lee, McCrary, Moreira and
Porter 2022, tF critical values from :mod:`ivdossier.estimation.critical_values`); an Anderson–Rubin set from
the reported first-stage and reduced-form coefficients when both are reported (95 % and 99 %, so the 1 % level
is judged by a test that stays valid however weak the instrument); the first-stage F against the Stock–Yogo
and Montiel Olea–Pflueger critical values; and a flag for every statistic that cannot be re-examined.

The Anderson–Rubin set with one instrument solves (pi_y - b pi_x)^2 <= c (V_yy - 2 b V_yx + b^2 V_xx). A
study rarely reports V_yx, the covariance of the reduced-form and first-stage coefficients. In order of
preference the audit uses: the covariance the study reported; the covariance implied by the reported 2SLS
standard error through the delta method, se^2 pi_x^2 = V_yy - 2 b V_yx + b^2 V_xx (exact for the just-identified
2SLS sandwich standard error under the same covariance estimator); or, failing both, zero covariance (the
independence approximation, which can make the set too wide or too narrow and is flagged). The 1 % tF
critical values are not carried by the project, so the 1 % verdict rests on the Anderson–Rubin 99 % set.
"""

from __future__ import annotations

import math
import statistics
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.critical_values import (
    MOP_SOURCE,
    MOP_TAUS,
    STOCK_YOGO_SOURCE,
    TF_NORMAL_FROM,
    TF_SOURCE,
    TF_UNBOUNDED_BELOW,
    mop_critical_value,
    stock_yogo_applicable,
    tf_critical_value,
)
from ivdossier.estimation.light_quantiles import chi2_1_ppf, f_1_ppf, ncx2_1_ppf, norm_ppf
from ivdossier.estimation.sets import Interval, classify_set, quadratic_set
from ivdossier.estimation.variant_summary import (
    EggerFit,
    Heterogeneity,
    IvwFit,
    SummaryEvidence,
    WeightedMedian,
    summary_evidence,
    variant_table,
)

F_KINDS: tuple[str, ...] = (
    "homoskedastic",
    "heteroskedastic",
    "clustered",
    "effective",
    "kleibergen-paap",
    "cragg-donald",
    "unknown",
)
"""Which first-stage F a study reported: homoskedastic, heteroskedastic (robust), clustered, effective (MOP), KP rk,
CD, unknown. The older words unadjusted, robust and cluster are read as the first three (stored values, one release
on input)."""
OLD_F_KINDS = {"unadjusted": "homoskedastic", "robust": "heteroskedastic", "cluster": "clustered"}

NUMBER_FIELDS: tuple[str, ...] = (
    "estimate",
    "std_error",
    "first_stage_f",
    "first_stage_coef",
    "first_stage_se",
    "reduced_form_coef",
    "reduced_form_se",
    "fs_rf_cov",
)
INT_FIELDS: tuple[str, ...] = ("n", "n_clusters", "n_instruments")
TEXT_FIELDS: tuple[str, ...] = ("f_kind", "method", "label")
REPORTED_FIELDS: tuple[str, ...] = NUMBER_FIELDS + INT_FIELDS + TEXT_FIELDS
"""Every key a study's ``reported`` mapping may hold."""

METHODS: tuple[str, ...] = ("2sls", "liml", "fuller", "gmm")
Z_05 = 1.959963984540054
COV_SOURCES = {
    "reported": "the covariance of the first-stage and reduced-form coefficients reported by the study",
    "implied": "the covariance implied by the reported 2SLS standard error (delta method: "
    "se^2 pi_x^2 = V_yy - 2 b V_yx + b^2 V_xx)",
    "independence": "zero covariance (independence approximation): the study reported neither the covariance "
    "nor a standard error consistent with one, so the set may be too wide or too narrow",
}


def _number(value: Any, name: str, where: str) -> float | None:
    if value is None or (isinstance(value, str) and not value.strip()):
        return None
    if isinstance(value, bool):
        raise InvalidInputError(f"{where}: {name} must be a number, got {value!r}.")
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise InvalidInputError(
            f"{where}: {name} must be a number, got {value!r}; write e.g. 0.35."
        ) from None
    if not math.isfinite(out):
        raise InvalidInputError(
            f"{where}: {name} must be finite, got {value!r}; leave it empty if not reported."
        )
    return out


def _integer(value: Any, name: str, where: str) -> int | None:
    num = _number(value, name, where)
    if num is None:
        return None
    if num != int(num) or num < 1:
        raise InvalidInputError(f"{where}: {name} must be a positive whole number, got {value!r}.")
    return int(num)


@dataclass(frozen=True)
class ReportedStats:
    """What one study reported for its headline IV specification (any field may be missing)."""

    estimate: float | None = None
    std_error: float | None = None
    first_stage_f: float | None = None
    f_kind: str = "unknown"
    n: int | None = None
    n_clusters: int | None = None
    n_instruments: int = 1
    first_stage_coef: float | None = None
    first_stage_se: float | None = None
    reduced_form_coef: float | None = None
    reduced_form_se: float | None = None
    fs_rf_cov: float | None = None
    method: str = "2sls"
    label: str = ""

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any], *, where: str = "reported statistics") -> ReportedStats:
        """Validate a plain mapping (from the registry, a CSV row or the command line)."""
        unknown = sorted(set(data) - set(REPORTED_FIELDS))
        if unknown:
            raise InvalidInputError(
                f"{where}: unknown field(s) {', '.join(unknown)}; use {', '.join(REPORTED_FIELDS)}."
            )
        nums = {k: _number(data.get(k), k, where) for k in NUMBER_FIELDS}
        ints = {k: _integer(data.get(k), k, where) for k in INT_FIELDS}
        f_kind = str(data.get("f_kind") or "unknown").strip().lower()
        f_kind = OLD_F_KINDS.get(f_kind, f_kind)
        if f_kind not in F_KINDS:
            raise InvalidInputError(
                f"{where}: f_kind {f_kind!r} is not known; use one of {', '.join(F_KINDS)}."
            )
        method = str(data.get("method") or "2sls").strip().lower()
        if method not in METHODS:
            raise InvalidInputError(
                f"{where}: method {method!r} is not known; use one of {', '.join(METHODS)}."
            )
        for name in ("std_error", "first_stage_se", "reduced_form_se"):
            if nums[name] is not None and nums[name] <= 0:  # type: ignore[operator]
                raise InvalidInputError(f"{where}: {name} must be positive, got {nums[name]}.")
        if nums["first_stage_f"] is not None and nums["first_stage_f"] < 0:  # type: ignore[operator]
            raise InvalidInputError(
                f"{where}: first_stage_f cannot be negative, got {nums['first_stage_f']}."
            )
        if ints["n_clusters"] is not None and ints["n_clusters"] < 2:  # type: ignore[operator]
            raise InvalidInputError(f"{where}: n_clusters must be at least 2, got {ints['n_clusters']}.")
        return cls(
            estimate=nums["estimate"],
            std_error=nums["std_error"],
            first_stage_f=nums["first_stage_f"],
            f_kind=f_kind,
            n=ints["n"],
            n_clusters=ints["n_clusters"],
            n_instruments=ints["n_instruments"] or 1,
            first_stage_coef=nums["first_stage_coef"],
            first_stage_se=nums["first_stage_se"],
            reduced_form_coef=nums["reduced_form_coef"],
            reduced_form_se=nums["reduced_form_se"],
            fs_rf_cov=nums["fs_rf_cov"],
            method=method,
            label=str(data.get("label") or ""),
        )

    def to_dict(self) -> dict[str, Any]:
        """The reported values without the empty ones (what the registry stores)."""
        out: dict[str, Any] = {}
        for name in REPORTED_FIELDS:
            value = getattr(self, name)
            if value is None or value == "":
                continue
            if (name, value) in (("f_kind", "unknown"), ("method", "2sls"), ("n_instruments", 1)):
                continue
            out[name] = value
        return out


def _json(value: float | None) -> float | str | None:
    if value is None or math.isnan(value):
        return None
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return float(value)


def _intervals_json(intervals: Sequence[Interval] | None) -> list[list[float | str | None]] | None:
    return None if intervals is None else [[_json(lo), _json(hi)] for lo, hi in intervals]


@dataclass(frozen=True)
class TFCheck:
    """tF re-examination at 5 %: the adjusted critical value, interval and whether significance survives."""

    applicable: bool
    reason: str | None = None
    t_ratio: float | None = None
    first_stage_f: float | None = None
    critical_value: float | None = None
    interval: Interval | None = None
    adjusted_se: float | None = None
    conventional_5pct: bool | None = None
    significant_5pct: bool | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "t_ratio": _json(self.t_ratio),
            "first_stage_f": _json(self.first_stage_f),
            "critical_value_5pct": _json(self.critical_value),
            "interval_95": None if self.interval is None else [_json(v) for v in self.interval],
            "adjusted_se": _json(self.adjusted_se),
            "conventional_significant_5pct": self.conventional_5pct,
            "tf_significant_5pct": self.significant_5pct,
            "source": TF_SOURCE,
        }


def tf_check(rep: ReportedStats) -> TFCheck:
    """tF at 5 %: beta +/- c(F) se, with c from the published critical-value function (one instrument only)."""
    if rep.estimate is None or rep.std_error is None:
        return TFCheck(False, "the study reported no point estimate and standard error")
    t = rep.estimate / rep.std_error
    conventional = abs(t) > Z_05
    if rep.n_instruments != 1:
        return TFCheck(
            False,
            f"the tF critical values cover one instrument; this study used {rep.n_instruments}",
            t_ratio=t,
            conventional_5pct=conventional,
        )
    if rep.first_stage_f is None:
        return TFCheck(
            False, "the study reported no first-stage F", t_ratio=t, conventional_5pct=conventional
        )
    c = tf_critical_value(rep.first_stage_f)
    if math.isinf(c):
        interval: Interval = (-math.inf, math.inf)
    else:
        interval = (rep.estimate - c * rep.std_error, rep.estimate + c * rep.std_error)
    return TFCheck(
        True,
        None,
        t_ratio=t,
        first_stage_f=rep.first_stage_f,
        critical_value=c,
        interval=interval,
        adjusted_se=rep.std_error * c / Z_05,
        conventional_5pct=conventional,
        significant_5pct=bool(abs(t) > c),
    )


@dataclass(frozen=True)
class ARCheck:
    """Anderson–Rubin sets at 95 % and 99 % from reported reduced-form and first-stage coefficients."""

    applicable: bool
    reason: str | None = None
    cov_source: str | None = None
    fs_rf_cov: float | None = None
    reference: str | None = None
    set_95: list[Interval] | None = None
    shape_95: str | None = None
    set_99: list[Interval] | None = None
    shape_99: str | None = None
    excludes_zero_95: bool | None = None
    excludes_zero_99: bool | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "covariance_used": self.cov_source,
            "covariance_note": COV_SOURCES.get(self.cov_source or ""),
            "fs_rf_cov": _json(self.fs_rf_cov),
            "reference_distribution": self.reference,
            "set_95": _intervals_json(self.set_95),
            "shape_95": self.shape_95,
            "excludes_zero_95": self.excludes_zero_95,
            "set_99": _intervals_json(self.set_99),
            "shape_99": self.shape_99,
            "excludes_zero_99": self.excludes_zero_99,
        }


def _excludes(intervals: Sequence[Interval], value: float) -> bool:
    return not any(lo <= value <= hi for lo, hi in intervals)


def ar_reference(rep: ReportedStats) -> tuple[str, float, float]:
    """Reference distribution of the one-instrument AR statistic and its 95 % and 99 % critical values.

    F(1, G - 1) with G reported clusters; F(1, n - 2) with n reported (assuming an intercept and no other
    controls, a negligible difference when n is large); chi-square(1) when neither is known.
    """
    if rep.n_clusters is not None:
        d = rep.n_clusters - 1
        name = f"F(1, {d}) (G - 1 with G = {rep.n_clusters} clusters)"
    elif rep.n is not None and rep.n > 3:
        d = rep.n - 2
        name = f"F(1, {d}) (n - 2; controls not known)"
    else:
        return (
            "chi-square(1) (large sample; n not reported)",
            chi2_1_ppf(0.95),
            chi2_1_ppf(0.99),
        )
    return name, f_1_ppf(0.95, d), f_1_ppf(0.99, d)


def implied_covariance(rep: ReportedStats) -> float | None:
    """V_yx implied by the reported 2SLS standard error (delta method), or None when not identified/consistent."""
    if None in (rep.estimate, rep.std_error, rep.first_stage_coef, rep.first_stage_se, rep.reduced_form_se):
        return None
    b, se = float(rep.estimate), float(rep.std_error)  # type: ignore[arg-type]
    px, sx, sy = float(rep.first_stage_coef), float(rep.first_stage_se), float(rep.reduced_form_se)  # type: ignore[arg-type]
    if abs(b) < 1e-12 * max(1.0, se):
        return None
    cov = (sy * sy + b * b * sx * sx - se * se * px * px) / (2.0 * b)
    corr = cov / (sx * sy)
    if not -1.0 <= corr <= 1.0:
        return None
    return cov


def ar_check(rep: ReportedStats) -> ARCheck:
    """AR sets by the quadratic inversion shared with the data-based AR code (``robust_inference``)."""
    if rep.n_instruments != 1:
        return ARCheck(
            False,
            f"reported coefficients support the AR set with one instrument; this study "
            f"used {rep.n_instruments}",
        )
    needed = ("first_stage_coef", "first_stage_se", "reduced_form_coef", "reduced_form_se")
    missing = [n for n in needed if getattr(rep, n) is None]
    if missing:
        return ARCheck(False, f"the study did not report {', '.join(missing)}")
    px, sx = float(rep.first_stage_coef), float(rep.first_stage_se)  # type: ignore[arg-type]
    py, sy = float(rep.reduced_form_coef), float(rep.reduced_form_se)  # type: ignore[arg-type]
    if rep.fs_rf_cov is not None:
        source, vyx = "reported", rep.fs_rf_cov
        if abs(vyx) > sx * sy * (1 + 1e-9):
            raise InvalidInputError(
                f"fs_rf_cov {vyx} exceeds first_stage_se * reduced_form_se = {sx * sy}; a covariance cannot "
                "imply a correlation beyond +/-1, so check the reported values."
            )
    else:
        implied = implied_covariance(rep)
        source, vyx = ("implied", implied) if implied is not None else ("independence", 0.0)
    reference, c95, c99 = ar_reference(rep)
    sets: dict[float, list[Interval]] = {}
    for crit in (c95, c99):
        a2 = px * px - crit * sx * sx
        a1 = -2.0 * (py * px - crit * vyx)
        a0 = py * py - crit * sy * sy
        scale = max(px * px, crit * sx * sx, abs(py * px), crit * abs(vyx), py * py, crit * sy * sy)
        sets[crit] = quadratic_set(a2, a1, a0, scale=scale)
    return ARCheck(
        True,
        None,
        cov_source=source,
        fs_rf_cov=vyx,
        reference=reference,
        set_95=sets[c95],
        shape_95=classify_set(sets[c95]),
        set_99=sets[c99],
        shape_99=classify_set(sets[c99]),
        excludes_zero_95=_excludes(sets[c95], 0.0),
        excludes_zero_99=_excludes(sets[c99], 0.0),
    )


@dataclass(frozen=True)
class Threshold:
    """One critical value the reported F is compared with."""

    name: str
    critical_value: float | None
    exceeds: bool | None
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "name": self.name,
            "critical_value": _json(self.critical_value),
            "exceeds": self.exceeds,
            "note": self.note,
        }


@dataclass(frozen=True)
class StrengthCheck:
    """The reported first-stage F against Stock–Yogo and effective-F critical values, with how apt each is."""

    applicable: bool
    reason: str | None = None
    first_stage_f: float | None = None
    f_kind: str = "unknown"
    stock_yogo: tuple[Threshold, ...] = ()
    stock_yogo_note: str | None = None
    effective: tuple[Threshold, ...] = ()
    effective_note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "first_stage_f": _json(self.first_stage_f),
            "f_kind": self.f_kind,
            "stock_yogo": [t.to_dict() for t in self.stock_yogo],
            "stock_yogo_note": self.stock_yogo_note,
            "stock_yogo_source": STOCK_YOGO_SOURCE,
            "effective_f": [t.to_dict() for t in self.effective],
            "effective_f_note": self.effective_note,
            "effective_f_source": MOP_SOURCE,
        }


def _pct(level: float) -> str:
    return f"{round(level * 100)} %"


def strength_check(rep: ReportedStats) -> StrengthCheck:
    """Compare the reported F with the tables that suit its kind and say when a comparison is only indicative."""
    f = rep.first_stage_f
    if f is None:
        return StrengthCheck(False, "the study reported no first-stage F", f_kind=rep.f_kind)
    k = rep.n_instruments
    sy_rows = []
    missing = False
    for cell in stock_yogo_applicable(method=rep.method, n_endog=1, k2=k):
        value = cell.critical_value
        if value is None:
            missing = missing or "not carried" in (cell.reason or "")
            continue
        name = f"Stock–Yogo {cell.criterion.replace('_', ' ')} {_pct(cell.level)}"
        sy_rows.append(Threshold(name, value, f > value))
    if rep.f_kind in ("homoskedastic", "cragg-donald"):
        sy_note = None
    elif rep.f_kind == "unknown":
        sy_note = "the study did not say which F it reported; the tables assume homoskedastic errors"
    else:
        sy_note = (
            f"indicative only: a {rep.f_kind} F is compared with tables derived for homoskedastic errors "
            "(Cragg–Donald F)"
        )
    eff_rows: list[Threshold] = []
    eff_note: str | None = None
    if k == 1 or rep.f_kind in ("homoskedastic", "cragg-donald"):
        # K_eff = 1 with one instrument; K_eff = k under homoskedasticity (S proportional to the identity).
        k_eff = 1.0 if k == 1 else float(k)
        for tau in MOP_TAUS:
            # K_eff = 1: the quantile of ncx2(1, 1 / tau) in pure Python, so an audit needs no scipy
            c = ncx2_1_ppf(0.95, 1.0 / tau) if k_eff == 1 else mop_critical_value(k_eff, tau)
            eff_rows.append(Threshold(f"effective F, tau = {_pct(tau)}", c, f > c))
        if rep.f_kind == "unknown":
            eff_note = "the study did not say which F it reported; read as the effective F"
        elif k == 1 and rep.f_kind in ("homoskedastic", "cragg-donald"):
            eff_note = "with one instrument the effective F equals the F under the covariance the study used"
    else:
        eff_note = (
            f"not computed: with {k} instruments and a {rep.f_kind} F, the effective-F critical value needs the "
            "first-stage moment covariance, which studies do not report"
        )
    if missing:
        gap = f"the Stock–Yogo cells for K2 = {k} are not carried by this project; read them from the paper"
        sy_note = gap if sy_note is None else f"{sy_note}; {gap}"
    return StrengthCheck(True, None, f, rep.f_kind, tuple(sy_rows), sy_note, tuple(eff_rows), eff_note)


@dataclass(frozen=True)
class ProcedureVerdict:
    """One procedure's answer at one level: significant, not significant, or not applicable (with why)."""

    procedure: str  # "1.96 (as reported)", "tF", "Anderson–Rubin"
    level: float
    significant: bool | None
    basis: str

    @property
    def text(self) -> str:
        """Plain words, e.g. "not significant under tF"."""
        if self.significant is None:
            return f"{self.procedure} not applicable ({self.basis})"
        word = "significant" if self.significant else "not significant"
        joiner = "with" if self.procedure.startswith("1.96") else "under"
        return f"{word} {joiner} {self.procedure}"

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "procedure": self.procedure,
            "level": self.level,
            "significant": self.significant,
            "basis": self.basis,
            "text": self.text,
        }


def _procedures(rep: ReportedStats, tf: TFCheck, ar: ARCheck) -> tuple[ProcedureVerdict, ...]:
    """Every procedure's own verdict at 5 % and 1 %, in a fixed order (conventional, tF, Anderson–Rubin)."""
    out: list[ProcedureVerdict] = []
    if rep.estimate is None or rep.std_error is None:
        return ()
    t = abs(rep.estimate / rep.std_error)
    z_01 = norm_ppf(0.995)
    out.append(ProcedureVerdict("1.96 (as reported)", 0.05, t > Z_05, f"|t| = {t:.3g} against 1.96"))
    if tf.applicable:
        out.append(
            ProcedureVerdict(
                "tF", 0.05, tf.significant_5pct, f"|t| = {t:.3g} against c(F) = {tf.critical_value:.4g}"
            )
        )
    else:
        out.append(ProcedureVerdict("tF", 0.05, None, tf.reason or "not applicable"))
    if ar.applicable:
        out.append(ProcedureVerdict("Anderson–Rubin", 0.05, ar.excludes_zero_95, "95 % set against zero"))
    else:
        out.append(ProcedureVerdict("Anderson–Rubin", 0.05, None, ar.reason or "not applicable"))
    out.append(ProcedureVerdict("2.58 (as reported)", 0.01, t > z_01, f"|t| = {t:.3g} against 2.58"))
    if tf.applicable and tf.significant_5pct is False:
        out.append(
            ProcedureVerdict("tF", 0.01, False, "not significant at 5 % under tF, so not at 1 % either")
        )
    else:
        out.append(ProcedureVerdict("tF", 0.01, None, "1 % tF critical values are not carried"))
    if ar.applicable:
        out.append(ProcedureVerdict("Anderson–Rubin", 0.01, ar.excludes_zero_99, "99 % set against zero"))
    else:
        out.append(ProcedureVerdict("Anderson–Rubin", 0.01, None, ar.reason or "not applicable"))
    return tuple(out)


VARIANT_DRAWS, VARIANT_SEED = (
    1000,
    20260101,
)  # the weighted median's bootstrap in the audit (fixed: reproducible)


@dataclass(frozen=True)
class VariantReanalysis:
    """A study's published per-variant table re-analysed (IVW, MR-Egger, weighted median, Q, Steiger) beside the
    estimate the study reported; ``source`` and ``sha256`` name the file that was attached."""

    source: str
    sha256: str
    evidence: SummaryEvidence
    reported_estimate: float | None = None

    @property
    def n_variants(self) -> int:
        return self.evidence.table.n_variants

    @property
    def reported_inside_ivw(self) -> bool | None:
        """Whether the reported estimate lies in the IVW random-effects interval (None when either is missing)."""
        ivw = self.evidence.ivw
        if self.reported_estimate is None or not isinstance(ivw, IvwFit):
            return None
        lo, hi = ivw.ci_random
        return bool(lo <= self.reported_estimate <= hi)

    def lines(self) -> tuple[str, ...]:
        """One sentence per statistic, in words, for the audit document and the terminal."""
        ev = self.evidence
        level = f"{1 - ev.alpha:.0%}"
        out = [f"{self.source or 'the attached table'}: {ev.table.harmonisation}"]
        ivw = ev.ivw
        if isinstance(ivw, IvwFit):
            lo, hi = ivw.ci_random
            text = f"IVW {ivw.estimate:.4g} ({level} random-effects interval [{lo:.4g}, {hi:.4g}])"
            if self.reported_inside_ivw is not None and self.reported_estimate is not None:
                where = "inside" if self.reported_inside_ivw else "outside"
                text += f"; the reported estimate {self.reported_estimate:.4g} lies {where} it"
            out.append(text)
        else:
            out.append(str(ivw))
        egger = ev.egger
        out.append(
            f"MR-Egger slope {egger.estimate:.4g}, intercept {egger.intercept:.4g} (p = {egger.intercept_p:.3g}); "
            f"I²_GX {egger.i2_gx:.3g}"
            if isinstance(egger, EggerFit)
            else str(egger)
        )
        median = ev.weighted_median
        out.append(
            f"weighted median {median.estimate:.4g} (bootstrap SE {median.se:.3g}, {median.draws} draws)"
            if isinstance(median, WeightedMedian)
            else str(median)
        )
        het = ev.heterogeneity
        out.append(
            f"Cochran's Q {het.q:.4g} on {het.q_df} df (p = {het.q_p:.3g})"
            if isinstance(het, Heterogeneity)
            else str(het)
        )
        out.append(f"mean F of the variants {ev.ratios.mean_f:.4g} (smallest {ev.ratios.min_f:.4g})")
        return tuple(out)

    def flags(self) -> tuple[str, ...]:
        """What the re-analysis puts in doubt (at the table's own level)."""
        ev, out = self.evidence, []
        if self.reported_inside_ivw is False:
            out.append(
                "the reported estimate lies outside the IVW interval re-computed from its own variants"
            )
        if isinstance(ev.egger, EggerFit) and ev.egger.intercept_p < ev.alpha:
            out.append("the MR-Egger intercept differs from zero: directional pleiotropy is suspected")
        if isinstance(ev.heterogeneity, Heterogeneity) and ev.heterogeneity.q_p < ev.alpha:
            out.append("Cochran's Q rejects homogeneity of the variants' ratio estimates")
        return tuple(out)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict: the file, the comparison with the reported estimate, the full evidence."""
        return {
            "source": self.source,
            "sha256": self.sha256,
            "n_variants": self.n_variants,
            "reported_estimate": _json(self.reported_estimate),
            "reported_inside_ivw_random_interval": self.reported_inside_ivw,
            "summary": list(self.lines()),
            "flags": list(self.flags()),
            "evidence": self.evidence.to_dict(),
        }


def reanalyse_variants(
    table: Mapping[str, Any], *, reported_estimate: float | None = None, alpha: float = 0.05
) -> VariantReanalysis:
    """Re-analyse a stored per-variant table (``source``, ``sha256``, ``columns``, ``rows``) with every
    summary-data estimator, beside the estimate the study reported."""
    import pandas as pd

    try:
        frame = pd.DataFrame(list(table.get("rows") or []), columns=list(table.get("columns") or []))
    except (ValueError, TypeError) as exc:  # rows that do not fit the columns (a hand-edited export)
        raise InvalidInputError(
            f"the stored per-variant table is malformed ({exc}); attach the file again."
        ) from None
    checked = variant_table(frame, source=str(table.get("source") or ""))
    evidence = summary_evidence(checked, alpha=alpha, draws=VARIANT_DRAWS, seed=VARIANT_SEED)
    return VariantReanalysis(str(table.get("source") or ""), str(table.get("sha256") or ""), evidence,
                             reported_estimate)  # fmt: skip


@dataclass(frozen=True)
class StudyAudit:
    """Everything the audit concludes about one study from what it reported.

    ``verdict_5pct``/``verdict_1pct`` combine the weak-instrument-robust procedures: "survives" or "lost" when
    every applicable one agrees, "procedures disagree" when they do not (each procedure's own verdict is in
    ``procedures``).
    """

    key: str
    citation: str
    reported: ReportedStats
    tf: TFCheck
    ar: ARCheck
    strength: StrengthCheck
    verdict_5pct: str
    verdict_1pct: str
    flags: tuple[str, ...]
    procedures: tuple[ProcedureVerdict, ...] = ()
    variants: VariantReanalysis | None = None

    @property
    def survives_5pct(self) -> bool:
        return self.verdict_5pct == "survives"

    @property
    def survives_1pct(self) -> bool:
        return self.verdict_1pct == "survives"

    def procedure_text(self, level: float) -> str:
        """Each procedure's verdict at ``level`` in words, applicable ones only, e.g.
        "significant with 1.96 (as reported); not significant under tF; significant under Anderson–Rubin"."""
        parts = [p.text for p in self.procedures if p.level == level and p.significant is not None]
        return "; ".join(parts) if parts else "no procedure applies"

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "key": self.key,
            "citation": self.citation,
            "reported": self.reported.to_dict(),
            "verdict_5pct": self.verdict_5pct,
            "verdict_1pct": self.verdict_1pct,
            "procedures_5pct": self.procedure_text(0.05),
            "procedures_1pct": self.procedure_text(0.01),
            "procedures": [p.to_dict() for p in self.procedures],
            "tf": self.tf.to_dict(),
            "anderson_rubin": self.ar.to_dict(),
            "strength": self.strength.to_dict(),
            "flags": list(self.flags),
            "variants": None if self.variants is None else self.variants.to_dict(),
        }

    def __str__(self) -> str:
        rep = self.reported
        head = f"{self.citation or self.key} ({self.key})"
        lines = [head]
        if rep.estimate is not None and rep.std_error is not None:
            lines.append(f"  reported estimate {rep.estimate:.4g} (SE {rep.std_error:.4g})")
        if rep.first_stage_f is not None:
            lines.append(f"  first-stage F {rep.first_stage_f:.4g} ({rep.f_kind})")
        if self.tf.applicable and self.tf.interval is not None:
            lo, hi = self.tf.interval
            lines.append(f"  tF 95 % interval [{lo:.4g}, {hi:.4g}] (c = {self.tf.critical_value:.4g})")
        if self.ar.applicable:
            lines.append(
                f"  Anderson–Rubin 95 % set {_set_words(self.ar.set_95)}; 99 % set {_set_words(self.ar.set_99)} "
                f"({self.ar.cov_source} covariance)"
            )
        lines.append(f"  5 %: {self.verdict_5pct} — {self.procedure_text(0.05)}")
        lines.append(f"  1 %: {self.verdict_1pct} — {self.procedure_text(0.01)}")
        lines += [f"  note: {f}" for f in self.flags]
        if self.variants is not None:
            lines += [f"  per-variant table: {line}" for line in self.variants.lines()]
        lines.append("  Statistics cannot establish exclusion or exogeneity; a result that survives may still rest on "
                     "an invalid instrument.")  # fmt: skip
        return "\n".join(lines)


def _set_words(intervals: Sequence[Interval] | None) -> str:
    if intervals is None:
        return "—"
    if not intervals:
        return "empty"
    return " ∪ ".join(f"[{lo:.4g}, {hi:.4g}]" for lo, hi in intervals)


VERDICTS = ("survives", "lost", "procedures disagree", "not significant as reported", "cannot be re-examined")


def _combine(answers: Sequence[bool | None]) -> str:
    known = [a for a in answers if a is not None]
    if not known:
        return "cannot be re-examined"
    if all(known):
        return "survives"
    if not any(known):
        return "lost"
    return "procedures disagree"


def _verdicts(rep: ReportedStats, tf: TFCheck, ar: ARCheck) -> tuple[str, str]:
    if rep.estimate is None or rep.std_error is None:
        return "cannot be re-examined", "cannot be re-examined"
    t = abs(rep.estimate / rep.std_error)
    conv_5, conv_1 = t > Z_05, t > norm_ppf(0.995)
    robust_5 = [
        tf.significant_5pct if tf.applicable else None,
        ar.excludes_zero_95 if ar.applicable else None,
    ]
    v5 = _combine(robust_5) if conv_5 else "not significant as reported"
    tf_1 = False if tf.applicable and tf.significant_5pct is False else None
    robust_1 = [tf_1, ar.excludes_zero_99 if ar.applicable else None]
    v1 = _combine(robust_1) if conv_1 else "not significant as reported"
    return v5, v1


def audit_study(
    key: str,
    reported: ReportedStats | Mapping[str, Any],
    *,
    citation: str = "",
    variants: Mapping[str, Any] | None = None,
) -> StudyAudit:
    """Re-examine one study from its reported statistics and, when one is attached, re-analyse its per-variant
    table (``reanalyse_variants``) beside the reported estimate."""
    rep = (
        reported
        if isinstance(reported, ReportedStats)
        else ReportedStats.from_mapping(reported, where=f"study {key!r}")
    )
    tf, ar, strength = tf_check(rep), ar_check(rep), strength_check(rep)
    flags = []
    for label, check in (("tF", tf), ("Anderson–Rubin", ar), ("first-stage strength", strength)):
        if not check.applicable:
            flags.append(f"{label} cannot be re-examined: {check.reason}")
    if tf.applicable and tf.first_stage_f is not None and tf.first_stage_f < TF_UNBOUNDED_BELOW:
        flags.append(f"first-stage F below {TF_UNBOUNDED_BELOW:g}: the tF interval is the whole line")
    if ar.applicable and ar.cov_source == "independence":
        flags.append("Anderson–Rubin set uses the independence approximation (zero covariance)")
    if rep.f_kind == "unknown" and rep.first_stage_f is not None:
        flags.append("the kind of first-stage F was not reported")
    v5, v1 = _verdicts(rep, tf, ar)
    if v1 == "cannot be re-examined" and v5 != "cannot be re-examined":
        flags.append(
            "1 % level not re-examined: the 1 % tF critical values are not carried and no reduced form and first "
            "stage were reported for an Anderson–Rubin set"
        )
    if "procedures disagree" in (v5, v1):
        flags.append(
            "the weak-instrument-robust procedures disagree: tF and Anderson–Rubin answer different questions "
            "(tF corrects the t-test; Anderson–Rubin inverts a test valid however weak the instrument), so "
            "report both"
        )
    again = None
    if variants is not None:
        try:
            again = reanalyse_variants(variants, reported_estimate=rep.estimate)
            flags += [f"per-variant table: {f}" for f in again.flags()]
        except InvalidInputError as exc:  # one study's table does not stop the audit of the others
            flags.append(f"per-variant table cannot be re-analysed: {exc}")
    return StudyAudit(
        key, citation, rep, tf, ar, strength, v5, v1, tuple(flags), _procedures(rep, tf, ar), again
    )


@dataclass(frozen=True)
class ThreatCount:
    """How often one catalogue threat was raised against the studies in scope."""

    code: str
    title: str
    condition: str
    count: int

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {"code": self.code, "title": self.title, "condition": self.condition, "count": self.count}


@dataclass(frozen=True)
class Spread:
    """Spread of the reported point estimates."""

    n: int
    minimum: float | None = None
    q1: float | None = None
    median: float | None = None
    q3: float | None = None
    maximum: float | None = None
    positive: int = 0
    negative: int = 0

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "n": self.n,
            "min": _json(self.minimum),
            "q1": _json(self.q1),
            "median": _json(self.median),
            "q3": _json(self.q3),
            "max": _json(self.maximum),
            "positive": self.positive,
            "negative": self.negative,
        }


def spread(values: Sequence[float]) -> Spread:
    """Min, quartiles (inclusive method), median, max and signs of a list of estimates."""
    vals = sorted(float(v) for v in values)
    if not vals:
        return Spread(0)
    if len(vals) == 1:
        q1 = q3 = vals[0]
    else:
        q1, _, q3 = statistics.quantiles(vals, n=4, method="inclusive")
    return Spread(
        len(vals),
        vals[0],
        q1,
        statistics.median(vals),
        q3,
        vals[-1],
        sum(v > 0 for v in vals),
        sum(v < 0 for v in vals),
    )


@dataclass(frozen=True)
class AuditSummary:
    """A scope's summary: how many prior uses survive, the spread of their estimates, the threats most raised."""

    scope: str
    n_studies: int
    n_with_statistics: int
    verdicts_5pct: dict[str, int]
    verdicts_1pct: dict[str, int]
    estimates: Spread
    top_threats: tuple[ThreatCount, ...]
    studies: tuple[StudyAudit, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict with every study's audit."""
        return {
            "scope": self.scope,
            "n_studies": self.n_studies,
            "n_with_statistics": self.n_with_statistics,
            "verdicts_5pct": dict(self.verdicts_5pct),
            "verdicts_1pct": dict(self.verdicts_1pct),
            "estimates": self.estimates.to_dict(),
            "top_threats": [t.to_dict() for t in self.top_threats],
            "studies": [s.to_dict() for s in self.studies],
            "tf_note": f"tF critical values at 5 % from {TF_SOURCE}; 1.96 at F >= {TF_NORMAL_FROM}",
        }


def summarise(
    scope: str,
    audits: Sequence[StudyAudit],
    *,
    n_studies: int | None = None,
    threats: Sequence[ThreatCount] = (),
    top: int = 5,
) -> AuditSummary:
    """Count verdicts, describe the spread of estimates and keep the ``top`` most raised threats."""
    v5 = Counter(a.verdict_5pct for a in audits)
    v1 = Counter(a.verdict_1pct for a in audits)
    ests = [a.reported.estimate for a in audits if a.reported.estimate is not None]
    ranked = sorted(threats, key=lambda t: (-t.count, t.code))[:top]
    return AuditSummary(
        scope=scope,
        n_studies=len(audits) if n_studies is None else n_studies,
        n_with_statistics=len(audits),
        verdicts_5pct={v: v5.get(v, 0) for v in VERDICTS},
        verdicts_1pct={v: v1.get(v, 0) for v in VERDICTS},
        estimates=spread(ests),
        top_threats=tuple(ranked),
        studies=tuple(audits),
    )
