"""Past and published studies: BibTeX import and export, reported statistics, attachments and critiques.

BibTeX is read with bibtexparser 1.x, one entry at a time after a brace-aware scan that knows the line each entry
starts on, so a malformed file is refused with the line of the faulty entry and nothing is imported. Display
fields (authors, title, venue) are stored as Unicode (LaTeX accents decoded); the raw BibTeX text of every field
is kept in ``extra["bibtex"]`` so that export writes the entry back as it was read unless someone edited it.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.models import Critique, Instrument, Study, Threat
from ivdossier.safefiles import read_bounded_text

KEY_RE = re.compile(r"^[A-Za-z0-9_:.+/\-]{1,120}$")
TYPE_RE = re.compile(r"[A-Za-z]+")
VENUE_FIELDS = ("journal", "booktitle", "publisher", "school", "institution", "howpublished")
CORE_FIELDS = ("author", "title", "year", "doi", *VENUE_FIELDS)
SKIPPED_TYPES = {"comment"}
MACRO_TYPES = {"string", "preamble"}
DISPLAY_TO_BIBTEX = {"authors": "author", "title": "title", "doi": "doi"}
# Largest files read, checked while reading (before any parsing): a bibliography of some 50,000 entries, and a
# table of reported statistics of some 100,000 rows.
MAX_BIBTEX_BYTES = 20_000_000
MAX_STATS_CSV_BYTES = 20_000_000


@dataclass(frozen=True)
class BibEntry:
    """One BibTeX entry as read: its key, type, the line it starts on and its raw field values."""

    key: str
    entry_type: str
    line: int
    fields: dict[str, str]


def _entry_end(text: str, start: int, etype: str, line: int) -> int:
    """Index of the delimiter closing the entry whose opening '{' or '(' is at ``start`` (BibTeX brace counting)."""
    depth = 0
    in_quote = False
    paren = text[start] == "("
    for k in range(start + 1 if paren else start, len(text)):
        ch = text[k]
        if ch == "{":
            depth += 1
        elif ch == "}":
            depth -= 1
            if depth < 0:
                bad = text.count("\n", 0, k) + 1
                raise InvalidInputError(
                    f"BibTeX line {bad}: a '}}' closes more than was opened in the @{etype} entry that starts on "
                    f"line {line}; remove it or add the matching '{{'."
                )
            if depth == 0 and not paren:
                return k
        elif ch == '"' and depth == (0 if paren else 1):
            in_quote = not in_quote
        elif ch == ")" and paren and depth == 0 and not in_quote:
            return k
    raise InvalidInputError(
        f"BibTeX line {line}: the @{etype} entry that starts here never closes (an opening brace or parenthesis "
        "is not matched); balance its braces."
    )


def _scan(text: str) -> tuple[list[tuple[int, str, str]], list[str]]:
    """Split BibTeX text into (line, type, chunk) entries and @string/@preamble chunks; unbalanced braces raise."""
    entries: list[tuple[int, str, str]] = []
    macros: list[str] = []
    i, n = 0, len(text)
    while True:
        at = text.find("@", i)
        if at < 0:
            break
        line = text.count("\n", 0, at) + 1
        m = TYPE_RE.match(text, at + 1)
        if m is None:
            raise InvalidInputError(
                f"BibTeX line {line}: '@' is not followed by an entry type; write e.g. @article{{key, ...}}."
            )
        etype = m.group(0).lower()
        j = m.end()
        while j < n and text[j] in " \t\r\n":
            j += 1
        if j >= n or text[j] not in "{(":
            raise InvalidInputError(
                f"BibTeX line {line}: @{etype} must be followed by '{{'; check the entry there."
            )
        end = _entry_end(text, j, etype, line)
        chunk = text[at : end + 1]
        if etype in MACRO_TYPES:
            macros.append(chunk)
        elif etype not in SKIPPED_TYPES:
            entries.append((line, etype, chunk))
        i = end + 1
    return entries, macros


def _parser() -> Any:
    from bibtexparser.bparser import BibTexParser

    return BibTexParser(common_strings=True, ignore_nonstandard_types=False, interpolate_strings=True)


def read_bibtex_file(path: str | Path) -> str:
    """The text of a BibTeX file, refusing files over MAX_BIBTEX_BYTES before reading them whole."""
    return read_bounded_text(path, MAX_BIBTEX_BYTES, what="a BibTeX file")


def read_stats_csv_file(path: str | Path) -> str:
    """The text of a reported-statistics CSV, refusing files over MAX_STATS_CSV_BYTES before reading them whole."""
    return read_bounded_text(path, MAX_STATS_CSV_BYTES, what="a statistics CSV file")


def parse_bibtex(text: str) -> list[BibEntry]:
    """Read every entry of a BibTeX text; any malformed entry raises InvalidInputError naming its line."""
    records.check_text(text, field="BibTeX file", max_length=20_000_000)
    chunks, macros = _scan(text)
    prefix = "\n".join(macros) + "\n" if macros else ""
    try:
        whole = _load(prefix + "\n".join(chunk for _, _, chunk in chunks)) if chunks else []
    except Exception:  # one bad entry spoils the whole parse; the slow path below names it
        whole = []
    keys = [str(e.get("ID", "")).strip() for e in whole]
    if len(whole) != len(chunks) or (not whole and chunks):
        # Something did not parse: find the first entry that fails on its own (slow path, errors only).
        for line, etype, chunk in chunks:
            _entry_or_error(prefix, line, etype, chunk)
        raise InvalidInputError(
            "the BibTeX file could not be read as a whole; check entries that share a key."
        )
    out: list[BibEntry] = []
    seen: dict[str, int] = {}
    for (line, etype, chunk), raw_entry, key in zip(chunks, whole, keys, strict=True):
        raw = dict(raw_entry)
        if not KEY_RE.match(key) or _chunk_key(chunk) != key:
            raw = _entry_or_error(prefix, line, etype, chunk)
            key = str(raw.get("ID", "")).strip()
        if not KEY_RE.match(key):
            raise InvalidInputError(
                f"BibTeX line {line}: key {key!r} is not usable; use letters, digits and _:.+/- (no spaces)."
            )
        if key in seen:
            raise InvalidInputError(f"BibTeX line {line}: key {key!r} was already used on line {seen[key]}.")
        seen[key] = line
        raw.pop("ID", None)
        raw.pop("ENTRYTYPE", None)
        out.append(BibEntry(key, etype, line, {k.lower(): str(v) for k, v in raw.items()}))
    return out


def _load(text: str) -> list[dict[str, Any]]:
    import bibtexparser

    return list(bibtexparser.loads(text, parser=_parser()).entries)


def _chunk_key(chunk: str) -> str:
    m = re.match(r"@\s*[A-Za-z]+\s*[{(]\s*([^,\s{}()=]*)", chunk)
    return m.group(1) if m else ""


def _entry_or_error(prefix: str, line: int, etype: str, chunk: str) -> dict[str, Any]:
    """Parse one entry alone; any failure raises InvalidInputError naming the entry's line."""
    try:
        entries = _load(prefix + chunk)
    except Exception as exc:  # bibtexparser raises several types, e.g. UndefinedString
        raise InvalidInputError(
            f"BibTeX line {line}: the @{etype} entry cannot be read ({type(exc).__name__}: {exc}); fix that entry."
        ) from None
    if len(entries) != 1:
        raise InvalidInputError(
            f"BibTeX line {line}: the @{etype} entry cannot be read; check for a missing key, a missing "
            "comma between fields or a field without '='."
        )
    return dict(entries[0])


