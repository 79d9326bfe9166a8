"""Publication table of selected runs: one column per run, estimates over diagnostics, LaTeX or Markdown.

Layout (our own): one column per run, headed by the run's name with its estimator beneath; the effect, then its
standard error on a row of its own labelled as such, the Wald interval and the Anderson-Rubin set; then
instrument strength; then sample facts, ending with each run's data fingerprint. LaTeX uses booktabs rules and
escapes every text cell.
"""

from __future__ import annotations

import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.reports import mdtext as mt
from ivdossier.reports import resultview as rv
from ivdossier.reports.estimates import (
    ar_set_of,
    effective_f_of,
    section_of,
    suite_of,
    treatment_of,
    wald_interval,
)
from ivdossier.reports.inputs import RunInfo

_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}",
    "&": r"\&",
    "%": r"\%",
    "$": r"\$",
    "#": r"\#",
    "_": r"\_",
    "{": r"\{",
    "}": r"\}",
    "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}",
    "<": r"\textless{}",
    ">": r"\textgreater{}",
    "|": r"\textbar{}",
}
_LATEX_RE = re.compile("|".join(re.escape(k) for k in _LATEX_SPECIAL))
_LATEX_UNICODE = {
    "τ": r"$\tau$",
    "–": "--",
    "—": "---",
    "−": "-",
    "≥": r"$\geq$",
    "≤": r"$\leq$",
    "×": r"$\times$",
}


def latex_escape(text: object) -> str:
    """Escape text for LaTeX body text: special characters become commands; control characters and newlines go."""
    cleaned = " ".join(mt.clean(text).replace("\ufffd", " ").split())
    escaped = _LATEX_RE.sub(lambda m: _LATEX_SPECIAL[m.group(0)], cleaned)
    for char, command in _LATEX_UNICODE.items():
        escaped = escaped.replace(char, command)
    return escaped


@dataclass(frozen=True)
class _Cell:
    kind: str  # "text", "num", "se", "set", "blank"
    value: Any = None


def _tex_num(x: float | None, digits: int = 4) -> str:
    if x is None:
        return ""
    if math.isinf(x):
        return r"$\infty$" if x > 0 else r"$-\infty$"
    return "$" + rv.fmt(x, digits).replace("−", "-") + "$"


def _tex_set(sets: list[rv.Interval]) -> str:
    if not sets:
        return "empty"
    parts = []
    for lo, hi in sets:
        left = "(" if math.isinf(lo) else "["
        right = ")" if math.isinf(hi) else "]"
        a = r"-\infty" if math.isinf(lo) else rv.fmt(lo).replace("−", "-")
        b = r"\infty" if math.isinf(hi) else rv.fmt(hi).replace("−", "-")
        parts.append(f"{left}{a}, {b}{right}")
    return "$" + r" \cup ".join(parts) + "$"


def _render(cell: _Cell, fmt: str) -> str:
    if cell.kind == "blank" or cell.value is None:
        return ""
    if cell.kind == "text":
        return latex_escape(cell.value) if fmt == "latex" else mt.cell(cell.value)
    if cell.kind == "num":
        return _tex_num(cell.value) if fmt == "latex" else rv.fmt(cell.value)
    if cell.kind == "int":
        return _tex_num(cell.value, 12) if fmt == "latex" else rv.fmt(cell.value, 12)
    if cell.kind == "set":
        return _tex_set(cell.value) if fmt == "latex" else rv.fmt_set(cell.value)
    raise AssertionError(cell.kind)


def _finite(value: float | None) -> float | None:
    return None if value is None or math.isnan(value) else float(value)


