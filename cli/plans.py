"""`ivdossier plan ...`: draft, show, edit, freeze, verify, export and compare pre-analysis plans."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Any

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import IfVersion, JsonFlag, actor, read_text_option, reading, writing
from ivdossier.cli.model_options import Controls, current_cov_name, split_names
from ivdossier.cli.output import print_json, print_table

plan_app = typer.Typer(
    help="Pre-analysis plans: draft from the registry, fix decision rules, freeze, verify and compare runs.",
    no_args_is_help=True,
)
DOC_SUFFIXES = (".md", ".html", ".json")


def register(app: typer.Typer) -> None:
    app.add_typer(plan_app, name="plan", rich_help_panel=panels.LITERATURE)


def _suffix(path: Path, allowed: tuple[str, ...], option: str) -> str:
    from ivdossier.errors import InvalidInputError

    suffix = path.suffix.lower()
    if suffix not in allowed:
        raise InvalidInputError(f"{option} {str(path)!r} must end in {', '.join(allowed)}.")
    return suffix


def _power(
    n: int | None,
    expected_f: float | None,
    partial_r2: float | None,
    outcome_sd: float | None,
    residual_sd: float | None,
    treatment_sd: float | None,
    cluster_size: float,
    icc: float,
    effect: float | None,
    power: float,
    n_instruments: int,
) -> dict[str, Any] | None:
    from ivdossier.errors import InvalidInputError

    strength_given = expected_f is not None or partial_r2 is not None
    sd_given = outcome_sd is not None or residual_sd is not None
    if not strength_given and not sd_given and effect is None:
        return None
    if n is None or not strength_given or not sd_given:
        raise InvalidInputError(
            "power needs --n, one of --expected-f or --partial-r2, and one of --outcome-sd or --residual-sd; "
            "give all three or none."
        )
    if treatment_sd is None:
        raise InvalidInputError(
            "power needs --treatment-sd, the treatment's standard deviation after controls (it is never assumed; "
            "`ivdossier power --data FILE --treatment D` derives it from data)."
        )
    from ivdossier.estimation.power import iv_design, power_analysis

    design = iv_design(n=n, partial_r2=partial_r2, first_stage_f=expected_f, residual_sd=residual_sd,
                       outcome_sd=outcome_sd, treatment_sd=treatment_sd, n_instruments=n_instruments,
                       cluster_size=cluster_size, icc=icc)  # fmt: skip
    return power_analysis(design, effect=effect, target_power=power).to_dict()


@plan_app.command("draft")
def draft(
    target: Annotated[
        str, typer.Argument(help="A program slug (all its active candidates) or an instrument slug.")
    ],
    slug: Annotated[str | None, typer.Option(help="Plan slug (default TARGET-plan).")] = None,
    title: Annotated[str | None, typer.Option(help="Plan title.")] = None,
    control: Controls = None,
    absorb: Annotated[list[str] | None, typer.Option(help="Fixed-effect column to absorb (repeat).")] = None,
    cluster: Annotated[list[str] | None, typer.Option(help="Cluster column (one or two).")] = None,
    method: Annotated[str, typer.Option(help="Estimator: 2sls, liml or fuller.")] = "2sls",
    vcov: Annotated[
        str | None,
        typer.Option(help="homoskedastic, heteroskedastic or clustered (default: clustered if --cluster)."),
    ] = None,
    alpha: Annotated[float, typer.Option(help="Test level.")] = 0.05,
    data: Annotated[str | None, typer.Option(help="Data description, or @FILE.")] = None,
    sample: Annotated[str | None, typer.Option(help="Sample definition, or @FILE.")] = None,
    n: Annotated[int | None, typer.Option(help="Planned number of observations.")] = None,
    expected_f: Annotated[float | None, typer.Option(help="Expected first-stage F (for power).")] = None,
    partial_r2: Annotated[
        float | None, typer.Option(help="Expected partial R-squared of the instruments.")
    ] = None,
    outcome_sd: Annotated[
        float | None, typer.Option(help="SD of the outcome (used as the error SD).")
    ] = None,
    residual_sd: Annotated[float | None, typer.Option(help="SD of the structural error.")] = None,
    treatment_sd: Annotated[
        float | None,
        typer.Option(help="SD of the treatment after controls (needed for power; never assumed)."),
    ] = None,
    cluster_size: Annotated[float, typer.Option(help="Average cluster size (design effect).")] = 1.0,
    icc: Annotated[float, typer.Option(help="Intra-cluster correlation (design effect).")] = 0.0,
    effect: Annotated[float | None, typer.Option(help="Effect size for power and the N needed.")] = None,
    power: Annotated[float, typer.Option(help="Target power for the MDE.")] = 0.8,
    out: Annotated[
        Path | None, typer.Option(help="Also write the plan document to FILE.md or FILE.html.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Draft a pre-analysis plan from the registry (edit it, then freeze it)."""
    from ivdossier.registry import plans
    from ivdossier.workflows.plans import draft_plan

    if out is not None:
        _suffix(out, (".md", ".html"), "--out")
    with writing() as s:
        from ivdossier.registry import records
        from ivdossier.registry.models import Instrument

        inst = records.find(s, Instrument, target)
        n_inst = len(inst.columns or []) if inst is not None else 1
        pw = _power(n, expected_f, partial_r2, outcome_sd, residual_sd, treatment_sd, cluster_size, icc, effect,
                    power, max(n_inst, 1))  # fmt: skip
        plan = draft_plan(
            s, actor=actor(), target=target, slug=slug, title=title, controls=list(split_names(control)), absorb=absorb or [],
            cluster=cluster or [], method=method, vcov=vcov and current_cov_name(vcov), alpha=alpha, data_description=read_text_option(data) or "",
            sample=read_text_option(sample) or "", expected_n=n, power=pw,
        )  # fmt: skip
        view = plans.plan_dict(s, plan)
        sealed = plans.sealed_document(s, plan)
    if out is not None:
        write_replacing(out, _render(out.suffix.lower(), sealed, "draft", ""))
    print_json(view) if json_out else typer.echo(f"plan {view['slug']} drafted for {target}")


