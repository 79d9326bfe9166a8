"""Decision rules over every kind of run: a path qualified by its run kind (fragility-influence:..., variants:...)
is checked when a plan is edited and frozen, and `plan compare` applies each rule to the compared runs of its kind;
a statistic that does not apply to a run makes the rule "not applicable" with the analysis's own reason."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.vocabulary import NotApplicable
from ivdossier.workflows import plan_quantities as pq
from ivdossier.workflows import plan_rules


def _rule(rid: str, path: str, op: str, value: Any) -> dict[str, Any]:
    return {
        "id": rid,
        "when": {"statistic": path, "op": op, "value": value},
        "then": "go",
        "otherwise": "stop",
    }


def test_qualified_paths_are_known_only_for_their_own_kind() -> None:
    assert pq.is_known("fragility-influence:t_significance_flips")
    assert pq.is_known("variants:egger.intercept_p") and pq.is_known("variants:ivw.ci_fixed.0")
    assert pq.is_known(
        "design-decision-makers:estimates.estimates.ujive.estimate"
    )  # a record named by method
    assert pq.is_known("confounder-strength:iv.rv") and pq.is_known("fragility-bootstrap:wild.t_test.p_value")
    assert not pq.is_known("t_significance_flips")  # bare paths are an estimate's
    assert not pq.is_known("variants:strength.effective_f.statistic")  # an estimate's path under another kind
    assert pq.split_path("variants:egger.p") == ("variants", "egger.p")
    assert pq.split_path("overid.p_value") == ("estimate", "overid.p_value")


def test_rules_naming_an_unknown_kind_several_kinds_or_a_misspelled_path_are_refused() -> None:
    with pytest.raises(InvalidInputError, match=r"'variant' is not a kind of run a rule may read; qualify"):
        pq.check_rule_paths([_rule("r", "variant:egger.p", "<", 0.05)])
    mixed = {"id": "both", "then": "a", "otherwise": "b", "when": {"all": [
        {"statistic": "fragility-influence:t_significance_flips", "op": "==", "value": 0},
        {"statistic": "strength.effective_f.statistic", "op": ">=", "value": 10}]}}  # fmt: skip
    with pytest.raises(
        InvalidInputError,
        match=r"decision rule 'both' reads several kinds of run \(estimate: strength\.effective_f\.statistic; "
        r"fragility-influence: fragility-influence:t_significance_flips\); a rule is applied to one run",
    ):
        pq.check_rule_paths([mixed])
    with pytest.raises(
        InvalidInputError,
        match=r"names 'variants:egger\.intercept_pv', which no variants run reports\. Did you mean "
        r"variants:egger\.intercept_p",
    ):
        pq.check_rule_paths([_rule("r", "variants:egger.intercept_pv", "<", 0.05)])


def test_not_applicable_is_read_the_same_from_every_stored_shape() -> None:
    # the two JSON shapes that results store for "does not apply" read back as one vocabulary object
    assert NotApplicable.from_view({"status": "not applicable", "reason": "OLS"}) == NotApplicable("OLS")
    assert NotApplicable.from_view({"applicable": False, "reason": "2 clusters"}) == NotApplicable(
        "2 clusters"
    )
    assert NotApplicable.from_view({"applicable": True, "reason": None}) is None
    from ivdossier.estimation.influence import InfluenceResult
    from ivdossier.estimation.variant_summary import VariantNotApplicable

    # typed results with their own applicable/reason fields read as the same object
    assert NotApplicable.of(InfluenceResult(False, "2 clusters")) == NotApplicable("2 clusters")
    assert NotApplicable.of(VariantNotApplicable("MR-Egger", "three needed")) == NotApplicable("three needed")
    assert NotApplicable.of(NotApplicable("x")) == NotApplicable("x") and NotApplicable.of(object()) is None
    influence = {"applicable": False, "reason": "2 clusters: too few", "t_significance_flips": None}
    out = plan_rules.evaluate_rule(
        _rule("flips", "fragility-influence:t_significance_flips", "==", 0), influence
    )
    assert (out.holds, out.status) == (None, "not applicable")
    assert out.action == "fragility-influence:t_significance_flips: not applicable (2 clusters: too few)"
    # a section that does not apply, inside a result that does (a summary-data run with two variants)
    variants = {"egger": {"statistic": "MR-Egger", "reason": "needs three variants", "applicable": False}}
    out = plan_rules.evaluate_rule(_rule("e", "variants:egger.intercept_p", ">=", 0.05), variants)
    assert out.status == "not applicable" and out.action.endswith("not applicable (needs three variants)")
    # an applicable section whose statistic is missing is not evaluable, not "not applicable"
    out = plan_rules.evaluate_rule(_rule("e", "variants:egger.intercept_p", ">=", 0.05), {"egger": {}})
    assert (
        out.status == "not evaluable"
        and out.action == "not evaluable: the run has no variants:egger.intercept_p"
    )


# ---------------------------------------------------------------- end to end on stored runs


def _cluster_data(path: Path, n_clusters: int) -> Path:
    rng = np.random.default_rng(21)
    n = 30 * n_clusters
    g = np.repeat(np.arange(n_clusters), 30)
    z, u = rng.normal(size=n), rng.normal(size=n)
    x = 0.8 * z + u + rng.normal(size=n)
    frame = pd.DataFrame({"y": -0.5 * x + u + rng.normal(size=n), "x": x, "z": z, "district": g})
    frame.to_csv(path, index=False)
    return path


def _variants(path: Path, k: int) -> Path:
    rng = np.random.default_rng(22)
    bx = rng.uniform(0.05, 0.2, k)
    pd.DataFrame({"variant": [f"rs{i}" for i in range(k)], "exposure_effect": bx, "exposure_se": 0.01,
                  "outcome_effect": 0.3 * bx + rng.normal(0, 0.01, k), "outcome_se": 0.01}).to_csv(path, index=False)  # fmt: skip
    return path


def _attach(cli, *args: str) -> str:  # type: ignore[no-untyped-def]
    code, out, err = cli(*args, "--attach", "fibre")
    assert code == 0, err
    return out.rsplit("stored as run ", 1)[1].split()[0].rstrip(".")


def test_plan_compare_applies_each_rule_to_the_runs_of_its_kind(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "tele", "--title", "T", "--treatment", "x", "--outcome", "y")[0] == 0
    assert cli("instrument", "add", "fibre", "--program", "tele", "--name", "F", "--column", "z")[0] == 0
    model = ("--outcome", "y", "--treatment", "x", "--instrument", "z", "--cluster", "district")
    ten = _cluster_data(tmp_path / "ten.csv", 10)
    influence = _attach(cli, "fragility", "influence", "--data", str(ten), *model)
    two = _attach(
        cli, "fragility", "influence", "--data", str(_cluster_data(tmp_path / "two.csv", 2)), *model
    )
    many = _attach(cli, "variants", "--data", str(_variants(tmp_path / "v8.csv", 8)), "--draws", "50")
    pair = _attach(cli, "variants", "--data", str(_variants(tmp_path / "v2.csv", 2)), "--draws", "50")
    rules = [
        _rule("no-flips", "fragility-influence:t_significance_flips", "==", 0),
        _rule("no-pleiotropy", "variants:egger.intercept_p", ">=", 0.05),
        _rule("ujive-negative", "design-decision-makers:estimates.estimates.ujive.estimate", "<", 0),
    ]
    (tmp_path / "rules.json").write_text(json.dumps(rules))
    assert cli("plan", "draft", "fibre")[0] == 0
    code, _, err = cli("plan", "edit", "fibre-plan", "--rules", str(tmp_path / "rules.json"))
    assert code == 0, err
    code, _, err = cli("plan", "freeze", "fibre-plan", "--receipt", str(tmp_path / "seal.json"))
    assert code == 0, err

    code, out, err = cli("plan", "compare", "fibre-plan", influence, two, many, pair, "--json")
    assert code == 0, err
    payload = json.loads(out)
    by_run = {r["run"]: {o["rule"]: o for o in r["decision_rules"]} for r in payload["runs"]}
    assert set(by_run[influence]) == set(by_run[two]) == {"no-flips"}  # only the rules of the run's kind
    assert set(by_run[many]) == set(by_run[pair]) == {"no-pleiotropy"}
    code, out, err = cli(
        "fragility", "influence", "--data", str(ten), *model, "--json"
    )  # the same analysis again
    flips = json.loads(out)["t_significance_flips"]
    decided = by_run[influence]["no-flips"]
    assert decided["comparisons"][0]["value"] == flips and decided["holds"] is (flips == 0)
    assert by_run[two]["no-flips"]["status"] == "not applicable"
    assert by_run[two]["no-flips"]["action"] == (
        "fragility-influence:t_significance_flips: not applicable (2 clusters: leaving one out leaves too few "
        "for a cluster covariance)"
    )
    egger = by_run[many]["no-pleiotropy"]
    assert egger["status"] in ("holds", "fails") and isinstance(egger["comparisons"][0]["value"], float)
    assert by_run[pair]["no-pleiotropy"]["action"] == (
        "variants:egger.intercept_p: not applicable (it fits a line with an intercept and needs at least three "
        "variants, got 2)"
    )
    assert "decision rule 'ujive-negative' reads design-decision-makers runs and none was compared; add one to " \
        "apply it" in payload["notes"]  # fmt: skip
    # a summary-data run is compared on the spec fields it stores (its level), not on a model it has not got
    pair_row = next(r for r in payload["runs"] if r["run"] == pair)
    assert pair_row["deviations"] == []

    code, out, _ = cli("plan", "compare", "fibre-plan", two)
    assert code == 0 and "not applicable" in out and "not evaluable" not in out


def test_a_run_that_stores_no_model_spec_is_compared_only_by_its_rules() -> None:
    from ivdossier.workflows.plan_check import RunView, compare_runs

    content = {"specs": [{"id": "fibre", "outcome": "y", "treatment": ["x"], "instruments": ["z"]}],
               "decision_rules": [_rule("mean-f", "variants:ratios.mean_f", ">=", 10)]}  # fmt: skip
    view = RunView("v-1", {"data": "v.csv", "draws": 50}, {"ratios": {"mean_f": 12.5}}, run_kind="variants")
    (row,) = compare_runs(content, [view])
    assert row.deviations == () and row.matched_spec is None
    assert row.notes == ("a variants run stores no model spec, so only the decision rules apply to it",)
    assert [(o.rule_id, o.holds) for o in row.rules] == [("mean-f", True)]  # 12.5 >= 10
