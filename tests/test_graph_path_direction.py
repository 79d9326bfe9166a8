"""Every surface that prints a path shows each arrow's real direction: the back-door path through a common cause
reads nearc4 ← geography → lwage (or nearc4 <- geography -> lwage in plain text), never as a forward chain, and a
directed exclusion path reads with forward arrows only. Checked on the terminal, its JSON, the diagram, both
dossier formats, the site and the plan."""

from __future__ import annotations

import json
import re
from pathlib import Path

ARROW = r"\s*(?:→|←|->|<-|-\\>|\\<-|&lt;-|-&gt;)\s*"
CHAIN = re.compile(rf"nearc4{ARROW}geography{ARROW}lwage")
LEFT = {"←", "<-", "\\<-", "&lt;-"}
RIGHT = {"→", "->", "-\\>", "-&gt;"}


def _arrows(text: str) -> list[tuple[str, str]]:
    """The two arrows of every printed nearc4 - geography - lwage chain."""
    out = []
    for m in CHAIN.finditer(text):
        parts = re.split(r"nearc4|geography|lwage", m.group(0))
        out.append((parts[1].strip(), parts[2].strip()))
    return out


def test_back_door_paths_show_each_arrows_direction_everywhere(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    assert (
        cli("program", "add", "card", "--title", "Schooling", "--treatment", "educ", "--outcome", "lwage")[0]
        == 0
    )
    args = ("--program", "card", "--name", "Near a 4-year college", "--family", "distance-geography")
    assert cli("instrument", "add", "nearc4", *args, "--column", "nearc4")[0] == 0
    assert cli("graph", "covariate", "card", "geography", "--unmeasured")[0] == 0
    assert cli("graph", "common-cause", "nearc4", "geography")[0] == 0

    surfaces: dict[str, str] = {}
    code, surfaces["graph check"], err = cli("graph", "check", "nearc4")
    assert code == 0, err
    code, surfaces["graph check --json"], _ = cli("graph", "check", "nearc4", "--json")
    data = json.loads(surfaces["graph check --json"])
    # the structured form: the arrows field says the first edge points into the instrument
    assert [(p["nodes"], p["arrows"]) for p in data["open_paths"]] == [
        (["nearc4", "geography", "lwage"], ["<-", "->"])
    ]
    assert cli("graph", "draw", "nearc4", "--out", str(tmp_path / "g.svg"))[0] == 0
    surfaces["diagram"] = (tmp_path / "g.svg").read_text(encoding="utf-8")
    for ext in ("md", "html"):
        assert cli("dossier", "nearc4", "--out", str(tmp_path / f"d.{ext}"))[0] == 0
        surfaces[f"dossier .{ext}"] = (tmp_path / f"d.{ext}").read_text(encoding="utf-8")
    assert cli("site", str(tmp_path / "site"))[0] == 0
    surfaces["site"] = "\n".join(p.read_text(encoding="utf-8") for p in (tmp_path / "site").rglob("*.html"))
    code, _, err = cli("plan", "draft", "card", "--slug", "p1", "--out", str(tmp_path / "plan.md"))
    assert code == 0, err
    surfaces["plan document"] = (tmp_path / "plan.md").read_text(encoding="utf-8")
    code, surfaces["plan --json"], _ = cli("plan", "show", "p1", "--json")

    for name, text in surfaces.items():
        chains = _arrows(text)
        assert chains, f"{name} shows no nearc4 - geography - lwage path"
        for first, second in chains:
            assert first in LEFT and second in RIGHT, f"{name} prints nearc4 {first} geography {second} lwage"
