"""The command line under hostile text and unlucky use: control characters are shown escaped, blank names are
refused on edit as on add, and a wrong --db, a file given as the site folder or a reader that stops early
(`| head`) each end in one clear sentence or quietly, never in "unexpected ..."."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

BELL_RLO = "Fibre\a wave \u202etxt.exe"


def test_instrument_show_escapes_bell_and_right_to_left_override(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "tele", "--title", "Telehealth")[0] == 0
    code, _, err = cli("instrument", "add", "fibre", "--program", "tele", "--name", BELL_RLO)
    assert code == 0, err
    code, out, _ = cli("instrument", "show", "fibre")
    assert code == 0 and "\a" not in out and "\u202e" not in out
    assert "Fibre\\x07 wave \\u202etxt.exe" in out
    code, out, _ = cli("instrument", "list")
    assert "\a" not in out and "\u202e" not in out and "\\u202e" in out
    code, out, _ = cli("instrument", "show", "fibre", "--json")
    assert "\u202e" not in out and json.loads(out)["name"] == BELL_RLO  # the same value, escaped in JSON


def test_instrument_edit_refuses_a_blank_name_like_add(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "tele", "--title", "Telehealth")[0] == 0
    code, _, err = cli("instrument", "add", "fibre", "--program", "tele", "--name", "")
    assert code == 2 and "an instrument needs a name" in err
    assert cli("instrument", "add", "fibre", "--program", "tele", "--name", "Fibre")[0] == 0
    for blank in ("", "   "):
        code, _, err = cli("instrument", "edit", "fibre", "--name", blank)
        assert code == 2 and "error: an instrument needs a name; pass --name" in err
    code, _, err = cli("program", "edit", "tele", "--title", "")
    assert code == 2 and "a program needs a title" in err
    code, out, _ = cli("instrument", "show", "fibre", "--json")
    assert json.loads(out)["name"] == "Fibre"


def test_a_file_that_is_not_a_registry_gives_one_sentence(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    not_db = tmp_path / "hostname"
    not_db.write_text("build-host\n")
    code, _, err = cli("--db", str(not_db), "program", "list")
    assert code == 1 and "unexpected" not in err and len(err.strip().splitlines()) == 1
    assert f"{not_db} is not an ivdossier registry (SQLite says: file is not a database); check --db." in err
    assert not_db.read_text() == "build-host\n"


def test_site_into_an_existing_file_gives_one_sentence(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    target = tmp_path / "notes.txt"
    target.write_text("keep")
    assert cli("init")[0] == 0
    code, _, err = cli("site", str(target))
    assert code == 2 and "is not a folder; choose a new or empty folder for the site" in err
    assert target.read_text() == "keep"


def test_output_piped_into_a_reader_that_stops_early_ends_quietly(tmp_path: Path) -> None:
    db = str(tmp_path / "reg.sqlite")
    env = {**os.environ, "IVDOSSIER_USER": "tester"}
    command = [sys.executable, "-m", "ivdossier.cli", "--db", db]
    subprocess.run([*command, "init"], check=True, env=env, capture_output=True)
    for args in (["threat", "list", "--json"], ["history"]):
        proc = subprocess.Popen([*command, *args], stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
        assert proc.stdout is not None and proc.stderr is not None
        proc.stdout.close()  # like `| head -0`: the reader goes away before the first line is written
        err = proc.stderr.read().decode()
        assert proc.wait(timeout=60) == 0 and err == "", (args, err)
