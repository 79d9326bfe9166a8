"""Each re-examination procedure keeps its own verdict; the combined verdict never hides a disagreement."""

from __future__ import annotations

import math

from ivdossier.estimation.audit import audit_study, summarise
from ivdossier.reports.audit_doc import audit_markdown
from ivdossier.reports.inputs import AuditInputs

# One instrument, F = (pi_x / se_x)^2 = (1 / 0.3162)^2 = 10; 2SLS estimate 3.4 with SE 1 (t = 3.4). The reduced
# form 3.4 (SE 1.1333) has t = 3.0, and with one instrument the Anderson–Rubin statistic at b = 0 is the squared
# reduced-form t (Anderson and Rubin 1949, by definition): 9 > 3.84, so the AR 95 % set excludes zero, while
# tF needs |t| > c(10) = 3.43 (Lee, McCrary, Moreira and Porter 2022, abstract), so tF does not.
SPLIT = {
    "estimate": 3.4,
    "std_error": 1.0,
    "first_stage_f": 10.0,
    "first_stage_coef": 1.0,
    "first_stage_se": math.sqrt(0.1),
    "reduced_form_coef": 3.4,
    "reduced_form_se": 3.4 / 3.0,
}


def test_tf_and_anderson_rubin_each_keep_their_verdict() -> None:
    audit = audit_study("split", SPLIT)
    assert audit.tf.significant_5pct is False  # |t| = 3.4 < 3.43
    assert audit.ar.excludes_zero_95 is True  # 9 > chi-square(1) 95 % point 3.84
    assert audit.verdict_5pct == "procedures disagree"  # not "lost"
    text = audit.procedure_text(0.05)
    assert text == (
        "significant with 1.96 (as reported); not significant under tF; significant under Anderson–Rubin"
    )
    data = audit.to_dict()
    assert data["procedures_5pct"] == text
    assert [p["significant"] for p in data["procedures"] if p["level"] == 0.05] == [True, False, True]
    assert "not significant under tF; significant under Anderson–Rubin" in str(audit)
    assert any("procedures disagree" in f for f in audit.flags)
    # at 1 %: AR compares 9 with the chi-square(1) 99 % point 6.63, still excluding zero; tF already failed at 5 %
    assert audit.ar.excludes_zero_99 is True and audit.verdict_1pct == "procedures disagree"


def test_agreement_still_gives_survives_or_lost() -> None:
    strong = dict(SPLIT, first_stage_f=200.0, first_stage_se=1.0 / math.sqrt(200.0))
    assert audit_study("strong", strong).verdict_5pct == "survives"  # c(200) = 1.96 and AR excludes zero
    weak_rf = dict(SPLIT, reduced_form_se=3.4)  # reduced-form t = 1: AR 95 % set contains zero
    assert audit_study("weak", weak_rf).verdict_5pct == "lost"


def test_document_shows_the_combined_verdict_and_each_procedure() -> None:
    inputs = AuditInputs("instrument demo", (("split", "Split (2020)", SPLIT, ()),))
    summary = summarise("instrument demo", [audit_study("split", SPLIT, citation="Split (2020)")])
    assert summary.verdicts_5pct["procedures disagree"] == 1 and summary.verdicts_5pct["lost"] == 0
    md = audit_markdown(summary, inputs)
    assert "| procedures disagree (tF no; AR yes) |" in md
    assert "At 5 %: significant with 1.96 (as reported); not significant under tF; significant under" in md
    assert "for 1 tF and Anderson–Rubin disagree" in md
