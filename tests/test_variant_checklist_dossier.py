"""The reporting checklist of a genetic-variant instrument is filled from the registry and runs, in its dossier.

The checklist's items are our own wording anchored on STROBE-MR (Skrivankova et al. 2021, JAMA 326:1614-1621);
what is checked here is the filling contract of ``reports.variant_checklist.dossier_checklist``: an item is
computed when the newest summary-data run answers it (the numbers are the run's own, compared with the stored
result), provided when a reviewed threat link or the monotonicity claim answers it, and missing otherwise; only
genetic-variant instruments carry it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ivdossier.registry.db import open_registry
from ivdossier.reports.variant_checklist import ITEMS, THREAT_ITEMS, dossier_checklist


@pytest.fixture
def gv_registry(tmp_path: Path):  # type: ignore[no-untyped-def]
    from ivdossier.registry import instruments as reg
    from ivdossier.registry.threats import link_threat
    from ivdossier.workflows.analyses import run_analysis
    from ivdossier.workflows.catalog_sync import ensure_builtin
    from ivdossier.workflows.runs import store_run

    rng = np.random.default_rng(8)
    m = 12
    bx = rng.uniform(0.05, 0.2, m)
    table = tmp_path / "variants.csv"
    pd.DataFrame(
        {"variant": [f"rs{i}" for i in range(m)], "exposure_effect": bx, "exposure_se": 0.01,
         "outcome_effect": 0.3 * bx + rng.normal(0, 0.01, m), "outcome_se": rng.uniform(0.008, 0.012, m),
         "exposure_n": 40000, "outcome_n": 50000}
    ).to_csv(table, index=False)  # fmt: skip
    registry = open_registry(str(tmp_path / "r.sqlite"))
    with registry.writing() as s:
        ensure_builtin(s, actor="t")
        reg.add_program(
            s, actor="t", slug="p", title="Lipids and heart disease", treatment="ldl", outcome="chd"
        )
        reg.add_instrument(
            s, actor="t", program="p", slug="ldl-variants", name="LDL-lowering variants", family="genetic-variant",
            columns=["score"], claims={"monotonicity": "Each allele lowers LDL in every carrier."},
        )  # fmt: skip
        reg.add_instrument(s, actor="t", program="p", slug="other", name="Other", family="distance-geography")
        link_threat(s, actor="t", instrument="ldl-variants", code="GV-I01", state="mitigated",
                    argument="One ancestry group; 20 principal components.", evidence="")  # fmt: skip
        link_threat(s, actor="t", instrument="ldl-variants", code="GV-E01", state="open",
                    argument="Some variants sit near genes for triglycerides.", evidence="")  # fmt: skip
    run = run_analysis("variants", table, None, draws=50, seed=1, alpha=0.05, source=table.name)
    with registry.writing() as s:
        store_run(s, run, instrument="ldl-variants", actor="t")
    yield registry, run.result
    registry.dispose()


def _input(registry, slug: str):  # type: ignore[no-untyped-def]
    from ivdossier.workflows.dossiers import dossier_input

    with registry.reading() as s:
        return dossier_input(s, slug, generated_at="2026-01-01T00:00:00+00:00", reproducible=True)


def test_checklist_is_filled_from_the_runs_links_and_claims(gv_registry) -> None:  # type: ignore[no-untyped-def]
    registry, evidence = gv_registry
    filled = dossier_checklist(_input(registry, "ldl-variants"))
    assert filled is not None
    status = {i.item.code: i for i in filled.items}
    assert [i.item.code for i in filled.items] == [i.code for i in ITEMS]  # every item, in order
    # computed from the stored summary-data run: the answer carries the run's own mean F
    assert status["GV-R2"].status == "computed"
    assert f"mean F {evidence.ratios.mean_f:.3g}" in status["GV-R2"].answer
    assert status["GV-D3"].status == "computed" and status["GV-X3"].status == "computed"
    # provided by a reviewed link (mitigated, with an argument), quoted with its code and state
    assert status["GV-X1"].status == "provided"
    assert status["GV-X1"].answer == "GV-I01 (mitigated): One ancestry group; 20 principal components."
    # an open link is not an answer; the team's monotonicity claim is
    assert status["GV-E1"].status == "missing"
    assert status["GV-M1"].status == "provided" and "lowers LDL in every carrier" in status["GV-M1"].answer
    assert status["GV-R3"].status == "missing"  # nothing in the registry speaks to overlapping samples


def test_dossier_of_a_genetic_variant_instrument_shows_the_checklist_only_there(gv_registry) -> None:  # type: ignore[no-untyped-def]
    from ivdossier.reports.dossier import dossier_markdown

    registry, _ = gv_registry
    text = dossier_markdown(_input(registry, "ldl-variants"))
    section = text.split("## Reporting checklist for genetic-variant instruments", 1)[1].split("\n## ", 1)[0]
    assert "- **provided** GV-X1:" in section and "STROBE-MR" in section
    assert "cannot establish exclusion or exogeneity" in section
    assert "Reporting checklist" not in dossier_markdown(_input(registry, "other"))


def test_every_mapped_threat_is_a_genetic_variant_catalogue_entry_and_a_checklist_item() -> None:
    from ivdossier.threats_catalog.catalog import load_builtin

    catalogue = {t.code: t for t in load_builtin().threats}
    items = {i.code for i in ITEMS}
    for code, item in THREAT_ITEMS.items():
        assert "genetic-variant" in catalogue[code].families and item in items
    gv_codes = {c for c, t in catalogue.items() if "genetic-variant" in t.families and c.startswith("GV-")}
    assert gv_codes == set(THREAT_ITEMS)  # every catalogue threat of the family maps to an item
