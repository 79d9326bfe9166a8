"""Start-up and response time of registry commands: whole process, as a person runs them from the shell.

Every registry listing and show, a few writes that compute nothing, `--help` and `estimate` on the demo data,
on the demo registry and on the registry the scale benchmark builds (10,000 instruments, 200,000 links), on
SQLite and on a throw-away PostgreSQL server (Debian's postgresql package; skipped with a note without it).
Each command runs `.venv/bin/ivdossier` in a fresh process; the commands take turns (round robin, A B C A B C)
so a change in the machine's load falls on all of them alike. Printed per command: median wall time and median
CPU time (user + system of the process, less sensitive to other work on the machine) of --repeat runs, whether
it meets its target (0.3 s; `estimate` 1.5 s) and the heavy modules it imported (one extra, untimed run).
`--imports` adds the import cost of each command group by package (python -X importtime, self times summed).
Commands run with Python's bytecode cache on (PYTHONDONTWRITEBYTECODE removed), as in an ordinary install.

`--against REF` instead compares this tree with an earlier commit on the demo registry (SQLite): both run through
the same launcher (the editable install pointed at a `git archive` copy of REF, or at this tree), interleaved
A B A B, and the medians and their ratio are printed; the machine's load then affects both alike.

Run: .venv/bin/python benchmarks/bench_startup.py [--registry demo|scale|both] [--backend sqlite|postgresql|both]
     [--repeat N] [--instruments N] [--imports] [--against REF]
"""

from __future__ import annotations

import argparse
import collections
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # pgserver.py
sys.path.insert(0, str(ROOT / "benchmarks"))  # bench_registry_scale.load

TARGET = 0.3
ESTIMATE_TARGET = 1.5
HEAVY = (
    "numpy",
    "pandas",
    "scipy",
    "statsmodels",
    "matplotlib",
    "networkx",
    "sqlalchemy.dialects.postgresql",
)
BIN = Path(sys.executable).parent
BASE_ENV = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
IVDOSSIER = (
    [str(BIN / "ivdossier")] if (BIN / "ivdossier").exists() else [sys.executable, "-m", "ivdossier.cli"]
)
PROBE = (
    "import sys\nsys.argv = {argv!r}\nfrom ivdossier.cli.app import main\n"
    "try:\n    main()\nexcept SystemExit:\n    pass\n"
    "print('HEAVY=' + ','.join(m for m in {heavy!r} if m in sys.modules), file=sys.stderr)"
)


def demo_commands(data: Path) -> dict[str, list[str]]:
    estimate = ["estimate", "--data", str(data / "telehealth.csv"), "--outcome", "ed_visits"]
    estimate += ["--treatment", "telehealth", "--instrument", "fibre_months", "--control", "age"]
    estimate += ["--control", "chronic_conditions", "--cluster", "district", "--vcov", "cluster"]
    return {
        "--help": ["--help"],
        "instrument --help": ["instrument", "--help"],
        "program list": ["program", "list"],
        "program show": ["program", "show", "telehealth-ed"],
        "instrument list": ["instrument", "list"],
        "instrument list --json": ["instrument", "list", "--json"],
        "instrument show": ["instrument", "show", "fibre-wave"],
        "member list": ["member", "list"],
        "member show": ["member", "show", "amara"],
        "link list": ["link", "list", "fibre-wave"],
        "link show": ["link", "show", "fibre-wave--an-e01"],
        "comment list": ["comment", "list", "fibre-wave"],
        "threat list": ["threat", "list"],
        "threat show": ["threat", "show", "AN-E01"],
        "family list": ["family", "list"],
        "study list": ["study", "list"],
        "study show": ["study", "show", "ferreira2024fibre"],
        "plan list": ["plan", "list"],
        "run list": ["run", "list"],
        "run show": ["run", "show", "fibre-wave-estimate-3"],
        "history": ["history", "fibre-wave"],
        "review": ["review", "fibre-wave"],
        "write: comment add": ["comment", "add", "fibre-wave", "benchmark note"],
        "write: instrument edit": ["instrument", "edit", "fibre-wave", "--description", "benchmark edit"],
        "write: run primary": ["run", "primary", "fibre-wave-estimate-3"],
        "estimate (demo data)": estimate,
    }


