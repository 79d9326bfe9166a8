"""The built-in threat catalogue: every entry parses, is consistent with the check list and the graph checker,
and the catalogue covers every family and condition the design asks for."""

from __future__ import annotations

import re
from collections import Counter
from importlib import resources
from pathlib import Path

import networkx as nx
import pytest
from nx_reference import to_networkx

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.threats_catalog import CATALOGUE_VERSION, load_builtin
from ivdossier.threats_catalog.catalog import (
    ATTACKS,
    CONDITIONS,
    FAMILIES,
    FAMILY_PREFIXES,
    MECHANISMS,
    Catalog,
    load_directory,
    suggest_for_family,
)
from ivdossier.threats_catalog.checks import CHECKS, COMMANDS, checks_for_command, get_check
from ivdossier.threats_catalog.graph import build_graph, check_instrument

CATALOG = load_builtin()
ENTRY_DIR = Path(str(resources.files("ivdossier.threats_catalog.entries")))


def test_catalogue_has_at_least_110_entries_and_a_version() -> None:
    assert len(CATALOG) >= 110
    assert CATALOG.version == CATALOGUE_VERSION
    assert re.fullmatch(r"\d+\.\d+\.\d+", CATALOG.version)


def test_every_toml_file_is_loaded_once_and_codes_are_unique() -> None:
    files = sorted(ENTRY_DIR.glob("*.toml"))
    assert len(files) == len(CATALOG)
    codes = CATALOG.codes()
    assert len(set(codes)) == len(codes)
    assert {f.stem.upper() for f in files} == set(codes)


def test_load_builtin_is_cached() -> None:
    assert load_builtin() is load_builtin()


def test_codes_follow_the_documented_scheme() -> None:
    letters = {"relevance": "R", "exclusion": "E", "exogeneity": "I", "monotonicity": "M"}
    letters |= {"target": "T", "uncertainty": "U", "specification": "S"}
    for threat in CATALOG:
        prefix, rest = threat.code.split("-")
        assert prefix == FAMILY_PREFIXES[threat.families[0]], threat.code
        assert rest[0] == letters[threat.condition], threat.code
        assert not threat.is_team


def test_every_referenced_check_exists_and_names_a_planned_command() -> None:
    for threat in CATALOG:
        for name in threat.checks:
            assert name in CHECKS, (threat.code, name)
    for check in CHECKS.values():
        # a check the tool can compute names its command; one it cannot says what to do by hand instead
        assert (check.command in COMMANDS) if check.computable else (check.command == "" and check.note)
        assert check.description.endswith(".")
    # every planned command runs at least one check, so no command is left without a purpose
    assert all(checks_for_command(cmd) for cmd in COMMANDS)


def test_every_check_is_cited_by_some_entry() -> None:
    cited = {name for t in CATALOG for name in t.checks}
    assert cited == set(CHECKS)


def test_unknown_check_and_command_raise_with_the_valid_names() -> None:
    with pytest.raises(NotFoundError, match="unknown check 'f-test'; use one of: first-stage-strength"):
        get_check("f-test")
    with pytest.raises(NotFoundError, match="unknown command 'ivdossier fit'"):
        checks_for_command("ivdossier fit")


def test_counts_per_family_and_condition() -> None:
    counts = CATALOG.counts()
    for family in FAMILIES:
        assert counts["family"][family] >= 3, family
    for condition in CONDITIONS:
        assert counts["condition"][condition] >= 3, condition
    assert len([f for f in FAMILIES if f != "any"]) >= 12


def test_every_mechanism_category_is_used() -> None:
    used = Counter(t.mechanism for t in CATALOG)
    assert set(used) == set(MECHANISMS)


def test_interference_is_filed_by_the_shape_of_its_path() -> None:
    # documented in catalog.py: a unit's own instrument moving others' treatment bypasses its own treatment
    # (exclusion); an instrument merely correlated with neighbours' instruments runs back to a shared cause
    # (exogeneity)
    spill = CATALOG.search(mechanism="interference")
    assert len(spill) >= 4
    for threat in spill:
        G = build_graph(fragments=[threat.fragment])
        assert (threat.condition == "exclusion") == (not list(G.predecessors("Z"))), threat.code
        assert threat.condition in ("exclusion", "exogeneity")


