"""Public entry point: validate a model specification, estimate it and attach the weak-instrument diagnostics.

:func:`estimate` is the checked path for users; :func:`estimate_prepared` starts from validated data and
:func:`fit_arrays` is the bare numeric core (no validation, no diagnostics) for resampling code.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.absorb import partial_out
from ivdossier.estimation.covariance import CovKind, CovSpec, cov_name, sandwich
from ivdossier.estimation.crossproducts import CrossProducts, build
from ivdossier.estimation.data import PreparedData, prepare, read_columns
from ivdossier.estimation.diagnostics import DiagnosticSuite, unidentified_reason
from ivdossier.estimation.estimators import (
    KClassFit,
    fit_from_cross_products,
    ols_from_cross_products,
)
from ivdossier.estimation.linalg import one_blas_thread
from ivdossier.estimation.result import EstimationResult
from ivdossier.estimation.spec import ModelSpec, check_options
from ivdossier.vocabulary import NotApplicable

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]

OLS_REASON = "OLS uses no excluded instruments, so first-stage and weak-instrument diagnostics do not apply"


def conventions(vcov: str, small_sample: bool) -> dict[str, str]:
    """The small-sample and estimator conventions used, in words (stored with every result)."""
    p = "p = intercept + controls + absorbed fixed-effect levels"
    out = {
        "small_sample": "applied" if small_sample else "not applied (large-sample formulas)",
        "estimator": "k-class: beta = [X'(I - kappa M_Z)X]^-1 X'(I - kappa M_Z)y on partialled data",
        "fuller": "kappa = kappa_LIML - alpha / (n - K), K = all instruments incl. controls and FE levels",
        "bread": "[X'(I - kappa M_Z)X]^-1; robust and cluster scores use P_Z X times the residual",
        "weights": "analytic weights: all columns multiplied by sqrt(w) after weighted partialling",
        "partialled": "controls and fixed effects are partialled out (Frisch-Waugh-Lovell); their "
        "coefficients are not reported",
        "absorbed_df": "one fixed effect: its levels; two: L1 + L2 - connected components; more: "
        "L1 + sum_j (Lj - components with the first), conservative",
    }
    vcov = cov_name(vcov)
    if vcov == "homoskedastic":
        out["vcov"] = f"sigma^2 = e'e / (n - k - p), {p}" if small_sample else "sigma^2 = e'e / n"
    elif vcov == "heteroskedastic":
        out["vcov"] = f"HC1, meat times n / (n - k - p), {p}" if small_sample else "HC0"
    else:
        out["vcov"] = (
            "cluster sums of scores times G/(G-1) * (n-1)/(n - k - p + nested), nested = absorbed levels "
            "nested in a cluster; two-way: V1 + V2 - V12 (Cameron-Gelbach-Miller), no eigenvalue fix"
            if small_sample
            else "cluster sums of scores, no factor; two-way: V1 + V2 - V12"
        )
    if not small_sample:
        out["intervals"] = "normal quantiles"
    elif vcov == "clustered":
        out["intervals"] = "t quantiles with G - 1 degrees of freedom (smallest G for two-way)"
    else:
        out["intervals"] = "t quantiles with n - k - p degrees of freedom"
    return out


def estimate(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str | Sequence[str],
    instruments: str | Sequence[str] = (),
    controls: str | Sequence[str] = (),
    absorb: str | Sequence[str] = (),
    cluster: str | Sequence[str] | None = None,
    weights: str | None = None,
    method: str = "2sls",
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
    fuller_alpha: float = 1.0,
    report_controls: bool = False,
) -> EstimationResult:
    """Estimate the effect of ``treatment`` on ``outcome`` and return coefficients with diagnostics.

    ``method`` is one of "ols", "2sls", "liml", "fuller"; ``vcov`` one of "homoskedastic", "heteroskedastic", "clustered"
    (the last needs ``cluster``, one or two column names). Conventions are listed in ``result.conventions``.
    ``report_controls=True`` also reports the intercept and control coefficients and the R^2
    (``result.controls_table``), from one extra fit of the full equation. The keywords build one
    :class:`~ivdossier.estimation.spec.ModelSpec`, validated as on every other path.
    """
    spec = ModelSpec.build(
        outcome=outcome,
        treatment=treatment,
        instruments=instruments,
        controls=controls,
        absorb=absorb,
        cluster=cluster,
        weights=weights,
        method=method,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
        fuller_alpha=fuller_alpha,
    )
    return estimate_spec(data, spec, report_controls=report_controls)


def prepare_spec(data: pd.DataFrame, spec: ModelSpec) -> PreparedData:
    """Check the spec's columns in the data and partial out its controls and fixed effects."""
    if spec.outcome is None:
        raise InvalidInputError("an estimate needs outcome=; name the outcome column.")
    return prepare(
        data,
        outcome=spec.outcome,
        treatment=spec.treatment,
        instruments=spec.instruments,
        controls=spec.controls,
        absorb=spec.absorb,
        cluster=spec.cluster,
        weights=spec.weights,
        require_instruments=spec.method != "ols",
    )


