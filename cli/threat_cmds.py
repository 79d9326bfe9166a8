"""`ivdossier threat ...` (the catalogue) and `ivdossier graph ...` (the causal-graph checker)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

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
    from ivdossier.workflows.dossiers import registry_catalog

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
        if entry.code in _registry_catalog(s):
            raise ConflictError(
                f"threat code {entry.code!r} is already in the catalogue; choose another 'T-' code."
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


@graph_app.command("edge")
def graph_edge(program: str, source: str, target: str, note: Annotated[str, typer.Option()] = "") -> None:
    """Add an edge of the team's own to the program's causal graph."""
    from ivdossier.registry.instruments import add_edge

    with writing() as s:
        add_edge(s, actor=actor(), program=program, source=source, target=target, note=note)
    typer.echo(f"edge {source} -> {target} added to {program}")
