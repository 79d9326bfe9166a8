"""Time the dossier: whole-process `ivdossier dossier` on the demo registry (target < 1 s, Markdown with its SVG
figure files and HTML), and in-process for a large record (200 linked threats, 50 runs; target < 2 s).

Run: .venv/bin/python benchmarks/bench_dossier.py [--repeat N] [--big]
The demo registry is built once in a temporary folder; each command runs in a fresh process, Markdown and HTML
interleaved (A B A B ...), and the median of N runs (default 5) is printed per instrument and format. With --big,
the large synthetic record is rendered in-process and the seconds per stage (best of N) are printed; its threats
are synthetic (ivdossier.reports.sample), its runs carry real estimates (ivdossier.workflows.sample) stored as a
registry stores them, so reading their typed records back is part of the time.
"""

from __future__ import annotations

import argparse
import dataclasses
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from ivdossier.reports.dossier import dossier_figures, dossier_html, dossier_markdown
from ivdossier.reports.sample import make_link, sample_input
from ivdossier.workflows.sample import sample_result, sample_run
from ivdossier.workflows.verdicts import with_verdicts

TARGET_SECONDS = 2.0
WHOLE_PROCESS_TARGET = 1.0


def big_input() -> Any:
    base = sample_input()
    links = tuple(make_link(i) for i in range(200))
    runs = (
        sample_run(0, sample_result("ols"), plots=False),
        *(sample_run(i, sample_result("2sls", seed=7 + i % 5)) for i in range(1, 50)),
    )
    return with_verdicts(dataclasses.replace(base, links=links, runs=runs))


def _fresh(inp: Any) -> Any:
    """The same input with new run objects, so each round reads the stored records again (no cached result)."""
    return dataclasses.replace(inp, runs=tuple(dataclasses.replace(r) for r in inp.runs))


def best_of(fn: Callable[[], Any], repeat: int) -> tuple[float, Any]:
    best, out = float("inf"), None
    for _ in range(repeat):
        start = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - start)
    return best, out


def whole_process(repeat: int) -> None:
    """`ivdossier dossier` in fresh processes on the demo registry, Markdown and HTML interleaved."""
    from ivdossier.workflows.demo import INSTRUMENTS, build_demo, ticking_clock

    with tempfile.TemporaryDirectory(prefix="ivd-dossier-") as tmp:
        demo = Path(tmp) / "demo"
        build_demo(demo, clock=ticking_clock())
        db = str(demo / "ivdossier.sqlite")
        for spec in INSTRUMENTS:
            times: dict[str, list[float]] = {".md": [], ".html": []}
            cpu: dict[str, list[float]] = {".md": [], ".html": []}
            for _ in range(repeat):
                for suffix in times:
                    out = Path(tmp) / f"{spec['slug']}{suffix}"
                    before = resource.getrusage(resource.RUSAGE_CHILDREN)
                    start = time.perf_counter()
                    proc = subprocess.run(
                        [
                            sys.executable,
                            "-m",
                            "ivdossier.cli",
                            "--db",
                            db,
                            "dossier",
                            spec["slug"],
                            "--out",
                            str(out),
                        ],
                        capture_output=True,
                        text=True,
                    )
                    times[suffix].append(time.perf_counter() - start)
                    after = resource.getrusage(resource.RUSAGE_CHILDREN)
                    cpu[suffix].append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
                    if proc.returncode != 0:
                        raise RuntimeError(proc.stderr)
            for suffix, values in times.items():
                median = statistics.median(values)
                flag = "within" if median < WHOLE_PROCESS_TARGET else "OVER"
                runs = ", ".join(f"{v:.2f}" for v in values)
                print(
                    f"dossier {spec['slug']:18s} {suffix:5s} median {median:5.2f} s [{runs}]  "
                    f"(CPU {statistics.median(cpu[suffix]):.2f} s)  {flag} the {WHOLE_PROCESS_TARGET:.0f} s target"
                )


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--big", action="store_true", help="Also time the large synthetic record in-process.")
    args = parser.parse_args()
    whole_process(args.repeat)
    if args.big:
        big(args.repeat)


def big(repeat: int) -> None:
    inp = big_input()
    start = time.perf_counter()
    import matplotlib  # noqa: F401  (first import is a one-off cost, reported separately)

    print(f"import matplotlib (one-off)      {time.perf_counter() - start:8.3f} s")
    t_md, md = best_of(lambda: dossier_markdown(_fresh(inp)), repeat)
    t_fig, _ = best_of(lambda: dossier_figures(inp), repeat)
    t_html, page = best_of(lambda: dossier_html(_fresh(inp)), repeat)
    print(f"links {len(inp.links)}, runs {len(inp.runs)}")
    print(f"markdown                        {t_md:8.3f} s   {len(md) / 1e3:8.1f} kB")
    print(f"figures (2 plots + diagram)     {t_fig:8.3f} s")
    print(f"html (markdown + figures + render) {t_html:5.3f} s   {len(page) / 1e3:8.1f} kB")
    verdict = "within" if t_html < TARGET_SECONDS else "OVER"
    print(f"target {TARGET_SECONDS:.1f} s for the HTML dossier: {verdict}")


if __name__ == "__main__":
    main()
