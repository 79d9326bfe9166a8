"""Stored runs read back as typed results: what the command printed is what the dossier finds later.

Runs stored by the first release (no typed record) are shown as stored, with a note that says so.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.jsonsafe import json_safe
from ivdossier.workflows.findings import finding
from ivdossier.workflows.runs import LEGACY_NOTE, LegacyResult, load_result


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(5)
    n = 800
    z = (rng.random(n) < 0.5).astype(int)
    u = rng.normal(size=n)
    d = ((0.9 * z + 0.5 * u + rng.normal(size=n)) > 0.4).astype(int)
    frame = pd.DataFrame({"y": d + u + rng.normal(size=n), "d": d, "z": z, "z2": z + rng.normal(size=n)})
    path = tmp_path / "s.csv"
    frame.to_csv(path, index=False)
    return path


def _stored(run_slug: str) -> tuple[str, dict]:  # type: ignore[type-arg]
    from ivdossier.cli.common import settings
    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run

    registry = open_registry(settings.db)
    try:
        with registry.reading() as session:
            run = records.get(session, Run, run_slug)
            return run.run_kind, dict(run.results or {})
    finally:
        registry.dispose()


@pytest.mark.parametrize(
    ("command", "check", "type_name"),
    [
        (("estimate", "--instrument", "z", "--instrument", "z2"), "over-identification", "EstimationResult"),
        (("falsify", "per-instrument", "--instrument", "z", "--instrument", "z2"), "per-instrument-estimates",
         "PerInstrumentResult"),
        (("sensitivity", "breakdown", "--instrument", "z"), "exclusion-sensitivity", "BreakdownResult"),
    ],
)  # fmt: skip
def test_a_stored_run_reads_back_typed_and_finds_what_the_command_printed(  # type: ignore[no-untyped-def]
    cli, data_file: Path, command: tuple[str, ...], check: str, type_name: str
) -> None:
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z")[0] == 0
    head = command[:1] if command[0] == "estimate" else command[:2]
    rest = command[len(head) :]
    code, out, err = cli(
        *head, "--data", str(data_file), "--outcome", "y", "--treatment", "d", *rest, "--attach", "zz"
    )
    assert code == 0, err
    slug = next(line.split()[3] for line in out.splitlines() if line.startswith("stored as run"))
    kind, results = _stored(slug)
    result = load_result(kind, results)
    assert type(result).__name__ == type_name
    view = json_safe(result.to_dict())
    assert view == {
        k: results[k] for k in view
    }  # the stored JSON view is rebuilt exactly from the typed result
    line = finding(check, results, kind)
    if command[0] != "estimate":
        assert f"{check}: {line}" in out  # the dossier's line is the line the command printed


def test_runs_from_the_first_release_load_as_a_legacy_view_with_a_note() -> None:
    old = {
        "beta": -0.6,
        "se": 0.1,
        "ci": [-0.8, -0.4],
        "F": "inf",
    }  # the shape in tests/fixtures/registry-0001
    result = load_result("estimate", old)
    assert isinstance(result, LegacyResult) and result.raw == old and result.note == LEGACY_NOTE
    assert finding("first-stage-strength", old, "estimate") == LEGACY_NOTE


def test_a_record_of_the_wrong_kind_is_refused() -> None:
    from ivdossier.vocabulary import NotApplicable

    with pytest.raises(InvalidInputError, match="a 'estimate' run holds a NotApplicable"):
        load_result("estimate", {"record": NotApplicable("x").to_record()})
