"""Runs you can find: `run list`, `run show`, `run primary` (one per instrument, audited), runs in `instrument show`,
the primary run carrying the dossier headline and the relevance verdict, and warnings about few clusters."""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    """A binary instrument z that moves d strongly, a column z_weak that barely does, 20 clusters g."""
    rng = np.random.default_rng(11)
    n = 1500
    z = (rng.random(n) < 0.5).astype(int)
    u = rng.normal(size=n)
    d = ((1.2 * z + 0.5 * u + rng.normal(size=n)) > 0.6).astype(int)
    frame = pd.DataFrame(
        {
            "y": 0.8 * d + u + rng.normal(size=n),
            "d": d,
            "z": z,
            "z_weak": rng.normal(size=n) + 0.02 * d,
            "w": rng.normal(size=n),
            "g": rng.integers(0, 20, n),
        }
    )
    path = tmp_path / "runs.csv"
    frame.to_csv(path, index=False)
    return path


def _setup(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P", "--treatment", "d", "--outcome", "y")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z", "--column", "z")[0] == 0


def _estimate(cli, data: Path, *extra: str) -> str:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "estimate",
        "--data",
        str(data),
        "--outcome",
        "y",
        "--treatment",
        "d",
        *extra,
        "--attach",
        "zz",
        "--json",
    )
    assert code == 0, err
    return str(json.loads(out)["run"])


