"""Publication tables: booktabs structure, LaTeX escaping, the runs' numbers in the right columns."""

from __future__ import annotations

import dataclasses
import re

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.diagnostics import DiagnosticSuite
from ivdossier.reports import resultview as rv
from ivdossier.reports.tables import latex_escape, runs_table
from ivdossier.workflows.sample import sample_result, sample_run

# real estimates of the invented scenario (workflows.sample); expected cells are read from the typed results
RESULTS = (sample_result("ols"), sample_result("2sls"), sample_result("liml"))


def runs() -> list:
    return [sample_run(i, res, plots=False) for i, res in enumerate(RESULTS)]


def _tex(x: float) -> str:
    return "$" + rv.fmt(x).replace("−", "-") + "$"


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # the ten characters LaTeX reserves, escaped the way LaTeX manuals list them (common practice)
        ("50% & $5 #1 a_b {x}", r"50\% \& \$5 \#1 a\_b \{x\}"),
        ("~^\\", r"\textasciitilde{}\textasciicircum{}\textbackslash{}"),
        ("a<b>c|d", r"a\textless{}b\textgreater{}c\textbar{}d"),
        ("line\nbreak\x00", "line break"),
        ("τ = 10 % – ok", r"$\tau$ = 10 \% -- ok"),
    ],
)
def test_latex_escape(text: str, expected: str) -> None:
    assert latex_escape(text) == expected


def test_latex_table_uses_booktabs_and_one_column_per_run_named_after_it() -> None:
    listed = runs()
    tex = runs_table(listed)
    lines = tex.splitlines()
    assert lines[0] == r"\begin{tabular}{lccc}"
    assert lines.index(r"\toprule") < lines.index(r"\midrule") < lines.index(r"\bottomrule")
    assert r"\hline" not in tex
    assert lines[2] == "Run & " + " & ".join(latex_escape(r.slug) for r in listed) + r" \\"
    assert lines[3] == r"Estimator & OLS & 2SLS & LIML \\"
    assert tex.rstrip().endswith(r"\end{tabular}")
    # our own layout: no numbered columns, no standard errors in parentheses
    assert "(1)" not in tex and "parentheses" not in tex


def test_latex_table_reports_each_runs_numbers() -> None:
    tex = runs_table(runs())
    est = re.search(r"^Effect of telehealth & (.+) \\\\$", tex, re.M)
    assert est is not None
    values = [float(v.strip("$ ")) for v in est.group(1).split("&")]
    assert values == pytest.approx(
        [r.coef_of("telehealth") for r in RESULTS], rel=5e-4
    )  # 4 significant digits
    se_line = tex.splitlines()[tex.splitlines().index(est.group(0)) + 1]
    assert se_line == "Standard error & " + " & ".join(_tex(r.se_of("telehealth")) for r in RESULTS) + r" \\"
    fingerprints = re.search(r"^Data fingerprint & (.*) \\\\$", tex, re.M)
    assert fingerprints is not None
    assert [c.strip() for c in fingerprints.group(1).split("&")] == [
        latex_escape(r.dataset_sha256[:12]) for r in runs()
    ]
    feff = re.search(r"^Effective F & (.*) \\\\$", tex, re.M)
    assert feff is not None
    suites = [r.diagnostics for r in RESULTS[1:]]
    assert all(isinstance(d, DiagnosticSuite) and d.strength.effective_f is not None for d in suites)
    expected = [_tex(d.strength.effective_f.statistic) for d in suites]  # type: ignore[union-attr]
    assert [c.strip() for c in feff.group(1).split("&")] == ["", *expected]
    assert r"\multicolumn{4}{l}{\textit{First stage}} \\" in tex
    ar = suites[0].weak_iv_robust.anderson_rubin.intervals  # type: ignore[union-attr]
    low, high = (rv.fmt(v).replace("−", "-") for v in ar[0])
    assert f"$[{low}, {high}]$" in tex


def test_hostile_names_are_escaped_in_latex() -> None:
    evil = dataclasses.replace(runs()[1], slug="run_1&2", vcov="cluster{district}%")
    tex = runs_table([evil], treatment="telehealth")
    assert r"run\_1\&2" in tex
    assert r"cluster\{district\}\%" in tex
    # no unescaped specials outside our own commands and math
    body = re.sub(r"\$[^$]*\$", "", tex)
    assert re.search(r"(?<!\\)[%&_#]", body.replace(" & ", " ").replace("&", "")) is None


def test_unbounded_sets_print_as_infinity() -> None:
    weak = sample_result("2sls", instruments=("fibre_wave",), strength=0.05, seed=1)  # a nearly irrelevant Z
    ar = weak.diagnostics.weak_iv_robust.anderson_rubin  # type: ignore[union-attr]
    assert ar.shape == "two_rays"
    low, high = ar.intervals[0][1], ar.intervals[1][0]
    run = sample_run(1, weak)
    tex = runs_table([run])
    t_low, t_high = (rv.fmt(v).replace("−", "-") for v in (low, high))
    assert f"$(-\\infty, {t_low}] \\cup [{t_high}, \\infty)$" in tex
    md = runs_table([run], "markdown")
    assert f"(−∞, {rv.fmt(low)}] ∪ [{rv.fmt(high)}, ∞)" in md


def test_markdown_table_has_the_same_layout() -> None:
    md = runs_table(runs(), "markdown", caption="Effect | of telehealth")
    assert md.startswith("**Effect \\| of telehealth**")
    rows = [line for line in md.splitlines() if line.startswith("|")]
    assert rows[0] == "| Run | " + " | ".join(r.slug for r in runs()) + " |"
    assert rows[2] == "| Estimator | OLS | 2SLS | LIML |"
    est = next(r for r in rows if r.startswith("| Effect of telehealth"))
    shown = [rv.parse_fmt(c.strip()) for c in est.strip("|").split("|")[1:]]
    assert shown == pytest.approx([r.coef_of("telehealth") for r in RESULTS], rel=5e-4)
    se = rows[rows.index(est) + 1]
    assert se.startswith("| Standard error |")
    shown = [rv.parse_fmt(c.strip()) for c in se.strip("|").split("|")[1:]]
    assert shown == pytest.approx([r.se_of("telehealth") for r in RESULTS], rel=5e-4)
    assert "Standard errors in parentheses" not in md and "(1)" not in md


def test_rows_empty_in_every_run_are_left_out() -> None:
    tex = runs_table([runs()[0]])
    assert "Effective F" not in tex and "First stage" not in tex
    assert "Observations" in tex


def test_bad_arguments_name_the_fix() -> None:
    with pytest.raises(
        InvalidInputError, match="fmt='html' is not a table format; use 'latex' or 'markdown'"
    ):
        runs_table(runs(), "html")
    with pytest.raises(InvalidInputError, match="needs at least one run"):
        runs_table([])
