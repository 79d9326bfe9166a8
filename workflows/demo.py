"""Build the invented telehealth demo end to end: data files, a registry, claims, threats, runs and documents."""

from __future__ import annotations

import contextlib
import shutil
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from ivdossier.errors import InvalidInputError

MARKER = ".ivdossier-demo"
PROGRAM = "telehealth-ed"

MEMBERS = (
    ("amara", "Amara Okafor", "amara@example.org"),
    ("jonas", "Jonas Lindqvist", "jonas@example.org"),
    ("priya", "Priya Raman", "priya@example.org"),
)

INSTRUMENTS: tuple[dict[str, Any], ...] = (
    {
        "slug": "fibre-wave",
        "name": "Months since the fibre roll-out reached the postal district",
        "family": "distance-geography",
        "columns": ["fibre_months"],
        "claims": {
            "relevance": "Video visits need a fast, stable connection; districts reached earlier by the utility's "
            "fibre had it for longer before the study year, so their patients could adopt sooner.",
            "exclusion": "Fibre changes emergency use only by making remote visits possible. The utility's "
            "schedule added no clinics, staff or transport.",
            "exogeneity": "The wave order followed duct availability and the cost of trenching, fixed years "
            "before the study; it was not chosen with health needs in mind.",
            "monotonicity": "Earlier fibre never makes a patient less able to hold a video visit.",
        },
    },
    {
        "slug": "clerk-video-rate",
        "name": "Video-visit share of the scheduling clerk a patient was assigned",
        "family": "decision-maker-assignment",
        "columns": ["clerk_video_rate"],
        "claims": {
            "relevance": "Clerks differ widely in how often they offer a video slot; patients take what they "
            "are offered.",
            "exclusion": "A clerk only books the appointment; nothing else a clerk does should change whether "
            "a patient ends up in the emergency department.",
            "exogeneity": "Patients are routed to clerks by a rota that ignores who is calling.",
            "monotonicity": "A patient who would accept video from a reluctant clerk would also accept it from "
            "an enthusiastic one.",
        },
    },
    {
        "slug": "mast-distance",
        "name": "Distance to the nearest mobile mast",
        "family": "distance-geography",
        "columns": ["mast_km"],
        "claims": {
            "relevance": "Patients far from a mast have weaker mobile data and may find video visits harder.",
            "exclusion": "Mast placement matters for emergency use only through the ability to hold a visit.",
            "exogeneity": "Masts were sited for coverage of roads, not of patients' health.",
        },
    },
)


# A threat the team writes itself, in the catalogue's format (team codes start with "T-").
TEAM_THREAT: dict[str, Any] = {
    "code": "T-CLERK-FOLLOWUP",
    "title": "Clerks who favour video visits also book prompt follow-ups",
    "condition": "exclusion",
    "mechanism": "alternative-pathway",
    "families": ["decision-maker-assignment"],
    "description": "Scheduling clerks do more than offer a video slot: some also book a follow-up within days. "
    "A prompt follow-up can head off an emergency visit whether or not the patient ever uses video.",
    "testability": "partly-testable",
    "checks": ["zero-first-stage-reduced-form", "per-instrument-estimates", "exclusion-sensitivity"],
    "mitigations": ["Measure each clerk's follow-up booking rate and control for it."],
    "references": ["Team note, 2026 (internal)"],
    "fragment": {
        "nodes": [
            {"name": "followup_booking", "observed": False, "label": "prompt follow-up booked by the clerk"}
        ],
        "edges": [["Z", "followup_booking"], ["followup_booking", "Y"]],
    },
}