def _render(suffix: str, sealed: dict[str, Any], state: str, sha: str) -> str:
    from ivdossier.reports.plan_doc import plan_html, plan_markdown

    if suffix == ".html":
        return plan_html(sealed, state=state, sha256=sha)
    if suffix == ".json":
        return (
            json.dumps(
                {"state": state, "sha256": sha, "plan": sealed}, indent=2, sort_keys=True, ensure_ascii=False
            )
            + "\n"
        )
    return plan_markdown(sealed, state=state, sha256=sha)


@plan_app.command("list")
def list_(json_out: JsonFlag = False) -> None:
    """List plans with their state and hash."""
    from sqlalchemy import select

    from ivdossier.registry import plans
    from ivdossier.registry.models import Plan

    with reading() as s:
        rows = plans.plan_dicts(s, list(s.scalars(select(Plan).order_by(Plan.slug))))
    if json_out:
        print_json(rows)
        return
    for row in rows:
        row["sha256"] = (row.get("sha256") or "")[:12]
    print_table(
        rows, ["slug", "program", "instrument", "state", "frozen_at", "sha256", "title"], widths={"title": 40}
    )


@plan_app.command("quantities")
def quantities_cmd(
    run_kind: Annotated[
        str | None,
        typer.Option("--run-kind", help="Only the quantities of this kind of run (e.g. variants)."),
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """List the quantities a decision rule may name (paths into a run's results), grouped by kind of run."""
    from ivdossier.errors import InvalidInputError
    from ivdossier.workflows.plan_quantities import ESTIMATE, INSTRUMENT, RULE_KINDS, TREATMENT, quantities

    kinds = (ESTIMATE, *RULE_KINDS)
    if run_kind is not None and run_kind not in kinds:
        raise InvalidInputError(f"--run-kind {run_kind!r} is not known; use one of {', '.join(kinds)}.")
    rows = [q.to_dict() for q in quantities(run_kind)]
    if json_out:
        print_json(rows)
        return
    typer.echo(
        f"Quantities a decision rule may name ({len(rows)}). Write an estimate's path bare and any other kind's "
        "qualified by its run kind (variants:egger.intercept_p); one rule reads one kind of run. Write "
        f"{TREATMENT} and {INSTRUMENT} as the plan's column names (coef.video_share); an item of a list by its "
        "position from 0 (weak_iv_robust.anderson_rubin.confidence_set.0.1 is the upper end of the first interval)."
    )
    for kind in kinds:
        group = [r for r in rows if r["run_kind"] == kind]
        if not group:
            continue
        typer.echo(f"\n{kind} runs ({len(group)})")
        for row in group:
            row["may_be_empty"] = "yes" if row["may_be_empty"] else "no"
        print_table(group, ["path", "kind", "may_be_empty"])


@plan_app.command("show")
def show(plan: str, json_out: JsonFlag = False) -> None:
    """Print the plan document (Markdown) or, with --json, the stored plan."""
    from ivdossier.registry import plans, records
    from ivdossier.registry.models import Plan

    with reading() as s:
        row = records.get(s, Plan, plan)
        view = plans.plan_dict(s, row)
        sealed = plans.sealed_document(s, row)
    if json_out:
        print_json(view)
    else:
        typer.echo(_render(".md", sealed, row.state, row.sha256), nl=False)


@plan_app.command("edit")
def edit(
    plan: str,
    title: Annotated[str | None, typer.Option(help="New title.")] = None,
    data: Annotated[str | None, typer.Option(help="Data description, or @FILE.")] = None,
    sample: Annotated[str | None, typer.Option(help="Sample definition, or @FILE.")] = None,
    rules: Annotated[
        Path | None, typer.Option(help="JSON file with the full list of decision rules.")
    ] = None,
    specs: Annotated[
        Path | None, typer.Option(help="JSON file with the full list of estimation specs.")
    ] = None,
    deviations: Annotated[str | None, typer.Option(help="How deviations will be reported, or @FILE.")] = None,
    if_version: IfVersion = None,
) -> None:
    """Change a draft plan (frozen plans refuse every change)."""
    from ivdossier.registry import records
    from ivdossier.registry.models import Plan
    from ivdossier.workflows.plans import edit_plan

    sections: dict[str, Any] = {}
    if rules is not None:
        sections["decision_rules"] = _json_file(rules, "decision rules")
    if specs is not None:
        sections["specs"] = _json_file(specs, "specs")
    if deviations is not None:
        sections["deviations"] = read_text_option(deviations)
    with writing() as s:
        if data is not None or sample is not None:
            current = dict((records.get(s, Plan, plan).content or {}).get("data") or {})
            if data is not None:
                current["description"] = read_text_option(data)
            if sample is not None:
                current["sample"] = read_text_option(sample)
            sections["data"] = current
        row = edit_plan(
            s, actor=actor(), slug=plan, title=title, sections=sections, expected_version=if_version
        )
        version = row.version
    typer.echo(f"plan {plan} now at version {version}")


def _json_file(path: Path, what: str) -> Any:
    from ivdossier.cli.common import read_input_file
    from ivdossier.errors import InvalidInputError

    text = read_input_file(path, f"{what} file")
    try:
        return json.loads(text)
    except json.JSONDecodeError as exc:
        raise InvalidInputError(
            f"{what} file {str(path)!r} is not valid JSON (line {exc.lineno}: {exc.msg})."
        ) from None


def write_replacing(path: Path, text: str) -> None:
    """Write a document or export atomically ('-' is standard output): a temporary file in the same folder, flushed
    and then renamed over `path`, so a reader never sees half a file. A link at `path` is replaced, not followed."""
    import os
    import tempfile

    from ivdossier.errors import InvalidInputError

    if str(path) == "-":
        typer.echo(text, nl=False)
        return
    folder = path.parent if str(path.parent) else Path(".")
    if path.is_dir():
        raise InvalidInputError(f"{str(path)!r} is a folder; give a file name.")
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=folder)
        with os.fdopen(fd, "wb") as handle:
            handle.write(text.encode("utf-8"))
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except OSError as exc:
        raise InvalidInputError(
            f"cannot write {str(path)!r}: {exc.strerror}; check that the folder exists."
        ) from None
    finally:
        if tmp is not None and os.path.lexists(tmp):
            os.unlink(tmp)


def _receipt_path(plan: str, receipt: Path | None) -> Path:
    return receipt if receipt is not None else Path(f"{plan}.seal.json")


def write_new_file(path: Path, text: str) -> bool:
    """Create `path` holding `text`, atomically and never over another file or through a link.

    The text goes to a fresh temporary file in the same folder, is flushed to disk and then hard-linked into place
    (which fails if the name exists). Returns False when the file already holds exactly `text`."""
    import os
    import tempfile

    from ivdossier.errors import InvalidInputError

    data = text.encode("utf-8")
    folder = path.parent if str(path.parent) else Path(".")
    if path.is_symlink() or (path.exists() and not path.is_file()):
        raise InvalidInputError(f"{str(path)!r} is a link or not a regular file; choose another file name.")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=folder)
    except OSError as exc:
        raise InvalidInputError(
            f"cannot write in {str(folder)!r}: {exc.strerror}; check that it exists."
        ) from None
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o644)
        try:
            os.link(tmp, path)
        except FileExistsError:
            if not path.is_symlink() and path.is_file() and path.read_bytes() == data:
                return False
            raise InvalidInputError(
                f"{str(path)!r} already exists and holds something else; it is never overwritten. "
                "Choose another file name."
            ) from None
        except OSError:  # a file system without hard links: replace, after the same existence check
            if os.path.lexists(path):
                raise InvalidInputError(f"{str(path)!r} already exists; choose another file name.") from None
            os.replace(tmp, path)
    except OSError as exc:
        raise InvalidInputError(f"cannot write {str(path)!r}: {exc.strerror}; check the folder.") from None
    finally:
        if os.path.lexists(tmp):
            os.unlink(tmp)
    return True


