"""Verdict rules: one test per row of the rule table in ivdossier.workflows.verdicts (the one verdict engine)."""

from __future__ import annotations

import dataclasses

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.reports.dossier import latest_run
from ivdossier.reports.inputs import LinkInfo, Rating, RunInfo
from ivdossier.reports.sample import iv_results, make_run, ols_results, sample_input
from ivdossier.threats_catalog.graph import BypassPath, ConditionVerdict, GraphVerdict
from ivdossier.vocabulary import AT_RISK, BROKEN, HOLDS, NOT_ASSESSED, Verdict
from ivdossier.workflows.verdicts import (
    RunEvidence,
    derive_verdict,
    derive_verdicts,
    graph_reading,
    run_evidence,
)


def graph(paths: tuple[tuple[str, ...], ...] = (), **values: str | tuple[str, str]) -> GraphVerdict:
    """A graph-check result with the given per-condition values (value, or (value, reason)) and open paths."""
    conditions = []
    for condition, given in values.items():
        value, reason = (given, "") if isinstance(given, str) else given
        conditions.append(ConditionVerdict(condition, value, (reason,) if reason else (), ()))
    open_paths = tuple(
        BypassPath(nodes, ("->",) * (len(nodes) - 1), (), True, "exclusion", "broken", True, (), ())
        for nodes in paths
    )
    return GraphVerdict("fibre_wave", "telehealth", "ed_visits", (), (), True, not open_paths, (), tuple(conditions),
                        open_paths, (), (), False)  # fmt: skip


GRAPH_OK = graph(
    relevance="holds", exclusion=("holds", "every path from Z to Y passes X"), exogeneity="holds"
)
GRAPH_BAD_EXCLUSION = graph((("fibre_wave", "online_pharmacy", "ed_visits"),), exclusion="broken")


def ev(run: RunInfo | None) -> RunEvidence | None:
    return run_evidence(run)


def link(condition: str, state: str, *severities: int, code: str = "TH-1") -> LinkInfo:
    ratings = tuple(Rating(f"r{i}", 3, s) for i, s in enumerate(severities))
    return LinkInfo(threat_code=code, title="a threat", condition=condition, state=state, ratings=ratings)


def strong_run() -> object:
    return make_run(1, results=iv_results(feff=38.4))


@pytest.mark.parametrize("condition", ["relevance", "exclusion", "exogeneity", "monotonicity"])
def test_t1_fatal_link_breaks_any_condition(condition: str) -> None:
    v = derive_verdict(
        condition,
        links=[link(condition, "fatal", 2)],
        claim="written",
        graph=GRAPH_OK,
        evidence=ev(make_run(1)),
    )
    assert (v.status, v.rule) == (BROKEN, "T1")
    assert "TH-1" in v.reason


def test_t1_only_counts_links_on_the_same_condition() -> None:
    v = derive_verdict("exogeneity", links=[link("exclusion", "fatal", 5)], claim="x", graph=GRAPH_OK)
    assert v.status == HOLDS


def test_g1_graph_violation_breaks_exclusion_and_names_the_path() -> None:
    v = derive_verdict("exclusion", claim="written", graph=GRAPH_BAD_EXCLUSION, evidence=ev(make_run(1)))
    assert (v.status, v.rule) == (BROKEN, "G1")
    assert "fibre_wave → online_pharmacy → ed_visits" in v.reason


def test_g1_does_not_apply_to_monotonicity() -> None:
    v = derive_verdict("monotonicity", claim="written", graph=graph(monotonicity="broken"))
    assert v.status == HOLDS


@pytest.mark.parametrize(
    ("state", "severities", "expected"),
    [
        ("open", (4, 5), AT_RISK),  # mean 4.5 >= 4
        ("open", (), AT_RISK),  # unrated open threat
        ("accepted", (4, 4), AT_RISK),
        ("open", (3, 4), HOLDS),  # mean 3.5 < 4: not unresolved
        ("accepted", (2,), HOLDS),
        ("rebutted", (5, 5), HOLDS),
        ("mitigated", (5,), HOLDS),
    ],
)
def test_t2_unresolved_threats_put_a_condition_at_risk(
    state: str, severities: tuple[int, ...], expected: str
) -> None:
    v = derive_verdict("exclusion", links=[link("exclusion", state, *severities)], claim="c", graph=GRAPH_OK)
    assert v.status == expected
    if expected == AT_RISK:
        assert v.rule == "T2"


def test_r1_effective_f_below_tau10_critical_value() -> None:
    run = make_run(1, results=iv_results(feff=12.0))  # critical value for tau = 10 % is 23.1 in the sample
    v = derive_verdict("relevance", evidence=ev(run))
    assert (v.status, v.rule) == (AT_RISK, "R1")
    assert "12" in v.reason and "23.1" in v.reason


