"""The table of analyses: for each kind, how it is computed from a model spec, what it stores, which catalogue
checks it answers, the command that runs it, and its one-line finding per check.

The command line, stored runs, findings in dossiers and the demo all read this table, so a check is tied to its
command and its finding in one place (a test ties the table to the catalogue's checks and to the CLI's commands).
Adding an analysis: a numerics function returning a Record, one entry here, a command, a test.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.jsonsafe import Record

if TYPE_CHECKING:
    import pandas as pd

    from ivdossier.estimation.engines import EngineSettings
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.runs import FileRun

Options = Mapping[str, Any]
Computed = tuple[Any, dict[str, Any]]  # the typed result and what is stored beside it (e.g. plot summaries)


@dataclass(frozen=True)
class Analysis:
    """One kind of analysis.

    ``name`` is the command path after ``ivdossier`` ("falsify balance"); ``run_kind`` the kind its stored runs
    carry; ``result_type`` the Record class it returns, as "module:Class" under ``ivdossier.estimation``; ``roles`` the model-spec roles it reads (the
    rest of the spec is the shared adjustment: controls, fixed effects, clusters, weights, covariance, level);
    ``compute(frame, spec, options) -> (result, extra)``; ``findings`` one line per catalogue check it answers,
    read from the typed result's attributes; ``reader`` the function that reads its data file into a DataFrame
    when ``estimation.load_table`` is not the right one (a per-variant table may be tab-separated).
    ``scan(path, spec, options, settings)`` runs it with a scanning engine (DuckDB, Spark, or the automatic
    choice) when it needs only the sufficient statistics of one model, returning the result with the engine's
    provenance; analyses without one run in memory only, and ``single_engine`` says why.
    """

    name: str
    run_kind: str
    result_type: str
    roles: tuple[str, ...]
    compute: Callable[[pd.DataFrame, ModelSpec | None, Options], Computed] | None
    findings: Mapping[str, Callable[[Any], str]] = field(default_factory=dict)
    reader: Callable[[Path | str], pd.DataFrame] | None = None
    scan: Callable[[str, ModelSpec | None, Options, EngineSettings], Any] | None = None
    single_engine: str = (
        "it needs the rows themselves, not only sums of cross-products of the model's columns"
    )

    @property
    def command(self) -> str:
        """The command line that runs it, as the catalogue names commands."""
        return f"ivdossier {self.name}"

    @property
    def result_class(self) -> type[Record]:
        """The Record class of its results (importing the module that defines it)."""
        module, name = self.result_type.split(":")
        return cast(type[Record], getattr(importlib.import_module(f"ivdossier.estimation.{module}"), name))

    @property
    def checks(self) -> tuple[str, ...]:
        """The catalogue checks this analysis answers."""
        return tuple(self.findings)

    def stored_spec(self, spec: ModelSpec | None, options: Options) -> dict[str, Any]:
        """The spec stored with a run: the roles it reads, the shared adjustment, and its own options."""
        out: dict[str, Any] = {}
        if spec is not None:
            echo = spec.echo()
            for role in self.roles:
                value = echo[role]
                out[role] = value[0] if role == "treatment" and len(value) == 1 else value
            out.update({k: echo[k] for k in ("controls", "absorb", "weights", "vcov", "alpha")})
            out["cluster"] = echo["cluster"] or None
        out.update(options)
        return out


# ---------------------------------------------------------------- one-line findings (typed results)


def _num(value: Any, digits: int = 3) -> str:
    if isinstance(value, int | float) and not isinstance(value, bool):
        return f"{value:.{digits}g}"
    return str(value)


def _set_text(intervals: Any) -> str:
    if not intervals:
        return "empty"
    return " ∪ ".join(f"[{_num(lo, 4)}, {_num(hi, 4)}]" for lo, hi in intervals)


def _suite(result: Any) -> Any:
    from ivdossier.estimation.diagnostics import DiagnosticSuite

    return result.diagnostics if isinstance(result.diagnostics, DiagnosticSuite) else None


def _section(result: Any, name: str) -> tuple[Any, str | None]:
    """A section of the run's diagnostics and, when it is absent, why (from the section or the whole suite)."""
    from ivdossier.vocabulary import NotApplicable

    diagnostics = getattr(result, "diagnostics", None)
    if isinstance(diagnostics, NotApplicable):
        return None, diagnostics.reason
    node = getattr(_suite(result), name, None)
    if isinstance(node, NotApplicable):
        return None, node.reason
    return node, None


