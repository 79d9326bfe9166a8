"""Entry validation: a malformed entry fails with one message naming the file, the field and the fix."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import pytest

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.threats_catalog.catalog import Threat, load_directory, load_entry_file

GOOD: dict[str, Any] = {
    "code": "DG-E07",
    "title": "A nearby depot changes air quality",
    "condition": "exclusion",
    "mechanism": "alternative-pathway",
    "families": ["distance-geography"],
    "description": "Living near the depot that hosts the service also means breathing its exhaust, which can "
    "affect respiratory outcomes on its own.",
    "testability": "partly-testable",
    "checks": ["placebo-outcome"],
    "mitigations": ["Adjust for measured air quality."],
    "references": ["Garabedian et al. 2014"],
    "fragment": {
        "nodes": [{"name": "air_quality", "observed": True, "label": "air quality"}],
        "edges": [["Z", "air_quality"], ["air_quality", "Y"]],
    },
}


def variant(**changes: Any) -> dict[str, Any]:
    data = copy.deepcopy(GOOD)
    for key, value in changes.items():
        if value is None:
            data.pop(key)
        else:
            data[key] = value
    return data


def fragment(**changes: Any) -> dict[str, Any]:
    frag = copy.deepcopy(GOOD["fragment"])
    frag.update(changes)
    return variant(fragment=frag)


def test_good_entry_parses_and_normalises_whitespace() -> None:
    threat = Threat.from_dict(variant(title="  A nearby   depot changes air quality "), source="x.toml")
    assert threat.title == "A nearby depot changes air quality"
    assert threat.fragment.threat_code == "DG-E07"
    assert threat.fragment.condition == "exclusion"
    assert threat.fragment.node("air_quality").observed is True


@pytest.mark.parametrize(
    ("data", "message"),
    [
        (variant(code=None), r"x\.toml: field 'code' is missing"),
        (variant(code="DG-E7"), r"x\.toml \[DG-E7\]: code 'DG-E7' does not follow the scheme"),
        (
            variant(code="WS-E07"),
            r"code prefix 'WS' does not match the first family 'distance-geography'; use prefix 'DG'",
        ),
        (variant(code="DG-I07"), r"code letter 'I' does not match condition 'exclusion'; use 'E'"),
        (variant(code="T-bad code"), r"team code 'T-bad code' is malformed"),
        (
            variant(condition="exclusio"),
            r"field 'condition' 'exclusio' is not allowed \(did you mean 'exclusion'\?\)",
        ),
        (variant(mechanism="defiers"), r"mechanism 'defiers' cannot attack condition 'exclusion'"),
        (variant(families=["distance"]), r"family in field 'families' 'distance' is not allowed"),
        (variant(families=[]), r"field 'families' is empty; list at least one item"),
        (variant(checks=["f-test"]), r"field 'checks' names unknown check 'f-test'"),
        (variant(checks=[]), r"field 'checks' is empty"),
        (variant(testability="maybe"), r"field 'testability' 'maybe' is not allowed"),
        (variant(description="too short"), r"field 'description' has 9 characters; write between 60"),
        (variant(references=None), r"field 'references' is empty"),
        (variant(colour="red"), r"unknown field\(s\) 'colour'; allowed: code, title"),
        (fragment(edges=[["Z", "smog"]]), r"fragment edge \['Z', 'smog'\] names undeclared node 'smog'"),
        (
            fragment(edges=[["Z", "air_quality"], ["air_quality", "Y"], ["Y", "Z"]]),
            r"fragment makes a cycle with the base graph: X -> Y -> Z -> X; reverse or drop one edge",
        ),
        (fragment(edges=[["Z", "air_quality"], ["air_quality", "air_quality"]]), r"self-loop"),
        (fragment(edges=[["Z", "air_quality"], ["X", "Y"]]), r"repeated or already in the base graph"),
        (fragment(nodes=[{"name": "U"}]), r"'U' is a role token; do not declare it"),
        (fragment(nodes=[{"name": "air quality"}]), r"name 'air quality' must start with a letter"),
        (fragment(nodes=[{"name": "air_quality", "observed": "yes"}]), r"'observed' must be true or false"),
        (fragment(nodes=[{"name": "air_quality"}, {"name": "smog"}]), r"node\(s\) smog appear in no edge"),
        (fragment(arrows=[]), r"fragment has unknown key\(s\) arrows"),
    ],
)
def test_malformed_entries_raise_naming_source_field_and_fix(data: dict[str, Any], message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        Threat.from_dict(data, source="x.toml")


def test_argument_only_entries_may_cite_no_check() -> None:
    threat = Threat.from_dict(variant(checks=[], testability="argument-only"))
    assert threat.checks == ()


def test_file_name_must_match_the_code(tmp_path: Path) -> None:
    path = tmp_path / "wrong-name.toml"
    path.write_text(_as_toml(GOOD), encoding="utf-8")
    with pytest.raises(
        InvalidInputError, match=r"wrong-name\.toml: file holds code 'DG-E07'; rename .* dg-e07\.toml"
    ):
        load_entry_file(path)


def test_toml_syntax_error_names_the_file(tmp_path: Path) -> None:
    path = tmp_path / "dg-e07.toml"
    path.write_text('code = "DG-E07\n', encoding="utf-8")
    with pytest.raises(InvalidInputError, match=r"dg-e07\.toml: not valid TOML"):
        load_entry_file(path)


def test_directory_loading_rejects_duplicates_team_codes_and_empty_folders(tmp_path: Path) -> None:
    with pytest.raises(NotFoundError, match="does not exist"):
        load_directory(tmp_path / "missing")
    with pytest.raises(InvalidInputError, match=r"holds no \*\.toml entries"):
        load_directory(tmp_path)
    team = variant(code="T-DEPOT")
    (tmp_path / "t-depot.toml").write_text(_as_toml(team), encoding="utf-8")
    with pytest.raises(InvalidInputError, match=r"team codes \(T-\.\.\.\) belong in the registry"):
        load_directory(tmp_path)


def test_directory_round_trip(tmp_path: Path) -> None:
    (tmp_path / "dg-e07.toml").write_text(_as_toml(GOOD), encoding="utf-8")
    cat = load_directory(tmp_path, version="9.9.9")
    assert cat.version == "9.9.9"
    assert cat.get("DG-E07").to_dict()["fragment"]["edges"] == [["Z", "air_quality"], ["air_quality", "Y"]]


def _as_toml(data: dict[str, Any]) -> str:
    import tomli_w

    return tomli_w.dumps(data)
