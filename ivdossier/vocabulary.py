"""The project's words, defined once: conditions, link states, lifecycle states, verdicts and "not applicable".

Every layer imports these names from here; a test fails if another module defines its own copy.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ivdossier.jsonsafe import Record

CONDITIONS: tuple[str, ...] = ("relevance", "exclusion", "exogeneity", "monotonicity")
"""The four identifying conditions, in the order every document presents them."""

LINK_STATES: tuple[str, ...] = ("open", "rebutted", "mitigated", "accepted", "fatal")
"""States of a threat linked to an instrument."""

LIFECYCLE_STATES: tuple[str, ...] = ("proposed", "vetting", "adopted", "rejected", "shelved")
"""States of a candidate instrument."""

INACTIVE_STATES: tuple[str, ...] = ("rejected", "shelved")
"""Lifecycle states of instruments that no longer take part in a program's plan."""

TESTABILITY: tuple[str, ...] = ("testable", "partly-testable", "argument-only")
"""How far data can speak to a threat."""

HOLDS = "holds"
AT_RISK = "at risk"
BROKEN = "broken"
NOT_ASSESSED = "not assessed"
VERDICTS: tuple[str, ...] = (HOLDS, AT_RISK, BROKEN, NOT_ASSESSED)
"""Derived verdict values of a condition (never typed in by a person)."""

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
