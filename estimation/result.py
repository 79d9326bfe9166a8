"""The result of one estimation: stored values as attributes, a readable summary and a JSON-safe dict."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.estimation.controls import ControlsTable
from ivdossier.estimation.covariance import OLD_COV_NAMES
from ivdossier.estimation.diagnostics import DiagnosticSuite
from ivdossier.jsonsafe import Record, json_safe
from ivdossier.vocabulary import NotApplicable

Array = NDArray[np.float64]
DIAGNOSTIC_SECTIONS: tuple[str, ...] = (
    "first_stage",
    "strength",
    "weak_iv_robust",
    "reduced_form",
    "overid",
    "endogeneity",
)
METHOD_LABELS = {
    "ols": "OLS (no instruments)",
    "2sls": "two-stage least squares",
    "liml": "LIML",
    "fuller": "Fuller-modified LIML",
}


@dataclass(frozen=True, eq=False)
class EstimationResult(Record):
    """Coefficients, standard errors and intervals of the treatment regressors, with the model description.

    ``cov`` is the covariance of ``coef`` (k x k, in the order of ``names``); ``ci`` holds the (1 - alpha)
    intervals (k x 2). ``diagnostics`` is the weak-instrument suite, NotApplicable with the reason when the
    diagnostics do not apply (OLS), or None when they were not asked for.
    """

    method: str
    vcov: str
    outcome: str
    names: tuple[str, ...]
    coef: Array
    se: Array
    cov: Array
    ci: Array
    alpha: float
    n: int
    n_dropped: int
    n_clusters: tuple[int, ...]
    df_resid: int
    ci_reference: str
    ref_df: int | None
    kappa: float
    kappa_liml: float | None
    sigma: float
    n_partialled: int
    n_absorbed: int
    n_absorbed_nested: int
    fe_levels: tuple[int, ...]
    spec: dict[str, Any] = field(default_factory=dict)
    conventions: dict[str, str] = field(default_factory=dict)
    diagnostics: DiagnosticSuite | NotApplicable | None = None
    identification: str | None = None
    controls_table: ControlsTable | None = None

    @property
    def not_applicable(self) -> str | None:
        """The reason the instrument diagnostics do not apply (OLS, too few clusters), else None."""
        return self.diagnostics.reason if isinstance(self.diagnostics, NotApplicable) else None

    @property
    def tstat(self) -> Array:
        """Coefficient divided by its standard error (test of a zero effect)."""
        return np.asarray(self.coef / self.se, dtype=np.float64)

    @property
    def pvalue(self) -> Array:
        """Two-sided p-values of a zero effect, from the same reference distribution as the intervals."""
        from ivdossier.estimation.distributions import norm_sf_array, t_sf_array

        t = np.abs(self.tstat)
        tail = norm_sf_array(t) if self.ref_df is None else t_sf_array(t, self.ref_df)
        return np.asarray(2 * tail, dtype=np.float64)

    def coef_of(self, name: str) -> float:
        """Coefficient of one named regressor."""
        return float(self.coef[self.names.index(name)])

    def se_of(self, name: str) -> float:
        """Standard error of one named regressor."""
        return float(self.se[self.names.index(name)])

    def _section(self, name: str) -> Any:
        if self.not_applicable is not None:
            return NotApplicable(self.not_applicable).to_dict()
        if not isinstance(self.diagnostics, DiagnosticSuite):
            return None
        part = getattr(self.diagnostics, name, None)
        if part is None:
            return None
        return json_safe(part.to_dict() if hasattr(part, "to_dict") else part)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict: coefficients by name, the diagnostics sections, the spec and conventions."""
        out: dict[str, Any] = {
            "method": self.method,
            "vcov": self.vcov,
            "outcome": self.outcome,
            "n": self.n,
            "n_dropped": self.n_dropped,
            "n_clusters": list(self.n_clusters),
            "coef": {k: json_safe(v) for k, v in zip(self.names, self.coef, strict=True)},
            "se": {k: json_safe(v) for k, v in zip(self.names, self.se, strict=True)},
            "ci": {k: json_safe(list(v)) for k, v in zip(self.names, self.ci, strict=True)},
            "cov": json_safe(self.cov),
            "alpha": self.alpha,
            "df_resid": self.df_resid,
            "ci_reference": self.ci_reference,
            "t": {k: json_safe(v) for k, v in zip(self.names, self.tstat, strict=True)},
            "p_value": {k: json_safe(v) for k, v in zip(self.names, self.pvalue, strict=True)},
            "kappa": json_safe(self.kappa),
            "kappa_liml": json_safe(self.kappa_liml),
            "sigma": json_safe(self.sigma),
            "partialled": {
                "columns": self.n_partialled,
                "absorbed_levels": self.n_absorbed,
                "absorbed_levels_nested_in_cluster": self.n_absorbed_nested,
                "fixed_effect_levels": list(self.fe_levels),
            },
        }
        for name in DIAGNOSTIC_SECTIONS:
            out[name] = self._section(name)
        out["identification"] = self.identification
        if self.controls_table is not None:
            out["controls"] = self.controls_table.to_dict()
        out["spec"] = json_safe(self.spec)
        out["conventions"] = dict(self.conventions)
        return out

    def summary(self) -> str:
        """A plain-text account of the estimate: what was estimated, on which rows, with which uncertainty."""
        level = f"{100 * (1 - self.alpha):g}%"
        lines = [
            f"Estimate of the effect on {self.outcome!r} by {METHOD_LABELS.get(self.method, self.method)}",
            "",
            f"  rows used       {self.n:,}"
            + (f"  ({self.n_dropped:,} incomplete rows left out)" if self.n_dropped else ""),
            f"  uncertainty     {self._vcov_text()}",
        ]
        if self.method in ("liml", "fuller"):
            lines.append(f"  kappa           {self.kappa:.6f} (LIML kappa {self.kappa_liml:.6f})")
        partial = self._partial_text()
        if partial:
            lines.append(f"  held fixed      {partial}")
        lines.append("")
        width = max(len("regressor"), *(len(n) for n in self.names))
        lines.append(
            f"  {'regressor':<{width}}  {'estimate':>12}  {'std. error':>12}  {level + ' interval':>27}"
        )
        for name, b, s, (lo, hi) in zip(self.names, self.coef, self.se, self.ci, strict=True):
            lines.append(f"  {name:<{width}}  {b:>12.6g}  {s:>12.6g}  [{lo:>11.6g}, {hi:>11.6g}]")
        lines.append(f"  intervals use {self.ci_reference}")
        if self.identification is not None:
            lines.append(f"  not identified: {self.identification}")
        if self.controls_table is not None:
            lines.append("")
            lines.extend(f"  {line}" for line in str(self.controls_table).splitlines())
        lines.append("")
        if self.not_applicable is not None:
            lines.append(f"  Instrument diagnostics: not applicable ({self.not_applicable}).")
        elif not isinstance(self.diagnostics, DiagnosticSuite):
            lines.append("  Instrument diagnostics: not computed.")
        else:
            lines.append("  Instrument diagnostics")
            lines.extend(f"    {line}" for line in self._diagnostic_lines())
        lines.append(
            "  Statistics cannot establish that an instrument is excluded or exogenous; decisions for policy "
            "or "
            "clinical practice need domain review."
        )
        return "\n".join(lines)

    def _diagnostic_lines(self) -> list[str]:
        """Headline numbers from the diagnostics sections; a missing entry is skipped, never invented."""
        d = {name: self._section(name) or {} for name in DIAGNOSTIC_SECTIONS}
        out: list[str] = []
        for name, row in (d["first_stage"].get("by_endog") or {}).items():
            homoskedastic = OLD_COV_NAMES.get(self.vcov, self.vcov) == "homoskedastic"
            f = row.get("partial_f") if homoskedastic else row.get("robust_f")
            if isinstance(f, float):
                out.append(f"first-stage F for {name!r}: {f:.4g} ({self.vcov} covariance)")
        eff = (d["strength"].get("effective_f") or {}).get("statistic")
        if isinstance(eff, float):
            out.append(f"effective F (Montiel Olea-Pflueger): {eff:.4g}")
        ar = d["weak_iv_robust"].get("anderson_rubin") or {}
        if isinstance(ar.get("p_value"), float):
            out.append(f"Anderson-Rubin test of no effect: p = {ar['p_value']:.4g}")
        if ar.get("confidence_set") is not None:
            pieces = ", ".join(f"[{_num(lo)}, {_num(hi)}]" for lo, hi in ar["confidence_set"]) or "empty"
            out.append(f"Anderson-Rubin {100 * (1 - self.alpha):g}% set ({ar.get('shape', '')}): {pieces}")
        oid = d["overid"]
        if isinstance(oid.get("p_value"), float):
            out.append(f"over-identification ({_test_name(oid.get('test'))}): p = {oid['p_value']:.4g}")
        endo = d["endogeneity"]
        if isinstance(endo.get("p_value"), float):
            out.append(f"endogeneity ({_test_name(endo.get('test'))}): p = {endo['p_value']:.4g}")
        return out or ["no headline statistics available; see to_dict()"]

    def _vcov_text(self) -> str:
        text = {
            "homoskedastic": "homoskedastic errors",
            "heteroskedastic": "heteroskedastic errors (robust)",
            "clustered": "errors clustered",
        }.get(OLD_COV_NAMES.get(self.vcov, self.vcov), self.vcov)
        if self.n_clusters:
            text += " on " + " and ".join(
                f"{c:,} clusters of {n!r}"
                for c, n in zip(self.n_clusters, self.spec.get("cluster", []), strict=False)
            )
        return text

    def _partial_text(self) -> str:
        parts = []
        controls = self.spec.get("controls") or []
        if controls:
            parts.append(f"{len(controls)} control(s)")
        absorb = self.spec.get("absorb") or []
        for name, levels in zip(absorb, self.fe_levels, strict=False):
            parts.append(f"{name!r} ({levels:,} levels)")
        if not absorb:
            parts.insert(0, "intercept")
        return ", ".join(parts)

    def __str__(self) -> str:
        return self.summary()


def _num(value: Any) -> str:
    return value if isinstance(value, str) else f"{value:.4g}"


TEST_NAMES = {
    "durbin_wu_hausman_control_function": "Durbin-Wu-Hausman test, control-function form",
    "hansen_j": "Hansen J test",
    "sargan": "Sargan test",
}
"""Readable names of the tests whose JSON identifiers appear in the terminal summary."""


def _test_name(test: object) -> str:
    return TEST_NAMES.get(str(test), str(test).replace("_", " "))
