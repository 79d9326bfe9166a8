"""Plain, frozen input records for the reports layer; the integrator maps registry rows into these.

Nothing here reads a database or a clock: every timestamp and version is passed in, so the same inputs always
produce the same document.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from functools import cached_property
from typing import TYPE_CHECKING, Any

from ivdossier.errors import InvalidInputError
from ivdossier.jsonsafe import RECORD_KEY, load_record
from ivdossier.vocabulary import CONDITIONS, LINK_STATES, READING_ASPECTS, Verdict

if TYPE_CHECKING:
    from ivdossier.estimation.result import EstimationResult
    from ivdossier.threats_catalog.graph import GraphVerdict


def _check_condition(value: str, where: str) -> None:
    if value not in CONDITIONS + READING_ASPECTS:
        allowed = ", ".join(CONDITIONS + READING_ASPECTS)
        raise InvalidInputError(f"{where} has condition {value!r}; use one of {allowed}.")


def _as_tuple(value: Sequence[Any] | None) -> tuple[Any, ...]:
    return tuple(value) if value is not None else ()


@dataclass(frozen=True)
class ProgramInfo:
    """A research question: treatment, outcome, unit and population."""

    slug: str
    title: str
    question: str = ""
    treatment: str = ""
    outcome: str = ""
    unit: str = ""
    population: str = ""


@dataclass(frozen=True)
class InstrumentInfo:
    """A candidate instrument with its data columns, lifecycle state and the team's claims per condition."""

    slug: str
    name: str
    family: str = ""
    columns: tuple[str, ...] = ()
    state: str = ""
    claims: Mapping[str, str] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "columns", _as_tuple(self.columns))
        for condition in self.claims:
            _check_condition(condition, f"claim of instrument {self.slug!r}")