_SPECIALS = {
    "ss": "ß", "aa": "å", "AA": "Å", "ae": "æ", "AE": "Æ", "oe": "œ", "OE": "Œ",
    "o": "ø", "O": "Ø", "l": "ł", "L": "Ł", "i": "i", "j": "j",
}  # fmt: skip
_ACCENTS = {
    "`": "\u0300", "'": "\u0301", "^": "\u0302", '"': "\u0308", "~": "\u0303", "=": "\u0304", ".": "\u0307",
    "u": "\u0306", "v": "\u030c", "H": "\u030b", "c": "\u0327", "k": "\u0328", "r": "\u030a", "d": "\u0323",
    "b": "\u0331",
}  # fmt: skip
_SPECIAL_RE = re.compile(r"\\(ss|aa|AA|ae|AE|oe|OE|o|O|l|L|i|j)(?![A-Za-z])(\{\})?")
_SYMBOL_ACCENT_RE = re.compile(r"\\([`'^\"~=.])\s*(?:\{\s*([A-Za-z])\s*\}|([A-Za-z]))")
_LETTER_ACCENT_RE = re.compile(r"\\([uvHckrdb])(?:\s*\{\s*([A-Za-z])\s*\}|\s+([A-Za-z]))")
_ESCAPED_RE = re.compile(r"\\([&%$#_{}])")


