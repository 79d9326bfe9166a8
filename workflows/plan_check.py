"""Checking plans: verify a frozen plan (and exported copies) against its seal, and compare runs with a plan.

Verification names every field that changed since the plan was sealed; comparison lists each run's deviations from
the plan's closest specification and applies the plan's decision rules to the run's results.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from sqlalchemy.orm import Session

from ivdossier.errors import InvalidInputError
from ivdossier.registry import plans as store
from ivdossier.registry import records
from ivdossier.registry.models import Dataset, Instrument, Plan, Run
from ivdossier.reports.inputs import Difference
from ivdossier.vocabulary import SPEC_KEYS
from ivdossier.workflows.plan_quantities import ESTIMATE, rule_kind
from ivdossier.workflows.plan_rules import RuleOutcome, evaluate_rule

SPEC_FIELDS: tuple[str, ...] = tuple(k for k in SPEC_KEYS if k != "fuller_alpha")
"""The spec fields a plan records and a run is compared on (a plan records no Fuller constant)."""
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


RECEIPT_STATES = {
    "agree": "the registry and the receipt agree",
    "registry changed": "the registry has changed since the receipt was written",
    "receipt changed": "the receipt does not match its own hash: the receipt file was changed "
    "(the registry agrees with the hash it records)",
    "both changed": "the receipt does not match its own hash and the registry differs from it",
}


@dataclass(frozen=True)
class VerifyReport:
    """Outcome of verifying a frozen plan: its seal event, its row, and optionally an exported copy or a receipt.

    ``problems`` are failures that are not a single field (a missing, repeated or imported seal event);
    ``receipt`` is one of ``RECEIPT_STATES`` when a receipt was checked."""

    plan: str
    sha256: str
    intact: bool
    differences: tuple[Difference, ...] = field(default=())
    notes: tuple[str, ...] = field(default=())
    problems: tuple[str, ...] = field(default=())
    receipt: str | None = None

    @property
    def headline(self) -> str:
        """One line: why verification failed, or that it passed."""
        if self.intact:
            return "intact" + (f"; {RECEIPT_STATES['agree']}" if self.receipt == "agree" else "")
        if self.problems:
            return self.problems[0]
        if self.receipt is not None and self.receipt != "agree":
            return RECEIPT_STATES[self.receipt]
        places = sorted({d.where for d in self.differences})
        return f"{len(self.differences)} difference(s) from the seal ({', '.join(places)})"

    def to_dict(self) -> dict[str, Any]:
        return {
            "plan": self.plan,
            "sha256": self.sha256,
            "intact": self.intact,
            "headline": self.headline,
            "problems": list(self.problems),
            "receipt": self.receipt,
            "differences": [d.to_dict() for d in self.differences],
            "notes": list(self.notes),
        }


def _seal_event_checks(session: Session, plan: Plan) -> tuple[list[str], list[Difference], list[str]]:
    """Problems, differences and notes about the plan's seal event: exactly one, recorded here, agreeing with the row."""
    events = store.seal_events(session, plan)
    own = [e for e in events if store.is_own_seal(e)]
    imported = [e for e in events if not store.is_own_seal(e)]
    notes = [
        f"a seal event imported from another registry ({e.actor}, {store.iso(e.at)}) is kept as that registry's "
        "history; it is not this registry's seal"
        for e in imported
    ]
    if not own:
        problem = (
            "this registry holds no seal event of its own for the plan (the only one came from an import)"
            if imported
            else "the seal event is missing from the audit trail"
        )
        return [problem + "; a plan frozen here always has one"], [], notes
    if len(own) > 1:
        when = ", ".join(f"{e.actor} at {store.iso(e.at)}" for e in own)
        return (
            [f"the audit trail holds {len(own)} seal events for the plan ({when}); a plan is sealed once"],
            [],
            notes,
        )
    event_row = own[0]
    after = event_row.after if isinstance(event_row.after, dict) else {}
    diffs = []
    if event_row.actor != plan.frozen_by:
        diffs.append(Difference("seal event", "actor", event_row.actor, plan.frozen_by))
    if not store.seal_time_agrees(event_row, plan):
        frozen_at = store.iso(plan.frozen_at) if plan.frozen_at else None
        diffs.append(Difference("seal event", "time", store.iso(event_row.at), frozen_at))
    if after.get("sha256") != plan.sha256:
        diffs.append(Difference("seal event", "sha256", after.get("sha256"), plan.sha256))
    problems = []
    if diffs:
        fields = ", ".join(d.path for d in diffs)
        problems.append(f"the seal event disagrees with the plan row ({fields})")
    return problems, diffs, notes


