"""Plots and the reporting checklist for summary-data evidence and the omitted-variable robustness value.

The figures are checked as documents (deterministic SVG that passes the renderer's safety check, the fitted
lines present, user text never embedded as markup); their numbers come from results tested elsewhere. The
checklist is checked against its own contract: every identifying condition is covered (our reading of
STROBE-MR, Skrivankova et al. 2021), computed items come from the evidence, and user notes are escaped.
"""

from __future__ import annotations

import json
import re

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.omitted_variable import (
    IvRobustness,
    NotApplicable,
    contour_grid,
    iv_robustness,
    robustness_values,
)
from ivdossier.estimation.variant_summary import SummaryEvidence, summary_evidence, variant_table
from ivdossier.reports.html import clean_svg
from ivdossier.reports.inputs import CONDITIONS
from ivdossier.reports.variant_checklist import ITEMS, checklist_markdown, fill_checklist
from ivdossier.reports.variant_plots import (
    funnel_svg,
    leave_one_out_svg,
    robustness_contour_svg,
    variant_scatter_svg,
)
from ivdossier.reports.variant_sections import robustness_markdown, summary_evidence_markdown


def _evidence(j: int = 8, name: str = "rs{}") -> SummaryEvidence:
    rng = np.random.default_rng(2)
    bx = rng.uniform(0.05, 0.2, j)
    sy = rng.uniform(0.01, 0.02, j)
    frame = pd.DataFrame(
        {
            "variant": [name.format(i) for i in range(j)],
            "exposure_effect": bx,
            "exposure_se": 0.01,
            "outcome_effect": 0.3 * bx + rng.normal(0, sy),
            "outcome_se": sy,
            "exposure_n": 20_000,
            "outcome_n": 30_000,
        }
    )
    return summary_evidence(variant_table(frame), draws=50)


def test_variant_figures_are_deterministic_and_safe() -> None:
    ev = _evidence()
    for draw, key in ((variant_scatter_svg, "s"), (funnel_svg, "f"), (leave_one_out_svg, "l")):
        a, b = draw(ev), draw(ev)
        assert a == b and a.count("<svg") == 1
        assert not re.search(r"20\d\d-\d\d-\d\d", a)
        clean_svg(a, key=key)


def test_hostile_variant_names_never_reach_the_svg_as_markup() -> None:
    svg = leave_one_out_svg(_evidence(name="<script>alert({})</script>"))
    assert re.search(r"<script", svg, re.IGNORECASE) is None  # the label is escaped text
    assert "&lt;script&gt;alert(0)&lt;/script&gt;" in svg
    clean_svg(svg, key="l")  # and the HTML layer's structural check accepts the figure


def test_leave_one_out_needs_three_variants() -> None:
    with pytest.raises(InvalidInputError, match="No leave-one-out plot: it needs at least three variants"):
        leave_one_out_svg(_evidence(j=2))


def test_contour_svg_draws_the_target_and_the_benchmarks() -> None:
    values = robustness_values("reduced form", 0.04, 0.015, 900)
    grid = contour_grid(values, points=[("2x age", 0.01, 0.03)], n_grid=21)
    svg = robustness_contour_svg(grid)
    assert svg == robustness_contour_svg(grid) and svg.count("<svg") == 1
    clean_svg(svg, key="c")


def test_checklist_covers_every_condition_and_fills_from_the_evidence() -> None:
    groups = {i.group for i in ITEMS}
    assert set(CONDITIONS) <= groups  # every identifying condition has something to report
    assert len({i.code for i in ITEMS}) == len(ITEMS)
    filled = fill_checklist(_evidence(), notes={"GV-X1": "European ancestry; 20 principal components"})
    status = {f.item.code: f for f in filled.items}
    assert status["GV-R2"].status == "computed" and "mean F" in status["GV-R2"].answer
    assert status["GV-E3"].status == "computed" and "Cochran's Q" in status["GV-E3"].answer
    assert status["GV-X1"].status == "provided"
    assert status["GV-E1"].status == "missing"
    empty = fill_checklist()
    assert empty.counts() == {"computed": 0, "provided": 0, "missing": len(ITEMS)}


def test_checklist_markdown_escapes_notes_and_states_the_limits() -> None:
    md = checklist_markdown(fill_checklist(notes={"GV-E1": "<img src=x onerror=alert(1)> *bold*"}))
    assert re.search(r"(?<!\\)<img", md) is None and r"\<img" in md and r"\*bold\*" in md
    assert "Statistics cannot establish exclusion or exogeneity." in md
    assert "STROBE-MR" in md


def test_unknown_checklist_codes_are_refused() -> None:
    with pytest.raises(InvalidInputError, match=r"Unknown checklist code\(s\) 'GV-Z9'"):
        fill_checklist(notes={"GV-Z9": "x"})


def test_sections_render_the_same_from_the_result_and_from_its_stored_json() -> None:
    ev = _evidence(name="v_{}*")
    md = summary_evidence_markdown(ev)
    assert md == summary_evidence_markdown(json.loads(json.dumps(ev.to_dict())))
    assert "| IVW, fixed effect |" in md and "MR-Egger intercept" in md and "Weighted median" in md
    assert "Statistics cannot establish exclusion or exogeneity." in md
    assert re.search(r"dropped", md) and re.search(r"v_\d+\\\*", md)  # the variant name arrives escaped


def test_robustness_section_states_the_values_and_escapes_names() -> None:
    rng = np.random.default_rng(6)
    n = 400
    df = pd.DataFrame({"z": rng.normal(size=n), "ctl|<b>": rng.normal(size=n)})
    df["d"] = 0.5 * df["z"] + 0.3 * df["ctl|<b>"] + rng.normal(size=n)
    df["y"] = 0.4 * df["d"] + 0.2 * df["ctl|<b>"] + rng.normal(size=n)
    res = iv_robustness(
        df, outcome="y", treatment="d", instrument="z", controls=["ctl|<b>"], benchmarks=["ctl|<b>"]
    )
    assert isinstance(res, IvRobustness)
    md = robustness_markdown(res)
    assert md == robustness_markdown(json.loads(json.dumps(res.to_dict())))
    assert f"{100 * res.iv.rv_alpha:.3g}%" in md and f"{100 * res.reduced_form.rv:.3g}%" in md
    assert re.search(r"(?<!\\)<b>", md) is None and r"ctl\|" in md
    assert "need domain review" in md
    na = robustness_markdown(NotApplicable("two instruments given"))
    assert "Not applicable: two instruments given." in na
