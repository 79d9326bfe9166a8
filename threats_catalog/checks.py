"""The fixed list of checks a catalogue entry may cite, each with what it does and the command that runs it.

Catalogue entries name checks from this list only (validation enforces it), so a dossier can turn every
threat into "run this command" without guessing. The commands are the planned ``ivdossier`` subcommands.

Each check also says which conditions (or, for threats of kind ``reading``, which aspects) it can speak to, so
the catalogue tests can refuse an entry that maps a check to a threat it says nothing about. A few checks that
the threats need cannot be computed by ``ivdossier`` yet: they are listed with ``computable=False``, no command,
and a note of what to do by hand meanwhile; dossiers and plans say so instead of pointing at a command.
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
    "ivdossier design decision-makers",
    "ivdossier design exposure-share",
    "ivdossier variants",
    "ivdossier confounder-strength",
    "ivdossier plan compare",
    "ivdossier fragility influence",
)


#: Families whose instruments are usually binary (an offer, a side of a cut-off, a preference indicator);
#: checks flagged ``binary_instrument_only`` may be mapped only to entries of these families.
BINARY_INSTRUMENT_FAMILIES: frozenset[str] = frozenset(
    {"lottery-encouragement", "eligibility-threshold", "birth-entry-timing", "provider-preference"}
)

#: Text shown where a check cannot be computed by the tool yet.
NOT_COMPUTABLE = "not computable by ivdossier yet"


@dataclass(frozen=True)
class Check:
    """One named check: a one-line description, the CLI command that runs it (empty when the tool cannot
    compute it yet), the conditions or reading aspects it speaks to, and whether it needs a binary instrument."""

    name: str
    description: str
    command: str
    speaks_to: frozenset[str] = frozenset()
    computable: bool = True
    binary_instrument_only: bool = False
    note: str = ""

    def to_dict(self) -> dict[str, object]:
        """Plain JSON-safe form."""
        return {
            "name": self.name,
            "description": self.description,
            "command": self.command,
            "speaks_to": sorted(self.speaks_to),
            "computable": self.computable,
            "binary_instrument_only": self.binary_instrument_only,
            "note": self.note,
        }

    @property
    def how_to_run(self) -> str:
        """The command to run, or what to do while the tool cannot compute the check."""
        return self.command if self.computable else f"{NOT_COMPUTABLE}; {self.note}"


def _to(*names: str) -> frozenset[str]:
    return frozenset(names)


_CHECK_LIST: tuple[Check, ...] = (
    Check(
        "first-stage-strength",
        "Size of the instrument's pull on the treatment: first-stage F, effective F and partial R-squared.",
        "ivdossier estimate",
        _to("relevance"),
    ),
    Check(
        "weak-iv-robust-inference",
        "Confidence sets that stay valid however weak the instrument is (Anderson-Rubin and relatives).",
        "ivdossier estimate",
        _to("relevance", "uncertainty"),
    ),
    Check(
        "over-identification",
        "With more instruments than treatments, whether the instruments agree with each other (Hansen J).",
        "ivdossier estimate",
        _to("exclusion", "exogeneity"),
    ),
    Check(
        "endogeneity-test",
        "Whether the instrumented and the naive estimates differ by more than chance (Durbin-Wu-Hausman).",
        "ivdossier estimate",
        _to("uncertainty"),
    ),
    Check(
        "covariate-balance",
        "Whether pre-determined covariates differ across instrument values, as they should not if Z is "
        "as good as random.",
        "ivdossier falsify balance",
        _to("exogeneity"),
    ),
    Check(
        "zero-first-stage-reduced-form",
        "Reduced form in a subgroup where the instrument cannot move the treatment; a non-zero effect there "
        "points to another pathway.",
        "ivdossier falsify zero-first-stage",
        _to("exclusion", "exogeneity"),
    ),
    Check(
        "placebo-outcome",
        "Reduced form on an outcome the treatment cannot affect (or measured before exposure); it should be "
        "null.",
        "ivdossier falsify placebo",
        _to("exclusion", "exogeneity"),
    ),
    Check(
        "per-instrument-estimates",
        "Estimates and first stages from each instrument on its own; diverging answers mean some instrument "
        "fails, carries the whole first stage, or has different compliers.",
        "ivdossier falsify per-instrument",
        _to("relevance", "exclusion", "exogeneity", "monotonicity", "target"),
    ),
    Check(
        "exclusion-sensitivity",
        "How large a direct effect of the instrument on the outcome would overturn the conclusion (plausibly "
        "exogenous bounds).",
        "ivdossier sensitivity",
        _to("exclusion", "exogeneity"),
    ),
    Check(
        "complier-profile",
        "Share and covariate means of compliers, to judge whom the estimate describes; implied shares or "
        "means outside their possible range point to defiers. The command needs a binary instrument: with a "
        "many-valued one, compare two of its values (e.g. top and bottom quartile).",
        "ivdossier compliers",
        _to("target", "relevance", "monotonicity"),
    ),
    Check(
        "subgroup-first-stage-signs",
        "First stage within covariate subgroups; opposite signs in some subgroup are evidence of defiers.",
        "ivdossier falsify first-stage-signs",
        _to("monotonicity"),
    ),
    Check(
        "complier-density-sign",
        "Testable implication of monotonicity and exclusion: implied complier outcome densities must be "
        "non-negative.",
        "ivdossier compliers",
        _to("monotonicity", "exclusion"),
        binary_instrument_only=True,
    ),
    Check(
        "power-analysis",
        "Whether the design can detect a plausible effect given first-stage strength and sample size.",
        "ivdossier power",
        _to("relevance", "uncertainty"),
    ),
    Check(
        "leave-out-construction",
        "The decision-maker measure built from each decision-maker's other cases (or other clusters), so a "
        "case's own decision never enters its instrument; cases per decision-maker, small ones flagged.",
        "ivdossier design decision-makers",
        _to("exogeneity", "relevance"),
    ),
    Check(
        "many-instrument-estimates",
        "JIVE1 and UJIVE beside 2SLS with one dummy per decision-maker; 2SLS drifting towards OLS while the "
        "jackknife estimates do not is the bias of many weak instruments.",
        "ivdossier design decision-makers",
        _to("relevance", "uncertainty"),
    ),
    Check(
        "jackknife-anderson-rubin",
        "Test and confidence set that stay valid with many weak instruments (jackknife Anderson-Rubin), with "
        "its own strength measure.",
        "ivdossier design decision-makers",
        _to("relevance", "uncertainty"),
    ),
    Check(
        "rotemberg-weights",
        "Which sectors' shares the exposure-share estimate rests on (Rotemberg weights), their own estimates "
        "and the share of negative weight; the shares of the top sectors are the ones to defend.",
        "ivdossier design exposure-share",
        _to("exogeneity", "relevance"),
    ),
    Check(
        "exposure-robust-inference",
        "Intervals that allow units with similar shares to share unobserved shocks (AKM, AKM0) and the "
        "equivalent shock-level regression with its effective number of sectors.",
        "ivdossier design exposure-share",
        _to("relevance", "uncertainty"),
    ),
    Check(
        "variant-pleiotropy",
        "From per-variant summary statistics: MR-Egger intercept, weighted median and heterogeneity of the "
        "per-variant ratios; a non-zero intercept or spread beyond chance points to other pathways.",
        "ivdossier variants",
        _to("exclusion"),
    ),
    Check(
        "variant-strength",
        "Per-variant F statistics of the exposure associations, their mean and I-squared GX (strength for "
        "MR-Egger).",
        "ivdossier variants",
        _to("relevance"),
    ),
    Check(
        "variant-directionality",
        "Whether the variants explain more of the exposure than of the outcome (Steiger); the reverse suggests "
        "they act on the outcome by another route.",
        "ivdossier variants",
        _to("exclusion"),
    ),
    Check(
        "confounder-robustness-value",
        "How much residual variance of both the instrument and the outcome a confounder would have to explain "
        "to move the IV estimate to the null (robustness value), compared with named observed covariates.",
        "ivdossier confounder-strength",
        _to("exogeneity", "exclusion"),
    ),
    Check(
        "differential-attrition",
        "Share of units with an observed outcome (or still in the sample) by instrument value, with trimming "
        "bounds on the estimate when the shares differ.",
        "",
        _to("exogeneity"),
        computable=False,
        note="tabulate response by instrument value and report Lee (2009) bounds by hand",
    ),
    Check(
        "running-variable-density",
        "Whether the density of the running variable jumps at the cut-off or piles up on round values.",
        "",
        _to("exogeneity"),
        computable=False,
        note="plot a fine histogram of the running variable and test for a jump at the cut-off (McCrary 2008)",
    ),
    Check(
        "pre-trend-leads",
        "Reduced form on outcomes or purchases measured before the instrument changed (event-study leads); "
        "they should be flat.",
        "",
        _to("exogeneity", "target"),
        computable=False,
        note="regress the outcome in the periods before each change on the future instrument value",
    ),
    Check(
        "leave-one-cluster-out",
        "First stage and estimate refitted leaving out each cluster in turn; the spread shows how much rests on "
        "single clusters.",
        "ivdossier fragility influence",
        _to("relevance", "uncertainty"),
    ),
    Check(
        "saturated-vs-linear-covariates",
        "The estimate with covariates entered linearly against one with covariates fully interacted (saturated); "
        "a gap means the linear version mixes in effects with negative weights.",
        "",
        _to("target"),
        computable=False,
        note="refit with covariate cells as fixed effects interacted with the instrument and compare",
    ),
    Check(
        "record-validation",
        "Recorded treatment compared with an independent record in a validation subsample, by instrument value.",
        "",
        _to("exclusion", "target"),
        computable=False,
        note="draw a validation subsample and cross-tabulate recorded against verified treatment by instrument",
    ),
    Check(
        "plan-comparison",
        "The analysis actually run compared with the frozen pre-analysis plan: instrument, controls, sample and "
        "decision rules.",
        "ivdossier plan compare",
        _to("specification"),
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


def not_computable() -> list[Check]:
    """Checks the threats need but the tool cannot compute yet, in catalogue order."""
    return [check for check in _CHECK_LIST if not check.computable]


def checks_for_command(command: str) -> list[Check]:
    """Checks run by one CLI command (e.g. ``"ivdossier estimate"``), in catalogue order."""
    if command not in COMMANDS:
        raise NotFoundError(f"unknown command {command!r}; use one of: {', '.join(COMMANDS)}")
    return [check for check in _CHECK_LIST if check.command == command]
