"""Threat catalogue: frozen records, the TOML loader with validation, search, and merging with team entries.

Code scheme
-----------
Built-in codes look like ``WS-E03``: a two-letter family prefix (:data:`FAMILY_PREFIXES`, taken from the
entry's first family), a dash, one condition letter (``R`` relevance, ``E`` exclusion, ``I`` independence =
exogeneity, ``M`` monotonicity) and a two-digit serial. Codes never change meaning once released; retired
codes are not reused. Team-written entries live in their own namespace: ``T-`` followed by upper-case letters,
digits and dashes (e.g. ``T-CLINIC-1``), so a catalogue upgrade can add built-in codes without ever colliding
with a team's.

Conditions and mechanisms
-------------------------
The condition attacked is one of :data:`CONDITIONS`. Interference between units (spillovers) is filed under
condition ``exclusion`` with mechanism ``interference`` when unit i's own instrument reaches unit i's outcome
through other units' treatment (a path that bypasses unit i's own treatment), and under ``exogeneity`` when
unit i's instrument is merely correlated with its neighbours' instruments, whose treatment then spills over
(the path runs back from Z to a shared assignment). A ``bad-control`` is a control in the model that the
instrument itself moves (fragment node flagged ``adjusted``). Measurement
problems use mechanism ``measurement`` with whichever condition they damage (a noisy instrument weakens
relevance; an instrument recorded with error that tracks outcome causes breaks independence). The allowed
mechanism/condition pairs are in :data:`MECHANISMS`.

Threats of kind ``reading``
---------------------------
Some threats leave the four conditions alone and undermine how the estimate is read instead: what it is an
estimate of (aspect ``target``: compliers unlike the population a decision concerns, linear covariates that
give some units negative weight), whether its stated uncertainty is right (``uncertainty``: few clusters), or
how the specification was arrived at (``specification``: instrument, controls or sample chosen after seeing
results). Their ``condition`` field holds the aspect, their code letter is ``T``, ``U`` or ``S``, and
:attr:`Threat.kind` is ``reading`` (``condition`` for the rest). They draw no graph fragment: a graph cannot
express them, and they never change a condition's verdict.
"""

from __future__ import annotations

import difflib
import re
import tomllib
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from functools import lru_cache
from importlib import resources
from pathlib import Path
from typing import Any

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.threats_catalog.checks import CHECKS
from ivdossier.threats_catalog.version import CATALOGUE_VERSION
from ivdossier.vocabulary import CONDITIONS, READING_ASPECTS, THREAT_KINDS

#: Every value the ``condition`` field may take: one of the four conditions, or a reading aspect.
ATTACKS: tuple[str, ...] = CONDITIONS + READING_ASPECTS
#: ``condition``: the entry attacks one of the four identifying conditions. ``reading``: the instrument may be
#: valid, but the way the estimate is read (its meaning, its uncertainty, its specification) is at risk.
KINDS: tuple[str, ...] = THREAT_KINDS
CONDITION_LETTERS: dict[str, str] = {
    "relevance": "R",
    "exclusion": "E",
    "exogeneity": "I",
    "monotonicity": "M",
    "target": "T",
    "uncertainty": "U",
    "specification": "S",
}


def kind_of(condition: str) -> str:
    """``reading`` for the reading aspects, ``condition`` for the four conditions."""
    return "reading" if condition in READING_ASPECTS else "condition"


#: Built-in codes that were merged into another entry or replaced, with their successor. Registries carry
#: links, dismissals and critiques of a retired code over to its successor (with an audit event).
RETIRED: dict[str, str] = {
    "LE-I01": "AN-I02",  # follow-up response depending on the draw: a case of selection on observation
    "DM-E02": "PP-E02",  # the same person decides and records: one entry for both families
    "HC-R01": "AN-R02",  # a few historical units carry the first stage: a case of a fragile first stage
    "PT-M01": "PT-T01",  # stockpiling is intertemporal substitution, not defiance
}