# Two invented earlier studies that used broadband roll-out timing, for the literature audit.
PRIOR_STUDIES_BIBTEX = r"""
@article{nakamura2023broadband,
  author  = {Nakamura, Ren and Sj{\"o}berg, Elin},
  title   = {Broadband Arrival and Remote Consultations in Rural Clinics},
  journal = {Invented Journal of Rural Health Services},
  year    = {2023},
  doi     = {10.0000/invented.2023.001}
}
@article{ferreira2024fibre,
  author  = {Ferreira, Lu{\'\i}sa and Adeyemi, Tunde},
  title   = {Fibre Schedules as Natural Experiments in Primary Care},
  journal = {Invented Review of Health Policy},
  year    = {2024}
}
"""
# (study key, reported statistics)
PRIOR_STUDY_STATS: tuple[tuple[str, dict[str, Any]], ...] = (
    (
        "nakamura2023broadband",
        {
            "estimate": -0.42,
            "std_error": 0.17,
            "first_stage_f": 11.5,
            "f_kind": "heteroskedastic",
            "n": 4200,
            "first_stage_coef": 0.011,
            "first_stage_se": 0.0032,
            "reduced_form_coef": -0.0046,
            "reduced_form_se": 0.0019,
        },
    ),
    (
        "ferreira2024fibre",
        {
            "estimate": -0.8,
            "std_error": 0.21,
            "first_stage_f": 48.0,
            "f_kind": "clustered",
            "n": 9100,
            "n_clusters": 140,
        },
    ),
)

# (instrument, threat code, state, argument, evidence)
LINKS: tuple[tuple[str, str, str, str, str], ...] = (
    (
        "fibre-wave",
        "DG-I01",
        "rebutted",
        "Patients did not move in response to a schedule that was published only after the study year began.",
        "Address histories show no rise in moves into early-wave districts.",
    ),
    (
        "fibre-wave",
        "DG-E01",
        "mitigated",
        "The roll-out came with no new services; early districts are compared with late ones of similar size.",
        "",
    ),
    (
        "fibre-wave",
        "AN-E01",
        "open",
        "Patients who learn fibre is coming might change how they use services before they adopt video visits.",
        "",
    ),
    (
        "clerk-video-rate",
        "DM-E01",
        "open",
        "Clerks who like video slots may also book prompt follow-ups, which could prevent emergency visits "
        "without any video visit taking place.",
        "",
    ),
    (
        "clerk-video-rate",
        "T-CLERK-FOLLOWUP",
        "open",
        "If patients who cannot take video visits still have fewer emergency visits with video-minded clerks, "
        "the clerk reaches the outcome some other way.",
        "",
    ),
    (
        "clerk-video-rate",
        "DM-I01",
        "rebutted",
        "The rota assigns calls in arrival order.",
        "Rota logs, 2025.",
    ),
    ("clerk-video-rate", "DM-M01", "open", "", ""),
    (
        "clerk-video-rate",
        "DM-I03",
        "rebutted",
        "The case-level measure averages the clerk's other patients only, never the patient's own booking.",
        "Design run on the clerk assignments (leave-one-out share within clinics).",
    ),
    (
        "clerk-video-rate",
        "DM-R01",
        "rebutted",
        "Regular clerks book about 160 patients a year each; only the eight relief clerks have few cases, and "
        "the design run flags them.",
        "Design run on the clerk dummies: the many-instrument strength measure is well above its cut-off.",
    ),
    ("mast-distance", "DG-R01", "open", "Most patients use fixed broadband, so masts matter little.", ""),
)
# (member, link, likelihood, severity, comment)
RATINGS: tuple[tuple[str, str, int, int, str], ...] = (
    ("amara", "clerk-video-rate--dm-e01", 4, 5, "Follow-up booking is part of the same job."),
    ("jonas", "clerk-video-rate--dm-e01", 2, 4, "Follow-ups are booked by nurses, mostly."),
    ("priya", "clerk-video-rate--dm-e01", 5, 5, ""),
    ("amara", "fibre-wave--an-e01", 2, 2, ""),
    ("jonas", "fibre-wave--an-e01", 1, 2, "Nobody knew the schedule."),
    ("priya", "mast-distance--dg-r01", 5, 3, "The first stage will be thin."),
)
CONTROLS = ("age", "chronic_conditions")
# (instrument the run is attached to, instruments used, method)
RUNS: tuple[tuple[str, tuple[str, ...], str], ...] = (
    ("fibre-wave", (), "ols"),
    ("fibre-wave", ("fibre_months",), "liml"),
    ("fibre-wave", ("fibre_months",), "2sls"),
    ("mast-distance", ("mast_km",), "2sls"),
    ("clerk-video-rate", ("clerk_video_rate", "fibre_months"), "2sls"),
    ("clerk-video-rate", ("clerk_video_rate",), "2sls"),
)