def latex_to_text(value: str) -> str:
    """Decode the LaTeX a BibTeX field commonly holds (accents, special letters, escapes) and drop grouping
    braces, for display: ``M{\\"u}ller`` -> ``Müller``, ``{RNA}`` -> ``RNA``."""
    out = _SPECIAL_RE.sub(lambda m: _SPECIALS[m.group(1)], value)

    def accent(m: re.Match[str]) -> str:
        return (m.group(2) or m.group(3)) + _ACCENTS[m.group(1)]

    out = _SYMBOL_ACCENT_RE.sub(accent, out)
    out = _LETTER_ACCENT_RE.sub(accent, out)
    out = _ESCAPED_RE.sub(lambda m: "\x00" + m.group(1), out)
    out = re.sub(r"(?<!\x00)[{}]", "", out).replace("\x00", "")
    return unicodedata.normalize("NFC", " ".join(out.split()))


def _unicode(value: str) -> str:
    return latex_to_text(value)


def _year(value: str | None, line: int | None = None) -> int | None:
    if value is None or not value.strip():
        return None
    text = value.strip().strip("{}")
    if re.fullmatch(r"-?\d{1,4}", text):
        return int(text)
    return None  # "forthcoming", "2021a": kept as raw BibTeX, no numeric year


def study_from_entry(entry: BibEntry) -> Study:
    """A Study row from a parsed entry (not yet added to a session)."""
    fields = entry.fields
    venue_field = next((f for f in VENUE_FIELDS if fields.get(f)), "")
    return Study(
        key=entry.key,
        entry_type=entry.entry_type,
        authors=_unicode(fields.get("author", "")),
        title=_unicode(fields.get("title", "")),
        year=_year(fields.get("year")),
        venue=_unicode(fields[venue_field]) if venue_field else "",
        doi=fields.get("doi", "").strip(),
        families=[],
        instruments=[],
        reported={},
        extra={"bibtex": dict(fields), "venue_field": venue_field or "journal"},
    )


def import_bibtex(session: Session, *, actor: str, text: str, source: str = "") -> list[Study]:
    """Parse all of ``text`` first, then add every entry in the caller's transaction (all or nothing)."""
    entries = parse_bibtex(text)
    wanted = {e.key for e in entries}
    existing = {k for k in session.scalars(select(Study.key)) if k in wanted}
    if existing:
        first = next(e for e in entries if e.key in existing)
        raise ConflictError(
            f"BibTeX line {first.line}: study {first.key!r} is already in the registry; remove it from the file "
            "or rename the key (nothing was imported)."
        )
    reason = f"imported from BibTeX {source}".strip()
    return [records.create(session, study_from_entry(e), actor=actor, reason=reason) for e in entries]


def check_key(key: str) -> str:
    if not KEY_RE.match(key):
        raise InvalidInputError(
            f"study key {key!r} is not usable; use 1-120 letters, digits and _:.+/- (no spaces), e.g. 'Card1995'."
        )
    return key


def _balanced(value: str, field: str) -> str:
    depth = 0
    for ch in value:
        depth += {"{": 1, "}": -1}.get(ch, 0)
        if depth < 0:
            break
    if depth != 0:
        raise InvalidInputError(
            f"{field} has unbalanced braces ({value!r}); BibTeX export needs them paired."
        )
    return value


def add_study(
    session: Session,
    *,
    actor: str,
    key: str,
    entry_type: str = "article",
    authors: str = "",
    title: str = "",
    year: int | None = None,
    venue: str = "",
    doi: str = "",
) -> Study:
    """Add one study by hand."""
    check_key(key)
    if not TYPE_RE.fullmatch(entry_type):
        raise InvalidInputError(f"entry type {entry_type!r} must be a word such as article or book.")
    for name, value in (("authors", authors), ("title", title), ("venue", venue), ("doi", doi)):
        records.check_text(value, field=name, max_length=5000)
        _balanced(value, name)
    study = Study(
        key=key,
        entry_type=entry_type.lower(),
        authors=authors,
        title=title,
        year=year,
        venue=venue,
        doi=doi,
        families=[],
        instruments=[],
        reported={},
        extra={},
    )
    return records.create(session, study, actor=actor)


def _bib_value(value: str) -> str:
    return "{" + value + "}"