#: Mechanism category -> the conditions it may attack.
MECHANISMS: dict[str, tuple[str, ...]] = {
    "weak-first-stage": ("relevance",),
    "fragile-first-stage": ("relevance",),
    "alternative-pathway": ("exclusion",),
    "direct-effect": ("exclusion",),
    "outcome-measurement": ("exclusion",),
    "behavioural-response": ("exclusion",),
    "general-equilibrium": ("exclusion",),
    "interference": ("exclusion", "exogeneity"),
    "common-cause": ("exogeneity",),
    "bad-control": ("exogeneity",),
    "selection-attrition": ("exogeneity",),
    "reverse-timing": ("exogeneity",),
    "defiers": ("monotonicity",),
    "measurement": ("relevance", "exclusion", "exogeneity", "target"),
    "estimand-scope": ("target",),
    "covariate-weighting": ("target",),
    "inference": ("uncertainty",),
    "specification-search": ("specification",),
}

#: Family slug -> two-letter code prefix. ``any`` marks generic entries that apply to every family.
FAMILY_PREFIXES: dict[str, str] = {
    "weather-shock": "WS",
    "distance-geography": "DG",
    "lottery-encouragement": "LE",
    "eligibility-threshold": "ET",
    "decision-maker-assignment": "DM",
    "price-tax": "PT",
    "birth-entry-timing": "BT",
    "exposure-share": "ES",
    "genetic-variant": "GV",
    "provider-preference": "PP",
    "historical-circumstance": "HC",
    "lagged-internal": "LI",
    "any": "AN",
}
FAMILIES: tuple[str, ...] = tuple(FAMILY_PREFIXES)

TESTABILITY: tuple[str, ...] = ("testable", "partly-testable", "argument-only")

#: Role tokens a fragment uses for the instrument, treatment, outcome and the unmeasured X-Y confounder.
ROLE_TOKENS: tuple[str, ...] = ("Z", "X", "Y", "U")
BASE_EDGES: tuple[tuple[str, str], ...] = (("Z", "X"), ("X", "Y"), ("U", "X"), ("U", "Y"))

#: Boolean flags a fragment node may set (see :class:`FragmentNode`).
NODE_FLAGS: tuple[str, ...] = ("observed", "selection", "adjusted", "fixes_instrument")

TEAM_PREFIX = "T-"
_BUILTIN_CODE = re.compile(r"^(?P<prefix>[A-Z]{2})-(?P<letter>[REIMTUS])(?P<serial>[0-9]{2})$")
_TEAM_CODE = re.compile(r"^T-[A-Z0-9]+(?:-[A-Z0-9]+)*$")
_NODE_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]{0,47}$")
_FIELDS = (
    "code",
    "title",
    "kind",
    "condition",
    "mechanism",
    "families",
    "description",
    "testability",
    "checks",
    "mitigations",
    "references",
    "fragment",
)


#: Keys that :meth:`Threat.to_dict` adds for readers and that parsing ignores (they are recomputed).
_DERIVED = ("uncomputed_checks",)


@dataclass(frozen=True)
class FragmentNode:
    """A non-role node a fragment adds.

    ``observed`` means "usually measurable"; ``selection`` means the analysis sample is restricted on this node
    and ``adjusted`` that the analysis already holds it fixed as a control (the graph checker always conditions
    on both); ``fixes_instrument`` marks a node that pins the instrument down (the instrument is a deterministic
    function of it, as of a running variable, or it is a one-to-one function of the instrument, as age on a
    fixed test date is of birth date), which d-separation cannot see: holding it fixed leaves the instrument no
    variation, so it is never offered as an adjustment.
    """

    name: str
    observed: bool = False
    label: str = ""
    selection: bool = False
    adjusted: bool = False
    fixes_instrument: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form (the two newer flags only when set, so older stored fragments compare equal)."""
        out: dict[str, Any] = {
            "name": self.name,
            "observed": self.observed,
            "label": self.label,
            "selection": self.selection,
        }
        for flag in NODE_FLAGS[2:]:
            if getattr(self, flag):
                out[flag] = True
        return out


@dataclass(frozen=True)
class GraphFragment:
    """Nodes and edges one threat adds to the base graph Z -> X -> Y, U -> X, U -> Y.

    Edges name role tokens (Z, X, Y, U) or this fragment's own nodes. ``threat_code`` and ``condition`` tag
    the fragment so the graph checker can say which threat drew which edge. Relevance and monotonicity
    threats usually have no nodes or edges (a graph cannot express strength or defiers).
    """

    threat_code: str
    condition: str
    nodes: tuple[FragmentNode, ...] = ()
    edges: tuple[tuple[str, str], ...] = ()

    @property
    def is_empty(self) -> bool:
        """True when the fragment adds nothing to the graph."""
        return not self.nodes and not self.edges

    def node(self, name: str) -> FragmentNode:
        """The declared node called ``name``."""
        for node in self.nodes:
            if node.name == name:
                return node
        raise NotFoundError(f"fragment of {self.threat_code} has no node {name!r}")

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-safe form (the tag is implied by the enclosing threat)."""
        return {"nodes": [n.to_dict() for n in self.nodes], "edges": [list(e) for e in self.edges]}


