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
    """`--help` of the tool and of every command and group stays fast: command modules import the database,
    numerics and plotting libraries (and pydantic, which typer uses to check option values) only inside
    commands. The helps run one after another in one process, as `ivdossier ... --help` runs them."""
    import json
    import subprocess
    import sys

    probe = (
        "import json, sys, typer\n"
        "from ivdossier.cli.app import build_app, main\n"
        "paths = []\n"
        "def walk(cmd, path):\n"
        "    paths.append(path)\n"
        "    for name, sub in getattr(cmd, 'commands', {}).items():\n"
        "        walk(sub, [*path, name])\n"
        "walk(typer.main.get_command(build_app()), [])\n"
        "heavy = ('sqlalchemy', 'pydantic', 'pandas', 'numpy', 'scipy', 'statsmodels', 'matplotlib', 'networkx')\n"
        "out = []\n"
        "for path in paths:\n"
        "    sys.argv = ['ivdossier', *path, '--help']\n"
        "    try:\n        main()\n    except SystemExit as exc:\n        code = exc.code\n    else:\n        code = 0\n"
        "    out.append([' '.join(path), code, [m for m in heavy if m in sys.modules]])\n"
        "print('RESULT=' + json.dumps(out), file=sys.stderr)\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    line = next(x for x in done.stderr.splitlines() if x.startswith("RESULT="))
    results = json.loads(line[len("RESULT=") :])
    assert len(results) > 90  # the root, every group and every command
    assert {"", "program list", "run show", "plan freeze", "estimate", "site"} <= {
        cmd for cmd, _, _ in results
    }
    assert [(cmd, code) for cmd, code, _ in results if code] == []
    assert [(cmd, loaded) for cmd, _, loaded in results if loaded] == []


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


def test_the_table_of_command_modules_matches_what_each_module_registers() -> None:
    """`ivdossier X` loads only the module that registers X, so the table in cli/app.py must name it exactly."""
    from ivdossier.cli.app import COMMAND_MODULES, build_app

    full = list(typer.main.get_command(app).commands)  # type: ignore[attr-defined]
    assert sorted(full) == sorted(c for commands in COMMAND_MODULES.values() for c in commands)
    for module, commands in COMMAND_MODULES.items():
        alone = typer.main.get_command(build_app((module,)))
        assert sorted(alone.commands) == sorted(commands), module  # type: ignore[attr-defined]


def test_the_command_word_is_found_after_the_root_options() -> None:
    from ivdossier.cli.app import command_modules

    assert command_modules(["--db", "run", "--as", "x", "--debug", "run", "list"]) == ("run_cmds",)
    assert command_modules(["--db=r.sqlite", "instrument", "show", "plan"]) == ("entities",)
    assert command_modules(["--help"]) is None  # the root help lists every command
    assert command_modules(["no-such-command"]) is None  # click's "did you mean" sees every command


# Modules no registry listing or show may import: numerics, statistics, plotting, the estimation layer, networkx
# (a test-only reference: `graph show` builds each instrument's graph with threats_catalog/dag.py), and pydantic
# (typer builds its option checks with it only for values that need more than text; cli/app.py).
# On a SQLite registry SQLAlchemy's PostgreSQL dialect stays unloaded too.
FORBIDDEN = (
    "pydantic",
    "numpy",
    "pandas",
    "scipy",
    "statsmodels",
    "matplotlib",
    "ivdossier.estimation",
    "networkx",
    "sqlalchemy.dialects.postgresql",
)
READ_COMMANDS = (
    ("program", "list"),
    ("program", "show", "telehealth-ed"),
    ("instrument", "list"),
    ("instrument", "list", "--json"),
    ("instrument", "show", "fibre-wave"),
    ("instrument", "show", "fibre-wave", "--json"),
    ("member", "list"),
    ("member", "show", "amara"),
    ("link", "list", "fibre-wave"),
    ("link", "show", "fibre-wave--an-e01"),
    ("comment", "list", "fibre-wave"),
    ("threat", "list"),
    ("threat", "show", "AN-E01"),
    ("threat", "suggest", "fibre-wave"),
    ("family", "list"),
    ("study", "list"),
    ("study", "show", "ferreira2024fibre"),
    ("plan", "list"),
    ("plan", "show", "fibre-wave-plan"),
    ("run", "list"),
    ("run", "list", "--json"),
    ("run", "show", "fibre-wave-estimate-3"),
    ("run", "show", "fibre-wave-sensitivity-1"),
    ("run", "show", "fibre-wave-falsify-placebo-1"),
    ("run", "show", "fibre-wave-compliers-1"),
    ("run", "show", "fibre-wave-power-1"),
    ("history", "fibre-wave"),
    ("review", "fibre-wave"),
    ("graph", "show", "telehealth-ed"),
)


def test_every_registry_listing_and_show_loads_no_numerics(tmp_path: Path) -> None:
    """Each listing and show command, run as `ivdossier` runs it, imports none of FORBIDDEN; the probe names the
    first command that does (commands run one after another in one process, so later ones inherit its imports)."""
    import json
    import subprocess
    import sys

    from ivdossier.workflows.demo import build_demo

    demo = tmp_path / "demo"
    build_demo(demo)
    db = str(demo / "ivdossier.sqlite")
    draft = subprocess.run(
        [sys.executable, "-m", "ivdossier.cli", "--db", db, "--as", "amara", "plan", "draft", "fibre-wave"],
        capture_output=True,
        text=True,
    )
    assert draft.returncode == 0, draft.stderr
    probe = (
        "import json, sys\n"
        "from ivdossier.cli.app import main\n"
        f"forbidden = {FORBIDDEN!r}\n"
        "out = []\n"
        f"for argv in {READ_COMMANDS!r}:\n"
        f"    sys.argv = ['ivdossier', '--db', {db!r}, *argv]\n"
        "    try:\n        main()\n    except SystemExit as exc:\n        code = exc.code\n    else:\n        code = 0\n"
        "    loaded = [m for m in forbidden if m in sys.modules]\n"
        "    out.append([' '.join(argv), code, loaded])\n"
        "print('RESULT=' + json.dumps(out), file=sys.stderr)\n"
    )
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    line = next(x for x in done.stderr.splitlines() if x.startswith("RESULT="))
    results = json.loads(line[len("RESULT=") :])
    assert [(cmd, code) for cmd, code, _ in results if code] == []  # every command ran
    assert [(cmd, loaded) for cmd, _, loaded in results if loaded] == []