def _prepare_out(out: Path, replace: bool) -> None:
    if out.exists() and any(out.iterdir()):
        if not replace:
            raise InvalidInputError(
                f"{str(out)!r} already exists and is not empty; pass --replace to rebuild the demo there, "
                "or choose another --out folder."
            )
        if not (out / MARKER).exists():
            raise InvalidInputError(
                f"{str(out)!r} holds files that the demo did not write; --replace only clears demo folders. "
                "Choose an empty or new --out folder."
            )
        shutil.rmtree(out)
    out.mkdir(parents=True, exist_ok=True)
    (out / MARKER).write_text("folder written by `ivdossier demo`; safe to delete\n", encoding="utf-8")


def build_demo(
    out: Path,
    *,
    replace: bool = False,
    db: str | None = None,
    actor: str = "demo",
    progress: Callable[[str], None] | None = None,
    clock: Callable[[], datetime] | None = None,
) -> dict[str, Any]:
    """Write the demo into `out` and return a summary of what was built.

    `clock` supplies every timestamp (registry records and the documents' generation time) instead of the wall
    clock, e.g. ``ticking_clock()`` for a reproducible build; dataset paths in the documents are relative to `out`.
    """
    from ivdossier.registry.models import clock as registry_clock

    with registry_clock(clock) if clock is not None else contextlib.nullcontext():
        return _build(out, replace=replace, db=db, actor=actor, progress=progress, clock=clock)


def ticking_clock(
    start: datetime = datetime(2026, 3, 2, 9, 0, tzinfo=UTC), step_seconds: int = 1
) -> Callable[[], datetime]:
    """A clock that starts at `start` and moves on `step_seconds` every time it is read (deterministic)."""
    ticks = iter(range(1 << 62))
    return lambda: start + timedelta(seconds=step_seconds * next(ticks))


def _build(
    out: Path,
    *,
    replace: bool,
    db: str | None,
    actor: str,
    progress: Callable[[str], None] | None,
    clock: Callable[[], datetime] | None,
) -> dict[str, Any]:
    from ivdossier.registry import instruments as reg
    from ivdossier.registry.db import open_registry
    from ivdossier.workflows.demo_data import simulate_telehealth
    from ivdossier.workflows.demo_fragility import run_demo_fragility

    say = progress or (lambda _msg: None)
    out = Path(out)
    _prepare_out(out, replace)
    data_dir = out / "data"
    data_dir.mkdir()
    frame = simulate_telehealth()
    csv_path = data_dir / "telehealth.csv"
    frame.to_csv(csv_path, index=False)
    frame.to_parquet(data_dir / "telehealth.parquet", index=False)
    say(f"simulated {len(frame):,} patients -> {csv_path}")

    registry = open_registry(db or str(out / "ivdossier.sqlite"))
    summary: dict[str, Any] = {
        "out": str(out),
        "registry": registry.url,
        "data": str(csv_path),
        "rows": len(frame),
    }
    try:
        with registry.writing() as s:
            reg.add_program(
                s,
                actor=actor,
                slug=PROGRAM,
                title="Does adopting telehealth visits reduce emergency-department visits among rural patients?",
                question="Among rural patients of the regional health service, what is the effect of adopting "
                "video visits on the number of emergency-department visits in the following year?",
                treatment="telehealth",
                outcome="ed_visits",
                unit="patient",
                population="Adult patients registered with rural practices of an invented regional health service.",
            )
            for handle, name, email in MEMBERS:
                reg.add_member(s, actor=actor, handle=handle, name=name, email=email)
            for name, measured, text in (
                ("age", True, "Age in years at the start of the study year."),
                ("chronic_conditions", True, "Number of recorded chronic conditions."),
            ):
                reg.add_covariate(
                    s, actor=actor, program=PROGRAM, name=name, measured=measured, description=text
                )
            for source, target in (
                ("age", "telehealth"),
                ("age", "ed_visits"),
                ("chronic_conditions", "telehealth"),
                ("chronic_conditions", "ed_visits"),
            ):
                reg.add_edge(s, actor="amara", program=PROGRAM, source=source, target=target)
            for spec in INSTRUMENTS:
                reg.add_instrument(s, actor=actor, program=PROGRAM, **spec)
            reg.move_instrument(
                s, actor="amara", instrument="fibre-wave", to="vetting", reason="Roll-out schedule obtained."
            )
            reg.move_instrument(
                s, actor="jonas", instrument="clerk-video-rate", to="vetting", reason="Rota logs obtained."
            )
        say(f"registry {registry.url}: program {PROGRAM} with {len(INSTRUMENTS)} candidate instruments")
        summary["instruments"] = [spec["slug"] for spec in INSTRUMENTS]
        summary["links"] = _link_threats(registry, actor)
        say(f"linked {summary['links']} catalogue threats and recorded {len(RATINGS)} ratings")
        summary["studies"] = _prior_studies(registry)
        say(f"imported {summary['studies']} invented earlier studies for the literature audit")
        summary["runs"] = _estimate(registry, csv_path, actor)
        say(f"stored {len(summary['runs'])} estimation runs")
        summary["checks"] = _checks(registry, csv_path, actor)
        say(f"stored {len(summary['checks'])} falsification, sensitivity, compliers and power runs")
        summary["design"] = _clerk_design(registry, csv_path, actor)
        say(f"built the clerks' leave-out video share from the case data: run {summary['design']}")
        summary["primary"] = _mark_primary(registry, actor)
        say(f"marked {summary['primary']} as the fibre instrument's primary run")
        summary["fragility"] = run_demo_fragility(registry, frame, data_dir, actor, say)
        summary["caught"] = _record_what_the_checks_found(registry)
        say(f"the zero-first-stage check caught the planted violation: {summary['caught']}")
        summary["documents"] = _documents(registry, out, (clock or (lambda: datetime.now(UTC)))())
        say(f"wrote {len(summary['documents'])} documents under {out}")
    finally:
        registry.dispose()
    return summary


