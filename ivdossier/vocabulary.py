"""The project's words, defined once: identifying conditions, link states, lifecycle states, verdict values,
the verdict object every document renders, and "not applicable".

Every layer imports these names from here; a test fails if another module defines its own copy.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.jsonsafe import Record

CONDITIONS: tuple[str, ...] = ("relevance", "exclusion", "exogeneity", "monotonicity")
"""The four identifying conditions, in the order every document presents them."""

LINK_STATES: tuple[str, ...] = ("open", "rebutted", "mitigated", "accepted", "fatal")
"""States of a threat linked to an instrument."""

LIFECYCLE_STATES: tuple[str, ...] = ("proposed", "vetting", "adopted", "rejected", "shelved")
"""States of a candidate instrument."""

INACTIVE_STATES: tuple[str, ...] = ("rejected", "shelved")
"""Lifecycle states of instruments that no longer take part in a program's plan."""

THREAT_KINDS: tuple[str, ...] = ("condition", "reading")
"""A threat attacks one of the four conditions, or how the estimate is read (what it means, its stated
uncertainty, how the specification was chosen)."""

READING_ASPECTS: tuple[str, ...] = ("target", "uncertainty", "specification")
"""What a threat of kind "reading" is about; stored in the condition column in place of a condition."""

TESTABILITY: tuple[str, ...] = ("testable", "partly-testable", "argument-only")
"""How far data can speak to a threat."""

HOLDS = "holds"
AT_RISK = "at risk"
BROKEN = "broken"
NOT_ASSESSED = "not assessed"
VERDICTS: tuple[str, ...] = (HOLDS, AT_RISK, BROKEN, NOT_ASSESSED)
"""Derived verdict values of a condition (never typed in by a person)."""


@dataclass(frozen=True)
class Verdict:
    """One condition's derived verdict: its status, the rule that fired, a one-line reason and the graph paths
    behind it. Computed once by ``ivdossier.workflows.verdicts``; the dossier table, the diagram's badges, the
    site, the plan document and the terminal all render this object."""

    condition: str
    status: str
    rule: str
    reason: str
    paths: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.condition not in CONDITIONS:
            raise InvalidInputError(
                f"verdict condition {self.condition!r} is not one of {', '.join(CONDITIONS)}"
            )
        if self.status not in VERDICTS:
            raise InvalidInputError(f"verdict status {self.status!r} is not one of {', '.join(VERDICTS)}")
        object.__setattr__(self, "paths", tuple(self.paths))

    @property
    def key(self) -> str:
        """The status as one token (``at-risk``), for badges, CSS classes and data attributes."""
        return verdict_key(self.status)

    def __str__(self) -> str:
        return f"{self.condition}: {self.status} ({self.rule}) — {self.reason}"

    def to_dict(self) -> dict[str, Any]:
        return {
            "condition": self.condition,
            "status": self.status,
            "rule": self.rule,
            "reason": self.reason,
            "paths": list(self.paths),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Verdict:
        return cls(
            condition=str(data["condition"]),
            status=str(data["status"]),
            rule=str(data["rule"]),
            reason=str(data["reason"]),
            paths=tuple(str(p) for p in data.get("paths") or ()),
        )


def verdict_key(status: str) -> str:
    """``at risk`` -> ``at-risk``: a verdict value as one token."""
    return status.replace(" ", "-")


NOT_APPLICABLE = "not applicable"
"""The status word of an analysis or statistic that does not apply to a design."""


@dataclass(frozen=True)
class NotApplicable(Record):
    """A diagnostic or analysis that does not apply to this model, with the reason (said one way everywhere)."""

    reason: str

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form: status and reason."""
        return {"status": NOT_APPLICABLE, "reason": self.reason}

    def __str__(self) -> str:
        return f"{NOT_APPLICABLE} ({self.reason})"

    @classmethod
    def of(cls, value: Any) -> NotApplicable | None:
        """The not-applicable object a typed result stands for: itself, or the reason of a result that keeps its own
        ``applicable``/``reason`` fields (fragility, design, summary-data and omitted-variable results); None when
        the result applies."""
        if isinstance(value, NotApplicable):
            return value
        if isinstance(value, Mapping):
            return cls.from_view(value)
        if getattr(value, "applicable", True) is False:
            reason = getattr(value, "reason", None)
            return cls(str(reason) if reason else "no reason stated")
        return None

    @classmethod
    def from_view(cls, view: Any) -> NotApplicable | None:
        """The not-applicable object a stored JSON view stands for, or None when the view is not one.

        Two shapes are stored: this class's ``{"status": "not applicable", "reason": ...}`` and the
        ``{"applicable": false, "reason": ...}`` of results that keep their own applicable flag (the fragility,
        design, summary-data and omitted-variable results); both read back as one object."""
        if not isinstance(view, Mapping):
            return cls.of(view)
        if view.get("status") == NOT_APPLICABLE or view.get("applicable") is False:
            reason = view.get("reason")
            return cls(str(reason) if reason else "no reason stated")
        return None


SPEC_KEYS: tuple[str, ...] = (
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
    "fuller_alpha",
)
"""The keys of a model spec as stored with a run (``estimation.spec.ModelSpec.echo``), in order."""