def scale_commands() -> dict[str, list[str]]:
    return {
        "program list --json": ["program", "list", "--json"],
        "instrument list --json (all)": ["instrument", "list", "--json"],
        "instrument list --program p3": ["instrument", "list", "--program", "p3"],
        "instrument show": ["instrument", "show", "z00042"],
        "link list": ["link", "list", "z00042"],
        "member list": ["member", "list"],
        "member show (unrated links)": ["member", "show", "cai"],
        "threat list": ["threat", "list"],
        "family list": ["family", "list"],
        "run list": ["run", "list"],
        "review": ["review", "z00042"],
        "history": ["history", "z00042"],
        "comment list": ["comment", "list", "z00042"],
        "write: comment add": ["comment", "add", "z00042", "benchmark note"],
        "write: instrument edit": ["instrument", "edit", "z00042", "--description", "benchmark edit"],
    }


def timed(argv: list[str], env: dict[str, str]) -> tuple[float, float, int]:
    """Wall and CPU seconds of one whole `ivdossier` process, and its exit code."""
    start = time.perf_counter()
    proc = subprocess.Popen(
        [*IVDOSSIER, *argv], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env
    )
    _, status, usage = os.wait4(proc.pid, 0)
    return time.perf_counter() - start, usage.ru_utime + usage.ru_stime, os.waitstatus_to_exitcode(status)


def heavy_modules(argv: list[str], env: dict[str, str]) -> str:
    code = PROBE.format(argv=["ivdossier", *argv], heavy=HEAVY)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    return next((x[6:] for x in done.stderr.splitlines() if x.startswith("HEAVY=")), "?") or "none"


def bench(title: str, db: str, commands: dict[str, list[str]], actor: str, repeat: int) -> None:
    env = {**BASE_ENV, "IVDOSSIER_DB": db, "IVDOSSIER_USER": actor}
    walls: dict[str, list[float]] = collections.defaultdict(list)
    cpus: dict[str, list[float]] = collections.defaultdict(list)
    codes: dict[str, int] = {}
    for argv in commands.values():  # warm the file cache and the bytecode once, untimed
        timed(argv, env)
    for _ in range(repeat):
        for label, argv in commands.items():
            wall, cpu, code = timed(argv, env)
            walls[label].append(wall)
            cpus[label].append(cpu)
            codes[label] = code
    print(f"\n[{title}] median of {repeat}, load average {os.getloadavg()[0]:.1f} at the end")
    print(f"  {'command':34s} {'wall':>8s} {'CPU':>8s}  target  heavy modules")
    for label, argv in commands.items():
        target = ESTIMATE_TARGET if label.startswith("estimate") else TARGET
        wall, cpu = statistics.median(walls[label]), statistics.median(cpus[label])
        verdict = ("ok" if wall < target else "OVER") + (
            "" if codes[label] == 0 else f" (exit {codes[label]})"
        )
        print(f"  {label:34s} {wall:7.3f}s {cpu:7.3f}s  {verdict:6s}  {heavy_modules(argv, env)}")


