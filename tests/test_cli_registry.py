"""The CLI spine: add/list/show/edit with --json, lifecycle moves, history and one-line errors."""

from __future__ import annotations

import json


def _setup(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "tele", "--title", "Telehealth and emergency visits")[0] == 0
    code, _, err = cli(
        "instrument", "add", "fibre", "--program", "tele", "--name", "Fibre wave",
        "--family", "distance-geography", "--column", "fibre_months", "--exclusion", "Only through video visits.",
    )  # fmt: skip
    assert code == 0, err


def test_program_and_instrument_round_trip_through_json(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, out, _ = cli("program", "list", "--json")
    assert code == 0
    programs = json.loads(out)
    assert [(p["slug"], p["instruments"]) for p in programs] == [("tele", 1)]
    code, out, _ = cli("instrument", "show", "fibre", "--json")
    shown = json.loads(out)
    assert shown["program"] == "tele"
    assert shown["columns"] == ["fibre_months"]
    assert shown["claim_exclusion"] == "Only through video visits."
    assert shown["state"] == "proposed"


def test_table_output_has_a_header_and_one_row_per_entity(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    _, out, _ = cli("instrument", "list")
    lines = out.splitlines()
    assert lines[0].split() == ["SLUG", "PROGRAM", "NAME", "FAMILY", "STATE"]
    assert set(lines[1]) <= {"-", " "}
    assert lines[2].split()[:2] == ["fibre", "tele"]


def test_move_needs_a_reason_and_is_recorded_in_history(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, out, _ = cli("instrument", "move", "fibre", "--to", "vetting", "--reason", "Schedule obtained")
    assert code == 0 and "now vetting" in out
    code, out, _ = cli("history", "fibre", "--json")
    events = json.loads(out)
    assert [e["action"] for e in events] == ["create", "move"]
    assert events[1]["actor"] == "tester"
    assert events[1]["reason"] == "Schedule obtained"
    assert events[1]["before"] == {"state": "proposed"} and events[1]["after"] == {"state": "vetting"}


def test_errors_are_one_line_with_non_zero_exit_and_no_traceback(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, out, err = cli("instrument", "show", "fibr")
    assert code == 3
    assert (
        err.strip()
        == "error: no instrument named 'fibr' in this registry. Did you mean 'fibre'? See `ivdossier instrument list`."
    )
    assert "Traceback" not in out + err
    code, _, err = cli("instrument", "move", "fibre", "--to", "adopted", "--reason", "x")
    assert code == 2 and "can move to vetting, rejected, shelved, not adopted" in err


def test_stale_if_version_is_refused(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    assert cli("instrument", "edit", "fibre", "--name", "Fibre wave (months)", "--if-version", "1")[0] == 0
    code, _, err = cli("instrument", "edit", "fibre", "--name", "Other", "--if-version", "1")
    assert code == 4
    assert "is at version 2, not 1: it was changed by tester" in err
    code, out, _ = cli("instrument", "show", "fibre", "--json")
    assert json.loads(out)["name"] == "Fibre wave (months)"


def test_members_and_text_from_file(cli, tmp_path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    claim = tmp_path / "claim.md"
    claim.write_text("Clerks only book slots.\n\nNothing else.", encoding="utf-8")
    assert cli("instrument", "edit", "fibre", "--exogeneity", f"@{claim}")[0] == 0
    code, out, _ = cli("instrument", "show", "fibre", "--json")
    assert json.loads(out)["claim_exogeneity"] == "Clerks only book slots.\n\nNothing else."
    assert cli("member", "add", "ana", "--name", "Ana", "--email", "ana@example.org")[0] == 0
    code, _, err = cli("--as", "ana", "member", "add", "bo", "--email", "not-an-address")
    assert code == 2 and "does not look like an address" in err
    code, out, _ = cli("member", "list", "--json")
    assert [m["handle"] for m in json.loads(out)] == ["ana"]
