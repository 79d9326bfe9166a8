"""The dossier's Markdown: sections in order, numbers equal to the run's values, absent sections left out,
cautions always present, output deterministic."""

from __future__ import annotations

import dataclasses
import re

import numpy as np
import pandas as pd
import pytest

from ivdossier.estimation.diagnostics import DiagnosticSuite
from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.dossier import dossier_html, dossier_markdown
from ivdossier.reports.estimates import estimates_markdown
from ivdossier.reports.inputs import DossierInput, InstrumentInfo, RunInfo
from ivdossier.reports.sample import PROGRAM, iv_results, make_run, sample_input
from ivdossier.vocabulary import NotApplicable
from ivdossier.workflows.sample import sample_result, sample_run
from ivdossier.workflows.verdicts import with_verdicts

SECTION_ORDER = [
    "# Instrument dossier: Fibre rollout wave",
    "## At a glance",
    "## The argument, condition by condition",
    "## Causal diagram",
    "## Estimates and diagnostics",
    "## Provenance",
    "## What this dossier cannot tell you",
]


def h2_and_h1(md: str) -> list[str]:
    return [line for line in md.splitlines() if re.match(r"^#{1,2} ", line)]


def test_sections_appear_once_in_the_designed_order() -> None:
    md = dossier_markdown(sample_input())
    assert h2_and_h1(md) == SECTION_ORDER


def test_summary_comes_first_and_gives_each_condition_a_verdict_and_reason() -> None:
    md = dossier_markdown(with_verdicts(sample_input()))
    glance = md.split("## At a glance")[1].split("\n## ")[0]
    for condition in ("Relevance", "Exclusion", "Exogeneity", "Monotonicity"):
        # a verdict is its plain-text glyph and its word, never a code span
        assert re.search(
            rf"^\| {condition} \| (● holds|▲ at risk|■ broken|◌ not assessed) \| .+ \| [A-Z]\d \|$",
            glance,
            re.M,
        ), condition
    assert "| ■ broken |" in glance  # the sample diagram has a path around the treatment
    assert "`verdict:" not in md and "`state:" not in md
    assert mt.GLYPH_LEGEND in glance
    assert "lifecycle state: **under review**" in md.split("## At a glance")[0]


def test_claims_sit_beside_the_threats_that_attack_them() -> None:
    md = dossier_markdown(sample_input())
    exclusion = md.split("### Exclusion")[1].split("### Exogeneity")[0]
    assert "Fibre changes emergency use only by making remote consultations possible." in exclusion
    assert "#### TH-017 · Broadband also brings online pharmacy" in exclusion
    # ratings: Ana (4, 4) and Ben (3, 5): team mean likelihood 3.5, severity 4.5; severity spread 4-5
    assert "team mean likelihood 3.5, severity 4.5" in exclusion
    assert "severity 4–5, likelihood 3–4" in exclusion
    assert "| Ben | 3 | 5 | large if true |" in exclusion
    assert "TH-004" not in exclusion  # an exogeneity threat stays under exogeneity


