"""What one registry listing costs, whole process, with each data layer the start-up target could be met with.

The listing is `program list` on the demo registry (SQLite): programs with their number of candidates, printed
through the CLI's own table printer after importing the CLI's app module (typer), so only the data layer differs:

- `python only`: an interpreter that starts and exits (the floor of any command);
- `stdlib sqlite3`: the query through Python's sqlite3 module (what an own, lighter model layer would cost at best);
- `SQLAlchemy Core`: the query through SQLAlchemy Core tables (no ORM; two tables declared here, so this is
  a lower bound: the registry has 20);
- `SQLAlchemy ORM`: the query through the registry's models (what the command does today);
- `ivdossier program list`: the command itself.

Each variant runs in a fresh process with the bytecode cache on; variants take turns (A B C A B C) and the
median wall and CPU time of --repeat runs is printed, beside the 0.3 s target. The four scripts print the same
table as the command (checked before timing), so every variant does the same work.

Run: .venv/bin/python benchmarks/bench_data_layer.py [--repeat 9]
"""

from __future__ import annotations

import argparse
import collections
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

BIN = Path(sys.executable).parent
ENV = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
TARGET = 0.3

_PRINT = (
    "from ivdossier.cli import app\n"
    "from ivdossier.cli.output import print_table\n"
    "print_table(rows, ['slug', 'title', 'treatment', 'outcome', 'instruments'], widths={'title': 50})\n"
)
SQLITE3 = (
    "import sqlite3, sys\n"
    "con = sqlite3.connect(sys.argv[1])\n"
    "counts = dict(con.execute('SELECT program_id, count(*) FROM instrument GROUP BY program_id'))\n"
    "rows = [dict(slug=s, title=t, treatment=tr, outcome=o, instruments=counts.get(i, 0)) for i, s, t, tr, o in\n"
    "        con.execute('SELECT id, slug, title, treatment, outcome FROM program ORDER BY slug')]\n"
    "con.close()\n" + _PRINT
)
CORE = (
    "import sys\n"
    "from sqlalchemy import Column, MetaData, String, Table, create_engine, func, select\n"
    "meta = MetaData()\n"
    "program = Table('program', meta, *(Column(c, String) for c in ('id', 'slug', 'title', 'treatment', 'outcome')))\n"
    "instrument = Table('instrument', meta, Column('id', String), Column('program_id', String))\n"
    "engine = create_engine('sqlite:///' + sys.argv[1])\n"
    "with engine.connect() as con:\n"
    "    q = select(instrument.c.program_id, func.count()).group_by(instrument.c.program_id)\n"
    "    counts = dict(con.execute(q).all())\n"
    "    rows = [dict(r._mapping, instruments=counts.get(r.id, 0)) for r in\n"
    "            con.execute(select(program).order_by(program.c.slug))]\n"
    "engine.dispose()\n" + _PRINT
)
ORM = (
    "import sys\n"
    "from sqlalchemy import create_engine, func, select\n"
    "from sqlalchemy.orm import Session\n"
    "from ivdossier.registry.models import Instrument, Program\n"
    "engine = create_engine('sqlite:///' + sys.argv[1])\n"
    "with Session(engine) as s:\n"
    "    q = select(Instrument.program_id, func.count()).group_by(Instrument.program_id)\n"
    "    counts = dict(s.execute(q).all())\n"
    "    rows = [dict(slug=p.slug, title=p.title, treatment=p.treatment, outcome=p.outcome,\n"
    "                 instruments=counts.get(p.id, 0)) for p in s.scalars(select(Program).order_by(Program.slug))]\n"
    "engine.dispose()\n" + _PRINT
)


def variants(db: Path) -> dict[str, list[str]]:
    python = str(BIN / "python")
    return {
        "python only": [python, "-c", "pass"],
        "stdlib sqlite3": [python, "-c", SQLITE3, str(db)],
        "SQLAlchemy Core": [python, "-c", CORE, str(db)],
        "SQLAlchemy ORM + models": [python, "-c", ORM, str(db)],
        "ivdossier program list": [str(BIN / "ivdossier"), "--db", str(db), "program", "list"],
    }


def timed(argv: list[str]) -> tuple[float, float]:
    start = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=ENV)
    _, status, usage = os.wait4(proc.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        sys.exit(f"failed: {argv[:2]}")
    return time.perf_counter() - start, usage.ru_utime + usage.ru_stime


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--repeat", type=int, default=9)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        demo = Path(tmp) / "demo"
        subprocess.run([str(BIN / "ivdossier"), "demo", "--out", str(demo)], check=True, capture_output=True)
        runs = variants(demo / "ivdossier.sqlite")
        outputs = {
            label: subprocess.run(argv, capture_output=True, text=True, env=ENV, check=True).stdout
            for label, argv in runs.items()
            if label != "python only"
        }
        if len(set(outputs.values())) != 1:
            sys.exit("the variants print different tables; fix the scripts before timing them")
        walls: dict[str, list[float]] = collections.defaultdict(list)
        cpus: dict[str, list[float]] = collections.defaultdict(list)
        for _ in range(args.repeat):
            for label, argv in runs.items():
                wall, cpu = timed(argv)
                walls[label].append(wall)
                cpus[label].append(cpu)
    print(f"median of {args.repeat}, interleaved; load average {os.getloadavg()[0]:.1f} at the end")
    print(f"  {'variant':26s} {'wall':>8s} {'CPU':>8s}  target {TARGET} s")
    for label in runs:
        wall, cpu = statistics.median(walls[label]), statistics.median(cpus[label])
        print(f"  {label:26s} {wall:7.3f}s {cpu:7.3f}s  {'ok' if wall < TARGET else 'OVER'}")


if __name__ == "__main__":
    main()
