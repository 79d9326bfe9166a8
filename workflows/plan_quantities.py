"""The quantities a decision rule may name: the dotted paths each kind of run reports, read from the analyses
themselves, and the check that a plan's rules name only those.

A path of an estimation run is written bare (``strength.effective_f.statistic``); a path of another kind of run is
qualified by its run kind (``fragility-influence:t_significance_flips``, ``variants:egger.intercept_p``), and a rule
reads one kind of run: ``plan compare`` applies it to the compared runs of that kind.

The lists are not written by hand: ``probe_quantities()`` runs the estimator on three small generated designs and
collects every path of ``EstimationResult.to_dict()``, with the regressor and instrument names replaced by
``<treatment>`` and ``<instrument>``; ``probe_kind_quantities()`` does the same for every other kind in
``RULE_KINDS`` on the designs of ``plan_probes``. ``QUANTITIES`` and ``plan_quantities_kinds.KIND_QUANTITIES`` are
their output, kept in the source so that checking a rule costs nothing, and a test keeps them equal. A rule names the
real columns (``coef.video_share``); those are checked against the plan's specs. Sensitivity, complier,
falsification and power runs are not covered.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError

TREATMENT, INSTRUMENT = "<treatment>", "<instrument>"
ESTIMATE = "estimate"
#: Run kinds whose quantities a rule may name besides an estimate (their lists are in plan_quantities_kinds).
RULE_KINDS: tuple[str, ...] = (
    "fragility-bootstrap",
    "fragility-influence",
    "fragility-subvector",
    "design-decision-makers",
    "design-exposure-share",
    "variants",
    "confounder-strength",
)
#: A list of records is addressed by the value of this key in each record (estimates.estimates.ujive.estimate).
RECORD_ID = "method"
# Column names of the generated designs; chosen so that no key of the results can be mistaken for them.
_PROBE_TREATMENT, _PROBE_INSTRUMENTS = "probe_treatment_col", ("probe_instrument_a", "probe_instrument_b")
_PROBE_TREATMENT_2, _PROBE_INSTRUMENT_3 = "probe_treatment_col_2", "probe_instrument_c"


@dataclass(frozen=True)
class Quantity:
    """One path a run of ``run_kind`` reports: its kind (number, whole number, yes/no, text, list) and whether it
    can be empty."""

    path: str
    kind: str
    may_be_empty: bool
    run_kind: str = ESTIMATE

    @property
    def rule_path(self) -> str:
        """The path as a rule writes it: bare for an estimate, ``run-kind:path`` otherwise."""
        return qualified(self.run_kind, self.path)

    def to_dict(self) -> dict[str, Any]:
        return {"run_kind": self.run_kind, "path": self.rule_path, "kind": self.kind,
                "may_be_empty": self.may_be_empty}  # fmt: skip


def qualified(run_kind: str, path: str) -> str:
    """A path as a rule writes it for a run of ``run_kind``."""
    return path if run_kind == ESTIMATE else f"{run_kind}:{path}"


def split_path(path: str) -> tuple[str, str]:
    """The run kind a rule's path reads and the path inside that run's results (an estimate when unqualified)."""
    kind, sep, rest = path.partition(":")
    return (kind, rest) if sep else (ESTIMATE, path)


def _kind(value: Any) -> str | None:
    if value is None:
        return None
    if isinstance(value, bool):
        return "yes/no"
    if isinstance(value, int):
        return "whole number"
    if isinstance(value, float) or value in ("inf", "-inf"):
        return "number"
    if isinstance(value, str):
        return "text"
    if isinstance(value, list) and value and all(isinstance(v, list) and len(v) == 2 for v in value):
        return "list of [low, high] intervals"
    return "list"


def _records_by_id(value: Any) -> bool:
    """Whether a list holds records each named by a distinct ``RECORD_ID`` (addressed by that name)."""
    if not isinstance(value, list) or not value or not all(isinstance(v, Mapping) for v in value):
        return False
    ids = [v.get(RECORD_ID) for v in value]
    return all(isinstance(i, str) and i and not i.isdigit() for i in ids) and len(set(ids)) == len(ids)


def _leaves(value: Any, path: str = "") -> Iterable[tuple[str, Any]]:
    if _records_by_id(value):
        for item in value:
            yield from _leaves(item, f"{path}.{item[RECORD_ID]}")
    elif isinstance(value, Mapping):
        for key, sub in value.items():
            name = {_PROBE_TREATMENT: TREATMENT, _PROBE_TREATMENT_2: TREATMENT}.get(str(key), str(key))
            name = INSTRUMENT if name in (*_PROBE_INSTRUMENTS, _PROBE_INSTRUMENT_3) else name
            yield from _leaves(sub, f"{path}.{name}" if path else name)
    else:
        yield path, value


def probe_results() -> list[dict[str, Any]]:
    """Results of the estimator on three generated designs (fixed seed; only the paths matter, not the values):
    one instrument with robust covariance; two instruments clustered; LIML with weights, two treatments and three
    instruments."""
    import numpy as np
    import pandas as pd

    from ivdossier.estimation.api import estimate

    rng = np.random.default_rng(20260131)
    n = 120
    a, b, c, u = (rng.normal(size=n) for _ in range(4))
    x, x2 = a + 0.5 * b + u + rng.normal(size=n), b + c + rng.normal(size=n)
    frame = pd.DataFrame({"y": x + x2 + u, _PROBE_TREATMENT: x, _PROBE_TREATMENT_2: x2, _PROBE_INSTRUMENTS[0]: a,
                          _PROBE_INSTRUMENTS[1]: b, _PROBE_INSTRUMENT_3: c, "w": rng.normal(size=n),
                          "g": np.repeat(np.arange(30), 4), "wt": rng.uniform(0.5, 2.0, size=n)})  # fmt: skip
    one = estimate(
        frame, outcome="y", treatment=_PROBE_TREATMENT, instruments=_PROBE_INSTRUMENTS[0], controls="w"
    )
    two = estimate(frame, outcome="y", treatment=_PROBE_TREATMENT, instruments=list(_PROBE_INSTRUMENTS),
                   controls="w", cluster="g", vcov="clustered")  # fmt: skip
    three = estimate(frame, outcome="y", treatment=[_PROBE_TREATMENT, _PROBE_TREATMENT_2],
                     instruments=[*_PROBE_INSTRUMENTS, _PROBE_INSTRUMENT_3], weights="wt", method="liml")  # fmt: skip
    return [one.to_dict(), two.to_dict(), three.to_dict()]


def probe_quantities() -> tuple[Quantity, ...]:
    """Every path the estimator reports on the generated designs, sorted, with its kind and whether some design
    leaves it empty (the source of ``QUANTITIES``; a test keeps the two equal)."""
    return collect_quantities(probe_results())


def probe_kind_quantities() -> dict[str, tuple[Quantity, ...]]:
    """Every path each kind of ``RULE_KINDS`` reports on its generated designs (``plan_probes``): the source of
    ``plan_quantities_kinds.KIND_QUANTITIES``; a test keeps the two equal."""
    from ivdossier.workflows.plan_probes import PROBES

    return {kind: collect_quantities(PROBES[kind](), kind) for kind in RULE_KINDS}


def collect_quantities(
    designs: Sequence[Mapping[str, Any]], run_kind: str = ESTIMATE
) -> tuple[Quantity, ...]:
    """The leaf paths of several results of one kind of run, sorted, with their kinds and whether some result
    leaves them empty."""
    seen: dict[str, list[Any]] = {}
    for results in designs:
        for path, value in _leaves(results):
            seen.setdefault(path, []).append(value)
    parents = {p.rsplit(".", 1)[0] for p in seen if "." in p}
    out = []
    for path, values in sorted(seen.items()):
        if path in parents:  # empty in one design, a group of quantities in another: listed by its members
            continue
        kinds = [k for k in (_kind(v) for v in values) if k is not None]
        empty = len(values) < len(designs) or any(v is None for v in values)
        out.append(Quantity(path, kinds[0] if kinds else "empty in every generated design", empty, run_kind))
    return tuple(out)


# What `probe_quantities()` returns for the current estimator; tests/test_plan_quantities.py keeps the two equal
# (after a change to the results, paste the list its failure prints).
QUANTITIES: tuple[Quantity, ...] = (
    Quantity("alpha", "number", False),
    Quantity("ci.<treatment>", "list", False),
    Quantity("ci_reference", "text", False),
    Quantity("coef.<treatment>", "number", False),
    Quantity("conventions.absorbed_df", "text", False),
    Quantity("conventions.bread", "text", False),
    Quantity("conventions.estimator", "text", False),
    Quantity("conventions.fuller", "text", False),
    Quantity("conventions.intervals", "text", False),
    Quantity("conventions.partialled", "text", False),
    Quantity("conventions.small_sample", "text", False),
    Quantity("conventions.vcov", "text", False),
    Quantity("conventions.weights", "text", False),
    Quantity("cov", "list", False),
    Quantity("df_resid", "whole number", False),
    Quantity("endogeneity.cov", "text", False),
    Quantity("endogeneity.df", "whole number", False),
    Quantity("endogeneity.distribution", "text", False),
    Quantity("endogeneity.durbin.df", "whole number", False),
    Quantity("endogeneity.durbin.distribution", "text", False),
    Quantity("endogeneity.durbin.form", "text", False),
    Quantity("endogeneity.durbin.p_value", "number", False),
    Quantity("endogeneity.durbin.statistic", "number", False),
    Quantity("endogeneity.f_df", "list", False),
    Quantity("endogeneity.f_p_value", "number", False),
    Quantity("endogeneity.f_statistic", "number", False),
    Quantity("endogeneity.null", "text", False),
    Quantity("endogeneity.p_value", "number", False),
    Quantity("endogeneity.statistic", "number", False),
    Quantity("endogeneity.test", "text", False),
    Quantity("first_stage.by_endog.<treatment>.coefficients.<instrument>", "number", False),
    Quantity("first_stage.by_endog.<treatment>.endog", "text", False),
    Quantity("first_stage.by_endog.<treatment>.partial_f", "number", False),
    Quantity("first_stage.by_endog.<treatment>.partial_f_cov", "text", False),
    Quantity("first_stage.by_endog.<treatment>.partial_f_df", "list", False),
    Quantity("first_stage.by_endog.<treatment>.partial_f_p_value", "number", False),
    Quantity("first_stage.by_endog.<treatment>.partial_r2", "number", False),
    Quantity("first_stage.by_endog.<treatment>.robust_f", "number", False),
    Quantity("first_stage.by_endog.<treatment>.robust_f_cov", "text", False),
    Quantity("first_stage.by_endog.<treatment>.robust_f_df", "list", False),
    Quantity("first_stage.by_endog.<treatment>.robust_f_p_value", "number", False),
    Quantity("first_stage.by_endog.<treatment>.robust_f_reason", "empty in every generated design", True),
    Quantity("first_stage.by_endog.<treatment>.std_errors.<instrument>", "number", False),
    Quantity("identification", "empty in every generated design", True),
    Quantity("kappa", "number", False),
    Quantity("kappa_liml", "number", True),
    Quantity("method", "text", False),
    Quantity("n", "whole number", False),
    Quantity("n_clusters", "list", False),
    Quantity("n_dropped", "whole number", False),
    Quantity("outcome", "text", False),
    Quantity("overid.caution", "text", False),
    Quantity("overid.cov", "text", False),
    Quantity("overid.df", "whole number", True),
    Quantity("overid.distribution", "text", True),
    Quantity("overid.p_value", "number", True),
    Quantity("overid.reason", "text", True),
    Quantity("overid.statistic", "number", True),
    Quantity("overid.test", "text", True),
    Quantity("p_value.<treatment>", "number", False),
    Quantity("partialled.absorbed_levels", "whole number", False),
    Quantity("partialled.absorbed_levels_nested_in_cluster", "whole number", False),
    Quantity("partialled.columns", "whole number", False),
    Quantity("partialled.fixed_effect_levels", "list", False),
    Quantity("reduced_form.coefficients.<instrument>", "number", False),
    Quantity("reduced_form.cov", "text", False),
    Quantity("reduced_form.df", "list", False),
    Quantity("reduced_form.p_value", "number", False),
    Quantity("reduced_form.std_errors.<instrument>", "number", False),
    Quantity("reduced_form.wald_f", "number", False),
    Quantity("se.<treatment>", "number", False),
    Quantity("sigma", "number", False),
    Quantity("spec.absorb", "list", False),
    Quantity("spec.alpha", "number", False),
    Quantity("spec.cluster", "list", False),
    Quantity("spec.controls", "list", False),
    Quantity("spec.fuller_alpha", "number", False),
    Quantity("spec.instruments", "list", False),
    Quantity("spec.method", "text", False),
    Quantity("spec.outcome", "text", False),
    Quantity("spec.small_sample", "yes/no", False),
    Quantity("spec.treatment", "list", False),
    Quantity("spec.vcov", "text", False),
    Quantity("spec.weights", "text", True),
    Quantity("strength.cragg_donald_f", "number", False),
    Quantity("strength.cragg_donald_reason", "empty in every generated design", True),
    Quantity("strength.effective_f.benchmark", "text", True),
    Quantity("strength.effective_f.critical_values.tau_10pct", "number", True),
    Quantity("strength.effective_f.critical_values.tau_20pct", "number", True),
    Quantity("strength.effective_f.critical_values.tau_30pct", "number", True),
    Quantity("strength.effective_f.critical_values.tau_5pct", "number", True),
    Quantity("strength.effective_f.k_eff.tau_10pct", "number", True),
    Quantity("strength.effective_f.k_eff.tau_20pct", "number", True),
    Quantity("strength.effective_f.k_eff.tau_30pct", "number", True),
    Quantity("strength.effective_f.k_eff.tau_5pct", "number", True),
    Quantity("strength.effective_f.source", "text", True),
    Quantity("strength.effective_f.statistic", "number", True),
    Quantity("strength.effective_f.test_level", "number", True),
    Quantity("strength.effective_f_reason", "text", True),
    Quantity("strength.instrument_condition", "number", False),
    Quantity("strength.instrument_condition_note", "text", False),
    Quantity("strength.kp_cov", "text", False),
    Quantity("strength.kp_rk_lm_reason", "empty in every generated design", True),
    Quantity("strength.kp_rk_lm_test.cov", "text", False),
    Quantity("strength.kp_rk_lm_test.df", "whole number", False),
    Quantity("strength.kp_rk_lm_test.distribution", "text", False),
    Quantity("strength.kp_rk_lm_test.note", "text", False),
    Quantity("strength.kp_rk_lm_test.null", "text", False),
    Quantity("strength.kp_rk_lm_test.p_value", "number", False),
    Quantity("strength.kp_rk_lm_test.source", "text", False),
    Quantity("strength.kp_rk_lm_test.statistic", "number", False),
    Quantity("strength.kp_rk_lm_test.test", "text", False),
    Quantity("strength.kp_rk_wald_f", "number", False),
    Quantity("strength.kp_rk_wald_reason", "empty in every generated design", True),
    Quantity("strength.kp_rk_wald_test.df", "whole number", False),
    Quantity("strength.kp_rk_wald_test.f_form", "number", False),
    Quantity("strength.kp_rk_wald_test.f_form_note", "text", False),
    Quantity("strength.kp_rk_wald_test.p_value", "number", False),
    Quantity("strength.kp_rk_wald_test.rk_wald", "number", False),
    Quantity("strength.notes", "list", False),
    Quantity("strength.sanderson_windmeijer_f.<treatment>", "number", True),
    Quantity("strength.sanderson_windmeijer_reason", "text", True),
    Quantity("strength.stock_yogo.compare_with", "text", False),
    Quantity("strength.stock_yogo.values", "list", False),
    Quantity("t.<treatment>", "number", False),
    Quantity("vcov", "text", False),
    Quantity("weak_iv_robust.anderson_rubin.confidence_level", "number", False),
    Quantity("weak_iv_robust.anderson_rubin.confidence_set", "list of [low, high] intervals", True),
    Quantity("weak_iv_robust.anderson_rubin.cov", "text", False),
    Quantity("weak_iv_robust.anderson_rubin.df", "list", False),
    Quantity("weak_iv_robust.anderson_rubin.null", "list", False),
    Quantity("weak_iv_robust.anderson_rubin.p_value", "number", False),
    Quantity("weak_iv_robust.anderson_rubin.reason", "text", True),
    Quantity("weak_iv_robust.anderson_rubin.set_method", "text", True),
    Quantity("weak_iv_robust.anderson_rubin.shape", "text", True),
    Quantity("weak_iv_robust.anderson_rubin.statistic", "number", False),
    Quantity("weak_iv_robust.anderson_rubin.statistic_form", "text", False),
    Quantity("weak_iv_robust.clr.applicable", "yes/no", False),
    Quantity("weak_iv_robust.clr.conditioning_qt", "number", True),
    Quantity("weak_iv_robust.clr.confidence_level", "number", True),
    Quantity("weak_iv_robust.clr.confidence_set", "list of [low, high] intervals", True),
    Quantity("weak_iv_robust.clr.cov", "text", True),
    Quantity("weak_iv_robust.clr.null", "number", True),
    Quantity("weak_iv_robust.clr.p_value", "number", True),
    Quantity("weak_iv_robust.clr.p_value_method", "text", False),
    Quantity("weak_iv_robust.clr.reason", "text", True),
    Quantity("weak_iv_robust.clr.shape", "text", True),
    Quantity("weak_iv_robust.clr.source", "text", False),
    Quantity("weak_iv_robust.clr.statistic", "number", True),
    Quantity("weak_iv_robust.clr.version", "text", True),
    Quantity("weak_iv_robust.tf.applicable", "yes/no", False),
    Quantity("weak_iv_robust.tf.critical_value", "number", True),
    Quantity("weak_iv_robust.tf.estimate", "number", True),
    Quantity("weak_iv_robust.tf.first_stage_f", "number", True),
    Quantity("weak_iv_robust.tf.first_stage_f_cov", "text", True),
    Quantity("weak_iv_robust.tf.interval", "list", True),
    Quantity("weak_iv_robust.tf.level", "number", False),
    Quantity("weak_iv_robust.tf.reason", "text", True),
    Quantity("weak_iv_robust.tf.significant_5pct", "yes/no", True),
    Quantity("weak_iv_robust.tf.source", "text", False),
    Quantity("weak_iv_robust.tf.std_error", "number", True),
    Quantity("weak_iv_robust.tf.t_ratio", "number", True),
)


def quantities(run_kind: str | None = None) -> tuple[Quantity, ...]:
    """Every path a run of ``run_kind`` reports (``QUANTITIES`` for an estimate), or of every kind when None."""
    from ivdossier.workflows.plan_quantities_kinds import KIND_QUANTITIES

    if run_kind is None:
        return QUANTITIES + tuple(q for kind in RULE_KINDS for q in KIND_QUANTITIES[kind])
    return QUANTITIES if run_kind == ESTIMATE else KIND_QUANTITIES.get(run_kind, ())


def _matches(pattern: Sequence[str], parts: Sequence[str], names: Mapping[str, set[str]], kind: str) -> bool:
    if len(parts) < len(pattern):
        return False
    for want, got in zip(pattern, parts, strict=False):
        if want in (TREATMENT, INSTRUMENT):
            allowed = names.get(want)
            if allowed is not None and got not in allowed:
                return False
        elif want != got:
            return False
    rest = parts[len(pattern) :]  # list items: ci.x.0, confidence_set.0.1
    return not rest or (kind.startswith("list") and len(rest) <= 2 and all(p.isdigit() for p in rest))


def _names(specs: Sequence[Mapping[str, Any]]) -> dict[str, set[str]]:
    """The treatment and instrument column names a plan's specs use (no restriction when there is no spec)."""
    if not specs:
        return {}
    treatments = {str(t) for s in specs for t in (s.get("treatment") or [])}
    instruments = {str(z) for s in specs for z in (s.get("instruments") or [])}
    return {TREATMENT: treatments, INSTRUMENT: instruments}


