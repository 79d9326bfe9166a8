"""add / list / show / edit for programs, instruments, members and links, plus lifecycle moves and ratings."""

from __future__ import annotations

from typing import Annotated, Any

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import IfVersion, JsonFlag, actor, read_text_option, reading, writing
from ivdossier.cli.output import print_json, print_record, print_table

program_app = typer.Typer(
    help="Research programs: a treatment, an outcome, a unit and a population.", no_args_is_help=True
)
instrument_app = typer.Typer(
    help="Candidate instruments, their claims and their lifecycle.", no_args_is_help=True
)
member_app = typer.Typer(help="Team members who write, review and rate.", no_args_is_help=True)
link_app = typer.Typer(
    help="Threats attached to instruments: state, argument, evidence, ratings.", no_args_is_help=True
)

TextOpt = Annotated[str | None, typer.Option(help="Text, or @FILE to read it from a file.")]


def register(app: typer.Typer) -> None:
    app.add_typer(program_app, name="program", rich_help_panel=panels.REGISTRY)
    app.add_typer(instrument_app, name="instrument", rich_help_panel=panels.REGISTRY)
    app.add_typer(member_app, name="member", rich_help_panel=panels.REGISTRY)
    app.add_typer(link_app, name="link", rich_help_panel=panels.REGISTRY)


def _entity_dict(obj: Any) -> dict[str, Any]:
    from ivdossier.registry.records import snapshot

    return snapshot(obj, bookkeeping=True)


# ---------------------------------------------------------------- programs


@program_app.command("add")
def program_add(
    slug: Annotated[str, typer.Argument(help="Short name, e.g. telehealth-ed.")],
    title: Annotated[str, typer.Option(help="The research question in one line.")],
    treatment: Annotated[str, typer.Option(help="Treatment X (name or column).")] = "",
    outcome: Annotated[str, typer.Option(help="Outcome Y (name or column).")] = "",
    unit: Annotated[str, typer.Option(help="Unit of observation.")] = "",
    population: TextOpt = None,
    question: TextOpt = None,
    json_out: JsonFlag = False,
) -> None:
    """Create a research program."""
    from ivdossier.registry.instruments import add_program

    with writing() as s:
        prog = add_program(
            s,
            actor=actor(),
            slug=slug,
            title=title,
            question=read_text_option(question) or "",
            treatment=treatment,
            outcome=outcome,
            unit=unit,
            population=read_text_option(population) or "",
        )
        data = _entity_dict(prog)
    print_json(data) if json_out else typer.echo(f"program {slug} created")


@program_app.command("list")
def program_list(json_out: JsonFlag = False) -> None:
    """List programs with their number of candidate instruments."""
    from sqlalchemy import func, select

    from ivdossier.registry.models import Instrument, Program

    with reading() as s:
        counts = dict(
            s.execute(select(Instrument.program_id, func.count()).group_by(Instrument.program_id)).all()
        )
        rows = [
            {**_entity_dict(p), "instruments": counts.get(p.id, 0)}
            for p in s.scalars(select(Program).order_by(Program.slug))
        ]
    if json_out:
        print_json(rows)
    else:
        print_table(rows, ["slug", "title", "treatment", "outcome", "instruments"], widths={"title": 50})


@program_app.command("show")
def program_show(slug: str, json_out: JsonFlag = False) -> None:
    """Show one program and its candidate instruments."""
    from ivdossier.registry import records
    from ivdossier.registry.instruments import covariates_of, instruments_of
    from ivdossier.registry.models import Program

    with reading() as s:
        prog = records.get(s, Program, slug)
        data = _entity_dict(prog)
        data["instruments"] = [
            {"slug": i.slug, "name": i.name, "family": i.family, "state": i.state}
            for i in instruments_of(s, prog)
        ]
        data["covariates"] = [{"name": c.name, "measured": c.measured} for c in covariates_of(s, prog)]
    if json_out:
        print_json(data)
        return
    print_record(
        [(k, data[k]) for k in ("slug", "title", "question", "treatment", "outcome", "unit", "population")]
    )
    typer.echo("")
    print_table(data["instruments"], ["slug", "name", "family", "state"])


