"""The plan document: sections in order, rules shown as data, escaping, and line-level checks of exported copies."""

from __future__ import annotations

import re
from typing import Any

from ivdossier.registry.plans import sha256_of
from ivdossier.reports.plan_doc import condition_text, plan_html, plan_markdown, verify_document
from ivdossier.workflows.plan_rules import default_rules

HOSTILE = "<img src=x onerror=alert(1)> **loud** `code`"


def _sealed() -> dict[str, Any]:
    return {
        "schema": "ivdossier-frozen-plan/1",
        "plan": "fibre-plan",
        "program": "tele",
        "instrument": "fibre",
        "title": f"Plan {HOSTILE}",
        "frozen_at": "2026-01-31T09:30:05Z",
        "frozen_by": "bo",
        "content": {
            "question": {"title": "Telehealth", "question": HOSTILE, "treatment": "x", "outcome": "y"},
            "data": {"description": "Claims 2019-2023.", "sample": "Rural adults.", "expected_n": 5000},
            "instruments": [{"slug": "fibre", "name": "Fibre wave", "family": "distance-geography",
                             "columns": ["z"], "claims": {"exclusion": HOSTILE}}],
            "graph": {"roles": {"treatment": "x", "outcome": "y"}, "covariates": [], "edges": []},
            "threats": [{"instrument": "fibre", "code": "DG-E01", "title": "Roads", "condition": "exclusion",
                         "state": "open", "checks": [{"name": "placebo-outcome", "command": "ivdossier falsify placebo"}]}],
            "specs": [{"id": "fibre", "outcome": "y", "treatment": ["x"], "instruments": ["z"], "controls": [],
                       "absorb": [], "cluster": [], "weights": None, "method": "2sls", "vcov": "heteroskedastic",
                       "small_sample": True, "alpha": 0.05}],
            "diagnostics": ["effective F"],
            "decision_rules": default_rules(1),
            "power": None,
            "deviations": "Listed by plan compare.",
        },
    }  # fmt: skip


def test_sections_in_order_and_rules_as_readable_conditions() -> None:
    sealed = _sealed()
    md = plan_markdown(sealed, state="frozen", sha256=sha256_of(sealed))
    heads = [ln for ln in md.splitlines() if ln.startswith("## ")]
    assert heads == [
        "## Question",
        "## Data and sample",
        "## Instruments and claims",
        "## Causal graph and threats",
        "## Estimation specifications",
        "## Diagnostics",
        "## Decision rules fixed in advance",
        "## Power and minimum detectable effect",
        "## Deviations",
        "## What this plan cannot settle",
    ]
    assert f"SHA-256 of the canonical form: `{sha256_of(sealed)}`" in md
    # a rule path that imitates a verdict badge marker is plain escaped text, never a code span
    hostile = _sealed()
    hostile["content"]["decision_rules"][0]["when"] = {"statistic": "verdict:holds", "op": ">=", "value": 1}
    assert "`verdict:" not in plan_markdown(hostile, state="draft")
    assert "- **When:** strength.effective_f.statistic ≥ strength.effective_f.critical_values.tau_10pct" in md
    assert "| fibre | DG-E01 | Roads | exclusion | open | placebo-outcome (ivdossier falsify placebo) |" in md
    assert "Statistics cannot establish exclusion or exogeneity." in md and "need domain review" in md
    # a rule over another kind of run says which runs it applies to; an estimate's rules say nothing more
    assert "**Applies to:**" not in md
    kinds = _sealed()
    kinds["content"]["decision_rules"] = [{"id": "flips", "then": "a", "otherwise": "b", "when": {
        "statistic": "fragility-influence:t_significance_flips", "op": "==", "value": 0}}]  # fmt: skip
    assert (
        "- **Applies to:** fragility-influence runs\n- **When:** fragility-influence:t_significance_flips = 0"
        in plan_markdown(kinds, state="draft")
    )
    assert condition_text({"all": [{"statistic": "a", "op": "<", "value": 1},
                                   {"not": {"statistic": "b", "op": "excludes", "value": 0}}]}) == (
        "(a < 1 and not b excludes 0)")  # fmt: skip


def test_user_text_is_escaped_and_html_is_inert() -> None:
    sealed = _sealed()
    md = plan_markdown(sealed, state="draft")
    assert "**Draft — not sealed.**" in md
    assert (
        re.search(r"(?<!\\)<img", md) is None
        and "\\<img src=x onerror=alert(1)> \\*\\*loud\\*\\* \\`code\\`" in md
    )
    html = plan_html(sealed, state="draft")
    assert "<img" not in html and "onerror=alert(1)&gt;" in html


def test_verify_document_names_changed_added_and_removed_lines() -> None:
    sealed = _sealed()
    sha = sha256_of(sealed)
    md = plan_markdown(sealed, state="frozen", sha256=sha)
    assert verify_document(md, sealed, sha256=sha, fmt="md") == []
    lines = md.splitlines()
    i = next(k for k, ln in enumerate(lines) if "Rural adults" in ln)
    changed = [*lines[:i], lines[i].replace("Rural adults", "All adults"), *lines[i + 1 :]]
    diffs = verify_document("\n".join(changed) + "\n", sealed, sha256=sha, fmt="md")
    assert [(d.path, d.frozen, d.found) for d in diffs] == [(f"line {i + 1}", lines[i], changed[i])]
    removed = verify_document("\n".join(lines[:i] + lines[i + 1 :]) + "\n", sealed, sha256=sha, fmt="md")
    assert [(d.frozen, d.found) for d in removed] == [(lines[i], "<missing>")]
    html = plan_html(sealed, state="frozen", sha256=sha)
    assert verify_document(html, sealed, sha256=sha, fmt="html") == []
    assert verify_document(html.replace("Rural adults", "All adults"), sealed, sha256=sha, fmt="html") != []