@plan_app.command("freeze")
def freeze(
    plan: str,
    receipt: Annotated[
        Path | None,
        typer.Option(
            help="Where to write the seal receipt (default PLAN.seal.json here); never overwritten."
        ),
    ] = None,
) -> None:
    """Seal a plan: canonical form, SHA-256, time and author are stored, the plan becomes read-only, and a seal
    receipt is written for the team to keep outside the registry (commit it or deposit it elsewhere)."""
    import os

    from ivdossier.errors import InvalidInputError
    from ivdossier.registry import plans
    from ivdossier.workflows.plans import freeze_plan

    target = _receipt_path(plan, receipt)
    if os.path.lexists(target):
        raise InvalidInputError(
            f"the receipt file {str(target)!r} already exists and is never overwritten; nothing was frozen. "
            "Pass --receipt with a new file name."
        )
    written = False
    try:
        with writing() as s:
            row = freeze_plan(s, actor=actor(), slug=plan)
            stamp, who, sha = plans.iso(row.frozen_at), row.frozen_by, row.sha256  # type: ignore[arg-type]
            written = write_new_file(target, plans.receipt_text(plans.seal_receipt(s, row)))
    except BaseException:
        if written:  # the seal was not committed: its receipt must not survive
            os.unlink(target)
        raise
    typer.echo(f"plan {plan} frozen at {stamp} by {who}\nsha256 {sha}\nseal receipt written to {target}")


