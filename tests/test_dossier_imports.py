"""A dossier reads stored results without the libraries that computed them.

Rendering a document decodes every stored run's typed record; the modules that define the result classes import
pandas, scipy.stats, scipy.optimize and statsmodels only inside the functions that compute, so a dossier pays
for none of them (whole-process timings: benchmarks/bench_dossier.py). Each check runs in a fresh interpreter,
since the test process itself has imported everything.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

COMPUTE_ONLY = ("pandas", "scipy.stats", "scipy.optimize", "scipy.integrate", "statsmodels")


def _loaded_after(code: str) -> list[str]:
    probe = (
        code
        + f"\nimport json, sys\nprint('LOADED=' + json.dumps([m for m in {COMPUTE_ONLY!r} if m in sys.modules]))"
    )
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


def test_rendering_each_demo_dossier_loads_no_compute_library(tmp_path: Path) -> None:
    """Markdown and HTML, with figures, for every demo instrument: estimates, falsification, sensitivity,
    compliers, power, fragility and design runs and a literature audit are all read back from storage."""
    from ivdossier.workflows.demo import INSTRUMENTS, build_demo

    demo = tmp_path / "demo"
    build_demo(demo)
    db = str(demo / "ivdossier.sqlite")
    for spec in INSTRUMENTS:
        for suffix in (".md", ".html"):
            out = tmp_path / f"{spec['slug']}{suffix}"
            code = (
                "import sys\nfrom ivdossier.cli.app import main\n"
                f"sys.argv = ['ivdossier', '--db', {db!r}, 'dossier', {spec['slug']!r}, '--out', {str(out)!r}]\n"
                "try:\n    main()\nexcept SystemExit as exc:\n    assert not exc.code, exc.code\n"
            )
            assert _loaded_after(code) == [], f"{spec['slug']}{suffix}"
            assert out.stat().st_size > 0
