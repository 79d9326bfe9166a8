"""A dossier reads stored results without the libraries that computed them.

Rendering a document decodes every stored run's typed record; the modules that define the result classes import
pandas, scipy (any part of it) and statsmodels only inside the functions that compute, figures are drawn without
a plotting library, and quantiles derived from stored numbers (a literature audit's critical values, the complier
shares' intervals) come from ivdossier.estimation.light_quantiles, so a dossier pays for none of them (whole-process timings: benchmarks/bench_dossier.py). Each check runs in a fresh interpreter,
since the test process itself has imported everything.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

COMPUTE_ONLY = ("pandas", "scipy", "statsmodels", "matplotlib")
#: A dossier, the site and every `graph` command build graphs with threats_catalog/dag.py; networkx is test-only.
GRAPH_LIBRARY = ("networkx",)


@pytest.fixture(scope="module")
def demo_db(tmp_path_factory: pytest.TempPathFactory) -> str:
    from ivdossier.workflows.demo import build_demo

    demo = tmp_path_factory.mktemp("imports") / "demo"
    build_demo(demo)
    return str(demo / "ivdossier.sqlite")


def _command(db: str, *argv: str) -> str:
    """Python code that runs one `ivdossier` command in the probe's process and fails on a non-zero exit."""
    return (
        "import sys\nfrom ivdossier.cli.app import main\n"
        f"sys.argv = ['ivdossier', '--db', {db!r}, *{list(argv)!r}]\n"
        "try:\n    main()\nexcept SystemExit as exc:\n    assert not exc.code, exc.code\n"
    )


def _loaded_after(code: str, modules: tuple[str, ...] = COMPUTE_ONLY) -> list[str]:
    """Which of `modules` a fresh interpreter has imported after running `code`."""
    listed = f"[m for m in {modules!r} if m in sys.modules]"
    probe = code + f"\nimport json, sys\nprint('LOADED=' + json.dumps({listed}))"
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
    line = next(x for x in done.stdout.splitlines() if x.startswith("LOADED="))
    return list(json.loads(line[len("LOADED=") :]))


def test_every_result_class_in_the_table_of_analyses_loads_without_compute_libraries() -> None:
    code = (
        "from ivdossier.workflows.analyses import ANALYSES\n"
        "classes = [a.result_class for a in ANALYSES.values()]\n"
        "assert len(classes) == len(ANALYSES)\n"
    )
    assert _loaded_after(code) == []


def test_rendering_each_demo_dossier_loads_no_compute_library(demo_db: str, tmp_path: Path) -> None:
    """Markdown and HTML, with figures, for every demo instrument: estimates, falsification, sensitivity,
    compliers, power, fragility and design runs and a literature audit are all read back from storage."""
    from ivdossier.workflows.demo import INSTRUMENTS

    for spec in INSTRUMENTS:
        for suffix in (".md", ".html"):
            out = tmp_path / f"{spec['slug']}{suffix}"
            code = _command(demo_db, "dossier", spec["slug"], "--out", str(out))
            # pydantic too: typer's value checker, which cli/app.py builds only for values it cannot read itself
            loaded = _loaded_after(code, (*COMPUTE_ONLY, *GRAPH_LIBRARY, "pydantic"))
            assert loaded == [], f"{spec['slug']}{suffix}"
            assert out.stat().st_size > 0


def test_graph_check_draws_no_plot(demo_db: str) -> None:
    """`graph check` shows verdicts, not figures: it loads no compute library (fibre-wave has two sensitivity
    runs in the demo)."""
    code = _command(demo_db, "graph", "check", "fibre-wave")
    assert _loaded_after(code, (*COMPUTE_ONLY, *GRAPH_LIBRARY)) == []


def test_site_and_graph_commands_load_no_graph_library(demo_db: str, tmp_path: Path) -> None:
    """The site (every instrument's diagram), `graph draw`, `graph check --json` and `graph show` run one after
    another in one process without importing networkx (each command inherits the imports of those before)."""
    code = "".join(
        _command(demo_db, *argv)
        for argv in (
            ("site", str(tmp_path / "site")),
            ("graph", "draw", "mast-distance", "--out", str(tmp_path / "g.svg")),
            ("graph", "check", "clerk-video-rate", "--json"),
            ("graph", "show", "telehealth-ed"),
        )
    )
    assert _loaded_after(code, GRAPH_LIBRARY) == []
    assert (tmp_path / "g.svg").read_text(encoding="utf-8").startswith("<svg")
    assert list((tmp_path / "site").rglob("*.html"))
