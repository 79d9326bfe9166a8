"""`ivdossier study ...` (past and published studies) and `ivdossier audit` (re-examining them)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag, actor, read_text_option, reading, writing
from ivdossier.cli.output import print_json, print_record, print_table

study_app = typer.Typer(
    help="Past and published studies: BibTeX, reported statistics, attachments and critiques.",
    no_args_is_help=True,
)

TextOpt = Annotated[str | None, typer.Option(help="Text, or @FILE to read it from a file.")]


def register(app: typer.Typer) -> None:
    app.add_typer(study_app, name="study", rich_help_panel=panels.LITERATURE)
    app.command("audit", rich_help_panel=panels.LITERATURE)(audit)


def write_output(path: Path, text: str) -> None:
    """Write a document or export; '-' means standard output."""
    from ivdossier.errors import InvalidInputError

    if str(path) == "-":
        typer.echo(text, nl=False)
        return
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InvalidInputError(f"cannot write {str(path)!r}: {exc}; check that the folder exists.") from exc


@study_app.command("import-bibtex")
def import_bibtex(
    file: Annotated[Path, typer.Argument(help="A .bib file (UTF-8).")],
    json_out: JsonFlag = False,
) -> None:
    """Import every entry of a BibTeX file; a malformed entry stops the import (nothing is kept) and names its line."""
    from ivdossier.registry.studies import import_bibtex as do_import
    from ivdossier.registry.studies import read_bibtex_file

    text = read_bibtex_file(file)
    with writing() as s:
        keys = [st.key for st in do_import(s, actor=actor(), text=text, source=file.name)]
    if json_out:
        print_json({"imported": keys})
    else:
        typer.echo(
            f"imported {len(keys)} stud{'y' if len(keys) == 1 else 'ies'}: {', '.join(keys) or '(none)'}"
        )


@study_app.command("export-bibtex")
def export_bibtex(
    file: Annotated[Path, typer.Argument(help="Where to write the .bib file ('-' for standard output).")],
    instrument: Annotated[str | None, typer.Option(help="Only studies attached to this instrument.")] = None,
    family: Annotated[str | None, typer.Option(help="Only studies attached to this family.")] = None,
) -> None:
    """Write studies as BibTeX (raw fields kept from import; edited fields written anew)."""
    from ivdossier.registry.studies import export_bibtex as do_export
    from ivdossier.registry.studies import list_studies

    with reading() as s:
        chosen = list_studies(s, instrument=instrument, family=family)
        text = do_export(chosen)
    write_output(file, text)
    if str(file) != "-":
        typer.echo(f"wrote {len(chosen)} entries to {file}")


@study_app.command("add")
def add(
    key: Annotated[str, typer.Argument(help="Citation key, e.g. Nakamura2019.")],
    title: Annotated[str, typer.Option(help="Title of the study.")] = "",
    authors: Annotated[str, typer.Option(help="Authors, BibTeX style: 'Last, First and Last, First'.")] = "",
    year: Annotated[int | None, typer.Option(help="Publication year.")] = None,
    venue: Annotated[str, typer.Option(help="Journal, book or series.")] = "",
    doi: Annotated[str, typer.Option(help="DOI.")] = "",
    entry_type: Annotated[str, typer.Option("--type", help="BibTeX entry type.")] = "article",
    json_out: JsonFlag = False,
) -> None:
    """Add one study by hand."""
    from ivdossier.registry.studies import add_study, study_dict

    with writing() as s:
        st = add_study(s, actor=actor(), key=key, entry_type=entry_type, authors=authors, title=title, year=year,
                       venue=venue, doi=doi)  # fmt: skip
        data = study_dict(s, st)
    print_json(data) if json_out else typer.echo(f"study {key} added")


@study_app.command("list")
def list_(
    instrument: Annotated[
        str | None, typer.Option(help="Only studies of this instrument (or its family).")
    ] = None,
    family: Annotated[str | None, typer.Option(help="Only studies of this family.")] = None,
    json_out: JsonFlag = False,
) -> None:
    """List studies with what they reported."""
    from ivdossier.registry.studies import critiques_by_study, list_studies, study_dict

    with reading() as s:
        studies = list_studies(s, instrument=instrument, family=family)
        critiques = critiques_by_study(s, studies)
        rows = [study_dict(s, st, critiques.get(st.id or 0, [])) for st in studies]
    if json_out:
        print_json(rows)
        return
    for row in rows:
        rep = row.get("reported") or {}
        row["estimate"] = rep.get("estimate", "")
        row["f"] = rep.get("first_stage_f", "")
        row["attached"] = ", ".join([*(row.get("instruments") or []), *(row.get("families") or [])])
        row["critiques"] = len(row["critiques"])
    print_table(rows, ["key", "citation", "title", "estimate", "f", "attached", "critiques"],
                widths={"title": 40, "citation": 30})  # fmt: skip


@study_app.command("show")
def show(key: str, json_out: JsonFlag = False) -> None:
    """Show one study: bibliographic fields, reported statistics, attachments and critiques."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Study
    from ivdossier.registry.studies import study_dict

    with reading() as s:
        data = study_dict(s, records.get(s, Study, key))
    if json_out:
        print_json(data)
        return
    pairs: list[tuple[str, Any]] = [
        (k, data.get(k))
        for k in ("key", "citation", "entry_type", "authors", "title", "year", "venue", "doi")
    ]
    pairs += [
        ("instruments", ", ".join(data.get("instruments") or [])),
        ("families", ", ".join(data.get("families") or [])),
    ]
    pairs += [(f"reported {k}", v) for k, v in (data.get("reported") or {}).items()]
    table = data.get("variant_table") or {}
    if table:
        pairs.append(("per-variant table", f"{table.get('n_variants')} variants from {table.get('source')}"))
    print_record(pairs)
    if data["critiques"]:
        typer.echo("")
        print_table(data["critiques"], ["threat", "condition", "raised_by", "title"], widths={"title": 60})