@program_app.command("edit")
def program_edit(
    slug: str,
    title: Annotated[str | None, typer.Option()] = None,
    treatment: Annotated[str | None, typer.Option()] = None,
    outcome: Annotated[str | None, typer.Option()] = None,
    unit: Annotated[str | None, typer.Option()] = None,
    population: TextOpt = None,
    question: TextOpt = None,
    notes: TextOpt = None,
    if_version: IfVersion = None,
) -> None:
    """Change a program's fields (only those given)."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Program

    changes = {
        k: read_text_option(v)
        for k, v in dict(
            title=title,
            treatment=treatment,
            outcome=outcome,
            unit=unit,
            population=population,
            question=question,
            notes=notes,
        ).items()
        if v is not None
    }
    with writing() as s:
        prog = records.get(s, Program, slug)
        records.edit(s, prog, changes, actor=actor(), expected_version=if_version)
        version = prog.version
    typer.echo(f"program {slug} now at version {version}")


# ---------------------------------------------------------------- instruments

CONDITION_OPTS = ("relevance", "exclusion", "exogeneity", "monotonicity")


@instrument_app.command("add")
def instrument_add(
    slug: Annotated[str, typer.Argument(help="Short name, e.g. fibre-wave.")],
    program: Annotated[str, typer.Option(help="The program this candidate serves.")],
    name: Annotated[str, typer.Option(help="Readable name.")],
    family: Annotated[str, typer.Option(help="Instrument family, e.g. distance-geography.")] = "",
    column: Annotated[list[str] | None, typer.Option(help="Data column(s) holding the instrument.")] = None,
    description: TextOpt = None,
    relevance: TextOpt = None,
    exclusion: TextOpt = None,
    exogeneity: TextOpt = None,
    monotonicity: TextOpt = None,
    json_out: JsonFlag = False,
) -> None:
    """Register a candidate instrument (state: proposed) with the team's claims."""
    from ivdossier.registry.instruments import add_instrument

    given = dict(relevance=relevance, exclusion=exclusion, exogeneity=exogeneity, monotonicity=monotonicity)
    claims = {k: read_text_option(v) or "" for k, v in given.items() if v is not None}
    from ivdossier.workflows.families import check_family

    family = check_family(family) if family else ""
    with writing() as s:
        inst = add_instrument(
            s,
            actor=actor(),
            program=program,
            slug=slug,
            name=name,
            family=family,
            columns=column or [],
            description=read_text_option(description) or "",
            claims=claims,
        )
        data = _entity_dict(inst)
    print_json(data) if json_out else typer.echo(f"instrument {slug} proposed in program {program}")


@instrument_app.command("list")
def instrument_list(
    program: Annotated[str | None, typer.Option(help="Only this program's candidates.")] = None,
    state: Annotated[str | None, typer.Option(help="Only candidates in this lifecycle state.")] = None,
    family: Annotated[str | None, typer.Option(help="Only this family.")] = None,
    json_out: JsonFlag = False,
) -> None:
    """List candidate instruments."""
    from sqlalchemy import select

    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument, Program
    from ivdossier.registry.records import json_value

    table = Instrument.__table__  # type: ignore[attr-defined]
    with reading() as s:
        # Plain column rows, not ORM objects: listings of thousands of candidates stay fast.
        query = select(*table.columns, Program.slug.label("program")).where(table.c.program_id == Program.id)  # type: ignore[call-overload, attr-defined]
        if program:
            query = query.where(table.c.program_id == records.get(s, Program, program).id)
        if state:
            query = query.where(table.c.state == state)
        if family:
            query = query.where(table.c.family == family)
        result = s.connection().execute(query.order_by(Program.slug, table.c.slug))
        rows = [{k: json_value(v) for k, v in row._mapping.items()} for row in result]
    if json_out:
        print_json(rows)
    else:
        print_table(rows, ["slug", "program", "name", "family", "state"], widths={"name": 40})