def import_table(db: str, actor: str) -> None:
    """Import cost (self time, ms) of each command group, by package, from python -X importtime."""
    groups = {
        "--help": ["--help"],
        "program/instrument/member/link": ["program", "list"],
        "run list/show": ["run", "list"],
        "threat/family": ["threat", "list"],
        "study": ["study", "list"],
        "plan": ["plan", "list"],
        "history/review/comment": ["history", "fibre-wave"],
        "graph show": ["graph", "show", "telehealth-ed"],
        "estimate": demo_commands(Path(db).parent / "data")["estimate (demo data)"],
    }
    buckets = ("sqlalchemy", "pydantic", "sqlmodel", "typer/click/rich", "ivdossier", "numerics", "other")
    print(f"\n[import cost by command group, ms of import self time, one run each]\n  {'group':32s}", end="")
    print("".join(f"{b:>17s}" for b in buckets) + f"{'total':>9s}")
    env = {**BASE_ENV, "IVDOSSIER_DB": db, "IVDOSSIER_USER": actor}
    for label, argv in groups.items():
        done = subprocess.run(
            [sys.executable, "-X", "importtime", "-m", "ivdossier.cli", *argv],
            capture_output=True,
            text=True,
            env=env,
        )
        cost: dict[str, float] = collections.Counter()
        for line in done.stderr.splitlines():
            if not line.startswith("import time:") or "imported package" in line:
                continue
            self_us, _, name = line[len("import time:") :].split("|")
            cost[_bucket(name.strip())] += int(self_us) / 1000
        print(f"  {label:32s}" + "".join(f"{cost[b]:17.0f}" for b in buckets) + f"{sum(cost.values()):9.0f}")


def _bucket(module: str) -> str:
    top = module.split(".")[0]
    if top in ("sqlalchemy", "sqlmodel", "ivdossier"):
        return top
    if top in ("pydantic", "pydantic_core", "annotated_types", "typing_inspection"):
        return "pydantic"
    if top in ("typer", "click", "rich", "shellingham", "pygments"):
        return "typer/click/rich"
    if top in (
        "numpy",
        "pandas",
        "scipy",
        "statsmodels",
        "matplotlib",
        "networkx",
        "pyarrow",
        "linearmodels",
    ):
        return "numerics"
    return "other"


# One command per command group, and those that changed most (the A/B runs each twice, so it takes a subset).
AB_COMMANDS = (
    "--help",
    "program list",
    "instrument list --json",
    "instrument show",
    "threat list",
    "family list",
    "study list",
    "run list",
    "run show",
    "history",
    "review",
    "write: comment add",
    "estimate (demo data)",
)
LAUNCH = (
    "import sys\nimport __editable___ivdossier_0_1_0_finder as finder\n"
    "tree = sys.argv.pop(1)\n"
    "finder.MAPPING.update({{k: tree + v[len({root!r}):] for k, v in finder.MAPPING.items() if v.startswith({root!r})}})\n"
    "from ivdossier.cli.app import main\nmain()\n"
)


def compare(ref: str, db: str, commands: dict[str, list[str]], repeat: int, tmp: Path) -> None:
    """Interleaved A/B of every command: REF (a `git archive` copy) against this tree, same launcher."""
    old = tmp / "against"
    old.mkdir()
    archive = subprocess.run(["git", "-C", str(ROOT), "archive", ref], capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(old)], input=archive, check=True)
    launcher = LAUNCH.format(root=str(ROOT))
    env = {**BASE_ENV, "IVDOSSIER_DB": db, "IVDOSSIER_USER": "amara"}
    trees = {"A " + ref: str(old), "B this tree": str(ROOT)}
    samples: dict[tuple[str, str], list[tuple[float, float]]] = collections.defaultdict(list)

    def one(tree: str, argv: list[str]) -> tuple[float, float]:
        start = time.perf_counter()
        proc = subprocess.Popen(
            [sys.executable, "-c", launcher, tree, *argv],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            env=env,
        )
        _, _, usage = os.wait4(proc.pid, 0)
        return time.perf_counter() - start, usage.ru_utime + usage.ru_stime

    for argv in commands.values():  # bytecode caches of both trees, untimed
        for tree in trees.values():
            one(tree, argv)
    for _ in range(repeat):
        for label, argv in commands.items():
            for name, tree in trees.items():
                samples[(label, name)].append(one(tree, argv))
    print(f"\n[A/B on the demo registry, sqlite: median of {repeat}, load average {os.getloadavg()[0]:.1f}]")
    print(f"  {'command':34s} {'A wall':>8s} {'B wall':>8s} {'A CPU':>8s} {'B CPU':>8s}  B/A CPU")
    a_name, b_name = trees
    for label in commands:
        a, b = samples[(label, a_name)], samples[(label, b_name)]
        aw, bw = statistics.median(x[0] for x in a), statistics.median(x[0] for x in b)
        ac, bc = statistics.median(x[1] for x in a), statistics.median(x[1] for x in b)
        print(f"  {label:34s} {aw:7.3f}s {bw:7.3f}s {ac:7.3f}s {bc:7.3f}s  {bc / ac:6.2f}")


