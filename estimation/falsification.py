"""Falsification checks: balance, a zero-first-stage subsample, placebo outcomes, instruments one at a time.

None of these can establish exclusion or independence; they can only reveal some failures. Each regression
uses the project's data preparation (:func:`ivdossier.estimation.data.prepare`: listwise deletion, controls
and absorbed fixed effects partialled out, weights) and covariance
(:func:`ivdossier.estimation.covariance.sandwich`) with the chosen ``vcov``.

Conventions (stated here once):

* Per-target regressions: target on the instruments, controls and fixed effects partialled out. p-values and
  intervals use t quantiles with n - k - p degrees of freedom (G - 1 with clusters), or normal quantiles when
  ``small_sample`` is False — the same references as :func:`ivdossier.estimation.estimate`.
* Joint test across targets: the m target regressions share their regressors, so their stacked coefficients
  have the seemingly-unrelated covariance from ``sandwich`` with m equations (cross-equation terms from the
  same rows or clusters). Wald = b' V^{-1} b, chi-square with m x L degrees of freedom.
* Standardised difference: for one binary (0/1) instrument the usual (mean1 - mean0) / sqrt((s1^2 + s0^2) / 2)
  on the raw, unadjusted covariate (sample variances); otherwise the adjusted coefficient times
  SD(Z) / SD(W), both raw sample SDs in the estimation rows (change in W, in SDs, per SD of Z).
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any, ClassVar, cast

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.api import SampleCounts, result_from_cross_products, sufficient_statistics
from ivdossier.estimation.covariance import CovKind, CovSpec, cov_name
from ivdossier.estimation.crossproducts import CrossProducts, build
from ivdossier.estimation.data import as_names, prepare
from ivdossier.estimation.rows import RowAccount, count_rows
from ivdossier.estimation.spec import ModelSpec, check_options
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

__all__ = [
    "InstrumentCoefficient",
    "InstrumentRegressions",
    "JointTest",
    "JustIdentifiedEstimate",
    "PerInstrumentResult",
    "TargetRegression",
    "ZeroFirstStageResult",
    "balance",
    "per_instrument",
    "placebo_outcomes",
    "zero_first_stage",
]

Array = NDArray[np.float64]

CAUTION = (
    "Falsification checks can reveal some failures of exclusion or independence but cannot establish "
    "either; conclusions for policy or clinical decisions need domain review."
)


# ----------------------------------------------------------------------------------------------------------
# result types
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class InstrumentCoefficient(Record):
    """Coefficient of one instrument in one target regression."""

    instrument: str
    coef: float
    se: float
    t: float
    p_value: float
    ci_lower: float
    ci_upper: float
    std_diff: float
    std_diff_kind: str  # "binary: (mean1 - mean0) / pooled SD" or "continuous: coef * SD(Z) / SD(W)"

    def to_dict(self) -> dict[str, Any]:
        return cast(dict[str, Any], json_safe(dict(self.__dict__)))


@dataclass(frozen=True)
class TargetRegression(Record):
    """One target (covariate, placebo outcome, treatment or outcome) regressed on the instruments.

    ``wald``/``wald_df``/``wald_p_value`` test all instrument coefficients of this target jointly (chi-square,
    df = L); ``f`` is that Wald divided by L (the first-stage F when the target is the treatment).
    """

    target: str
    coefficients: tuple[InstrumentCoefficient, ...]
    wald: float
    wald_df: int
    wald_p_value: float
    f: float
    n: int

    def to_dict(self) -> dict[str, Any]:
        out = cast(dict[str, Any], json_safe({k: v for k, v in self.__dict__.items() if k != "coefficients"}))
        out["coefficients"] = [c.to_dict() for c in self.coefficients]
        return out


@dataclass(frozen=True)
class JointTest(Record):
    """Stacked (seemingly unrelated) Wald test that every instrument coefficient of every target is zero."""

    statistic: float
    df: int
    p_value: float
    description: str

    def to_dict(self) -> dict[str, Any]:
        return cast(dict[str, Any], json_safe(dict(self.__dict__)))


@dataclass(frozen=True)
class InstrumentRegressions(Record):
    """Balance table or placebo-outcome table: per-target regressions and the joint test."""

    kind: str  # "balance" or "placebo_outcomes"
    instruments: tuple[str, ...]
    rows: tuple[TargetRegression, ...]
    joint: JointTest
    n: int
    n_dropped: int
    controls: tuple[str, ...]
    absorb: tuple[str, ...]
    vcov: str
    alpha: float
    reference: str
    caution: str
    row_account: RowAccount | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "row_account": None if self.row_account is None else self.row_account.to_dict(),
            "kind": self.kind,
            "instruments": list(self.instruments),
            "rows": [r.to_dict() for r in self.rows],
            "joint": self.joint.to_dict(),
            "n": self.n,
            "n_dropped": self.n_dropped,
            "controls": list(self.controls),
            "absorb": list(self.absorb),
            "vcov": self.vcov,
            "alpha": self.alpha,
            "reference": self.reference,
            "caution": self.caution,
        }

    def __str__(self) -> str:
        title = (
            "Balance of the instrument(s) on predetermined covariates"
            if self.kind == "balance"
            else ("Placebo outcomes regressed on the instrument(s) (each should be null)")
        )
        lines = [title, _rows_line(self.row_account, self.n, self.n_dropped)]
        lines.append(_adjustment(self.controls, self.absorb, self.vcov, self.reference))
        lines += _coefficient_table(self.rows, self.alpha, std_diff=self.kind == "balance")
        lines.append(
            f"joint test: chi-square {self.joint.statistic:.4g} on {self.joint.df} df, p = {self.joint.p_value:.3g} "
            f"({self.joint.description})"
        )
        lines.append(self.caution)
        return "\n".join(lines)


def _rows_line(account: RowAccount | None, n: int, n_dropped: int) -> str:
    if account is not None:
        return str(account)
    return f"rows: used {n:,}" + (f"; {n_dropped:,} incomplete rows left out" if n_dropped else "")


def _adjustment(controls: Sequence[str], absorb: Sequence[str], vcov: str, reference: str) -> str:
    parts = [f"controls: {', '.join(controls) or 'none'}"]
    if absorb:
        parts.append(f"absorbed: {', '.join(absorb)}")
    parts.append(f"covariance: {vcov}; {reference}")
    return "; ".join(parts)


def _fmt(value: float) -> str:
    if value != value:
        return "—"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return f"{value:.4g}"


def _coefficient_table(rows: Sequence[TargetRegression], alpha: float, *, std_diff: bool) -> list[str]:
    level = f"{100 * (1 - alpha):g} % interval"
    head = ["target", "instrument", "coef", "SE", level, "p"] + (["std. diff."] if std_diff else [])
    body = []
    for r in rows:
        for c in r.coefficients:
            cells = [
                r.target,
                c.instrument,
                _fmt(c.coef),
                _fmt(c.se),
                f"[{_fmt(c.ci_lower)}, {_fmt(c.ci_upper)}]",
                f"{c.p_value:.3g}",
            ]
            if std_diff:
                cells.append(_fmt(c.std_diff))
            body.append(cells)
    return _aligned(head, body)


def _aligned(head: Sequence[str], body: Sequence[Sequence[str]]) -> list[str]:
    widths = [max(len(str(row[j])) for row in [head, *body]) for j in range(len(head))]
    fmt = lambda row: "  ".join(str(v).ljust(w) for v, w in zip(row, widths, strict=True)).rstrip()  # noqa: E731
    return ["  " + fmt(head), *("  " + fmt(row) for row in body)]


# ----------------------------------------------------------------------------------------------------------
# shared core: several targets regressed on the same instruments, on the same rows
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RawSummary:
    """Unweighted sample statistics of the estimation rows that the standardised differences need.

    ``sd`` maps each target and instrument to its sample standard deviation (ddof = 1); ``arms`` is set when
    there is one instrument and it takes only the values 0 and 1: per target, (rows, mean, sample variance)
    where the instrument is 1 and where it is 0.
    """

    sd: dict[str, float]
    arms: dict[str, tuple[tuple[int, float, float], tuple[int, float, float]]] | None = None


def raw_summary(frame: pd.DataFrame, targets: Sequence[str], instruments: Sequence[str]) -> RawSummary:
    """The :class:`RawSummary` of the estimation rows held in memory."""
    import pandas as pd

    def values(name: str) -> Array:
        return pd.to_numeric(frame[name]).to_numpy(dtype=np.float64)

    sd = {name: float(np.std(values(name), ddof=1)) for name in dict.fromkeys([*targets, *instruments])}
    arms = None
    if len(instruments) == 1:
        z = values(instruments[0])
        if set(np.unique(z)) <= {0.0, 1.0}:
            arms = {}
            for t in targets:
                w = values(t)
                w1, w0 = w[z == 1.0], w[z == 0.0]
                arms[t] = (
                    (int(w1.size), float(w1.mean()), float(np.var(w1, ddof=1)) if w1.size > 1 else math.nan),
                    (int(w0.size), float(w0.mean()), float(np.var(w0, ddof=1)) if w0.size > 1 else math.nan),
                )
    return RawSummary(sd, arms)


@dataclass(frozen=True, eq=False)
class _Stacked:
    targets: tuple[str, ...]
    instruments: tuple[str, ...]
    coef: Array  # (m, L)
    cov: Array  # (m L, m L), equation-major
    quantile: float
    dist: tuple[str, int | None]  # ("t", df) or ("normal", None)
    n: int
    n_dropped: int
    summary: RawSummary | None  # raw statistics for the standardised differences
    controls: tuple[str, ...] = ()
    absorb: tuple[str, ...] = ()
    columns: tuple[str, ...] = ()  # every column the regressions use


def _check_common(vcov: str, alpha: float, cluster: str | Sequence[str] | None) -> tuple[str, ...]:
    """The shared option checks of every model spec (estimation/spec.py), for the falsification functions."""
    clus = as_names(cluster, "cluster")
    check_options("2sls", vcov, clus, alpha, 1.0)
    return clus


def _complete_rows(frame: pd.DataFrame, columns: Sequence[str]) -> tuple[pd.DataFrame, int]:
    """Keep rows complete over ``columns`` (listwise deletion shared by all targets); names a missing column."""
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        close = difflib.get_close_matches(missing[0], [str(c) for c in frame.columns], n=3, cutoff=0.6)
        hint = f"; did you mean {', '.join(map(repr, close))}?" if close else "; check the spelling."
        raise InvalidInputError(f"Column {missing[0]!r} is not in the data{hint}")
    keep = frame[list(dict.fromkeys(columns))].notna().all(axis=1)
    out = frame.loc[keep]
    if len(out) == 0:
        raise InvalidInputError("No row is complete over the used columns; check for missing values.")
    return out, int((~keep).sum())


def _reference(vcov: str, small_sample: bool, df: int, n_clusters: tuple[int, ...]) -> tuple[str, int | None]:
    if not small_sample:
        return "normal", None
    if cov_name(vcov) == "clustered":
        return "t", min(n_clusters) - 1
    return "t", df


def _stacked(
    data: pd.DataFrame,
    *,
    targets: Sequence[str],
    instruments: Sequence[str],
    controls: str | Sequence[str],
    absorb: str | Sequence[str],
    cluster: str | Sequence[str] | None,
    weights: str | None,
    vcov: str,
    small_sample: bool,
    alpha: float,
) -> _Stacked:
    import pandas as pd

    if not isinstance(data, pd.DataFrame):
        raise InvalidInputError(f"data must be a pandas DataFrame, got {type(data).__name__}; load it first.")
    clus = _check_common(vcov, alpha, cluster)
    vcov = cov_name(vcov)
    inst = as_names(instruments, "instruments")
    if not inst:
        raise InvalidInputError("instruments= is empty; name at least one instrument column.")
    tgts = tuple(targets)
    if not tgts:
        raise InvalidInputError("No target columns were given; name at least one covariate or outcome.")
    ctrl, fe = as_names(controls, "controls"), as_names(absorb, "absorb")
    used = [*tgts, *inst, *ctrl, *fe, *clus, *((weights,) if weights else ())]
    frame, n_dropped = _complete_rows(data, used)
    for z in inst:
        col = pd.to_numeric(frame[z], errors="coerce")
        if col.nunique(dropna=True) < 2:
            raise EstimationError(f"Instrument {z!r} is constant in the used rows; drop it.")
    preps = [
        prepare(
            frame,
            outcome=t,
            treatment=inst,
            controls=ctrl,
            absorb=fe,
            cluster=clus,
            weights=weights,
            require_instruments=False,
        )
        for t in tgts
    ]
    first = preps[0]
    spec = CovSpec(cast(CovKind, vcov), first.clusters if vcov == "clustered" else (), small_sample)
    ys = np.column_stack([p.y for p in preps])
    cp = build(
        first.X,
        ys[:, :-1],
        ys[:, -1],
        spec,
        n_partialled=first.n_partialled,
        n_partialled_nested=first.n_partialled_nested,
    )
    return stacked_from(
        cp,
        targets=tgts,
        instruments=inst,
        n_dropped=n_dropped,
        alpha=alpha,
        summary=raw_summary(frame, tgts, inst),
        controls=ctrl,
        absorb=fe,
        columns=tuple(dict.fromkeys(used)),
    )


def stacked_from(
    cp: CrossProducts,
    *,
    targets: tuple[str, ...],
    instruments: tuple[str, ...],
    n_dropped: int,
    alpha: float,
    summary: RawSummary | None,
    controls: tuple[str, ...] = (),
    absorb: tuple[str, ...] = (),
    columns: tuple[str, ...] = (),
) -> _Stacked:
    """Several targets regressed on the same instruments, from the sufficient statistics of [Z, targets] (the
    instruments first, then the targets in order, the last one in the outcome slot): coefficients and the
    seemingly-unrelated covariance, in data units, with the reference distribution of the intervals."""
    import scipy.linalg
    from scipy import stats

    k = cp.k
    rz = cp.coords(cp.iz)
    rw = np.asarray(cp.r[:, k:], dtype=np.float64)
    rzz = rz[:k]
    coef_std = scipy.linalg.solve_triangular(rzz, rw[:k], check_finite=False)  # (L, m)
    rinv = scipy.linalg.solve_triangular(rzz, np.eye(k), check_finite=False)
    resid = rw.copy()
    resid[:k] = 0.0  # the instruments' coordinates span the first k: what is left is the residual
    cov_std = cp.covariance(rz, resid, rinv @ rinv.T, k)
    unit = cp.scale[k:][:, None] / cp.scale[:k][None, :]  # (m, L): target units per instrument unit
    coef = coef_std.T * unit
    cov = cov_std * np.outer(unit.ravel(), unit.ravel())
    df = cp.n - k - cp.n_partialled
    dist = _reference(cp.kind, cp.small_sample, df, cp.cluster_counts())
    quantile = float(
        stats.norm.ppf(1 - alpha / 2) if dist[0] == "normal" else stats.t.ppf(1 - alpha / 2, dist[1])
    )
    return _Stacked(
        targets=targets,
        instruments=instruments,
        coef=np.asarray(coef, dtype=np.float64),
        cov=np.asarray(cov, dtype=np.float64),
        quantile=quantile,
        dist=dist,
        n=cp.n,
        n_dropped=n_dropped,
        summary=summary,
        controls=controls,
        absorb=absorb,
        columns=columns,
    )


def _wald(coef: Array, cov: Array) -> float:
    try:
        return float(coef @ np.linalg.solve(cov, coef))
    except np.linalg.LinAlgError:
        return float(coef @ np.linalg.pinv(cov) @ coef)


def _p_two_sided(t: float, dist: tuple[str, int | None]) -> float:
    from scipy import stats

    if dist[0] == "normal":
        return float(2 * stats.norm.sf(abs(t)))
    return float(2 * stats.t.sf(abs(t), dist[1]))


def _std_diff(summary: RawSummary, target: str, instrument: str, coef: float) -> tuple[float, str]:
    if summary.arms is not None:
        (n1, m1, v1), (n0, m0, v0) = summary.arms[target]
        pooled = math.sqrt((v1 + v0) / 2) if min(n1, n0) > 1 else 0.0
        value = (m1 - m0) / pooled if pooled > 0 else math.nan
        return float(value), "binary: (mean1 - mean0) / pooled SD"
    sd_w = summary.sd[target]
    value = coef * summary.sd[instrument] / sd_w if sd_w > 0 else math.nan
    return float(value), "continuous: coef * SD(Z) / SD(W)"


def _rows(st: _Stacked, *, std_diff: bool = True) -> tuple[TargetRegression, ...]:
    from scipy import stats

    n_inst = len(st.instruments)
    out = []
    for j, target in enumerate(st.targets):
        block = slice(j * n_inst, (j + 1) * n_inst)
        cov_j = st.cov[block, block]
        coefs = []
        for i, z in enumerate(st.instruments):
            b = float(st.coef[j, i])
            se = math.sqrt(max(float(cov_j[i, i]), 0.0))
            t = b / se if se > 0 else math.inf
            sd, kind = (
                _std_diff(st.summary, target, z, b)
                if std_diff and st.summary is not None
                else (math.nan, "not computed")
            )
            coefs.append(
                InstrumentCoefficient(
                    instrument=z,
                    coef=b,
                    se=se,
                    t=t,
                    p_value=_p_two_sided(t, st.dist),
                    ci_lower=b - st.quantile * se,
                    ci_upper=b + st.quantile * se,
                    std_diff=sd,
                    std_diff_kind=kind,
                )
            )
        w = _wald(st.coef[j], cov_j)
        out.append(
            TargetRegression(
                target=target,
                coefficients=tuple(coefs),
                wald=w,
                wald_df=n_inst,
                wald_p_value=float(stats.chi2.sf(w, n_inst)),
                f=w / n_inst,
                n=st.n,
            )
        )
    return tuple(out)


def _joint(st: _Stacked) -> JointTest:
    from scipy import stats

    stat = _wald(st.coef.ravel(), st.cov)
    df = st.coef.size
    return JointTest(
        statistic=stat,
        df=df,
        p_value=float(stats.chi2.sf(stat, df)),
        description=(
            f"stacked Wald test of all {len(st.instruments)} instrument coefficient(s) in all "
            f"{len(st.targets)} regression(s), seemingly-unrelated covariance, chi-square with {df} df"
        ),
    )


def _reference_text(st: _Stacked) -> str:
    return (
        "normal quantiles" if st.dist[0] == "normal" else f"t quantiles with {st.dist[1]} degrees of freedom"
    )


def _regressions(
    kind: str, st: _Stacked, *, vcov: str, alpha: float, data: pd.DataFrame
) -> InstrumentRegressions:
    return regressions_from(
        kind, st, vcov=vcov, alpha=alpha, row_account=count_rows(data, st.columns, n_used=st.n)
    )


def regressions_from(
    kind: str, st: _Stacked, *, vcov: str, alpha: float, row_account: RowAccount | None
) -> InstrumentRegressions:
    """The balance or placebo-outcome table from stacked regressions (:func:`stacked_from`)."""
    return InstrumentRegressions(
        kind=kind,
        instruments=st.instruments,
        rows=_rows(st),
        joint=_joint(st),
        n=st.n,
        n_dropped=st.n_dropped,
        controls=st.controls,
        absorb=st.absorb,
        vcov=vcov,
        alpha=alpha,
        reference=_reference_text(st),
        caution=CAUTION,
        row_account=row_account,
    )


# ----------------------------------------------------------------------------------------------------------
# balance and placebo outcomes
# ----------------------------------------------------------------------------------------------------------


def balance(
    data: pd.DataFrame,
    *,
    instruments: str | Sequence[str],
    covariates: Sequence[str],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> InstrumentRegressions:
    """Balance of the instruments against predetermined covariates: one regression per covariate, joint test.

    A covariate should be measured before the instrument could affect it.
    """
    covs = as_names(covariates, "covariates")
    if not covs:
        raise InvalidInputError("covariates is empty; name at least one predetermined covariate.")
    st = _stacked(
        data,
        targets=covs,
        instruments=as_names(instruments, "instruments"),
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
    )
    return _regressions("balance", st, vcov=vcov, alpha=alpha, data=data)


def placebo_outcomes(
    data: pd.DataFrame,
    *,
    instruments: str | Sequence[str],
    outcomes: Sequence[str],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> InstrumentRegressions:
    """Reduced form of each placebo outcome (one the treatment cannot affect) on the instruments."""
    outs = as_names(outcomes, "outcomes")
    if not outs:
        raise InvalidInputError("outcomes is empty; name at least one placebo outcome column.")
    st = _stacked(
        data,
        targets=outs,
        instruments=as_names(instruments, "instruments"),
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
    )
    return _regressions("placebo_outcomes", st, vcov=vcov, alpha=alpha, data=data)


# ----------------------------------------------------------------------------------------------------------
# zero first stage
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ZeroFirstStageResult(Record):
    """First stage and reduced form in a subsample where the instrument should not move the treatment.

    ``direct_effect_prior_mean`` and ``direct_effect_prior_covariance`` are the reduced-form coefficients of Y on Z in the subsample and their
    covariance, in outcome units per unit of each instrument: the scale of gamma in
    :func:`ivdossier.estimation.sensitivity.local_to_zero`. Using them as the local-to-zero prior assumes
    (i) the treatment does not respond to Z in the subsample, so the reduced form there is the direct effect,
    and (ii) the direct effect is the same in the subsample and the analysis sample.
    """

    subsample: str
    n: int
    n_dropped: int
    n_full: int
    instruments: tuple[str, ...]
    first_stage: TargetRegression
    first_stage_p_value: float
    reduced_form: TargetRegression
    direct_effect_prior_mean: tuple[float, ...]
    direct_effect_prior_covariance: tuple[tuple[float, ...], ...]
    assumption: str
    warning: str | None
    vcov: str
    alpha: float
    caution: str
    row_account: RowAccount | None = None

    def to_dict(self) -> dict[str, Any]:
        skip = ("first_stage", "reduced_form", "row_account")
        out = cast(dict[str, Any], json_safe({k: v for k, v in self.__dict__.items() if k not in skip}))
        out["first_stage"] = self.first_stage.to_dict()
        out["reduced_form"] = self.reduced_form.to_dict()
        out["row_account"] = None if self.row_account is None else self.row_account.to_dict()
        out["kind"] = "zero_first_stage"
        return out

    # Stored before the fields had their own names (read back under the new ones; see Record.RENAMED_FIELDS).
    RENAMED_FIELDS: ClassVar[dict[str, str]] = {
        "prior_mu": "direct_effect_prior_mean",
        "prior_omega": "direct_effect_prior_covariance",
    }

    @property
    def prior_mu(self) -> tuple[float, ...]:
        """Deprecated name of ``direct_effect_prior_mean`` (removed in the next release)."""
        warnings.warn(
            "prior_mu is deprecated; use direct_effect_prior_mean.", DeprecationWarning, stacklevel=2
        )
        return self.direct_effect_prior_mean

    @property
    def prior_omega(self) -> tuple[tuple[float, ...], ...]:
        """Deprecated name of ``direct_effect_prior_covariance`` (removed in the next release)."""
        warnings.warn(
            "prior_omega is deprecated; use direct_effect_prior_covariance.", DeprecationWarning, stacklevel=2
        )
        return self.direct_effect_prior_covariance

    def __str__(self) -> str:
        fs = self.first_stage
        lines = [
            f"Zero-first-stage check in {self.subsample}",
            _rows_line(self.row_account, self.n, self.n_dropped) + f" (subsample n = {self.n:,})",
            f"first stage of {fs.target} in the subsample (should be near zero): F = {_fmt(fs.f)}, "
            f"p = {self.first_stage_p_value:.3g}",
            *_coefficient_table((fs,), self.alpha, std_diff=False),
            f"reduced form of {self.reduced_form.target} in the subsample (an effect here points to a path other "
            "than the treatment):",
            *_coefficient_table((self.reduced_form,), self.alpha, std_diff=False)[1:],
            f"covariance: {self.vcov}",
        ]
        if self.warning:
            lines.append(f"warning: {self.warning}")
        lines.append(f"as a prior for the direct effect: {self.assumption}")
        lines.append(self.caution)
        return "\n".join(lines)


def _select_subsample(
    data: pd.DataFrame, subsample: str | None, query: str | None
) -> tuple[pd.DataFrame, str, Any]:
    import pandas as pd

    if (subsample is None) == (query is None):
        raise InvalidInputError(
            "give exactly one of subsample= (a boolean column marking the rows) or query= (a condition on "
            'columns, e.g. "broadband == 0").'
        )
    if subsample is not None:
        if subsample not in data.columns:
            raise InvalidInputError(
                f"Subsample column {subsample!r} is not in the data; name a boolean column."
            )
        col = data[subsample]
        if col.isna().any():
            raise InvalidInputError(
                f"Subsample column {subsample!r} has missing values; fill them with False."
            )
        values = set(pd.unique(col))
        if not values <= {True, False}:
            raise InvalidInputError(
                f"Subsample column {subsample!r} must be boolean (True/False or 1/0); recode it or use query=."
            )
        mask = col.astype(bool).to_numpy()
        label = f"rows where {subsample} is true"
    else:
        assert query is not None
        try:
            mask = np.asarray(data.eval(query), dtype=bool)
        except Exception as exc:  # pandas raises many types for a bad expression
            raise InvalidInputError(
                f"query {query!r} could not be evaluated ({exc}); write a condition on column names such as "
                '"broadband == 0".'
            ) from exc
        if mask.shape != (len(data),):
            raise InvalidInputError(f"query {query!r} does not give one true/false value per row.")
        label = f"rows where {query}"
    sub = data.loc[mask]
    if len(sub) == 0:
        raise InvalidInputError(f"The subsample ({label}) selects no rows; check the condition.")
    return sub, label, mask


def zero_first_stage(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instruments: str | Sequence[str],
    subsample: str | None = None,
    query: str | None = None,
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> ZeroFirstStageResult:
    """First stage (should be near zero) and reduced form of Y on Z in a subsample where Z should not move X.

    The subsample is ``subsample`` (a boolean column) or ``query`` (a pandas expression such as
    "broadband == 0"); the reduced form doubles as a local-to-zero prior (see the result's ``assumption``).
    """
    import pandas as pd
    from scipy import stats

    if not isinstance(data, pd.DataFrame):
        raise InvalidInputError(f"data must be a pandas DataFrame, got {type(data).__name__}; load it first.")
    sub, label, mask = _select_subsample(data, subsample, query)
    inst = as_names(instruments, "instruments")
    treated = pd.to_numeric(sub[treatment], errors="coerce") if treatment in sub.columns else None
    if treated is not None and treated.nunique(dropna=True) == 1:
        # The treatment cannot respond at all in the subsample (e.g. nobody there can take it up): the first
        # stage is exactly zero, the cleanest case of the design, and only the reduced form is estimated.
        exact = _zero_first_stage_exact(
            sub,
            label=label,
            n_full=len(data),
            outcome=outcome,
            treatment=treatment,
            instruments=inst,
            controls=controls,
            absorb=absorb,
            cluster=cluster,
            weights=weights,
            vcov=vcov,
            small_sample=small_sample,
            alpha=alpha,
        )
        used = [outcome, *inst, *as_names(controls, "controls"), *as_names(absorb, "absorb")]
        used += [*as_names(cluster, "cluster"), *((weights,) if weights else ())]
        account = count_rows(data, used, in_scope=mask, scope=label, n_used=exact.n)
        return replace(exact, row_account=account)
    st = _stacked(
        sub,
        targets=(treatment, outcome),
        instruments=inst,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
    )
    rows = _rows(st, std_diff=False)
    first, reduced = rows
    n_inst = len(inst)
    normal = st.dist[0] == "normal"
    fs_p = first.wald_p_value if normal else float(stats.f.sf(first.f, n_inst, st.dist[1]))
    warning = None
    if fs_p < alpha:
        warning = (
            f"the first stage in the subsample is not near zero (F = {first.f:.2f}, p = {fs_p:.3g}): the reduced "
            "form there mixes the direct effect with an effect through the treatment, so it overstates or "
            "understates gamma; choose a subsample where the treatment cannot respond"
        )
    block = slice(n_inst, 2 * n_inst)
    omega = st.cov[block, block]
    return ZeroFirstStageResult(
        subsample=label,
        n=st.n,
        n_dropped=st.n_dropped,
        n_full=len(data),
        instruments=inst,
        first_stage=first,
        first_stage_p_value=fs_p,
        reduced_form=reduced,
        direct_effect_prior_mean=tuple(map(float, st.coef[1])),
        direct_effect_prior_covariance=tuple(tuple(map(float, r)) for r in omega),
        assumption=ZERO_FIRST_STAGE_ASSUMPTION,
        warning=warning,
        vcov=vcov,
        alpha=alpha,
        caution=CAUTION,
        row_account=count_rows(data, st.columns, in_scope=mask, scope=label, n_used=st.n),
    )


ZERO_FIRST_STAGE_ASSUMPTION = (
    "in the subsample the treatment does not respond to the instrument, so the reduced form of the "
    "outcome on the instrument is its direct effect; that direct effect is assumed equal in the "
    "analysis sample (prior mean = subsample reduced form, prior covariance = its sampling covariance)"
)


def _zero_first_stage_exact(
    sub: pd.DataFrame,
    *,
    label: str,
    n_full: int,
    outcome: str,
    treatment: str,
    instruments: tuple[str, ...],
    controls: str | Sequence[str],
    absorb: str | Sequence[str],
    cluster: str | Sequence[str] | None,
    weights: str | None,
    vcov: str,
    small_sample: bool,
    alpha: float,
) -> ZeroFirstStageResult:
    """The subsample's treatment is constant: report a first stage of exactly zero and the reduced form."""
    st = _stacked(
        sub,
        targets=(outcome,),
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
    )
    (reduced,) = _rows(st, std_diff=False)
    zero = tuple(
        InstrumentCoefficient(
            instrument=z,
            coef=0.0,
            se=0.0,
            t=float("nan"),
            p_value=1.0,
            ci_lower=0.0,
            ci_upper=0.0,
            std_diff=float("nan"),
            std_diff_kind="not computed: the treatment is constant in the subsample",
        )
        for z in instruments
    )
    first = TargetRegression(
        target=treatment,
        coefficients=zero,
        wald=0.0,
        wald_df=len(instruments),
        wald_p_value=1.0,
        f=0.0,
        n=st.n,
    )
    return ZeroFirstStageResult(
        subsample=label,
        n=st.n,
        n_dropped=st.n_dropped,
        n_full=n_full,
        instruments=instruments,
        first_stage=first,
        first_stage_p_value=1.0,
        reduced_form=reduced,
        direct_effect_prior_mean=tuple(map(float, st.coef[0])),
        direct_effect_prior_covariance=tuple(tuple(map(float, r)) for r in st.cov),
        assumption=ZERO_FIRST_STAGE_ASSUMPTION + f"; here {treatment!r} is constant in the subsample, so the "
        "first stage is exactly zero",
        warning=None,
        vcov=vcov,
        alpha=alpha,
        caution=CAUTION,
    )


# ----------------------------------------------------------------------------------------------------------
# instruments one at a time
# ----------------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class JustIdentifiedEstimate(Record):
    """2SLS with one instrument alone (the other instruments left out), on the common estimation rows."""

    instrument: str
    estimate: float
    se: float
    ci_lower: float
    ci_upper: float
    first_stage_f: float
    difference_from_all: float

    def to_dict(self) -> dict[str, Any]:
        return cast(dict[str, Any], json_safe(dict(self.__dict__)))


@dataclass(frozen=True)
class PerInstrumentResult(Record):
    """Each instrument's just-identified estimate beside the over-identified 2SLS and its J/Sargan test.

    ``first_stage_f`` is the Wald F of the instrument in its own first stage with the chosen covariance. The
    over-identification test (from :mod:`ivdossier.estimation.specification`) asks whether the instruments
    agree with one another; agreement cannot show that any of them is valid.
    """

    treatment: str
    instruments: tuple[str, ...]
    rows: tuple[JustIdentifiedEstimate, ...]
    estimate_all: float
    se_all: float
    ci_all: tuple[float, float]
    overid: dict[str, Any]
    n: int
    n_dropped: int
    vcov: str
    alpha: float
    ci_reference: str
    caution: str
    row_account: RowAccount | None = None

    def to_dict(self) -> dict[str, Any]:
        skip = ("rows", "row_account")
        out = cast(dict[str, Any], json_safe({k: v for k, v in self.__dict__.items() if k not in skip}))
        out["rows"] = [r.to_dict() for r in self.rows]
        out["row_account"] = None if self.row_account is None else self.row_account.to_dict()
        out["kind"] = "per_instrument"
        return out

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g} % interval"
        head = ["instrument(s)", "2SLS", "SE", level, "first-stage F", "minus all"]
        body = [
            [
                r.instrument,
                _fmt(r.estimate),
                _fmt(r.se),
                f"[{_fmt(r.ci_lower)}, {_fmt(r.ci_upper)}]",
                _fmt(r.first_stage_f),
                _fmt(r.difference_from_all),
            ]
            for r in self.rows
        ]
        body.append(
            [
                "all together",
                _fmt(self.estimate_all),
                _fmt(self.se_all),
                f"[{_fmt(self.ci_all[0])}, {_fmt(self.ci_all[1])}]",
                "",
                "",
            ]
        )
        lines = [
            f"Each instrument alone: just-identified 2SLS of the effect of {self.treatment}",
            _rows_line(self.row_account, self.n, self.n_dropped),
            f"covariance: {self.vcov}; {self.ci_reference}",
            *_aligned(head, body),
        ]
        overid = self.overid or {}
        if overid.get("statistic") is not None:
            lines.append(
                f"over-identification ({overid.get('name') or overid.get('test') or 'J'}): "
                f"{_fmt(float(overid['statistic']))}, p = {_fmt(float(overid.get('p_value', float('nan'))))}"
                " (agreement among instruments cannot show that any of them is valid)"
            )
        lines.append(self.caution)
        return "\n".join(lines)


