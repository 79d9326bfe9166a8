"""Registry at scale: 10,000 instruments, 500 threats, 200,000 links; listings (target < 0.5 s), a dossier
(target < 2 s) and the static site for 1,000 instruments, on SQLite and on a throw-away PostgreSQL server.

Run: .venv/bin/python benchmarks/bench_registry_scale.py [--backend sqlite|postgresql|both] [--repeat N]
     [--instruments N] [--threats N] [--links-per-instrument N] [--site-instruments N]

The rows are bulk-inserted with SQLAlchemy Core (one audit event per entity, as audited creates would write),
because going through the audited write path 200,000 times would time the loader, not the reads. Every
listing is timed through the command line in-process (open the registry, query, render JSON), best of N.
PostgreSQL needs Debian's postgresql package (tests/pgserver.py starts the server in a temporary folder).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from sqlalchemy import insert

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # pgserver.py

LISTING_TARGET = 0.5
DOSSIER_TARGET = 2.0
FAMILIES = (
    "weather-shock",
    "distance-geography",
    "provider-preference",
    "lottery-encouragement",
    "eligibility-threshold",
)
MEMBERS = ("ana", "ben", "cai", "dan", "eve")
CHUNK = 5_000


def _stamp(i: int) -> datetime:
    return datetime(2026, 1, 1, tzinfo=UTC) + timedelta(microseconds=i)


def _entity(i: int, **values: Any) -> dict[str, Any]:
    return {
        "uuid": str(uuid.UUID(int=i + 1)),
        "created_at": _stamp(i),
        "updated_at": _stamp(i),
        "version": 1,
        **values,
    }


def _event(row: dict[str, Any], kind: str, label: str) -> dict[str, Any]:
    return {
        "at": row["created_at"],
        "actor": "loader",
        "action": "create",
        "entity_kind": kind,
        "entity_uuid": row["uuid"],
        "entity_label": label,
        "before": None,
        "after": {"slug": label},
        "reason": "benchmark bulk load",
    }


def load(
    db: str, *, instruments: int, threats: int, links_per_instrument: int, programs: int = 10
) -> dict[str, int]:
    """Bulk-load a registry of the given size; returns the row counts."""
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import AuditEvent, Instrument, Link, Member, Program, Rating, Threat

    registry = open_registry(db)
    serial = iter(range(10**9))
    counts: dict[str, int] = {}

    def put(session: Any, cls: Any, kind: str, rows: list[dict[str, Any]], label: str) -> None:
        table = cls.__table__
        events = AuditEvent.__table__  # type: ignore[attr-defined]
        conn = session.connection()
        for start in range(0, len(rows), CHUNK):
            chunk = rows[start : start + CHUNK]
            conn.execute(insert(table), chunk)
            conn.execute(insert(events), [_event(r, kind, r[label]) for r in chunk])
        counts[kind] = len(rows)

    with registry.writing() as s:
        put(
            s,
            Member,
            "member",
            [_entity(next(serial), handle=h, name=h.title(), email="") for h in MEMBERS],
            "handle",
        )
        put(
            s,
            Program,
            "program",
            [
                _entity(next(serial), slug=f"p{p}", title=f"Program {p}", question="Does X reduce Y?")
                for p in range(programs)
            ],
            "slug",
        )
        # Team threats shaped like the built-in catalogue's entries, so every reader accepts them.
        from ivdossier.threats_catalog import load_builtin

        templates = [e.to_dict() for e in load_builtin().threats]
        put(
            s,
            Threat,
            "threat",
            [
                _entity(
                    next(serial),
                    **{
                        **templates[t % len(templates)],
                        "code": f"T-{t:04d}",
                        "title": f"Threat number {t}",
                        "origin": "team",
                    },
                )
                for t in range(threats)
            ],
            "code",
        )
        put(
            s,
            Instrument,
            "instrument",
            [
                _entity(
                    next(serial),
                    slug=f"z{i:05d}",
                    program_id=i % programs + 1,
                    name=f"Candidate {i}",
                    family=FAMILIES[i % len(FAMILIES)],
                    columns=[f"z{i}"],
                    state="proposed",
                    claim_exclusion="Only through the treatment. " * 5,
                )
                for i in range(instruments)
            ],
            "slug",
        )
        step = max(threats // links_per_instrument, 1)
        links = [
            _entity(
                next(serial),
                slug=f"z{i:05d}--t-{(j * step + i % step) % threats:04d}",
                instrument_id=i + 1,
                threat_id=(j * step + i % step) % threats + 1,
                state="open",
                argument="Rebuttal in progress.",
            )
            for i in range(instruments)
            for j in range(links_per_instrument)
        ]
        put(s, Link, "link", links, "slug")
        rated = min(len(links), 40_000)
        ratings = [
            _entity(
                next(serial),
                slug=f"{links[k]['slug']}--{MEMBERS[m]}",
                link_id=k + 1,
                member_id=m + 1,
                likelihood=(k + m) % 5 + 1,
                severity=(k * 3 + m) % 5 + 1,
            )
            for k in range(rated)
            for m in range(2)
        ]
        put(s, Rating, "rating", ratings, "slug")
    registry.dispose()
    return counts


def best_of(fn: Callable[[], Any], repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def cli_timer(db: str) -> Callable[..., Callable[[], None]]:
    from typer.testing import CliRunner

    from ivdossier.cli.app import app
    from ivdossier.cli.common import settings

    runner = CliRunner()

    def make(*args: str) -> Callable[[], None]:
        def run() -> None:
            settings.db = settings.actor = None
            result = runner.invoke(app, ["--db", db, "--as", "ana", *args])
            if result.exit_code != 0:
                raise RuntimeError(f"{args}: {result.stderr or result.stdout}")

        return run

    return make


def bench_backend(name: str, db: str, site_db: str, args: argparse.Namespace, out: Path) -> None:
    from ivdossier.registry.db import open_registry
    from ivdossier.workflows.dossiers import write_dossier, write_site

    if not args.site_only:
        start = time.perf_counter()
        counts = load(
            db,
            instruments=args.instruments,
            threats=args.threats,
            links_per_instrument=args.links_per_instrument,
        )
        print(f"\n[{name}] loaded {counts} in {time.perf_counter() - start:.1f} s")
        cmd = cli_timer(db)
        listings = {
            "program list --json": cmd("program", "list", "--json"),
            "instrument list --json (all)": cmd("instrument", "list", "--json"),
            "instrument list --program p3": cmd("instrument", "list", "--program", "p3"),
            "instrument list --family weather-shock": cmd("instrument", "list", "--family", "weather-shock"),
            "instrument show z00042": cmd("instrument", "show", "z00042"),
            "link list z00042": cmd("link", "list", "z00042"),
            "member list": cmd("member", "list"),
            "member show cai (unrated links)": cmd("member", "show", "cai"),
            "threat list": cmd("threat", "list"),
            "review z00042": cmd("review", "z00042"),
            "review z00042 --unrated-by cai": cmd("review", "z00042", "--unrated-by", "cai"),
            "history z00042": cmd("history", "z00042"),
            "comment list z00042": cmd("comment", "list", "z00042"),
        }
        for label, fn in listings.items():
            seconds = best_of(fn, args.repeat)
            flag = "ok" if seconds < LISTING_TARGET else f"over the {LISTING_TARGET} s target"
            print(f"  {label:38s} {seconds:7.3f} s  {flag}")
        registry = open_registry(db)
        try:
            with registry.reading() as s:
                seconds = best_of(
                    lambda: write_dossier(s, "z00042", out / f"{name}.html", generated_at="2026-01-01"),
                    args.repeat,
                )
            flag = "ok" if seconds < DOSSIER_TARGET else f"over the {DOSSIER_TARGET} s target"
            print(f"  {'dossier z00042 (HTML)':38s} {seconds:7.3f} s  {flag}")
        finally:
            registry.dispose()
    if args.site_instruments:
        load(
            site_db,
            instruments=args.site_instruments,
            threats=args.threats,
            links_per_instrument=args.links_per_instrument,
        )
        site = open_registry(site_db)
        try:
            with site.reading() as s:
                start = time.perf_counter()
                pages = write_site(s, out / f"site-{name}", generated_at="2026-01-01")
                seconds = time.perf_counter() - start
        finally:
            site.dispose()
        print(f"  site for {args.site_instruments} instruments: {len(pages)} pages in {seconds:.1f} s")


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--instruments", type=int, default=10_000)
    parser.add_argument("--threats", type=int, default=500)
    parser.add_argument("--links-per-instrument", type=int, default=20)
    parser.add_argument("--site-instruments", type=int, default=1_000)
    parser.add_argument(
        "--site-only", action="store_true", help="Skip the large registry; time the site only."
    )
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="ivd-scale-") as tmp:
        out = Path(tmp)
        if args.backend in ("sqlite", "both"):
            bench_backend("sqlite", str(out / "scale.sqlite"), str(out / "site.sqlite"), args, out)
        if args.backend in ("postgresql", "both"):
            from pgserver import find_pg_bin, start_server

            if find_pg_bin() is None:
                print("\n[postgresql] skipped: server binaries not installed (Debian package postgresql)")
                return
            server = start_server()
            try:
                bench_backend("postgresql", server.create_database(), server.create_database(), args, out)
            finally:
                server.stop()


if __name__ == "__main__":
    main()