def test_every_number_of_the_latest_run_is_reported_as_given() -> None:
    # a real estimate (workflows.sample); each number in the document must be the typed result's own value
    res = sample_result("2sls", seed=11)
    suite = res.diagnostics
    assert isinstance(suite, DiagnosticSuite)
    inp = dataclasses.replace(
        sample_input(), runs=(sample_run(0, sample_result("ols"), plots=False), sample_run(7, res))
    )
    md = dossier_markdown(inp)
    detail = md.split("### Run run-007 in detail")[1]
    feff = re.search(r"\| Effective F \(Montiel Olea–Pflueger\) \| (\S+) \| (.+) \|", detail)
    assert feff is not None and suite.strength.effective_f is not None
    assert rv.parse_fmt(feff.group(1)) == pytest.approx(suite.strength.effective_f.statistic, rel=5e-4)
    cvs = dict(re.findall(r"τ = (\d+) %: ([\d.]+)", feff.group(2)))
    tau = suite.strength.effective_f.critical_values
    assert {int(k): float(v) for k, v in cvs.items()} == pytest.approx(
        {round(t * 100): c for t, c in tau.items()}, rel=5e-4
    )
    row = re.search(r"\| run-007 \| 2SLS · \S+ \| (\S+) \| (\S+) \| \[(\S+), (\S+)\] \|", md)
    assert row is not None
    low, high = res.ci[0]
    got = [rv.parse_fmt(g) for g in row.groups()]
    assert got == pytest.approx([res.coef[0], res.se[0], low, high], rel=5e-4)
    assert f"| Kleibergen–Paap rk Wald F | {rv.fmt(suite.strength.kp_rk.f_form)} |" in detail
    ar = suite.weak_iv_robust.anderson_rubin
    assert (
        f"| Anderson–Rubin | {rv.fmt_set(ar.intervals)} | {rv.fmt(ar.statistic)} | {rv.fmt_p(ar.p_value)} |"
        in detail
    )
    over = suite.overid
    assert f"| Hansen J | {rv.fmt(over.statistic)} | 1 | {rv.fmt_p(over.p_value)} |" in detail
    fs = suite.first_stage.rows[0]
    coef, se = fs.coefficients["fibre_wave"], fs.std_errors["fibre_wave"]
    expected = (
        f"| fibre_wave | {rv.fmt(coef)} ({rv.fmt(se)}) | {rv.fmt(fs.partial_f)} | {rv.fmt(fs.robust_f)} | "
        f"{rv.fmt(fs.partial_r2, 3)} |"
    )
    assert expected in detail.replace("| telehealth ", "|")


def test_ols_run_is_listed_beside_the_iv_runs() -> None:
    md = dossier_markdown(sample_input(n_runs=3))
    overview = md.split("### Effect of telehealth across runs")[1].split("###")[0]
    assert re.search(r"^\| run-000 \| OLS", overview, re.M)
    assert re.search(r"^\| run-001 \| 2SLS", overview, re.M)


def test_absent_inputs_leave_their_sections_out_entirely() -> None:
    bare = DossierInput(
        program=PROGRAM,
        instrument=InstrumentInfo(slug="mast", name="Mast distance"),
        generated_at="2026-12-01T09:00:00+00:00",
        tool_version="0.1.0",
    )
    md = dossier_markdown(with_verdicts(bare))
    assert h2_and_h1(md) == [
        "# Instrument dossier: Mast distance",
        "## At a glance",
        "## What this dossier cannot tell you",
    ]
    for word in ("TODO", "placeholder", "No claim", "None"):
        assert word not in md


def test_not_applicable_diagnostics_are_left_out_or_give_their_reason() -> None:
    res = sample_result("2sls", instruments=("fibre_wave", "clerk_propensity"))  # two instruments: no tF
    suite = res.diagnostics
    assert isinstance(suite, DiagnosticSuite) and not suite.weak_iv_robust.tf.applicable
    md = dossier_markdown(dataclasses.replace(sample_input(), runs=(sample_run(1, res),)))
    assert f"Not computed: tF — {mt.inline(suite.weak_iv_robust.tf.reason)}." in md
    just = sample_result("2sls", instruments=("fibre_wave",))  # just identified: no over-identification test
    assert isinstance(just.diagnostics, DiagnosticSuite) and just.diagnostics.overid.reason
    md = dossier_markdown(dataclasses.replace(sample_input(), runs=(sample_run(1, just),)))
    assert f"#### Over-identification\n\nNot computed: {mt.inline(just.diagnostics.overid.reason)}." in md
    # 2 clusters: each section that cannot be computed says why, and the others are still shown
    few = sample_result("2sls", vcov="clustered", districts=2)
    suite = few.diagnostics
    assert isinstance(suite, DiagnosticSuite)
    absent = {n: getattr(suite, n) for n in ("weak_iv_robust", "reduced_form")}
    assert all(isinstance(node, NotApplicable) for node in absent.values())
    inp = dataclasses.replace(sample_input(), runs=(sample_run(1, few),))
    part = estimates_markdown(inp, inp.runs[0])
    assert (
        f"#### Reduced form (outcome on instruments)\n\nNot computed: {mt.inline(absent['reduced_form'].reason)}."
        in part
    )
    assert f"Not computed: Anderson–Rubin, CLR and tF — {mt.inline(absent['weak_iv_robust'].reason)}." in part
    assert "#### First stage (treatment on instruments)\n\n|" in part  # computed, so shown