@dataclass(frozen=True)
class Rating:
    """One reviewer's judgement of a linked threat: likelihood and severity on a 1-5 scale."""

    reviewer: str
    likelihood: int
    severity: int
    comment: str = ""

    def __post_init__(self) -> None:
        for name in ("likelihood", "severity"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 5:
                raise InvalidInputError(
                    f"rating by {self.reviewer!r} has {name}={value!r}; give a whole number from 1 to 5."
                )


@dataclass(frozen=True)
class CheckInfo:
    """A check that speaks to a threat (a test, a placebo, a balance table) and what it found."""

    name: str
    finding: str = ""


@dataclass(frozen=True)
class LinkInfo:
    """A catalogue threat attached to this instrument, with its state, the team's argument and evidence."""

    threat_code: str
    title: str
    condition: str
    state: str
    argument: str = ""
    evidence: str = ""
    ratings: tuple[Rating, ...] = ()
    checks: tuple[CheckInfo, ...] = ()

    def __post_init__(self) -> None:
        _check_condition(self.condition, f"threat link {self.threat_code!r}")
        if self.state not in LINK_STATES:
            raise InvalidInputError(
                f"threat link {self.threat_code!r} has state {self.state!r}; use one of {', '.join(LINK_STATES)}."
            )
        ratings = tuple(r if isinstance(r, Rating) else Rating(*r) for r in _as_tuple(self.ratings))
        checks = tuple(c if isinstance(c, CheckInfo) else CheckInfo(*c) for c in _as_tuple(self.checks))
        object.__setattr__(self, "ratings", ratings)
        object.__setattr__(self, "checks", checks)

    @property
    def mean_severity(self) -> float | None:
        """Team mean of the rated severity, or None when nobody has rated the link."""
        if not self.ratings:
            return None
        return sum(r.severity for r in self.ratings) / len(self.ratings)

    @property
    def mean_likelihood(self) -> float | None:
        """Team mean of the rated likelihood, or None when nobody has rated the link."""
        if not self.ratings:
            return None
        return sum(r.likelihood for r in self.ratings) / len(self.ratings)


@dataclass(frozen=True)
class FirstStageBins:
    """Binned means of the first stage (instrument on x, treatment on y) after partialling out controls."""

    x_bins: tuple[float, ...]
    y_bins: tuple[float, ...]
    x_label: str = "instrument"
    y_label: str = "treatment"

    def __post_init__(self) -> None:
        xs = tuple(float(v) for v in self.x_bins)
        ys = tuple(float(v) for v in self.y_bins)
        if len(xs) != len(ys) or len(xs) < 2:
            raise InvalidInputError(
                f"first-stage bins need equally long x_bins and y_bins with at least 2 points; "
                f"got {len(xs)} and {len(ys)}."
            )
        if not all(math.isfinite(v) for v in xs + ys):
            raise InvalidInputError("first-stage bins contain a non-finite value; drop or fix that bin.")
        object.__setattr__(self, "x_bins", xs)
        object.__setattr__(self, "y_bins", ys)


@dataclass(frozen=True)
class ArCurve:
    """Anderson-Rubin statistic evaluated over a grid of hypothesised effects, with its critical value."""

    betas: tuple[float, ...]
    stats: tuple[float, ...]
    critical_value: float

    def __post_init__(self) -> None:
        betas = tuple(float(v) for v in self.betas)
        stats = tuple(float(v) for v in self.stats)
        if len(betas) != len(stats) or len(betas) < 2:
            raise InvalidInputError(
                f"the AR curve needs equally long betas and stats with at least 2 points; "
                f"got {len(betas)} and {len(stats)}."
            )
        if not math.isfinite(float(self.critical_value)):
            raise InvalidInputError("the AR curve's critical_value must be a finite number.")
        object.__setattr__(self, "betas", betas)
        object.__setattr__(self, "stats", stats)
        object.__setattr__(self, "critical_value", float(self.critical_value))


@dataclass(frozen=True)
class RunInfo:
    """One estimation run: exact spec, data fingerprint, the stored results (the typed result is ``result``),
    versions, timing."""

    slug: str
    created_at: datetime | str
    method: str
    vcov: str = ""
    spec: Mapping[str, Any] = field(default_factory=dict)
    dataset_path: str = ""
    dataset_sha256: str = ""
    results: Mapping[str, Any] = field(default_factory=dict)
    package_versions: Mapping[str, str] = field(default_factory=dict)
    seconds: float | None = None
    first_stage_bins: FirstStageBins | None = None
    ar_curve: ArCurve | None = None
    kind: str = "estimate"
    # Marked by the team as the run the headline and the relevance verdict rest on.
    primary: bool = False
    # Plain-text warnings about the run's inference (few clusters, few degrees of freedom).
    warnings: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "warnings", _as_tuple(self.warnings))

    @cached_property
    def result(self) -> EstimationResult | None:
        """The typed estimation result stored with the run (None for runs stored before typed records)."""
        from ivdossier.estimation.result import (
            EstimationResult,  # the numerics load only when a result is read
        )

        record = self.results.get(RECORD_KEY) if isinstance(self.results, Mapping) else None
        if not isinstance(record, Mapping):
            return None
        value = load_record(record)
        return value if isinstance(value, EstimationResult) else None

    @property
    def created_text(self) -> str:
        """The creation time as ISO text (seconds precision, as given)."""
        return _time_text(self.created_at)


def _time_text(value: datetime | str) -> str:
    return value.isoformat(timespec="seconds") if isinstance(value, datetime) else str(value)


@dataclass(frozen=True)
class SensitivityInfo:
    """A stored sensitivity run for the exclusion restriction: the interval when the instrument may have a direct
    effect on the outcome. ``method`` is "union" (range of direct effects), "local-to-zero" (a prior on it) or
    "breakdown" (the smallest direct effect at which the interval reaches ``target``). ``svg`` is the plot of the
    interval against the assumed direct effect, when the run has one."""

    slug: str
    created_at: datetime | str
    method: str
    treatment: str = ""
    instruments: tuple[str, ...] = ()
    alpha: float = 0.05
    estimate: float | None = None
    ci: tuple[float, float] | None = None
    lower: float | None = None
    upper: float | None = None
    direct_effect_min: tuple[float, ...] = ()
    direct_effect_max: tuple[float, ...] = ()
    prior_mean: tuple[float, ...] = ()
    prior_sd: tuple[float, ...] = ()
    target: float | None = None
    breakdown: float | None = None
    breakdown_direct_effect: tuple[float, ...] = ()
    breakdown_share_of_reduced_form: float | None = None
    covered_without_direct_effect: bool | None = None
    svg: str = ""
    note: str = ""  # e.g. a run stored before typed records, shown without its numbers

    def __post_init__(self) -> None:
        if self.method not in ("union", "local-to-zero", "breakdown"):
            raise InvalidInputError(
                f"sensitivity run {self.slug!r} has method {self.method!r}; use union, local-to-zero or breakdown."
            )
        for name in (
            "instruments",
            "direct_effect_min",
            "direct_effect_max",
            "prior_mean",
            "prior_sd",
            "breakdown_direct_effect",
        ):
            object.__setattr__(self, name, _as_tuple(getattr(self, name)))

    @property
    def created_text(self) -> str:
        return _time_text(self.created_at)