@study_app.command("report")
def report(
    key: str,
    estimate: Annotated[float | None, typer.Option(help="2SLS (or other IV) point estimate.")] = None,
    std_error: Annotated[
        float | None,
        typer.Option("--std-error", help="Standard error of the estimate (CSV column std_error)."),
    ] = None,
    se: Annotated[
        float | None, typer.Option("--se", hidden=True, help="Deprecated spelling of --std-error.")
    ] = None,
    first_stage_f: Annotated[float | None, typer.Option(help="First-stage F the study reported.")] = None,
    f_kind: Annotated[
        str | None,
        typer.Option(
            help="Which F: homoskedastic, heteroskedastic, clustered, effective, kleibergen-paap, cragg-donald or "
            "unknown."
        ),
    ] = None,
    n: Annotated[int | None, typer.Option(help="Number of observations.")] = None,
    clusters: Annotated[int | None, typer.Option(help="Number of clusters (when clustered).")] = None,
    instruments: Annotated[
        int | None, typer.Option(help="Number of excluded instruments (default 1).")
    ] = None,
    fs_coef: Annotated[float | None, typer.Option(help="First-stage coefficient on the instrument.")] = None,
    fs_se: Annotated[float | None, typer.Option(help="Its standard error.")] = None,
    rf_coef: Annotated[float | None, typer.Option(help="Reduced-form coefficient on the instrument.")] = None,
    rf_se: Annotated[float | None, typer.Option(help="Its standard error.")] = None,
    fs_rf_cov: Annotated[
        float | None, typer.Option(help="Covariance of the two coefficients, if reported.")
    ] = None,
    method: Annotated[str | None, typer.Option(help="Estimator: 2sls, liml, fuller or gmm.")] = None,
    label: Annotated[str | None, typer.Option(help="Which table/column these numbers come from.")] = None,
    replace: Annotated[bool, typer.Option(help="Replace all earlier values instead of merging.")] = False,
    json_out: JsonFlag = False,
) -> None:
    """Record the statistics a study reported for its headline IV specification."""
    from ivdossier.cli.deprecated import either
    from ivdossier.workflows.studies import report_stats

    std_error = either(std_error, se, new="--std-error", old="--se")
    given = {
        "estimate": estimate, "std_error": std_error, "first_stage_f": first_stage_f, "f_kind": f_kind, "n": n,
        "n_clusters": clusters, "n_instruments": instruments, "first_stage_coef": fs_coef, "first_stage_se": fs_se,
        "reduced_form_coef": rf_coef, "reduced_form_se": rf_se, "fs_rf_cov": fs_rf_cov, "method": method,
        "label": label,
    }  # fmt: skip
    values = {k: v for k, v in given.items() if v is not None}
    with writing() as s:
        st = report_stats(s, actor=actor(), key=key, values=values, replace=replace)
        data = dict(st.reported or {})
    print_json(data) if json_out else typer.echo(
        f"study {key} now reports: {', '.join(sorted(data)) or '(nothing)'}"
    )


@study_app.command("import-stats")
def import_stats(
    file: Annotated[Path, typer.Argument(help="CSV with a 'key' column and reported-statistic columns.")],
) -> None:
    """Reported statistics for many studies from a CSV (columns: key, estimate, std_error, first_stage_f, f_kind,
    n, n_clusters, n_instruments, first_stage_coef, first_stage_se, reduced_form_coef, reduced_form_se, fs_rf_cov,
    method, label, and optionally instrument and family); all rows or none."""
    from ivdossier.registry.studies import read_stats_csv_file
    from ivdossier.workflows.studies import import_stats_csv

    text = read_stats_csv_file(file)
    with writing() as s:
        done = import_stats_csv(s, actor=actor(), text=text)
    typer.echo(f"recorded statistics for {len(done)} stud{'y' if len(done) == 1 else 'ies'}")