@plan_app.command("receipt")
def receipt_cmd(
    plan: str,
    receipt: Annotated[
        Path | None, typer.Option(help="Where to write it (default PLAN.seal.json here); never overwritten.")
    ] = None,
) -> None:
    """Write the seal receipt of a plan frozen earlier (it says when it was written); refused unless the plan
    verifies."""
    from ivdossier.errors import ConflictError
    from ivdossier.registry import plans, records
    from ivdossier.registry.models import Plan
    from ivdossier.workflows.plan_check import verify_plan

    target = _receipt_path(plan, receipt)
    with reading() as s:
        report = verify_plan(s, plan)
        if not report.intact:
            raise ConflictError(
                f"plan {plan!r} failed verification ({report.headline}); no receipt is written for it. "
                f"See `ivdossier plan verify {plan}`."
            )
        text = plans.receipt_text(plans.seal_receipt(s, records.get(s, Plan, plan)))
    if _same_seal(target, text):
        typer.echo(f"{target} already holds a receipt of this seal; left as it is")
    elif write_new_file(target, text):
        typer.echo(f"seal receipt of plan {plan} written to {target}")
    else:
        typer.echo(f"{target} already holds this receipt")


def _same_seal(path: Path, text: str) -> bool:
    """Whether `path` is a regular file holding a receipt of the same seal (whenever it was written)."""
    if path.is_symlink() or not path.is_file():
        return False
    try:
        old, new = json.loads(path.read_text(encoding="utf-8")), json.loads(text)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return False
    keys = ("format", "plan_uuid", "sha256", "canonical")
    return isinstance(old, dict) and all(old.get(k) == new.get(k) for k in keys)


@plan_app.command("export")
def export(
    plan: str,
    out: Annotated[Path, typer.Option(help="FILE.json (sealed copy), FILE.md or FILE.html.")],
) -> None:
    """Write a frozen plan to a file that `plan verify --file` can check later."""
    from ivdossier.registry import plans, records
    from ivdossier.registry.models import Plan

    suffix = _suffix(out, DOC_SUFFIXES, "--out")
    with reading() as s:
        if suffix == ".json":
            text = plans.export_document(s, plan)
        else:
            row = records.get(s, Plan, plan)
            if row.state != "frozen":
                plans.export_document(s, plan)  # raises the draft error
            text = _render(suffix, plans.sealed_document(s, row), row.state, row.sha256)
    write_replacing(out, text)
    typer.echo(f"wrote {out}")


def _rounded(value: Any) -> Any:
    """Floats to six significant digits for reading, inside lists and objects too (--json keeps every digit)."""
    if isinstance(value, float):
        return float(f"{value:.6g}")
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    return value