def estimate_spec(data: pd.DataFrame, spec: ModelSpec, *, report_controls: bool = False) -> EstimationResult:
    """Estimate a validated model spec on a data frame, with every diagnostic that applies."""
    with one_blas_thread():
        return _estimate(data, spec, report_controls=report_controls)


def _estimate(data: pd.DataFrame, spec: ModelSpec, *, report_controls: bool) -> EstimationResult:
    import pandas as pd

    result = _estimate_one_pass(data, spec)
    if result is None:
        prepared = prepare_spec(data, spec)
        result = estimate_prepared(
            prepared,
            method=spec.method,
            vcov=spec.vcov,
            small_sample=spec.small_sample,
            alpha=spec.alpha,
            fuller_alpha=spec.fuller_alpha,
        )
    if not report_controls or result.identification is not None:
        return result
    assert spec.outcome is not None  # checked by both paths above
    method, vcov, small_sample = spec.method, cov_name(spec.vcov), spec.small_sample
    outcome, inst, clus, weights = spec.outcome, list(spec.instruments), list(spec.cluster), spec.weights
    used = [outcome, *spec.treatment, *inst, *spec.controls, *spec.absorb, *clus]
    used += [weights] if weights else []
    rows = data[list(dict.fromkeys(used))].notna().all(axis=1).to_numpy()
    frame = data[rows]

    def cols(names: Sequence[str]) -> Array:
        if not names:
            return np.zeros((len(frame), 0))
        return np.column_stack([frame[c].to_numpy(dtype=np.float64) for c in names])

    from ivdossier.estimation.controls import controls_fit

    clusters = tuple(pd.factorize(frame[c])[0].astype(np.int64) for c in clus)
    table = controls_fit(
        frame[outcome].to_numpy(dtype=np.float64),
        cols(spec.treatment),
        cols(inst) if inst else None,
        cols(spec.controls),
        treatment_names=spec.treatment,
        control_names=spec.controls,
        method=method,
        beta=result.coef,
        spec=CovSpec(cast(CovKind, vcov), clusters if vcov == "clustered" else (), small_sample),
        fe_codes=[pd.factorize(frame[c])[0].astype(np.int64) for c in spec.absorb],
        weights=frame[weights].to_numpy(dtype=np.float64) if weights else None,
        n_absorbed=result.n_absorbed,
        n_absorbed_nested=result.n_absorbed_nested,
    )
    return dataclasses.replace(result, controls_table=table)


