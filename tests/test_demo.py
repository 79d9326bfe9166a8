"""The demo builds end to end, refuses to clobber folders, and leaves a registry the CLI reads back."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.workflows.demo import build_demo
from ivdossier.workflows.demo_data import TRUE_EFFECT, simulate_telehealth


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "out"
    build_demo(out, actor="tester")
    return out


def test_demo_writes_data_registry_dossiers_and_site(demo_dir: Path) -> None:
    assert (demo_dir / "data" / "telehealth.csv").exists()
    assert (demo_dir / "data" / "telehealth.parquet").exists()
    for slug in ("fibre-wave", "clerk-video-rate", "mast-distance"):
        assert (demo_dir / "dossiers" / f"{slug}.md").read_text(encoding="utf-8").startswith("# ")
        assert "<svg" in (demo_dir / "dossiers" / f"{slug}.html").read_text(encoding="utf-8")
    assert (demo_dir / "site" / "index.html").exists()


def test_demo_registry_reads_back_through_the_cli(demo_dir: Path, cli) -> None:  # type: ignore[no-untyped-def]
    db = str(demo_dir / "ivdossier.sqlite")
    code, out, _ = cli("--db", db, "instrument", "list", "--json")  # the last --db wins
    assert code == 0
    assert sorted(i["slug"] for i in json.loads(out)) == ["clerk-video-rate", "fibre-wave", "mast-distance"]


def test_planted_exclusion_violation_is_not_reported_as_holding(demo_dir: Path) -> None:
    text = (demo_dir / "dossiers" / "clerk-video-rate.md").read_text(encoding="utf-8")
    glance = text.split("## At a glance", 1)[1].split("\n## ", 1)[0]
    exclusion = next(line for line in glance.splitlines() if line.startswith("| Exclusion"))
    assert "| ■ broken |" in exclusion or "| ▲ at risk |" in exclusion


def test_demo_refuses_a_non_empty_folder_and_never_clears_foreign_files(tmp_path: Path) -> None:
    (tmp_path / "keep.txt").write_text("mine", encoding="utf-8")
    with pytest.raises(InvalidInputError, match="already exists and is not empty; pass --replace"):
        build_demo(tmp_path)
    with pytest.raises(InvalidInputError, match="holds files that the demo did not write"):
        build_demo(tmp_path, replace=True)
    assert (tmp_path / "keep.txt").read_text(encoding="utf-8") == "mine"


def test_simulation_is_seeded_and_plants_what_it_says() -> None:
    a, b = simulate_telehealth(n=2000), simulate_telehealth(n=2000)
    assert a.equals(b)
    # Nobody without a device adopts telehealth: the zero-first-stage subgroup exists by construction.
    assert a.loc[a.has_device == 0, "telehealth"].max() == 0
    assert TRUE_EFFECT == -0.6


def test_clerk_instrument_is_built_from_the_case_level_assignments(demo_dir: Path) -> None:
    import hashlib

    import numpy as np
    import pandas as pd

    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run
    from ivdossier.workflows.demo import CLERK_DESIGN_FILE, CLERK_SHARE
    from ivdossier.workflows.demo_data import CLINICS

    derived_path = demo_dir / "data" / CLERK_DESIGN_FILE
    frame = pd.read_csv(derived_path)
    # every clerk works for one clinic: the rota randomises within clinics, the cells the measure absorbs
    assert (frame.groupby("clerk")["clinic"].nunique() == 1).all() and frame["clinic"].nunique() == CLINICS
    # brute force, one patient at a time: residual of telehealth on the clinic means, averaged over the clerk's
    # other patients (the definition of the leave-one-out measure within cells)
    resid = frame["telehealth"] - frame.groupby("clinic")["telehealth"].transform("mean")
    for i in np.random.default_rng(0).choice(len(frame), 25, replace=False):
        others = (frame["clerk"] == frame["clerk"][i]) & (frame.index != i)
        assert frame[CLERK_SHARE][i] == pytest.approx(resid[others].mean(), rel=1e-9, abs=1e-12)
    registry = open_registry(str(demo_dir / "ivdossier.sqlite"))
    try:
        with registry.reading() as s:
            run = records.get(s, Run, "clerk-video-rate-design-decision-makers-1")
            results = dict(run.results or {})
    finally:
        registry.dispose()
    derived = results["derived_data"]  # the recipe and fingerprint of the derived column, in the run
    assert derived["column"] == CLERK_SHARE and derived["recipe"]["absorb"] == ["clinic"]
    assert derived["sha256"] == hashlib.sha256(derived_path.read_bytes()).hexdigest()
    # the relief clerks (last on each rota) and only they have fewer than 20 cases (simulation design)
    counts = frame.groupby("clerk").size()
    assert sorted(results["propensity"]["small"]) == sorted(str(c) for c in counts.index[counts < 20])
    assert {int(c) % 10 for c in results["propensity"]["small"]} == {9}


def test_clerk_dossier_shows_the_leave_out_design_and_the_planted_violation(demo_dir: Path) -> None:
    text = (demo_dir / "dossiers" / "clerk-video-rate.md").read_text(encoding="utf-8")
    section = text.split("## Decision-maker design", 1)[1].split("\n## ", 1)[0]
    assert "clerk_video_share = mean of the residual of 'telehealth'" in section
    assert "Flagged: 8 decision-maker(s) with fewer than 20 cases" in section
    assert "2SLS with the leave-out measure as the one instrument: " in section
    for estimator in ("| 2SLS |", "| JIVE1 |", "| UJIVE |"):
        assert estimator in section
    # the follow-up path reaches the outcome from every clerk: no single effect fits all clerks' data
    assert "95% set empty" in section and "no single effect fits every decision-maker's data" in section
    assert str(demo_dir) not in section  # the derived file is named, not its absolute path