def entry_fields(study: Study) -> dict[str, str]:
    """The BibTeX fields to export: raw text kept from import unless the display value was edited since."""
    extra = study.extra or {}
    raw: dict[str, str] = dict(extra.get("bibtex") or {})
    venue_field = str(
        extra.get("venue_field") or ("booktitle" if study.entry_type == "inproceedings" else "journal")
    )
    out: dict[str, str] = {}
    current = {
        "author": study.authors,
        "title": study.title,
        venue_field: study.venue,
        "doi": study.doi,
        "year": "" if study.year is None else str(study.year),
    }
    for name, value in current.items():
        kept = raw.get(name)
        if kept is not None and (
            (name == "year" and (_year(kept) == study.year))
            or (name != "year" and (_unicode(kept) if name != "doi" else kept.strip()) == value)
        ):
            out[name] = _bib_value(kept)
        elif value:
            out[name] = _bib_value(value)
    for name, value in raw.items():
        if name not in current and name not in out:
            out[name] = _bib_value(value)
    return out


def export_bibtex(studies: Iterable[Study]) -> str:
    """BibTeX text for the studies, sorted by key; fields in a fixed order then alphabetically."""
    order = {name: i for i, name in enumerate(("author", "title", *VENUE_FIELDS, "year", "doi"))}
    blocks = []
    for study in sorted(studies, key=lambda s: s.key):
        fields = entry_fields(study)
        names = sorted(fields, key=lambda f: (order.get(f, len(order)), f))
        body = ",\n".join(f"  {name} = {fields[name]}" for name in names)
        blocks.append(
            f"@{study.entry_type}{{{study.key},\n{body}\n}}\n"
            if body
            else f"@{study.entry_type}{{{study.key}}}\n"
        )
    return "\n".join(blocks)


def attach(
    session: Session, *, actor: str, key: str, instrument: str | None = None, family: str | None = None
) -> Study:
    """Attach a study to a candidate instrument or to an instrument family (one of the two)."""
    if (instrument is None) == (family is None):
        raise InvalidInputError("attach a study to exactly one of --instrument SLUG or --family FAMILY.")
    study = records.get(session, Study, key)
    if instrument is not None:
        records.get(session, Instrument, instrument)
        current = list(study.instruments or [])
        if instrument in current:
            return study
        return records.edit(
            session, study, {"instruments": sorted([*current, instrument])}, actor=actor, action="attach"
        )
    assert family is not None
    records.check_slug(family, what="family")
    fams = list(study.families or [])
    if family in fams:
        return study
    return records.edit(session, study, {"families": sorted([*fams, family])}, actor=actor, action="attach")


MAX_VARIANT_ROWS = 100_000


def set_variant_table(
    session: Session,
    *,
    actor: str,
    key: str,
    table: Mapping[str, Any] | None,
    expected_version: int | None = None,
) -> Study:
    """Attach a published per-variant table to a study (replacing the one attached before), or remove it (None).

    The table arrives checked by the caller (``workflows.studies.attach_variant_table``) as plain JSON: ``source``,
    ``sha256``, ``columns`` and ``rows``; this stores it in the caller's transaction with an audit event."""
    study = records.get(session, Study, key)
    if table is None:
        if study.variant_table is None:
            raise InvalidInputError(f"study {key!r} has no per-variant table to remove.")
        return records.edit(
            session, study, {"variant_table": None}, actor=actor, action="remove variants",
            expected_version=expected_version,
        )  # fmt: skip
    missing = [k for k in ("source", "sha256", "columns", "rows") if k not in table]
    if missing or not isinstance(table.get("rows"), list):
        raise InvalidInputError(
            f"a per-variant table needs source, sha256, columns and a list of rows (missing {', '.join(missing)})."
        )
    if len(table["rows"]) > MAX_VARIANT_ROWS:
        raise InvalidInputError(
            f"the per-variant table has {len(table['rows']):,} rows; at most {MAX_VARIANT_ROWS:,} are kept with a "
            "study. Attach the instruments' variants only."
        )
    return records.edit(
        session, study, {"variant_table": dict(table)}, actor=actor, action="attach variants",
        expected_version=expected_version,
    )  # fmt: skip