def test_r2_unbounded_ar_set_puts_relevance_at_risk_even_with_large_f() -> None:
    run = make_run(1, results=iv_results(feff=50.0, ar=[["-inf", -0.4], [0.2, "inf"]]))
    v = derive_verdict("relevance", evidence=ev(run))
    assert (v.status, v.rule) == (AT_RISK, "R2")
    assert "∞" in v.reason


def test_r3_strong_instrument_with_bounded_ar_set_holds() -> None:
    v = derive_verdict("relevance", evidence=ev(make_run(1, results=iv_results(feff=38.4))))
    assert (v.status, v.rule) == (HOLDS, "R3")


def _without_effective_f(robust_f: float) -> dict[str, object]:
    res = iv_results()
    res["strength"] = {"status": "not applicable", "reason": "not computed"}
    res["first_stage"]["by_endog"]["telehealth"]["robust_f"] = robust_f  # type: ignore[index]
    return res


def test_r4_without_effective_f_a_weak_first_stage_is_at_risk() -> None:
    v = derive_verdict("relevance", evidence=ev(make_run(1, results=_without_effective_f(6.5))))
    assert (v.status, v.rule) == (AT_RISK, "R4")


def test_r5_without_effective_f_the_rule_of_thumb_can_make_relevance_hold() -> None:
    v = derive_verdict("relevance", evidence=ev(make_run(1, results=_without_effective_f(24.0))))
    assert (v.status, v.rule) == (HOLDS, "R5")
    assert "rule of thumb" in v.reason


def test_r6_no_diagnostics_means_relevance_not_assessed() -> None:
    assert derive_verdict("relevance", evidence=ev(None)).rule == "R6"
    v = derive_verdict("relevance", evidence=ev(make_run(0, method="ols", results=ols_results())))
    assert (v.status, v.rule) == (NOT_ASSESSED, "R6")


def test_x1_overid_rejection_puts_exclusion_at_risk() -> None:
    run = make_run(1, results=iv_results(overid_p=0.003))
    v = derive_verdict("exclusion", claim="c", graph=GRAPH_OK, evidence=ev(run))
    assert (v.status, v.rule) == (AT_RISK, "X1")


def test_x2_holds_needs_graph_and_claim_and_never_statistics_alone() -> None:
    good_stats = make_run(1, results=iv_results(feff=500.0, overid_p=0.99))
    # statistics excellent, but no graph verdict and no claim: not assessed, never holds
    v = derive_verdict("exogeneity", evidence=ev(good_stats))
    assert (v.status, v.rule) == (NOT_ASSESSED, "X3")
    assert "no graph check" in v.reason and "no written claim" in v.reason
    # graph supports it but no claim: still not assessed
    assert derive_verdict("exogeneity", graph=GRAPH_OK, evidence=ev(good_stats)).status == NOT_ASSESSED
    # claim but no graph: not assessed
    assert derive_verdict("exogeneity", claim="c", evidence=ev(good_stats)).status == NOT_ASSESSED
    v = derive_verdict("exogeneity", claim="c", graph=GRAPH_OK, evidence=ev(good_stats))
    assert (v.status, v.rule) == (HOLDS, "X2")


def test_m1_m2_monotonicity_rests_on_the_claim() -> None:
    assert derive_verdict("monotonicity", claim="never pushes anyone away").rule == "M1"
    v = derive_verdict("monotonicity", claim="   ")
    assert (v.status, v.rule) == (NOT_ASSESSED, "M2")


def test_rule_order_fatal_beats_graph_beats_unresolved() -> None:
    links = [link("exclusion", "open", 5, code="TH-open"), link("exclusion", "fatal", 1, code="TH-fatal")]
    v = derive_verdict("exclusion", links=links, claim="c", graph=GRAPH_BAD_EXCLUSION)
    assert v.rule == "T1" and "TH-fatal" in v.reason
    v = derive_verdict("exclusion", links=links[:1], claim="c", graph=GRAPH_BAD_EXCLUSION)
    assert v.rule == "G1"


@pytest.mark.parametrize(
    ("verdict", "outcome"),
    [
        (graph(exclusion="holds"), "satisfied"),
        (graph(exclusion="broken"), "violated"),
        (graph(exclusion="at-risk"), "at risk"),
        (graph(exclusion="not-assessed"), None),
        (graph(exogeneity="holds"), None),
        (None, None),
    ],
)
def test_graph_reading_maps_the_checkers_values(verdict: GraphVerdict | None, outcome: str | None) -> None:
    assert graph_reading(verdict, "exclusion").outcome == outcome


