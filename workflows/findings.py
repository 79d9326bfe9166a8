"""One-line findings: what a stored run says about each catalogue check, read from its typed result.

The lines themselves live in the table of analyses (``workflows/analyses.py``); this module finds the entry for
a stored run and applies it.
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache
from typing import Any

from ivdossier.workflows.analyses import ANALYSES, analysis_of_result

Results = Mapping[str, Any]


@lru_cache(maxsize=256)
def run_kind_for_command(command: str) -> str:
    """The run kind stored by the analyses a catalogue command names ("ivdossier falsify balance" ->
    "falsify-balance"; "ivdossier sensitivity" -> "sensitivity", shared by its three subcommands).
    Remembered: the table of analyses is fixed when the module loads, and a site asks for every check of every
    link."""
    name = command.removeprefix("ivdossier ")
    kinds = {a.run_kind for a in ANALYSES.values() if a.name == name or a.name.startswith(name + " ")}
    if len(kinds) != 1:
        raise KeyError(f"no single run kind for the command {command!r}: {sorted(kinds)}")
    return kinds.pop()


def finding_of(check: str, result: Any, run_kind: str) -> str:
    """What a typed result says for one catalogue check, in one line."""
    from ivdossier.workflows.runs import LegacyResult

    if isinstance(result, LegacyResult):
        return result.note
    entry = analysis_of_result(run_kind, result)
    if entry is None:
        return f"no analysis in the table stores a {type(result).__name__} as a {run_kind!r} run"
    finder = entry.findings.get(check)
    if finder is None:
        return f"`{entry.command}` does not speak to {check}"
    return finder(result)


def finding(check: str, results: Results, run_kind: str | None = None) -> str:
    """What a stored run's results say for one catalogue check, in one line (the run kind is read from the
    stored record when not given)."""
    from ivdossier.workflows.runs import load_result

    kind = run_kind
    if kind is None:
        kind = next(
            (a.run_kind for a in ANALYSES.values() if check in a.findings),
            "",
        )
    return finding_of(check, load_result(kind, results), kind)