def is_known(path: str, specs: Sequence[Mapping[str, Any]] = ()) -> bool:
    """Whether a run reports `path` (qualified by its run kind unless it is an estimate's; names bound to the plan's
    treatment and instrument columns)."""
    run_kind, bare = split_path(path)
    names = _names(specs)
    parts = bare.split(".")
    return any(_matches(q.path.split("."), parts, names, q.kind) for q in quantities(run_kind))


def _paths(cond: Any) -> Iterable[str]:
    if not isinstance(cond, Mapping):
        return
    for key in ("all", "any"):
        for item in cond.get(key) or []:
            yield from _paths(item)
    if "not" in cond:
        yield from _paths(cond["not"])
    for key in ("statistic", "compare_to"):
        if isinstance(cond.get(key), str):
            yield cond[key]


def rule_kind(rule: Mapping[str, Any]) -> str:
    """The kind of run a rule reads (every path of one rule names the same kind; ``check_rule_paths`` ensures it)."""
    kinds = [split_path(p)[0] for p in _paths(rule.get("when"))]
    return kinds[0] if kinds else ESTIMATE


def _check_kinds(rule: Mapping[str, Any]) -> None:
    where = f"decision rule {rule.get('id')!r}"
    paths = list(_paths(rule.get("when")))
    known = (ESTIMATE, *RULE_KINDS)
    for path in paths:
        kind = split_path(path)[0]
        if kind not in known:
            raise InvalidInputError(
                f"{where} names {path!r}, but {kind!r} is not a kind of run a rule may read; qualify a path with "
                f"one of {', '.join(RULE_KINDS)} (e.g. fragility-influence:t_significance_flips), or write an "
                "estimate's path bare."
            )
    kinds = sorted({split_path(p)[0] for p in paths})
    if len(kinds) > 1:
        shown = "; ".join(f"{k}: {', '.join(p for p in paths if split_path(p)[0] == k)}" for k in kinds)
        raise InvalidInputError(
            f"{where} reads several kinds of run ({shown}); a rule is applied to one run at a time, so write one "
            "rule per kind of run."
        )