def critique(
    session: Session, *, actor: str, key: str, threat: str, by: str | None = None, note: str = ""
) -> Critique:
    """Record that catalogue threat ``threat`` was raised against study ``key`` (by study ``by`` if given)."""
    study = records.get(session, Study, key)
    from ivdossier.registry.threats import threat_by_code

    th = threat_by_code(session, threat)
    raiser = records.get(session, Study, by) if by else None
    if raiser is not None and raiser.id == study.id:
        raise InvalidInputError(f"study {key!r} cannot critique itself; pass another study with --by.")
    records.check_text(note, field="note")
    slug = f"{key}--{th.code}--{by or 'team'}"[:280]
    dup = session.scalars(
        select(Critique).where(
            Critique.study_id == study.id,
            Critique.threat_id == th.id,
            Critique.raised_by_id == (raiser.id if raiser else None),
        )
    ).first()
    if dup is not None:
        raise ConflictError(
            f"threat {th.code} was already recorded against {key!r}{' by ' + by if by else ''}."
        )
    row = Critique(
        slug=slug,
        study_id=study.id or 0,
        threat_id=th.id or 0,
        raised_by_id=raiser.id if raiser else None,
        note=note,
    )
    return records.create(session, row, actor=actor)


def critique_rows(session: Session, study: Study) -> list[dict[str, Any]]:
    """Critiques recorded against one study as plain rows (threat, title, condition, raised_by, note), by code."""
    return critiques_by_study(session, [study]).get(study.id or 0, [])


def critiques_by_study(session: Session, studies: Sequence[Study]) -> dict[int, list[dict[str, Any]]]:
    """`critique_rows` of several studies, read in one query (a listing makes no query per study)."""
    raiser = aliased(Study)
    query = (
        select(Critique, Threat, raiser.key)
        .join(Threat, Critique.threat_id == Threat.id)  # type: ignore[arg-type]
        .outerjoin(raiser, Critique.raised_by_id == raiser.id)  # type: ignore[arg-type]
    )
    wanted = {st.id for st in studies}
    if len(wanted) <= 500:  # a short list by key; a long one reads every critique (no huge IN list)
        query = query.where(Critique.study_id.in_(wanted))  # type: ignore[attr-defined]
    out: dict[int, list[dict[str, Any]]] = {}
    for crit, threat, raised_by in session.execute(query):
        if crit.study_id not in wanted:
            continue
        out.setdefault(crit.study_id, []).append(
            {
                "threat": threat.code,
                "title": threat.title,
                "condition": threat.condition,
                "raised_by": raised_by,
                "note": crit.note,
            }
        )
    return {k: sorted(v, key=lambda c: (c["threat"], c["raised_by"] or "")) for k, v in out.items()}


def list_studies(
    session: Session, *, instrument: str | None = None, family: str | None = None
) -> list[Study]:
    """Studies, optionally those attached to an instrument (directly or through its family) or to a family."""
    studies = list(session.scalars(select(Study).order_by(Study.key)))
    if instrument is not None:
        inst = records.get(session, Instrument, instrument)
        return [
            s
            for s in studies
            if inst.slug in (s.instruments or []) or (inst.family and inst.family in (s.families or []))
        ]
    if family is not None:
        slugs = {i.slug for i in session.scalars(select(Instrument).where(Instrument.family == family))}
        return [s for s in studies if family in (s.families or []) or slugs & set(s.instruments or [])]
    return studies


def citation(study: Study) -> str:
    """A short author-year label, e.g. 'Card (1995)' or 'Angrist and Krueger (1991)'."""
    names = [a.strip() for a in re.split(r"\s+and\s+", study.authors) if a.strip()]
    surnames = [n.split(",")[0].strip() if "," in n else n.split()[-1] for n in names]
    if not surnames:
        who = study.key
    elif len(surnames) == 1:
        who = surnames[0]
    elif len(surnames) == 2:
        who = f"{surnames[0]} and {surnames[1]}"
    else:
        who = f"{surnames[0]} et al."
    if study.year is not None:
        return f"{who} ({study.year})"
    raw_year = str(((study.extra or {}).get("bibtex") or {}).get("year", "")).strip()
    return f"{who} ({latex_to_text(raw_year)})" if raw_year else who


def study_dict(
    session: Session, study: Study, critiques: Sequence[dict[str, Any]] | None = None
) -> dict[str, Any]:
    """A JSON-safe view of one study with its critiques (read here unless given, as a listing does)."""
    data = records.snapshot(study, bookkeeping=True)
    data["citation"] = citation(study)
    data["critiques"] = list(critiques) if critiques is not None else critique_rows(session, study)
    return data


def keys_of(studies: Sequence[Study]) -> list[str]:
    return [s.key for s in studies]
