"""What a genetic-variant (Mendelian-randomization) study should report, condition by condition, in our words.

The anchor is the published reporting guideline for such studies, STROBE-MR (Skrivankova et al. 2021, JAMA
326:1614-1621, with its explanation and elaboration in BMJ 375:n2233); the items below are our own wording,
grouped by the identifying condition they speak to, and do not reproduce the guideline's text or numbering.
:func:`fill_checklist` marks an item as computed when the summary-data evidence answers it, as provided when the
team wrote a note for it, and as missing otherwise. :func:`dossier_checklist` fills it for one instrument from
what the registry holds (the newest summary-data run, the team's threat reviews and claims), for the dossier of a
genetic-variant instrument.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from ivdossier.errors import InvalidInputError
from ivdossier.reports.mdtext import inline

if TYPE_CHECKING:
    from ivdossier.estimation.variant_summary import SummaryEvidence
    from ivdossier.reports.inputs import DossierInput

GUIDELINE = (
    "Skrivankova VW, Richmond RC, Woolf BAR, et al. Strengthening the reporting of observational studies in "
    "epidemiology using Mendelian randomization: the STROBE-MR statement. JAMA 2021;326(16):1614-1621."
)
FAMILY = "genetic-variant"  # the catalogue family whose dossiers carry the checklist
GROUPS: tuple[str, ...] = ("relevance", "exclusion", "exogeneity", "monotonicity", "design and data")
STATUSES: tuple[str, ...] = ("computed", "provided", "missing")


@dataclass(frozen=True)
class ChecklistItem:
    """One thing to report: its code, the condition (or design group) it serves and what to write."""

    code: str
    group: str
    text: str
    computed_from: str = ""  # which part of the summary-data evidence answers it, if any


ITEMS: tuple[ChecklistItem, ...] = (
    ChecklistItem(
        "GV-R1",
        "relevance",
        "How the variants were picked: the association threshold, how correlated variants were pruned, and "
        "which study supplied the exposure associations.",
    ),
    ChecklistItem(
        "GV-R2",
        "relevance",
        "How strongly the variants predict the exposure: the F statistic of each variant or their mean, and "
        "the share of exposure variance they explain together.",
        "ratios",
    ),
    ChecklistItem(
        "GV-R3",
        "relevance",
        "Whether the exposure and outcome associations come from overlapping samples, and which way weak "
        "variants would then bias the estimate.",
    ),
    ChecklistItem(
        "GV-R4",
        "relevance",
        "When the Egger line is reported, the I²_GX statistic, because a low value means its slope is diluted "
        "towards zero.",
        "egger",
    ),
    ChecklistItem(
        "GV-E1",
        "exclusion",
        "What is known about the variants and nearby genes: other traits they are associated with and any "
        "route to the outcome that would bypass the exposure.",
    ),
    ChecklistItem(
        "GV-E2",
        "exclusion",
        "Estimates that tolerate some invalid variants (weighted median, MR-Egger) beside the inverse-variance "
        "weighted estimate, with intervals.",
        "weighted_median",
    ),
    ChecklistItem(
        "GV-E3",
        "exclusion",
        "Disagreement between variants: Cochran's Q (and Rücker's Q') and the Egger intercept with its "
        "interval, read as signs of pleiotropy rather than proof of its absence.",
        "heterogeneity",
    ),
    ChecklistItem(
        "GV-E4",
        "exclusion",
        "Whether one variant drives the result: the estimate with each variant left out, or an outlier "
        "analysis.",
        "leave_one_out",
    ),
    ChecklistItem(
        "GV-X1",
        "exogeneity",
        "The ancestry of both study populations and how population structure was handled (principal "
        "components, family-based designs, a single ancestry group).",
    ),
    ChecklistItem(
        "GV-X2",
        "exogeneity",
        "Whether the two studies sample comparable populations, and whether entry into a study (survival, "
        "participation, case selection) could tie the variants to the outcome.",
    ),
    ChecklistItem(
        "GV-X3",
        "exogeneity",
        "The direction of the association: whether the variants explain more of the exposure than of the "
        "outcome (Steiger), and any check for reverse causation.",
        "directionality",
    ),
    ChecklistItem(
        "GV-M1",
        "monotonicity",
        "If the estimate is read as an average causal effect, the assumption that makes it one (a homogeneous "
        "or monotone effect of the variants) and the population it refers to.",
    ),
    ChecklistItem(
        "GV-D1",
        "design and data",
        "For each association: the consortium or study, its sample size, the covariates adjusted for and the "
        "units (per unit or per standard deviation; log odds for binary traits).",
    ),
    ChecklistItem(
        "GV-D2",
        "design and data",
        "How alleles were aligned between the studies: the effect allele used, how many variants were "
        "flipped or dropped, and how palindromic variants were treated.",
        "table",
    ),
    ChecklistItem(
        "GV-D3",
        "design and data",
        "The main estimate with its interval and scale, and which conditions the data could not test.",
        "ivw",
    ),
)


@dataclass(frozen=True)
class FilledItem:
    """A checklist item with its status and what answers it."""

    item: ChecklistItem
    status: str
    answer: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "code": self.item.code,
            "group": self.item.group,
            "text": self.item.text,
            "status": self.status,
            "answer": self.answer,
        }


@dataclass(frozen=True)
class FilledChecklist:
    """The checklist for one study or analysis, item by item."""

    items: tuple[FilledItem, ...]
    guideline: str = GUIDELINE

    def counts(self) -> dict[str, int]:
        return {s: sum(1 for i in self.items if i.status == s) for s in STATUSES}

    def to_dict(self) -> dict[str, Any]:
        return {
            "guideline": self.guideline,
            "counts": self.counts(),
            "items": [i.to_dict() for i in self.items],
        }

    def __str__(self) -> str:
        c = self.counts()
        lines = [
            f"Reporting checklist for genetic-variant studies: {c['computed']} computed, {c['provided']} "
            f"provided, {c['missing']} missing"
        ]
        lines += [f"  [{i.status}] {i.item.code} {i.item.text}" for i in self.items]
        return "\n".join(lines)


def _answer(evidence: SummaryEvidence, key: str) -> str:
    from ivdossier.estimation.variant_summary import NotApplicable

    part: Any = getattr(evidence, key)
    if isinstance(part, NotApplicable):
        return ""
    if key == "ratios":
        text = f"mean F {part.mean_f:.3g} over {len(part.variants)} variants (smallest {part.min_f:.3g})"
        d = evidence.directionality
        if not isinstance(d, NotApplicable):
            text += f"; variants explain R² {d.r2_exposure:.3g} of the exposure"
        return text
    if key == "egger":
        return f"I²_GX {part.i2_gx:.3g}"
    if key == "table":
        return str(part.harmonisation)
    return str(part)


def fill_checklist(
    evidence: SummaryEvidence | None = None, notes: Mapping[str, str] | None = None
) -> FilledChecklist:
    """Mark each item computed (from ``evidence``), provided (a team note under its code) or missing."""

    given = dict(notes or {})
    codes = {i.code for i in ITEMS}
    unknown = sorted(set(given) - codes)
    if unknown:
        raise InvalidInputError(
            f"Unknown checklist code(s) {', '.join(repr(c) for c in unknown)}; use one of {', '.join(sorted(codes))}."
        )
    filled: list[FilledItem] = []
    for item in ITEMS:
        note = given.get(item.code, "").strip()
        auto = _answer(evidence, item.computed_from) if evidence is not None and item.computed_from else ""
        if auto:
            answer = f"{auto}. {note}" if note else auto
            filled.append(FilledItem(item, "computed", answer))
        elif note:
            filled.append(FilledItem(item, "provided", note))
        else:
            filled.append(FilledItem(item, "missing", ""))
    return FilledChecklist(tuple(filled))


def checklist_markdown(checklist: FilledChecklist) -> str:
    """Markdown section: one list per condition, each item with its status word first (not colour)."""
    out = ["## Reporting checklist for genetic-variant instruments", ""]
    c = checklist.counts()
    out.append(
        f"{c['computed']} items computed from the data, {c['provided']} provided by the team, {c['missing']} missing."
    )
    for group in GROUPS:
        items = [i for i in checklist.items if i.item.group == group]
        if not items:
            continue
        out += ["", f"### {group.capitalize()}", ""]
        for i in items:
            line = f"- **{i.status}** {i.item.code}: {inline(i.item.text)}"
            if i.answer:
                line += f" — {inline(i.answer)}"
            out.append(line)
    out += [
        "",
        f"Items written in our own words; the anchor is {inline(checklist.guideline)}",
        "",
        "Statistics cannot establish exclusion or exogeneity. Conclusions for policy or clinical use need "
        "domain review.",
    ]
    return "\n".join(out) + "\n"


#: Catalogue threats of the genetic-variant family -> the checklist item a reviewed link answers (our mapping:
#: the item that reports what the threat is about).
THREAT_ITEMS: Mapping[str, str] = {
    "GV-R01": "GV-R2",  # variants explain little of the exposure -> strength
    "GV-R02": "GV-R1",  # chosen and weighted in the same data -> how variants were picked
    "GV-R03": "GV-R3",  # overlapping samples
    "GV-E01": "GV-E1",  # other traits on the way to the outcome
    "GV-I03": "GV-E1",  # a neighbouring causal variant -> what is known about nearby genes
    "GV-I01": "GV-X1",  # ancestry -> population structure
    "GV-I02": "GV-X1",  # parents' genes -> family-based designs
    "GV-I04": "GV-X2",  # selection into the study
    "GV-M01": "GV-M1",  # variant effects of both signs
    "GV-T01": "GV-M1",  # lifelong exposure -> which effect the estimate is
}


def dossier_checklist(inp: DossierInput) -> FilledChecklist | None:
    """The checklist of a genetic-variant instrument filled from its dossier input, or None for other families.

    Computed items come from the newest summary-data run attached to the instrument. An item is provided when a
    linked threat it maps to (``THREAT_ITEMS``) has been reviewed (any state but open) with an argument or
    evidence, quoted with the threat's code and state; the monotonicity item also takes the team's written
    monotonicity claim. Everything else is missing: the registry holds no answer for it.
    """
    from ivdossier.jsonsafe import RECORD_KEY, load_record

    if inp.instrument.family != FAMILY:
        return None
    from ivdossier.estimation.variant_summary import SummaryEvidence

    evidence: SummaryEvidence | None = None
    for run in sorted(inp.evidence_runs, key=lambda r: (r.created_text, r.slug)):
        record = run.results.get(RECORD_KEY) if isinstance(run.results, Mapping) else None
        value = load_record(record) if isinstance(record, Mapping) else None
        if isinstance(value, SummaryEvidence):
            evidence = value
    notes: dict[str, list[str]] = {}
    claim = (inp.instrument.claims or {}).get("monotonicity", "").strip()
    if claim:
        notes.setdefault("GV-M1", []).append(f"team's monotonicity claim: {claim}")
    for link in sorted(inp.links, key=lambda k: k.threat_code):
        code = THREAT_ITEMS.get(link.threat_code)
        said = " ".join(t for t in (link.argument.strip(), link.evidence.strip()) if t)
        if code and link.state != "open" and said:
            notes.setdefault(code, []).append(f"{link.threat_code} ({link.state}): {said}")
    return fill_checklist(evidence, {code: " ".join(texts) for code, texts in notes.items()})
