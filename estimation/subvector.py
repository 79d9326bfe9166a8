"""Anderson–Rubin inference on one coefficient when there are several endogenous treatments.

Let treatment j be of interest and the other m_W treatments be unrestricted nuisance coefficients.

* Unadjusted covariance: the subvector AR statistic of Guggenberger, Kleibergen, Mavroeidis and Chen (2012,
  Econometrica) minimises the AR statistic over the nuisance coefficients,
  AR_sub(b) = (n - L - p) * lambda_min(B(b)^-1 A(b)) with Y(b) = [y - x_j b, X_W], A = Y'P_Z Y and
  B = Y'M_Z Y, and is referred to chi2(L - m_W) (here in F form, AR_sub / (L - m_W) against
  F(L - m_W, n - L - p), which reduces to the usual AR F test when m_W = 0). With one nuisance treatment
  (m_W = 1) the conditional test of Guggenberger, Kleibergen and Mavroeidis (2019, Quantitative Economics) is
  also reported: given the largest root kappa_max = (n - L - p) lambda_max, the p-value is
  P(kappa_min > AR_sub | kappa_max) under the approximate conditional density proportional to
  exp(-x/2) x^((L - m_W - 2)/2) sqrt(kappa_max - x) on [0, kappa_max] (their (A.21) with k - m_W in place of
  k - 1), integrated numerically. It is not computed for m_W > 1 (the paper's theory covers m_W = 1).
* Robust or cluster covariance: the minimum over the nuisance coefficients of the joint AR Wald statistic
  (same sandwich covariance as robust_inference.py) gives the projection test and set: referred to the joint
  critical value L F(L, d), it is conservative but valid under heteroskedasticity and clustering.

Sets are inverted on an angle grid b = tan(theta) with brentq refinement (robust_inference.invert_on_circle);
every statistic is homogeneous in (cos theta, sin theta), so b = +/- infinity is a grid point.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.covariance import CovSpec, cov_name, sandwich
from ivdossier.estimation.fragility_data import CAUTION
from ivdossier.estimation.robust_inference import Interval, angle_grid, classify_set, invert_on_circle
from ivdossier.estimation.strength import as_matrix, denominator_df, ols
from ivdossier.jsonsafe import Record, json_safe

Array = NDArray[np.float64]
SOURCES = (
    "Guggenberger, Kleibergen, Mavroeidis and Chen (2012), On the Asymptotic Sizes of Subset Anderson-Rubin "
    "and Lagrange Multiplier Tests in Linear Instrumental Variables Regression, Econometrica",
    "Guggenberger, Kleibergen and Mavroeidis (2019), A More Powerful Subvector Anderson Rubin Test in Linear "
    "Instrumental Variables Regression, Quantitative Economics",
)


def gkm_conditional_p_value(statistic: float, kappa_max: float, k_minus_mw: int) -> float:
    """P(kappa_min > statistic | kappa_max) under the approximate conditional density of GKM (2019, A.21).

    Density on [0, kappa_max] proportional to exp(-x/2) x^((k' - 3)/2) sqrt(kappa_max - x) with
    k' = k - m_W + 1; integrated after the substitution x = u^2, which removes the singularity at 0.
    """
    from scipy import integrate

    if k_minus_mw < 1:
        raise InvalidInputError(f"k - m_W must be at least 1, got {k_minus_mw}.")
    if statistic <= 0:
        return 1.0
    if statistic >= kappa_max:
        return 0.0
    kp = k_minus_mw + 1

    def dens(u: float) -> float:
        x = u * u
        return 2.0 * math.exp(-x / 2) * u ** (kp - 2) * math.sqrt(max(kappa_max - x, 0.0))

    top = math.sqrt(kappa_max)
    cut = math.sqrt(statistic)
    upper, _ = integrate.quad(dens, cut, top, limit=200)
    lower, _ = integrate.quad(dens, 0.0, cut, limit=200)
    total = upper + lower
    return float(min(max(upper / total, 0.0), 1.0)) if total > 0 else 0.0


@dataclass(frozen=True)
class SubvectorAR(Record):
    """Anderson–Rubin test and set for one treatment's coefficient with the others unrestricted."""

    applicable: bool
    reason: str | None
    treatment: str | None = None
    nuisance: tuple[str, ...] = ()
    null: float | None = None
    alpha: float | None = None
    cov_kind: str | None = None
    version: str | None = None
    statistic: float | None = None
    df: tuple[int, int] | None = None
    p_value: float | None = None
    intervals: list[Interval] | None = None
    shape: str | None = None
    conditional_p_value: float | None = None
    conditional_intervals: list[Interval] | None = None
    conditional_reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict; set ends "inf"/"-inf" when unbounded."""

        def sets(iv: list[Interval] | None) -> Any:
            return None if iv is None else [json_safe(list(i)) for i in iv]

        return {
            "applicable": self.applicable,
            "reason": self.reason,
            "treatment": self.treatment,
            "unrestricted": list(self.nuisance),
            "null": json_safe(self.null),
            "confidence_level": None if self.alpha is None else 1 - self.alpha,
            "cov": self.cov_kind,
            "version": self.version,
            "statistic": json_safe(self.statistic),
            "statistic_form": "F (minimised AR / degrees of freedom)",
            "df": None if self.df is None else list(self.df),
            "p_value": json_safe(self.p_value),
            "confidence_set": sets(self.intervals),
            "shape": self.shape,
            "conditional_p_value": json_safe(self.conditional_p_value),
            "conditional_confidence_set": sets(self.conditional_intervals),
            "conditional_reason": self.conditional_reason,
            "caution": CAUTION,
            "sources": list(SOURCES),
        }

    def __str__(self) -> str:
        if not self.applicable:
            return f"Subvector Anderson–Rubin: not applicable ({self.reason})"

        def fmt(iv: list[Interval] | None) -> str:
            if iv is None:
                return "not computed"
            return "empty" if not iv else " U ".join(f"[{a:.4g}, {b:.4g}]" for a, b in iv)

        level = f"{100 * (1 - (self.alpha or 0.05)):g}%"
        lines = [
            f"Anderson–Rubin for {self.treatment} with {', '.join(self.nuisance) or 'no other treatment'} "
            f"unrestricted ({self.version})",
            f"  H0 beta = {self.null:g}: F = {self.statistic:.4g}, p = {self.p_value:.4f}; {level} set {fmt(self.intervals)}",
        ]
        if self.conditional_p_value is not None:
            lines.append(
                f"  conditional critical values (GKM 2019): p = {self.conditional_p_value:.4f}; "
                f"{level} set {fmt(self.conditional_intervals)}"
            )
        elif self.conditional_reason:
            lines.append(f"  conditional critical values: {self.conditional_reason}")
        return "\n".join(lines)


class _Homoskedastic:
    """Roots of B(b)^-1 A(b) from the cross-products of [y, X] with and without projection on Z."""

    def __init__(self, y: Array, x: Array, z: Array, j: int) -> None:
        w0 = np.column_stack([y, x])
        zw = z.T @ w0
        self.a = zw.T @ np.linalg.solve(z.T @ z, zw)
        self.b = w0.T @ w0 - self.a
        m = x.shape[1]
        self.j = j
        self.others = [k for k in range(m) if k != j]

    def roots(self, theta: float) -> Array:
        import scipy.linalg

        c, s = math.cos(theta), math.sin(theta)
        m1 = 1 + len(self.others) + 1
        t = np.zeros((m1, 1 + len(self.others)))
        t[0, 0] = c
        t[1 + self.j, 0] = -s
        for col, k in enumerate(self.others, start=1):
            t[1 + k, col] = 1.0
        return np.asarray(
            scipy.linalg.eigh(t.T @ self.a @ t, t.T @ self.b @ t, eigvals_only=True), dtype=np.float64
        )


class _Projection:
    """Joint AR Wald statistic from reduced-form coefficients and their sandwich covariance."""

    def __init__(
        self, y: Array, x: Array, z: Array, spec: CovSpec, n_partialled: int, nested: int, j: int
    ) -> None:
        coef, resid = ols(z, np.column_stack([y, x]))
        self.pi = coef  # L x (1 + m)
        self.v = sandwich(z, resid, spec, n_partialled=n_partialled, n_partialled_nested=nested)
        self.n_inst = z.shape[1]
        self.j = j
        self.others = [k for k in range(x.shape[1]) if k != j]

    def wald(self, c: Array) -> float:
        n_l = self.n_inst
        g = self.pi @ c
        k = c.size
        w = np.zeros((n_l, n_l))
        for a in range(k):
            for b in range(k):
                w += c[a] * c[b] * self.v[a * n_l : (a + 1) * n_l, b * n_l : (b + 1) * n_l]
        try:
            return float(g @ np.linalg.solve(w, g))
        except np.linalg.LinAlgError:
            return math.inf

    def coefs(self, theta: float, gamma: Array) -> Array:
        c = np.zeros(1 + 1 + len(self.others))
        c[0] = math.cos(theta)
        c[1 + self.j] = -math.sin(theta)
        for i, k in enumerate(self.others):
            c[1 + k] = -gamma[i]
        return c

    def minimum(self, theta: float, starts: list[Array]) -> float:
        from scipy import optimize

        if not self.others:
            return self.wald(self.coefs(theta, np.zeros(0)))
        best = math.inf
        for s0 in starts:
            res = optimize.minimize(lambda gm: self.wald(self.coefs(theta, gm)), s0, method="BFGS")
            best = min(best, float(res.fun))
        return best


def subvector_anderson_rubin(
    y: np.ndarray,
    x: np.ndarray,
    z: np.ndarray,
    *,
    index: int,
    spec: CovSpec,
    n_partialled: int,
    n_partialled_nested: int = 0,
    alpha: float = 0.05,
    null: float = 0.0,
    names: tuple[str, ...] | None = None,
    confidence_set: bool = True,
) -> SubvectorAR:
    """AR test of H0: beta_index = null with the other treatments unrestricted, and its (1 - alpha) set.

    Arrays are partialled (Frisch–Waugh–Lovell) as everywhere in estimation/; ``index`` picks the treatment
    column of ``x``. Unadjusted covariance: subvector AR (plus the GKM conditional version when one other
    treatment is unrestricted); robust or cluster covariance: the projection test and set.
    """
    from scipy import stats

    ym, xm, zm = as_matrix(y, "y"), as_matrix(x, "X"), as_matrix(z, "Z")
    n, n_inst = zm.shape
    m = xm.shape[1]
    if not 0 <= index < m:
        raise InvalidInputError(f"index {index} is not a treatment column (0..{m - 1}); pick one of them.")
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie in (0, 1), got {alpha}; use e.g. 0.05.")
    nm = names or tuple(f"x{k}" for k in range(m))
    treatment = nm[index]
    nuisance = tuple(nm[k] for k in range(m) if k != index)
    mw = m - 1
    if n_inst < m:
        return SubvectorAR(False, f"{n_inst} instrument(s) for {m} treatments: the model is not identified")
    theta0 = math.atan(null)
    yv = ym[:, 0]
    if spec.kind == "homoskedastic":
        d = n - n_inst - n_partialled
        dfn = n_inst - mw
        hom = _Homoskedastic(yv, xm, zm, index)

        def f_stat(theta: float) -> float:
            return d * float(hom.roots(theta)[0]) / dfn

        stat = f_stat(theta0)
        pval = float(stats.f.sf(stat, dfn, d))
        crit = float(stats.f.ppf(1 - alpha, dfn, d))
        intervals = _invert(lambda t: f_stat(t) - crit, xm, yv, zm, index) if confidence_set else None
        cond_p = cond_iv = None
        cond_reason = None
        if mw == 1:

            def cond(theta: float) -> float:
                r = hom.roots(theta)
                return gkm_conditional_p_value(d * float(r[0]), d * float(r[-1]), dfn)

            cond_p = cond(theta0)
            if confidence_set:
                cond_iv = _invert(lambda t: alpha - cond(t), xm, yv, zm, index, coarse=True)
        elif mw > 1:
            cond_reason = (
                "not computed: the conditional critical values of GKM (2019) are derived for one "
                "unrestricted treatment"
            )
        else:
            cond_reason = "no other treatment: the plain Anderson–Rubin test applies"
        version = "subvector AR (GKMC 2012), homoskedastic" if mw else "Anderson–Rubin, homoskedastic"
        return SubvectorAR(
            applicable=True,
            reason=None,
            treatment=treatment,
            nuisance=nuisance,
            null=null,
            alpha=alpha,
            cov_kind=spec.kind,
            version=version,
            statistic=stat,
            df=(dfn, d),
            p_value=pval,
            intervals=intervals,
            shape=None if intervals is None else classify_set(intervals),
            conditional_p_value=cond_p,
            conditional_intervals=cond_iv,
            conditional_reason=cond_reason,
        )
    d = denominator_df(spec, n, n_inst, n_partialled)
    proj = _Projection(yv, xm, zm, spec, n_partialled, n_partialled_nested, index)

    def starts(theta: float) -> list[Array]:
        """Nuisance starting values: the homoskedastic LIML-type minimiser and 2SLS given b."""
        if not proj.others:
            return []
        c, s = math.cos(theta), math.sin(theta)
        target = c * yv - s * xm[:, index]
        xw = xm[:, proj.others]
        pz = zm @ np.linalg.solve(zm.T @ zm, zm.T @ np.column_stack([xw, target]))
        tsls = np.linalg.lstsq(pz[:, :-1], pz[:, -1], rcond=None)[0]
        return [tsls, np.zeros(len(proj.others))]

    def proj_f(theta: float) -> float:
        return proj.minimum(theta, starts(theta)) / n_inst

    stat = proj_f(theta0)
    pval = float(stats.f.sf(stat, n_inst, d))
    crit = float(stats.f.ppf(1 - alpha, n_inst, d))
    intervals = (
        _invert(lambda t: proj_f(t) - crit, xm, yv, zm, index, coarse=bool(proj.others))
        if confidence_set
        else None
    )
    return SubvectorAR(
        applicable=True,
        reason=None,
        treatment=treatment,
        nuisance=nuisance,
        null=null,
        alpha=alpha,
        cov_kind=spec.kind,
        version=f"projection of the joint AR set ({spec.kind} covariance)"
        if mw
        else f"Anderson–Rubin ({spec.kind} covariance)",
        statistic=stat,
        df=(n_inst, d),
        p_value=pval,
        intervals=intervals,
        shape=None if intervals is None else classify_set(intervals),
        conditional_reason="conditional critical values apply to the homoskedastic subvector test only",
    )


def _invert(margin: Any, x: Array, y: Array, z: Array, index: int, *, coarse: bool = False) -> list[Interval]:
    """{b : margin(arctan b) <= 0} on an angle grid centred on the 2SLS estimate, with brentq refinement."""
    coef = np.linalg.lstsq(z @ np.linalg.lstsq(z, x, rcond=None)[0], y, rcond=None)[0]
    center = float(coef[index])
    resid = y - x @ coef
    scale = max(float(np.std(resid)) / max(float(np.std(x[:, index])), 1e-300) / math.sqrt(len(y)), 1e-8)
    n_pts = 121 if coarse else 601
    thetas = angle_grid(center, scale, n_uniform=n_pts, n_local=n_pts)
    margins = np.array([margin(float(t)) for t in thetas])
    return invert_on_circle(margin, thetas, margins, xtol=1e-10)


def subvector_ar_prepared(
    prepared: Any,
    *,
    treatment: str,
    vcov: str = "heteroskedastic",
    alpha: float = 0.05,
    null: float = 0.0,
    confidence_set: bool = True,
) -> SubvectorAR:
    """:func:`subvector_anderson_rubin` on a :class:`~ivdossier.estimation.data.PreparedData` by treatment name."""
    names = tuple(prepared.treatment)
    if treatment not in names:
        raise InvalidInputError(
            f"{treatment!r} is not a treatment of this model; choose one of {', '.join(names)}."
        )
    vcov = cov_name(vcov)
    if vcov == "clustered" and not prepared.clusters:
        raise InvalidInputError(
            "vcov='clustered' needs a cluster variable in the prepared data; pass cluster=."
        )
    spec = CovSpec(vcov, prepared.clusters if vcov == "clustered" else ())  # type: ignore[arg-type]
    return subvector_anderson_rubin(
        prepared.y,
        prepared.X,
        prepared.Z,
        index=names.index(treatment),
        spec=spec,
        n_partialled=prepared.n_partialled,
        n_partialled_nested=prepared.n_partialled_nested,
        alpha=alpha,
        null=null,
        names=names,
        confidence_set=confidence_set,
    )
