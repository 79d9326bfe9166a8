"""`ivdossier threat ...` (the catalogue) and `ivdossier graph ...` (the causal-graph checker)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer
from typer.core import TyperGroup

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, reading, writing
from ivdossier.cli.output import print_json, print_record, print_table
from ivdossier.errors import ConflictError, InvalidInputError

threat_app = typer.Typer(
    help="The threat catalogue: built-in entries and the team's own.", no_args_is_help=True
)
graph_app = typer.Typer(
    help="The causal graph of an instrument and the validity verdicts it implies.", no_args_is_help=True
)


def register(app: typer.Typer) -> None:
    app.add_typer(threat_app, name="threat", rich_help_panel=panels.THREATS)
    app.add_typer(graph_app, name="graph", rich_help_panel=panels.THREATS)


def _registry_catalog(session: Any) -> Any:
    from ivdossier.workflows.catalog_sync import registry_catalog

    return registry_catalog(session)


def _row(t: Any) -> dict[str, Any]:
    return {**t.to_dict(), "families": ", ".join(t.families), "checks": ", ".join(t.checks)}


def _checks_text(t: Any) -> str:
    """The entry's checks, each one the tool cannot compute yet marked as such."""
    from ivdossier.threats_catalog.checks import NOT_COMPUTABLE

    return (
        ", ".join(f"{c} ({NOT_COMPUTABLE})" if c in t.uncomputed_checks else c for c in t.checks) or "(none)"
    )