def _strength(result: Any) -> str:
    strength, reason = _section(result, "strength")
    eff = strength.effective_f if strength is not None else None
    if eff is None:
        return f"no effective F in this run ({reason})" if reason else "no effective F in this run"
    crit = next((c for t, c in eff.critical_values.items() if round(t * 100) == 10), None)
    verdict = "above" if crit is not None and eff.statistic >= crit else "below"
    return f"effective F {_num(eff.statistic, 4)}, {verdict} the τ = 10 % critical value {_num(crit, 4)}"


def _robust(result: Any) -> str:
    robust, reason = _section(result, "weak_iv_robust")
    if robust is None:
        return f"no Anderson–Rubin result ({reason})" if reason else "no Anderson–Rubin result"
    ar = robust.anderson_rubin
    if ar.intervals is None:
        return f"Anderson–Rubin test p = {_num(ar.p_value)}"
    return f"Anderson–Rubin {1 - ar.alpha:.0%} set {_set_text(ar.intervals)}"


def _overid(result: Any) -> str:
    over, reason = _section(result, "overid")
    if over is None and reason:
        return f"no over-identification test ({reason})"
    if over is None or over.p_value is None:
        return "just identified: no over-identification test"
    return f"{over.test or 'J'} = {_num(over.statistic)}, p = {_num(over.p_value)}"


def _endogeneity(result: Any) -> str:
    endo, reason = _section(result, "endogeneity")
    if endo is None:
        return f"no endogeneity test ({reason})" if reason else "no endogeneity test"
    return f"Durbin–Wu–Hausman p = {_num(endo.p_value)}"


def _per_instrument(result: Any) -> str:
    parts = [f"{r.instrument}: {_num(r.estimate, 4)}" for r in result.rows]
    over = result.overid or {}
    test = (
        f"; {over.get('test') or 'J'} p = {_num(over.get('p_value'))}"
        if over.get("p_value") is not None
        else ""
    )
    return "just-identified estimates " + "; ".join(parts) + test


def _joint(result: Any) -> str:
    joint = result.joint
    targets = ", ".join(r.target for r in result.rows)
    return f"joint test on {targets}: χ²({joint.df}) = {_num(joint.statistic)}, p = {_num(joint.p_value)}"


def _zero_first_stage(result: Any) -> str:
    parts = [
        f"{c.instrument} {_num(c.coef)} (se {_num(c.se)}, p = {_num(c.p_value)})"
        for c in result.reduced_form.coefficients
    ]
    return f"reduced form in {result.subsample}: " + "; ".join(parts)


def _interval_sensitivity(label: str) -> Callable[[Any], str]:
    def finding(result: Any) -> str:
        covers = "covers" if result.covers_zero else "excludes"
        return f"{label} [{_num(result.lower, 4)}, {_num(result.upper, 4)}] {covers} zero"

    return finding


def _breakdown(result: Any) -> str:
    return (
        f"a direct effect of {_num(result.magnitude)} per unit of the instrument "
        f"({_num(result.relative_to_reduced_form)} of the reduced form) brings the interval to "
        f"{_num(result.target)}"
    )


def _complier_share(result: Any) -> str:
    return "complier share " + _num(result.shares.complier)


def _complier_density(result: Any) -> str:
    if result.implications is None:
        return "implied complier densities not checked in this run (give --outcome)"
    return f"implied complier densities: p = {_num(result.implications.p_value)} for a negative density"


def _subgroup_signs(result: Any) -> str:
    if not result.flagged:
        return (
            f"first stage of the same sign (or not significantly reversed) in all {len(result.groups)} "
            f"subgroups of {result.by}"
        )
    return (
        f"first stage significantly reversed where {result.by} is in {', '.join(result.flagged)}: "
        "possible defiers"
    )