@instrument_app.command("show")
def instrument_show(slug: str, json_out: JsonFlag = False) -> None:
    """Show an instrument: claims, linked threats and threats raised on siblings of its family."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument, Program
    from ivdossier.registry.threats import links_of, raised_elsewhere
    from ivdossier.workflows.run_records import list_runs

    with reading() as s:
        inst = records.get(s, Instrument, slug)
        data = _entity_dict(inst)
        data["program"] = records.get_by_id(s, Program, inst.program_id).slug
        data["links"] = [
            {"link": lk.slug, "code": t.code, "title": t.title, "condition": t.condition, "state": lk.state}
            for lk, t in links_of(s, inst)
        ]
        data["raised_elsewhere"] = [r.to_dict() for r in raised_elsewhere(s, inst)]
        data["runs"] = [r.to_dict() for r in list_runs(s, inst.slug)]
    if json_out:
        print_json(data)
        return
    print_record(
        [(k, data[k]) for k in ("slug", "name", "program", "family", "state", "version")]
        + [("columns", ", ".join(data["columns"] or []) or "(none)")]
        + [(f"{c} claim", data[f"claim_{c}"] or "(not written yet)") for c in CONDITION_OPTS]
    )
    typer.echo("")
    print_table(data["links"], ["code", "condition", "state", "title"], widths={"title": 60})
    if data["raised_elsewhere"]:
        typer.echo("\nraised on other instruments of this family (link or dismiss here):")
        rows = [
            {
                **r,
                "raised_on": ", ".join(r["raised_on"])
                + (
                    f" (+{r['count'] - len(r['raised_on'])} more)" if r["count"] > len(r["raised_on"]) else ""
                ),
            }
            for r in data["raised_elsewhere"]
        ]
        print_table(rows, ["code", "condition", "title", "raised_on"])
    typer.echo("")
    if data["runs"]:
        runs = [{**r, "primary": "primary" if r["primary"] else ""} for r in data["runs"]]
        print_table(runs, ["run", "kind", "created", "dataset", "primary"])
    else:
        typer.echo("no runs attached yet (attach one with --attach)")


@instrument_app.command("edit")
def instrument_edit(
    slug: str,
    name: Annotated[str | None, typer.Option()] = None,
    family: Annotated[str | None, typer.Option()] = None,
    column: Annotated[list[str] | None, typer.Option(help="Replace the data column(s).")] = None,
    description: TextOpt = None,
    relevance: TextOpt = None,
    exclusion: TextOpt = None,
    exogeneity: TextOpt = None,
    monotonicity: TextOpt = None,
    if_version: IfVersion = None,
) -> None:
    """Change an instrument's fields or claims (only those given)."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument

    changes: dict[str, Any] = {}
    if name is not None:
        changes["name"] = name
    if family is not None:
        from ivdossier.workflows.families import check_family

        changes["family"] = check_family(family) if family else ""
    if column is not None:
        changes["columns"] = list(column)
    if description is not None:
        changes["description"] = read_text_option(description)
    for cond, value in dict(
        relevance=relevance, exclusion=exclusion, exogeneity=exogeneity, monotonicity=monotonicity
    ).items():
        if value is not None:
            changes[f"claim_{cond}"] = records.check_text(
                read_text_option(value) or "", field=f"{cond} claim"
            )
    with writing() as s:
        inst = records.get(s, Instrument, slug)
        records.edit(s, inst, changes, actor=actor(), expected_version=if_version)
        version = inst.version
    typer.echo(f"instrument {slug} now at version {version}")


