"""Invented example inputs (rural telehealth scenario) for tests, the benchmark and trying the renderer.

The numbers are made up to look like a typical estimation result; they are not computed from data. Verdicts are
not attached here (reports cannot run the engine): pass an input through ``ivdossier.workflows.verdicts.with_verdicts``.
"""

from __future__ import annotations

from typing import Any

from ivdossier.reports.inputs import (
    CONDITIONS,
    ArCurve,
    AuditEvent,
    CheckInfo,
    DossierInput,
    FirstStageBins,
    GraphInfo,
    InstrumentInfo,
    LinkInfo,
    ProgramInfo,
    Rating,
    RunInfo,
)
from ivdossier.threats_catalog.graph import BypassPath, ConditionVerdict, GraphVerdict

PROGRAM = ProgramInfo(
    slug="telehealth-ed",
    title="Telehealth adoption and emergency visits",
    question="Does adopting telehealth visits reduce emergency-department visits among rural patients?",
    treatment="telehealth",
    outcome="ed_visits",
    unit="patient-year",
    population="Adults registered with rural practices in the region, 2019–2023",
)

FIBRE = InstrumentInfo(
    slug="fibre-wave",
    name="Fibre rollout wave",
    family="timing of entry",
    columns=("fibre_wave",),
    state="under review",
    claims={
        "relevance": "Districts reached earlier by the fibre rollout had usable video bandwidth sooner, so their "
        "patients could book video visits earlier.",
        "exclusion": "Fibre changes emergency use only by making remote consultations possible.",
        "exogeneity": "The rollout order followed the utility's engineering schedule (duct availability), "
        "not local health needs.",
        "monotonicity": "Earlier fibre never makes a patient less likely to use telehealth.",
    },
)


def iv_results(
    *,
    coef: float = -0.21,
    se: float = 0.06,
    feff: float = 38.4,
    ar: Any = None,
    overid_p: float | None = 0.41,
) -> dict[str, Any]:
    """An estimation result shaped like `EstimationResult.to_dict()` of the estimation layer (invented values)."""
    return {
        "method": "2sls",
        "vcov": "clustered",
        "outcome": "ed_visits",
        "n": 48210,
        "n_dropped": 37,
        "n_clusters": [212],
        "alpha": 0.05,
        "coef": {"telehealth": coef},
        "se": {"telehealth": se},
        "ci": {"telehealth": [coef - 1.96 * se, coef + 1.96 * se]},
        "first_stage": {
            "by_endog": {
                "telehealth": {
                    "endog": "telehealth",
                    "coefficients": {"fibre_wave": -0.083, "clerk_propensity": 0.41},
                    "std_errors": {"fibre_wave": 0.011, "clerk_propensity": 0.07},
                    "partial_f": 44.1,
                    "robust_f": 39.7,
                    "partial_r2": 0.031,
                }
            }
        },
        "reduced_form": {
            "coefficients": {"fibre_wave": 0.017, "clerk_propensity": -0.088},
            "std_errors": {"fibre_wave": 0.006, "clerk_propensity": 0.031},
            "wald_f": 6.8,
            "p_value": 0.0011,
        },
        "strength": {
            "effective_f": {
                "statistic": feff,
                "critical_values": {
                    "tau_5pct": 37.4,
                    "tau_10pct": 23.1,
                    "tau_20pct": 15.1,
                    "tau_30pct": 12.0,
                },
            },
            "kp_rk_wald_f": 40.2,
            "cragg_donald_f": 46.9,
            "sanderson_windmeijer_f": None,
            "sanderson_windmeijer_reason": "with one endogenous regressor it equals the first-stage F",
            "stock_yogo": {
                "values": [
                    {
                        "estimator": "2sls",
                        "criterion": "relative_bias",
                        "level": 0.10,
                        "critical_value": None,
                        "reason": "needs at least 3 instruments",
                    },
                    {
                        "estimator": "2sls",
                        "criterion": "size",
                        "level": 0.10,
                        "critical_value": 19.93,
                        "reason": None,
                    },
                ]
            },
        },
        "weak_iv_robust": {
            "anderson_rubin": {
                "statistic": 6.8,
                "p_value": 0.0011,
                "confidence_set": ar if ar is not None else [[-0.35, -0.07]],
                "reason": None,
            },
            "tf": {
                "applicable": True,
                "reason": None,
                "critical_value": 2.03,
                "interval": [coef - 2.03 * se, coef + 2.03 * se],
            },
            "clr": {
                "applicable": False,
                "reason": "computed for the unadjusted covariance only",
                "confidence_set": None,
            },
        },
        "overid": {
            "test": "sargan",
            "statistic": None,
            "df": None,
            "p_value": None,
            "reason": "just identified",
        }
        if overid_p is None
        else {"test": "hansen_j", "statistic": 0.68, "df": 1, "p_value": overid_p, "reason": None},
        "endogeneity": {
            "test": "durbin_wu_hausman_control_function",
            "statistic": 5.9,
            "df": 1,
            "p_value": 0.015,
        },
        "spec": {"outcome": "ed_visits", "treatment": ["telehealth"], "instruments": ["fibre_wave"]},
        "conventions": {"small_sample": "applied"},
    }


