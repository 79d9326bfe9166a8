"""`run list`, `run show` and `instrument show` read a run's key results and inference warnings from the JSON view
stored beside its typed record, so they load no numerics. Reference: the typed record itself, decoded and read
through `workflows.evidence_runs` exactly as these commands did before (an exact identity, checked on every run
of the demo, a local-to-zero run, an estimate with a non-finite coefficient and the legacy runs of an old
registry)."""

from __future__ import annotations

import dataclasses
import math
import shutil
from pathlib import Path
from typing import Any

import pytest

from ivdossier.workflows.demo import build_demo, ticking_clock

FIXTURES = Path(__file__).parent / "fixtures"


def typed_summary(run: Any) -> tuple[tuple[str, str], ...]:
    """The reference: the summary read from the decoded typed record (the code `run show` used before)."""
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.workflows import evidence_runs as ev
    from ivdossier.workflows.run_records import _g

    if run.run_kind == "estimate":
        res = ev.typed_result(run)
        if not isinstance(res, EstimationResult):
            return (("results", "stored before typed records; see --json"),)
        out = [
            (f"estimate of {name}", f"{_g(res.coef_of(name))} (standard error {_g(res.se_of(name))})")
            for name in res.names[:3]
        ]
        out.append(("method", f"{res.method}, {res.vcov}"))
        out.append(("rows used", f"{res.n} ({res.n_dropped} left out)"))
        if res.n_clusters:
            out.append(("clusters", ", ".join(str(g) for g in res.n_clusters)))
        out.append(("interval reference", res.ci_reference))
        return tuple(out)
    if run.run_kind == "sensitivity":
        s = ev.sensitivity_info(run)
        if s.method == "breakdown":
            return (("breakdown value", _g(s.breakdown)), ("target effect", _g(s.target)))
        return ((f"{s.method} interval", f"[{_g(s.lower)}, {_g(s.upper)}]"),)
    if run.run_kind in ev.FALSIFICATION_KINDS:
        f = ev.falsification_info(run)
        out = [(f"{r.target} on {r.instrument}", f"{_g(r.estimate)} (p {_g(r.p_value)})") for r in f.rows[:6]]
        return tuple(out + ([("summary", f.summary)] if f.summary else []))
    if run.run_kind == "compliers":
        c = ev.compliers_info(run)
        return tuple((f"{s.group} share", _g(s.estimate)) for s in c.shares)
    if run.run_kind == "power":
        p = ev.power_info(run)
        return (
            ("standard error", _g(p.se)),
            (f"minimum detectable effect at {p.target_power:.0%} power", _g(p.mde)),
            ("power at the effect", _g(p.power)),
        )
    return ()


def typed_warnings(run: Any) -> tuple[str, ...]:
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.workflows.evidence_runs import typed_result
    from ivdossier.workflows.run_records import inference_warnings, run_warnings

    if run.run_kind == "estimate":
        res = typed_result(run)
        if isinstance(res, EstimationResult):
            return inference_warnings(tuple(res.n_clusters), res.ref_df)
    return run_warnings(run.results)


def _compare_every_run(db: str) -> set[str]:
    """Assert JSON-view and typed readings agree for every run of the registry; return the kinds seen."""
    from sqlalchemy import select

    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run
    from ivdossier.workflows.run_records import list_runs, result_summary, warnings_of

    registry = open_registry(db)
    try:
        with registry.reading() as s:
            runs = list(s.scalars(select(Run)))
            listed = {r.slug: r for r in list_runs(s)}
            for run in runs:
                assert result_summary(run) == typed_summary(run), run.slug
                assert warnings_of(run) == typed_warnings(run), run.slug
                assert listed[run.slug].summary == typed_summary(run)
            return {_variant(r) for r in runs}
    finally:
        registry.dispose()


def _variant(run: Any) -> str:
    kind = (run.results or {}).get("kind")
    return f"{run.run_kind}:{kind}" if isinstance(kind, str) else run.run_kind


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("run-summaries") / "demo"
    build_demo(out, clock=ticking_clock())
    return out


def test_every_demo_run_reads_the_same_from_its_json_view_as_from_its_typed_record(demo: Path) -> None:
    seen = _compare_every_run(str(demo / "ivdossier.sqlite"))
    # every run kind whose summary has more than one form is covered
    assert {
        "estimate",
        "sensitivity:union_of_confidence_intervals",
        "sensitivity:breakdown_value",
        "falsify-balance:balance",
        "falsify-placebo:placebo_outcomes",
        "falsify-zero-first-stage:zero_first_stage",
        "falsify-per-instrument:per_instrument",
        "falsify-first-stage-signs:subgroup_first_stages",
        "compliers",
        "power",
    } <= seen


def test_local_to_zero_and_non_finite_estimates_read_the_same(demo: Path, tmp_path: Path) -> None:
    from sqlalchemy import select

    from ivdossier.estimation import load_table
    from ivdossier.estimation.sensitivity import local_to_zero
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run
    from ivdossier.registry.runs import record_run
    from ivdossier.workflows.evidence_runs import typed_result
    from ivdossier.workflows.runs import stored_results

    db = tmp_path / "copy.sqlite"
    shutil.copyfile(demo / "ivdossier.sqlite", db)
    frame = load_table(demo / "data" / "telehealth.csv")
    ltz = local_to_zero(
        frame, outcome="ed_visits", treatment="telehealth", instruments="fibre_months", mu=0.0, omega=1e-5,
        cluster="district", vcov="clustered",
    )  # fmt: skip
    registry = open_registry(str(db))
    try:
        with registry.writing() as s:
            estimate = s.scalars(select(Run).where(Run.slug == "fibre-wave-estimate-3")).one()
            typed = typed_result(estimate)
            odd = dataclasses.replace(
                typed, coef=typed.coef * math.nan, se=typed.se * math.inf, n_clusters=(12,), ref_df=11,
                ci_reference="t quantiles with 11 degrees of freedom",
            )  # fmt: skip
            for kind, result in (("sensitivity", ltz), ("estimate", odd)):
                record_run(
                    s, actor="tester", instrument="fibre-wave", run_kind=kind, spec={},
                    results=stored_results(result), versions={}, seconds=0.0,
                )  # fmt: skip
    finally:
        registry.dispose()
    seen = _compare_every_run(str(db))
    assert "sensitivity:local_to_zero" in seen


def test_runs_stored_before_typed_records_read_the_same(tmp_path: Path) -> None:
    db = tmp_path / "old.sqlite"
    shutil.copyfile(FIXTURES / "registry-0002.sqlite", db)
    assert "estimate" in _compare_every_run(str(db))