@instrument_app.command("move")
def instrument_move(
    slug: str,
    to: Annotated[str, typer.Option(help="proposed, vetting, adopted, rejected or shelved.")],
    reason: Annotated[str, typer.Option(help="Why (kept in the audit trail).")],
    if_version: IfVersion = None,
) -> None:
    """Move an instrument along its lifecycle, with a reason."""
    from ivdossier.registry.instruments import move_instrument

    with writing() as s:
        inst = move_instrument(
            s,
            actor=actor(),
            instrument=slug,
            to=to,
            reason=read_text_option(reason) or "",
            expected_version=if_version,
        )
        state = inst.state
    typer.echo(f"instrument {slug} is now {state}")


# ---------------------------------------------------------------- members


@member_app.command("add")
def member_add(
    handle: str,
    name: Annotated[str, typer.Option()] = "",
    email: Annotated[str, typer.Option()] = "",
    json_out: JsonFlag = False,
) -> None:
    """Add a team member."""
    from ivdossier.registry.instruments import add_member

    with writing() as s:
        data = _entity_dict(add_member(s, actor=actor(), handle=handle, name=name, email=email))
    print_json(data) if json_out else typer.echo(f"member {handle} added")


@member_app.command("list")
def member_list(json_out: JsonFlag = False) -> None:
    """List team members."""
    from sqlalchemy import select

    from ivdossier.registry.models import Member

    with reading() as s:
        rows = [_entity_dict(m) for m in s.scalars(select(Member).order_by(Member.handle))]
    print_json(rows) if json_out else print_table(rows, ["handle", "name", "email"])


UNRATED_SHOWN = 25


@member_app.command("show")
def member_show(handle: str, json_out: JsonFlag = False) -> None:
    """Show a member and the links they have not rated yet."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Member
    from ivdossier.registry.threats import unrated_links

    with reading() as s:
        data = _entity_dict(records.get(s, Member, handle))
        data["unrated_links"] = unrated_links(s, member=handle)
    if json_out:
        print_json(data)
        return
    print_record([(k, data[k]) for k in ("handle", "name", "email", "version")])
    todo = data["unrated_links"]
    typer.echo(f"links not yet rated: {len(todo)}")
    for slug in todo[:UNRATED_SHOWN]:
        typer.echo(f"  {slug}")
    if len(todo) > UNRATED_SHOWN:
        typer.echo(
            f"  ... and {len(todo) - UNRATED_SHOWN} more (`ivdossier review INSTRUMENT --unrated-by {handle}`)"
        )


@member_app.command("edit")
def member_edit(
    handle: str,
    name: Annotated[str | None, typer.Option()] = None,
    email: Annotated[str | None, typer.Option()] = None,
    if_version: IfVersion = None,
) -> None:
    """Change a member's name or e-mail."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Member

    changes = {k: v for k, v in dict(name=name, email=email).items() if v is not None}
    with writing() as s:
        records.edit(s, records.get(s, Member, handle), changes, actor=actor(), expected_version=if_version)
    typer.echo(f"member {handle} updated")


# ---------------------------------------------------------------- links

LINK_STATE_HELP = "open, rebutted, mitigated, accepted or fatal."


@link_app.command("add")
def link_add(
    instrument: str,
    code: Annotated[str, typer.Argument(help="Catalogue code of the threat.")],
    state: Annotated[str, typer.Option(help=LINK_STATE_HELP)] = "open",
    argument: TextOpt = None,
    evidence: TextOpt = None,
    json_out: JsonFlag = False,
) -> None:
    """Attach a catalogue threat to an instrument."""
    from ivdossier.registry.threats import link_threat
    from ivdossier.workflows.catalog_sync import ensure_builtin

    with writing() as s:
        ensure_builtin(s, actor=actor())
        link = link_threat(
            s,
            actor=actor(),
            instrument=instrument,
            code=code,
            state=state,
            argument=read_text_option(argument) or "",
            evidence=read_text_option(evidence) or "",
        )
        data = _entity_dict(link)
    print_json(data) if json_out else typer.echo(f"link {data['slug']} created ({state})")


