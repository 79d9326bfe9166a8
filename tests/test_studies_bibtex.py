"""Studies: BibTeX import and export round trip, clear errors for malformed files, reported statistics, critiques."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import select

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry import studies
from ivdossier.registry.db import Registry, open_registry
from ivdossier.registry.models import Study
from ivdossier.workflows import studies as study_work

FIXTURES = Path(__file__).parent / "fixtures" / "bibtex"


@pytest.fixture
def reg(tmp_path: Path) -> Iterator[Registry]:
    registry = open_registry(str(tmp_path / "r.sqlite"))
    yield registry
    registry.dispose()


def _fields(reg: Registry) -> dict[str, tuple[object, ...]]:
    with reg.reading() as s:
        return {
            st.key: (
                st.entry_type,
                st.authors,
                st.title,
                st.year,
                st.venue,
                st.doi,
                (st.extra or {}).get("bibtex"),
            )
            for st in s.scalars(select(Study))
        }


def test_import_decodes_accents_and_braces_and_keeps_missing_fields_empty(reg: Registry) -> None:
    with reg.writing() as s:
        added = studies.import_bibtex(s, actor="ana", text=(FIXTURES / "varied.bib").read_text("utf-8"))
    assert [st.key for st in added] == ["Nakamura2019", "Okafor2021", "Doe2023", "Garcia2024"]
    got = _fields(reg)
    assert got["Nakamura2019"][1] == "Nakamura, Ayā and Müller, Jörg and O'Neill, Siobhán"
    assert got["Nakamura2019"][2] == "Fibre Schedules and ED Visits: Evidence from Northern Districts"
    assert got["Nakamura2019"][3:6] == (2019, "Journal of Rural Health Economics", "10.5555/invented.2019.12")
    assert got["Okafor2021"][0] == "inproceedings"
    assert got["Okafor2021"][4] == "Proceedings of the Invented Workshop on Health Services"
    assert got["Doe2023"][1:6] == ("", "A note without authors, year or venue", None, "", "")
    assert got["Garcia2024"][1] == "García, Lucía"
    assert got["Garcia2024"][3] is None  # year "forthcoming" is not a number; the raw text is kept
    assert got["Garcia2024"][6]["year"] == "forthcoming"  # type: ignore[index]
    with reg.reading() as s:
        cites = {st.key: studies.citation(st) for st in s.scalars(select(Study))}
    assert cites == {
        "Nakamura2019": "Nakamura et al. (2019)",
        "Okafor2021": "Okafor and Lindqvist (2021)",
        "Doe2023": "Doe2023",
        "Garcia2024": "García (forthcoming)",
    }


def test_bibtex_round_trip_is_faithful(reg: Registry, tmp_path: Path) -> None:
    with reg.writing() as s:
        studies.import_bibtex(s, actor="ana", text=(FIXTURES / "varied.bib").read_text("utf-8"))
    with reg.reading() as s:
        exported = studies.export_bibtex(s.scalars(select(Study)))
    assert "{Fibre Schedules and {ED} Visits: Evidence from {Northern} Districts}" in exported
    assert 'M{\\"u}ller' in exported  # raw LaTeX written back as it was read
    assert "note = {Braces {inside {nested}} survive}" in exported
    second = open_registry(str(tmp_path / "second.sqlite"))
    try:
        with second.writing() as s:
            studies.import_bibtex(s, actor="ana", text=exported)
        assert _fields(second) == _fields(reg)
        with second.reading() as s:
            assert studies.export_bibtex(s.scalars(select(Study))) == exported
    finally:
        second.dispose()


def test_export_writes_edited_values_instead_of_the_stale_raw_text(reg: Registry) -> None:
    from ivdossier.registry import records

    with reg.writing() as s:
        studies.import_bibtex(s, actor="ana", text=(FIXTURES / "varied.bib").read_text("utf-8"))
        st = records.get(s, Study, "Okafor2021")
        records.edit(s, st, {"title": "A corrected title"}, actor="ana")
        studies.add_study(
            s, actor="ana", key="Byhand2020", authors="Šimek, Petra", title="Hand {made}", year=2020
        )
    with reg.reading() as s:
        text = studies.export_bibtex(s.scalars(select(Study)))
    assert "title = {A corrected title}" in text
    assert 'author = {Okafor, Chidi and Lindqvist, Bj{\\"o}rn}' in text
    assert (
        "@article{Byhand2020,\n  author = {Šimek, Petra},\n  title = {Hand {made}},\n  year = {2020}\n}"
        in text
    )


@pytest.mark.parametrize(
    ("name", "message"),
    [
        ("malformed_unclosed.bib", r"BibTeX line 7: the @article entry that starts here never closes"),
        (
            "malformed_comma.bib",
            r"BibTeX line 5: the @book entry cannot be read; check for a missing key, a missing comma",
        ),
    ],
)
def test_malformed_bibtex_names_the_line_and_imports_nothing(reg: Registry, name: str, message: str) -> None:
    with pytest.raises(InvalidInputError, match=message), reg.writing() as s:
        studies.import_bibtex(s, actor="ana", text=(FIXTURES / name).read_text("utf-8"))
    assert _fields(reg) == {}


def test_more_malformed_inputs() -> None:
    with pytest.raises(InvalidInputError, match=r"line 2: '@' is not followed by an entry type"):
        studies.parse_bibtex("\n@{x, title={a}}")
    with pytest.raises(InvalidInputError, match=r"line 1: @article must be followed by '\{'"):
        studies.parse_bibtex("@article x, title={a}}")
    with pytest.raises(InvalidInputError, match=r"line 3: key 'A1' was already used on line 1"):
        studies.parse_bibtex("@article{A1, title={a}}\n\n@book{A1, title={b}}")
    with pytest.raises(
        InvalidInputError, match=r"line 1: the @article entry cannot be read \(UndefinedString"
    ):
        studies.parse_bibtex("@article{k, journal = undefinedmacro}")
    with pytest.raises(InvalidInputError, match=r"study key 'bad key' is not usable"):
        studies.check_key("bad key")


def test_existing_key_is_a_conflict_and_nothing_is_imported(reg: Registry) -> None:
    with reg.writing() as s:
        studies.add_study(s, actor="ana", key="Okafor2021", title="Already here")
    with (
        pytest.raises(ConflictError, match=r"BibTeX line 14: study 'Okafor2021' is already in the registry"),
        reg.writing() as s,
    ):
        studies.import_bibtex(s, actor="ana", text=(FIXTURES / "varied.bib").read_text("utf-8"))
    assert list(_fields(reg)) == ["Okafor2021"]


def _setup_program(s: object) -> None:
    from ivdossier.registry.instruments import add_instrument, add_program
    from ivdossier.registry.threats import sync_catalog
    from ivdossier.threats_catalog import load_builtin

    catalog = load_builtin()
    sync_catalog(s, (t.to_dict() for t in catalog), version=catalog.version, actor="ana")  # type: ignore[arg-type]
    add_program(s, actor="ana", slug="tele", title="Telehealth and emergency visits")  # type: ignore[arg-type]
    add_instrument(
        s, actor="ana", program="tele", slug="fibre", name="Fibre wave", family="distance-geography"
    )  # type: ignore[arg-type]


def test_reported_statistics_attachments_and_critiques(reg: Registry) -> None:
    with reg.writing() as s:
        _setup_program(s)
        studies.import_bibtex(s, actor="ana", text=(FIXTURES / "varied.bib").read_text("utf-8"))
        study_work.report_stats(
            s, actor="ana", key="Nakamura2019", values={"estimate": "-0.4", "std_error": 0.1}
        )
        study_work.report_stats(
            s, actor="ana", key="Nakamura2019", values={"first_stage_f": 12.5, "f_kind": "cluster"}
        )
        studies.attach(s, actor="ana", key="Nakamura2019", instrument="fibre")
        studies.attach(s, actor="ana", key="Garcia2024", family="distance-geography")
        studies.critique(
            s, actor="ana", key="Nakamura2019", threat="DG-E01", by="Garcia2024", note="Roads too."
        )
    with reg.reading() as s:
        nak = studies.study_dict(s, s.scalars(select(Study).where(Study.key == "Nakamura2019")).one())
        in_scope = [st.key for st in studies.list_studies(s, instrument="fibre")]
        inputs = study_work.audit_inputs(s, family="distance-geography")
    assert nak["reported"] == {
        "estimate": -0.4,
        "std_error": 0.1,
        "first_stage_f": 12.5,
        "f_kind": "clustered",
    }
    assert nak["instruments"] == ["fibre"]
    assert nak["citation"] == "Nakamura et al. (2019)"
    assert nak["critiques"] == [
        {"threat": "DG-E01", "title": nak["critiques"][0]["title"], "condition": "exclusion",
         "raised_by": "Garcia2024", "note": "Roads too."}
    ]  # fmt: skip
    assert in_scope == ["Garcia2024", "Nakamura2019"]  # Garcia through the family, Nakamura directly
    assert inputs.scope == "family distance-geography"
    assert [row[0] for row in inputs.studies] == ["Garcia2024", "Nakamura2019"]


def test_study_errors_are_specific(reg: Registry) -> None:
    with reg.writing() as s:
        _setup_program(s)
        studies.add_study(s, actor="ana", key="A2020")
        studies.add_study(s, actor="ana", key="B2021")
    with (
        pytest.raises(InvalidInputError, match="study 'A2020': std_error must be positive"),
        reg.writing() as s,
    ):
        study_work.report_stats(s, actor="ana", key="A2020", values={"std_error": 0})
    with pytest.raises(NotFoundError, match="no threat named 'XX-E99'"), reg.writing() as s:
        studies.critique(s, actor="ana", key="A2020", threat="XX-E99")
    with pytest.raises(InvalidInputError, match="cannot critique itself"), reg.writing() as s:
        studies.critique(s, actor="ana", key="A2020", threat="DG-E01", by="A2020")
    with (
        pytest.raises(InvalidInputError, match="exactly one of --instrument SLUG or --family FAMILY"),
        reg.writing() as s,
    ):
        studies.attach(s, actor="ana", key="A2020")
    with reg.writing() as s:
        studies.critique(s, actor="ana", key="A2020", threat="DG-E01", by="B2021")
    with (
        pytest.raises(ConflictError, match="DG-E01 was already recorded against 'A2020' by B2021"),
        reg.writing() as s,
    ):
        studies.critique(s, actor="ana", key="A2020", threat="DG-E01", by="B2021")
    with pytest.raises(InvalidInputError, match="title has unbalanced braces"), reg.writing() as s:
        studies.add_study(s, actor="ana", key="C2022", title="Open {brace")


def test_csv_of_many_studies_is_all_or_nothing_with_the_line(reg: Registry) -> None:
    with reg.writing() as s:
        _setup_program(s)
        studies.add_study(s, actor="ana", key="A2020")
        studies.add_study(s, actor="ana", key="B2021")
    good = "key,estimate,std_error,first_stage_f,f_kind,n,instrument\nA2020,0.3,0.1,25,robust,1000,fibre\nB2021,0.5,0.2,8,,400,\n"
    with reg.writing() as s:
        done = study_work.import_stats_csv(s, actor="ana", text=good)
    assert [d.key for d in done] == ["A2020", "B2021"]
    bad = "key,estimate,std_error\nA2020,0.9,0.1\nB2021,0.5,-2\n"
    with (
        pytest.raises(InvalidInputError, match=r"CSV line 3 \(B2021\): std_error must be positive"),
        reg.writing() as s,
    ):
        study_work.import_stats_csv(s, actor="ana", text=bad)
    with reg.reading() as s:
        a = s.scalars(select(Study).where(Study.key == "A2020")).one()
    assert a.reported == {
        "estimate": 0.3,
        "std_error": 0.1,
        "first_stage_f": 25.0,
        "n": 1000,
        "f_kind": "heteroskedastic",
    }
    assert a.instruments == ["fibre"]
    with pytest.raises(InvalidInputError, match=r"CSV column\(s\) 'beta' are not known"), reg.writing() as s:
        study_work.import_stats_csv(s, actor="ana", text="key,beta\nA2020,1\n")
    with pytest.raises(InvalidInputError, match=r"CSV line 2: no study with key 'Z1999'"), reg.writing() as s:
        study_work.import_stats_csv(s, actor="ana", text="key,estimate\nZ1999,1\n")


def test_unreadable_csv_is_one_clear_error_not_a_parser_crash(reg: Registry) -> None:
    # a lone carriage return (found by the hostile-input property test) used to escape as the csv module's own
    # error; a NUL byte inside a value is named with its line and field
    with pytest.raises(InvalidInputError, match="needs a 'key' column"), reg.writing() as s:
        study_work.import_stats_csv(s, actor="ana", text="\r0")
    with (
        pytest.raises(InvalidInputError, match=r"CSV line 2 \(A2020\): estimate must be a number"),
        reg.writing() as s,
    ):
        study_work.import_stats_csv(s, actor="ana", text="key,estimate\nA2020,\x001\n")


def test_round_trip_on_each_backend(db_url: str) -> None:
    registry = open_registry(db_url)
    try:
        text = (FIXTURES / "varied.bib").read_text("utf-8")
        with registry.writing() as s:
            studies.import_bibtex(s, actor="ana", text=text)
        with registry.reading() as s:
            exported = studies.export_bibtex(s.scalars(select(Study)))
        assert [e.fields for e in studies.parse_bibtex(exported)] == [
            e.fields for e in sorted(studies.parse_bibtex(text), key=lambda e: e.key)
        ]
    finally:
        registry.dispose()