def _estimate_one_pass(data: pd.DataFrame, spec: ModelSpec) -> EstimationResult | None:
    """The result by the two-pass route of :mod:`ivdossier.estimation.onepass`, or None when its rule sends the
    model to the exact path (prepare, then build)."""
    from ivdossier.estimation.onepass import one_pass_cross_products

    if spec.absorb or spec.outcome is None:
        return None
    vcov = cov_name(spec.vcov)
    check_options(spec.method, vcov, spec.cluster, spec.alpha, spec.fuller_alpha)
    cols = read_columns(
        data,
        outcome=spec.outcome,
        treatment=spec.treatment,
        instruments=spec.instruments,
        controls=spec.controls,
        cluster=spec.cluster,
        weights=spec.weights,
        require_instruments=spec.method != "ols",
        check_finite=False,
    )
    cp, _ = one_pass_cross_products(
        cols, kind=vcov, small_sample=spec.small_sample, instruments=spec.method != "ols"
    )
    if cp is None:
        return None
    counts = SampleCounts(
        n=cols.n,
        n_dropped=cols.n_dropped,
        n_partialled=cp.n_partialled,
        n_partialled_nested=0,
        n_absorbed=0,
        fe_levels=(),
        n_clusters=cols.cl_levels if vcov == "clustered" else (),
    )
    model = ModelSpec.build(
        outcome=spec.outcome,
        treatment=spec.treatment,
        instruments=spec.instruments if spec.method != "ols" else (),
        controls=spec.controls,
        cluster=spec.cluster or None,
        weights=spec.weights,
        method=spec.method,
        vcov=vcov,
        small_sample=spec.small_sample,
        alpha=spec.alpha,
        fuller_alpha=spec.fuller_alpha,
    )
    return result_from_cross_products(cp, counts, model)


def interval_quantile(
    vcov: str, small_sample: bool, df_resid: int, n_clusters: tuple[int, ...], alpha: float
) -> tuple[float, str, int | None]:
    """The quantile of the coefficient intervals, its description and its degrees of freedom (None: normal).

    t with n - k - p degrees of freedom (G - 1, smallest G, with clusters) when ``small_sample``, else normal.
    """
    from ivdossier.estimation.distributions import norm_ppf, t_ppf

    clustered = cov_name(vcov) == "clustered"
    df = None if not small_sample else (min(n_clusters) - 1 if clustered else df_resid)
    if df is None:
        return norm_ppf(1 - alpha / 2), "normal quantiles", None
    return t_ppf(1 - alpha / 2, df), f"t quantiles with {df} degrees of freedom", df


@dataclass(frozen=True)
class SampleCounts:
    """What a result states about its rows beside the cross-products: rows used and dropped, partialled
    columns (and those nested in a cluster), absorbed levels per factor and clusters per dimension."""

    n: int
    n_dropped: int
    n_partialled: int
    n_partialled_nested: int
    n_absorbed: int
    fe_levels: tuple[int, ...]
    n_clusters: tuple[int, ...]


def estimate_prepared(
    prepared: PreparedData,
    *,
    method: str = "2sls",
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
    fuller_alpha: float = 1.0,
    diagnostics: bool = True,
) -> EstimationResult:
    """Estimate from validated, partialled data; ``diagnostics=False`` skips the weak-instrument suite."""
    vcov = cov_name(vcov)
    with one_blas_thread():
        check_options(method, vcov, prepared.cluster, alpha, fuller_alpha)
        cp, counts, model = sufficient_statistics(
            prepared,
            method=method,
            vcov=vcov,
            small_sample=small_sample,
            alpha=alpha,
            fuller_alpha=fuller_alpha,
        )
        return result_from_cross_products(cp, counts, model, diagnostics=diagnostics)