def _link_threats(registry: Any, actor: str) -> int:
    from ivdossier.registry.threats import add_team_threat, link_threat, rate_link
    from ivdossier.threats_catalog.catalog import Threat as CatalogThreat
    from ivdossier.workflows.catalog_sync import ensure_builtin

    with registry.writing() as s:
        ensure_builtin(s, actor=actor)
        add_team_threat(s, actor="jonas", entry=CatalogThreat.from_dict(TEAM_THREAT).to_dict())
        for instrument, code, state, argument, evidence in LINKS:
            link_threat(
                s,
                actor=actor,
                instrument=instrument,
                code=code,
                state=state,
                argument=argument,
                evidence=evidence,
            )
        for member, link, likelihood, severity, comment in RATINGS:
            rate_link(s, actor=member, link=link, likelihood=likelihood, severity=severity, comment=comment)
    return len(LINKS)


def _prior_studies(registry: Any) -> int:
    from ivdossier.registry.studies import attach, critique, import_bibtex
    from ivdossier.workflows.studies import report_stats

    with registry.writing() as s:
        studies = import_bibtex(s, actor="amara", text=PRIOR_STUDIES_BIBTEX, source="demo")
        for key, stats in PRIOR_STUDY_STATS:
            report_stats(s, actor="amara", key=key, values=stats)
            attach(s, actor="amara", key=key, family="distance-geography")
        critique(
            s,
            actor="jonas",
            key="nakamura2023broadband",
            threat="DG-I01",
            by="ferreira2024fibre",
            note="Early-wave districts were wealthier suburbs.",
        )
    return len(studies)


def _estimate(registry: Any, csv_path: Path, actor: str) -> list[str]:
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.runs import estimate_file, store_run

    slugs = []
    for instrument, used, method in RUNS:
        spec = ModelSpec.build(
            outcome="ed_visits",
            treatment="telehealth",
            instruments=used,
            controls=CONTROLS,
            cluster="district",
            method=method,
            vcov="clustered",
        )
        run = estimate_file(csv_path, spec)
        with registry.writing() as s:
            slugs.append(store_run(s, run, instrument=instrument, actor=actor).slug)
    return slugs


