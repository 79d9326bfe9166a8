"""`plan compare`: runs of an instrument the plan does not cover are refused; the terminal shows whole values and
yes/no, never Python reprs or cut-off lists."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import create_engine, text

LONG_CONTROLS = [f"household_income_quintile_{i}_at_enrolment" for i in range(1, 5)]


def _data(path: Path) -> Path:
    rng = np.random.default_rng(5)
    n = 500
    z, z2, u = rng.normal(size=n), rng.normal(size=n), rng.normal(size=n)
    x = 0.8 * z + 0.6 * z2 + u + rng.normal(size=n)
    frame = {"y": -0.5 * x + u + rng.normal(size=n), "x": x, "z": z, "z2": z2, "z3": rng.normal(size=n)}
    frame.update({c: rng.normal(size=n) for c in LONG_CONTROLS})
    pd.DataFrame(frame).to_csv(path, index=False)
    return path


def _setup(cli, tmp_path: Path) -> Path:  # type: ignore[no-untyped-def]
    assert cli("init")[0] == 0
    assert (
        cli("program", "add", "tele", "--title", "Telehealth", "--treatment", "x", "--outcome", "y")[0] == 0
    )
    for slug, column in (("fibre", "z"), ("clerk", "z2")):
        assert cli("instrument", "add", slug, "--program", "tele", "--name", slug, "--column", column)[0] == 0
    return _data(tmp_path / "tele.csv")


def _run(cli, data: Path, instrument: str, column: str, *extra: str) -> str:  # type: ignore[no-untyped-def]
    code, out, err = cli("estimate", "--data", str(data), "--outcome", "y", "--treatment", "x", "--instrument",
                         column, "--json", "--attach", instrument, *extra)  # fmt: skip
    assert code == 0, err
    return str(json.loads(out)["run"])


def test_compare_refuses_runs_of_an_instrument_the_plan_does_not_cover(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, sqlite_path: str
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    data = _setup(cli, tmp_path)
    assert cli("plan", "draft", "fibre")[0] == 0  # an instrument plan
    assert cli("plan", "draft", "tele")[0] == 0  # a program plan: covers fibre and clerk
    fibre, clerk = _run(cli, data, "fibre", "z"), _run(cli, data, "clerk", "z2")
    code, _, err = cli("plan", "compare", "fibre-plan", fibre, clerk)
    assert code == 2
    assert (
        f"plan 'fibre-plan' covers fibre; these runs are of another instrument: {clerk} (instrument clerk)"
        in err
    )
    code, out, err = cli("plan", "compare", "tele-plan", fibre, clerk, "--json")
    assert code == 0, err
    assert [r["matched_spec"] for r in json.loads(out)["runs"]] == ["fibre", "clerk"]
    # an instrument added after the program plan was drafted is not covered by it
    assert cli("instrument", "add", "late", "--program", "tele", "--name", "late", "--column", "z3")[0] == 0
    late = _run(cli, data, "late", "z3")
    code, _, err = cli("plan", "compare", "tele-plan", late)
    assert (
        code == 2
        and f"plan 'tele-plan' covers clerk, fibre; these runs are of another instrument: {late}" in err
    )
    # a run attached to no instrument (stored by a library caller, or an older registry) is compared, with a note
    loose = _run(cli, data, "fibre", "z")
    engine = create_engine(f"sqlite:///{sqlite_path}")
    with engine.begin() as conn:
        conn.execute(text("UPDATE run SET instrument_id = NULL WHERE slug = :s"), {"s": loose})
    engine.dispose()
    code, out, err = cli("plan", "compare", "fibre-plan", loose)
    assert code == 0, err
    assert (
        f"note: run {loose} is attached to no instrument, so it cannot be confirmed to belong to this plan"
        in out
    )


def test_compare_prints_whole_lists_and_yes_or_no(
    cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    data = _setup(cli, tmp_path)
    assert cli("plan", "draft", "fibre")[0] == 0
    extra = [arg for c in LONG_CONTROLS for arg in ("--control", c)]
    run = _run(cli, data, "fibre", "z", *extra)
    code, out, err = cli("plan", "compare", "fibre-plan", run)
    assert code == 0, err
    assert json.dumps(sorted(LONG_CONTROLS)) in out  # the whole list of controls, not cut off
    assert "…" not in out
    assert "True" not in out and "False" not in out and "None" not in out
    code, js, _ = cli("plan", "compare", "fibre-plan", run, "--json")
    rules = json.loads(js)["runs"][0]["decision_rules"]
    holds = {r["rule"]: r["holds"] for r in rules}
    lines = {ln.split()[1]: ln for ln in out.splitlines() if ln.startswith(run)}
    for rule, value in holds.items():
        word = "not evaluable" if value is None else ("yes" if value else "no")
        assert lines[rule].split()[2:4][0] == word.split()[0], lines[rule]
    gate = lines["strength-gate"]
    assert (
        "strength.effective_f.statistic = " in gate
        and "(strength.effective_f.critical_values.tau_10pct)" in gate
    )
