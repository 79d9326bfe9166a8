"""Crash safety: kill -9 export, import, backup, restore and site builds at random moments and count how many
left a partial state.

Each trial forks a child (after every module is imported, so the kill lands in the operation, not in start-up)
that runs one operation; the parent sends SIGKILL after a random delay drawn uniformly over the operation's
measured duration, then inspects what is on disk or in the database:

- export: the folder holds the old export or the new one, byte for byte (and import reads it);
- import: the target registry holds what it held before or everything imported (entity and audit counts);
- backup: the destination is absent or a complete backup (integrity check, audit-event count);
- restore: the registry holds its old content or the backup's (integrity check, audit-event count);
- site: the folder holds the old site or the new one, byte for byte.

It also counts leftovers (hidden staging files or folders next to the target) and whether the next,
uninterrupted run succeeds without anyone cleaning up by hand ("blocked"). Targets: partial 0, blocked 0.

Run: .venv/bin/python benchmarks/bench_crash_safety.py [--kills 50] [--backend sqlite|postgresql|both]
     [--only export import backup restore site] [--seed 1]
POSIX only (fork and SIGKILL).
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import os
import random
import shutil
import signal
import sqlite3
import sys
import tempfile
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # pgserver.py

GENERATED_AT = "2026-01-01T00:00:00+00:00"  # fixed, so two builds of the same registry give the same site


# ---------------------------------------------------------------- running a child and killing it


def run_child(work: Callable[[], None], delay: float | None) -> str:
    """Run `work` in a forked child; kill it after `delay` seconds (None: let it finish).

    Returns "killed" (the kill landed while it ran), "finished" (it completed first) or "failed".
    """
    read_fd, write_fd = os.pipe()
    pid = os.fork()
    if pid == 0:  # child
        os.close(read_fd)
        code = 0
        try:
            os.write(write_fd, b"g")
            work()
        except BaseException:
            traceback.print_exc()
            code = 3
        finally:
            os._exit(code)
    os.close(write_fd)
    os.read(read_fd, 1)  # the child has started the operation
    os.close(read_fd)
    if delay is not None:
        time.sleep(delay)
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)
    _, status = os.waitpid(pid, 0)
    if os.WIFSIGNALED(status):
        return "killed"
    return "finished" if os.WEXITSTATUS(status) == 0 else "failed"


def timed(work: Callable[[], None], reset: Callable[[], None], runs: int = 3) -> float:
    """Shortest wall time of the operation run to completion in a child (after `reset`); the shortest, so that
    on a busy machine the random kills still fall inside the operation rather than after it."""
    times = []
    for _ in range(runs):
        reset()
        start = time.perf_counter()
        assert run_child(work, None) == "finished", "the operation fails even without a kill"
        times.append(time.perf_counter() - start)
    return min(times)


@dataclass
class Tally:
    """Outcome of the kills of one operation on one backend."""

    name: str
    trials: int = 0
    landed: int = 0  # kills that hit the operation while it ran
    partial: int = 0
    leftovers: int = 0
    blocked: int = 0
    notes: list[str] = field(default_factory=list)

    def line(self, seconds: float, duration: float) -> str:
        shown = f"; e.g. {self.notes[0]}" if self.notes else ""
        return (
            f"  {self.name:<22} {self.trials} kills ({self.landed} mid-operation, operation {duration:.2f} s): "
            f"partial state {self.partial}, leftovers {self.leftovers}, next run blocked {self.blocked} "
            f"[{seconds:.0f} s]{shown}"
        )


def trials(
    tally: Tally,
    kills: int,
    rng: random.Random,
    work: Callable[[], None],
    reset: Callable[[], None],
    inspect: Callable[[], tuple[bool, bool, str]],
    recover: Callable[[], bool],
) -> None:
    """`kills` trials: reset, run and kill, then inspect -> (whole, no leftovers, note) and recover -> ok."""
    start = time.perf_counter()
    duration = timed(work, reset)
    for _ in range(kills):
        reset()
        outcome = run_child(work, rng.uniform(0.0, duration * 1.05))
        tally.trials += 1
        tally.landed += outcome == "killed"
        whole, clean, note = inspect()
        if not whole:
            tally.partial += 1
            tally.notes.append(note)
        if not clean:
            tally.leftovers += 1
        if not recover():
            tally.blocked += 1
    print(tally.line(time.perf_counter() - start, duration), flush=True)


# ---------------------------------------------------------------- registries to work on


def build_registry(db: str, programs: int, instruments: int, *, audit_padding: int = 0) -> None:
    """A registry with the built-in catalogue, `programs` x `instruments` candidates, links and ratings."""
    from ivdossier.registry import instruments as reg
    from ivdossier.registry import threats as thr
    from ivdossier.registry.db import open_registry
    from ivdossier.threats_catalog.catalog import load_builtin
    from ivdossier.workflows.catalog_sync import ensure_builtin

    template = load_builtin().threats[0].to_dict()  # team entries in the catalogue's format
    registry = open_registry(db)
    try:
        with registry.writing() as s:
            ensure_builtin(s, actor="bench")
            reg.add_member(s, actor="bench", handle="ana")
            for p in range(programs):
                reg.add_program(s, actor="ana", slug=f"prog{p}", title=f"Program {p}", notes="n" * 200)
                for i in range(instruments):
                    slug = f"p{p}-inst{i}"
                    reg.add_instrument(
                        s, actor="ana", program=f"prog{p}", slug=slug, name=f"Candidate {i}",
                        claims={"exclusion": "Only through the treatment. " * 20},
                    )  # fmt: skip
                    thr.add_team_threat(s, actor="ana", entry={**template, "code": f"T-B{p}-{i}"})
                    link = thr.link_threat(s, actor="ana", instrument=slug, code=f"T-B{p}-{i}")
                    thr.rate_link(s, actor="ana", link=link.slug, likelihood=2, severity=3)
        if audit_padding:
            pad_audit(db, audit_padding)
    finally:
        registry.dispose()


def pad_audit(db: str, rows: int) -> None:
    """Make a SQLite registry bigger (old audit events with long reasons), so copying it takes a while."""
    conn = sqlite3.connect(db)
    try:
        conn.executemany(
            "INSERT INTO audit_event (at, actor, action, entity_kind, entity_uuid, entity_label, reason) "
            "VALUES ('2020-01-01 00:00:00', 'old', 'edit', 'program', ?, 'old', ?)",
            ((f"{i:036d}", "r" * 4000) for i in range(rows)),
        )
        conn.commit()
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    finally:
        conn.close()


def add_one(db: str, slug: str) -> None:
    from ivdossier.registry import instruments as reg
    from ivdossier.registry.db import open_registry

    registry = open_registry(db)
    try:
        with registry.writing() as s:
            reg.add_instrument(s, actor="ana", program="prog0", slug=slug, name="Added later")
    finally:
        registry.dispose()


def tree(root: Path) -> dict[str, bytes] | None:
    if not root.is_dir():
        return None
    return {
        p.relative_to(root).as_posix(): p.read_bytes()
        for p in sorted(root.rglob("*"))
        if p.is_file() and not p.is_symlink()
    }


def siblings(target: Path) -> list[str]:
    """Hidden entries beside `target` that belong to it (staging folders, partial copies)."""
    return sorted(p.name for p in target.parent.iterdir() if p.name.startswith(f".{target.name}"))


def counts(db: str) -> tuple[int, ...]:
    from sqlalchemy import func, select

    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import ENTITY_CLASSES, AuditEvent

    registry = open_registry(db)
    try:
        with registry.reading() as s:
            return tuple(
                int(s.scalars(select(func.count()).select_from(cls)).one())
                for cls in (*ENTITY_CLASSES, AuditEvent)
            )
    finally:
        registry.dispose()


# ---------------------------------------------------------------- the five operations


def bench_export(name: str, db: str, work_dir: Path, kills: int, rng: random.Random) -> None:
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.portability import export_registry, read_export

    folder = work_dir / "export"

    def export() -> None:
        registry = open_registry(db)
        try:
            with registry.reading() as s:
                export_registry(s, folder)
        finally:
            registry.dispose()

    export()
    old = tree(folder)
    add_one(db, "export-new")
    export()
    new = tree(folder)
    assert old is not None and new is not None and old != new

    def reset() -> None:
        shutil.rmtree(folder, ignore_errors=True)
        for leftover in siblings(folder):
            shutil.rmtree(folder.parent / leftover, ignore_errors=True)
        folder.mkdir()
        for rel, data in (old or {}).items():
            (folder / rel).parent.mkdir(parents=True, exist_ok=True)
            (folder / rel).write_bytes(data)

    def inspect() -> tuple[bool, bool, str]:
        found = tree(folder)
        whole = found in (old, new)
        if whole:
            read_export(folder)
        note = "" if whole else f"{len(set(found or {}) ^ set(new))} files differ from both versions"
        return whole, not siblings(folder), note

    def recover() -> bool:
        try:
            export()
        except Exception:
            return False
        return tree(folder) == new and not siblings(folder)

    trials(Tally(f"export ({name})"), kills, rng, export, reset, inspect, recover)


def bench_import(
    name: str, source_db: str, make_target: Callable[[], str], kills: int, rng: random.Random
) -> None:
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.portability import export_registry, read_export
    from ivdossier.workflows.import_checks import import_checked

    folder = Path(tempfile.mkdtemp(prefix="ivd-crash-import-")) / "export"
    registry = open_registry(source_db)
    with registry.reading() as s:
        export_registry(s, folder)
    registry.dispose()
    content = read_export(folder)
    state = {"db": make_target()}
    before = counts(state["db"])

    def do_import() -> None:
        target = open_registry(state["db"])
        try:
            with target.writing() as s:
                import_checked(s, content, actor="bench", on_conflict="stop")
        finally:
            target.dispose()

    do_import()
    after = counts(state["db"])
    assert after != before

    def reset() -> None:
        state["db"] = make_target()

    def inspect() -> tuple[bool, bool, str]:
        now = counts(state["db"])
        whole = now in (before, after)
        return whole, True, "" if whole else f"counts {now} are neither {before} nor {after}"

    def recover() -> bool:
        try:
            do_import()
        except Exception:
            return False
        return counts(state["db"]) == after

    trials(Tally(f"import ({name})"), kills, rng, do_import, reset, inspect, recover)


def bench_backup(db: str, work_dir: Path, kills: int, rng: random.Random) -> None:
    from ivdossier.registry.backup import _inspect, backup_registry

    dest = work_dir / "copy.sqlite"
    expected = _inspect(Path(db))

    def backup() -> None:
        backup_registry(db, dest, replace=True)

    def reset() -> None:
        dest.unlink(missing_ok=True)

    def inspect() -> tuple[bool, bool, str]:
        if not dest.exists():
            return True, not siblings(dest), ""
        try:
            whole = _inspect(dest) == expected
        except Exception as exc:
            return False, not siblings(dest), str(exc)[:80]
        return whole, not siblings(dest), "" if whole else "backup holds another state"

    def recover() -> bool:
        try:
            backup()
        except Exception:
            return False
        return _inspect(dest) == expected and not siblings(dest)

    trials(Tally("backup (sqlite)"), kills, rng, backup, reset, inspect, recover)


def bench_restore(work_dir: Path, backup_file: Path, kills: int, rng: random.Random) -> None:
    from ivdossier.registry.backup import _inspect, restore_registry

    live = work_dir / "live.sqlite"
    base = work_dir / "live-base.sqlite"
    build_registry(str(base), 1, 3)
    old = _inspect(base)
    new = _inspect(backup_file)

    def restore() -> None:
        restore_registry(backup_file, str(live), replace=True)

    def reset() -> None:
        for p in [live, *(live.parent / n for n in siblings(live))]:
            p.unlink(missing_ok=True)
        shutil.copy(base, live)

    def inspect() -> tuple[bool, bool, str]:
        try:
            found = _inspect(live)
        except Exception as exc:
            return False, True, str(exc)[:80]
        whole = found in (old, new)
        leftovers = [n for n in siblings(live) if not n.endswith(("-wal", "-shm"))]
        return whole, not [n for n in leftovers if ".restore" in n], "" if whole else f"{found}"

    def recover() -> bool:
        try:
            restore()
        except Exception:
            return False
        return _inspect(live) == new and not [n for n in siblings(live) if ".restore" in n]

    trials(Tally("restore (sqlite)"), kills, rng, restore, reset, inspect, recover)


def bench_site(name: str, db: str, work_dir: Path, kills: int, rng: random.Random) -> None:
    from ivdossier.registry.db import open_registry
    from ivdossier.workflows.dossiers import write_site

    out = work_dir / "site"

    def build() -> None:
        registry = open_registry(db)
        try:
            with registry.reading() as s:
                write_site(s, out, generated_at=GENERATED_AT)
        finally:
            registry.dispose()

    build()
    old = tree(out)
    add_one(db, "site-new")
    build()
    new = tree(out)
    assert old is not None and new is not None and old != new

    def reset() -> None:
        shutil.rmtree(out, ignore_errors=True)
        for leftover in siblings(out):
            shutil.rmtree(out.parent / leftover, ignore_errors=True)
        out.mkdir()
        for rel, data in (old or {}).items():
            (out / rel).parent.mkdir(parents=True, exist_ok=True)
            (out / rel).write_bytes(data)

    def inspect() -> tuple[bool, bool, str]:
        found = tree(out)
        whole = found in (old, new)
        return whole, not siblings(out), "" if whole else "a mixture of two sites"

    def recover() -> bool:
        try:
            build()
        except Exception:
            return False
        return tree(out) == new and not siblings(out)

    trials(Tally(f"site ({name})"), kills, rng, build, reset, inspect, recover)


# ---------------------------------------------------------------- main


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--kills", type=int, default=50)
    parser.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    parser.add_argument(
        "--only", nargs="+", default=["export", "import", "backup", "restore", "site"],
        choices=("export", "import", "backup", "restore", "site"),
    )  # fmt: skip
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    rng = random.Random(args.seed)
    import ivdossier.registry.backup
    import ivdossier.registry.portability
    import ivdossier.workflows.dossiers
    import ivdossier.workflows.import_checks  # noqa: F401
    from ivdossier.registry.db import open_registry

    backends: list[tuple[str, Callable[[], str], Any]] = []
    server: Any = None
    tmp = Path(tempfile.mkdtemp(prefix="ivd-crash-"))
    counter = iter(range(100_000))
    if args.backend in ("sqlite", "both"):
        backends.append(("sqlite", lambda: str(tmp / f"r{next(counter)}.sqlite"), None))
    if args.backend in ("postgresql", "both"):
        from pgserver import find_pg_bin, start_server

        if find_pg_bin() is None:
            print("[postgresql] skipped: server binaries not installed (Debian package postgresql)")
        else:
            server = start_server()
            backends.append(("postgresql", server.create_database, server))
    print(f"crash safety: {args.kills} kills per operation and backend (seed {args.seed})", flush=True)
    try:
        for name, make_db, _ in backends:
            work = tmp / name
            work.mkdir()
            source = make_db()
            build_registry(source, 2, 25)
            if "export" in args.only:
                bench_export(name, source, work, args.kills, rng)
            if "import" in args.only:
                empty = make_db()  # schema only: the export brings the catalogue and the members along
                open_registry(empty).dispose()
                if name == "sqlite":

                    def fresh_sqlite(template: str = empty) -> str:
                        path = str(tmp / f"t{next(counter)}.sqlite")
                        shutil.copy(template, path)
                        return path

                    bench_import(name, source, fresh_sqlite, args.kills, rng)
                else:
                    bench_import(name, source, functools.partial(fresh_pg, server, empty), args.kills, rng)
            if "site" in args.only:
                site_db = make_db()
                build_registry(site_db, 2, 8)
                bench_site(name, site_db, work, args.kills, rng)
            if name == "sqlite" and ("backup" in args.only or "restore" in args.only):
                big = str(tmp / "big.sqlite")
                build_registry(big, 1, 5, audit_padding=25_000)
                if "backup" in args.only:
                    bench_backup(big, work, args.kills, rng)
                if "restore" in args.only:
                    from ivdossier.registry.backup import backup_registry

                    backup_registry(big, work / "big-backup.sqlite", replace=True)
                    bench_restore(work, work / "big-backup.sqlite", args.kills, rng)
    finally:
        if server is not None:
            server.stop()
        shutil.rmtree(tmp, ignore_errors=True)


def fresh_pg(server: Any, template_url: str) -> str:
    """A new PostgreSQL database copied from an initialised, empty registry (CREATE DATABASE ... TEMPLATE)."""
    import uuid

    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    template = make_url(template_url).database
    name = "c_" + uuid.uuid4().hex[:12]
    engine = create_engine(server.url("postgres"), isolation_level="AUTOCOMMIT")
    try:
        with engine.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}" TEMPLATE "{template}"'))
    finally:
        engine.dispose()
    return server.url(name)  # type: ignore[no-any-return]


if __name__ == "__main__":
    main()
