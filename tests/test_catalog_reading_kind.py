"""Threats of kind "reading" reach the documents: the dossier gives them their own block after the four
conditions and leaves the condition verdicts as they were, the site's catalogue page lists them under their
aspect, and the check text says when ivdossier cannot compute a check yet."""

from __future__ import annotations

import dataclasses

from ivdossier.reports.dossier import dossier_markdown
from ivdossier.reports.inputs import CatalogEntry, LinkInfo
from ivdossier.reports.sample import sample_input
from ivdossier.threats_catalog import load_builtin
from ivdossier.threats_catalog.checks import CHECKS


def _with_reading_link() -> tuple[str, str]:
    base = sample_input()
    threat = load_builtin().get("AN-T01")
    link = LinkInfo(threat_code=threat.code, title=threat.title, condition=threat.condition, state="open")
    return dossier_markdown(base), dossier_markdown(dataclasses.replace(base, links=(*base.links, link)))


def test_the_dossier_shows_reading_threats_in_their_own_block() -> None:
    before, after = _with_reading_link()
    block = after.split("### Reading the estimate")[1].split("\n## ")[0]
    assert "#### AN-T01 · The compliers are not the people the decision is about" in block
    assert "Puts at risk: what the estimate is an estimate of." in block
    assert "They do not change any condition's verdict." in block
    assert "### Reading the estimate" not in before

    def verdict_rows(md: str) -> list[str]:
        glance = md.split("## At a glance")[1].split("\n## ")[0]
        return [line for line in glance.splitlines() if line.startswith("| ")]

    assert verdict_rows(after) == verdict_rows(before)  # the four verdicts are untouched
    assert "threats: 5 (3 open, 2 rebutted)" in after  # the reading threat is counted among the linked ones


def test_reading_aspects_are_accepted_as_catalogue_entries_for_the_site() -> None:
    entry = CatalogEntry(code="AN-S01", title="chosen after seeing results", condition="specification")
    assert entry.condition == "specification"


def test_uncomputable_checks_say_so_where_plans_and_dossiers_show_a_command() -> None:
    check = CHECKS["differential-attrition"]
    assert check.how_to_run.startswith("not computable by ivdossier yet; ")
    assert CHECKS["first-stage-strength"].how_to_run == "ivdossier estimate"
