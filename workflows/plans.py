"""Drafting a pre-analysis plan from the registry, and the edit and freeze steps that validate decision rules.

The plan row is stored by ``ivdossier.registry.plans``; this module assembles its content (question, instruments
and claims, graph, linked threats with their planned checks, specs, diagnostics, default decision rules) and checks
decision rules before they are stored or sealed.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.registry import plans as store
from ivdossier.registry import records
from ivdossier.registry.models import Covariate, GraphEdge, Instrument, Plan, Program
from ivdossier.registry.threats import links_of
from ivdossier.threats_catalog.checks import get_check
from ivdossier.vocabulary import INACTIVE_STATES
from ivdossier.workflows.dossiers import instrument_check
from ivdossier.workflows.plan_quantities import check_rule_paths
from ivdossier.workflows.plan_rules import check_rules, default_rules

PLAN_SCHEMA = store.PLAN_SCHEMA
DEFAULT_DIAGNOSTICS: tuple[str, ...] = (
    "first-stage coefficients, partial R-squared and first-stage F for each instrument",
    "effective F (Montiel Olea and Pflueger 2013) with its tau = 5, 10, 20 and 30 % critical values",
    "Anderson–Rubin test and confidence set (valid however weak the instruments)",
    "tF interval (Lee, McCrary, Moreira and Porter 2022) when there is one instrument",
    "Hansen J / Sargan over-identification test when there are more instruments than treatments",
    "Durbin–Wu–Hausman endogeneity test",
)
DEVIATIONS_TEXT = (
    "Every estimation run is compared with this frozen plan by the plan comparison command, which lists each "
    "difference in specification, sample, controls, covariance and instrument set. The report will show "
    "results under the planned specification first; any other specification will be labelled as a deviation, "
    "with the reason and the date it was decided. The decision rules are applied exactly as written in this plan."
)


def _threat_rows(session: Session, inst: Instrument) -> list[dict[str, Any]]:
    rows = []
    for link, threat in links_of(session, inst):
        checks = []
        for name in threat.checks or []:
            try:
                chk = get_check(name)
                checks.append({"name": name, "description": chk.description, "command": chk.how_to_run})
            except NotFoundError:
                checks.append({"name": name, "description": "", "command": ""})
        rows.append(
            {
                "instrument": inst.slug,
                "code": threat.code,
                "title": threat.title,
                "condition": threat.condition
                if threat.threat_kind != "reading"
                else f"reading: {threat.condition}",
                "state": link.state,
                "testability": threat.testability,
                "checks": checks,
            }
        )
    return rows


def _names(values: Sequence[str] | None) -> list[str]:
    return [v for v in (values or []) if v]


def draft_content(
    session: Session,
    program: Program,
    instruments: Sequence[Instrument],
    *,
    controls: Sequence[str] = (),
    absorb: Sequence[str] = (),
    cluster: Sequence[str] = (),
    method: str = "2sls",
    vcov: str | None = None,
    alpha: float = 0.05,
    data_description: str = "",
    sample: str = "",
    expected_n: int | None = None,
    power: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The content of a new plan, assembled from the registry and the given specification options.

    Each instrument carries its verdicts as the verdict engine derives them at drafting time, so the sealed plan
    records how the argument stood when the plan was written."""
    from ivdossier.estimation.covariance import cov_name

    cov = cov_name(vcov) if vcov else ("clustered" if cluster else "heteroskedastic")
    if cov == "clustered" and not cluster:
        raise InvalidInputError("vcov 'clustered' needs --cluster COLUMN; name the clustering column.")
    specs = []
    for inst in instruments:
        cols = _names(inst.columns)
        if not cols:
            raise InvalidInputError(
                f"instrument {inst.slug!r} has no data column; add one with `ivdossier instrument edit` first."
            )
        specs.append(
            {
                "id": inst.slug,
                "outcome": program.outcome,
                "treatment": [program.treatment] if program.treatment else [],
                "instruments": cols,
                "controls": list(controls),
                "absorb": list(absorb),
                "cluster": list(cluster),
                "weights": None,
                "method": method,
                "vcov": cov,
                "small_sample": True,
                "alpha": alpha,
            }
        )
    covs = session.scalars(
        select(Covariate).where(Covariate.program_id == program.id).order_by(Covariate.name)
    )
    edges = session.scalars(
        select(GraphEdge).where(GraphEdge.program_id == program.id).order_by(GraphEdge.slug)
    )
    n_cols = max((len(_names(i.columns)) for i in instruments), default=1)
    return {
        "schema": PLAN_SCHEMA,
        "question": {
            "program": program.slug,
            "title": program.title,
            "question": program.question,
            "treatment": program.treatment,
            "outcome": program.outcome,
            "unit": program.unit,
            "population": program.population,
        },
        "data": {"description": data_description, "sample": sample, "expected_n": expected_n},
        "instruments": [
            {
                "slug": i.slug,
                "name": i.name,
                "family": i.family,
                "columns": _names(i.columns),
                "state": i.state,
                "claims": {
                    "relevance": i.claim_relevance,
                    "exclusion": i.claim_exclusion,
                    "exogeneity": i.claim_exogeneity,
                    "monotonicity": i.claim_monotonicity,
                },
                "verdicts": [v.to_dict() for v in instrument_check(session, i).verdicts],
            }
            for i in instruments
        ],
        "graph": {
            "roles": {"instrument": "Z", "treatment": program.treatment, "outcome": program.outcome},
            "covariates": [{"name": c.name, "measured": c.measured} for c in covs],
            "edges": _edge_rows(edges, instruments),
        },
        "threats": [row for inst in instruments for row in _threat_rows(session, inst)],
        "specs": specs,
        "diagnostics": list(DEFAULT_DIAGNOSTICS),
        "decision_rules": default_rules(n_cols),
        "power": None if power is None else dict(power),
        "deviations": DEVIATIONS_TEXT,
    }