@link_app.command("list")
def link_list(
    instrument: Annotated[str, typer.Argument(help="Instrument slug.")],
    state: Annotated[str | None, typer.Option(help="Only links in this state, e.g. open.")] = None,
    json_out: JsonFlag = False,
) -> None:
    """List an instrument's linked threats."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument
    from ivdossier.registry.threats import links_of

    with reading() as s:
        inst = records.get(s, Instrument, instrument)
        rows = [
            {**_entity_dict(lk), "code": t.code, "title": t.title, "condition": t.condition}
            for lk, t in links_of(s, inst)
            if state is None or lk.state == state
        ]
    print_json(rows) if json_out else print_table(
        rows, ["slug", "condition", "state", "title"], widths={"title": 60}
    )


@link_app.command("show")
def link_show(slug: str, json_out: JsonFlag = False) -> None:
    """Show one link with its threat, argument, evidence and ratings."""
    from sqlalchemy import select

    from ivdossier.registry import records
    from ivdossier.registry.models import Link, Member, Rating, Threat

    with reading() as s:
        link = records.get(s, Link, slug.lower())
        threat = records.get_by_id(s, Threat, link.threat_id)
        data = _entity_dict(link)
        data["threat"] = {"code": threat.code, "title": threat.title, "condition": threat.condition}
        data["ratings"] = [
            {"member": m.handle, "likelihood": r.likelihood, "severity": r.severity, "comment": r.comment}
            for r, m in s.execute(
                select(Rating, Member).where(Rating.link_id == link.id, Rating.member_id == Member.id)
            )
        ]
    if json_out:
        print_json(data)
        return
    print_record(
        [
            ("link", data["slug"]),
            ("threat", f"{threat.code} — {threat.title}"),
            ("condition", threat.condition),
            ("state", data["state"]),
            ("version", data["version"]),
            ("argument", data["argument"] or "(none)"),
            ("evidence", data["evidence"] or "(none)"),
        ]
    )
    typer.echo("")
    print_table(data["ratings"], ["member", "likelihood", "severity", "comment"])


@link_app.command("edit")
def link_edit(
    slug: str,
    state: Annotated[str | None, typer.Option(help=LINK_STATE_HELP)] = None,
    argument: TextOpt = None,
    evidence: TextOpt = None,
    if_version: IfVersion = None,
) -> None:
    """Set a link's state, argument or evidence."""
    from ivdossier.registry.threats import set_link

    with writing() as s:
        link = set_link(
            s,
            actor=actor(),
            link=slug,
            state=state,
            argument=read_text_option(argument),
            evidence=read_text_option(evidence),
            expected_version=if_version,
        )
        now = link.state
    typer.echo(f"link {slug} is {now}")


@link_app.command("rate")
def link_rate(
    slug: str,
    likelihood: Annotated[int, typer.Option(help="How likely the threat is real, 1-5.")],
    severity: Annotated[int, typer.Option(help="How much it would matter, 1-5.")],
    comment: TextOpt = None,
) -> None:
    """Rate a link as the acting member (replaces your earlier rating)."""
    from ivdossier.registry.threats import rate_link

    with writing() as s:
        rate_link(
            s,
            actor=actor(),
            link=slug,
            likelihood=likelihood,
            severity=severity,
            comment=read_text_option(comment) or "",
        )
    typer.echo(f"rating recorded on {slug}")


@link_app.command("dismiss")
def link_dismiss(
    instrument: str,
    code: str,
    reason: Annotated[str, typer.Option(help="Why the threat does not apply to this instrument.")],
) -> None:
    """Dismiss a threat raised on another instrument of the same family."""
    from ivdossier.registry.threats import dismiss

    with writing() as s:
        dismiss(s, actor=actor(), instrument=instrument, code=code, reason=read_text_option(reason) or "")
    typer.echo(f"{code} dismissed for {instrument}")
