"""Every command has help text and is documented in the README; .ci/run calls the README's test command."""

from __future__ import annotations

from pathlib import Path

import typer

from ivdossier.cli.app import app

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _commands() -> list[tuple[str, object]]:
    group = typer.main.get_command(app)
    out = []
    for name, cmd in group.commands.items():  # type: ignore[attr-defined]
        out.append((name, cmd))
        for sub, subcmd in getattr(cmd, "commands", {}).items():
            out.append((f"{name} {sub}", subcmd))
    return out


def test_every_command_has_help_text() -> None:
    missing = [name for name, cmd in _commands() if not (getattr(cmd, "help", None) or "").strip()]
    assert missing == []


def test_every_top_level_command_is_in_the_readme() -> None:
    names = sorted({name.split()[0] for name, _ in _commands()})
    assert [n for n in names if f"ivdossier {n}" not in README] == []


def test_ci_runs_the_readme_test_command_verbatim() -> None:
    command = "python3 scripts/run_tests.py"
    assert command in README
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert any(line.strip() == command for line in ci.splitlines())


def test_help_imports_no_database_or_numerics_libraries() -> None:
    """`ivdossier --help` stays fast because command modules import heavy libraries only inside commands."""
    import subprocess
    import sys

    probe = (
        "import sys, ivdossier.cli.app\n"
        "heavy = [m for m in ('sqlmodel', 'sqlalchemy', 'pandas', 'numpy', 'scipy', 'statsmodels', 'matplotlib',"
        " 'networkx') if m in sys.modules]\n"
        "print(','.join(heavy))"
    )
    out = subprocess.run(
        [sys.executable, "-c", probe], capture_output=True, text=True, check=True
    ).stdout.strip()
    assert out == ""


def test_catalogue_listing_loads_no_numerics(tmp_path: Path) -> None:
    """`threat list` reads the registry only: the estimation stack (numpy, scipy, pandas) is never imported."""
    import subprocess
    import sys

    db = str(tmp_path / "r.sqlite")
    probe = (
        "import sys\n"
        "from ivdossier.cli.app import main\n"
        f"sys.argv = ['ivdossier', '--db', {db!r}, 'threat', 'list', '--json']\n"
        "try:\n    main()\nexcept SystemExit:\n    pass\n"
        "heavy = [m for m in ('pandas', 'scipy', 'statsmodels', 'matplotlib', 'ivdossier.estimation') "
        "if m in sys.modules]\n"
        "print('HEAVY=' + ','.join(heavy), file=sys.stderr)"
    )
    init = subprocess.run(
        [sys.executable, "-m", "ivdossier.cli", "--db", db, "init"], capture_output=True, text=True
    )
    assert init.returncode == 0, init.stderr
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert "HEAVY=\n" in done.stderr or done.stderr.rstrip().endswith("HEAVY="), done.stderr[-500:]
