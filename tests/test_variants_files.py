"""`variants` reads a per-variant table saved as CSV, TSV (also gzip-compressed) or .txt with its delimiter sniffed;
a file whose delimiter does not match its extension, or an unknown extension, gets one clear error and nothing is
stored."""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(31)
    m = 10
    bx = rng.uniform(0.05, 0.2, m)
    return pd.DataFrame(
        {"variant": [f"rs{i}" for i in range(m)], "exposure_effect": bx, "exposure_se": 0.01,
         "outcome_effect": 0.25 * bx + rng.normal(0, 0.01, m), "outcome_se": rng.uniform(0.008, 0.012, m)}
    )  # fmt: skip


def _ivw(cli, path: Path) -> float:  # type: ignore[no-untyped-def]
    code, out, err = cli("variants", "--data", str(path), "--draws", "20", "--json")
    assert code == 0, err
    return float(json.loads(out)["ivw"]["estimate"])


def test_csv_tsv_gzip_and_sniffed_text_give_the_same_ivw(cli, frame: pd.DataFrame, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    import statsmodels.api as sm

    frame.to_csv(tmp_path / "v.csv", index=False)
    frame.to_csv(tmp_path / "v.tsv", index=False, sep="\t")
    frame.to_csv(tmp_path / "v.txt", index=False, sep="\t")
    with gzip.open(tmp_path / "v.tsv.gz", "wt") as handle:
        frame.to_csv(handle, index=False, sep="\t")
    # IVW is the weighted regression of outcome on exposure effects through the origin (statsmodels WLS)
    wls = sm.WLS(frame.outcome_effect, frame.exposure_effect, weights=frame.outcome_se**-2).fit()
    expected = float(wls.params.iloc[0])
    for name in ("v.csv", "v.tsv", "v.txt", "v.tsv.gz"):
        assert _ivw(cli, tmp_path / name) == pytest.approx(expected, rel=1e-10), name


def test_a_delimiter_that_does_not_match_the_extension_is_refused_and_nothing_is_stored(
    cli, frame: pd.DataFrame, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "g", "--program", "p", "--name", "Variants")[0] == 0
    frame.to_csv(tmp_path / "tabs.csv", index=False, sep="\t")
    code, _, err = cli("variants", "--data", str(tmp_path / "tabs.csv"), "--attach", "g")
    assert code != 0
    assert err.strip() == (
        f"error: Cannot read {str(tmp_path / 'tabs.csv')!r}: a .csv file is comma-separated, but its header row "
        "is tab-separated; rename it to .tsv or save it with commas."
    )
    frame.to_csv(tmp_path / "v.xlsx", index=False)
    code, _, err = cli("variants", "--data", str(tmp_path / "v.xlsx"))
    assert code != 0
    assert "unknown extension '.xlsx'; use .csv, .tsv or .txt (optionally .gz)." in err
    code, out, _ = cli("run", "list", "--json")
    assert code == 0 and json.loads(out) == []
