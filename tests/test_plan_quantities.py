"""Decision rules may name only quantities an estimation run reports: checked when a plan is edited and frozen, and
listed by `plan quantities`."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.models import Plan
from ivdossier.workflows import plan_quantities as pq
from ivdossier.workflows import plan_rules
from ivdossier.workflows import plans as drafting


def test_the_stored_list_is_what_the_estimator_reports() -> None:
    probed = pq.probe_quantities()
    fresh = "\n".join(f"    Quantity({q.path!r}, {q.kind!r}, {q.may_be_empty})," for q in probed)
    assert probed == pq.QUANTITIES, f"the results changed; replace QUANTITIES with:\n{fresh}"


def test_the_stored_lists_of_other_kinds_are_what_their_analyses_report() -> None:
    from ivdossier.workflows.plan_quantities_kinds import KIND_QUANTITIES

    probed = pq.probe_kind_quantities()  # reruns every analysis on its generated designs
    lines = ["KIND_QUANTITIES: dict[str, tuple[Quantity, ...]] = {"]
    for kind, qs in probed.items():
        lines += [f"    {kind!r}: ("]
        lines += [f"        Quantity({q.path!r}, {q.kind!r}, {q.may_be_empty}, {kind!r})," for q in qs]
        lines += ["    ),"]
    fresh = "\n".join([*lines, "}"])
    assert probed == KIND_QUANTITIES, f"a result type changed; replace KIND_QUANTITIES with:\n{fresh}"
    assert set(probed) == set(pq.RULE_KINDS)
    from ivdossier.workflows.analyses import ANALYSES

    assert set(pq.RULE_KINDS) <= {a.run_kind for a in ANALYSES.values()}  # every kind is one the table stores


def _results(n_instruments: int) -> dict[str, Any]:
    from ivdossier.estimation.api import estimate

    rng = np.random.default_rng(8)
    n = 400
    z = rng.normal(size=(n, 2))
    u = rng.normal(size=n)
    x = z @ np.array([0.7, 0.4]) + u + rng.normal(size=n)
    frame = pd.DataFrame({"visits": -0.5 * x + u, "video": x, "fibre": z[:, 0], "clerk": z[:, 1]})
    instruments = ["fibre", "clerk"][:n_instruments]
    return estimate(frame, outcome="visits", treatment="video", instruments=instruments).to_dict()


def _paths(cond: Any) -> list[str]:
    return list(pq._paths(cond))


@pytest.mark.parametrize("n_instruments", [1, 2])
def test_every_default_rule_names_known_quantities_that_a_real_run_reports(n_instruments: int) -> None:
    results = _results(n_instruments)  # the estimator's own output, not the stored list
    specs = [{"treatment": ["video"], "instruments": ["fibre", "clerk"][:n_instruments]}]
    rules = plan_rules.default_rules(n_instruments)
    pq.check_rule_paths(rules, specs)
    for rule in rules:
        for path in _paths(rule["when"]):
            assert plan_rules.lookup(results, path)[0], path
    # every named-column quantity resolves on the real run once the names are filled in
    for q in pq.QUANTITIES:
        if q.may_be_empty:
            continue
        path = q.path.replace(pq.TREATMENT, "video").replace(pq.INSTRUMENT, "fibre")
        assert plan_rules.lookup(results, path)[0], path


def test_paths_with_list_items_and_column_names() -> None:
    specs = [{"treatment": ["video"], "instruments": ["fibre"]}]
    assert pq.is_known("ci.video.0", specs) and pq.is_known(
        "weak_iv_robust.anderson_rubin.confidence_set.0.1"
    )
    assert pq.is_known("first_stage.by_endog.video.coefficients.fibre", specs)
    assert not pq.is_known("ci.video.low", specs)
    assert not pq.is_known("coef.video.0", specs)  # a number has no items
    assert not pq.is_known("weak_iv_robust.anderson_rubin.confidence_set.0.1.2")
    assert not pq.is_known("coef.vidoe", specs) and pq.is_known("coef.vidoe")  # any name without specs
    assert not pq.is_known("strength")  # a group, not a quantity


@pytest.fixture
def reg(tmp_path: Path) -> Iterator[Registry]:
    from ivdossier.registry.instruments import add_instrument, add_program

    registry = open_registry(str(tmp_path / "r.sqlite"))
    with registry.writing() as s:
        add_program(
            s, actor="ana", slug="tele", title="Telehealth", treatment="video_share", outcome="ed_visits"
        )
        add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre", columns=["fibre_months"])
        drafting.draft_plan(s, actor="ana", target="fibre")
    yield registry
    registry.dispose()


def _rule(path: str, **extra: Any) -> dict[str, Any]:
    return {
        "id": "gate",
        "when": {"statistic": path, "op": ">=", "value": 10, **extra},
        "then": "a",
        "otherwise": "b",
    }


def test_a_misspelled_path_is_refused_when_the_plan_is_edited(reg: Registry) -> None:
    with (
        pytest.raises(
            InvalidInputError,
            match=r"decision rule 'gate' names 'strength\.efective_f\.statistic', which no estimation run reports\. "
            r"Did you mean strength\.effective_f\.statistic",
        ),
        reg.writing() as s,
    ):
        drafting.edit_plan(
            s,
            actor="ana",
            slug="fibre-plan",
            sections={"decision_rules": [_rule("strength.efective_f.statistic")]},
        )
    by_reference = {"id": "gate", "then": "a", "otherwise": "b",
                    "when": {"statistic": "overid.p_value", "op": "<", "compare_to": "overid.pvalue"}}  # fmt: skip
    with (
        pytest.raises(InvalidInputError, match=r"names 'overid\.pvalue', which no estimation"),
        reg.writing() as s,
    ):
        drafting.edit_plan(s, actor="ana", slug="fibre-plan", sections={"decision_rules": [by_reference]})
    with reg.reading() as s:
        rules = (records.get(s, Plan, "fibre-plan").content or {})["decision_rules"]
    assert [r["id"] for r in rules] == ["strength-gate", "effect-claim"]  # nothing was stored


def test_freeze_refuses_a_column_the_plans_specs_do_not_use(reg: Registry) -> None:
    with reg.writing() as s:
        drafting.edit_plan(
            s, actor="ana", slug="fibre-plan", sections={"decision_rules": [_rule("coef.video")]}
        )
    with (
        pytest.raises(
            InvalidInputError,
            match=r"names 'coef\.video', but the plan's specs have treatment\(s\) video_share and instrument\(s\) "
            r"fibre_months; use those column names",
        ),
        reg.writing() as s,
    ):
        drafting.freeze_plan(s, actor="bo", slug="fibre-plan")
    with reg.writing() as s:
        drafting.edit_plan(
            s, actor="ana", slug="fibre-plan", sections={"decision_rules": [_rule("coef.video_share")]}
        )
        assert drafting.freeze_plan(s, actor="bo", slug="fibre-plan").state == "frozen"


def test_plan_quantities_lists_every_quantity(cli) -> None:  # type: ignore[no-untyped-def]
    from ivdossier.workflows.plan_quantities_kinds import KIND_QUANTITIES

    code, out, err = cli("plan", "quantities", "--json")
    assert code == 0, err
    rows = json.loads(out)
    expected = [q.path for q in pq.QUANTITIES] + [
        f"{kind}:{q.path}" for kind in pq.RULE_KINDS for q in KIND_QUANTITIES[kind]
    ]
    assert [r["path"] for r in rows] == expected
    assert {r["run_kind"] for r in rows} == {"estimate", *pq.RULE_KINDS}
    code, out, _ = cli("plan", "quantities", "--run-kind", "variants", "--json")
    assert code == 0 and [r["path"] for r in json.loads(out)] == [
        f"variants:{q.path}" for q in KIND_QUANTITIES["variants"]
    ]
    code, _, err = cli("plan", "quantities", "--run-kind", "variant")
    assert code != 0 and "--run-kind 'variant' is not known; use one of estimate, fragility-bootstrap" in err
    code, out, _ = cli("plan", "quantities")
    assert code == 0
    lines = out.splitlines()
    assert lines[0].startswith(f"Quantities a decision rule may name ({len(rows)}).")
    groups = [ln for ln in lines if ln.endswith(" runs)") or " runs (" in ln]
    assert [g.split(" runs (")[0] for g in groups] == ["estimate", *pq.RULE_KINDS]
    assert "fragility-influence:t_significance_flips" in out and "variants:egger.intercept_p" in out
    row = next(ln for ln in lines if ln.startswith("strength.effective_f.statistic "))
    assert row.split()[1:] == ["number", "yes"]  # empty with two treatments (the LIML design)
    row = next(ln for ln in lines if ln.startswith("coef.<treatment> "))
    assert row.split()[1:] == ["number", "no"]