@dataclass(frozen=True)
class FalsificationRow:
    """One regression coefficient of a falsification check: what was regressed, on which instrument, where."""

    target: str
    instrument: str
    estimate: float | None
    se: float | None
    p_value: float | None
    n: int | None = None


@dataclass(frozen=True)
class FalsificationInfo:
    """A stored falsification run (balance, placebo outcome, zero first stage, per instrument, first-stage signs)
    as a table of coefficients, with one line on its joint test or what it assumes."""

    slug: str
    created_at: datetime | str
    check: str
    rows: tuple[FalsificationRow, ...] = ()
    summary: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "rows", _as_tuple(self.rows))

    @property
    def created_text(self) -> str:
        return _time_text(self.created_at)


@dataclass(frozen=True)
class ComplierShare:
    """One compliance type's share of the population with its standard error and interval."""

    group: str
    estimate: float
    se: float | None = None
    ci: tuple[float, float] | None = None


@dataclass(frozen=True)
class ComplierProfileRow:
    """Mean of one covariate in the whole sample and among compliers, always-takers and never-takers."""

    covariate: str
    overall: float | None
    complier: float | None
    complier_se: float | None = None
    always_taker: float | None = None
    never_taker: float | None = None


@dataclass(frozen=True)
class CompliersInfo:
    """A stored compliers run: the shares of each compliance type and, when asked, the complier profile."""

    slug: str
    created_at: datetime | str
    treatment: str = ""
    instrument: str = ""
    shares: tuple[ComplierShare, ...] = ()
    profile: tuple[ComplierProfileRow, ...] = ()
    alpha: float = 0.05
    se_method: str = ""
    note: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "shares", _as_tuple(self.shares))
        object.__setattr__(self, "profile", _as_tuple(self.profile))

    @property
    def created_text(self) -> str:
        return _time_text(self.created_at)


@dataclass(frozen=True)
class PowerInfo:
    """A stored power run for a planned 2SLS design: its standard error, power at an effect, the minimum
    detectable effect, the observations needed and the expected first stage, with the stated assumptions."""

    slug: str
    created_at: datetime | str
    n: int | None
    se: float | None
    mde: float | None
    target_power: float
    alpha: float = 0.05
    effect: float | None = None
    power: float | None = None
    n_required: int | None = None
    expected_f: float | None = None
    assumptions: tuple[str, ...] = ()
    reliability: str = ""  # how far the analytic figure can be trusted
    note: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "assumptions", _as_tuple(self.assumptions))

    @property
    def created_text(self) -> str:
        return _time_text(self.created_at)


@dataclass(frozen=True)
class GraphInfo:
    """The causal-graph checker's result (a typed ``GraphVerdict``) and the generated SVG of the diagram.

    `svg_template` and `svg_fills` may give the same SVG as a drawing with one-character marks and the escaped
    text for each mark (`svg` is the template filled in); an HTML page then checks the drawing's shape once.
    """

    verdict: GraphVerdict | None = None
    svg: str = ""
    svg_template: str = ""
    svg_fills: tuple[tuple[str, str], ...] = ()


@dataclass(frozen=True)
class AuditEvent:
    """One entry of the audit trail: who did what to which entity."""

    when: datetime | str
    actor: str
    action: str
    entity: str = ""
    summary: str = ""

    @property
    def when_text(self) -> str:
        if isinstance(self.when, datetime):
            return self.when.isoformat(timespec="seconds")
        return str(self.when)