@study_app.command("attach")
def attach(
    key: str,
    instrument: Annotated[str | None, typer.Option(help="Attach to this candidate instrument.")] = None,
    family: Annotated[str | None, typer.Option(help="Attach to this instrument family.")] = None,
) -> None:
    """Attach a study to a candidate instrument or to an instrument family."""
    from ivdossier.registry.studies import attach as do_attach

    with writing() as s:
        do_attach(s, actor=actor(), key=key, instrument=instrument, family=family)
    typer.echo(
        f"study {key} attached to {'instrument ' + instrument if instrument else 'family ' + str(family)}"
    )


@study_app.command("variants")
def variants(
    key: str,
    data: Annotated[
        Path | None,
        typer.Option(
            "--data",
            help="The study's published per-variant table (.csv, .tsv or .txt; the columns of `variants`).",
        ),
    ] = None,
    remove: Annotated[bool, typer.Option("--remove", help="Remove the table attached to the study.")] = False,
    json_out: JsonFlag = False,
) -> None:
    """Attach a published study's per-variant table so that `audit` re-analyses it beside the reported estimate."""
    from ivdossier.errors import InvalidInputError
    from ivdossier.workflows.studies import attach_variant_table, remove_variant_table

    if (data is None) == (not remove):
        raise InvalidInputError("give either --data FILE (attach a per-variant table) or --remove.")
    with writing() as s:
        if data is not None:
            table = dict(attach_variant_table(s, actor=actor(), key=key, path=data).variant_table or {})
        else:
            remove_variant_table(s, actor=actor(), key=key)
            table = {}
    summary = {k: table.get(k) for k in ("source", "sha256", "n_variants")}
    if json_out:
        print_json({"study": key, "variant_table": summary if table else None})
    elif table:
        typer.echo(f"study {key}: {table['n_variants']} variants attached from {table['source']}")
    else:
        typer.echo(f"study {key}: per-variant table removed")


@study_app.command("critique")
def critique(
    key: str,
    threat: Annotated[str, typer.Option(help="Catalogue threat code, e.g. DG-E01.")],
    by: Annotated[
        str | None, typer.Option(help="Key of the study that raised it (omit when the team raises it).")
    ] = None,
    note: TextOpt = None,
) -> None:
    """Record that a catalogue threat was raised against a study."""
    from ivdossier.registry.studies import critique as do_critique

    with writing() as s:
        do_critique(s, actor=actor(), key=key, threat=threat, by=by, note=read_text_option(note) or "")
    typer.echo(f"threat {threat} recorded against {key}" + (f" (raised by {by})" if by else ""))


def audit(
    instrument: Annotated[
        str | None, typer.Option(help="Studies of this instrument (and its family).")
    ] = None,
    family: Annotated[str | None, typer.Option(help="Studies of this family.")] = None,
    study: Annotated[str | None, typer.Option(help="One study.")] = None,
    out: Annotated[
        Path | None, typer.Option(help="Write the audit document to FILE.md or FILE.html.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Re-examine prior studies from what they reported: tF at 5 %, Anderson–Rubin sets, strength tables."""
    from ivdossier import __version__
    from ivdossier.errors import InvalidInputError
    from ivdossier.registry.models import utcnow
    from ivdossier.registry.plans import iso
    from ivdossier.reports.audit_doc import audit_html, audit_json, audit_markdown
    from ivdossier.workflows.studies import audit_inputs, build_audit

    if out is not None and out.suffix.lower() not in (".md", ".html"):
        raise InvalidInputError(f"--out {str(out)!r} must end in .md or .html.")
    with reading() as s:
        inputs = audit_inputs(s, instrument=instrument, family=family, key=study)
    summary = build_audit(inputs)
    if out is not None:
        render = audit_html if out.suffix.lower() == ".html" else audit_markdown
        write_output(out, render(summary, inputs, generated_at=iso(utcnow()), tool_version=__version__))
    if json_out:
        print_json(audit_json(summary, inputs))
        return
    rows = [
        {"study": a.key, "estimate": a.reported.estimate, "f": a.reported.first_stage_f,
         "tf_c": None if a.tf.critical_value is None else round(a.tf.critical_value, 3),
         "at_5pct": a.verdict_5pct, "at_1pct": a.verdict_1pct}
        for a in summary.studies
    ]  # fmt: skip
    typer.echo(
        f"audit of {summary.scope}: {summary.n_studies} studies, {summary.n_with_statistics} with statistics"
    )
    print_table(rows, ["study", "estimate", "f", "tf_c", "at_5pct", "at_1pct"])
    if out is not None:
        typer.echo(f"wrote {out}")
