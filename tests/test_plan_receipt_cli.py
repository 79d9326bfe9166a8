"""`plan freeze` writes a seal receipt (never over another file, never half-written); `plan verify --receipt` says
which side changed; a failed verification is one clear line and a non-zero exit."""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text


def _setup(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("init")[0] == 0
    assert (
        cli("program", "add", "tele", "--title", "Telehealth", "--treatment", "x", "--outcome", "y")[0] == 0
    )
    assert (
        cli("instrument", "add", "fibre", "--program", "tele", "--name", "Fibre wave", "--column", "z")[0]
        == 0
    )
    assert cli("plan", "draft", "fibre")[0] == 0


def _sql(db: str, statement: str) -> None:
    engine = create_engine(f"sqlite:///{db}")
    with engine.begin() as conn:
        conn.execute(text(statement))
    engine.dispose()


def _state(cli) -> str:  # type: ignore[no-untyped-def]
    code, out, _ = cli("plan", "show", "fibre-plan", "--json")
    assert code == 0
    return str(json.loads(out)["state"])


def test_freeze_writes_the_receipt_here_and_verify_checks_it(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sqlite_path: str
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    _setup(cli)
    code, out, err = cli("plan", "freeze", "fibre-plan")
    assert code == 0, err
    assert out.splitlines()[-1] == "seal receipt written to fibre-plan.seal.json"
    receipt = json.loads((tmp_path / "fibre-plan.seal.json").read_text("utf-8"))
    sha = out.splitlines()[1].removeprefix("sha256 ")
    # anyone can check the receipt with a plain SHA-256 of its canonical text (hashlib here)
    assert hashlib.sha256(receipt["canonical"].encode("utf-8")).hexdigest() == receipt["sha256"] == sha
    assert (receipt["sealed_by"], receipt["plan"]) == ("tester", "fibre-plan")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fibre-plan.seal.json", "registry.sqlite"]

    code, out, _ = cli("plan", "verify", "fibre-plan", "--receipt", "fibre-plan.seal.json")
    assert (code, out.strip()) == (
        0,
        f"plan fibre-plan is intact (sha256 {sha}); the registry and the receipt agree (fibre-plan.seal.json)",
    )
    _sql(sqlite_path, "UPDATE plan SET title = 'Quietly rewritten' WHERE slug = 'fibre-plan'")
    code, out, _ = cli("plan", "verify", "fibre-plan", "--receipt", "fibre-plan.seal.json")
    assert code == 1
    assert out.splitlines()[0] == (
        "plan fibre-plan FAILED verification: the registry has changed since the receipt was written"
    )
    assert "Quietly rewritten" in out
    code, out, _ = cli("plan", "verify", "fibre-plan", "--receipt", "fibre-plan.seal.json", "--json")
    assert code == 1 and json.loads(out)["receipt"] == "registry changed"


def test_a_deleted_seal_event_fails_verify_with_one_clear_line(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sqlite_path: str
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    _setup(cli)
    assert cli("plan", "freeze", "fibre-plan")[0] == 0
    _sql(sqlite_path, "DELETE FROM audit_event WHERE action = 'sealed'")
    code, out, _ = cli("plan", "verify", "fibre-plan")
    assert code == 1
    assert out.splitlines()[0] == (
        "plan fibre-plan FAILED verification: the seal event is missing from the audit trail; "
        "a plan frozen here always has one"
    )
    # no receipt is issued for a plan that does not verify
    code, _, err = cli("plan", "receipt", "fibre-plan", "--receipt", "late.json")
    assert code == 4 and "failed verification (the seal event is missing" in err
    assert not (tmp_path / "late.json").exists()


def test_freeze_never_overwrites_a_file_and_writes_nothing_when_it_refuses(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    _setup(cli)
    (tmp_path / "fibre-plan.seal.json").write_text("someone else's file\n", encoding="utf-8")
    code, _, err = cli("plan", "freeze", "fibre-plan")
    assert (
        code == 2 and "the receipt file 'fibre-plan.seal.json' already exists and is never overwritten" in err
    )
    assert (tmp_path / "fibre-plan.seal.json").read_text("utf-8") == "someone else's file\n"
    assert _state(cli) == "draft"
    if hasattr(os, "symlink"):
        (tmp_path / "victim.txt").write_text("keep\n", encoding="utf-8")
        (tmp_path / "link.json").symlink_to(tmp_path / "victim.txt")
        code, _, err = cli("plan", "freeze", "fibre-plan", "--receipt", "link.json")
        assert code == 2 and "already exists" in err
        assert (tmp_path / "victim.txt").read_text("utf-8") == "keep\n"
    code, _, err = cli("plan", "freeze", "fibre-plan", "--receipt", str(tmp_path / "missing" / "r.json"))
    assert code == 2 and "cannot write in" in err and "check that it exists" in err
    assert _state(cli) == "draft"  # the freeze was rolled back with the failed receipt
    (tmp_path / "receipts").mkdir()
    code, out, err = cli("plan", "freeze", "fibre-plan", "--receipt", "receipts/../r.json")
    assert code == 0, err
    assert out.splitlines()[-1] == "seal receipt written to receipts/../r.json"
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".")]
    assert leftovers == []  # no temporary file is left behind


def test_receipt_command_rewrites_a_lost_receipt_and_never_overwrites(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    _setup(cli)
    assert cli("plan", "freeze", "fibre-plan", "--receipt", "first.json")[0] == 0
    code, out, err = cli("plan", "receipt", "fibre-plan")
    assert (code, out.strip()) == (0, "seal receipt of plan fibre-plan written to fibre-plan.seal.json"), err
    first = json.loads((tmp_path / "first.json").read_text("utf-8"))
    again = json.loads((tmp_path / "fibre-plan.seal.json").read_text("utf-8"))
    assert {k: v for k, v in first.items() if k != "written_at"} == {
        k: v for k, v in again.items() if k != "written_at"
    }
    before = (tmp_path / "first.json").read_bytes()
    code, out, _ = cli("plan", "receipt", "fibre-plan", "--receipt", "first.json")
    assert (code, out.strip()) == (0, "first.json already holds a receipt of this seal; left as it is")
    assert (tmp_path / "first.json").read_bytes() == before
    (tmp_path / "other.json").write_text("{}\n", encoding="utf-8")
    code, _, err = cli("plan", "receipt", "fibre-plan", "--receipt", "other.json")
    assert (
        code == 2 and "'other.json' already exists and holds something else; it is never overwritten" in err
    )
    assert (tmp_path / "other.json").read_text("utf-8") == "{}\n"


def test_export_replaces_a_link_instead_of_writing_through_it(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    _setup(cli)
    assert cli("plan", "freeze", "fibre-plan")[0] == 0
    (tmp_path / "victim.txt").write_text("keep\n", encoding="utf-8")
    (tmp_path / "copy.json").symlink_to(tmp_path / "victim.txt")
    code, out, err = cli("plan", "export", "fibre-plan", "--out", "copy.json")
    assert (code, out.strip()) == (0, "wrote copy.json"), err
    assert (tmp_path / "victim.txt").read_text("utf-8") == "keep\n"
    assert not (tmp_path / "copy.json").is_symlink()
    assert json.loads((tmp_path / "copy.json").read_text("utf-8"))["format"] == "ivdossier-frozen-plan/1"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []
    code, _, err = cli("plan", "export", "fibre-plan", "--out", "no-such-folder/copy.json")
    assert code == 2 and "cannot write 'no-such-folder/copy.json'" in err