def test_latest_run_prefers_the_newest_run_with_diagnostics() -> None:
    runs = [make_run(1), make_run(5, method="ols", results=ols_results()), make_run(3)]
    chosen = latest_run(runs)
    assert chosen is not None and chosen.slug == "run-003"


def test_derive_verdicts_covers_all_conditions_in_order() -> None:
    inp = sample_input()
    verdicts = {v.condition: v for v in derive_verdicts(inp)}
    assert list(verdicts) == ["relevance", "exclusion", "exogeneity", "monotonicity"]
    assert verdicts["exclusion"].status == BROKEN  # the sample's diagram has the pharmacy path
    no_graph = dataclasses.replace(inp, graph=None)
    # without the diagram the open, high-severity pharmacy threat still puts exclusion at risk
    assert {v.condition: v for v in derive_verdicts(no_graph)}["exclusion"].status == AT_RISK


def test_x1_empty_ar_set_puts_exogeneity_at_risk_but_relevance_still_holds() -> None:
    run = make_run(1, results=iv_results(ar=[]))
    v = derive_verdict("exogeneity", claim="c", graph=GRAPH_OK, evidence=ev(run))
    assert (v.status, v.rule) == (AT_RISK, "X1")
    r = derive_verdict("relevance", evidence=ev(run))
    assert r.status == HOLDS and "empty" in r.reason


def _real_graph_verdict(with_bypass: bool) -> GraphVerdict:
    # the graph checker's own typed result is what the verdict rules read
    from ivdossier.threats_catalog.graph import build_graph, check_instrument

    roles = {"instrument": "fibre_wave", "treatment": "telehealth", "outcome": "ed_visits"}
    extra = [("fibre_wave", "pharmacy"), ("pharmacy", "ed_visits")] if with_bypass else []
    G = build_graph(**roles, covariates={"pharmacy": False}, extra_edges=extra)
    return check_instrument(G, **roles)


def test_rules_read_the_graph_checkers_real_verdict() -> None:
    broken = _real_graph_verdict(with_bypass=True)
    v = derive_verdict("exclusion", claim="c", graph=broken)
    assert (v.status, v.rule) == (BROKEN, "G1")
    assert "fibre_wave → pharmacy → ed_visits" in v.reason
    clean = _real_graph_verdict(with_bypass=False)
    # the checker reports "not-assessed" when no threat was considered: the rules must not turn that into holds
    assert derive_verdict("exclusion", claim="c", graph=clean).status == NOT_ASSESSED
    assert graph_reading(clean, "relevance").outcome == "satisfied"


def test_g2_graph_at_risk_puts_the_condition_at_risk() -> None:
    v = derive_verdict(
        "exogeneity", claim="c", graph=graph(exogeneity=("at-risk", "open path via an open threat"))
    )
    assert (v.status, v.rule) == (AT_RISK, "G2")
    assert "open path via an open threat" in v.reason


def test_relevance_rules_fire_in_table_order() -> None:
    # no effective F, a weak first stage AND an unbounded AR set: R2 comes before R4 in the table
    res = _without_effective_f(4.0)
    res["weak_iv_robust"]["anderson_rubin"]["confidence_set"] = [["-inf", "inf"]]  # type: ignore[index]
    v = derive_verdict("relevance", evidence=ev(make_run(1, results=res)))
    assert (v.status, v.rule) == (AT_RISK, "R2")
    assert "(−∞, ∞) (whole line)" in v.reason


def test_the_verdict_object_round_trips_and_refuses_unknown_words() -> None:
    v = derive_verdict("exclusion", claim="c", graph=GRAPH_BAD_EXCLUSION)
    assert v.paths == ("fibre_wave → online_pharmacy → ed_visits",)  # the graph path behind the verdict
    assert Verdict.from_dict(v.to_dict()) == v
    assert v.key == "broken" and derive_verdict("relevance").key == "not-assessed"
    with pytest.raises(InvalidInputError, match="verdict status 'fine' is not one of"):
        Verdict("exclusion", "fine", "X9", "no reason")


def test_run_evidence_reads_the_statistics_the_rules_need() -> None:
    res = iv_results(feff=27.5, overid_p=0.2)
    e = run_evidence(make_run(4, results=res))
    assert e is not None
    # the sample's values as written in reports/sample.py: tau = 10 % critical value 23.1, robust F 39.7
    assert (e.run, e.effective_f, e.effective_f_critical, e.first_stage_f) == ("run-004", 27.5, 23.1, 39.7)
    assert (e.ar_set, e.ar_bounded, e.ar_empty, e.overid_p) == (((-0.35, -0.07),), True, False, 0.2)
    assert run_evidence(None) is None