def check_rule_paths(rules: Sequence[Mapping[str, Any]], specs: Sequence[Mapping[str, Any]] = ()) -> None:
    """Refuse a rule that names a quantity no run of its kind reports (suggesting the closest), that mixes kinds of
    run, or, given the plan's specs, a treatment or instrument column they do not use."""
    names = _names(specs)
    for rule in rules:
        _check_kinds(rule)
        for path in _paths(rule.get("when")):
            if is_known(path, specs):
                continue
            where = f"decision rule {rule.get('id')!r} names {path!r}"
            if is_known(path):
                raise InvalidInputError(
                    f"{where}, but the plan's specs have treatment(s) {', '.join(sorted(names[TREATMENT])) or 'none'} "
                    f"and instrument(s) {', '.join(sorted(names[INSTRUMENT])) or 'none'}; use those column names."
                )
            run_kind = split_path(path)[0]
            known = [q.rule_path for q in quantities(run_kind)]
            close = difflib.get_close_matches(path, known, n=3, cutoff=0.6)
            hint = f" Did you mean {' or '.join(close)}?" if close else ""
            what = "estimation" if run_kind == ESTIMATE else run_kind
            raise InvalidInputError(
                f"{where}, which no {what} run reports.{hint} "
                "`ivdossier plan quantities` lists every quantity a rule may use."
            )