def test_run_list_and_show_give_kind_time_data_fingerprint_versions_and_results(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    first = _estimate(cli, data_file, "--instrument", "z")
    code, out, err = cli("falsify", "balance", "--data", str(data_file), "--instrument", "z", "--covariate", "w",
                         "--attach", "zz", "--json")  # fmt: skip
    assert code == 0, err
    code, out, err = cli("run", "list", "zz", "--json")
    assert code == 0, err
    runs = json.loads(out)
    assert [(r["run"], r["kind"], r["instrument"], r["primary"]) for r in runs] == [
        (first, "estimate", "zz", False),
        ("zz-falsify-balance-1", "falsify-balance", "zz", False),
    ]
    assert all(r["dataset"] == str(data_file) and r["created"] for r in runs)
    code, out, _ = cli("run", "list")
    assert code == 0 and first in out and "falsify-balance" in out and str(data_file) in out

    code, out, err = cli("run", "show", first, "--json")
    assert code == 0, err
    shown = json.loads(out)
    # the fingerprint is the SHA-256 of the file's bytes (hashlib, outside the project)
    assert shown["dataset_sha256"] == hashlib.sha256(data_file.read_bytes()).hexdigest()
    assert shown["dataset_rows"] == len(pd.read_csv(data_file))
    assert shown["spec"]["instruments"] == ["z"] and shown["spec"]["data"] == str(data_file)
    assert shown["versions"]["numpy"] == np.__version__
    assert shown["seconds"] > 0
    assert shown["summary"]["rows used"].startswith(f"{len(pd.read_csv(data_file))} ")
    code, out, _ = cli("run", "show", first)
    assert code == 0 and "data SHA-256" in out and "estimate of d" in out and "spec: instruments" in out


def test_run_show_names_an_unknown_run(cli) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli("run", "show", "no-such-run")
    assert code != 0
    assert "no-such-run" in out + err


def test_instrument_show_lists_its_runs_with_the_primary_mark(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, out, _ = cli("instrument", "show", "zz")
    assert "no runs attached yet" in out
    slug = _estimate(cli, data_file, "--instrument", "z")
    assert cli("run", "primary", slug)[0] == 0
    code, out, _ = cli("instrument", "show", "zz")
    assert code == 0 and slug in out and "primary" in out
    code, out, _ = cli("instrument", "show", "zz", "--json")
    assert [(r["run"], r["primary"]) for r in json.loads(out)["runs"]] == [(slug, True)]


def test_one_primary_run_per_instrument_and_every_mark_is_audited(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    a = _estimate(cli, data_file, "--instrument", "z")
    b = _estimate(cli, data_file, "--instrument", "z", "--method", "liml")
    assert cli("run", "primary", a, "--reason", "the plan's model")[0] == 0
    code, out, err = cli("run", "primary", b, "--json")
    assert code == 0, err
    assert json.loads(out)["primary"] is True
    runs = json.loads(cli("run", "list", "zz", "--json")[1])
    assert [r["run"] for r in runs if r["primary"]] == [b]
    history_a = json.loads(cli("history", a, "--json")[1])
    assert [e["action"] for e in history_a] == ["create", "mark-primary", "unmark-primary"]  # oldest first
    assert any(e["reason"] == "the plan's model" for e in history_a)
    assert [e["action"] for e in json.loads(cli("history", b, "--json")[1])] == ["create", "mark-primary"]


def test_only_an_attached_estimate_run_can_be_primary(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    cli(
        "falsify",
        "balance",
        "--data",
        str(data_file),
        "--instrument",
        "z",
        "--covariate",
        "w",
        "--attach",
        "zz",
    )
    code, out, err = cli("run", "primary", "zz-falsify-balance-1")
    assert code != 0
    assert "only an estimate run can be an instrument's primary run" in out + err


def test_the_headline_and_relevance_verdict_follow_the_primary_run_else_the_latest(  # type: ignore[no-untyped-def]
    cli, data_file: Path, tmp_path: Path
) -> None:
    _setup(cli)
    strong = _estimate(cli, data_file, "--instrument", "z")
    weak = _estimate(cli, data_file, "--instrument", "z_weak")
    out_md = tmp_path / "d.md"
    assert cli("dossier", "zz", "--out", str(out_md))[0] == 0
    text = out_md.read_text(encoding="utf-8")
    assert f"Latest run **{weak}**" in text and "No run is marked primary" in text
    # z_weak barely moves d (coefficient 0.02 on noise of SD 1): its effective F is far below the critical value
    assert _relevance_rule(text) == "R1"  # at risk: effective F below its critical value
    assert cli("run", "primary", strong)[0] == 0
    assert cli("dossier", "zz", "--out", str(out_md))[0] == 0
    text = out_md.read_text(encoding="utf-8")
    assert f"Primary run **{strong}**" in text and "The team marked it primary" in text
    # z moves d by about a third of its range in 1,500 rows: effective F in the hundreds
    assert _relevance_rule(text) == "R3"  # holds: effective F above its critical value, AR set bounded


def _relevance_rule(markdown: str) -> str:
    row = next(line for line in markdown.splitlines() if line.startswith("| Relevance |"))  # "At a glance"
    return row.rstrip(" |").rsplit("|", 1)[1].strip()


def test_few_clusters_are_warned_about_in_the_terminal_and_the_dossier(  # type: ignore[no-untyped-def]
    cli, data_file: Path, tmp_path: Path
) -> None:
    _setup(cli)
    slug = _estimate(cli, data_file, "--instrument", "z", "--cluster", "g", "--vcov", "clustered")
    groups = pd.read_csv(data_file)["g"].nunique()  # 20 clusters, counted by pandas
    code, _, err = cli("run", "show", slug)
    assert code == 0
    assert f"few clusters: {groups} (fewer than 42)" in err
    # with small-sample conventions the cluster t reference has G - 1 degrees of freedom (common practice)
    assert f"the t reference has only {groups - 1} degrees of freedom" in err
    out_md = tmp_path / "d.md"
    code, _, err = cli("dossier", "zz", "--out", str(out_md))
    assert code == 0
    assert f"warning: the headline run {slug}: few clusters: {groups}" in err
    assert f"**Warning (run {slug}):** few clusters: {groups}" in out_md.read_text(encoding="utf-8")


def test_the_cluster_threshold_is_42_and_a_large_t_reference_is_not_flagged() -> None:
    from ivdossier.workflows.run_records import run_warnings

    assert run_warnings({"n_clusters": [41]})[0].startswith("few clusters: 41")
    assert run_warnings({"n_clusters": [42, 300]}) == ()
    assert (
        run_warnings({"n_clusters": [300], "ci_reference": "t quantiles with 299 degrees of freedom"}) == ()
    )
    assert run_warnings({"ci_reference": "t quantiles with 12 degrees of freedom"}) == (
        "the t reference has only 12 degrees of freedom (fewer than 30); intervals and p-values lean on that "
        "small-sample reference",
    )
    assert run_warnings({"ci_reference": "normal quantiles"}) == ()
    assert run_warnings(None) == ()


def test_a_schema_0002_registry_gets_the_primary_flag_unset_and_can_mark_a_run(tmp_path: Path) -> None:
    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run
    from ivdossier.registry.runs import mark_primary

    copy = tmp_path / "old.sqlite"
    shutil.copyfile(Path(__file__).parent / "fixtures" / "registry-0002.sqlite", copy)
    registry = open_registry(str(copy))
    try:
        with registry.reading() as s:
            assert records.get(s, Run, "fibre-estimate-1").is_primary is False
        with registry.writing() as s:
            mark_primary(s, actor="ana", run="fibre-estimate-1")
        with registry.reading() as s:
            assert records.get(s, Run, "fibre-estimate-1").is_primary is True
    finally:
        registry.dispose()


def test_the_registry_itself_refuses_a_second_primary_run_for_one_instrument(tmp_path: Path) -> None:
    """Two writers that each mark a different run leave at most one primary: the partial unique index."""
    from sqlalchemy import select, update

    from ivdossier.errors import ConflictError
    from ivdossier.registry import instruments as reg
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run
    from ivdossier.registry.runs import mark_primary, record_run

    registry = open_registry(str(tmp_path / "r.sqlite"))
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="ana", slug="p", title="P")
            reg.add_instrument(s, actor="ana", program="p", slug="zz", name="Z")
            for _ in range(2):
                record_run(s, actor="ana", instrument="zz", run_kind="estimate", spec={}, results={}, versions={},
                           seconds=0.0)  # fmt: skip
            mark_primary(s, actor="ana", run="zz-estimate-1")
        bypass = update(Run).where(Run.slug == "zz-estimate-2").values(is_primary=True)  # type: ignore[arg-type]
        # a write that bypasses mark_primary, as a racing writer would; nothing of it is kept
        with (
            pytest.raises(ConflictError, match=r"UNIQUE constraint failed: run\.instrument_id"),
            registry.writing() as s,
        ):
            s.execute(bypass)  # type: ignore[call-overload]
        with registry.writing() as s:  # through mark_primary the switch works (unmark first, then mark)
            mark_primary(s, actor="ana", run="zz-estimate-2")
        with registry.reading() as s:
            assert [r.slug for r in s.scalars(select(Run).where(Run.is_primary == True))] == ["zz-estimate-2"]  # noqa: E712
    finally:
        registry.dispose()


def test_clearing_the_primary_mark_is_audited_and_the_dossier_follows_the_latest_run_again(  # type: ignore[no-untyped-def]
    cli, data_file: Path, tmp_path: Path
) -> None:
    _setup(cli)
    code, _, err = cli("run", "clear-primary", "zz")
    assert code == 2 and "instrument 'zz' has no primary run, so there is no mark to clear" in err
    first = _estimate(cli, data_file, "--instrument", "z")
    latest = _estimate(cli, data_file, "--instrument", "z_weak")
    assert cli("run", "primary", first)[0] == 0
    code, out, err = cli("run", "clear-primary", "zz", "--reason", "the plan changed")
    assert code == 0, err
    assert out == f"{first} is no longer the primary run of zz; its dossier follows the latest run.\n"
    runs = json.loads(cli("run", "list", "zz", "--json")[1])
    assert [r["run"] for r in runs if r["primary"]] == []
    events = json.loads(cli("history", first, "--json")[1])
    assert [e["action"] for e in events] == ["create", "mark-primary", "unmark-primary"]
    assert events[-1]["reason"] == "the plan changed" and events[-1]["actor"] == "tester"
    out_md = tmp_path / "d.md"
    assert cli("dossier", "zz", "--out", str(out_md))[0] == 0
    text = out_md.read_text(encoding="utf-8")
    assert f"Latest run **{latest}**" in text and "No run is marked primary" in text


def test_estimate_warns_about_few_clusters_whether_or_not_the_run_is_attached(  # type: ignore[no-untyped-def]
    cli, data_file: Path
) -> None:
    _setup(cli)
    groups = pd.read_csv(data_file)["g"].nunique()  # 20 clusters, counted by pandas
    base = ("estimate", "--data", str(data_file), "--outcome", "y", "--treatment", "d", "--instrument", "z")
    clustered = ("--cluster", "g", "--vcov", "clustered")
    for extra in ((), ("--attach", "zz"), ("--attach", "zz", "--json")):
        code, _, err = cli(*base, *clustered, *extra)
        assert code == 0, err
        assert f"warning: few clusters: {groups} (fewer than 42)" in err, extra
        assert f"the t reference has only {groups - 1} degrees of freedom" in err, extra
    code, _, err = cli(*base, "--attach", "zz")  # heteroskedasticity-robust: no cluster warning
    assert code == 0 and "few clusters" not in err
