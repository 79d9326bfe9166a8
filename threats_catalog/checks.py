"""The fixed list of checks a catalogue entry may cite, each with what it does and the command that runs it.

Catalogue entries name checks from this list only (validation enforces it), so a dossier can turn every
threat into "run this command" without guessing. The commands are the planned ``ivdossier`` subcommands.
"""

from __future__ import annotations

from dataclasses import dataclass

from ivdossier.errors import NotFoundError

#: The planned CLI commands that run checks; every check names exactly one of them.
COMMANDS: tuple[str, ...] = (
    "ivdossier estimate",
    "ivdossier falsify balance",
    "ivdossier falsify zero-first-stage",
    "ivdossier falsify placebo",
    "ivdossier falsify per-instrument",
    "ivdossier falsify first-stage-signs",
    "ivdossier sensitivity",
    "ivdossier compliers",
    "ivdossier power",
)


@dataclass(frozen=True)
class Check:
    """One named check: a one-line description and the CLI command that runs it."""

    name: str
    description: str
    command: str

    def to_dict(self) -> dict[str, str]:
        """Plain JSON-safe form."""
        return {"name": self.name, "description": self.description, "command": self.command}


_CHECK_LIST: tuple[Check, ...] = (
    Check(
        "first-stage-strength",
        "Size of the instrument's pull on the treatment: first-stage F, effective F and partial R-squared.",
        "ivdossier estimate",
    ),
    Check(
        "weak-iv-robust-inference",
        "Confidence sets that stay valid however weak the instrument is (Anderson-Rubin and relatives).",
        "ivdossier estimate",
    ),
    Check(
        "over-identification",
        "With more instruments than treatments, whether the instruments agree with each other (Hansen J).",
        "ivdossier estimate",
    ),
    Check(
        "endogeneity-test",
        "Whether the instrumented and the naive estimates differ by more than chance (Durbin-Wu-Hausman).",
        "ivdossier estimate",
    ),
    Check(
        "covariate-balance",
        "Whether pre-determined covariates differ across instrument values, as they should not if Z is "
        "as good as random.",
        "ivdossier falsify balance",
    ),
    Check(
        "zero-first-stage-reduced-form",
        "Reduced form in a subgroup where the instrument cannot move the treatment; a non-zero effect there "
        "points to another pathway.",
        "ivdossier falsify zero-first-stage",
    ),
    Check(
        "placebo-outcome",
        "Reduced form on an outcome the treatment cannot affect (or measured before exposure); it should be "
        "null.",
        "ivdossier falsify placebo",
    ),
    Check(
        "per-instrument-estimates",
        "Estimates from each instrument on its own; diverging answers mean some instrument fails or "
        "compliers differ.",
        "ivdossier falsify per-instrument",
    ),
    Check(
        "exclusion-sensitivity",
        "How large a direct effect of the instrument on the outcome would overturn the conclusion (plausibly "
        "exogenous bounds).",
        "ivdossier sensitivity",
    ),
    Check(
        "complier-profile",
        "Share and covariate means of compliers, to judge whom the estimate describes.",
        "ivdossier compliers",
    ),
    Check(
        "subgroup-first-stage-signs",
        "First stage within covariate subgroups; opposite signs in some subgroup are evidence of defiers.",
        "ivdossier falsify first-stage-signs",
    ),
    Check(
        "complier-density-sign",
        "Testable implication of monotonicity and exclusion: implied complier outcome densities must be "
        "non-negative.",
        "ivdossier compliers",
    ),
    Check(
        "power-analysis",
        "Whether the design can detect a plausible effect given first-stage strength and sample size.",
        "ivdossier power",
    ),
)

#: Every check by name, in a stable order.
CHECKS: dict[str, Check] = {check.name: check for check in _CHECK_LIST}


def get_check(name: str) -> Check:
    """Return the check called ``name`` or raise a NotFoundError that lists the valid names."""
    try:
        return CHECKS[name]
    except KeyError:
        raise NotFoundError(f"unknown check {name!r}; use one of: {', '.join(CHECKS)}") from None


def checks_for_command(command: str) -> list[Check]:
    """Checks run by one CLI command (e.g. ``"ivdossier estimate"``), in catalogue order."""
    if command not in COMMANDS:
        raise NotFoundError(f"unknown command {command!r}; use one of: {', '.join(COMMANDS)}")
    return [check for check in _CHECK_LIST if check.command == command]