@dataclass(frozen=True)
class CatalogEntry:
    """A threat as the catalogue describes it, for the site's catalogue page."""

    code: str
    title: str
    condition: str
    families: tuple[str, ...] = ()
    testability: str = ""
    description: str = ""
    checks: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        _check_condition(self.condition, f"catalogue entry {self.code!r}")
        object.__setattr__(self, "families", _as_tuple(self.families))
        object.__setattr__(self, "checks", _as_tuple(self.checks))


@dataclass(frozen=True)
class DossierInput:
    """Everything one dossier shows; `generated_at` and `tool_version` are passed in, never read from the clock."""

    program: ProgramInfo
    instrument: InstrumentInfo
    generated_at: datetime | str
    tool_version: str
    links: tuple[LinkInfo, ...] = ()
    runs: tuple[RunInfo, ...] = ()
    graph: GraphInfo | None = None
    audit: tuple[AuditEvent, ...] = ()
    # One derived verdict per condition (``ivdossier.workflows.verdicts``); every part of the document renders these.
    verdicts: tuple[Verdict, ...] = ()
    # Whole "##" sections built by other report builders that escape their own user text (e.g. the literature
    # audit); placed after the estimates. Never put raw user text here.
    extra_sections: tuple[str, ...] = ()
    evidence_runs: tuple[RunInfo, ...] = ()  # design and summary-data runs (reports/design_sections.py)
    # Every attached evidence run, by kind, oldest first (shown whether or not a linked threat asks for it).
    sensitivity: tuple[SensitivityInfo, ...] = ()
    falsification: tuple[FalsificationInfo, ...] = ()
    compliers: tuple[CompliersInfo, ...] = ()
    power: tuple[PowerInfo, ...] = ()
    # The latest fragility runs (typed results) for "How fragile is the result" (reports/fragility_doc.py).
    fragility: tuple[Any, ...] = ()

    def __post_init__(self) -> None:
        for name in ("sensitivity", "falsification", "compliers", "power"):
            object.__setattr__(self, name, _as_tuple(getattr(self, name)))
        object.__setattr__(self, "links", _as_tuple(self.links))
        object.__setattr__(self, "runs", _as_tuple(self.runs))
        object.__setattr__(self, "audit", _as_tuple(self.audit))
        object.__setattr__(self, "extra_sections", _as_tuple(self.extra_sections))
        object.__setattr__(self, "verdicts", _as_tuple(self.verdicts))
        seen = [v.condition for v in self.verdicts]
        if len(seen) != len(set(seen)):
            raise InvalidInputError(
                f"dossier input for {self.instrument.slug!r} has two verdicts for one condition ({seen}); "
                "derive them once with ivdossier.workflows.verdicts.derive_verdicts."
            )

    def verdict(self, condition: str) -> Verdict | None:
        """The derived verdict for one condition, or None when verdicts were not derived."""
        return next((v for v in self.verdicts if v.condition == condition), None)

    @property
    def generated_text(self) -> str:
        if isinstance(self.generated_at, datetime):
            return self.generated_at.isoformat(timespec="seconds")
        return str(self.generated_at)


@dataclass(frozen=True)
class CritiqueInfo:
    """A critique in plain terms: which threat, by which study, with the note."""

    threat_code: str
    threat_title: str
    condition: str
    raised_by: str | None
    note: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "threat": self.threat_code,
            "title": self.threat_title,
            "condition": self.condition,
            "raised_by": self.raised_by,
            "note": self.note,
        }


@dataclass(frozen=True)
class AuditInputs:
    """Plain data for an audit: the scope's name, its studies with their reported values and critiques, and the
    per-variant tables attached to some of them (by study key, as stored)."""

    scope: str
    studies: tuple[tuple[str, str, dict[str, Any], tuple[CritiqueInfo, ...]], ...]
    variant_tables: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)


@dataclass(frozen=True)
class Difference:
    """One field of a frozen plan that differs: where (registry or exported file), its path, the frozen value
    and the value found now."""

    where: str
    path: str
    frozen: Any
    found: Any

    def to_dict(self) -> dict[str, Any]:
        return {"where": self.where, "path": self.path, "frozen": self.frozen, "found": self.found}
