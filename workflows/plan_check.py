"""Checking plans: verify a frozen plan (and exported copies) against its seal, and compare runs with a plan.

Verification names every field that changed since the plan was sealed; comparison lists each run's deviations from
the plan's closest specification and applies the plan's decision rules to the run's results.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from sqlmodel import Session

from ivdossier.errors import InvalidInputError
from ivdossier.registry import plans as store
from ivdossier.registry import records
from ivdossier.registry.models import Dataset, Plan, Run
from ivdossier.reports.inputs import Difference
from ivdossier.workflows.plan_rules import RuleOutcome, evaluate_rule

SPEC_FIELDS: tuple[str, ...] = (
    "outcome",
    "treatment",
    "instruments",
    "controls",
    "absorb",
    "cluster",
    "weights",
    "method",
    "vcov",
    "small_sample",
    "alpha",
)
SET_FIELDS = {"treatment", "instruments", "controls", "absorb", "cluster"}
DEVIATION_KIND = {
    "outcome": "spec",
    "treatment": "spec",
    "instruments": "instrument set",
    "controls": "controls",
    "absorb": "controls",
    "cluster": "vcov",
    "weights": "spec",
    "method": "spec",
    "vcov": "vcov",
    "small_sample": "vcov",
    "alpha": "spec",
}


# ---------------------------------------------------------------- verification


_MISSING = "<missing>"


def diff(frozen: Any, found: Any, path: str = "", *, where: str = "registry") -> list[Difference]:
    """Every leaf path where two JSON values differ (missing keys and list lengths included)."""
    if isinstance(frozen, dict) and isinstance(found, dict):
        out: list[Difference] = []
        for key in sorted(set(frozen) | set(found)):
            sub = f"{path}.{key}" if path else key
            out += (
                diff(frozen.get(key, _MISSING), found.get(key, _MISSING), sub, where=where)
                if (key in frozen and key in found)
                else [Difference(where, sub, frozen.get(key, _MISSING), found.get(key, _MISSING))]
            )
        return out
    if isinstance(frozen, list) and isinstance(found, list):
        out = []
        for i in range(max(len(frozen), len(found))):
            sub = f"{path}[{i}]"
            if i >= len(frozen) or i >= len(found):
                out.append(Difference(where, sub, frozen[i] if i < len(frozen) else _MISSING,
                                      found[i] if i < len(found) else _MISSING))  # fmt: skip
            else:
                out += diff(frozen[i], found[i], sub, where=where)
        return out
    if type(frozen) is not type(found) or frozen != found:
        return [Difference(where, path or "(whole document)", frozen, found)]
    return []


@dataclass(frozen=True)
class VerifyReport:
    """Outcome of verifying a frozen plan (and optionally an exported copy)."""

    plan: str
    sha256: str
    intact: bool
    differences: tuple[Difference, ...] = field(default=())
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        return {
            "plan": self.plan,
            "sha256": self.sha256,
            "intact": self.intact,
            "differences": [d.to_dict() for d in self.differences],
            "notes": list(self.notes),
        }


def verify_plan(session: Session, slug: str, *, exported: str | None = None) -> VerifyReport:
    """Check the plan row (and an exported JSON copy) against the seal; name every differing field."""
    plan = records.get(session, Plan, slug)
    if plan.state != "frozen":
        raise InvalidInputError(
            f"plan {slug!r} is a draft; only frozen plans can be verified. Freeze it first."
        )
    current = store.sealed_document(session, plan)
    reference = store.recorded_seal(session, plan)
    notes: list[str] = []
    diffs: list[Difference] = []
    if reference is None:
        notes.append("the sealed document is missing from the audit trail; only the hash can be compared")
    elif store.sha256_of(reference) != plan.sha256:
        diffs.append(Difference("registry", "sha256", store.sha256_of(reference), plan.sha256))
        notes.append("the stored hash does not match the sealed document in the audit trail")
    if store.sha256_of(current) != plan.sha256 or (reference is not None and reference != current):
        if reference is not None:
            diffs += diff(reference, current, where="registry")
        if not diffs:
            diffs.append(Difference("registry", "(hash)", plan.sha256, store.sha256_of(current)))
    if exported is not None:
        diffs += _verify_export(exported, reference or current, plan.sha256)
    return VerifyReport(plan.slug, plan.sha256, not diffs, tuple(diffs), tuple(notes))


def parse_export(text: str) -> dict[str, Any]:
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidInputError(
            f"the exported plan is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}); "
            "pass the file written by `ivdossier plan export`."
        ) from None
    if not isinstance(data, dict) or not isinstance(data.get("sealed"), dict):
        raise InvalidInputError(
            f"the file is not an exported frozen plan (format {store.EXPORT_FORMAT}); use `ivdossier plan export`."
        )
    return data


def _verify_export(text: str, reference: Mapping[str, Any], sha: str) -> list[Difference]:
    data = parse_export(text)
    out = diff(dict(reference), store.normalise(data["sealed"]), where="exported file")
    if data.get("format") != store.EXPORT_FORMAT:
        out.insert(0, Difference("exported file", "format", store.EXPORT_FORMAT, data.get("format")))
    if data.get("sha256") != sha:
        out.append(Difference("exported file", "sha256", sha, data.get("sha256")))
    elif store.sha256_of(data["sealed"]) != sha and not out:
        out.append(Difference("exported file", "(hash)", sha, store.sha256_of(data["sealed"])))
    return out


@dataclass(frozen=True)
class RunView:
    """What plan comparison needs from a run."""

    slug: str
    spec: Mapping[str, Any]
    results: Mapping[str, Any]
    dataset_sha256: str | None = None
    created_at: datetime | None = None


@dataclass(frozen=True)
class Deviation:
    """One way a run departs from the plan."""

    run: str
    kind: str
    field: str
    planned: Any
    actual: Any

    def to_dict(self) -> dict[str, Any]:
        return {
            "run": self.run,
            "kind": self.kind,
            "field": self.field,
            "planned": self.planned,
            "actual": self.actual,
        }


@dataclass(frozen=True)
class RunComparison:
    """A run against the plan: the spec it was matched with, deviations and evaluated decision rules."""

    run: str
    matched_spec: str | None
    deviations: tuple[Deviation, ...]
    rules: tuple[RuleOutcome, ...]
    notes: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "run": self.run,
            "matched_spec": self.matched_spec,
            "deviations": [d.to_dict() for d in self.deviations],
            "decision_rules": [r.to_dict() for r in self.rules],
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class PlanComparison:
    """All runs compared with one plan."""

    plan: str
    state: str
    sha256: str
    runs: tuple[RunComparison, ...]
    notes: tuple[str, ...] = ()

    @property
    def n_deviations(self) -> int:
        return sum(len(r.deviations) for r in self.runs)

    def to_dict(self) -> dict[str, Any]:
        return {
            "plan": self.plan,
            "state": self.state,
            "sha256": self.sha256,
            "n_deviations": self.n_deviations,
            "runs": [r.to_dict() for r in self.runs],
            "notes": list(self.notes),
        }


def _norm_field(name: str, value: Any) -> Any:
    if name in SET_FIELDS:
        if value is None:
            return []
        items = [value] if isinstance(value, str) else list(value)
        return sorted(str(v) for v in items if v not in ("", None))
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


def _match_spec(specs: Sequence[Mapping[str, Any]], run_spec: Mapping[str, Any]) -> Mapping[str, Any] | None:
    if not specs:
        return None
    insts = _norm_field("instruments", run_spec.get("instruments"))
    for spec in specs:
        if _norm_field("instruments", spec.get("instruments")) == insts:
            return spec
    for spec in specs:
        if spec.get("outcome") == run_spec.get("outcome"):
            return spec
    return specs[0]


def compare_runs(
    content: Mapping[str, Any], runs: Sequence[RunView], *, plan: str = "", frozen_at: datetime | None = None
) -> tuple[RunComparison, ...]:
    """Deviations of each run from the plan's closest spec and sample, and the plan's rules on its results."""
    specs = list(content.get("specs") or [])
    rules = list(content.get("decision_rules") or [])
    data = content.get("data") or {}
    out = []
    for run in runs:
        spec = _match_spec(specs, run.spec)
        devs: list[Deviation] = []
        notes: list[str] = []
        if spec is None:
            notes.append("the plan has no estimation spec to compare with")
        else:
            for name in SPEC_FIELDS:
                planned, actual = _norm_field(name, spec.get(name)), _norm_field(name, run.spec.get(name))
                if planned != actual:
                    devs.append(Deviation(run.slug, DEVIATION_KIND[name], name, planned, actual))
        expected_n = data.get("expected_n")
        found_n = run.results.get("n")
        if expected_n is not None and found_n is not None and int(found_n) != int(expected_n):
            devs.append(Deviation(run.slug, "sample", "n", expected_n, found_n))
        planned_data = data.get("dataset_sha256")
        if planned_data and run.dataset_sha256 and planned_data != run.dataset_sha256:
            devs.append(Deviation(run.slug, "sample", "dataset_sha256", planned_data, run.dataset_sha256))
        if frozen_at is not None and run.created_at is not None and _utc(run.created_at) < _utc(frozen_at):
            notes.append(f"run {run.slug} was made before the plan was frozen ({store.iso(frozen_at)})")
        outcomes = tuple(evaluate_rule(r, run.results) for r in rules)
        out.append(
            RunComparison(
                run.slug,
                None if spec is None else str(spec.get("id", "")),
                tuple(devs),
                outcomes,
                tuple(notes),
            )
        )
    return tuple(out)


def _utc(moment: datetime) -> datetime:
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def compare_plan(session: Session, slug: str, run_slugs: Sequence[str]) -> PlanComparison:
    """Compare runs (by slug) with a plan; a draft plan is compared too, with a note that it is not sealed."""
    plan = records.get(session, Plan, slug)
    if not run_slugs:
        raise InvalidInputError("name at least one run to compare; see `ivdossier run list`.")
    views = []
    for rs in run_slugs:
        run = records.get(session, Run, rs)
        dataset = session.get(Dataset, run.dataset_id) if run.dataset_id else None
        views.append(
            RunView(
                run.slug,
                dict(run.spec or {}),
                dict(run.results or {}),
                dataset.sha256 if dataset else None,
                run.created_at,
            )
        )
    notes = (
        []
        if plan.state == "frozen"
        else [f"plan {slug!r} is a draft: deviations are measured against an unsealed plan"]
    )
    runs = compare_runs(plan.content or {}, views, plan=slug, frozen_at=plan.frozen_at)
    return PlanComparison(plan.slug, plan.state, plan.sha256, runs, tuple(notes))
