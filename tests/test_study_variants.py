"""A published study's per-variant table attached to the study: checked before it is stored (one audited write),
re-analysed by `audit` beside the reported estimate, carried by export and import, and removable."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

REPORTED = -0.21


def _table(k: int = 15, seed: int = 41) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    bx = rng.uniform(0.04, 0.2, k) * rng.choice([-1.0, 1.0], k)  # some variants on the other strand's allele
    sy = rng.uniform(0.008, 0.015, k)
    by = -0.25 * bx + 0.004 * np.sign(bx) + rng.normal(0, 1, k) * sy  # a small planted directional effect
    return pd.DataFrame({"variant": [f"rs{100 + i}" for i in range(k)], "exposure_effect": bx,
                         "exposure_se": rng.uniform(0.008, 0.012, k), "outcome_effect": by, "outcome_se": sy})  # fmt: skip


@pytest.fixture
def study(cli, tmp_path: Path) -> Path:  # type: ignore[no-untyped-def]
    assert cli("study", "add", "Lind2024", "--title", "A genetic instrument", "--year", "2024")[0] == 0
    code, _, err = cli("study", "report", "Lind2024", "--estimate", str(REPORTED), "--se", "0.05")
    assert code == 0, err
    path = tmp_path / "lind_variants.tsv"
    _table().to_csv(path, sep="\t", index=False)
    return path


def _audit(cli) -> dict:  # type: ignore[no-untyped-def]
    code, out, err = cli("audit", "--study", "Lind2024", "--json")
    assert code == 0, err
    return json.loads(out)


def test_the_audit_reanalyses_the_attached_table_beside_the_reported_estimate(cli, study: Path) -> None:  # type: ignore[no-untyped-def]
    import statsmodels.api as sm

    code, out, err = cli("study", "variants", "Lind2024", "--data", str(study))
    assert (code, out.strip()) == (0, "study Lind2024: 15 variants attached from lind_variants.tsv"), err
    audited = _audit(cli)["studies"][0]
    again = audited["variants"]
    frame = _table()
    # IVW is the weighted regression of outcome on exposure effects through the origin (statsmodels WLS)
    ivw = sm.WLS(frame.outcome_effect, frame.exposure_effect, weights=frame.outcome_se**-2).fit()
    assert again["evidence"]["ivw"]["estimate"] == pytest.approx(float(ivw.params.iloc[0]), rel=1e-10)
    # MR-Egger is the same regression with an intercept after orienting every variant to a positive exposure
    # effect (Bowden, Davey Smith and Burgess 2015); statsmodels WLS on the oriented data
    sign = np.sign(frame.exposure_effect)
    egger = sm.WLS(frame.outcome_effect * sign, sm.add_constant(frame.exposure_effect * sign),
                   weights=frame.outcome_se**-2).fit()  # fmt: skip
    assert again["evidence"]["egger"]["intercept"] == pytest.approx(float(egger.params.iloc[0]), rel=1e-9)
    assert again["evidence"]["egger"]["estimate"] == pytest.approx(float(egger.params.iloc[1]), rel=1e-9)
    lo, hi = again["evidence"]["ivw"]["ci_random"]
    assert again["reported_estimate"] == REPORTED
    assert again["reported_inside_ivw_random_interval"] is (lo <= REPORTED <= hi)
    assert again["source"] == "lind_variants.tsv" and again["n_variants"] == 15
    import hashlib

    assert again["sha256"] == hashlib.sha256(study.read_bytes()).hexdigest()  # hashlib, independently
    assert audited["verdict_5pct"] in ("survives", "lost", "procedures disagree", "cannot be re-examined")

    code, out, err = cli("audit", "--study", "Lind2024", "--out", str(study.parent / "audit.md"))
    assert code == 0, err
    text = (study.parent / "audit.md").read_text()
    assert "**Its per-variant table re-analysed**" in text and "- lind_variants.tsv: 15 variants" in text
    assert "**Per-variant tables.**" in text and "cannot show that the variants satisfy exclusion" in text
    code, out, _ = cli("study", "show", "Lind2024")
    assert "15 variants from lind_variants.tsv" in out


def test_a_study_with_only_a_table_is_audited_and_a_bad_table_is_refused_with_nothing_written(
    cli, study: Path, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    assert cli("study", "add", "Moe2022", "--title", "Variants only")[0] == 0
    bad = _table()
    bad.loc[3, "outcome_se"] = 0.0
    bad.to_csv(tmp_path / "bad.csv", index=False)
    history = len(json.loads(cli("history", "--json")[1]))
    code, _, err = cli("study", "variants", "Moe2022", "--data", str(tmp_path / "bad.csv"))
    assert code != 0
    assert err.strip() == (
        "error: Column 'outcome_se' holds zero or negative standard errors for variant(s) 'rs103'; standard "
        "errors must be positive, correct or drop those rows."
    )
    assert len(json.loads(cli("history", "--json")[1])) == history  # nothing written
    code, _, err = cli("study", "variants", "Moe2022")
    assert code != 0 and "give either --data FILE (attach a per-variant table) or --remove." in err

    assert cli("study", "variants", "Moe2022", "--data", str(study))[0] == 0
    code, out, err = cli("audit", "--json")
    assert code == 0, err
    payload = json.loads(out)
    moe = next(s for s in payload["studies"] if s["key"] == "Moe2022")
    assert moe["verdict_5pct"] == "cannot be re-examined" and moe["variants"]["n_variants"] == 15
    assert moe["variants"]["reported_estimate"] is None
    assert "Moe2022" not in [s["key"] for s in payload["studies_without_statistics"]]

    code, out, _ = cli("study", "variants", "Moe2022", "--remove")
    assert (code, out.strip()) == (0, "study Moe2022: per-variant table removed")
    actions = [e["action"] for e in json.loads(cli("history", "--json")[1])]
    assert "attach variants" in actions and "remove variants" in actions
    code, _, err = cli("study", "variants", "Moe2022", "--remove")
    assert code != 0 and "study 'Moe2022' has no per-variant table to remove." in err


def test_export_and_import_carry_the_attached_table(cli, study: Path, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Study
    from ivdossier.registry.portability import export_registry, import_registry, read_export

    assert cli("study", "variants", "Lind2024", "--data", str(study))[0] == 0
    code, _, err = cli("export", str(tmp_path / "out"))
    assert code == 0, err
    fresh = open_registry(str(tmp_path / "fresh.sqlite"))
    try:
        with fresh.writing() as s:
            import_registry(s, read_export(tmp_path / "out"), actor="importer")
        with fresh.reading() as s:
            table = records.get(s, Study, "Lind2024").variant_table or {}
            export_registry(s, tmp_path / "again")
    finally:
        fresh.dispose()
    frame = pd.read_csv(study, sep="\t")
    assert table["columns"] == list(frame.columns) and len(table["rows"]) == 15
    assert [r[0] for r in table["rows"]] == list(frame.variant)
    assert np.allclose([r[3] for r in table["rows"]], frame.outcome_effect, rtol=0, atol=0)  # exact floats
    study_files = sorted((tmp_path / "out" / "study").iterdir())
    again_files = sorted((tmp_path / "again" / "study").iterdir())
    assert [p.read_bytes() for p in study_files] == [p.read_bytes() for p in again_files]  # byte-identical


def test_a_malformed_stored_table_is_flagged_and_the_audit_goes_on() -> None:
    from ivdossier.estimation.audit import audit_study

    broken = {
        "source": "v.csv",
        "sha256": "0" * 64,
        "columns": ["variant", "exposure_effect"],
        "rows": [["rs1", 0.1]],
    }
    audited = audit_study("K", {"estimate": 0.1, "std_error": 0.05}, variants=broken)
    assert audited.variants is None
    assert audited.flags[-1].startswith(
        "per-variant table cannot be re-analysed: The per-variant table lacks"
    )
    ragged = {**broken, "rows": [["rs1", 0.1, 0.2, 0.3]]}
    flagged = audit_study("K", {}, variants=ragged).flags[-1]
    assert flagged.startswith(
        "per-variant table cannot be re-analysed: the stored per-variant table is malformed"
    )