def _edge_rows(edges: Any, instruments: Sequence[Instrument]) -> list[dict[str, Any]]:
    """The team's edges with their scope: "program" (every instrument's graph) or the one instrument they belong to.

    Edges scoped to an instrument the plan does not cover are left out: they are in no graph the plan describes.
    """
    slugs = {i.id: i.slug for i in instruments}
    rows = []
    for e in edges:
        if e.instrument_id is not None and e.instrument_id not in slugs:
            continue
        scope = "program" if e.instrument_id is None else slugs[e.instrument_id]
        rows.append({"from": e.source, "to": e.target, "scope": scope, "note": e.note})
    return rows


def draft_plan(
    session: Session,
    *,
    actor: str,
    target: str,
    slug: str | None = None,
    title: str | None = None,
    **options: Any,
) -> Plan:
    """Draft a plan for a program (all its active candidates) or for one instrument."""
    inst = records.find(session, Instrument, target)
    if inst is not None:
        program = records.get_by_id(session, Program, inst.program_id)
        chosen = [inst]
    else:
        found = records.find(session, Program, target)
        if found is None:
            raise NotFoundError(
                f"no program or instrument named {target!r}; see `ivdossier program list` and `ivdossier instrument list`."
            )
        program = found
        chosen = list(
            session.scalars(
                select(Instrument)
                .where(Instrument.program_id == program.id, Instrument.state.not_in(INACTIVE_STATES))  # type: ignore[attr-defined]
                .order_by(Instrument.slug)
            )
        )
        if not chosen:
            raise InvalidInputError(f"program {target!r} has no active candidate instrument; add one first.")
    content = draft_content(session, program, chosen, **options)
    return store.create_plan(
        session,
        actor=actor,
        program=program,
        instrument=inst,
        content=content,
        slug=slug,
        title=title,
        default_slug=f"{target}-plan",
    )


def edit_plan(
    session: Session,
    *,
    actor: str,
    slug: str,
    title: str | None = None,
    sections: Mapping[str, Any] | None = None,
    expected_version: int | None = None,
) -> Plan:
    """Replace whole sections of a draft plan's content, validating decision rules (their form, and that each
    quantity they name is one a run reports); frozen plans refuse."""
    store.refuse_if_frozen(records.get(session, Plan, slug))
    checked = dict(sections or {})
    store.check_sections(checked)
    if "decision_rules" in checked:
        checked["decision_rules"] = check_rules(checked["decision_rules"])
        check_rule_paths(checked["decision_rules"])
    return store.edit_plan(
        session, actor=actor, slug=slug, title=title, sections=checked, expected_version=expected_version
    )


def freeze_plan(session: Session, *, actor: str, slug: str, at: datetime | None = None) -> Plan:
    """Validate the draft's decision rules (form, quantities, and the column names against its specs), then seal it
    (see ``ivdossier.registry.plans.freeze_plan``)."""
    plan = records.get(session, Plan, slug)
    store.refuse_if_frozen(plan)
    content = plan.content or {}
    check_rule_paths(check_rules(content.get("decision_rules", [])), list(content.get("specs") or []))
    return store.freeze_plan(session, actor=actor, slug=slug, at=at)
