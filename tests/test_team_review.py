"""Team review: every reviewer's rating per link, team means and spread (most disputed first), comments, and
stale edits that say who changed which fields."""

from __future__ import annotations

import json

import pytest

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry import comments, records
from ivdossier.registry import instruments as reg
from ivdossier.registry import threats as thr
from ivdossier.registry.db import open_registry
from ivdossier.registry.models import Instrument, Program


def _team_registry(path: str) -> None:
    """Three reviewers, one instrument, three linked threats; ratings disagree most on T-B."""
    registry = open_registry(path)
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="ana", slug="tele", title="Telehealth and emergency visits")
            reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre wave")
            for handle in ("ana", "ben", "cai"):
                reg.add_member(s, actor="ana", handle=handle, name=handle.title())
            for code, cond in (("T-A", "exclusion"), ("T-B", "exogeneity"), ("T-C", "relevance")):
                thr.add_team_threat(
                    s, actor="ana", entry={"code": code, "title": f"threat {code}", "condition": cond}
                )
                thr.link_threat(s, actor="ana", instrument="fibre", code=code)
        with registry.writing() as s:
            # T-A: ana 3/3, ben 3/4 -> range 1. T-B: ana 1/2, ben 5/2, cai 4/3 -> range 4. T-C: unrated.
            thr.rate_link(s, actor="ana", link="fibre--t-a", likelihood=3, severity=3)
            thr.rate_link(s, actor="ben", link="fibre--t-a", likelihood=3, severity=4, comment="plausible")
            thr.rate_link(s, actor="ana", link="fibre--t-b", likelihood=1, severity=2)
            thr.rate_link(s, actor="ben", link="fibre--t-b", likelihood=5, severity=2)
            thr.rate_link(s, actor="cai", link="fibre--t-b", likelihood=4, severity=3)
    finally:
        registry.dispose()


def test_review_json_lists_each_reviewer_means_and_spread_most_disputed_first(cli, sqlite_path) -> None:  # type: ignore[no-untyped-def]
    _team_registry(sqlite_path)
    code, out, err = cli("review", "fibre", "--json")
    assert code == 0, err
    data = json.loads(out)
    assert [x["code"] for x in data["links"]] == ["T-B", "T-A", "T-C"]
    disputed = data["links"][0]
    # Means and range worked by hand: likelihood (1+5+4)/3 = 10/3, severity (2+2+3)/3 = 7/3, range max(5-1, 3-2) = 4.
    assert disputed["mean_likelihood"] == pytest.approx(10 / 3)
    assert disputed["mean_severity"] == pytest.approx(7 / 3)
    assert disputed["spread"] == 4
    assert [r["member"] for r in disputed["ratings"]] == ["ana", "ben", "cai"]
    assert data["links"][1]["ratings"][1] == {
        "member": "ben",
        "likelihood": 3,
        "severity": 4,
        "comment": "plausible",
    }
    assert data["links"][2]["ratings"] == [] and data["links"][2]["mean_likelihood"] is None


def test_review_table_shows_each_rating_and_the_unrated_filter(cli, sqlite_path) -> None:  # type: ignore[no-untyped-def]
    _team_registry(sqlite_path)
    code, out, _ = cli("review", "fibre")
    assert code == 0
    lines = out.splitlines()
    assert lines[0].split() == ["CODE", "TITLE", "MEAN", "L", "MEAN", "S", "RANGE", "RATINGS"]
    assert lines[2].split()[:6] == ["T-B", "threat", "T-B", "3.3", "2.3", "4"]
    assert "ana 1/2; ben 5/2; cai 4/3" in lines[2]
    assert "(none yet)" in lines[4]
    code, out, _ = cli("review", "fibre", "--unrated-by", "cai", "--json")
    assert [x["code"] for x in json.loads(out)["links"]] == ["T-A", "T-C"]
    code, out, _ = cli("review", "fibre", "--unrated-by", "cai")
    assert out.startswith("links of fibre that cai has not rated yet: 2")


def test_review_of_unknown_instrument_or_member_is_a_one_line_error(cli, sqlite_path) -> None:  # type: ignore[no-untyped-def]
    _team_registry(sqlite_path)
    code, _, err = cli("review", "fibr")
    assert code == 3 and "no instrument named 'fibr'" in err and "Did you mean 'fibre'" in err
    code, _, err = cli("review", "fibre", "--unrated-by", "dan")
    assert code == 3 and "no member named 'dan'" in err


