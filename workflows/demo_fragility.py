"""The demo's fragility runs: the fibre instrument on a few-cluster subsample (ten postal districts), where the
wild bootstrap enumerates every sign vector and leaving one district out shows what the result rests on."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import pandas as pd

DISTRICTS = 10
INSTRUMENT = "fibre-wave"
SUBSAMPLE = "telehealth_10_districts.csv"


def few_district_subsample(frame: pd.DataFrame, districts: int = DISTRICTS) -> pd.DataFrame:
    """The patients of the first ``districts`` district codes (a deterministic few-cluster subsample)."""
    keep = sorted(frame["district"].unique())[:districts]
    return frame[frame["district"].isin(keep)].reset_index(drop=True)


def run_demo_fragility(
    registry: Any, frame: pd.DataFrame, data_dir: Path, actor: str, say: Callable[[str], None]
) -> list[str]:
    """Write the subsample next to the demo data, run the bootstrap and the influence analysis, attach both."""
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.demo import CONTROLS
    from ivdossier.workflows.fragility import run_fragility
    from ivdossier.workflows.runs import store_run

    path = Path(data_dir) / SUBSAMPLE
    few_district_subsample(frame).to_csv(path, index=False)
    spec = ModelSpec.build(
        outcome="ed_visits", treatment="telehealth", instruments=["fibre_months"], controls=CONTROLS,
        cluster="district", vcov="clustered",
    )  # fmt: skip
    jobs: list[tuple[str, dict[str, Any]]] = [
        ("fragility influence", {"null": 0.0}),
        ("fragility bootstrap", {"null": 0.0, "draws": 999, "seed": 2026, "pairs_draws": 199}),
    ]
    slugs = []
    for name, options in jobs:
        run = run_fragility(name, path, spec, **options)
        with registry.writing() as s:
            slugs.append(store_run(s, run, instrument=INSTRUMENT, actor=actor).slug)
    say(f"stored {len(slugs)} fragility runs for {INSTRUMENT} on {DISTRICTS} districts -> {path}")
    return slugs