@dataclass(frozen=True)
class Threat:
    """One catalogue entry: a way an instrument can fail, the condition it attacks and how to probe it."""

    code: str
    title: str
    condition: str
    mechanism: str
    families: tuple[str, ...]
    description: str
    testability: str
    checks: tuple[str, ...]
    mitigations: tuple[str, ...]
    references: tuple[str, ...]
    fragment: GraphFragment

    @property
    def kind(self) -> str:
        """``condition`` (attacks one of the four conditions) or ``reading`` (see :data:`KINDS`)."""
        return kind_of(self.condition)

    @property
    def uncomputed_checks(self) -> tuple[str, ...]:
        """The entry's checks that ``ivdossier`` cannot compute yet (the team runs them by hand meanwhile)."""
        return tuple(name for name in self.checks if not CHECKS[name].computable)

    @property
    def is_team(self) -> bool:
        """True for team-written entries (code in the ``T-`` namespace)."""
        return self.code.startswith(TEAM_PREFIX)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict that :meth:`from_dict` reads back unchanged; the registry stores team entries so."""
        return {
            "code": self.code,
            "title": self.title,
            "kind": self.kind,
            "condition": self.condition,
            "mechanism": self.mechanism,
            "families": list(self.families),
            "description": self.description,
            "testability": self.testability,
            "checks": list(self.checks),
            "mitigations": list(self.mitigations),
            "references": list(self.references),
            "fragment": self.fragment.to_dict(),
            "uncomputed_checks": list(self.uncomputed_checks),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any], *, source: str = "threat entry") -> Threat:
        """Validate ``data`` and build a Threat; errors name ``source``, the field and the fix."""
        return _parse_threat(data, source)


@dataclass(frozen=True)
class Catalog:
    """An ordered, code-indexed collection of threats with a version string."""

    version: str
    threats: tuple[Threat, ...]
    _index: dict[str, Threat] = field(default_factory=dict, compare=False, repr=False)

    def __post_init__(self) -> None:
        index: dict[str, Threat] = {}
        for threat in self.threats:
            if threat.code in index:
                raise ConflictError(f"threat code {threat.code!r} appears twice; give one of them a new code")
            index[threat.code] = threat
        object.__setattr__(self, "_index", index)

    def __len__(self) -> int:
        return len(self.threats)

    def __iter__(self) -> Iterator[Threat]:
        return iter(self.threats)

    def __contains__(self, code: object) -> bool:
        return code in self._index

    def codes(self) -> tuple[str, ...]:
        """All codes in catalogue order."""
        return tuple(t.code for t in self.threats)

    def get(self, code: str) -> Threat:
        """The threat with ``code`` (in any letter case when that is unambiguous); a NotFoundError suggests close
        codes."""
        try:
            return self._index[code]
        except KeyError:
            same = [c for c in self._index if c.casefold() == code.casefold()]
            if len(same) == 1:  # codes are accepted in any letter case
                return self._index[same[0]]
            near = difflib.get_close_matches(code, self._index, n=3)
            hint = f"; did you mean {', '.join(near)}?" if near else "; list codes with Catalog.codes()"
            raise NotFoundError(f"no threat with code {code!r} in catalogue {self.version}{hint}") from None

    def search(
        self,
        *,
        condition: str | None = None,
        family: str | None = None,
        text: str | None = None,
        mechanism: str | None = None,
        testability: str | None = None,
        include_generic: bool = False,
        kind: str | None = None,
    ) -> list[Threat]:
        """Threats matching every given filter, in catalogue order.

        ``condition`` takes a condition or a reading aspect; ``kind`` is ``condition`` or ``reading``;
        ``family`` matches entries listing that family (plus ``any`` entries when ``include_generic``);
        ``text`` is split into words that must all occur, case-insensitively, in the code, title,
        description, mechanism or mitigations.
        """
        if condition is not None:
            _check_choice(condition, ATTACKS, "condition", "search")
        if kind is not None:
            _check_choice(kind, KINDS, "kind", "search")
        if family is not None:
            _check_choice(family, FAMILIES, "family", "search")
        if mechanism is not None:
            _check_choice(mechanism, tuple(MECHANISMS), "mechanism", "search")
        if testability is not None:
            _check_choice(testability, TESTABILITY, "testability", "search")
        words = text.lower().split() if text else []
        out = []
        for threat in self.threats:
            if condition is not None and threat.condition != condition:
                continue
            if kind is not None and threat.kind != kind:
                continue
            if mechanism is not None and threat.mechanism != mechanism:
                continue
            if testability is not None and threat.testability != testability:
                continue
            if (
                family is not None
                and family not in threat.families
                and not (include_generic and "any" in threat.families)
            ):
                continue
            if words:
                hay = " ".join(
                    (threat.code, threat.title, threat.description, threat.mechanism, *threat.mitigations)
                ).lower()
                if not all(w in hay for w in words):
                    continue
            out.append(threat)
        return out

    def counts(self) -> dict[str, dict[str, int]]:
        """Number of entries per family and per condition or reading aspect (an entry counts once for each
        family it lists)."""
        per_family = {f: 0 for f in FAMILIES}
        per_condition = {c: 0 for c in ATTACKS}
        for threat in self.threats:
            per_condition[threat.condition] += 1
            for fam in threat.families:
                per_family[fam] += 1
        return {"family": per_family, "condition": per_condition}

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form: version and every entry."""
        return {"version": self.version, "threats": [t.to_dict() for t in self.threats]}