def per_instrument(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    instruments: Sequence[str],
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
) -> PerInstrumentResult:
    """Just-identified 2SLS for each instrument and the over-identified comparison (two or more instruments)."""
    import pandas as pd

    if not isinstance(data, pd.DataFrame):
        raise InvalidInputError(f"data must be a pandas DataFrame, got {type(data).__name__}; load it first.")
    clus = _check_common(vcov, alpha, cluster)
    vcov = cov_name(vcov)
    if not isinstance(treatment, str):
        raise InvalidInputError(
            "per_instrument takes one treatment column; pass treatment= as a single name."
        )
    inst = as_names(instruments, "instruments")
    if len(inst) < 2:
        raise InvalidInputError(
            f"per_instrument compares instruments and needs at least two, got {len(inst)}; add instruments."
        )
    ctrl, fe = as_names(controls, "controls"), as_names(absorb, "absorb")
    used = [outcome, treatment, *inst, *ctrl, *fe, *clus, *((weights,) if weights else ())]
    frame, n_dropped = _complete_rows(data, used)
    common = {"controls": ctrl, "absorb": fe, "cluster": clus, "weights": weights}
    full = prepare(frame, outcome=outcome, treatment=treatment, instruments=inst, **common)  # type: ignore[arg-type]
    cp, counts, model = sufficient_statistics(
        full, vcov=vcov, small_sample=small_sample, alpha=alpha, n_dropped=n_dropped
    )
    return replace(per_instrument_from(cp, counts, model), row_account=count_rows(data, used, n_used=full.n))


