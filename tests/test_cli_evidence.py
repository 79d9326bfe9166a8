"""Evidence commands: each prints its finding, emits JSON, attaches a run, and rejects a likely mistake."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(3)
    n = 2000
    z = (rng.random(n) < 0.5).astype(int)
    able = (rng.random(n) < 0.8).astype(int)
    u = rng.normal(size=n)
    d = able * ((0.9 * z + 0.5 * u + rng.normal(size=n)) > 0.4).astype(int)
    y = 1.0 * d + u + rng.normal(size=n)
    frame = pd.DataFrame(
        {"y": y, "d": d, "z": z, "z2": z + rng.normal(size=n), "w": rng.normal(size=n), "able": able,
         "pre": u + rng.normal(size=n), "g": rng.integers(0, 40, n)}
    )  # fmt: skip
    path = tmp_path / "e.csv"
    frame.to_csv(path, index=False)
    return path


BASE = ("--outcome", "y", "--treatment", "d", "--instrument", "z")


def test_zero_first_stage_attaches_a_run_the_history_shows(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z")[0] == 0
    code, out, err = cli(
        "falsify",
        "zero-first-stage",
        "--data",
        str(data_file),
        *BASE,
        "--where",
        "able == 0",
        "--attach",
        "zz",
    )
    assert code == 0, err
    # the complete summary first (with the rows it used), then one finding per catalogue check
    summary, findings = out.split("Findings for the catalogue's checks:\n")
    assert "rows: used" in summary
    assert findings.startswith("  zero-first-stage-reduced-form: reduced form in rows where able == 0")
    assert "stored as run zz-falsify-zero-first-stage-1" in out
    code, out, _ = cli("history", "zz-falsify-zero-first-stage-1", "--json")
    assert json.loads(out)[0]["action"] == "create"


def test_placebo_and_balance_emit_joint_tests(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "falsify",
        "placebo",
        "--data",
        str(data_file),
        "--instrument",
        "z",
        "--placebo-outcome",
        "pre",
        "--json",
    )
    assert code == 0, err
    payload = json.loads(out)
    assert payload["kind"] == "placebo_outcomes" and payload["joint"]["df"] == 1
    code, out, _ = cli(
        "falsify",
        "balance",
        "--data",
        str(data_file),
        "--instrument",
        "z",
        "--covariate",
        "w",
        "--covariate",
        "pre",
    )
    assert code == 0 and "covariate-balance: joint test on w, pre: χ²(2)" in out


def test_per_instrument_and_sensitivity(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "falsify", "per-instrument", "--data", str(data_file), *BASE, "--instrument", "z2", "--json"
    )
    assert code == 0, err
    assert [r["instrument"] for r in json.loads(out)["rows"]] == ["z", "z2"]
    code, out, err = cli(
        "sensitivity",
        "range",
        "--data",
        str(data_file),
        *BASE,
        "--direct-effect-min",
        "0",
        "--direct-effect-max",
        "0",
        "--json",
    )
    assert code == 0, err
    sens = json.loads(out)
    # With a direct-effect range of {0} the union of intervals is the ordinary 2SLS interval
    # (Conley, Hansen and Rossi 2012, definition of the union-of-confidence-intervals method).
    assert sens["lower"] == pytest.approx(sens["ci"][0], rel=1e-12)
    assert sens["upper"] == pytest.approx(sens["ci"][1], rel=1e-12)


def test_compliers_and_power(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, out, err = cli(
        "compliers", "--data", str(data_file), "--treatment", "d", "--instrument", "z", "--json"
    )
    assert code == 0, err
    shares = json.loads(out)["shares"]
    frame = pd.read_csv(data_file)
    # Complier share = first-stage difference in treatment rates (Angrist, Imbens and Rubin 1996).
    diff = frame.loc[frame.z == 1, "d"].mean() - frame.loc[frame.z == 0, "d"].mean()
    assert shares["complier"]["estimate"] == pytest.approx(diff, rel=1e-12)
    code, out, err = cli(
        "power", "--n", "5000", "--partial-r2", "0.05", "--outcome-sd", "1.0", "--effect", "0.2"
    )
    # the treatment's SD is never assumed: power scales with it
    assert code == 2 and "treatment_sd is required" in err
    code, out, err = cli(
        "power", "--n", "5000", "--partial-r2", "0.05", "--outcome-sd", "1.0", "--effect", "0.2",
        "--treatment-sd", "1.0",
    )  # fmt: skip
    assert code == 0, err
    assert "minimum detectable effect at 80.0 % power" in out
    # derived from data: the SD of the treatment column (no controls), as pandas computes it (ddof = 1)
    code, out, err = cli(
        "power", "--n", "5000", "--partial-r2", "0.05", "--outcome-sd", "1.0", "--data", str(data_file),
        "--treatment", "d", "--json",
    )  # fmt: skip
    assert code == 0, err
    sd = pd.read_csv(data_file)["d"].std()
    assert json.loads(out)["design"]["treatment_sd"] == pytest.approx(sd, rel=1e-9)


def test_likely_mistakes_get_one_line_errors(cli, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    code, _, err = cli("compliers", "--data", str(data_file), "--treatment", "d", "--instrument", "w")
    assert code == 2 and err.startswith("error: ") and "w" in err
    code, _, err = cli("sensitivity", "prior", "--data", str(data_file), *BASE, "--prior-mean", "0")
    assert code != 0
    code, _, err = cli(
        "sensitivity",
        "prior",
        "--data",
        str(data_file),
        *BASE,
        "--instrument",
        "z2",
        "--prior-mean",
        "0",
        "--prior-sd",
        "1",
    )
    assert code == 2 and "one --prior-mean and one --prior-sd per --instrument" in err


def test_the_direct_effect_range_options_and_their_old_spelling(cli, data_file: Path, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    base = ("sensitivity", "range", "--data", str(data_file), *BASE, "--json")
    code, new, err = cli(*base, "--direct-effect-min", "-0.1", "--direct-effect-max", "0.2")
    assert code == 0 and err == ""
    code, old, err = cli(*base, "--gamma-min", "-0.1", "--gamma-max", "0.2")
    assert code == 0 and json.loads(old) == json.loads(new)
    assert err == (
        "warning: --gamma-min is deprecated and will be removed in the next release; use --direct-effect-min.\n"
        "warning: --gamma-max is deprecated and will be removed in the next release; use --direct-effect-max.\n"
    )
    code, _, err = cli(*base, "--direct-effect-min", "0", "--gamma-min", "0", "--direct-effect-max", "0")
    assert code == 2 and "give --direct-effect-min only; --gamma-min is its deprecated old spelling" in err
    code, _, err = cli(*base, "--direct-effect-min", "0")
    assert code == 2 and "pass --direct-effect-min and --direct-effect-max" in err
    _, help_text, _ = cli("sensitivity", "range", "--help")
    assert "--direct-effect-min" in help_text and "--gamma" not in help_text


def test_a_run_stored_with_the_old_option_names_is_computed_the_same(data_file: Path) -> None:
    from ivdossier.estimation.spec import ModelSpec
    from ivdossier.workflows.analyses import run_analysis

    spec = ModelSpec.build(outcome="y", treatment="d", instruments=("z",))
    new = run_analysis(
        "sensitivity range", data_file, spec, direct_effect_min=[-0.1], direct_effect_max=[0.2]
    )
    old = run_analysis("sensitivity range", data_file, spec, gamma_min=[-0.1], gamma_max=[0.2])
    assert old.result.to_dict() == new.result.to_dict()
    assert new.spec["direct_effect_min"] == [-0.1] and "gamma_min" not in new.spec