def show_value(value: Any) -> str:
    """A value for the terminal: yes/no for booleans, lists and objects in full as JSON, '–' for nothing."""
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, list | dict):
        return json.dumps(_rounded(value), ensure_ascii=False, sort_keys=True)
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


@plan_app.command("verify")
def verify(
    plan: str,
    file: Annotated[
        Path | None, typer.Option(help="Also check an exported copy (.json, .md or .html).")
    ] = None,
    receipt: Annotated[
        Path | None, typer.Option(help="Also check the seal receipt written by `plan freeze`.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Check a frozen plan against its seal event (and a copy or receipt); exit 1 with the reason if it fails."""
    from ivdossier.cli.common import read_input_file
    from ivdossier.registry import plans, records
    from ivdossier.registry.models import Plan
    from ivdossier.reports.plan_doc import verify_document
    from ivdossier.workflows.plan_check import RECEIPT_STATES, VerifyReport, verify_plan

    text = suffix = None
    if file is not None:
        suffix = _suffix(file, DOC_SUFFIXES, "--file")
        text = read_input_file(file, "exported plan")
    receipt_text = read_input_file(receipt, "seal receipt") if receipt is not None else None
    with reading() as s:
        report = verify_plan(s, plan, exported=text if suffix == ".json" else None, receipt=receipt_text)
        if text is not None and suffix in (".md", ".html"):
            row = records.get(s, Plan, plan)
            seal = plans.recorded_seal(s, row) or plans.sealed_document(s, row)
            extra = verify_document(text, seal, sha256=row.sha256, fmt=suffix[1:])
            report = VerifyReport(report.plan, report.sha256, report.intact and not extra,
                                  report.differences + tuple(extra), report.notes, report.problems,
                                  report.receipt)  # fmt: skip
    if json_out:
        print_json(report.to_dict())
    elif report.intact:
        typer.echo(
            f"plan {plan} is intact (sha256 {report.sha256})"
            + (f"; {file} matches" if file else "")
            + (f"; {RECEIPT_STATES['agree']} ({receipt})" if receipt else "")
        )
    else:
        typer.echo(f"plan {plan} FAILED verification: {report.headline}")
        if report.differences:
            rows = [{**d.to_dict(), "frozen": show_value(d.frozen), "found": show_value(d.found)}
                    for d in report.differences]  # fmt: skip
            print_table(rows, ["where", "path", "frozen", "found"])
        for problem in report.problems[1:]:
            typer.echo(f"also: {problem}")
        if report.receipt is not None and report.problems:
            typer.echo(f"receipt: {RECEIPT_STATES[report.receipt]}")
        for note in report.notes:
            typer.echo(f"note: {note}")
    if not report.intact:
        raise typer.Exit(code=1)


@plan_app.command("compare")
def compare(
    plan: str,
    runs: Annotated[list[str], typer.Argument(help="Run slugs to compare with the plan.")],
    json_out: JsonFlag = False,
) -> None:
    """List every deviation of the runs from the plan and apply its decision rules to each run."""
    from ivdossier.workflows.plan_check import compare_plan

    with reading() as s:
        result = compare_plan(s, plan, runs)
    if json_out:
        print_json(result.to_dict())
        return
    for note in result.notes:
        typer.echo(f"note: {note}")
    typer.echo(
        f"plan {plan} ({result.state}): {result.n_deviations} deviation(s) in {len(result.runs)} run(s)"
    )
    devs = [
        {**d.to_dict(), "planned": show_value(d.planned), "actual": show_value(d.actual)}
        for r in result.runs
        for d in r.deviations
    ]
    if devs:
        print_table(devs, ["run", "kind", "field", "planned", "actual"])
    rules = [
        {"run": r.run, "rule": o.rule_id, "holds": _holds(o), "basis": _basis(o), "action": o.action}
        for r in result.runs
        for o in r.rules
    ]
    if rules:
        typer.echo("")
        print_table(rules, ["run", "rule", "holds", "basis", "action"])
    for r in result.runs:
        for note in r.notes:
            typer.echo(f"note: {note}")


def _holds(outcome: Any) -> str:
    """yes/no, or why a rule was not decided ("not applicable" or "not evaluable")."""
    return (outcome.status or "not evaluable") if outcome.holds is None else show_value(outcome.holds)


def _basis(outcome: Any) -> str:
    """The compared values of a rule, e.g. 'strength.effective_f.statistic = 45.1 >= 23.109'."""
    parts = []
    for c in outcome.comparisons:
        right = show_value(c.threshold) + (f" ({c.threshold_from})" if c.threshold_from else "")
        parts.append(f"{c.statistic} = {show_value(c.value)} {c.op} {right}")
    return "; ".join(parts)
