"""Decision rules as data: validation, evaluation on a real run's results, and deviations of runs from a plan."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.workflows import plan_check, plan_rules


def _results(strength: float, seed: int = 3, **kw: Any) -> dict[str, Any]:
    from ivdossier.estimation.api import estimate

    rng = np.random.default_rng(seed)
    n = 600
    z, u, w = rng.normal(size=n), rng.normal(size=n), rng.normal(size=n)
    x = strength * z + u + rng.normal(size=n)
    y = -0.6 * x + u + 0.3 * w
    data = pd.DataFrame({"y": y, "x": x, "z": z, "w": w})
    return estimate(data, outcome="y", treatment="x", instruments="z", controls="w", **kw).to_dict()


def test_default_rules_evaluate_on_a_strong_and_a_weak_run() -> None:
    rules = plan_rules.default_rules(1)
    strong, weak = _results(0.8), _results(0.02)
    gate = plan_rules.evaluate_rule(rules[0], strong)
    eff = strong["strength"]["effective_f"]
    # the rule compares the run's own effective F with its own tau = 10 % critical value (23.109 just identified,
    # Montiel Olea and Pflueger 2013 as listed in REFERENCE_VALUES.md)
    assert eff["critical_values"]["tau_10pct"] == pytest.approx(23.109, abs=1e-3)
    assert gate.holds is (eff["statistic"] >= eff["critical_values"]["tau_10pct"]) is True
    assert gate.action.startswith("report 2SLS with t-based inference")
    assert gate.comparisons[0].threshold_from == "strength.effective_f.critical_values.tau_10pct"
    weak_gate = plan_rules.evaluate_rule(rules[0], weak)
    assert weak_gate.holds is False and weak_gate.action.startswith("report the Anderson–Rubin set")
    claim = plan_rules.evaluate_rule(rules[1], strong)
    ar_set = strong["weak_iv_robust"]["anderson_rubin"]["confidence_set"]
    assert claim.holds is all(not (lo <= 0 <= hi) for lo, hi in ar_set)


def test_not_applicable_statistics_make_a_rule_not_applicable_and_missing_ones_not_evaluable() -> None:
    rule = plan_rules.default_rules(2)[2]
    outcome = plan_rules.evaluate_rule(rule, _results(0.8))  # just identified: overid p-value is null
    assert outcome.holds is None and outcome.status == "not applicable"
    assert outcome.action == (
        "overid.p_value: not applicable (just identified (1 instrument(s) for 1 endogenous regressor(s)): there "
        "are no over-identifying restrictions to test)"
    )
    missing = plan_rules.evaluate_rule(rule, {})
    assert missing.status == "not evaluable"
    assert missing.action == "not evaluable: the run has no overid.p_value"


def test_composite_conditions_and_interval_operators() -> None:
    results = {"a": 5, "b": {"c": 3.0}, "set": [["-inf", -1.0], [2.0, "inf"]], "flag": True}
    rule = {
        "id": "combo",
        "when": {"all": [{"statistic": "a", "op": ">", "compare_to": "b.c"},
                         {"any": [{"statistic": "set", "op": "excludes", "value": 0},
                                  {"statistic": "flag", "op": "==", "value": False}]},
                         {"not": {"statistic": "set", "op": "includes", "value": 0.5}}]},
        "then": "yes",
        "otherwise": "no",
    }  # fmt: skip
    plan_rules.check_rule(rule)
    out = plan_rules.evaluate_rule(rule, results)
    assert (out.holds, out.action) == (True, "yes")
    assert plan_rules.evaluate_rule(rule, {**results, "a": 3}).holds is False


@pytest.mark.parametrize(
    ("rule", "message"),
    [
        ({"when": {}}, r"decision rule #1 needs an 'id'"),
        ({"id": "r", "when": {"statistic": "x", "op": ">=", "value": 1}, "then": "a"}, r"'r' needs 'otherwise'"),
        ({"id": "r", "when": {"statistic": "x", "op": "~", "value": 1}, "then": "a", "otherwise": "b"},
         r"op '~' is not known"),
        ({"id": "r", "when": {"statistic": "x", "op": ">="}, "then": "a", "otherwise": "b"},
         r"give exactly one of 'value'"),
        ({"id": "r", "when": {"all": []}, "then": "a", "otherwise": "b"}, r"'all' needs a non-empty list"),
        ({"id": "r", "when": {"statistic": "x", "op": ">=", "value": 1}, "then": "a", "otherwise": "b", "x": 1},
         r"unknown key\(s\) x"),
    ],
)  # fmt: skip
def test_malformed_rules_are_refused_with_the_rule_and_field(rule: dict[str, Any], message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        plan_rules.check_rules([rule])


def test_duplicate_rule_ids_are_refused() -> None:
    rule = plan_rules.default_rules(1)[0]
    with pytest.raises(InvalidInputError, match="strength-gate are used twice"):
        plan_rules.check_rules([rule, rule])


def test_compare_lists_every_deviation_from_the_planned_spec_and_sample() -> None:
    spec = {"id": "fibre", "outcome": "y", "treatment": ["x"], "instruments": ["z"], "controls": ["w"],
            "absorb": [], "cluster": ["g"], "weights": None, "method": "2sls", "vcov": "clustered",
            "small_sample": True, "alpha": 0.05}  # fmt: skip
    content = {"specs": [spec], "data": {"expected_n": 600, "dataset_sha256": "a" * 64},
               "decision_rules": plan_rules.default_rules(1)}  # fmt: skip
    results = _results(0.8)
    on_plan = plan_check.RunView("on-plan", {**spec}, {**results}, "a" * 64, datetime(2026, 2, 1, tzinfo=UTC))
    off_spec = {
        **results["spec"],
        "controls": ["w", "age"],
        "vcov": "heteroskedastic",
        "cluster": [],
        "instruments": ["z", "z2"],
    }
    off = plan_check.RunView(
        "off-plan", off_spec, {**results, "n": 580}, "b" * 64, datetime(2026, 1, 1, tzinfo=UTC)
    )
    got = plan_check.compare_runs(content, [on_plan, off], frozen_at=datetime(2026, 1, 15, tzinfo=UTC))
    assert got[0].deviations == ()
    assert {(d.kind, d.field, str(d.planned), str(d.actual)) for d in got[1].deviations} == {
        ("controls", "controls", "['w']", "['age', 'w']"),
        ("vcov", "vcov", "clustered", "heteroskedastic"),
        ("vcov", "cluster", "['g']", "[]"),
        ("instrument set", "instruments", "['z']", "['z', 'z2']"),
        ("sample", "n", "600", "580"),
        ("sample", "dataset_sha256", "a" * 64, "b" * 64),
    }
    assert got[1].notes == ("run off-plan was made before the plan was frozen (2026-01-15T00:00:00Z)",)
    assert [r.rule_id for r in got[1].rules] == ["strength-gate", "effect-claim"]
