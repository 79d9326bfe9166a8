"""Studies joined with the numerics: validated reported statistics and the literature audit of a scope."""

from __future__ import annotations

import csv
import io
from collections import Counter
from collections.abc import Mapping
from typing import Any

from sqlmodel import Session

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.audit import (
    REPORTED_FIELDS,
    AuditSummary,
    ReportedStats,
    ThreatCount,
    audit_study,
    summarise,
)
from ivdossier.registry import records
from ivdossier.registry.models import Study
from ivdossier.registry.studies import attach, citation, critique_rows, list_studies
from ivdossier.reports.inputs import AuditInputs, CritiqueInfo


def report_stats(
    session: Session,
    *,
    actor: str,
    key: str,
    values: Mapping[str, Any],
    replace: bool = False,
) -> Study:
    """Record what a study reported (merged into earlier values unless ``replace``), validated field by field."""
    study = records.get(session, Study, key)
    merged = dict(values) if replace else {**(study.reported or {}), **values}
    clean = ReportedStats.from_mapping(merged, where=f"study {key!r}").to_dict()
    return records.edit(session, study, {"reported": clean}, actor=actor, action="report")


def _stats_rows(text: str) -> list[tuple[int, str, dict[str, str], list[str], list[str]]]:
    """Parse and check every row of the statistics CSV before anything is written."""
    reader = csv.DictReader(io.StringIO(text, newline=""))
    columns = [c.strip() for c in (reader.fieldnames or [])]
    if "key" not in columns:
        raise InvalidInputError("the CSV needs a 'key' column naming each study; add it to the header row.")
    allowed = {"key", "instrument", "family", *REPORTED_FIELDS}
    unknown = [c for c in columns if c not in allowed]
    if unknown:
        raise InvalidInputError(
            f"CSV column(s) {', '.join(repr(c) for c in unknown)} are not known; use key, instrument, family and "
            f"{', '.join(REPORTED_FIELDS)}."
        )
    rows = []
    for row in reader:
        line = reader.line_num
        data = {k.strip(): (v or "").strip() for k, v in row.items() if k is not None}
        key = data.pop("key", "")
        if not key:
            raise InvalidInputError(f"CSV line {line}: the key is empty; give the study's key.")
        inst = [s for s in data.pop("instrument", "").split(";") if s.strip()]
        fam = [s for s in data.pop("family", "").split(";") if s.strip()]
        values = {k: v for k, v in data.items() if v != ""}
        ReportedStats.from_mapping(values, where=f"CSV line {line} ({key})")
        rows.append((line, key, values, inst, fam))
    return rows


def import_stats_csv(session: Session, *, actor: str, text: str) -> list[Study]:
    """Reported statistics for many studies from CSV text (a ``key`` column plus reported fields); all or nothing.

    Optional ``instrument`` and ``family`` columns attach the study as well (several separated by ';').
    """
    try:
        rows = _stats_rows(text)
    except csv.Error as exc:
        raise InvalidInputError(
            f"the statistics CSV cannot be read ({exc}); save it as plain comma-separated text with one row per line."
        ) from exc
    out = []
    for line, key, values, inst, fam in rows:
        if records.find(session, Study, key) is None:
            raise InvalidInputError(
                f"CSV line {line}: no study with key {key!r}; import its BibTeX or add it with `ivdossier study add`."
            )
        study = report_stats(session, actor=actor, key=key, values=values)
        for slug in inst:
            attach(session, actor=actor, key=key, instrument=slug.strip())
        for family in fam:
            attach(session, actor=actor, key=key, family=family.strip())
        out.append(study)
    return out


def critiques_of(session: Session, study: Study) -> list[CritiqueInfo]:
    """Critiques recorded against one study, ordered by threat code."""
    return [
        CritiqueInfo(r["threat"], r["title"], r["condition"], r["raised_by"], r["note"])
        for r in critique_rows(session, study)
    ]


def audit_inputs(
    session: Session, *, instrument: str | None = None, family: str | None = None, key: str | None = None
) -> AuditInputs:
    """Collect what the audit needs for one instrument, one family, one study or (none given) every study."""
    given = [v for v in (instrument, family, key) if v is not None]
    if len(given) > 1:
        raise InvalidInputError(
            "audit one scope at a time: give only one of --instrument, --family or --study."
        )
    if key is not None:
        chosen = [records.get(session, Study, key)]
        scope = f"study {key}"
    else:
        chosen = list_studies(session, instrument=instrument, family=family)
        scope = f"instrument {instrument}" if instrument else f"family {family}" if family else "all studies"
    return AuditInputs(
        scope,
        tuple((s.key, citation(s), dict(s.reported or {}), tuple(critiques_of(session, s))) for s in chosen),
    )


def build_audit(inputs: AuditInputs, *, top: int = 5) -> AuditSummary:
    """Audit every study in scope that has reported statistics and count the threats raised against them."""
    audits = [
        audit_study(key, reported, citation=cite) for key, cite, reported, _ in inputs.studies if reported
    ]
    counts: Counter[str] = Counter()
    meta: dict[str, CritiqueInfo] = {}
    for _, _, _, critiques in inputs.studies:
        for c in critiques:
            counts[c.threat_code] += 1
            meta.setdefault(c.threat_code, c)
    threats = [
        ThreatCount(code, meta[code].threat_title, meta[code].condition, n) for code, n in counts.items()
    ]
    return summarise(inputs.scope, audits, n_studies=len(inputs.studies), threats=threats, top=top)
