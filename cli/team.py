"""Team commands: `review` (everyone's ratings of an instrument's threats) and `comment add/list`."""

from __future__ import annotations

from typing import Annotated, Any

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, read_text_option, reading, writing
from ivdossier.cli.output import print_json, print_table

comment_app = typer.Typer(
    help="Comments on any entity, kept with their author and time.", no_args_is_help=True
)


def register(app: typer.Typer) -> None:
    app.command("review", rich_help_panel=panels.REGISTRY)(review)
    app.add_typer(comment_app, name="comment", rich_help_panel=panels.REGISTRY)


def _fmt(value: float | None) -> str:
    return "" if value is None else f"{value:.1f}"


def review(
    instrument: Annotated[str, typer.Argument(help="Instrument slug.")],
    unrated_by: Annotated[
        str | None, typer.Option("--unrated-by", help="Only the links this member has not rated yet.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Each reviewer's rating of the instrument's threats, the team means and the spread, most disputed first."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Instrument
    from ivdossier.registry.threats import rating_summaries, unrated_links

    with reading() as s:
        inst = records.get(s, Instrument, instrument)
        summaries = rating_summaries(s, inst)
        if unrated_by is not None:
            todo = set(unrated_links(s, member=unrated_by, instrument=inst))
            summaries = [x for x in summaries if x.link in todo]
    if json_out:
        print_json({"instrument": instrument, "unrated_by": unrated_by, "links": summaries})
        return
    rows: list[dict[str, Any]] = [
        {
            "code": x.code,
            "title": x.title,
            "mean_l": _fmt(x.mean_likelihood),
            "mean_s": _fmt(x.mean_severity),
            "range": f"{x.spread:.0f}" if x.ratings else "",
            "ratings": "; ".join(f"{h} {lik}/{sev}" for h, lik, sev, _ in x.ratings) or "(none yet)",
        }
        for x in summaries
    ]
    if unrated_by is not None:
        typer.echo(f"links of {instrument} that {unrated_by} has not rated yet: {len(rows)}")
    print_table(
        rows, ["code", "title", "mean_l", "mean_s", "range", "ratings"], widths={"title": 40, "ratings": 60}
    )
    typer.echo("ratings are likelihood/severity on 1-5; range = largest spread between reviewers.")


@comment_app.command("add")
def comment_add(
    target: Annotated[str, typer.Argument(help="Slug (or code, handle, key) of the entity to comment on.")],
    text: Annotated[str, typer.Argument(help="The comment, or @FILE to read it from a file.")],
    json_out: JsonFlag = False,
) -> None:
    """Leave a comment on any entity as the acting member."""
    from ivdossier.registry.comments import add_comment

    with writing() as s:
        comment = add_comment(s, actor=actor(), target=target, body=read_text_option(text) or "")
        slug = comment.slug
        data = {"slug": slug, "entity": target, "author": comment.author, "body": comment.body}
    print_json(data) if json_out else typer.echo(f"comment {slug} added to {target}")


@comment_app.command("list")
def comment_list(
    target: Annotated[str, typer.Argument(help="Slug (or code, handle, key) of the entity.")],
    json_out: JsonFlag = False,
) -> None:
    """List the comments on one entity, oldest first."""
    from ivdossier.registry.comments import comment_views

    with reading() as s:
        views = comment_views(s, target)
    if json_out:
        print_json(views)
        return
    rows = [{**v.to_dict(), "when": v.at[:19].replace("T", " ")} for v in views]
    print_table(rows, ["when", "author", "body"], widths={"body": 80})