def _leave_one_out(result: Any) -> str:
    if not result.applicable:
        return f"leave-one-out influence not applicable: {result.reason}"
    lo, hi = result.first_stage_f_range
    return (
        f"leaving one {result.unit} out moves the estimate by up to {_num(result.largest_change)} "
        f"({result.largest_change_label}); {result.t_flips} deletions flip t significance, "
        f"{result.ar_flips} flip Anderson–Rubin; first-stage F from {_num(lo)} to {_num(hi)}"
    )


def _power(result: Any) -> str:
    mde = f"minimum detectable effect {_num(result.mde)}"
    if result.power is None:
        return f"{mde} (no effect given, so no power at an effect)"
    return f"power {_num(result.power)} for effect {_num(result.effect)}; {mde}"


# ---------------------------------------------------------------- computations (spec -> result)


def _need(spec: ModelSpec | None, name: str) -> ModelSpec:
    if spec is None:
        raise InvalidInputError(
            f"the analysis {name!r} needs a model spec; build one with ModelSpec.build()."
        )
    return spec


def _estimate(frame: pd.DataFrame, spec: ModelSpec | None, options: Options) -> Computed:
    from ivdossier.estimation.api import estimate_prepared, prepare_spec
    from ivdossier.estimation.plot_data import ar_curve, first_stage_bins

    s = _need(spec, "estimate")
    prepared = prepare_spec(frame, s)
    result = estimate_prepared(
        prepared,
        method=s.method,
        vcov=s.vcov,
        small_sample=s.small_sample,
        alpha=s.alpha,
        fuller_alpha=s.fuller_alpha,
    )
    plots: dict[str, Any] = {}
    if s.method != "ols":
        plots = {"first_stage_bins": first_stage_bins(prepared), "ar_curve": ar_curve(prepared, result)}
    return result, {"plot_data": plots}


def _model(spec: ModelSpec | None, name: str, *roles: str) -> dict[str, Any]:
    s = _need(spec, name)
    out = s.adjustment()
    for role in roles:
        if role == "outcome":
            if s.outcome is None:
                raise InvalidInputError(f"{name} needs an outcome column; pass outcome=.")
            out["outcome"] = s.outcome
        elif role == "treatment":
            out["treatment"] = s.single_treatment()
        else:
            out[role] = getattr(s, role)
    return out


def _one(values: Any) -> Any:
    values = list(values) if isinstance(values, list | tuple) else values
    return values[0] if isinstance(values, list) and len(values) == 1 else values


