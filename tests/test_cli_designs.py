"""Design and summary-data commands: each prints its findings, emits JSON, attaches a run (with the derived data's
recipe in its provenance), and refuses likely mistakes with one line naming the rows, writing nothing."""

from __future__ import annotations

import hashlib
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest


def _history(cli) -> int:  # type: ignore[no-untyped-def]
    code, out, err = cli("history", "--json")
    assert code == 0, err
    return len(json.loads(out))


@pytest.fixture
def registry(cli):  # type: ignore[no-untyped-def]
    assert cli("program", "add", "p", "--title", "P")[0] == 0
    assert cli("instrument", "add", "clerks", "--program", "p", "--name", "Clerk leniency")[0] == 0
    return cli


# ---------------------------------------------------------------- decision-maker designs


@pytest.fixture
def cases(tmp_path: Path) -> Path:
    rng = np.random.default_rng(11)
    j, n = 25, 900
    dm = rng.integers(0, j, n)
    lenient = rng.uniform(0.2, 0.8, j)
    u = rng.normal(size=n)
    x = (rng.uniform(size=n) < lenient[dm]).astype(float)
    frame = pd.DataFrame(
        {"y": 0.5 * x + 0.5 * u + rng.normal(size=n), "x": x, "clerk": [f"c{d:02d}" for d in dm]}
    )
    path = tmp_path / "cases.csv"
    frame.to_csv(path, index=False)
    return path


