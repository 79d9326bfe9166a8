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