def ols_results() -> dict[str, Any]:
    """An OLS result: diagnostics sections marked not applicable, as the estimation layer does."""
    na = {"status": "not applicable", "reason": "OLS uses no excluded instruments"}
    return {
        "first_stage": na,
        "strength": na,
        "weak_iv_robust": na,
        "overid": na,
        "method": "ols",
        "vcov": "clustered",
        "n": 48210,
        "coef": {"telehealth": -0.05, "const": 1.02},
        "se": {"telehealth": 0.01, "const": 0.03},
        "ci": {"telehealth": [-0.0696, -0.0304]},
    }


def make_run(
    i: int, *, method: str = "2sls", results: dict[str, Any] | None = None, plots: bool = True
) -> RunInfo:
    """A synthetic run number `i` (dates increase with i)."""
    day = 1 + i % 28
    month = 1 + (i // 28) % 12
    betas = tuple(-0.6 + 0.01 * k for k in range(71))
    stats = tuple(((b + 0.21) / 0.07) ** 2 for b in betas)
    return RunInfo(
        slug=f"run-{i:03d}",
        created_at=f"2026-{month:02d}-{day:02d}T10:{i % 60:02d}:00+00:00",
        method=method,
        vcov="cluster(district)",
        spec={
            "outcome": "ed_visits",
            "treatment": ["telehealth"],
            "instruments": ["fibre_wave"],
            "controls": ["age", "sex", "distance_to_ed"],
            "cluster": "district",
        },
        dataset_path="data/telehealth_panel.parquet",
        dataset_sha256=f"{i:02d}" + "ab3f" * 15 + "9c",
        results=results if results is not None else (ols_results() if method == "ols" else iv_results()),
        package_versions={"numpy": "2.1.3", "scipy": "1.14.1", "ivdossier": "0.1.0"},
        seconds=0.84 + i * 0.001,
        first_stage_bins=FirstStageBins(
            x_bins=tuple(float(k) for k in range(1, 9)),
            y_bins=(0.61, 0.55, 0.52, 0.44, 0.40, 0.31, 0.27, 0.21),
            x_label="fibre wave",
            y_label="share using telehealth",
        )
        if plots
        else None,
        ar_curve=ArCurve(betas=betas, stats=stats, critical_value=5.99) if plots else None,
    )


def make_link(i: int, condition: str | None = None, state: str | None = None) -> LinkInfo:
    """A synthetic threat link number `i`."""
    states = ("open", "rebutted", "mitigated", "accepted")
    return LinkInfo(
        threat_code=f"T-{i:03d}",
        title=f"Synthetic threat {i}",
        condition=condition or CONDITIONS[1 + i % 3],
        state=state or states[i % 4],
        argument=f"Argument number {i}: the pathway is implausible because the schedule was fixed in 2017.",
        evidence="Placebo regression on 2016 visits shows no association.",
        ratings=(
            Rating("Ana", 1 + i % 3, 1 + i % 3, "unlikely"),
            Rating("Ben", 2, 1 + (i + 1) % 3, ""),
        ),
        checks=(CheckInfo("placebo outcome", "no association (p = 0.62)"),),
    )


def sample_input(*, n_links: int = 4, n_runs: int = 2, graph_svg: str = "") -> DossierInput:
    """A complete dossier input; `graph_svg` lets a caller supply the diagram."""
    links = [
        LinkInfo(
            threat_code="TH-017",
            title="Broadband also brings online pharmacy",
            condition="exclusion",
            state="open",
            argument="Fibre may reduce emergency visits through online prescription refills, not telehealth.",
            evidence="Pharmacy delivery volumes rose after each wave (regional report, 2022).",
            ratings=(Rating("Ana", 4, 4, "plausible"), Rating("Ben", 3, 5, "large if true")),
            checks=(CheckInfo("placebo outcome", "not yet run"),),
        ),
        LinkInfo(
            threat_code="TH-004",
            title="Rollout favoured wealthier districts",
            condition="exogeneity",
            state="rebutted",
            argument="The schedule followed duct availability, documented in the utility's 2017 plan.",
            ratings=(Rating("Ana", 2, 3),),
        ),
    ]
    links += [make_link(i) for i in range(max(0, n_links - 2))]
    runs = [make_run(0, method="ols", plots=False)] + [make_run(i) for i in range(1, n_runs)]
    pharmacy = BypassPath(
        nodes=("fibre_wave", "online_pharmacy", "ed_visits"),
        arrows=("->", "->"),
        threats=(),
        team_edges=True,
        condition="exclusion",
        severity="broken",
        is_open=True,
        opened_by=(),
        blocked_by=(),
    )
    verdict = GraphVerdict(
        instrument="fibre_wave",
        treatment="telehealth",
        outcome="ed_visits",
        conditioning=(),
        selection=(),
        relevance_connected=True,
        criterion_holds=False,
        conditioning_issues=(),
        conditions=(
            ConditionVerdict("relevance", "holds", ("fibre_wave → telehealth edge present",), ()),
            ConditionVerdict("exclusion", "broken", ("a path avoids the treatment",), ()),
            ConditionVerdict(
                "exogeneity", "holds", ("no back-door path from the instrument to the outcome",), ()
            ),
            ConditionVerdict("monotonicity", "not-assessed", ("a graph cannot show defiers",), ()),
        ),
        open_paths=(pharmacy,),
        blocked_paths=(),
        threats=(),
        paths_truncated=False,
    )
    return DossierInput(
        program=PROGRAM,
        instrument=FIBRE,
        generated_at="2026-12-01T09:00:00+00:00",
        tool_version="0.1.0",
        links=tuple(links),
        runs=tuple(runs),
        graph=GraphInfo(verdict=verdict, svg=graph_svg or _DEMO_DIAGRAM),
        audit=(
            AuditEvent("2026-11-02T08:00:00+00:00", "ana", "create", "instrument fibre-wave", "registered"),
            AuditEvent("2026-11-03T09:30:00+00:00", "ben", "rate", "link TH-017", "likelihood 3, severity 5"),
            AuditEvent("2026-11-04T11:00:00+00:00", "ana", "run", "run-001", "2SLS with district clusters"),
        ),
    )


_DEMO_DIAGRAM = (
    '<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 420 150" width="420" height="150" role="img" '
    'aria-label="causal diagram">'
    '<rect x="10" y="60" width="90" height="30" rx="4" fill="none" stroke="#333"/>'
    '<text x="55" y="80" text-anchor="middle" font-size="12">fibre_wave</text>'
    '<rect x="165" y="60" width="90" height="30" rx="4" fill="none" stroke="#333"/>'
    '<text x="210" y="80" text-anchor="middle" font-size="12">telehealth</text>'
    '<rect x="320" y="60" width="90" height="30" rx="4" fill="none" stroke="#333"/>'
    '<text x="365" y="80" text-anchor="middle" font-size="12">ed_visits</text>'
    '<line x1="100" y1="75" x2="165" y2="75" stroke="#333"/><line x1="255" y1="75" x2="320" y2="75" stroke="#333"/>'
    '<path d="M55 60 Q210 0 365 60" fill="none" stroke="#a23b2a" stroke-dasharray="5 3"/>'
    '<text x="210" y="22" text-anchor="middle" font-size="11">online pharmacy (TH-017)</text>'
    "</svg>"
)
