"""Studies joined with the numerics: validated reported statistics and the literature audit of a scope."""

from __future__ import annotations

import csv
import io
from collections import Counter
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from sqlalchemy.orm import Session

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
from ivdossier.registry.studies import attach, citation, critique_rows, list_studies, set_variant_table
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


MAX_VARIANT_FILE_BYTES = 20_000_000


def variant_table_record(path: str | Path) -> dict[str, Any]:
    """Read and check a per-variant table file (CSV, TSV, .txt sniffed; see ``read_variant_frame``) and return
    what a study stores: the file name and SHA-256, the known columns as read and the rows as JSON values.

    Every check of the ``variants`` command applies (missing columns, zero SEs, duplicate variants, alleles that
    cannot be harmonised), so a table that cannot be re-analysed is never stored."""
    import math

    from ivdossier.estimation import file_sha256
    from ivdossier.estimation.variant_summary import (
        ALLELE_PAIRS,
        OPTIONAL_NUMERIC,
        REQUIRED_COLUMNS,
        read_variant_frame,
        variant_table,
    )

    size = Path(path).stat().st_size if Path(path).is_file() else 0
    if size > MAX_VARIANT_FILE_BYTES:
        raise InvalidInputError(
            f"{str(path)!r} is {size:,} bytes; a study keeps a per-variant table of at most "
            f"{MAX_VARIANT_FILE_BYTES:,} bytes. Keep the rows of the study's instruments only."
        )
    frame = read_variant_frame(path)
    table = variant_table(frame, source=Path(path).name)  # raises the variants command's errors
    known = {*REQUIRED_COLUMNS, *OPTIONAL_NUMERIC, *(name for pair in ALLELE_PAIRS for name in pair)}
    columns = [str(c) for c in frame.columns if str(c).strip().lower() in known]

    def plain(value: Any) -> Any:
        if hasattr(value, "item"):
            value = value.item()
        return None if isinstance(value, float) and math.isnan(value) else value

    rows = [[plain(v) for v in row] for row in frame[columns].itertuples(index=False, name=None)]
    return {"source": Path(path).name, "sha256": file_sha256(path), "n_variants": table.n_variants,
            "columns": columns, "rows": rows}  # fmt: skip


def attach_variant_table(
    session: Session, *, actor: str, key: str, path: str | Path, expected_version: int | None = None
) -> Study:
    """Attach a published study's per-variant table (checked first; replaces an earlier one) so the literature
    audit re-analyses it; one audited write in the caller's transaction."""
    records.get(session, Study, key)
    return set_variant_table(
        session, actor=actor, key=key, table=variant_table_record(path), expected_version=expected_version
    )


def remove_variant_table(session: Session, *, actor: str, key: str) -> Study:
    """Remove the per-variant table attached to a study (audited)."""
    return set_variant_table(session, actor=actor, key=key, table=None)


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
        {s.key: dict(s.variant_table) for s in chosen if s.variant_table},
    )


def build_audit(inputs: AuditInputs, *, top: int = 5) -> AuditSummary:
    """Audit every study in scope that has reported statistics or a per-variant table (re-analysed beside the
    reported estimate) and count the threats raised against them."""
    tables = inputs.variant_tables
    audits = [
        audit_study(key, reported, citation=cite, variants=tables.get(key))
        for key, cite, reported, _ in inputs.studies
        if reported or key in tables
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
