"""The audit document: structure, cautions, escaping of BibTeX- and user-supplied text, HTML without live markup."""

from __future__ import annotations

import re

from ivdossier.reports.audit_doc import (
    audit_html,
    audit_json,
    audit_markdown,
    audit_section_markdown,
)
from ivdossier.reports.inputs import AuditInputs, CritiqueInfo
from ivdossier.workflows.studies import build_audit

HOSTILE = "<script>alert(1)</script> *Smith* | [x](javascript:alert(1))"


def _inputs() -> AuditInputs:
    crit = CritiqueInfo("DG-E01", "Roads | built with fibre", "exclusion", "Other2020", HOSTILE)
    return AuditInputs(
        "family distance-geography",
        (
            ("Evil2021", f"{HOSTILE} (2021)", {"estimate": 3.4, "std_error": 1.0, "first_stage_f": 10.0}, (crit,)),
            ("Good2019", "Good (2019)", {"estimate": 5.0, "std_error": 1.0, "first_stage_f": 200.0,
             "first_stage_coef": 0.5, "first_stage_se": 0.03, "reduced_form_coef": 2.5, "reduced_form_se": 0.5}, ()),
            ("Bare2018", "Bare (2018)", {}, (crit,)),
        ),
    )  # fmt: skip


def test_markdown_has_summary_table_details_method_and_cautions_in_order() -> None:
    inputs = _inputs()
    summary = build_audit(inputs)
    md = audit_markdown(summary, inputs, generated_at="2026-02-01T10:00:00Z", tool_version="9.9")
    heads = [ln for ln in md.splitlines() if ln.startswith("#")]
    assert heads[:4] == [
        "# Literature audit: family distance-geography",
        "## Summary",
        "## Threats most often raised",
        "## Study by study",
    ]
    assert "### Evil2021" not in md and any(h.startswith("### \\<script>") for h in heads)
    assert heads[-2:] == ["## How the re-examination works", "## What this audit cannot tell you"]
    assert "- **Studies in scope:** 3; with reported statistics: 2." in md
    assert "1 of 2 results reported as significant survive re-examination, 1 lose significance" in md
    assert "| DG-E01 | Roads \\| built with fibre | exclusion | 2 |" in md
    assert (
        "| 3.4 (1) | 10 (unknown) | 3.4 | c = 3.435; [-0.03527, 6.835] | – | lost (tF no) | lost (tF no) |"
        in md
    )
    assert "Statistics cannot establish exclusion or exogeneity." in md
    assert "Conclusions for policy or clinical use need domain review." in md
    assert md == audit_markdown(summary, inputs, generated_at="2026-02-01T10:00:00Z", tool_version="9.9")


def test_supplied_text_is_escaped_in_markdown_and_inert_in_html() -> None:
    inputs = _inputs()
    summary = build_audit(inputs)
    md = audit_markdown(summary, inputs)
    assert re.search(r"(?<!\\)<", md) is None  # every '<' is escaped, so no tag can open
    assert "\\<script>" in md and "\\*Smith\\*" in md and "\\[x](javascript:alert(1))" in md
    html = audit_html(summary, inputs)
    assert "<script" not in html.lower()
    assert 'href="javascript' not in html.lower()
    assert "&lt;script&gt;" in html


def test_section_for_the_dossier_and_json() -> None:
    inputs = _inputs()
    summary = build_audit(inputs)
    section = audit_section_markdown(summary, inputs)
    assert section.startswith("## Prior uses and critiques\n")
    assert not any(ln.startswith("# ") for ln in section.splitlines())
    data = audit_json(summary, inputs)
    assert [s["key"] for s in data["studies"]] == ["Evil2021", "Good2019"]
    assert data["studies"][0]["critiques"][0]["note"] == HOSTILE  # JSON keeps the text as entered
    assert data["studies_without_statistics"][0]["key"] == "Bare2018"
    good = data["studies"][1]
    assert good["verdict_1pct"] == "survives" and good["anderson_rubin"]["covariance_used"] == "implied"
