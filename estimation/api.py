"""Public entry point: validate a model specification, estimate it and attach the weak-instrument diagnostics.

:func:`estimate` is the checked path for users; :func:`estimate_prepared` starts from validated data and
:func:`fit_arrays` is the bare numeric core (no validation, no diagnostics) for resampling code.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import cast

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from scipy import stats

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.absorb import partial_out
from ivdossier.estimation.covariance import CovKind, CovSpec, sandwich
from ivdossier.estimation.data import PreparedData, prepare
from ivdossier.estimation.diagnostics import DiagnosticSuite, weak_iv_suite
from ivdossier.estimation.estimators import KClassFit, fit_kclass
from ivdossier.estimation.result import EstimationResult
from ivdossier.estimation.spec import ModelSpec, check_options
from ivdossier.vocabulary import NotApplicable

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
    if vcov == "unadjusted":
        out["vcov"] = f"sigma^2 = e'e / (n - k - p), {p}" if small_sample else "sigma^2 = e'e / n"
    elif vcov == "robust":
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
    elif vcov == "cluster":
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
    vcov: str = "robust",
    small_sample: bool = True,
    alpha: float = 0.05,
    fuller_alpha: float = 1.0,
) -> EstimationResult:
    """Estimate the effect of ``treatment`` on ``outcome`` and return coefficients with diagnostics.

    ``method`` is one of "ols", "2sls", "liml", "fuller"; ``vcov`` one of "unadjusted", "robust", "cluster"
    (the last needs ``cluster``, one or two column names). Conventions are listed in ``result.conventions``.
    The keywords build one :class:`~ivdossier.estimation.spec.ModelSpec`, validated as on every other path.
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
    return estimate_spec(data, spec)


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


def estimate_spec(data: pd.DataFrame, spec: ModelSpec) -> EstimationResult:
    """Estimate a validated model spec on a data frame, with every diagnostic that applies."""
    return estimate_prepared(
        prepare_spec(data, spec),
        method=spec.method,
        vcov=spec.vcov,
        small_sample=spec.small_sample,
        alpha=spec.alpha,
        fuller_alpha=spec.fuller_alpha,
    )


def _interval_quantile(
    vcov: str, small_sample: bool, df_resid: int, n_clusters: tuple[int, ...], alpha: float
) -> tuple[float, str, int | None]:
    df = None if not small_sample else (min(n_clusters) - 1 if vcov == "cluster" else df_resid)
    if df is None:
        return float(stats.norm.ppf(1 - alpha / 2)), "normal quantiles", None
    return float(stats.t.ppf(1 - alpha / 2, df)), f"t quantiles with {df} degrees of freedom", df


def estimate_prepared(
    prepared: PreparedData,
    *,
    method: str = "2sls",
    vcov: str = "robust",
    small_sample: bool = True,
    alpha: float = 0.05,
    fuller_alpha: float = 1.0,
    diagnostics: bool = True,
) -> EstimationResult:
    """Estimate from validated, partialled data; ``diagnostics=False`` skips the weak-instrument suite."""
    check_options(method, vcov, prepared.cluster, alpha, fuller_alpha)
    spec = CovSpec(cast(CovKind, vcov), prepared.clusters if vcov == "cluster" else (), small_sample)
    fit = fit_kclass(
        prepared.y,
        prepared.X,
        prepared.Z if method != "ols" else None,
        method=method,
        n_partialled=prepared.n_partialled,
        fuller_alpha=fuller_alpha,
    )
    cov = covariance_of(fit, spec, n_partialled=prepared.n_partialled, n_nested=prepared.n_partialled_nested)
    se = np.sqrt(np.diag(cov))
    n, k = prepared.X.shape
    df_resid = n - k - prepared.n_partialled
    n_clusters = spec.n_clusters()
    q, ci_ref, ref_df = _interval_quantile(vcov, small_sample, df_resid, n_clusters, alpha)
    ci = np.column_stack([fit.beta - q * se, fit.beta + q * se])
    suite: DiagnosticSuite | NotApplicable | None = NotApplicable(OLS_REASON) if method == "ols" else None
    if diagnostics and method != "ols":
        try:
            suite = weak_iv_suite(
                prepared.y,
                prepared.X,
                prepared.Z,
                spec=spec,
                n_partialled=prepared.n_partialled,
                n_partialled_nested=prepared.n_partialled_nested,
                beta=fit.beta,
                method=method,
                kappa=fit.kappa,
                endog_names=list(prepared.treatment),
                instrument_names=list(prepared.instruments),
                alpha=alpha,
            )
        except EstimationError as exc:
            # e.g. no more clusters than instruments: the coefficients stand, the diagnostics cannot be had
            suite = NotApplicable(f"instrument diagnostics not computed: {exc}")
    echo = {
        "outcome": prepared.outcome,
        "treatment": list(prepared.treatment),
        "instruments": list(prepared.instruments),
        "controls": list(prepared.controls),
        "absorb": list(prepared.absorb),
        "cluster": list(prepared.cluster),
        "weights": prepared.weights,
        "method": method,
        "vcov": vcov,
        "small_sample": small_sample,
        "alpha": alpha,
        "fuller_alpha": fuller_alpha,
    }
    return EstimationResult(
        method=method,
        vcov=vcov,
        outcome=prepared.outcome,
        names=prepared.treatment,
        coef=fit.beta,
        se=se,
        cov=cov,
        ci=ci,
        alpha=alpha,
        n=n,
        n_dropped=prepared.n_dropped,
        n_clusters=n_clusters,
        df_resid=df_resid,
        ci_reference=ci_ref,
        ref_df=ref_df,
        kappa=fit.kappa,
        kappa_liml=fit.kappa_liml,
        sigma=float(np.sqrt(fit.resid @ fit.resid / df_resid)),
        n_partialled=prepared.n_partialled,
        n_absorbed=prepared.n_absorbed,
        n_absorbed_nested=prepared.n_partialled_nested,
        fe_levels=prepared.fe_levels,
        spec=echo,
        conventions=conventions(vcov, small_sample),
        diagnostics=suite,
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
    vcov: str = "robust",
    small_sample: bool = True,
    fuller_alpha: float = 1.0,
) -> tuple[Array, Array]:
    """Coefficients and covariance from raw arrays, without validation or diagnostics (for resampling).

    Cluster and fixed-effect codes must be int64 arrays 0..G-1; the caller guarantees complete, finite data.
    """
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
        cluster_codes=clusters if vcov == "cluster" else (),
    )
    cols = absorbed.columns
    fit = fit_kclass(
        cols[:, 0],
        cols[:, 1 : 1 + k],
        cols[:, 1 + k :] if Z is not None else None,
        method=method,
        n_partialled=absorbed.n_partialled,
        fuller_alpha=fuller_alpha,
    )
    spec = CovSpec(cast(CovKind, vcov), tuple(clusters) if vcov == "cluster" else (), small_sample)
    cov = covariance_of(fit, spec, n_partialled=absorbed.n_partialled, n_nested=absorbed.n_absorbed_nested)
    return fit.beta, cov