def _checks(registry: Any, csv_path: Path, actor: str) -> list[str]:
    """Falsification and sensitivity runs: the zero-first-stage subgroup and the placebo outcome for each."""
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.analyses import run_analysis
    from ivdossier.workflows.runs import store_run

    def spec(instruments: list[str], **roles: Any) -> ModelSpec:
        adjust: dict[str, Any] = {"controls": CONTROLS, **roles}
        return ModelSpec.build(instruments=instruments, cluster="district", vcov="clustered", **adjust)

    model = {"outcome": "ed_visits", "treatment": "telehealth"}
    jobs: list[tuple[str, str, ModelSpec, dict[str, Any]]] = []
    for slug, column in (
        ("fibre-wave", "fibre_months"),
        ("clerk-video-rate", "clerk_video_rate"),
        ("mast-distance", "mast_km"),
    ):
        jobs.append((slug, "falsify zero-first-stage", spec([column], **model), {"query": "has_device == 0"}))
        jobs.append((slug, "falsify placebo", spec([column]), {"outcomes": ["prior_ed_visits"]}))
    both = spec(["clerk_video_rate", "fibre_months"], **model)
    jobs.append(("clerk-video-rate", "falsify per-instrument", both, {}))
    jobs.append(
        ("fibre-wave", "falsify balance", spec(["fibre_months"], controls=()), {"covariates": CONTROLS})
    )
    signs = spec(["clerk_video_rate"], treatment="telehealth")
    jobs.append(("clerk-video-rate", "falsify first-stage-signs", signs, {"by": "age"}))
    jobs.append(("fibre-wave", "sensitivity breakdown", spec(["fibre_months"], **model), {}))
    # The team allows the fibre schedule a direct effect of up to 0.003 visits per month either way.
    direct = {"direct_effect_min": [-0.003], "direct_effect_max": [0.003]}
    jobs.append(("fibre-wave", "sensitivity range", spec(["fibre_months"], **model), direct))
    slugs = []
    for instrument, name, model_spec, options in jobs:
        run = run_analysis(name, csv_path, model_spec, **options)
        with registry.writing() as s:
            slugs.append(store_run(s, run, instrument=instrument, actor=actor).slug)
    for run in (_compliers_run(csv_path), _power_run(csv_path)):
        with registry.writing() as s:
            slugs.append(store_run(s, run, instrument="fibre-wave", actor=actor).slug)
    return slugs


CLERK_SHARE = "clerk_video_share"
"""The case-level clerk instrument: the clerk's video share over their other patients, within the clinic (derived)."""
CLERK_DESIGN_FILE = "telehealth_with_clerk_share.csv"


def _clerk_design(registry: Any, csv_path: Path, actor: str) -> str:
    """The clerk instrument built from the simulated assignments: the leave-one-out video share of each patient's
    clerk, residualised on the clinic (the rota randomises within a clinic), written with the data to a derived
    file whose recipe and SHA-256 go into the run's provenance; JIVE1 and UJIVE beside 2SLS on the clerk dummies
    and the jackknife Anderson-Rubin test of no effect."""
    from ivdossier.workflows.analyses import run_analysis
    from ivdossier.workflows.runs import store_run

    run = run_analysis(
        "design decision-makers",
        csv_path,
        None,
        outcome="ed_visits",
        treatment="telehealth",
        decision_maker="clerk",
        controls=[],
        absorb="clinic",
        leave_out="case",
        min_cases=20,
        beta0=0.0,
        alpha=0.05,
        column_name=CLERK_SHARE,
        derived_out=str(csv_path.parent / CLERK_DESIGN_FILE),
        input_data=str(csv_path),
    )
    with registry.writing() as s:
        return str(store_run(s, run, instrument="clerk-video-rate", actor=actor).slug)


EARLY_FIBRE = "fibre_year"
"""A binary instrument for the compliers run: fibre reached the district at least 12 months before (derived)."""


def _compliers_run(csv_path: Path) -> Any:
    """Compliers of the early-fibre indicator (fibre_months >= 12, derived), profiled on the controls."""
    from ivdossier.estimation.compliers import complier_report
    from ivdossier.workflows.runs import analyse_file

    spec = {"treatment": "telehealth", "instrument": EARLY_FIBRE, "months": 12, "covariates": list(CONTROLS)}
    spec.update(cluster="district", seed=7)

    def compute(frame: Any) -> tuple[Any, dict[str, Any]]:
        frame = frame.assign(**{EARLY_FIBRE: (frame["fibre_months"] >= 12).astype(int)})
        kw = {k: v for k, v in spec.items() if k != "months"}
        return complier_report(frame, **kw), {}

    return analyse_file("compliers", csv_path, compute, spec)