def _rows(runs: Sequence[RunInfo], treatment: str | None) -> list[tuple[str, list[_Cell]]]:
    est, se, ci, ar, feff, cv10, fs, kp, n, clusters, vcov, data = ([] for _ in range(12))
    for run in runs:
        res = run.result  # None for runs stored before typed records: their cells stay empty
        name = treatment_of(res, treatment or "") if res is not None else None
        est.append(_Cell("num", res.coef_of(name) if res is not None and name else None))
        se.append(_Cell("num", res.se_of(name) if res is not None and name else None))
        ci.append(_Cell("set", wald_interval(res, name) if res is not None and name else None))
        ar.append(_Cell("set", ar_set_of(res)))
        f_eff, cvs = effective_f_of(res)
        feff.append(_Cell("num", f_eff))
        cv10.append(_Cell("num", cvs.get(10)))
        suite = suite_of(res)
        first, strength = section_of(suite, "first_stage"), section_of(suite, "strength")
        robust = [_finite(r.robust_f) for r in first.rows] if first is not None else []
        fs.append(_Cell("num", min((f for f in robust if f is not None), default=None)))
        kp_rk = strength.kp_rk if strength is not None else None
        kp.append(_Cell("num", _finite(kp_rk.f_form) if kp_rk is not None else None))
        n.append(_Cell("int", res.n if res is not None else None))
        one_way = res is not None and len(res.n_clusters) == 1
        clusters.append(_Cell("int", res.n_clusters[0] if res is not None and one_way else None))
        vcov.append(_Cell("text", run.vcov or (res.vcov if res is not None else None) or None))
        data.append(_Cell("text", run.dataset_sha256[:12] or None))
    named = (treatment_of(r.result) for r in runs if r.result is not None)
    label = treatment or next(named, None) or "treatment"
    return [
        (f"Effect of {label}", est),
        ("Standard error", se),
        ("Wald interval", ci),
        ("Anderson–Rubin set", ar),
        ("@First stage", []),
        ("Effective F", feff),
        ("  critical value, τ = 10 %", cv10),
        ("Robust first-stage F", fs),
        ("Kleibergen–Paap rk Wald F", kp),
        ("@Sample", []),
        ("Observations", n),
        ("Clusters", clusters),
        ("Covariance", vcov),
        ("Data fingerprint", data),
    ]


def runs_table(
    runs: Sequence[RunInfo], fmt: str = "latex", *, treatment: str | None = None, caption: str | None = None
) -> str:
    """A publication table of `runs` (one column each) as LaTeX (booktabs) or Markdown.

    Rows whose cells are empty in every run are left out. `treatment` names the coefficient to report when the
    runs' specs do not.
    """
    if fmt not in ("latex", "markdown"):
        raise InvalidInputError(f"fmt={fmt!r} is not a table format; use 'latex' or 'markdown'.")
    if not runs:
        raise InvalidInputError("runs_table needs at least one run; select runs to tabulate.")
    body: list[tuple[str, list[str]]] = []
    for label, cells in _rows(runs, treatment):
        if label.startswith("@"):
            body.append((label, []))
            continue
        rendered = [_render(c, fmt) for c in cells]
        if any(rendered):
            body.append((label, rendered))
    # drop group headings with no rows beneath them
    kept: list[tuple[str, list[str]]] = []
    for i, (label, texts) in enumerate(body):
        if label.startswith("@") and (i + 1 == len(body) or body[i + 1][0].startswith("@")):
            continue
        kept.append((label, texts))
    heads = [r.slug for r in runs]
    methods = [rv.method_label(r.method) for r in runs]
    note = (
        "Each column is one stored run. Intervals and sets are at the level each run used; the data fingerprint "
        "is the start of the SHA-256 of the run's data file."
    )
    if fmt == "markdown":
        return _markdown(kept, heads, methods, note, caption)
    return _latex(kept, heads, methods, note, caption)


def _markdown(
    body: list[tuple[str, list[str]]], heads: list[str], methods: list[str], note: str, caption: str | None
) -> str:
    rows = [["Estimator", *[mt.cell(m) for m in methods]]]
    for label, cells in body:
        if label.startswith("@"):
            rows.append([f"*{mt.inline(label[1:])}*", *[""] * len(heads)])
        else:
            rows.append([mt.inline(label.strip()) if label.strip() else "", *cells])
    text = mt.table(["Run", *[mt.cell(h) for h in heads]], rows, "l" + "r" * len(heads))
    lead = f"**{mt.inline(caption)}**\n\n" if caption else ""
    return lead + text + "\n\n" + mt.inline(note) + "\n"


def _latex(
    body: list[tuple[str, list[str]]], heads: list[str], methods: list[str], note: str, caption: str | None
) -> str:
    k = len(heads)
    lines = []
    if caption:
        lines.append(f"% {latex_escape(caption)}")
    lines += [
        r"\begin{tabular}{l" + "c" * k + "}",
        r"\toprule",
        " & ".join(["Run", *[latex_escape(h) for h in heads]]) + r" \\",
        " & ".join(["Estimator", *[latex_escape(m) for m in methods]]) + r" \\",
        r"\midrule",
    ]
    for label, cells in body:
        if label.startswith("@"):
            lines.append(r"\addlinespace")
            lines.append(
                r"\multicolumn{" + str(k + 1) + r"}{l}{\textit{" + latex_escape(label[1:]) + r"}} \\"
            )
            continue
        text = latex_escape(label.strip())
        if label.startswith("  "):
            text = r"\quad " + text
        lines.append(" & ".join([text, *cells]) + r" \\")
    lines += [
        r"\bottomrule",
        r"\multicolumn{" + str(k + 1) + r"}{p{0.9\linewidth}}{\footnotesize " + latex_escape(note) + r"} \\",
        r"\end{tabular}",
    ]
    return "\n".join(lines) + "\n"