def build_demo(folder: Path) -> Path:
    done = subprocess.run([*IVDOSSIER, "demo", "--out", str(folder)], capture_output=True, text=True)
    if done.returncode != 0:
        sys.exit(f"the demo failed: {done.stderr[-2000:]}")
    return folder / "ivdossier.sqlite"


def copy_registry(source: str, target: str, tmp: Path) -> None:
    """Move a registry to another database through export, init and import (the tool's own path)."""
    folder = tmp / f"export-{time.monotonic_ns()}"
    steps = (
        ["--db", source, "export", str(folder)],
        ["--db", target, "init"],
        ["--db", target, "import", str(folder)],
    )
    for argv in steps:
        done = subprocess.run(
            [*IVDOSSIER, *argv], capture_output=True, text=True, env={**BASE_ENV, "IVDOSSIER_USER": "amara"}
        )
        if done.returncode != 0:
            sys.exit(f"{' '.join(argv[2:])} failed: {done.stderr[-2000:]}")
    shutil.rmtree(folder, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--registry", choices=("demo", "scale", "both"), default="both")
    parser.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--instruments", type=int, default=10_000)
    parser.add_argument("--imports", action="store_true", help="Also print the import cost by command group.")
    parser.add_argument(
        "--against", metavar="REF", help="Compare with an earlier commit (demo registry, SQLite)."
    )
    args = parser.parse_args()
    baseline = statistics.median(timed(["--version"], dict(BASE_ENV))[0] for _ in range(5))
    interpreter = statistics.median(_python_pass() for _ in range(5))
    print(
        f"python -c pass: {interpreter:.3f} s; ivdossier --version: {baseline:.3f} s (interpreter and typer)"
    )
    server = None
    with tempfile.TemporaryDirectory(prefix="ivd-startup-") as name:
        tmp = Path(name)
        if args.against:
            compare(
                args.against,
                str(build_demo(tmp / "demo")),
                {k: v for k, v in demo_commands(tmp / "demo" / "data").items() if k in AB_COMMANDS},
                args.repeat,
                tmp,
            )
            return
        backends = ["sqlite", "postgresql"] if args.backend == "both" else [args.backend]
        if "postgresql" in backends:
            from pgserver import find_pg_bin, start_server

            if find_pg_bin() is None:
                print("[postgresql] skipped: server binaries not installed (Debian package postgresql)")
                backends.remove("postgresql")
            else:
                server = start_server()
        try:
            if args.registry in ("demo", "both"):
                demo_db = build_demo(tmp / "demo")
                commands = demo_commands(tmp / "demo" / "data")
                if args.imports:
                    import_table(str(demo_db), "amara")
                for backend in backends:
                    db = str(demo_db)
                    if backend == "postgresql":
                        db = server.create_database()  # type: ignore[union-attr]
                        copy_registry(str(demo_db), db, tmp)
                    bench(f"demo registry, {backend}", db, commands, "amara", args.repeat)
            if args.registry in ("scale", "both"):
                from bench_registry_scale import load

                for backend in backends:
                    db = str(tmp / "scale.sqlite") if backend == "sqlite" else server.create_database()  # type: ignore[union-attr]
                    start = time.perf_counter()
                    load(db, instruments=args.instruments, threats=500, links_per_instrument=20)
                    print(
                        f"\nloaded {args.instruments} instruments on {backend} in {time.perf_counter() - start:.0f} s"
                    )
                    bench(
                        f"{args.instruments:,} instruments, {backend}",
                        db,
                        scale_commands(),
                        "cai",
                        args.repeat,
                    )
        finally:
            if server is not None:
                server.stop()


def _python_pass() -> float:
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", "pass"], check=True)
    return time.perf_counter() - start


if __name__ == "__main__":
    main()
