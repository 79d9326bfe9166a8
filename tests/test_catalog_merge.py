"""Team-written entries: JSON round trip and merging with the built-in catalogue in a separate namespace."""

from __future__ import annotations

import json
from typing import Any

import pytest

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.threats_catalog import Catalog, Threat, load_builtin
from ivdossier.threats_catalog.catalog import merge

BUILTIN = load_builtin()

TEAM: dict[str, Any] = {
    "code": "T-FIBRE-1",
    "title": "Fibre rollout brought road works that closed clinics",
    "condition": "exclusion",
    "mechanism": "alternative-pathway",
    "families": ["historical-circumstance", "distance-geography"],
    "description": "Districts reached early by the fibre rollout also had months of road works, during which "
    "two rural clinics closed their doors, which may raise emergency visits on its own.",
    "testability": "partly-testable",
    "checks": ["placebo-outcome", "exclusion-sensitivity"],
    "mitigations": ["Control for clinic closure months from the health authority's register."],
    "references": ["Team field notes 2026"],
    "fragment": {
        "nodes": [{"name": "clinic_closures", "observed": True, "label": "clinic closures"}],
        "edges": [["Z", "clinic_closures"], ["clinic_closures", "Y"]],
    },
}


@pytest.mark.parametrize("code", BUILTIN.codes())
def test_every_builtin_entry_survives_a_json_round_trip(code: str) -> None:
    threat = BUILTIN.get(code)
    text = json.dumps(threat.to_dict())
    assert Threat.from_dict(json.loads(text)) == threat


def test_team_entry_round_trip_and_namespace() -> None:
    threat = Threat.from_dict(TEAM, source="registry row 7")
    assert threat.is_team
    assert Threat.from_dict(json.loads(json.dumps(threat.to_dict()))) == threat


def test_merge_appends_team_entries_after_builtin_ones() -> None:
    merged = merge(BUILTIN, [TEAM])
    assert len(merged) == len(BUILTIN) + 1
    assert merged.codes()[: len(BUILTIN)] == BUILTIN.codes()
    assert merged.get("T-FIBRE-1").title.startswith("Fibre rollout")
    assert merged.version == BUILTIN.version
    assert "T-FIBRE-1" in {t.code for t in merged.search(text="clinic closure")}


def test_catalogue_upgrade_keeps_team_entries() -> None:
    # An older built-in catalogue (missing some entries) and the current one both merge with the same team
    # entries; the upgrade only adds built-in codes and leaves the team entry untouched.
    older = Catalog(version="0.9.0", threats=BUILTIN.threats[:-5])
    team = Threat.from_dict(TEAM)
    before, after = merge(older, [team]), merge(BUILTIN, [team])
    assert set(after.codes()) - set(before.codes()) == set(BUILTIN.codes()[-5:])
    assert before.get("T-FIBRE-1") == after.get("T-FIBRE-1") == team


def test_team_entries_must_use_the_team_namespace() -> None:
    data = dict(TEAM, code="WS-E01", families=["weather-shock"])
    with pytest.raises(
        InvalidInputError, match=r"team entry 'WS-E01' uses the built-in code namespace; .*'T-WSE01'"
    ):
        merge(BUILTIN, [data])


def test_duplicate_team_codes_are_refused() -> None:
    with pytest.raises(ConflictError, match="team entry code 'T-FIBRE-1' is already in use"):
        merge(BUILTIN, [TEAM, dict(TEAM, title="Another title for the same code")])


def test_team_entries_are_validated_like_builtin_ones() -> None:
    with pytest.raises(
        InvalidInputError, match=r"team entry #1 \[T-FIBRE-1\]: field 'checks' names unknown check"
    ):
        merge(BUILTIN, [dict(TEAM, checks=["eyeball"])])


def test_a_catalogue_refuses_two_entries_with_one_code() -> None:
    first = BUILTIN.threats[0]
    with pytest.raises(ConflictError, match=f"threat code '{first.code}' appears twice"):
        Catalog(version="x", threats=(first, first))


def test_catalogue_to_dict_is_json_safe() -> None:
    data = json.loads(json.dumps(merge(BUILTIN, [TEAM]).to_dict()))
    assert data["version"] == BUILTIN.version
    assert data["threats"][-1]["code"] == "T-FIBRE-1"