def _power_run(csv_path: Path) -> Any:
    """Power of a replication of the fibre design with the demo's size, first stage and spreads (from the data)."""
    import numpy as np

    from ivdossier.estimation.power import iv_design, power_analysis
    from ivdossier.workflows.runs import analyse_file

    spec = {"n": 12000, "instrument": "fibre_months", "treatment": "telehealth", "outcome": "ed_visits"}
    spec.update(effect=-0.5, icc=0.01)

    def compute(frame: Any) -> tuple[Any, dict[str, Any]]:
        r2 = float(np.corrcoef(frame["fibre_months"], frame["telehealth"])[0, 1] ** 2)
        design = iv_design(
            n=12000,
            partial_r2=r2,
            outcome_sd=float(frame["ed_visits"].std()),
            treatment_sd=float(frame["telehealth"].std()),
            cluster_size=12000 / frame["district"].nunique(),
            icc=0.01,
        )
        return power_analysis(design, effect=-0.5), {}

    return analyse_file("power", csv_path, compute, spec)


def _mark_primary(registry: Any, actor: str) -> str:
    """The team's plan named 2SLS with the fibre schedule alone: that run carries the fibre dossier's headline."""
    from ivdossier.workflows.run_records import mark_primary

    with registry.writing() as s:
        return mark_primary(
            s,
            actor=actor,
            run="fibre-wave-estimate-3",
            reason="the plan's specification: 2SLS, fibre schedule",
        ).slug


def _record_what_the_checks_found(registry: Any) -> str:
    """The team reads the zero-first-stage result for the clerk instrument and marks the follow-up threat fatal."""
    from ivdossier.registry import records
    from ivdossier.registry.instruments import move_instrument
    from ivdossier.registry.models import Run
    from ivdossier.registry.threats import set_link
    from ivdossier.workflows.findings import finding

    with registry.writing() as s:
        run = records.get(s, Run, "clerk-video-rate-falsify-zero-first-stage-1")
        found = finding("zero-first-stage-reduced-form", run.results or {}, run.run_kind)
        set_link(
            s,
            actor="priya",
            link="clerk-video-rate--t-clerk-followup",
            state="fatal",
            evidence=f"Run {run.slug}: {found}. Patients without a capable device cannot take video visits, "
            "yet their emergency visits fall with the clerk's video share.",
        )
        move_instrument(
            s,
            actor="priya",
            instrument="clerk-video-rate",
            to="rejected",
            reason="The clerk reaches emergency visits through follow-up booking (zero-first-stage check).",
        )
    return found


def _documents(registry: Any, out: Path, now: datetime) -> list[str]:
    from ivdossier.workflows.dossiers import write_dossier, write_site

    generated = now.isoformat(timespec="seconds")
    written = []
    with registry.reading() as s:
        for spec in INSTRUMENTS:
            for suffix in (".md", ".html"):
                path = out / "dossiers" / f"{spec['slug']}{suffix}"
                written.append(
                    str(write_dossier(s, spec["slug"], path, generated_at=generated, relative_to=out))
                )
        written.extend(str(p) for p in write_site(s, out / "site", generated_at=generated, relative_to=out))
    return written


REPRODUCIBLE_AT = datetime(2026, 3, 2, 12, 0, tzinfo=UTC)
"""The generation time the golden files of the demo's dossiers are rendered with."""


def demo_markdown(out: Path, *, generated_at: datetime | str = REPRODUCIBLE_AT) -> dict[str, str]:
    """The Markdown dossier of every demo instrument, read back from the demo registry in `out`, reproducibly:
    paths relative to `out`, the given generation time, and no run timings or installed versions."""
    from ivdossier.registry.db import open_registry
    from ivdossier.reports.dossier import dossier_markdown
    from ivdossier.workflows.dossiers import dossier_input

    registry = open_registry(str(Path(out) / "ivdossier.sqlite"))
    try:
        with registry.reading() as s:
            return {
                spec["slug"]: dossier_markdown(
                    dossier_input(
                        s, spec["slug"], generated_at=generated_at, relative_to=Path(out), reproducible=True
                    )
                )
                for spec in INSTRUMENTS
            }
    finally:
        registry.dispose()
