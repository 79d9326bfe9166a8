"""Time the dossier: whole-process `ivdossier dossier` on the demo registry (target < 1 s, Markdown with its SVG
figure files and HTML), and in-process for a large record (200 linked threats, 50 runs; target < 2 s).

Run: .venv/bin/python benchmarks/bench_dossier.py [--repeat N] [--against REF] [--big]
The demo registry is built once in a temporary folder; each command runs in a fresh process with Python's bytecode
cache on (PYTHONDONTWRITEBYTECODE removed, as in an ordinary install; one untimed warm-up run per command), Markdown
and HTML interleaved (A B A B ...), and the median wall and CPU time (user + system of the process, less sensitive
to other work on the machine) of N runs (default 5) are printed per instrument and format. `--against REF` runs an
earlier commit (a `git archive` copy, through the same launcher as benchmarks/bench_startup.py) interleaved with
this tree on the same registry and prints both medians and the ratio. With --big, the large synthetic record is
rendered in-process and the seconds per stage (best of N) are printed; its threats are synthetic
(ivdossier.reports.sample), its runs carry real estimates (ivdossier.workflows.sample) stored as a registry stores
them, so reading their typed records back is part of the time.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
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

ROOT = Path(__file__).resolve().parent.parent
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


def _one(argv: list[str], env: dict[str, str]) -> tuple[float, float]:
    """Wall seconds of one whole process, and the CPU seconds of all finished child processes so far."""
    start = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env)
    _, err = proc.communicate()
    wall = time.perf_counter() - start
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(err.decode(errors="replace")[-2000:])
    return wall, usage.ru_utime + usage.ru_stime


def whole_process(repeat: int, against: str | None = None) -> None:
    """`ivdossier dossier` in fresh processes on the demo registry, Markdown and HTML interleaved (and, with
    `against`, the earlier commit interleaved with this tree)."""
    sys.path.insert(0, str(ROOT / "benchmarks"))
    from bench_startup import BASE_ENV, LAUNCH  # the same launcher and environment as the start-up benchmark

    from ivdossier.workflows.demo import INSTRUMENTS, build_demo, ticking_clock

    with tempfile.TemporaryDirectory(prefix="ivd-dossier-") as tmp:
        demo = Path(tmp) / "demo"
        build_demo(demo, clock=ticking_clock())
        db = str(demo / "ivdossier.sqlite")
        trees = {"this tree": str(ROOT)}
        if against:
            old = Path(tmp) / "against"
            old.mkdir()
            archive = subprocess.run(
                ["git", "-C", str(ROOT), "archive", against], capture_output=True, check=True
            ).stdout
            subprocess.run(["tar", "-x", "-C", str(old)], input=archive, check=True)
            trees = {against: str(old), **trees}
        launcher = LAUNCH.format(root=str(ROOT))
        cases = [(spec["slug"], suffix) for spec in INSTRUMENTS for suffix in (".md", ".html")]

        def argv(tree: str, slug: str, suffix: str) -> list[str]:
            out = Path(tmp) / f"{slug}{suffix}"
            return [sys.executable, "-c", launcher, tree, "--db", db, "dossier", slug, "--out", str(out)]

        samples: dict[tuple[str, str, str], list[tuple[float, float]]] = {}
        for slug, suffix in cases:  # bytecode caches of every tree, untimed
            for tree in trees.values():
                _one(argv(tree, slug, suffix), BASE_ENV)
        cpu_before = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpu_total = cpu_before.ru_utime + cpu_before.ru_stime
        for _ in range(repeat):
            for slug, suffix in cases:
                for name, tree in trees.items():
                    wall, cpu_now = _one(argv(tree, slug, suffix), BASE_ENV)
                    samples.setdefault((slug, suffix, name), []).append((wall, cpu_now - cpu_total))
                    cpu_total = cpu_now
        print(
            f"whole process, median of {repeat} (wall and CPU s), bytecode cache on, "
            f"load average {os.getloadavg()[0]:.1f} at the end"
        )
        for slug, suffix in cases:
            cells = []
            for name in trees:
                values = samples[(slug, suffix, name)]
                wall = statistics.median(v[0] for v in values)
                cpu = statistics.median(v[1] for v in values)
                cells.append((name, wall, cpu))
            text = "  ".join(f"{name}: wall {wall:5.2f} CPU {cpu:5.2f}" for name, wall, cpu in cells)
            wall_now = cells[-1][1]
            flag = "within" if wall_now < WHOLE_PROCESS_TARGET else "OVER"
            ratio = f"  CPU ratio {cells[-1][2] / cells[0][2]:.2f}" if len(cells) == 2 else ""
            print(
                f"dossier {slug:18s} {suffix:5s} {text}{ratio}  ({flag} the {WHOLE_PROCESS_TARGET:.0f} s target)"
            )


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--big", action="store_true", help="Also time the large synthetic record in-process.")
    parser.add_argument("--against", metavar="REF", help="Also run an earlier commit, interleaved.")
    args = parser.parse_args()
    whole_process(args.repeat, args.against)
    if args.big:
        big(args.repeat)


def big(repeat: int) -> None:
    inp = big_input()
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
