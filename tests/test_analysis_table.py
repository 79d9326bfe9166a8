"""The table of analyses ties each catalogue check to the command that runs it and to its one-line finding.

Renaming a command, dropping an entry or adding a check without an analysis fails here, so no dossier can
silently lose the findings under its threats.
"""

from __future__ import annotations

import typer
from typer.main import get_command

from ivdossier.cli.app import app
from ivdossier.jsonsafe import record_types
from ivdossier.threats_catalog.checks import CHECKS, COMMANDS
from ivdossier.workflows.analyses import ANALYSES
from ivdossier.workflows.findings import run_kind_for_command


def _command_paths(group: typer.Typer) -> set[str]:
    """Every command path of the CLI ("falsify balance", "estimate", ...), read from the click tree."""
    root = get_command(group)
    paths: set[str] = set()

    def walk(cmd: object, prefix: str) -> None:
        subs = getattr(cmd, "commands", None)
        if subs is None:
            paths.add(prefix)
            return
        for name, sub in subs.items():
            walk(sub, f"{prefix} {name}".strip())

    walk(root, "")
    return paths


# Checks answered by a registry workflow rather than by an analysis of data: comparing runs with a frozen plan
# (the catalogue's specification-search threats point at it).
WORKFLOW_COMMANDS = {"ivdossier plan compare"}
ANALYSED = {n: c for n, c in CHECKS.items() if c.computable and c.command not in WORKFLOW_COMMANDS}


def test_every_catalogue_check_is_answered_by_an_analysis_and_every_answer_is_a_catalogue_check() -> None:
    answered = {check for entry in ANALYSES.values() for check in entry.checks}
    assert answered == set(ANALYSED)


def test_checks_outside_the_table_are_workflows_or_declared_not_computable() -> None:
    paths = _command_paths(app)
    for name, check in CHECKS.items():
        if name in ANALYSED:
            continue
        if check.computable:
            assert check.command.removeprefix("ivdossier ") in paths, name
        else:
            assert check.command == "" and check.note, name  # says what to do by hand instead


def test_each_check_is_answered_by_the_command_the_catalogue_names() -> None:
    for name, check in ANALYSED.items():
        # the catalogue names the command or its group ("ivdossier sensitivity" for "sensitivity range");
        # other analyses may also speak to a check (per-instrument prints the J test), but these must
        named = [
            a
            for a in ANALYSES.values()
            if a.command == check.command or a.command.startswith(check.command + " ")
        ]
        assert named and all(name in a.checks for a in named), name
        # the dossier finds the runs of a check by the kind its command stores
        assert {a.run_kind for a in named} == {run_kind_for_command(check.command)}


def test_every_analysis_is_a_command_of_the_cli_and_every_evidence_command_is_an_analysis() -> None:
    paths = _command_paths(app)
    assert set(ANALYSES) <= paths, sorted(set(ANALYSES) - paths)
    catalogue = {c.removeprefix("ivdossier ") for c in COMMANDS if c and c not in WORKFLOW_COMMANDS}
    evidence = {p for p in paths if any(p == c or p.startswith(c + " ") for c in catalogue)}
    assert evidence <= set(ANALYSES), sorted(evidence - set(ANALYSES))
    # an analysis outside the catalogue's commands answers no catalogue check (fragility bootstrap, subvector)
    uncatalogued = [a for name, a in ANALYSES.items() if name not in evidence]
    assert all(not a.checks for a in uncatalogued), [a.name for a in uncatalogued if a.checks]


def test_every_analysis_returns_a_stored_record_type() -> None:
    for entry in ANALYSES.values():
        cls = entry.result_class  # imports the module that defines it
        assert record_types()[cls.__name__] is cls, entry.name