def verify_plan(
    session: Session, slug: str, *, exported: str | None = None, receipt: str | None = None
) -> VerifyReport:
    """Check the plan row against its seal event (and an exported JSON copy or a receipt); name every difference.

    Fails when the seal event is missing, repeated, imported from another registry or disagrees with the row, and
    when any sealed field changed."""
    plan = records.get(session, Plan, slug)
    if plan.state != "frozen":
        raise InvalidInputError(
            f"plan {slug!r} is a draft; only frozen plans can be verified. Freeze it first."
        )
    current = store.sealed_document(session, plan)
    problems, diffs, notes = _seal_event_checks(session, plan)
    reference = store.recorded_seal(session, plan)
    if reference is not None and store.sha256_of(reference) != plan.sha256:
        diffs.append(Difference("registry", "sha256", store.sha256_of(reference), plan.sha256))
        notes.append("the stored hash does not match the sealed document in the audit trail")
    if store.sha256_of(current) != plan.sha256 or (reference is not None and reference != current):
        found = diff(reference, current, where="registry") if reference is not None else []
        diffs += found or [Difference("registry", "(hash)", plan.sha256, store.sha256_of(current))]
    if exported is not None:
        diffs += _verify_export(exported, reference or current, plan.sha256)
    receipt_state = None
    if receipt is not None:
        receipt_state, receipt_diffs = check_receipt(receipt, plan, current)
        diffs += receipt_diffs
    intact = not problems and not diffs
    return VerifyReport(
        plan.slug, plan.sha256, intact, tuple(diffs), tuple(notes), tuple(problems), receipt_state
    )


def parse_receipt(text: str) -> dict[str, Any]:
    """A seal receipt file's fields, or one clear error when the text is not a receipt."""
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidInputError(
            f"the receipt is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg}); pass the file "
            "written by `ivdossier plan freeze`."
        ) from None
    if not isinstance(data, dict) or data.get("format") != store.RECEIPT_FORMAT:
        raise InvalidInputError(
            f"the file is not a seal receipt (format {store.RECEIPT_FORMAT}); pass the file written by "
            "`ivdossier plan freeze`."
        )
    missing = [k for k in ("plan", "plan_uuid", "sha256", "canonical") if not isinstance(data.get(k), str)]
    if missing:
        raise InvalidInputError(f"the seal receipt lacks {', '.join(missing)}; it cannot be checked.")
    return data


def _receipt_document(data: Mapping[str, Any]) -> tuple[dict[str, Any] | None, list[Difference]]:
    """The sealed document inside a receipt and every way the receipt disagrees with itself."""
    canonical = str(data["canonical"])
    out = []
    own_hash = hashlib.sha256(canonical.encode("utf-8")).hexdigest()
    if own_hash != data["sha256"]:
        out.append(Difference("receipt", "sha256", data["sha256"], own_hash))
    try:
        doc = json.loads(canonical)
    except json.JSONDecodeError:
        return None, out or [Difference("receipt", "canonical", "canonical JSON", "unreadable text")]
    if not isinstance(doc, dict):
        return None, out or [Difference("receipt", "canonical", "a JSON object", type(doc).__name__)]
    summary = {"plan": "plan", "sealed_at": "frozen_at", "sealed_by": "frozen_by", "program": "program",
               "instrument": "instrument"}  # fmt: skip
    for outside, inside in summary.items():
        if outside in data and data[outside] != doc.get(inside):
            out.append(Difference("receipt", outside, doc.get(inside), data[outside]))
    return doc, out


def check_receipt(text: str, plan: Plan, current: Mapping[str, Any]) -> tuple[str, list[Difference]]:
    """Compare a seal receipt with the registry: which side changed ('agree', 'registry changed', 'receipt
    changed' or 'both changed') and the differing fields, labelled by the side that holds the change."""
    data = parse_receipt(text)
    if data["plan"] != plan.slug and data["plan_uuid"] != plan.uuid:
        raise InvalidInputError(
            f"the receipt is for plan {data['plan']!r}, not {plan.slug!r}; pass the receipt written when "
            f"{plan.slug!r} was frozen."
        )
    doc, self_diffs = _receipt_document(data)
    registry_whole = store.sha256_of(current) == plan.sha256 and plan.uuid == data["plan_uuid"]
    if not self_diffs:
        if registry_whole and plan.sha256 == data["sha256"]:
            return "agree", []
        out = diff(doc, dict(current), where="registry") if doc is not None else []
        if plan.uuid != data["plan_uuid"]:
            out.append(Difference("registry", "plan_uuid", data["plan_uuid"], plan.uuid))
        if plan.sha256 != data["sha256"]:
            out.append(Difference("registry", "sha256", data["sha256"], plan.sha256))
        return "registry changed", out
    canonical_hash = hashlib.sha256(str(data["canonical"]).encode("utf-8")).hexdigest()
    if registry_whole and plan.sha256 in (data["sha256"], canonical_hash):
        changed = diff(dict(current), doc, where="receipt") if doc is not None else []
        return "receipt changed", self_diffs + changed
    return "both changed", self_diffs + (
        diff(doc, dict(current), where="registry") if doc is not None else []
    )


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
    run_kind: str = ESTIMATE


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
    if name == "vcov" and value in OLD_COV_WORDS:  # plans and runs stored with the old words compare equal
        return OLD_COV_WORDS[value]
    if isinstance(value, float) and value.is_integer():
        return int(value)
    return value