def test_plots_and_diagram_are_referenced_only_when_their_data_exist() -> None:
    md = dossier_markdown(sample_input(), figure_dir="my dossier-figures")
    # figures are ordinary Markdown images linking to SVG files in the folder beside the document
    images = re.findall(r"^!\[[^\n]*\]\(([^)]+)\)$", md, re.M)
    assert images == [
        "my%20dossier-figures/causal-diagram.svg",
        "my%20dossier-figures/first-stage.svg",
        "my%20dossier-figures/ar-curve.svg",
    ]
    assert "ivdossier-figure" not in md
    plain = dataclasses.replace(sample_input(), runs=(make_run(1, plots=False),), graph=None)
    md = dossier_markdown(plain)
    assert "![" not in md
    assert "## Causal diagram" not in md


def test_cautions_are_always_present_in_plain_words() -> None:
    for inp in (sample_input(), sample_input(n_links=0, n_runs=1)):
        tail = dossier_markdown(inp).split("## What this dossier cannot tell you")[1]
        assert "Statistics cannot establish exclusion or exogeneity." in tail
        assert "A strong first stage does not make an instrument valid." in tail
        assert "Conclusions for policy or clinical use need domain review." in tail


def test_provenance_lists_fingerprints_specs_versions_and_who_did_what() -> None:
    md = dossier_markdown(sample_input(n_runs=2))
    prov = md.split("## Provenance")[1]
    assert "`01" + "ab3f" * 15 + "9c`" in prov
    assert "Options shared by every run:" in prov  # identical specs are shown once
    assert "Options that differ between runs:" not in prov
    assert "| controls | age, sex, distance_to_ed |" in prov
    assert "| numpy | 2.1.3 |" in prov
    assert "| ana | create ×1, run ×1 | 2026-11-02T08:00:00+00:00 | 2026-11-04T11:00:00+00:00 |" in prov


def test_output_is_deterministic_and_reads_no_clock() -> None:
    a = dossier_markdown(sample_input())
    b = dossier_markdown(sample_input())
    assert a == b
    assert "2026-12-01T09:00:00+00:00" in a
    ha, hb = dossier_html(sample_input()), dossier_html(sample_input())
    assert ha == hb


def test_a_real_estimation_result_renders_with_its_own_numbers() -> None:
    # the run's stored form (the JSON view plus the typed record) is the contract; simulate a known design
    from ivdossier.estimation import estimate
    from ivdossier.workflows.runs import stored_results

    rng = np.random.default_rng(7)
    n = 400
    z1, z2, u = rng.normal(size=(3, n))
    x = 0.6 * z1 + 0.4 * z2 + u + rng.normal(size=n)
    y = -0.3 * x + u + rng.normal(size=n)
    frame = pd.DataFrame({"ed_visits": y, "telehealth": x, "fibre_wave": z1, "clerk": z2})
    result = estimate(frame, outcome="ed_visits", treatment="telehealth", instruments=["fibre_wave", "clerk"])
    res = stored_results(result)
    run = RunInfo(
        slug="real",
        created_at="2026-11-30T12:00:00+00:00",
        method=res["method"],
        vcov=res["vcov"],
        spec=res["spec"],
        results=res,
    )
    md = dossier_markdown(dataclasses.replace(sample_input(), runs=(run,)))
    detail = md.split("### Run real in detail")[1]
    feff = res["strength"]["effective_f"]["statistic"]
    shown = re.search(r"\| Effective F \(Montiel Olea–Pflueger\) \| (\S+) \|", detail)
    assert shown is not None and rv.parse_fmt(shown.group(1)) == pytest.approx(feff, rel=5e-4)
    ar = res["weak_iv_robust"]["anderson_rubin"]["confidence_set"]
    assert rv.fmt_set(rv.intervals(ar)) in detail
    assert f"| Hansen J | {rv.fmt(res['overid']['statistic'])} |" in detail
    assert "observations 400" in detail