# --------------------------------------------------------------------------------------------------- loading


def load_directory(path: Path | str, *, version: str = CATALOGUE_VERSION) -> Catalog:
    """Load every ``*.toml`` entry in ``path`` (sorted by code) into a validated Catalog."""
    directory = Path(path)
    if not directory.is_dir():
        raise NotFoundError(f"catalogue directory {str(directory)!r} does not exist; pass the entries folder")
    threats = [load_entry_file(p) for p in sorted(directory.glob("*.toml"))]
    if not threats:
        raise InvalidInputError(f"catalogue directory {str(directory)!r} holds no *.toml entries")
    for threat in threats:
        if threat.is_team:
            raise InvalidInputError(
                f"{threat.code}: team codes (T-...) belong in the registry, not in the built-in folder"
            )
    return Catalog(version=version, threats=tuple(sorted(threats, key=lambda t: t.code)))


def load_entry_file(path: Path | str) -> Threat:
    """Parse and validate one TOML entry file; the file name must be the code in lower case."""
    p = Path(path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise InvalidInputError(f"{p.name}: not valid TOML ({exc}); fix the syntax") from None
    threat = _parse_threat(data, p.name)
    expected = f"{threat.code.lower()}.toml"
    if p.name != expected:
        raise InvalidInputError(f"{p.name}: file holds code {threat.code!r}; rename the file to {expected}")
    return threat


@lru_cache(maxsize=1)
def load_builtin() -> Catalog:
    """The built-in catalogue shipped in ``threats_catalog/entries`` (parsed once, then cached)."""
    entries = resources.files("ivdossier.threats_catalog.entries")
    return load_directory(Path(str(entries)), version=CATALOGUE_VERSION)


def suggest_for_family(family: str, catalog: Catalog | None = None) -> list[Threat]:
    """Threats worth considering for an instrument of ``family``: its own entries first, then generic ones.

    Ordered by condition (relevance, exclusion, exogeneity, monotonicity, then the reading aspects target,
    uncertainty, specification) within each group.
    """
    _check_choice(family, FAMILIES, "family", "suggest_for_family")
    cat = catalog if catalog is not None else load_builtin()
    order = {c: i for i, c in enumerate(ATTACKS)}
    own = [t for t in cat if family in t.families]
    generic = [t for t in cat if "any" in t.families and family not in t.families]
    return sorted(own, key=lambda t: order[t.condition]) + sorted(generic, key=lambda t: order[t.condition])


def merge(builtin: Catalog, team_entries: Iterable[Threat | Mapping[str, Any]]) -> Catalog:
    """Built-in entries followed by team entries; team codes must be in the ``T-`` namespace and unique.

    Mappings are validated with :meth:`Threat.from_dict`. A built-in upgrade never touches team entries
    because the namespaces cannot overlap; a collision raises ConflictError naming the code.
    """
    team: list[Threat] = []
    seen: set[str] = set()
    for i, entry in enumerate(team_entries):
        threat = (
            entry if isinstance(entry, Threat) else Threat.from_dict(entry, source=f"team entry #{i + 1}")
        )
        if not threat.is_team:
            raise InvalidInputError(
                f"team entry {threat.code!r} uses the built-in code namespace; give it a code starting with "
                f"'{TEAM_PREFIX}' (e.g. 'T-{threat.code.replace('-', '')}')"
            )
        if threat.code in builtin or threat.code in seen:
            raise ConflictError(
                f"team entry code {threat.code!r} is already in use; choose a different 'T-' code"
            )
        seen.add(threat.code)
        team.append(threat)
    return Catalog(version=builtin.version, threats=builtin.threats + tuple(team))


# --------------------------------------------------------------------------------------------------- parsing


def _check_choice(value: object, choices: Sequence[str], what: str, source: str) -> str:
    if not isinstance(value, str) or value not in choices:
        near = difflib.get_close_matches(str(value), choices, n=1)
        hint = f" (did you mean {near[0]!r}?)" if near else ""
        raise InvalidInputError(
            f"{source}: {what} {value!r} is not allowed{hint}; use one of: {', '.join(choices)}"
        )
    return value


def _text(data: Mapping[str, Any], key: str, source: str, *, min_len: int = 1, max_len: int = 4000) -> str:
    value = data.get(key)
    if not isinstance(value, str) or not value.strip():
        raise InvalidInputError(f"{source}: field {key!r} is missing or empty; give it a text value")
    value = " ".join(value.split())
    if not min_len <= len(value) <= max_len:
        raise InvalidInputError(
            f"{source}: field {key!r} has {len(value)} characters; write between {min_len} and {max_len}"
        )
    return value


def _text_list(
    data: Mapping[str, Any], key: str, source: str, *, allow_empty: bool = False
) -> tuple[str, ...]:
    value = data.get(key, [])
    if not isinstance(value, list) or not all(isinstance(v, str) and v.strip() for v in value):
        raise InvalidInputError(f"{source}: field {key!r} must be a list of non-empty strings")
    if not value and not allow_empty:
        raise InvalidInputError(f"{source}: field {key!r} is empty; list at least one item")
    return tuple(" ".join(v.split()) for v in value)


def _parse_threat(data: Mapping[str, Any], source: str) -> Threat:
    if not isinstance(data, Mapping):
        raise InvalidInputError(
            f"{source}: an entry must be a table/dict of fields, got {type(data).__name__}"
        )
    unknown = sorted(set(data) - set(_FIELDS) - set(_DERIVED))
    if unknown:
        raise InvalidInputError(
            f"{source}: unknown field(s) {', '.join(map(repr, unknown))}; allowed: {', '.join(_FIELDS)}"
        )
    code = data.get("code")
    if not isinstance(code, str):
        raise InvalidInputError(
            f"{source}: field 'code' is missing; add e.g. code = \"WS-E01\" (or T-... for teams)"
        )
    src = f"{source} [{code}]"
    condition = _check_choice(data.get("condition"), ATTACKS, "field 'condition'", src)
    if "kind" in data:
        _check_choice(data["kind"], KINDS, "field 'kind'", src)
        if data["kind"] != kind_of(condition):
            raise InvalidInputError(
                f"{src}: kind {data['kind']!r} does not fit condition {condition!r}; kind 'reading' goes with "
                f"{', '.join(READING_ASPECTS)}, kind 'condition' with {', '.join(CONDITIONS)}"
            )
    mechanism = _check_choice(data.get("mechanism"), tuple(MECHANISMS), "field 'mechanism'", src)
    if condition not in MECHANISMS[mechanism]:
        raise InvalidInputError(
            f"{src}: mechanism {mechanism!r} cannot attack condition {condition!r}; it attacks "
            f"{', '.join(MECHANISMS[mechanism])} — change the mechanism or the condition"
        )
    families = _text_list(data, "families", src)
    for fam in families:
        _check_choice(fam, FAMILIES, "family in field 'families'", src)
    if len(set(families)) != len(families):
        raise InvalidInputError(f"{src}: field 'families' lists a family twice; list each once")
    _check_code(code, condition, families, src)
    testability = _check_choice(data.get("testability"), TESTABILITY, "field 'testability'", src)
    checks = _text_list(data, "checks", src, allow_empty=testability == "argument-only")
    for name in checks:
        if name not in CHECKS:
            near = difflib.get_close_matches(name, CHECKS, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            raise InvalidInputError(
                f"{src}: field 'checks' names unknown check {name!r}{hint}; use a name from "
                "threats_catalog/checks.py"
            )
    fragment = _parse_fragment(data.get("fragment", {}), code, condition, src)
    if kind_of(condition) == "reading" and not fragment.is_empty:
        raise InvalidInputError(
            f"{src}: a threat of kind 'reading' ({condition}) draws no graph fragment; remove the fragment or "
            "file the threat under the condition it breaks"
        )
    return Threat(
        code=code,
        title=_text(data, "title", src, min_len=8, max_len=100),
        condition=condition,
        mechanism=mechanism,
        families=families,
        description=_text(data, "description", src, min_len=60),
        testability=testability,
        checks=checks,
        mitigations=_text_list(data, "mitigations", src),
        references=_text_list(data, "references", src),
        fragment=fragment,
    )


def _check_code(code: str, condition: str, families: tuple[str, ...], src: str) -> None:
    if code.startswith(TEAM_PREFIX):
        if not _TEAM_CODE.fullmatch(code) or len(code) > 40:
            raise InvalidInputError(
                f"{src}: team code {code!r} is malformed; use 'T-' then upper-case letters, digits and "
                "single dashes, at most 40 characters (e.g. 'T-CLINIC-1')"
            )
        return
    m = _BUILTIN_CODE.fullmatch(code)
    if m is None:
        raise InvalidInputError(
            f"{src}: code {code!r} does not follow the scheme FAMILY-LETTER+2 digits (e.g. 'WS-E01'); "
            "team entries use 'T-...'"
        )
    expected_prefix = FAMILY_PREFIXES[families[0]]
    if m["prefix"] != expected_prefix:
        raise InvalidInputError(
            f"{src}: code prefix {m['prefix']!r} does not match the first family {families[0]!r}; "
            f"use prefix {expected_prefix!r} or reorder 'families'"
        )
    letter = CONDITION_LETTERS[condition]
    if m["letter"] != letter:
        raise InvalidInputError(
            f"{src}: code letter {m['letter']!r} does not match condition {condition!r}; use {letter!r}"
        )


def _parse_fragment(raw: Any, code: str, condition: str, src: str) -> GraphFragment:
    if not isinstance(raw, Mapping):
        raise InvalidInputError(f"{src}: field 'fragment' must be a table with 'nodes' and 'edges'")
    extra = sorted(set(raw) - {"nodes", "edges"})
    if extra:
        raise InvalidInputError(
            f"{src}: fragment has unknown key(s) {', '.join(extra)}; use 'nodes' and 'edges'"
        )
    nodes: list[FragmentNode] = []
    raw_nodes = raw.get("nodes", [])
    if not isinstance(raw_nodes, list):
        raise InvalidInputError(f"{src}: fragment 'nodes' must be a list of tables")
    for i, rn in enumerate(raw_nodes):
        where = f"{src}: fragment node #{i + 1}"
        if not isinstance(rn, Mapping) or not isinstance(rn.get("name"), str):
            raise InvalidInputError(f"{where} needs a 'name' string")
        bad = sorted(set(rn) - {"name", "label", *NODE_FLAGS})
        if bad:
            raise InvalidInputError(
                f"{where} has unknown key(s) {', '.join(bad)}; use name, label, {', '.join(NODE_FLAGS)}"
            )
        name = rn["name"]
        if name in ROLE_TOKENS:
            raise InvalidInputError(
                f"{where}: {name!r} is a role token; do not declare it, just use it in edges"
            )
        if not _NODE_NAME.fullmatch(name):
            raise InvalidInputError(
                f"{where}: name {name!r} must start with a letter and use letters, digits or '_' (max 48)"
            )
        for flag in NODE_FLAGS:
            if not isinstance(rn.get(flag, False), bool):
                raise InvalidInputError(f"{where}: {flag!r} must be true or false")
        if rn.get("adjusted", False) and not rn.get("observed", False):
            raise InvalidInputError(
                f"{where}: an 'adjusted' node is a control in the model, so it must also be observed = true"
            )
        label = rn.get("label", "")
        if not isinstance(label, str):
            raise InvalidInputError(f"{where}: 'label' must be a string")
        nodes.append(
            FragmentNode(
                name,
                bool(rn.get("observed", False)),
                label.strip(),
                bool(rn.get("selection", False)),
                bool(rn.get("adjusted", False)),
                bool(rn.get("fixes_instrument", False)),
            )
        )
    names = [n.name for n in nodes]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise InvalidInputError(
            f"{src}: fragment declares node(s) {', '.join(dupes)} twice; declare each once"
        )
    known = set(names) | set(ROLE_TOKENS)
    edges: list[tuple[str, str]] = []
    raw_edges = raw.get("edges", [])
    if not isinstance(raw_edges, list):
        raise InvalidInputError(f"{src}: fragment 'edges' must be a list of [from, to] pairs")
    for i, re_ in enumerate(raw_edges):
        if not (isinstance(re_, list | tuple) and len(re_) == 2 and all(isinstance(x, str) for x in re_)):
            raise InvalidInputError(f"{src}: fragment edge #{i + 1} must be a [from, to] pair of node names")
        u, v = re_
        for end in (u, v):
            if end not in known:
                raise InvalidInputError(
                    f"{src}: fragment edge [{u!r}, {v!r}] names undeclared node {end!r}; declare it under "
                    "fragment.nodes or use a role token Z, X, Y, U"
                )
        if u == v:
            raise InvalidInputError(f"{src}: fragment edge [{u!r}, {v!r}] is a self-loop; remove it")
        if (u, v) in edges or (u, v) in BASE_EDGES:
            raise InvalidInputError(
                f"{src}: fragment edge [{u!r}, {v!r}] is repeated or already in the base graph"
            )
        edges.append((u, v))
    used = {x for e in edges for x in e}
    unused = [n for n in names if n not in used]
    if unused:
        raise InvalidInputError(
            f"{src}: fragment node(s) {', '.join(unused)} appear in no edge; connect or remove them"
        )
    cycle = _find_cycle(list(BASE_EDGES) + edges)
    if cycle:
        raise InvalidInputError(
            f"{src}: fragment makes a cycle with the base graph: {' -> '.join(cycle)}; "
            "reverse or drop one edge"
        )
    return GraphFragment(threat_code=code, condition=condition, nodes=tuple(nodes), edges=tuple(edges))


def _find_cycle(edges: Sequence[tuple[str, str]]) -> list[str] | None:
    """A directed cycle as a node list closing on its start, or None (plain depth-first search)."""
    succ: dict[str, list[str]] = {}
    for u, v in edges:
        succ.setdefault(u, []).append(v)
        succ.setdefault(v, [])
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(n: str) -> list[str] | None:
        state[n] = 1
        stack.append(n)
        for m in succ[n]:
            if state.get(m) == 1:
                return [*stack[stack.index(m) :], m]
            if m not in state:
                found = visit(m)
                if found:
                    return found
        stack.pop()
        state[n] = 2
        return None

    for n in sorted(succ):
        if n not in state:
            found = visit(n)
            if found:
                return found
    return None