def test_comments_on_any_entity_are_listed_oldest_first_and_audited(cli, sqlite_path) -> None:  # type: ignore[no-untyped-def]
    _team_registry(sqlite_path)
    assert cli("--as", "ben", "comment", "add", "fibre--t-b", "Clerks rotate weekly <b>not</b> daily")[0] == 0
    assert cli("--as", "cai", "comment", "add", "fibre--t-b", "Agreed; see the roster.")[0] == 0
    assert cli("--as", "ana", "comment", "add", "T-A", "catalogue wording is vague")[0] == 0
    _code, out, _ = cli("comment", "list", "fibre--t-b", "--json")
    rows = json.loads(out)
    assert [(r["author"], r["body"]) for r in rows] == [
        ("ben", "Clerks rotate weekly <b>not</b> daily"),
        ("cai", "Agreed; see the roster."),
    ]
    assert {r["entity_kind"] for r in rows} == {"link"}
    _, out, _ = cli("comment", "list", "fibre--t-b")
    assert "Clerks rotate weekly <b>not</b> daily" in out and "cai" in out
    _, out, _ = cli("history", "--by", "ben", "--json")
    assert [e["entity_kind"] for e in json.loads(out)] == ["rating", "rating", "comment"]


def test_comment_mistakes_are_clear_errors(cli, sqlite_path) -> None:  # type: ignore[no-untyped-def]
    _team_registry(sqlite_path)
    code, _, err = cli("--as", "ana", "comment", "add", "nothing-here", "text")
    assert code == 3 and "nothing in this registry is named 'nothing-here'" in err
    code, _, err = cli("--as", "ana", "comment", "add", "fibre", "   ")
    assert code == 2 and "a comment needs text" in err
    registry = open_registry(sqlite_path)
    try:
        with pytest.raises(InvalidInputError, match="is itself a comment"), registry.writing() as s:
            first = comments.add_comment(s, actor="ana", target="fibre", body="one")
            comments.add_comment(s, actor="ana", target=first.slug, body="two")
        with registry.reading() as s, pytest.raises(NotFoundError, match="nothing in this registry"):
            comments.comment_views(s, "zzz")
        with registry.reading() as s:
            assert comments.comment_views(s, "fibre") == []  # the failed transaction kept nothing
    finally:
        registry.dispose()


def test_stale_edit_names_who_changed_which_fields_since_the_expected_version(sqlite_path: str) -> None:
    _team_registry(sqlite_path)
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            records.edit(s, records.get(s, Instrument, "fibre"), {"name": "Fibre (months)"}, actor="ben")
        with registry.writing() as s:
            reg.move_instrument(s, actor="cai", instrument="fibre", to="vetting", reason="schedule found")
        with (
            pytest.raises(
                ConflictError,
                match=r"version 3, not 1: it was changed by ben at .* UTC \(edit: name\), "
                r"then by cai at .* UTC \(move: state\); nothing was written",
            ),
            registry.writing() as s,
        ):
            inst = records.get(s, Instrument, "fibre")
            records.edit(s, inst, {"description": "mine"}, actor="ana", expected_version=1)
        with registry.reading() as s:
            inst = records.get(s, Instrument, "fibre")
            assert (inst.description, inst.version) == ("", 3)
        with pytest.raises(ConflictError, match="version 9 does not exist yet"), registry.writing() as s:
            records.edit(
                s, records.get(s, Instrument, "fibre"), {"name": "x"}, actor="ana", expected_version=9
            )
    finally:
        registry.dispose()


def test_text_longer_than_its_column_is_refused_before_reaching_the_database(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        too_long = "program title is 301 characters long; the limit is 300"
        with pytest.raises(InvalidInputError, match=too_long), registry.writing() as s:
            reg.add_program(s, actor="ana", slug="tele", title="x" * 301)
        with registry.writing() as s:
            prog = reg.add_program(s, actor="ana", slug="tele", title="ok")
        with (
            pytest.raises(InvalidInputError, match="program unit contains a NUL character"),
            registry.writing() as s,
        ):
            records.edit(s, records.get(s, Program, "tele"), {"unit": "a\x00b"}, actor="ana")
        with registry.reading() as s:
            assert records.get(s, Program, "tele").version == prog.version == 1
    finally:
        registry.dispose()
