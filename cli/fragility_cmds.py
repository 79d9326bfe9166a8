"""`fragility`: how much of a result rests on few clusters — wild and pairs bootstrap, leave-one-out
influence, and the Anderson–Rubin test of one treatment among several. Each takes the shared model options,
--json and --attach, and shows a progress bar on the terminal when a run lasts longer than about two seconds.
"""

from __future__ import annotations

import sys
import time
from typing import Annotated, Any

import typer

from ivdossier.cli import panels
from ivdossier.cli.common import JsonFlag
from ivdossier.cli.model_options import (
    Absorb,
    Alpha,
    Attach,
    Cluster,
    Controls,
    Data,
    Instruments,
    Outcome,
    Treatment,
    Treatments,
    Weights,
    model_spec,
)

fragility_app = typer.Typer(
    help="How fragile the result is: bootstrap with few clusters, one cluster left out, one treatment of several.",
    no_args_is_help=True,
)

Null = Annotated[float, typer.Option("--null", help="Coefficient value b0 tested (H0: beta = b0).")]
Seed = Annotated[int, typer.Option("--seed", help="Seed of the random draws (enumeration needs none).")]
Draws = Annotated[
    int, typer.Option("--draws", help="Wild bootstrap draws B (all 2^G sign vectors when G <= 12).")
]
WeightType = Annotated[
    str, typer.Option("--weight-type", help="Wild weights: rademacher or webb (six-point).")
]
FragVcov = Annotated[
    str | None,
    typer.Option(
        "--vcov",
        help="homoskedastic, heteroskedastic or clustered (default: clustered with --cluster, else heteroskedastic).",
    ),
]
AFTER_SECONDS = 2.0


def register(app: typer.Typer) -> None:
    app.add_typer(fragility_app, name="fragility", rich_help_panel=panels.EVIDENCE)


class TerminalProgress:
    """A `progress(done, total)` callback that draws a rich bar on stderr once a run passes about two seconds."""

    def __init__(self, label: str, *, after: float = AFTER_SECONDS) -> None:
        self.label = label
        self.after = after
        self.start = time.monotonic()
        self.bar: Any = None
        self.task: Any = None
        self.enabled = sys.stderr.isatty()

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        if self.bar is None:
            if time.monotonic() - self.start < self.after:
                return
            from rich.console import Console
            from rich.progress import BarColumn, Progress, TaskProgressColumn, TimeElapsedColumn

            self.bar = Progress(
                "[progress.description]{task.description}",
                BarColumn(),
                TaskProgressColumn(),
                TimeElapsedColumn(),
                console=Console(stderr=True),
                transient=True,
            )
            self.bar.start()
            self.task = self.bar.add_task(self.label, total=total)
        self.bar.update(self.task, completed=done, total=total)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.stop()
            self.bar = None


def _vcov(vcov: str | None, cluster: list[str] | None) -> str:
    return vcov if vcov is not None else ("clustered" if cluster else "heteroskedastic")


def _run(name: str, data: Any, spec: Any, **options: Any) -> Any:
    from ivdossier.workflows.fragility import run_fragility

    bar = TerminalProgress(name)
    try:
        return run_fragility(name, data, spec, progress=bar, **options)
    finally:
        bar.close()


def _finish(run: Any, name: str, *, attach: str | None, json_out: bool) -> None:
    """Store and print as every evidence command does, with the fragility caution when a result has none."""
    from ivdossier.cli.evidence_cmds import _finish as finish_evidence
    from ivdossier.estimation.fragility_data import CAUTION

    finish_evidence(run, name, attach=attach, json_out=json_out, caution=CAUTION)


@fragility_app.command("bootstrap")
def bootstrap(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: FragVcov = None,
    alpha: Alpha = 0.05,
    null: Null = 0.0,
    draws: Draws = 999,
    weight_type: WeightType = "rademacher",
    seed: Seed = 0,
    pairs_draws: Annotated[
        int,
        typer.Option("--pairs-draws", help="Also a cluster pairs bootstrap with this many draws (0: none)."),
    ] = 0,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Wild restricted efficient bootstrap t and Anderson–Rubin tests and sets, beside the analytic ones."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=_vcov(vcov, cluster), alpha=alpha,
    )  # fmt: skip
    run = _run(
        "fragility bootstrap", data, spec, null=null, draws=draws, weight_type=weight_type, seed=seed,
        pairs_draws=pairs_draws,
    )  # fmt: skip
    _finish(run, "fragility bootstrap", attach=attach, json_out=json_out)


@fragility_app.command("influence")
def influence(
    data: Data,
    outcome: Outcome,
    treatment: Treatment,
    instrument: Instruments,
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: FragVcov = None,
    alpha: Alpha = 0.05,
    null: Null = 0.0,
    top: Annotated[int, typer.Option("--top", help="How many of the most influential clusters to name.")] = 5,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Leave each cluster (each row without --cluster) out once: estimate, interval, F and significance flips."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=_vcov(vcov, cluster), alpha=alpha,
    )  # fmt: skip
    run = _run("fragility influence", data, spec, null=null, top=top)
    _finish(run, "fragility influence", attach=attach, json_out=json_out)


@fragility_app.command("subvector")
def subvector(
    data: Data,
    outcome: Outcome,
    treatment: Treatments,
    instrument: Instruments,
    of: Annotated[str, typer.Option("--of", help="The treatment whose coefficient is tested.")],
    control: Controls = None,
    absorb: Absorb = None,
    cluster: Cluster = None,
    weights: Weights = None,
    vcov: FragVcov = None,
    alpha: Alpha = 0.05,
    null: Null = 0.0,
    attach: Attach = None,
    json_out: JsonFlag = False,
) -> None:
    """Anderson–Rubin test and set for one treatment's coefficient with the other treatments unrestricted."""
    spec = model_spec(
        outcome=outcome, treatment=treatment, instrument=instrument, control=control, absorb=absorb,
        cluster=cluster, weights=weights, vcov=_vcov(vcov, cluster), alpha=alpha,
    )  # fmt: skip
    run = _run("fragility subvector", data, spec, of=of, null=null)
    _finish(run, "fragility subvector", attach=attach, json_out=json_out)
