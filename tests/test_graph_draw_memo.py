"""Remembered diagrams: a drawing shared between graphs that differ only in the instrument's name and the title
is, filled in, exactly the drawing made directly.

Exact identity: every drawing `render_svg` returns is compared with the drawing made afresh (`draw._draw`, the
computation the memo stores) over random graphs from the built-in catalogue's fragments with random link states,
covariates, conditioning and verdict strips, instrument names that sort before, between and after the other
nodes (as wide or wider than one another), titles with characters that need escaping, and variants of each graph
that change one thing the drawing reads (a label, a role, a team edge, a conditioned node).
"""

from __future__ import annotations

import random

from ivdossier.errors import IvdossierError
from ivdossier.threats_catalog import draw, load_builtin
from ivdossier.threats_catalog import graph as g

NAMES = (
    *("a", "Z", "Z1", "Z9", "z10", "z20", "z31", "case", "zz_top", "wave<&>'\"", "Ω", "m"),
    *(
        "am",
        "ma",
        "mz",
        "zm",
    ),  # as wide and as long as one another, in different places among the other names
    *(
        "wave_iiiiiiiiiiii",
        "wave_MMMMMMMMMMMM",
        "wave_llllllllllll",
    ),  # as long, not as wide (wider than the tag)
    *("wave_iiiiiiiiiiiiow", "wave_iiiiiiiiiiiiaci"),  # as wide at 12 px bold ("ow", "aci"), not as long
)
TITLES = (
    "Causal diagram for A",
    "Causal diagram for B",
    "Causal diagram for <x> & 'y'",
    "T",
    "A causal diagram with a title long enough to be the widest line of the drawing: iiiiiiii",
    "A causal diagram with a title long enough to be the widest line of the drawing: MMMMMMMM",
)
LONG = "an_unmeasured_variable_with_a_name_long_enough_to_make_its_path_the_widest_line"
STATES = ("open", "fatal", "rebutted", "mitigated", "accepted")


def _direct(G: object, verdict: object, title: str) -> str:
    return draw._draw(G, verdict, title, None, marked=False)  # type: ignore[arg-type]


def test_a_remembered_drawing_equals_the_drawing_made_afresh() -> None:
    entries = [e for e in load_builtin().threats if not e.fragment.is_empty]
    draw._DRAWN.clear()
    shared = 0
    for seed in range(120):
        rng = random.Random(seed)
        chosen = rng.sample(entries, rng.randint(0, 5))
        covariates = {f"w{i}": rng.random() < 0.7 for i in range(rng.randint(0, 2))}
        if rng.random() < 0.4:
            covariates[LONG] = False
        states = {e.code: rng.choice(STATES) for e in chosen}
        conditioning = {c for c, measured in covariates.items() if measured and rng.random() < 0.5}
        for name in rng.sample(NAMES, 8):
            try:
                G = g.build_graph(
                    instrument=name,
                    covariates=covariates,
                    fragments=[e.fragment for e in chosen],
                    link_states=states,
                )
                if LONG in covariates:  # an open path whose line is the widest of the drawing
                    G.graph["skipped_edges"] = g.add_team_edges(G, [(name, LONG), (LONG, "Y")])
                verdict = g.check_instrument(
                    G, instrument=name, treatment="X", outcome="Y", conditioning=conditioning
                )
            except IvdossierError:
                continue  # a name that clashes with a fragment's node, or an unusable conditioning set
            title = TITLES[seed % len(TITLES)]
            before = len(draw._DRAWN)
            assert draw.render_svg(G, verdict, title=title) == _direct(G, verdict, title), (seed, name)
            shared += bool(before) and len(draw._DRAWN) == before
            H = G.copy()
            node = rng.choice([n for n in H if n != name])
            change = rng.choice(["label", "role", "team", "observed"])
            if change == "label":
                H.nodes[node]["label"] = "another label"
            elif change == "role":
                H.nodes[node]["role"] = (
                    "unobserved" if H.nodes[node].get("role") != "unobserved" else "covariate"
                )
            elif change == "observed":
                H.nodes[node]["observed"] = not H.nodes[node].get("observed", True)
            else:
                u, v = rng.choice(list(H.edges))
                H.edges[u, v]["team"] = not H.edges[u, v].get("team")
            assert draw.render_svg(H, verdict, title=title) == _direct(H, verdict, title), (
                seed,
                name,
                change,
            )
    assert shared > 50  # many drawings came from the memo


def test_a_title_or_name_holding_a_mark_is_drawn_without_the_memo() -> None:
    draw._DRAWN.clear()
    G = g.build_graph(instrument="wave")
    verdict = g.check_instrument(G, instrument="wave", treatment="X", outcome="Y")
    title = "Causal diagram " + draw._NAME_MARK
    assert draw.render_svg(G, verdict, title=title) == _direct(G, verdict, title)
    assert not draw._DRAWN