@threat_app.command("list")
def threat_list(
    condition: Annotated[
        str | None,
        typer.Option(
            help="relevance, exclusion, exogeneity or monotonicity; or, for reading threats, target, "
            "uncertainty or specification."
        ),
    ] = None,
    family: Annotated[str | None, typer.Option(help="Instrument family, e.g. weather-shock.")] = None,
    search: Annotated[str | None, typer.Option(help="Words that must all appear in the entry.")] = None,
    kind: Annotated[
        str | None,
        typer.Option(
            help="condition (threats to the four conditions) or reading (to how the estimate is read)."
        ),
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Browse and search the catalogue."""
    from ivdossier.workflows.families import check_family

    if family is not None:
        family = check_family(family, allow_generic=True)
    with reading() as s:
        found = _registry_catalog(s).search(
            condition=condition, family=family, text=search, include_generic=family is not None, kind=kind
        )
    if json_out:
        print_json([t.to_dict() for t in found])
    else:
        print_table(
            [_row(t) for t in found],
            ["code", "kind", "condition", "testability", "title"],
            widths={"title": 70},
        )


@threat_app.command("show")
def threat_show(code: str, json_out: JsonFlag = False) -> None:
    """Show one catalogue entry in full."""
    with reading() as s:
        t = _registry_catalog(s).get(code)
    if json_out:
        print_json(t.to_dict())
        return
    print_record(
        [
            ("code", t.code),
            ("title", t.title),
            ("kind", t.kind),
            ("condition", f"{t.condition} ({t.mechanism})"),
            ("families", ", ".join(t.families)),
            ("testability", t.testability),
            ("description", t.description.strip()),
            ("checks", _checks_text(t)),
            ("mitigations", "\n".join(f"- {m}" for m in t.mitigations) or "(none)"),
            ("references", "; ".join(t.references) or "(none)"),
            ("graph edges", ", ".join(f"{a} -> {b}" for a, b in t.fragment.edges) or "(none)"),
        ]
    )


@threat_app.command("new")
def threat_new(
    file: Annotated[
        Path, typer.Argument(help="A TOML file in the catalogue's entry format with a 'T-' code.")
    ],
    json_out: JsonFlag = False,
) -> None:
    """Add the team's own catalogue entry from a TOML file (validated like the built-ins)."""
    import tomllib

    from ivdossier.registry.threats import add_team_threat
    from ivdossier.threats_catalog.catalog import Threat as CatalogThreat

    try:
        data = tomllib.loads(file.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InvalidInputError(f"cannot read {str(file)!r} as a TOML catalogue entry: {exc}") from exc
    entry = CatalogThreat.from_dict(data, source=str(file))
    with writing() as s:
        taken = [c for c in _registry_catalog(s).codes() if c.casefold() == entry.code.casefold()]
        if taken:
            raise ConflictError(
                f"threat code {entry.code!r} is already in the catalogue as {taken[0]!r} (codes are read in "
                "any letter case); choose another 'T-' code."
            )
        add_team_threat(s, actor=actor(), entry=entry.to_dict())
    print_json(entry.to_dict()) if json_out else typer.echo(f"team threat {entry.code} added")


@threat_app.command("suggest")
def threat_suggest(instrument: str, json_out: JsonFlag = False) -> None:
    """Catalogue threats for the instrument's family that are not linked to it yet."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument
    from ivdossier.registry.threats import links_of
    from ivdossier.threats_catalog.catalog import suggest_for_family

    with reading() as s:
        inst = records.get(s, Instrument, instrument)
        if not inst.family:
            raise InvalidInputError(
                f"instrument {instrument!r} has no family; set one with `instrument edit --family`."
            )
        from ivdossier.workflows.families import check_family

        try:
            check_family(inst.family, option=f"instrument {instrument}'s family")
        except InvalidInputError as exc:
            raise InvalidInputError(f"{exc} Fix it with `instrument edit {instrument} --family F`.") from None
        linked = {t.code for _, t in links_of(s, inst)}
        found = [t for t in suggest_for_family(inst.family, _registry_catalog(s)) if t.code not in linked]
    if json_out:
        print_json([t.to_dict() for t in found])
    else:
        print_table(
            [_row(t) for t in found], ["code", "condition", "families", "title"], widths={"title": 60}
        )


def _checked(instrument: str) -> Any:
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument
    from ivdossier.workflows.dossiers import instrument_check

    with reading() as s:
        return instrument_check(s, records.get(s, Instrument, instrument))


@graph_app.command("check")
def graph_check(instrument: str, json_out: JsonFlag = False) -> None:
    """Verdict per condition (the dossier's), with every open path that bypasses the treatment."""
    from ivdossier.threats_catalog.graph import adjustment_advice

    checked = _checked(instrument)
    G, verdict = checked.graph, checked.check
    roles = {"instrument": verdict.instrument, "treatment": verdict.treatment, "outcome": verdict.outcome}
    try:
        advice = adjustment_advice(G, max_size=4, **roles)
        sets = [list(a.members) for a in advice]
        texts = [str(a) for a in advice]
        warnings = [a.warning for a in advice]
    except Exception as exc:  # too many candidates: report instead of failing the check
        sets, texts, warnings = [[f"not searched: {exc}"]], [f"not searched: {exc}"], [""]
    data = {
        **verdict.to_dict(),
        "adjustment_sets": sets,
        "adjustment_warnings": warnings,
        "verdicts": [v.to_dict() for v in checked.verdicts],
    }
    if json_out:
        print_json(data)
        return
    rows = [
        {"condition": v.condition, "verdict": v.status, "rule": v.rule, "why": v.reason}
        for v in checked.verdicts
    ]
    print_table(rows, ["condition", "verdict", "rule", "why"], widths={"why": 90})
    typer.echo(f"\nconditioning on: {', '.join(data['conditioning']) or '(nothing)'}")
    if data["open_paths"]:
        typer.echo("open paths from the instrument to the outcome that bypass the treatment:")
        for p in data["open_paths"]:
            codes = ", ".join(p["threats"]) or "team-drawn edges"
            typer.echo(f"  {p['path']}   [{p['condition']}, {p['severity']}; from {codes}]")
    for note in data.get("notes", []):
        typer.echo(f"note: {note}")
    if not sets:
        typer.echo("no set of measured covariates restores the instrument criterion")
    else:
        typer.echo("measured covariate sets that satisfy the criterion: " + "; ".join(texts))


@graph_app.command("draw")
def graph_draw(
    instrument: str, out: Annotated[Path, typer.Option("--out", help="SVG file to write.")]
) -> None:
    """Write the instrument's causal diagram as a self-contained SVG."""
    from ivdossier.threats_catalog.draw import render_svg

    if out.suffix.lower() != ".svg":
        raise InvalidInputError(f"--out {str(out)!r} must end in .svg.")
    checked = _checked(instrument)
    svg = render_svg(
        checked.graph, checked.check, title=f"Causal diagram: {instrument}", verdicts=checked.verdicts
    )
    out.write_text(svg, encoding="utf-8")
    typer.echo(f"diagram written to {out}")


@graph_app.command("covariate")
def graph_covariate(
    program: str,
    name: str,
    unmeasured: Annotated[
        bool, typer.Option("--unmeasured", help="The variable is not in the data.")
    ] = False,
    description: Annotated[str, typer.Option()] = "",
) -> None:
    """Declare a variable of the program's causal graph."""
    from ivdossier.registry.instruments import add_covariate

    with writing() as s:
        add_covariate(
            s, actor=actor(), program=program, name=name, measured=not unmeasured, description=description
        )
    typer.echo(f"covariate {name} added to {program} ({'unmeasured' if unmeasured else 'measured'})")


class _EdgeGroup(TyperGroup):
    """`graph edge PROGRAM FROM TO` (the earlier form) still adds an edge: a first word that is no subcommand
    is read as `graph edge add ...`."""

    def resolve_command(self, ctx: Any, args: list[str]) -> Any:
        if args and args[0] not in self.commands and not args[0].startswith("-"):
            args = ["add", *args]
        return super().resolve_command(ctx, args)


edge_app = typer.Typer(
    cls=_EdgeGroup,
    help="Edges of the team's own: add, remove or reverse (each checked first and audited).",
    no_args_is_help=True,
)
graph_app.add_typer(edge_app, name="edge")

ScopeOpt = Annotated[
    str | None,
    typer.Option(
        "--instrument",
        help="Draw the edge only in this instrument's graph (leave out for every instrument of the program).",
    ),
]


def _scope_text(instrument: str | None, program: str) -> str:
    return f"instrument {instrument} only" if instrument else f"every instrument of {program}"


@edge_app.command("add")
def graph_edge_add(
    program: str,
    source: str,
    target: str,
    instrument: ScopeOpt = None,
    note: Annotated[str, typer.Option(help="Why the edge is there.")] = "",
) -> None:
    """Add an edge (refused with the fix, nothing written, for an unknown node, a self-loop or a cycle)."""
    from ivdossier.workflows.graph_edits import add_team_edge

    with writing() as s:
        add_team_edge(
            s, actor=actor(), program=program, source=source, target=target, instrument=instrument, note=note
        )
    typer.echo(f"edge {source} -> {target} added ({_scope_text(instrument, program)})")


@edge_app.command("remove")
def graph_edge_remove(
    program: str,
    source: str,
    target: str,
    instrument: ScopeOpt = None,
    reason: Annotated[str, typer.Option(help="Why, kept in the audit trail.")] = "",
) -> None:
    """Remove a team edge (audited)."""
    from ivdossier.workflows.graph_edits import remove_team_edge

    with writing() as s:
        remove_team_edge(
            s,
            actor=actor(),
            program=program,
            source=source,
            target=target,
            instrument=instrument,
            reason=reason,
        )
    typer.echo(f"edge {source} -> {target} removed ({_scope_text(instrument, program)})")


@edge_app.command("reverse")
def graph_edge_reverse(
    program: str,
    source: str,
    target: str,
    instrument: ScopeOpt = None,
    reason: Annotated[str, typer.Option(help="Why, kept in the audit trail.")] = "",
) -> None:
    """Turn a team edge round (refused if the reversed edge would close a cycle; audited)."""
    from ivdossier.workflows.graph_edits import reverse_team_edge

    with writing() as s:
        reverse_team_edge(
            s,
            actor=actor(),
            program=program,
            source=source,
            target=target,
            instrument=instrument,
            reason=reason,
        )
    typer.echo(f"edge {source} -> {target} is now {target} -> {source} ({_scope_text(instrument, program)})")


@graph_app.command("common-cause")
def graph_common_cause(
    instrument: str,
    covariate: str,
    note: Annotated[str, typer.Option(help="Why the team believes it.")] = "",
) -> None:
    """Say that a declared covariate causes both this instrument and the outcome (this instrument's graph only)."""
    from ivdossier.workflows.graph_edits import add_common_cause

    with writing() as s:
        added = add_common_cause(s, actor=actor(), instrument=instrument, covariate=covariate, note=note)
    drawn = ", ".join(f"{e.source} -> {e.target}" for e in added) or "nothing new (both edges were drawn)"
    typer.echo(f"{covariate} is a common cause of {instrument} and the outcome: added {drawn}")


@graph_app.command("show")
def graph_show(program: str, json_out: JsonFlag = False) -> None:
    """The program's graph as the team drew it: covariates, team edges with their scope, instrument nodes."""
    from ivdossier.workflows.graph_edits import graph_listing

    with reading() as s:
        listing = graph_listing(s, program)
    if json_out:
        print_json(listing.to_dict())
        return
    typer.echo(f"program {listing.program}: nodes in every instrument's graph")
    print_table(
        [{"node": n, "what": w} for n, w in listing.nodes.items()], ["node", "what"], widths={"what": 60}
    )
    typer.echo("\ncovariates")
    print_table(
        [{**c, "measured": "yes" if c["measured"] else "no"} for c in listing.covariates],
        ["name", "measured", "description"],
        widths={"description": 60},
    )
    typer.echo("\nteam edges (scope: program = every instrument's graph, else that instrument's only)")
    print_table(list(listing.edges), ["from", "to", "scope", "note"], widths={"note": 50})
    typer.echo("\ninstruments")
    print_table(
        [{**i, "left_out": "; ".join(i["left_out"]) or "-"} for i in listing.instruments],
        ["instrument", "node", "left_out"],
        widths={"left_out": 80},
    )
