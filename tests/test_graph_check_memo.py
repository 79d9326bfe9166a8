"""Remembered graph checks: a check shared between graphs that differ only in the instrument's name gives every
instrument exactly the verdict its own check gives.

Exact identity: each remembered verdict is compared with the check computed afresh on the same graph
(`graph._check`, the computation the memo stores), over random graphs built from the built-in catalogue's
fragments, random link states, covariates, team edges and conditioning sets, with instrument names that sort
before, between and after the other nodes and names that are prefixes of other nodes' names.
"""

from __future__ import annotations

import random

import pytest

from ivdossier.errors import IvdossierError
from ivdossier.threats_catalog import graph as g
from ivdossier.threats_catalog import load_builtin

NAMES = ("a", "Z", "Z1", "case", "zz_top", "instrument_wave", "Ω", "m")
STATES = ("open", "fatal", "rebutted", "mitigated", "accepted")


def _random_case(rng: random.Random) -> tuple[dict[str, object], list[tuple[str, str]], set[str]]:
    entries = [e for e in load_builtin().threats if not e.fragment.is_empty]
    chosen = rng.sample(entries, rng.randint(0, 6))
    covariates = {f"w{i}": rng.random() < 0.7 for i in range(rng.randint(0, 3))}
    build = {
        "treatment": "X",
        "outcome": "Y",
        "covariates": covariates,
        "fragments": [e.fragment for e in chosen],
        "link_states": {e.code: rng.choice(STATES) for e in chosen} if rng.random() < 0.8 else None,
    }
    team = [(rng.choice([*covariates, "X", "U"]), rng.choice(["Y", "X"])) for _ in range(rng.randint(0, 2))]
    return build, team, set(covariates)


def _outcome(G: object, **kw: object) -> object:
    try:
        return g._check(G, **kw)  # type: ignore[arg-type]
    except IvdossierError as exc:
        return (type(exc), str(exc))


def _remembered(G: object, **kw: object) -> object:
    try:
        return g.check_instrument(G, **kw)  # type: ignore[arg-type]
    except IvdossierError as exc:
        return (type(exc), str(exc))


def test_a_remembered_check_equals_the_check_computed_afresh() -> None:
    shared = 0
    g._CHECKED.clear()  # kept across cases, so a key that missed a difference between two graphs would show
    for seed in range(200):
        rng = random.Random(seed)
        build, team, covariates = _random_case(rng)
        conditioning = {c for c in covariates if rng.random() < 0.5}
        for name in rng.sample(NAMES, 4):
            try:
                G = g.build_graph(instrument=name, **build)  # type: ignore[arg-type]
            except IvdossierError:
                continue  # the name clashes with a fragment's node: no graph to compare
            G.graph["skipped_edges"] = g.add_team_edges(G, [(name if u == "U" else u, v) for u, v in team])
            kw = {"instrument": name, "treatment": "X", "outcome": "Y", "conditioning": conditioning}
            before = len(g._CHECKED)
            assert _remembered(G, **kw) == _outcome(G, **kw), (seed, name)
            assert _remembered(G, **kw) == _outcome(G, **kw), (seed, name)  # the second time from the memo
            shared += bool(before) and len(g._CHECKED) == before
            # The same graph with one thing the check reads changed: a node's flag or a threat's state.
            H = G.copy()
            others = [n for n in H if n not in (name, "X", "Y")]
            if others and rng.random() < 0.7:
                node = rng.choice(others)
                flag = rng.choice(["selection", "adjusted", "observed", "fixes_instrument"])
                H.nodes[node][flag] = not H.nodes[node].get(flag, False)
            elif H.graph["threats"]:
                code = rng.choice(sorted(H.graph["threats"]))
                H.graph["threats"] = {
                    **H.graph["threats"],
                    code: {**H.graph["threats"][code], "state": "fatal"},
                }
            assert _remembered(H, **kw) == _outcome(H, **kw), (seed, name, "changed")
    assert shared > 200  # most names after a seed's first were answered by the memo


def test_graphs_differing_only_in_the_instruments_name_share_one_check() -> None:
    g._CHECKED.clear()
    fragments = [load_builtin().get(code).fragment for code in ("DG-E01", "DM-E01")]
    verdicts = []
    for name in ("fibre_wave", "a", "Z1"):
        G = g.build_graph(
            instrument=name, fragments=fragments, link_states={"DG-E01": "open", "DM-E01": "fatal"}
        )
        verdicts.append(g.check_instrument(G, instrument=name, treatment="X", outcome="Y"))
        assert verdicts[-1] == g._check(G, instrument=name, treatment="X", outcome="Y")
    assert len(g._CHECKED) == 1
    assert [v.instrument for v in verdicts] == ["fibre_wave", "a", "Z1"]
    assert all(p.nodes[0] == "Z1" for p in verdicts[2].open_paths) and verdicts[2].open_paths
    assert all(g._NAME_MARK not in r for v in verdicts for c in v.conditions for r in c.reasons)


def test_a_graph_whose_names_hold_the_mark_is_checked_without_the_memo() -> None:
    g._CHECKED.clear()
    name = "wave" + g._NAME_MARK
    G = g.build_graph(instrument=name)
    assert g.check_instrument(G, instrument=name, treatment="X", outcome="Y") == g._check(
        G, instrument=name, treatment="X", outcome="Y"
    )
    assert not g._CHECKED


def test_the_path_limits_in_force_are_part_of_what_is_remembered(monkeypatch: pytest.MonkeyPatch) -> None:
    g._CHECKED.clear()
    G = g.build_graph(fragments=[load_builtin().get("DG-E01").fragment])
    assert not g.check_instrument(G, instrument="Z", treatment="X", outcome="Y").paths_truncated
    monkeypatch.setattr(g, "_MAX_PATHS_VISITED", 0)
    assert g.check_instrument(G, instrument="Z", treatment="X", outcome="Y") == g._check(
        G, instrument="Z", treatment="X", outcome="Y"
    )
    assert g.check_instrument(G, instrument="Z", treatment="X", outcome="Y").paths_truncated