def _sensitivity_range(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.sensitivity import union_of_intervals

    kw = _model(spec, "sensitivity range", "outcome", "treatment", "instruments")
    low, high = _direct_effect_range(o)
    return union_of_intervals(frame, gamma_min=low, gamma_max=high, **kw), {}


def _direct_effect_range(o: Options) -> tuple[Any, Any]:
    """The assumed range of the direct effect (runs stored before the rename keep gamma_min / gamma_max)."""
    low = o["direct_effect_min"] if "direct_effect_min" in o else o["gamma_min"]
    high = o["direct_effect_max"] if "direct_effect_max" in o else o["gamma_max"]
    return _one(low), _one(high)


def _sensitivity_prior(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.sensitivity import local_to_zero

    kw = _model(spec, "sensitivity prior", "outcome", "treatment", "instruments")
    mean, omega = _prior(_need(spec, "sensitivity prior"), o)
    return local_to_zero(frame, mu=mean, omega=omega, **kw), {}


def _prior(spec: ModelSpec, o: Options) -> tuple[list[float], list[list[float]]]:
    """The prior mean and (diagonal) covariance of the direct effect from --prior-mean and --prior-sd."""
    mean, sd = list(o["prior_mean"]), list(o["prior_sd"])
    if len(mean) != len(spec.instruments) or len(sd) != len(spec.instruments):
        raise InvalidInputError(
            "give one --prior-mean and one --prior-sd per --instrument, in the same order."
        )
    return mean, [[(s**2 if i == j else 0.0) for j, s in enumerate(sd)] for i in range(len(sd))]


def _sensitivity_breakdown(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.sensitivity import breakdown_value

    kw = _model(spec, "sensitivity breakdown", "outcome", "treatment", "instruments")
    return breakdown_value(frame, target=o.get("target", 0.0), **kw), {}


def _balance(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.falsification import balance

    kw = _model(spec, "falsify balance", "instruments")
    return balance(frame, covariates=list(o["covariates"]), **kw), {}


def _placebo(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.falsification import placebo_outcomes

    kw = _model(spec, "falsify placebo", "instruments")
    return placebo_outcomes(frame, outcomes=list(o["outcomes"]), **kw), {}


def _zero(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.falsification import zero_first_stage

    kw = _model(spec, "falsify zero-first-stage", "outcome", "treatment", "instruments")
    return zero_first_stage(frame, query=o.get("query"), subsample=o.get("subsample"), **kw), {}


def _per_instrument_compute(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.falsification import per_instrument

    kw = _model(spec, "falsify per-instrument", "outcome", "treatment", "instruments")
    return per_instrument(frame, **kw), {}


def _signs(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.subgroups import subgroup_first_stages

    kw = _model(spec, "falsify first-stage-signs", "treatment", "instruments")
    return subgroup_first_stages(frame, by=o["by"], bins=o.get("bins", 4), **kw), {}


def _compliers(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.compliers import complier_report

    report = complier_report(
        frame,
        treatment=o["treatment"],
        instrument=o["instrument"],
        covariates=list(o.get("covariates") or []),
        outcome=o.get("outcome"),
        bins=o.get("bins", 5),
        cluster=o.get("cluster"),
        seed=o.get("seed", 0),
    )
    return report, {}


# ---------------------------------------------------------------- the same analyses with a scanning engine


def _estimate_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.engines import estimate_model_source

    s = _need(spec, "estimate")
    if s.outcome is None:
        raise InvalidInputError("an estimate needs --outcome; name the outcome column.")
    return estimate_model_source(path, s, settings)


def _balance_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.source_analyses import balance_source

    return balance_source(
        path, _need(spec, "falsify balance"), covariates=list(o["covariates"]), settings=settings
    )


def _placebo_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.source_analyses import placebo_outcomes_source

    return placebo_outcomes_source(
        path, _need(spec, "falsify placebo"), outcomes=list(o["outcomes"]), settings=settings
    )


def _per_instrument_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.source_analyses import per_instrument_source

    return per_instrument_source(path, _need(spec, "falsify per-instrument"), settings=settings)


def _range_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.source_analyses import union_of_intervals_source

    low, high = _direct_effect_range(o)
    return union_of_intervals_source(
        path, _need(spec, "sensitivity range"), gamma_min=low, gamma_max=high, settings=settings
    )


def _prior_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.source_analyses import local_to_zero_source

    s = _need(spec, "sensitivity prior")
    mean, omega = _prior(s, o)
    return local_to_zero_source(path, s, mu=mean, omega=omega, settings=settings)


def _breakdown_scan(path: str, spec: ModelSpec | None, o: Options, settings: EngineSettings) -> Any:
    from ivdossier.estimation.source_analyses import breakdown_value_source

    return breakdown_value_source(
        path, _need(spec, "sensitivity breakdown"), target=o.get("target", 0.0), settings=settings
    )


# ---------------------------------------------------------------- designs, summary data, confounder strength


def _na_text(part: Any) -> str | None:
    """The reason when a part of a result does not apply (any module's not-applicable record)."""
    from ivdossier.vocabulary import NotApplicable

    na = NotApplicable.of(part)
    return None if na is None else f"not applicable: {na.reason}"


def _leave_out(result: Any) -> str:
    cases = result.cases
    small = (
        f"; {len(result.small)} flagged with fewer than {result.recipe.min_cases} cases"
        if result.small
        else ""
    )
    return (
        f"leave-{result.recipe.leave_out}-out measure over {result.recipe.n_decision_makers} decision-makers "
        f"(cases each {min(cases, default=0)}–{max(cases, default=0)}){small}"
    )


def _jackknife_estimates(result: Any) -> str:
    est = result.estimates
    parts = [f"{e.method.upper()} {_num(e.estimate, 4)} (se {_num(e.std_error)})" for e in est.estimates]
    return "; ".join(parts) + f" with {est.n_instruments} decision-maker dummies"


def _jackknife_ar(result: Any) -> str:
    ar = result.anderson_rubin
    if not ar.applicable:
        return f"jackknife Anderson–Rubin not applicable: {ar.reason}"
    strong = "above" if ar.strength > ar.strength_cutoff else "not above"
    return (
        f"jackknife Anderson–Rubin {1 - ar.alpha:.0%} set {_set_text(ar.confidence_set)}; "
        f"strength {_num(ar.strength)} ({strong} {_num(ar.strength_cutoff)})"
    )


def _rotemberg(result: Any) -> str:
    rw = result.rotemberg
    index = {s: i for i, s in enumerate(rw.sectors)}
    top = ", ".join(f"{s} ({_num(rw.weights[index[s]])})" for s in rw.top[:3])
    return f"largest Rotemberg weights: {top}; negative weights {rw.negative_weight_share:.0%} of the total"


def _exposure_robust(result: Any) -> str:
    r, s = result.robust, result.shock_level
    akm = (
        f"AKM [{_num(r.ci_akm[0], 4)}, {_num(r.ci_akm[1], 4)}], AKM0 {_set_text(r.akm0_set)}"
        if r.applicable
        else f"AKM not applicable ({r.reason})"
    )
    return (
        f"conventional [{_num(r.ci_conventional[0], 4)}, {_num(r.ci_conventional[1], 4)}], {akm}; "
        f"shock level {_num(s.effective_sectors)} effective sectors"
    )


def _variant_pleiotropy(result: Any) -> str:
    parts = []
    egger, median, het = result.egger, result.weighted_median, result.heterogeneity
    parts.append(_na_text(egger) or f"Egger intercept {_num(egger.intercept)} (p {_num(egger.intercept_p)})")
    parts.append(_na_text(median) or f"weighted median {_num(median.estimate, 4)}")
    parts.append(_na_text(het) or f"Cochran's Q p {_num(het.q_p)}")
    return "; ".join(parts)


def _variant_strength(result: Any) -> str:
    r = result.ratios
    gx = result.egger
    i2 = "" if _na_text(gx) else f"; I²_GX {_num(gx.i2_gx)}"
    return f"mean F {_num(r.mean_f)} (smallest {_num(r.min_f)}) over {len(r.variants)} variants{i2}"


def _variant_direction(result: Any) -> str:
    d = result.directionality
    return _na_text(d) or f"Steiger: {d.direction} (p {_num(d.p)})"


def _robustness_value(result: Any) -> str:
    if not getattr(result, "applicable", True):
        return f"not applicable: {result.reason}"
    iv = result.iv
    bench = "; ".join(
        f"{b.k:g}× {b.covariate}: {'excludes' if b.excludes_null else 'includes'} {result.null:g}"
        for b in result.iv_benchmarks
    )
    return (
        f"robustness value {_num(iv.rv)} (at alpha {_num(iv.rv_alpha)}) for the IV estimate "
        f"{_num(result.iv_estimate, 4)}" + (f"; {bench}" if bench else "")
    )


def _write_derived(frame: pd.DataFrame, column: pd.Series, out: Path) -> str:
    """Write the data with the derived column to a new file atomically; returns its SHA-256."""
    import os
    import tempfile

    from ivdossier.estimation import file_sha256

    if column.name in frame.columns:
        raise InvalidInputError(
            f"the data already has a column {column.name!r}; pass another --name for the derived column."
        )
    if out.suffix.lower() != ".csv":
        raise InvalidInputError(f"the derived data file {str(out)!r} must end in .csv.")
    out.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=out.parent, suffix=".csv.part")
    os.close(fd)
    try:
        frame.assign(**{str(column.name): column}).to_csv(tmp, index=False)
        os.replace(tmp, out)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return file_sha256(out)


def _decision_makers(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.design_results import decision_maker_design

    result, column = decision_maker_design(
        frame,
        outcome=o["outcome"],
        treatment=o["treatment"],
        decision_maker=o["decision_maker"],
        absorb=o.get("absorb"),
        controls=tuple(o.get("controls") or ()),
        leave_out=o.get("leave_out", "case"),
        cluster=o.get("leave_out_cluster"),
        min_cases=o.get("min_cases", 20),
        beta0=o.get("beta0", 0.0),
        alpha=o.get("alpha", 0.05),
        name=o.get("column_name"),
    )
    out = o.get("derived_out")
    if not out:
        return result, {}
    path = Path(out)
    if o.get("input_data") is not None and path.resolve() == Path(o["input_data"]).resolve():
        raise InvalidInputError(
            "--derived-out names the input data file; write the derived data to a new file."
        )
    digest = _write_derived(frame, column, path)
    result = type(result)(**{**result.__dict__, "derived_file": str(path)})
    derived = {"file": str(path), "sha256": digest, "column": column.name, "recipe": result.recipe.to_dict()}
    return result, {"derived_data": derived}


def _exposure_share(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation import load_table
    from ivdossier.estimation.design_results import exposure_share_design

    result = exposure_share_design(
        frame,
        load_table(o["shares"]),
        load_table(o["shocks"]),
        outcome=o["outcome"],
        treatment=o["treatment"],
        unit=o.get("unit", "unit"),
        sector=o.get("sector", "sector"),
        share=o.get("share", "share"),
        shock=o.get("shock", "shock"),
        controls=tuple(o.get("controls") or ()),
        alpha=o.get("alpha", 0.05),
        top=o.get("top", 5),
    )
    return result, {}


def _variants(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.variant_summary import summary_evidence, variant_table

    table = variant_table(frame, source=str(o.get("source", "")))
    evidence = summary_evidence(
        table, alpha=o.get("alpha", 0.05), draws=o.get("draws", 1000), seed=o.get("seed", 20260101)
    )
    return evidence, {}


def _read_variants(path: Path | str) -> pd.DataFrame:
    from ivdossier.estimation.variant_summary import read_variant_frame

    return read_variant_frame(path)


def _confounder(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
    from ivdossier.estimation.omitted_variable import IvRobustness, iv_robustness

    s = _need(spec, "confounder-strength")
    if s.outcome is None:
        raise InvalidInputError("confounder-strength needs an outcome column; pass --outcome.")
    result = iv_robustness(
        frame,
        outcome=s.outcome,
        treatment=s.single_treatment(),
        instrument=s.instruments,
        controls=s.controls,
        absorb=s.absorb,
        weights=s.weights,
        benchmarks=tuple(o.get("benchmarks") or ()),
        k=tuple(o.get("k") or (1.0,)),
        null=o.get("null", 0.0),
        q=o.get("q", 1.0),
        alpha=s.alpha,
    )
    if not isinstance(result, IvRobustness):
        raise InvalidInputError(f"confounder-strength does not apply: {result.reason}.")
    return result, {}


def _fragility(name: str) -> Callable[[pd.DataFrame, ModelSpec | None, Options], Computed]:
    def compute(frame: pd.DataFrame, spec: ModelSpec | None, o: Options) -> Computed:
        from ivdossier.workflows.fragility import COMPUTE

        return COMPUTE[name](frame, spec, o)

    return compute


_ESTIMATE_FINDINGS: dict[str, Callable[[Any], str]] = {
    "first-stage-strength": _strength,
    "weak-iv-robust-inference": _robust,
    "over-identification": _overid,
    "endogeneity-test": _endogeneity,
}
_SENSITIVITY = ("outcome", "treatment", "instruments")

#: Every analysis, by command name.
ANALYSES: dict[str, Analysis] = {
    a.name: a
    for a in (
        Analysis(
            "estimate",
            "estimate",
            "result:EstimationResult",
            _SENSITIVITY,
            _estimate,
            _ESTIMATE_FINDINGS,
            scan=_estimate_scan,
        ),
        Analysis(
            "falsify balance",
            "falsify-balance",
            "falsification:InstrumentRegressions",
            ("instruments",),
            _balance,
            {"covariate-balance": _joint},
            scan=_balance_scan,
        ),
        Analysis(
            "falsify placebo",
            "falsify-placebo",
            "falsification:InstrumentRegressions",
            ("instruments",),
            _placebo,
            {"placebo-outcome": _joint},
            scan=_placebo_scan,
        ),
        Analysis(
            "falsify zero-first-stage",
            "falsify-zero-first-stage",
            "falsification:ZeroFirstStageResult",
            _SENSITIVITY,
            _zero,
            {"zero-first-stage-reduced-form": _zero_first_stage},
            single_engine="it selects its subsample with a pandas expression or column in memory",
        ),
        Analysis(
            "falsify per-instrument",
            "falsify-per-instrument",
            "falsification:PerInstrumentResult",
            _SENSITIVITY,
            _per_instrument_compute,
            {"per-instrument-estimates": _per_instrument, "over-identification": _per_instrument},
            scan=_per_instrument_scan,
        ),
        Analysis(
            "falsify first-stage-signs",
            "falsify-first-stage-signs",
            "subgroups:SubgroupSigns",
            ("treatment", "instruments"),
            _signs,
            {"subgroup-first-stage-signs": _subgroup_signs},
            single_engine="it cuts a covariate into quantile bins and fits one first stage per subgroup",
        ),
        Analysis(
            "sensitivity range",
            "sensitivity",
            "sensitivity:UnionIntervalResult",
            _SENSITIVITY,
            _sensitivity_range,
            {"exclusion-sensitivity": _interval_sensitivity("union of intervals")},
            scan=_range_scan,
        ),
        Analysis(
            "sensitivity prior",
            "sensitivity",
            "sensitivity:LocalToZeroResult",
            _SENSITIVITY,
            _sensitivity_prior,
            {"exclusion-sensitivity": _interval_sensitivity("local-to-zero interval")},
            scan=_prior_scan,
        ),
        Analysis(
            "sensitivity breakdown",
            "sensitivity",
            "sensitivity:BreakdownResult",
            _SENSITIVITY,
            _sensitivity_breakdown,
            {"exclusion-sensitivity": _breakdown},
            scan=_breakdown_scan,
        ),
        Analysis(
            "compliers",
            "compliers",
            "compliers:ComplierReport",
            (),
            _compliers,
            {"complier-profile": _complier_share, "complier-density-sign": _complier_density},
        ),
        Analysis("power", "power", "power:PowerAnalysis", (), None, {"power-analysis": _power}),
        Analysis(
            "design decision-makers",
            "design-decision-makers",
            "design_results:DecisionMakerDesign",
            (),
            _decision_makers,
            {
                "leave-out-construction": _leave_out,
                "many-instrument-estimates": _jackknife_estimates,
                "jackknife-anderson-rubin": _jackknife_ar,
            },
        ),
        Analysis(
            "design exposure-share",
            "design-exposure-share",
            "design_results:ExposureShareDesign",
            (),
            _exposure_share,
            {"rotemberg-weights": _rotemberg, "exposure-robust-inference": _exposure_robust},
        ),
        Analysis(
            "variants",
            "variants",
            "variant_summary:SummaryEvidence",
            (),
            _variants,
            {
                "variant-pleiotropy": _variant_pleiotropy,
                "variant-strength": _variant_strength,
                "variant-directionality": _variant_direction,
            },
            _read_variants,
        ),
        Analysis(
            "confounder-strength",
            "confounder-strength",
            "omitted_variable:IvRobustness",
            _SENSITIVITY,
            _confounder,
            {"confounder-robustness-value": _robustness_value},
        ),
        Analysis(
            "fragility bootstrap",
            "fragility-bootstrap",
            "fragility_bundle:BootstrapBundle",
            _SENSITIVITY,
            _fragility("fragility bootstrap"),
        ),
        Analysis(
            "fragility influence",
            "fragility-influence",
            "influence:InfluenceResult",
            _SENSITIVITY,
            _fragility("fragility influence"),
            {"leave-one-cluster-out": _leave_one_out},
        ),
        Analysis(
            "fragility subvector",
            "fragility-subvector",
            "subvector:SubvectorAR",
            _SENSITIVITY,
            _fragility("fragility subvector"),
        ),
    )
}


def analysis(name: str) -> Analysis:
    """The analysis run by ``ivdossier NAME``; the error lists the known names."""
    try:
        return ANALYSES[name]
    except KeyError:
        raise NotFoundError(f"no analysis {name!r}; known analyses: {', '.join(ANALYSES)}.") from None


def analysis_of_result(run_kind: str, result: Any) -> Analysis | None:
    """The table entry that produced a typed result of this run kind (None for unknown kinds)."""
    for entry in ANALYSES.values():
        if entry.run_kind == run_kind and type(result) is entry.result_class:
            return entry
    return None


def run_analysis(
    name: str,
    path: Path | str,
    spec: ModelSpec | None,
    *,
    engine: str = "pandas",
    engine_settings: EngineSettings | None = None,
    **options: Any,
) -> FileRun:
    """Compute one analysis from a validated spec on a data file and record fingerprint, spec and timing.

    ``engine`` "pandas" loads the file (the default); "duckdb", "spark" or "auto" scan it (a file or a directory
    of Parquet files) for the analyses that need only cross-products, and record the engine's provenance with
    the run; the others are refused with the reason. ``engine_settings`` carries the engine's own options.
    """
    from ivdossier.workflows.runs import analyse_file

    entry = analysis(name)
    compute = entry.compute
    if compute is None:
        raise InvalidInputError(f"the analysis {name!r} reads no data file; call its function directly.")
    if engine != "pandas":
        return _scan_analysis(entry, path, spec, engine, engine_settings, options)
    if engine_settings is not None and engine_settings != _default_settings("pandas"):
        raise InvalidInputError(
            "--memory-limit and --spark-master apply to the scanning engines; add --engine duckdb, spark or "
            "auto, or drop them."
        )
    return analyse_file(
        entry.run_kind,
        path,
        lambda frame: compute(frame, spec, options),
        entry.stored_spec(spec, options),
        load=entry.reader,
    )


def _default_settings(engine: str) -> EngineSettings:
    from ivdossier.estimation.engines import EngineSettings

    return EngineSettings(engine=engine)


def engine_refusal(name: str, engine: str) -> str | None:
    """Why ``ivdossier NAME`` cannot run on ``engine`` (None when it can), naming the engine that can."""
    entry = analysis(name)
    if engine == "pandas" or entry.scan is not None:
        return None
    return (
        f"{entry.command} runs on engine 'pandas' only: {entry.single_engine}. Drop --engine {engine} (the "
        "pandas engine reads the file into memory), or run the analyses that need only cross-products "
        "(estimate, falsify balance/placebo/per-instrument, sensitivity) on large files."
    )


def _scan_analysis(
    entry: Analysis,
    path: Path | str,
    spec: ModelSpec | None,
    engine: str,
    settings: EngineSettings | None,
    options: Options,
) -> FileRun:
    import dataclasses
    import time

    from ivdossier.estimation.engines import ENGINES
    from ivdossier.workflows.runs import FileRun

    if engine not in ENGINES:
        raise InvalidInputError(f"Unknown engine {engine!r}; choose one of {', '.join(ENGINES)}.")
    refusal = engine_refusal(entry.name, engine)
    if refusal is not None or entry.scan is None:
        raise InvalidInputError(refusal or f"{entry.command} has no scanning engine.")
    chosen = dataclasses.replace(settings or _default_settings(engine), engine=engine)
    start = time.perf_counter()
    done = entry.scan(str(path), spec, options, chosen)
    provenance = done.provenance
    stored = entry.stored_spec(spec, options)
    if entry.name == "estimate":
        stored = dict(done.result.spec)
    return FileRun(
        kind=entry.run_kind,
        result=done.result,
        path=str(path),
        sha256=provenance.fingerprint or "",
        rows=provenance.rows or 0,
        columns=(),
        seconds=time.perf_counter() - start,
        spec={"data": str(path), **stored, "engine": provenance.engine},
        extra={"engine": provenance.to_dict()},
    )