def sufficient_statistics(
    prepared: PreparedData,
    *,
    method: str = "2sls",
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    alpha: float = 0.05,
    fuller_alpha: float = 1.0,
    n_dropped: int | None = None,
) -> tuple[CrossProducts, SampleCounts, ModelSpec]:
    """The cross-products of validated, partialled data with the counts and the model spec that go with them:
    what :func:`result_from_cross_products` and the analyses built on the same sums take. ``n_dropped`` overrides
    the prepared data's count when rows were dropped before preparing."""
    vcov = cov_name(vcov)
    spec = CovSpec(cast(CovKind, vcov), prepared.clusters if vcov == "clustered" else (), small_sample)
    cp = build(
        prepared.Z if method != "ols" else np.zeros((prepared.X.shape[0], 0)),
        prepared.X,
        prepared.y,
        spec,
        n_partialled=prepared.n_partialled,
        n_partialled_nested=prepared.n_partialled_nested,
    )
    counts = SampleCounts(
        n=prepared.X.shape[0],
        n_dropped=prepared.n_dropped if n_dropped is None else n_dropped,
        n_partialled=prepared.n_partialled,
        n_partialled_nested=prepared.n_partialled_nested,
        n_absorbed=prepared.n_absorbed,
        fe_levels=prepared.fe_levels,
        n_clusters=spec.n_clusters(),
    )
    model = ModelSpec.build(
        outcome=prepared.outcome,
        treatment=prepared.treatment,
        instruments=prepared.instruments if method != "ols" else (),
        controls=prepared.controls,
        absorb=prepared.absorb,
        cluster=prepared.cluster or None,
        weights=prepared.weights,
        method=method,
        vcov=vcov,
        small_sample=small_sample,
        alpha=alpha,
        fuller_alpha=fuller_alpha,
    )
    return cp, counts, model


def result_from_cross_products(
    cp: CrossProducts, counts: SampleCounts, model: ModelSpec, *, diagnostics: bool = True
) -> EstimationResult:
    """The estimation result (coefficients, covariance, intervals and the diagnostic suite) from the sufficient
    statistics alone: the one path from cross-products to numbers, whether they were built in memory or summed
    by an SQL engine. ``diagnostics=False`` skips the weak-instrument suite (for resampling and comparisons)."""
    from ivdossier.estimation.diagnostics import suite_from
    from ivdossier.estimation.strength import require_distinct_instruments

    n, k = counts.n, len(model.treatment)
    df_resid = n - k - counts.n_partialled
    method, vcov, alpha = model.method, model.vcov, model.alpha
    common: dict[str, Any] = {
        "method": method,
        "vcov": vcov,
        "outcome": model.outcome,
        "names": model.treatment,
        "alpha": alpha,
        "n": n,
        "n_dropped": counts.n_dropped,
        "n_clusters": counts.n_clusters,
        "df_resid": df_resid,
        "n_partialled": counts.n_partialled,
        "n_absorbed": counts.n_absorbed,
        "n_absorbed_nested": counts.n_partialled_nested,
        "fe_levels": counts.fe_levels,
        "spec": model.echo(),
        "conventions": conventions(vcov, model.small_sample),
    }
    q, ci_ref, ref_df = interval_quantile(vcov, model.small_sample, df_resid, counts.n_clusters, alpha)
    names, inst = list(model.treatment), list(model.instruments)
    if method == "ols":
        mfit = ols_from_cross_products(cp)
    else:
        unident = unidentified_reason(cp, names, inst)
        if unident is not None:
            # no coefficients when the effect is not identified; the AR test and set are still reported
            nan = np.full(k, np.nan)
            return EstimationResult(
                coef=nan,
                se=nan.copy(),
                cov=np.full((k, k), np.nan),
                ci=np.full((k, 2), np.nan),
                ci_reference=ci_ref,
                ref_df=ref_df,
                kappa=float("nan"),
                kappa_liml=None,
                sigma=float("nan"),
                diagnostics=suite_from(
                    cp,
                    beta=nan,
                    method=method,
                    kappa=float("nan"),
                    endog_names=names,
                    instrument_names=inst,
                    alpha=alpha,
                ),
                identification=unident,
                **common,
            )
        mfit = fit_from_cross_products(cp, method=method, fuller_alpha=model.fuller_alpha)
    beta, cov = mfit.beta, mfit.cov
    se = np.sqrt(np.diag(cov))
    ci = np.column_stack([beta - q * se, beta + q * se])
    suite: DiagnosticSuite | NotApplicable | None = NotApplicable(OLS_REASON) if method == "ols" else None
    if diagnostics and method != "ols":
        try:
            require_distinct_instruments(cp, inst)
            suite = suite_from(
                cp,
                beta=beta,
                method=method,
                kappa=mfit.kappa,
                endog_names=names,
                instrument_names=inst,
                alpha=alpha,
            )
        except EstimationError as exc:
            # e.g. no more clusters than instruments: the coefficients stand, the diagnostics cannot be had
            suite = NotApplicable(f"instrument diagnostics not computed: {exc}")
    return EstimationResult(
        coef=beta,
        se=se,
        cov=cov,
        ci=ci,
        ci_reference=ci_ref,
        ref_df=ref_df,
        kappa=mfit.kappa,
        kappa_liml=mfit.kappa_liml,
        sigma=float(np.sqrt(mfit.ssr / df_resid)),
        diagnostics=suite,
        **common,
    )