def test_decision_makers_write_the_leave_out_measure_and_store_its_recipe(
    registry, cases: Path, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    out_file = tmp_path / "derived" / "cases_lo.csv"
    code, out, err = registry(
        "design", "decision-makers", "--data", str(cases), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "clerk", "--derived-out", str(out_file), "--attach", "clerks",
    )  # fmt: skip
    assert code == 0, err
    summary, findings = out.split("Findings for the catalogue's checks:\n")
    assert "UJIVE" in summary and "Jackknife Anderson-Rubin" in summary
    assert [line.split(":")[0].strip() for line in findings.splitlines()[:3]] == [
        "leave-out-construction", "many-instrument-estimates", "jackknife-anderson-rubin",
    ]  # fmt: skip
    assert "stored as run clerks-design-decision-makers-1" in out

    # the derived column is each case's mean treatment over the clerk's other cases: a brute-force loop
    frame = pd.read_csv(cases)
    derived = pd.read_csv(out_file)
    assert list(derived.columns) == [*frame.columns, "x_propensity_of_clerk"]
    for i in range(0, len(frame), 97):
        others = frame[(frame.clerk == frame.clerk[i]) & (frame.index != i)]
        assert derived["x_propensity_of_clerk"][i] == pytest.approx(others.x.mean(), rel=1e-12)  # brute force

    from ivdossier.cli.common import settings
    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Run

    reg = open_registry(settings.db)
    try:
        with reg.reading() as s:
            run = records.get(s, Run, "clerks-design-decision-makers-1")
            provenance, spec = run.results["derived_data"], run.spec
    finally:
        reg.dispose()
    assert provenance["sha256"] == hashlib.sha256(out_file.read_bytes()).hexdigest()  # hashlib, independently
    assert spec["derived_out"] == str(out_file) and spec["decision_maker"] == "clerk"
    assert provenance["recipe"]["leave_out"] == "case" and provenance["column"] == "x_propensity_of_clerk"


def test_decision_makers_2sls_matches_linearmodels_with_clerk_dummies(registry, cases: Path) -> None:  # type: ignore[no-untyped-def]
    from linearmodels.iv import IV2SLS

    code, out, err = registry(
        "design", "decision-makers", "--data", str(cases), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "clerk", "--json",
    )  # fmt: skip
    assert code == 0, err
    payload = json.loads(out)
    assert payload["kind"] == "decision_maker_design"
    two_sls = next(e for e in payload["estimates"]["estimates"] if e["method"] == "2sls")
    frame = pd.read_csv(cases)
    dummies = pd.get_dummies(frame.clerk, drop_first=True, dtype=float)
    ref = IV2SLS(frame.y, np.ones((len(frame), 1)), frame.x, dummies).fit()
    assert two_sls["estimate"] == pytest.approx(float(ref.params["x"]), rel=1e-9)  # linearmodels IV2SLS
    assert payload["anderson_rubin"]["applicable"] is True


def test_decision_makers_refuse_a_clerk_with_one_case_and_write_nothing(
    registry, cases: Path, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    frame = pd.read_csv(cases)
    frame.loc[len(frame)] = [0.1, 1.0, "solo"]
    bad = tmp_path / "solo.csv"
    frame.to_csv(bad, index=False)
    out_file = tmp_path / "never.csv"
    before = _history(registry)
    code, _, err = registry(
        "design", "decision-makers", "--data", str(bad), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "clerk", "--derived-out", str(out_file), "--attach", "clerks",
    )  # fmt: skip
    assert code != 0
    assert err.strip() == (
        "error: 1 decision-maker(s) in 'clerk' have a single case ('solo'; row index 900), so their leave-one-out "
        "propensity is undefined; drop those cases or merge the decision-makers before building the instrument."
    )
    assert not out_file.exists() and _history(registry) == before


def test_decision_makers_refuse_an_unknown_column_and_overwriting_the_input(registry, cases: Path) -> None:  # type: ignore[no-untyped-def]
    code, _, err = registry(
        "design", "decision-makers", "--data", str(cases), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "judge",
    )  # fmt: skip
    assert code != 0
    assert err.strip() == "error: Column(s) 'judge' not found in the data; available: 'y', 'x', 'clerk'."
    before = cases.read_bytes()
    code, _, err = registry(
        "design", "decision-makers", "--data", str(cases), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "clerk", "--derived-out", str(cases),
    )  # fmt: skip
    assert code != 0
    assert (
        err.strip() == "error: --derived-out names the input data file; write the derived data to a new file."
    )
    assert cases.read_bytes() == before
    code, _, err = registry(
        "design", "decision-makers", "--data", str(cases), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "clerk", "--absorb", "a,b",
    )  # fmt: skip
    assert code != 0 and err.strip().startswith("error: --absorb takes one column of cells here")


# ---------------------------------------------------------------- exposure-share designs


@pytest.fixture
def exposure(tmp_path: Path) -> dict[str, Path]:
    rng = np.random.default_rng(5)
    n_units, n_sectors = 60, 8
    s = rng.dirichlet(np.ones(n_sectors), n_units) * rng.uniform(0.7, 0.95, (n_units, 1))  # incomplete shares
    g = rng.normal(size=n_sectors)
    x = s @ g + rng.normal(size=n_units)
    units = pd.DataFrame(
        {"region": [f"r{i}" for i in range(n_units)], "y": 0.7 * x + rng.normal(size=n_units), "x": x}
    )
    shares = pd.DataFrame(
        [(f"r{i}", f"s{k}", s[i, k]) for i in range(n_units) for k in range(n_sectors)],
        columns=["region", "sector", "share"],
    )
    shocks = pd.DataFrame({"sector": [f"s{k}" for k in range(n_sectors)], "shock": g})
    paths = {
        "units": tmp_path / "units.csv",
        "shares": tmp_path / "shares.csv",
        "shocks": tmp_path / "shocks.csv",
    }
    units.to_csv(paths["units"], index=False)
    shares.to_csv(paths["shares"], index=False)
    shocks.to_csv(paths["shocks"], index=False)
    return paths


def _exposure_args(p: dict[str, Path]) -> tuple[str, ...]:
    return (
        "design", "exposure-share", "--data", str(p["units"]), "--shares", str(p["shares"]), "--shocks",
        str(p["shocks"]), "--outcome", "y", "--treatment", "x", "--unit", "region",
    )  # fmt: skip


def test_exposure_share_weights_reproduce_2sls_from_linearmodels(registry, exposure: dict[str, Path]) -> None:  # type: ignore[no-untyped-def]
    from linearmodels.iv import IV2SLS

    code, out, err = registry(*_exposure_args(exposure), "--json")
    assert code == 0, err
    payload = json.loads(out)
    rows = payload["rotemberg"]["sectors"]
    assert sum(r["weight"] for r in rows) == pytest.approx(1.0, abs=1e-12)  # identity of GPSS (2020)
    weighted = sum(r["weight"] * r["estimate"] for r in rows)
    # the instrument and 2SLS rebuilt by hand, estimated by linearmodels with the share sum as a control
    units = pd.read_csv(exposure["units"])
    wide = (
        pd.read_csv(exposure["shares"])
        .pivot(index="region", columns="sector", values="share")
        .loc[units.region]
    )
    g = pd.read_csv(exposure["shocks"]).set_index("sector").shock.loc[wide.columns]
    z = wide.to_numpy() @ g.to_numpy()
    exog = np.column_stack([np.ones(len(units)), wide.sum(axis=1).to_numpy()])
    ref = IV2SLS(units.y.to_numpy(), exog, units.x.to_numpy(), z).fit()
    assert payload["rotemberg"]["estimate"] == pytest.approx(
        float(ref.params.iloc[-1]), rel=1e-9
    )  # linearmodels
    assert weighted == pytest.approx(float(ref.params.iloc[-1]), rel=1e-9)  # weighted per-sector estimates
    assert payload["share_sum_control"] is True
    assert payload["shock_level"]["estimate"] == pytest.approx(
        payload["robust"]["estimate"], rel=1e-9
    )  # BHJ (2022) equivalence


def test_exposure_share_attaches_and_prints_findings(registry, exposure: dict[str, Path]) -> None:  # type: ignore[no-untyped-def]
    code, out, err = registry(*_exposure_args(exposure), "--attach", "clerks")
    assert code == 0, err
    assert "  rotemberg-weights: largest Rotemberg weights:" in out
    assert "  exposure-robust-inference: conventional [" in out
    assert "stored as run clerks-design-exposure-share-1" in out


def test_exposure_share_mistakes_name_the_rows(registry, exposure: dict[str, Path], tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    before = _history(registry)
    shocks = pd.read_csv(exposure["shocks"])
    shocks[shocks.sector != "s3"].to_csv(tmp_path / "few.csv", index=False)
    code, _, err = registry(
        *_exposure_args({**exposure, "shocks": tmp_path / "few.csv"}), "--attach", "clerks"
    )
    assert code != 0
    assert err.strip() == (
        "error: 1 sector(s) in the shares table have no shock: 's3'; add their shocks to the shocks table or "
        "drop their shares."
    )
    shares = pd.read_csv(exposure["shares"])
    shares.loc[shares.region == "r5", "share"] *= 1.5
    shares.to_csv(tmp_path / "over.csv", index=False)
    code, _, err = registry(*_exposure_args({**exposure, "shares": tmp_path / "over.csv"}))
    assert code != 0
    assert err.strip().startswith(
        "error: Shares must sum to at most one per unit; 1 unit(s) exceed it: 'r5' ("
    )
    units = pd.read_csv(exposure["units"])
    units.loc[0, "region"] = "zz"
    units.to_csv(tmp_path / "units_bad.csv", index=False)
    code, _, err = registry(*_exposure_args({**exposure, "units": tmp_path / "units_bad.csv"}))
    assert code != 0
    assert err.strip() == (
        "error: Unit ids do not match: 1 unit(s) of the data have no shares ('zz'); 1 unit(s) of the shares table "
        "are not in the data ('r0'); make both use the same unit ids (type and spelling)."
    )
    assert _history(registry) == before


# ---------------------------------------------------------------- per-variant summary statistics


@pytest.fixture
def variants(tmp_path: Path) -> Path:
    rng = np.random.default_rng(8)
    m = 12
    bx = rng.uniform(0.05, 0.2, m)
    frame = pd.DataFrame(
        {"variant": [f"rs{i}" for i in range(m)], "exposure_effect": bx, "exposure_se": 0.01,
         "outcome_effect": 0.3 * bx + rng.normal(0, 0.01, m), "outcome_se": rng.uniform(0.008, 0.012, m),
         "exposure_n": 40000, "outcome_n": 50000}
    )  # fmt: skip
    path = tmp_path / "variants.csv"
    frame.to_csv(path, index=False)
    return path


def test_variants_ivw_is_the_weighted_regression_through_the_origin(registry, variants: Path) -> None:  # type: ignore[no-untyped-def]
    import statsmodels.api as sm

    code, out, err = registry("variants", "--data", str(variants), "--json")
    assert code == 0, err
    payload = json.loads(out)
    frame = pd.read_csv(variants)
    fit = sm.WLS(frame.outcome_effect, frame.exposure_effect, weights=frame.outcome_se**-2).fit()
    assert payload["ivw"]["estimate"] == pytest.approx(
        float(fit.params.iloc[0]), rel=1e-10
    )  # statsmodels WLS
    code, out, err = registry("variants", "--data", str(variants), "--attach", "clerks")
    assert code == 0, err
    assert "  variant-strength: mean F " in out and "stored as run clerks-variants-1" in out


def test_variants_refuse_duplicates_and_zero_standard_errors(
    registry, variants: Path, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    frame = pd.read_csv(variants)
    pd.concat([frame, frame.iloc[[2]]]).to_csv(tmp_path / "dup.csv", index=False)
    code, _, err = registry("variants", "--data", str(tmp_path / "dup.csv"), "--attach", "clerks")
    assert code != 0
    assert err.strip() == (
        "error: Variant(s) 'rs2' appear more than once; keep one row per variant (e.g. the one from the larger study)."
    )
    frame.loc[3, "exposure_se"] = 0.0
    frame.to_csv(tmp_path / "zero.csv", index=False)
    code, _, err = registry("variants", "--data", str(tmp_path / "zero.csv"))
    assert code != 0
    assert err.strip() == (
        "error: Column 'exposure_se' holds zero or negative standard errors for variant(s) 'rs3'; standard errors "
        "must be positive, correct or drop those rows."
    )


# ---------------------------------------------------------------- confounder strength


@pytest.fixture
def confounded(tmp_path: Path) -> Path:
    rng = np.random.default_rng(21)
    n = 400
    c = rng.normal(size=n)
    z = rng.normal(size=n) + 0.3 * c
    u = rng.normal(size=n)
    x = z + u + c
    frame = pd.DataFrame({"y": 0.4 * x - u + c + rng.normal(size=n), "x": x, "z": z, "c": c})
    path = tmp_path / "ov.csv"
    frame.to_csv(path, index=False)
    return path


def test_confounder_strength_reduced_form_rv_follows_the_ols_identity(registry, confounded: Path) -> None:  # type: ignore[no-untyped-def]
    import statsmodels.formula.api as smf

    code, out, err = registry(
        "confounder-strength", "--data", str(confounded), "--outcome", "y", "--treatment", "x",
        "--instrument", "z", "--control", "c", "--benchmark", "c", "--json",
    )  # fmt: skip
    assert code == 0, err
    payload = json.loads(out)
    fit = smf.ols("y ~ z + c", data=pd.read_csv(confounded)).fit()
    f = abs(float(fit.tvalues["z"])) / math.sqrt(fit.df_resid)
    rv = 0.5 * (math.sqrt(f**4 + 4 * f**2) - f**2)  # Cinelli and Hazlett (2020, JRSS-B), RV with q = 1
    assert payload["reduced_form"]["rv"] == pytest.approx(rv, rel=1e-9)  # statsmodels t-value and the formula
    assert [b["covariate"] for b in payload["iv_benchmarks"]] == ["c"]


def test_confounder_strength_mistakes(registry, confounded: Path) -> None:  # type: ignore[no-untyped-def]
    base = ("confounder-strength", "--data", str(confounded), "--outcome", "y", "--treatment", "x")
    code, _, err = registry(*base, "--instrument", "z", "--benchmark", "c")
    assert code != 0
    assert err.strip() == (
        "error: Benchmark 'c' is not among the controls; benchmarks must be controls of the model (controls: none)."
    )
    code, _, err = registry(*base, "--instrument", "z", "--instrument", "c", "--attach", "clerks")
    assert code != 0
    assert err.strip() == (
        "error: confounder-strength does not apply: the Cinelli–Hazlett robustness values here take exactly one "
        "instrument, got 2; analyse each instrument on its own."
    )


# ---------------------------------------------------------------- the dossier


def test_dossier_shows_each_kind_and_the_findings_under_the_threats(  # type: ignore[no-untyped-def]
    registry, cases: Path, exposure: dict[str, Path], variants: Path, confounded: Path, tmp_path: Path
) -> None:
    dm = ("--outcome", "y", "--treatment", "x", "--decision-maker", "clerk")
    assert registry("design", "decision-makers", "--data", str(cases), *dm, "--attach", "clerks")[0] == 0
    assert registry(*_exposure_args(exposure), "--attach", "clerks")[0] == 0
    assert registry("variants", "--data", str(variants), "--attach", "clerks")[0] == 0
    ov = ("--outcome", "y", "--treatment", "x", "--instrument", "z", "--control", "c", "--benchmark", "c")
    assert registry("confounder-strength", "--data", str(confounded), *ov, "--attach", "clerks")[0] == 0
    assert registry("link", "add", "clerks", "DM-R01")[0] == 0
    code, out, err = registry("design", "decision-makers", "--data", str(cases), *dm, "--json")
    assert code == 0, err
    ujive = next(e for e in json.loads(out)["estimates"]["estimates"] if e["method"] == "ujive")

    md_file = tmp_path / "dossier.md"
    code, _, err = registry("dossier", "clerks", "--out", str(md_file))
    assert code == 0, err
    md = md_file.read_text(encoding="utf-8")
    for heading in (
        "## Decision-maker design",
        "## Exposure-share design",
        "## Evidence from per-variant summary statistics",
        "## How strong would an omitted confounder of the instrument have to be?",
    ):
        assert heading in md, heading
    assert f"| UJIVE | {ujive['estimate']:.4g} |" in md  # the stored run's number, rendered
    # under the threat DM-R01, one finding per check, each naming the run it comes from
    threat = md[md.index("DM-R01") :]
    assert "many-instrument-estimates: 2SLS " in threat and "(run clerks-design-decision-makers-1)" in threat
    assert "jackknife-anderson-rubin: jackknife Anderson–Rubin 95% set" in threat
    assert "Statistics cannot establish exclusion or exogeneity." in md

    html_file = tmp_path / "dossier.html"
    code, _, err = registry("dossier", "clerks", "--out", str(html_file))
    assert code == 0, err
    html = html_file.read_text(encoding="utf-8")
    for key in ("rotemberg-weights", "variant-scatter", "variant-funnel", "robustness-contour"):
        assert f'id="figure-{key}"><svg' in html.replace("\n", ""), key


def test_decision_makers_refuse_an_unknown_instrument_before_writing_the_derived_file(  # type: ignore[no-untyped-def]
    registry, cases: Path, tmp_path: Path
) -> None:
    out_file = tmp_path / "never.csv"
    code, _, err = registry(
        "design", "decision-makers", "--data", str(cases), "--outcome", "y", "--treatment", "x",
        "--decision-maker", "clerk", "--derived-out", str(out_file), "--attach", "nobody",
    )  # fmt: skip
    assert code != 0 and "nobody" in err and len(err.strip().splitlines()) == 1
    assert not out_file.exists()