def per_instrument_from(cp: CrossProducts, counts: SampleCounts, model: ModelSpec) -> PerInstrumentResult:
    """Each instrument's just-identified 2SLS, its own first-stage F and the over-identified comparison, from
    the sufficient statistics of the model with every instrument (:meth:`CrossProducts.subset`)."""
    from ivdossier.estimation.specification import overid_from

    two_sls = dataclasses.replace(model, method="2sls")
    res_all = result_from_cross_products(cp, counts, two_sls, diagnostics=False)
    overid = overid_from(cp, beta=res_all.coef)
    rows = []
    for j, z in enumerate(model.instruments):
        one = cp.subset([j], [0])
        res = result_from_cross_products(
            one, counts, dataclasses.replace(two_sls, instruments=(z,)), diagnostics=False
        )
        # first stage of the treatment on this instrument alone: OLS in the sub-model's coordinates
        rz, rx = one.coords(one.iz), one.coords(one.ix)
        b = rx[0, 0] / rz[0, 0]
        fs_resid = rx.copy()
        fs_resid[0] = 0.0
        fs_var = one.covariance(rz, fs_resid, np.array([[1.0 / rz[0, 0] ** 2]]), 1)[0, 0]
        rows.append(
            JustIdentifiedEstimate(
                instrument=z,
                estimate=float(res.coef[0]),
                se=float(res.se[0]),
                ci_lower=float(res.ci[0, 0]),
                ci_upper=float(res.ci[0, 1]),
                first_stage_f=float(b**2 / fs_var),
                difference_from_all=float(res.coef[0] - res_all.coef[0]),
            )
        )
    return PerInstrumentResult(
        treatment=model.treatment[0],
        instruments=model.instruments,
        rows=tuple(rows),
        estimate_all=float(res_all.coef[0]),
        se_all=float(res_all.se[0]),
        ci_all=(float(res_all.ci[0, 0]), float(res_all.ci[0, 1])),
        overid=cast(dict[str, Any], json_safe(overid.to_dict())),
        n=counts.n,
        n_dropped=counts.n_dropped,
        vcov=model.vcov,
        alpha=model.alpha,
        ci_reference=res_all.ci_reference,
        caution=CAUTION,
    )
