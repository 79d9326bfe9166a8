"""`estimate` on the demo data computes without scipy.stats, scipy.optimize or pydantic.

Those imports are most of the command's start-up (benchmarks/bench_startup.py): quantiles and tail probabilities
come from ivdossier.estimation.distributions (scipy.special, the routines scipy.stats calls), roots from the port
of Brent's method in ivdossier.estimation.roots, and typer's pydantic-based checker of option values is built
only for values cli/app.py cannot pass through itself. Each check runs the command in a fresh interpreter, since
the test process itself has imported everything. (A number typed on the command line, e.g. `--alpha 0.1`, is
still read by typer's checker, so pydantic is then imported.)
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

SLOW_IMPORTS = ("scipy.stats", "scipy.optimize", "scipy.integrate", "pydantic")
#: Imported when the numbers are computed: their presence shows the probe ran the whole estimation.
COMPUTED_WITH = ("numpy", "pandas", "scipy.special", "scipy.linalg")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from ivdossier.workflows.demo import build_demo

    folder = tmp_path_factory.mktemp("estimate-imports") / "demo"
    build_demo(folder)
    return folder


def _loaded(demo: Path, argv: list[str], modules: tuple[str, ...]) -> tuple[list[str], str]:
    """Which of `modules` a fresh interpreter has imported after `ivdossier estimate ...`, and its output."""
    code = (
        "import json, sys\nfrom ivdossier.cli.app import main\n"
        f"sys.argv = ['ivdossier', '--db', {str(demo / 'ivdossier.sqlite')!r}, '--as', 'amara', 'estimate', *{argv!r}]\n"
        "try:\n    main()\nexcept SystemExit as exc:\n    assert not exc.code, exc.code\n"
        f"print('LOADED=' + json.dumps([m for m in {modules!r} if m in sys.modules]))"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
    line = next(x for x in done.stdout.splitlines() if x.startswith("LOADED="))
    return list(json.loads(line[len("LOADED=") :])), done.stdout


def _model(demo: Path) -> list[str]:
    """The model of the benchmark's `estimate (demo data)` (benchmarks/bench_startup.py demo_commands)."""
    data = demo / "data" / "telehealth.csv"
    return [
        *("--data", str(data), "--outcome", "ed_visits", "--treatment", "telehealth"),
        *("--instrument", "fibre_months", "--control", "age", "--control", "chronic_conditions"),
    ]


@pytest.mark.parametrize(
    "options",
    [
        ["--cluster", "district", "--vcov", "cluster"],  # the benchmark's command (deprecated spelling)
        ["--cluster", "district", "--vcov", "clustered", "--json"],
        ["--vcov", "homoskedastic", "--method", "liml"],
        ["--vcov", "heteroskedastic"],
    ],
    ids=" ".join,
)
def test_estimate_imports_no_scipy_stats_optimize_or_pydantic(demo: Path, options: list[str]) -> None:
    loaded, out = _loaded(demo, [*_model(demo), *options], (*SLOW_IMPORTS, *COMPUTED_WITH))
    assert [m for m in loaded if m in SLOW_IMPORTS] == []
    assert [m for m in loaded if m in COMPUTED_WITH] == list(COMPUTED_WITH)
    assert "Anderson" in out or "anderson_rubin" in out  # the diagnostics were computed and printed


def test_estimate_stored_as_a_run_imports_no_scipy_stats_or_optimize(demo: Path) -> None:
    """With --attach the run (and its plot summaries) is stored; the registry's models bring pydantic."""
    argv = [*_model(demo), "--cluster", "district", "--vcov", "clustered", "--attach", "fibre-wave"]
    loaded, out = _loaded(demo, argv, ("scipy.stats", "scipy.optimize", "scipy.special"))
    assert loaded == ["scipy.special"]
    assert "stored as run" in out