OLD_COV_WORDS = {"unadjusted": "homoskedastic", "robust": "heteroskedastic", "cluster": "clustered"}
"""The covariance words before they were renamed (kept here so comparing plans loads no numerics; a test keeps
it equal to ``estimation.covariance.OLD_COV_NAMES``)."""


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
    """Deviations of each run from the plan's closest spec and sample, and the plan's rules of the run's kind on
    its results.

    A run of another kind than an estimate is compared on the spec fields it stores (a fragility or
    confounder-strength run stores the model's roles and adjustment; a design or summary-data run none)."""
    specs = list(content.get("specs") or [])
    rules = list(content.get("decision_rules") or [])
    data = content.get("data") or {}
    out = []
    for run in runs:
        spec = _match_spec(specs, run.spec)
        devs: list[Deviation] = []
        notes: list[str] = []
        fields = [f for f in SPEC_FIELDS if run.run_kind == ESTIMATE or f in run.spec]
        if spec is None:
            notes.append("the plan has no estimation spec to compare with")
        elif not fields:
            spec = None
            notes.append(f"a {run.run_kind} run stores no model spec, so only the decision rules apply to it")
        else:
            for name in fields:
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
        outcomes = tuple(evaluate_rule(r, run.results) for r in rules if rule_kind(r) == run.run_kind)
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


def covered_instruments(session: Session, plan: Plan) -> list[str]:
    """Slugs of the instruments a plan covers: its own instrument, or the instruments a program plan lists."""
    if plan.instrument_id is not None:
        inst = session.get(Instrument, plan.instrument_id)
        return [inst.slug] if inst is not None else []
    listed = (plan.content or {}).get("instruments") or []
    return [str(i.get("slug")) for i in listed if isinstance(i, Mapping) and i.get("slug")]


def _check_run_instruments(session: Session, plan: Plan, runs: Sequence[Run]) -> list[str]:
    """Refuse runs of an instrument the plan does not cover; notes for runs attached to no instrument."""
    covered = covered_instruments(session, plan)
    foreign, notes = [], []
    for run in runs:
        if run.instrument_id is None:
            notes.append(
                f"run {run.slug} is attached to no instrument, so it cannot be confirmed to belong to this plan "
                f"(which covers {', '.join(covered) or 'no instrument'})"
            )
            continue
        inst = session.get(Instrument, run.instrument_id)
        slug = inst.slug if inst is not None else f"#{run.instrument_id}"
        if slug not in covered:
            foreign.append(f"{run.slug} (instrument {slug})")
    if foreign:
        raise InvalidInputError(
            f"plan {plan.slug!r} covers {', '.join(covered) or 'no instrument'}; these runs are of another "
            f"instrument: {'; '.join(foreign)}. Compare them with that instrument's plan, or leave them out."
        )
    return notes


def compare_plan(session: Session, slug: str, run_slugs: Sequence[str]) -> PlanComparison:
    """Compare runs (by slug) with a plan; a draft plan is compared too, with a note that it is not sealed.

    Runs of an instrument the plan does not cover are refused (a program plan covers the instruments it lists)."""
    plan = records.get(session, Plan, slug)
    if not run_slugs:
        raise InvalidInputError("name at least one run to compare; see `ivdossier run list`.")
    rows = [records.get(session, Run, rs) for rs in run_slugs]
    notes = (
        []
        if plan.state == "frozen"
        else [f"plan {slug!r} is a draft: deviations are measured against an unsealed plan"]
    )
    notes += _check_run_instruments(session, plan, rows)
    views = []
    for run in rows:
        dataset = session.get(Dataset, run.dataset_id) if run.dataset_id else None
        views.append(
            RunView(
                run.slug,
                dict(run.spec or {}),
                dict(run.results or {}),
                dataset.sha256 if dataset else None,
                run.created_at,
                run.run_kind or ESTIMATE,
            )
        )
    runs = compare_runs(plan.content or {}, views, plan=slug, frozen_at=plan.frozen_at)
    notes += unapplied_rules(plan.content or {}, [v.run_kind for v in views])
    return PlanComparison(plan.slug, plan.state, plan.sha256, runs, tuple(notes))


def unapplied_rules(content: Mapping[str, Any], run_kinds: Sequence[str]) -> list[str]:
    """A note for each decision rule that reads a kind of run none of the compared runs is."""
    out = []
    for rule in content.get("decision_rules") or []:
        kind = rule_kind(rule)
        if kind not in run_kinds:
            out.append(
                f"decision rule {rule.get('id')!r} reads {kind} runs and none was compared; add one to apply it"
            )
    return out