def covariance_of(fit: KClassFit, spec: CovSpec, *, n_partialled: int, n_nested: int = 0) -> Array:
    """Covariance of a k-class fit's coefficients under ``spec`` (see the conventions in estimators.py)."""
    return sandwich(
        fit.score_regressors,
        fit.resid,
        spec,
        n_partialled=n_partialled,
        bread=fit.bread,
        n_partialled_nested=n_nested,
    )


def fit_arrays(
    y: np.ndarray,
    X: np.ndarray,
    Z: np.ndarray | None,
    *,
    controls: np.ndarray | None = None,
    fe_codes: Sequence[np.ndarray] = (),
    weights: np.ndarray | None = None,
    clusters: Sequence[np.ndarray] = (),
    method: str = "2sls",
    vcov: str = "heteroskedastic",
    small_sample: bool = True,
    fuller_alpha: float = 1.0,
) -> tuple[Array, Array]:
    """Coefficients and covariance from raw arrays, without validation or diagnostics (for resampling), by
    the same sufficient statistics as :func:`estimate` (one partialling pass, then :class:`CrossProducts`).

    Cluster and fixed-effect codes must be int64 arrays 0..G-1; the caller guarantees complete, finite data.
    """
    vcov = cov_name(vcov)
    yv = np.asarray(y, dtype=np.float64).reshape(-1, 1)
    x = np.asarray(X, dtype=np.float64)
    x = x[:, None] if x.ndim == 1 else x
    k = x.shape[1]
    parts = [yv, x]
    if Z is not None:
        z = np.asarray(Z, dtype=np.float64)
        parts.append(z[:, None] if z.ndim == 1 else z)
    absorbed = partial_out(
        np.column_stack(parts),
        controls=controls,
        fe_codes=fe_codes,
        weights=weights,
        cluster_codes=clusters if vcov == "clustered" else (),
    )
    cols = absorbed.columns
    spec = CovSpec(cast(CovKind, vcov), tuple(clusters) if vcov == "clustered" else (), small_sample)
    with one_blas_thread():
        cp = build(
            cols[:, 1 + k :] if Z is not None else np.zeros((cols.shape[0], 0)),
            cols[:, 1 : 1 + k],
            cols[:, 0],
            spec,
            n_partialled=absorbed.n_partialled,
            n_partialled_nested=absorbed.n_absorbed_nested,
        )
        if method == "ols":
            mfit = ols_from_cross_products(cp)
        else:
            if Z is None:
                raise InvalidInputError(
                    f"Method {method!r} needs excluded instruments; pass instruments or use 'ols'."
                )
            mfit = fit_from_cross_products(cp, method=method, fuller_alpha=fuller_alpha)
    return mfit.beta, mfit.cov