def test_every_fragment_is_acyclic_with_the_base_graph() -> None:
    for threat in CATALOG:
        G = build_graph(fragments=[threat.fragment])
        assert nx.is_directed_acyclic_graph(to_networkx(G)), threat.code
        assert G.has_edge("Z", "X") and G.has_edge("X", "Y")


@pytest.mark.parametrize(
    "code", [t.code for t in load_builtin() if t.condition in ("exclusion", "exogeneity")]
)
def test_exclusion_and_exogeneity_fragments_break_their_own_condition(code: str) -> None:
    """A fatal link to one of these threats, alone, must make the graph verdict for its condition 'broken' and an
    open link 'at-risk' (fragments are drawn so that the definitions in graph.py expose the threat); measurement
    entries that the graph cannot draw make it 'at-risk' while unresolved."""
    threat = CATALOG.get(code)
    for state, expected in (("fatal", "broken"), ("open", "at-risk")):
        G = build_graph(fragments=[threat.fragment], link_states={code: state})
        verdict = check_instrument(G, instrument="Z", treatment="X", outcome="Y")
        if threat.fragment.is_empty:
            assert threat.mechanism == "measurement"
            assert verdict.value(threat.condition) == ("broken" if state == "fatal" else "at-risk")
        else:
            assert verdict.value(threat.condition) == expected
            assert any(code in p.threats and p.condition == threat.condition for p in verdict.open_paths)
        assert not verdict.criterion_holds or threat.fragment.is_empty


@pytest.mark.parametrize(
    "code", [t.code for t in load_builtin() if t.condition in ("relevance", "monotonicity")]
)
def test_relevance_and_monotonicity_entries_are_flagged_at_risk_when_open(code: str) -> None:
    threat = CATALOG.get(code)
    assert threat.fragment.is_empty  # a graph cannot express strength or defiers
    G = build_graph(fragments=[threat.fragment], link_states={code: "open"})
    verdict = check_instrument(G, instrument="Z", treatment="X", outcome="Y")
    assert verdict.value(threat.condition) == "at-risk"
    assert code in verdict.condition(threat.condition).threats


def test_search_filters_combine() -> None:
    hits = CATALOG.search(condition="exogeneity", family="genetic-variant")
    assert {t.code for t in hits} >= {"GV-I01", "GV-I02", "GV-I03", "GV-I04"}
    assert all(t.condition == "exogeneity" for t in hits)
    assert [t.code for t in CATALOG.search(text="ANCESTRY principal")] == ["GV-I01"]
    generic = CATALOG.search(family="price-tax", condition="monotonicity", include_generic=True)
    assert {"AN-M01", "AN-M02"} <= {t.code for t in generic}
    assert CATALOG.search(text="no-such-word-anywhere") == []


def test_search_rejects_unknown_filter_values_with_a_suggestion() -> None:
    with pytest.raises(InvalidInputError, match="did you mean 'exclusion'"):
        CATALOG.search(condition="exclusio")
    with pytest.raises(InvalidInputError, match="family 'weather' is not allowed"):
        CATALOG.search(family="weather")


def test_get_suggests_close_codes() -> None:
    with pytest.raises(NotFoundError, match=r"did you mean.*GV-E01"):
        CATALOG.get("GV-E1")


@pytest.mark.parametrize("family", [f for f in FAMILIES if f != "any"])
def test_suggest_for_family_lists_own_entries_then_generic_ones(family: str) -> None:
    suggested = suggest_for_family(family)
    own = [t for t in suggested if family in t.families]
    assert len(own) >= 3
    assert suggested[: len(own)] == own
    assert all("any" in t.families for t in suggested[len(own) :])
    order = [ATTACKS.index(t.condition) for t in own]
    assert order == sorted(order)


def test_suggest_for_unknown_family_names_the_valid_ones() -> None:
    with pytest.raises(InvalidInputError, match="use one of: weather-shock, distance-geography"):
        suggest_for_family("rainfall")


def test_descriptions_are_substantial_and_references_are_author_year() -> None:
    for threat in CATALOG:
        assert len(threat.description) >= 100, threat.code
        assert threat.mitigations and threat.references
        for ref in threat.references:
            assert re.search(r"\b(19|20)\d\d\b", ref), (threat.code, ref)


def test_load_directory_of_the_builtin_folder_equals_load_builtin() -> None:
    again = load_directory(ENTRY_DIR)
    assert isinstance(again, Catalog)
    assert again.threats == CATALOG.threats
