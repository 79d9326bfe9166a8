"""The dossier section "How fragile is the result", rendered from real attached fragility runs."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

BASE = ("--outcome", "y", "--treatment", "x", "--instrument", "z", "--control", "w", "--cluster", "district")


def _tsls(frame: pd.DataFrame) -> float:
    """2SLS by the normal equations (numpy), the brute-force reference for the refits below."""
    ones = np.ones(len(frame))
    xmat = np.column_stack([frame.x, ones, frame.w])
    zmat = np.column_stack([frame.z, ones, frame.w])
    xhat = zmat @ np.linalg.lstsq(zmat, xmat, rcond=None)[0]
    return float(np.linalg.solve(xhat.T @ xmat, xhat.T @ frame.y.to_numpy())[0])


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(5)
    n, g = 300, 8
    cl = rng.integers(0, g, n)
    z = rng.normal(size=n)
    u = rng.normal(size=n) + 0.4 * rng.normal(size=g)[cl]
    x = 0.9 * z + 0.5 * u + rng.normal(size=n)
    frame = pd.DataFrame({"y": 0.7 * x + u, "x": x, "z": z, "w": rng.normal(size=n),
                          "district": [f"area-{k}" for k in cl]})  # fmt: skip
    path = tmp_path / "d.csv"
    frame.to_csv(path, index=False)
    return path


def test_section_shows_the_jackknife_and_the_bootstrap_sets_beside_the_analytic_ones(  # type: ignore[no-untyped-def]
    cli, data_file: Path, tmp_path: Path
) -> None:
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z")[0] == 0
    out_md, out_html = tmp_path / "d.md", tmp_path / "d.html"
    code, _, err = cli("dossier", "zz", "--out", str(out_md))
    assert code == 0, err
    assert "How fragile is the result" not in out_md.read_text()  # no fragility run: no section
    for command in ("influence", "bootstrap"):
        code, _, err = cli("fragility", command, "--data", str(data_file), *BASE, "--attach", "zz")
        assert code == 0, err
    assert cli("dossier", "zz", "--out", str(out_md))[0] == 0
    assert cli("dossier", "zz", "--out", str(out_html))[0] == 0
    text = out_md.read_text()
    section = text[text.index("## How fragile is the result") : text.index("## Provenance")]
    frame = pd.read_csv(data_file)
    full = _tsls(frame)  # numpy normal equations
    refits = {k: _tsls(frame[frame.district != k]) for k in frame.district.unique()}  # brute-force refits
    worst = max(refits, key=lambda k: abs(refits[k] - full))
    assert f"largest change in the estimate: {abs(refits[worst] - full):.4g}".replace("-", "−") in section
    assert f"leaving out {worst}" in section
    assert (
        "B = 256 draws, rademacher weights by 8 clusters, every sign vector enumerated (exact)" in section
    )  # 2^8
    assert "| t test (2SLS) |" in section and "| Anderson–Rubin |" in section
    assert "Analytic 95 % set (clustered)" in section
    assert "cannot establish exclusion or exogeneity" in section
    page = out_html.read_text()
    figure = page[page.index('id="figure-leave-one-out"') :]
    assert figure.index("<svg") < figure.index("</figure>")  # the leave-one-out plot is drawn inline


def test_the_figure_draws_only_the_most_influential_rows_when_there_are_many() -> None:
    from ivdossier.estimation.influence import Deletion, InfluenceResult
    from ivdossier.reports.jackknife_plot import jackknife_svg, rows_shown

    dels = tuple(Deletion(f"c{i}", float(i), 1.0, (i - 1.0, i + 1.0), 0.5, 0.5, 10.0) for i in range(40))
    full = Deletion("", 0.0, 1.0, (-1.0, 1.0), 0.5, 0.5, 10.0)
    result = InfluenceResult(True, None, "cluster", "x", 0.0, 0.05, full, dels)
    shown = rows_shown(result, limit=30)
    assert [d.label for d in shown] == [f"c{i}" for i in range(10, 40)]  # the 30 farthest from 0, by estimate
    svg = jackknife_svg(result)
    assert svg.startswith("<svg") and svg == jackknife_svg(result)  # deterministic