def test_the_graph_checkers_svg_is_inlined_as_the_diagram() -> None:
    from ivdossier.reports.inputs import GraphInfo
    from ivdossier.threats_catalog.draw import render_svg
    from ivdossier.threats_catalog.graph import build_graph, check_instrument

    roles = {"instrument": "fibre_wave", "treatment": "telehealth", "outcome": "ed_visits"}
    G = build_graph(
        **roles,
        covariates={"pharmacy": False},
        extra_edges=[("fibre_wave", "pharmacy"), ("pharmacy", "ed_visits")],
    )
    verdict = check_instrument(G, **roles)
    svg = render_svg(G, verdict, title="Causal diagram <fibre>")
    inp = with_verdicts(
        dataclasses.replace(
            sample_input(), graph=GraphInfo(verdict=verdict, svg=svg), runs=(make_run(1, plots=False),)
        )
    )
    md = dossier_markdown(inp)
    assert "| Exclusion | violated in the diagram | fibre_wave → pharmacy → ed_visits |" in md
    page = dossier_html(inp)
    start = page.index('<figure class="figure" id="figure-causal-diagram">')
    assert page[start:].split(">", 1)[1].startswith("<svg")


def test_specs_that_differ_are_tabulated_run_by_run() -> None:
    runs = tuple(
        dataclasses.replace(
            make_run(i, plots=False), spec={"outcome": "ed_visits", "method": m, "weights": None}
        )
        for i, m in enumerate(["ols", "2sls", "liml"])
    )
    md = dossier_markdown(dataclasses.replace(sample_input(), runs=runs))
    prov = md.split("### Exact specifications")[1].split("###")[0]
    assert "| outcome | ed_visits |" in prov and "| weights | (none) |" in prov
    assert "| Run | method |" in prov
    assert "| run-002 | liml |" in prov


def test_non_numeric_values_in_a_result_are_never_echoed() -> None:
    res = iv_results()
    res["coef"]["telehealth"] = "<script>alert(1)</script>"
    res["strength"]["kp_rk_wald_f"] = "[x](javascript:alert(1))"
    md = dossier_markdown(dataclasses.replace(sample_input(), runs=(make_run(1, results=res, plots=False),)))
    assert "<script>" not in md and "javascript:" not in md
    assert rv.fmt("12.5") == "12.5" and rv.fmt("abc") == "–" and rv.fmt(None) == "–"


def test_remembered_threat_cards_never_mix_up_links_or_targets() -> None:
    # Threat cards are remembered by the link's value: links that differ in any field (one rating's comment, the
    # state, a check's finding) get their own card, and the Markdown-file card is never served for HTML.
    from ivdossier.reports.dossier import _link_block
    from ivdossier.reports.inputs import CheckInfo, LinkInfo, Rating

    base = LinkInfo(
        threat_code="EX-01",
        title="Another channel",
        condition="exclusion",
        state="open",
        argument="Rebuttal in progress.",
        ratings=(Rating("ana", 2, 4, "first"), Rating("ben", 3, 5)),
        checks=(CheckInfo("placebo-outcome", "not run yet"),),
    )
    variants = [
        base,
        dataclasses.replace(base, ratings=(Rating("ana", 2, 4, "second"), Rating("ben", 3, 5))),
        dataclasses.replace(base, state="mitigated"),
        dataclasses.replace(base, checks=(CheckInfo("placebo-outcome", "passed"),)),
    ]
    with mt.for_html():
        html_cards = [_link_block(v) for v in variants]
    md_cards = [_link_block(v) for v in variants]
    assert len(set(html_cards)) == len(variants) and len(set(md_cards)) == len(variants)
    assert "`state:open`" in html_cards[0] and "**open**" in md_cards[0]
    assert "| second |" in html_cards[1] and "second" not in html_cards[0]
    assert _link_block(dataclasses.replace(base)) == md_cards[0]  # an equal link: the same card
