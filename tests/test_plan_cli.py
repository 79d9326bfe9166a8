"""`ivdossier plan ...`: draft, edit, freeze, read-only, export, verify (row and copies) and compare with runs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd


def _data(path: Path) -> Path:
    rng = np.random.default_rng(11)
    n = 600
    z, u, w = rng.normal(size=n), rng.normal(size=n), rng.normal(size=n)
    x = 0.7 * z + u + rng.normal(size=n)
    pd.DataFrame({"y": -0.6 * x + u + 0.2 * w, "x": x, "z": z, "w": w, "age": rng.normal(size=n)}).to_csv(
        path, index=False
    )
    return path


def _setup(cli, tmp_path: Path) -> Path:  # type: ignore[no-untyped-def]
    assert cli("init")[0] == 0
    assert cli("program", "add", "tele", "--title", "Telehealth <b>and</b> ED", "--treatment", "x",
               "--outcome", "y")[0] == 0  # fmt: skip
    assert cli("instrument", "add", "fibre", "--program", "tele", "--name", "Fibre wave", "--column", "z",
               "--exclusion", "Only *through* video visits.")[0] == 0  # fmt: skip
    return _data(tmp_path / "tele.csv")


def _run(cli, data: Path, *extra: str) -> str:  # type: ignore[no-untyped-def]
    code, out, err = cli("estimate", "--data", str(data), "--outcome", "y", "--treatment", "x", "--instrument", "z",
                         "--attach", "fibre", "--json", *extra)  # fmt: skip
    assert code == 0, err
    return str(json.loads(out)["run"])


def test_plan_life_cycle(cli, tmp_path: Path, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)  # the seal receipt goes to the current folder by default
    data = _setup(cli, tmp_path)
    draft_md = tmp_path / "draft.md"
    code, out, err = cli("plan", "draft", "fibre", "--control", "w", "--n", "600", "--expected-f", "40",
                         "--outcome-sd", "1.5", "--treatment-sd", "0.45", "--effect", "0.3", "--out", str(draft_md))  # fmt: skip
    assert (code, out.strip()) == (0, "plan fibre-plan drafted for fibre"), err
    text = draft_md.read_text("utf-8")
    assert "**Draft — not sealed.**" in text
    assert "Telehealth \\<b>and\\</b> ED" in text  # user text escaped ("<" opens no tag), never raw HTML
    assert "Only \\*through\\* video visits." in text
    assert "## Power and minimum detectable effect" in text and "Minimum detectable effect" in text
    assert "Statistics cannot establish exclusion or exogeneity." in text

    rules = [{"id": "gate", "when": {"statistic": "strength.effective_f.statistic", "op": ">=", "value": 23.1},
              "then": "t-inference", "otherwise": "AR set"}]  # fmt: skip
    (tmp_path / "rules.json").write_text(json.dumps(rules), encoding="utf-8")
    code, out, err = cli("plan", "edit", "fibre-plan", "--rules", str(tmp_path / "rules.json"))
    assert code == 0, err
    code, out, err = cli("plan", "freeze", "fibre-plan")
    assert code == 0, err
    first, second, third = out.splitlines()
    assert first.startswith("plan fibre-plan frozen at ") and first.endswith(" by tester")
    sha = second.removeprefix("sha256 ")
    assert len(sha) == 64
    assert third == "seal receipt written to fibre-plan.seal.json"
    assert json.loads((tmp_path / "fibre-plan.seal.json").read_text("utf-8"))["sha256"] == sha

    code, _, err = cli("plan", "edit", "fibre-plan", "--title", "Changed")
    assert code == 4 and "plan 'fibre-plan' is frozen" in err and "cannot be changed" in err

    copy_json, copy_md = tmp_path / "plan.json", tmp_path / "plan.md"
    assert cli("plan", "export", "fibre-plan", "--out", str(copy_json))[0] == 0
    assert cli("plan", "export", "fibre-plan", "--out", str(copy_md))[0] == 0
    code, out, _ = cli("plan", "verify", "fibre-plan", "--file", str(copy_md))
    assert (code, out.strip()) == (0, f"plan fibre-plan is intact (sha256 {sha}); {copy_md} matches")
    code, out, _ = cli("plan", "verify", "fibre-plan", "--file", str(copy_json), "--json")
    assert code == 0 and json.loads(out)["intact"] is True

    lines = copy_md.read_text("utf-8").splitlines()
    target = next(i for i, ln in enumerate(lines) if "t-inference" in ln)
    lines[target] = lines[target].replace("t-inference", "t-inference always")
    copy_md.write_text("\n".join(lines) + "\n", encoding="utf-8")
    code, out, _ = cli("plan", "verify", "fibre-plan", "--file", str(copy_md), "--json")
    assert code == 1
    report = json.loads(out)
    assert [(d["where"], d["path"]) for d in report["differences"]] == [
        ("exported file", f"line {target + 1}")
    ]
    assert "always" in report["differences"][0]["found"]

    sealed = json.loads(copy_json.read_text("utf-8"))
    sealed["sealed"]["content"]["decision_rules"][0]["when"]["value"] = 10
    copy_json.write_text(json.dumps(sealed), encoding="utf-8")
    code, out, _ = cli("plan", "verify", "fibre-plan", "--file", str(copy_json))
    assert code == 1
    assert "content.decision_rules[0].when.value" in out and "23.1" in out

    on_plan = _run(cli, data, "--control", "w")
    off_plan = _run(cli, data, "--control", "w", "--control", "age", "--vcov", "homoskedastic")
    code, out, err = cli("plan", "compare", "fibre-plan", on_plan, off_plan, "--json")
    assert code == 0, err
    result = json.loads(out)
    by_run = {r["run"]: r for r in result["runs"]}
    assert by_run[on_plan]["deviations"] == []
    assert {(d["field"], str(d["actual"])) for d in by_run[off_plan]["deviations"]} == {
        ("controls", "['age', 'w']"),
        ("vcov", "homoskedastic"),
    }
    gate = by_run[on_plan]["decision_rules"][0]
    assert gate["rule"] == "gate" and gate["holds"] in (True, False)
    assert gate["action"] == ("t-inference" if gate["holds"] else "AR set")
    code, out, _ = cli("plan", "compare", "fibre-plan", off_plan)
    assert code == 0 and "plan fibre-plan (frozen): 2 deviation(s) in 1 run(s)" in out


def test_plan_errors(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli, tmp_path)
    code, _, err = cli("plan", "draft", "nothing")
    assert code == 3 and "no program or instrument named 'nothing'" in err
    code, _, err = cli("plan", "draft", "fibre", "--n", "500", "--expected-f", "20")
    assert (
        code == 2 and "power needs --n, one of --expected-f or --partial-r2, and one of --outcome-sd" in err
    )
    code, _, err = cli("plan", "draft", "fibre", "--n", "500", "--expected-f", "20", "--outcome-sd", "2")
    assert code == 2 and "power needs --treatment-sd" in err and "never assumed" in err  # no silent SD of 1
    assert cli("plan", "draft", "tele")[0] == 0
    code, _, err = cli("plan", "verify", "tele-plan")
    assert code == 2 and "is a draft; only frozen plans can be verified" in err
    code, _, err = cli("plan", "export", "tele-plan", "--out", str(tmp_path / "p.txt"))
    assert code == 2 and "must end in .md, .html, .json" in err
    (tmp_path / "bad.json").write_text('[{"id": "r", "when": {"statistic": "x", "op": "~", "value": 1}, '
                                       '"then": "a", "otherwise": "b"}]', encoding="utf-8")  # fmt: skip
    code, _, err = cli("plan", "edit", "tele-plan", "--rules", str(tmp_path / "bad.json"))
    assert code == 2 and "decision rule 'r': when: op '~' is not known" in err
    code, out, _ = cli("plan", "show", "tele-plan")
    assert code == 0 and out.startswith("# Pre-analysis plan: Telehealth")


def test_a_plan_lists_team_edges_with_their_scope(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli, tmp_path)
    assert (
        cli("instrument", "add", "mast", "--program", "tele", "--name", "Mast", "--column", "mast_km")[0] == 0
    )
    for name in ("region", "income"):
        assert cli("graph", "covariate", "tele", name)[0] == 0
    assert cli("graph", "edge", "add", "tele", "region", "y")[0] == 0  # program-wide
    code, _, err = cli("graph", "edge", "add", "tele", "income", "mast_km", "--instrument", "mast")
    assert code == 0, err
    assert cli("plan", "draft", "tele", "--slug", "whole")[0] == 0
    assert cli("plan", "draft", "fibre", "--slug", "one")[0] == 0
    whole = json.loads(cli("plan", "show", "whole", "--json")[1])
    edges = whole["content"]["graph"]["edges"]
    assert [(e["from"], e["to"], e["scope"]) for e in edges] == [  # in the order of the edges' slugs
        ("income", "mast_km", "mast"),
        ("region", "y", "program"),
    ]
    text = cli("plan", "show", "whole")[1]
    assert "- income → mast_km (only in mast's graph)\n- region → y (every instrument's graph)\n" in text
    assert "- region → y (every instrument's graph)" in text
    one = json.loads(cli("plan", "show", "one", "--json")[1])
    edges = one["content"]["graph"]["edges"]
    # the mast-only edge is in no graph of a plan for fibre
    assert [(e["from"], e["to"], e["scope"]) for e in edges] == [("region", "y", "program")]
