"""The site of a whole registry: pages for runs, plans and studies, dossiers identical to those built one at a
time, and a number of database queries that does not grow with the number of instruments."""

from __future__ import annotations

import multiprocessing
import os
import random
import re
import shutil
import sys
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import event, func, select

from ivdossier.registry.db import open_registry
from ivdossier.registry.models import Instrument
from ivdossier.workflows.demo import INSTRUMENTS, PROGRAM, build_demo, ticking_clock

WHEN = "2026-03-02T12:00:00+00:00"


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("site-registry") / "demo"
    build_demo(out, clock=ticking_clock())
    return out


def queries_while(registry: object, work: object) -> int:
    """How many SQL statements the registry's engine executes while `work()` runs."""
    engine = registry.engine  # type: ignore[attr-defined]
    count = 0

    def tick(*_args: object) -> None:
        nonlocal count
        count += 1

    event.listen(engine, "before_cursor_execute", tick)
    try:
        work()  # type: ignore[operator]
    finally:
        event.remove(engine, "before_cursor_execute", tick)
    return count


def test_preloaded_dossiers_are_identical_to_those_read_one_at_a_time(demo_dir: Path) -> None:
    from ivdossier.registry import bulk
    from ivdossier.reports.dossier import dossier_html, dossier_markdown
    from ivdossier.workflows.dossiers import RegistryReader, dossier_input

    registry = open_registry(str(demo_dir / "ivdossier.sqlite"))
    try:
        with registry.reading() as s:
            reader = RegistryReader(s)
            reader.preload(bulk.instruments(s))
            for spec in INSTRUMENTS:
                batch = dossier_input(s, spec["slug"], generated_at=WHEN, reader=reader)
                single = dossier_input(s, spec["slug"], generated_at=WHEN)
                assert dossier_markdown(batch) == dossier_markdown(single)
                assert dossier_html(batch) == dossier_html(single)
    finally:
        registry.dispose()


def test_the_site_has_a_runs_page_listing_every_run_and_a_studies_page(demo_dir: Path) -> None:
    from ivdossier.workflows.dossiers import write_site
    from ivdossier.workflows.run_records import list_runs

    registry = open_registry(str(demo_dir / "ivdossier.sqlite"))
    try:
        with registry.reading() as s:
            write_site(s, demo_dir / "site-test", generated_at=WHEN)
            runs = list_runs(s)
    finally:
        registry.dispose()
    page = (demo_dir / "site-test" / "programs" / PROGRAM / "runs.html").read_text(encoding="utf-8")
    listed = re.findall(r"<tr>\s*<td[^>]*>([a-z0-9-]+)</td>", page)
    assert sorted(listed) == sorted(r.slug for r in runs)
    primary = [r.slug for r in runs if r.primary]
    assert primary and all(
        re.search(rf">{p}</td>\s*<td[^>]*>[^<]+</td>\s*<td[^>]*>[^<]+</td>\s*<td[^>]*>yes<", page)
        for p in primary
    )
    studies = (demo_dir / "site-test" / "studies.html").read_text(encoding="utf-8")
    assert "Literature audit" in studies and "Statistics cannot establish exclusion or exogeneity." in studies


def _grow(db: str, extra: int) -> None:
    """Add `extra` instruments to the demo program, each with three linked threats rated by two members."""
    from ivdossier.registry import instruments as reg
    from ivdossier.registry.threats import link_threat, rate_link
    from ivdossier.workflows.demo import MEMBERS

    rng = random.Random(extra)
    codes = ["DG-E01", "DM-E01", "DM-I01", "DM-M01"]
    registry = open_registry(db)
    try:
        with registry.writing() as s:
            for i in range(extra):
                slug = f"extra-{i}"
                reg.add_instrument(
                    s, actor="ana", program=PROGRAM, slug=slug, name=f"Extra {i}", columns=[f"x{i}"]
                )
                for code in rng.sample(codes, 3):
                    link = link_threat(s, actor="ana", instrument=slug, code=code)
                    for handle, _name, _email in MEMBERS[:2]:
                        rate_link(s, actor=handle, link=link.slug, likelihood=rng.randint(1, 5),
                                  severity=rng.randint(1, 5))  # fmt: skip
    finally:
        registry.dispose()


def test_the_sites_queries_do_not_grow_with_the_number_of_instruments(demo_dir: Path, tmp_path: Path) -> None:
    from ivdossier.workflows.dossiers import write_site

    counts = {}
    for extra in (2, 8):
        db = tmp_path / f"r{extra}.sqlite"
        shutil.copy(demo_dir / "ivdossier.sqlite", db)
        _grow(str(db), extra)
        registry = open_registry(str(db))
        try:
            with registry.reading() as s:
                out = tmp_path / f"site-{extra}"
                counts[extra] = queries_while(registry, lambda: write_site(s, out, generated_at=WHEN))  # noqa: B023
            assert (
                len(list((out / "programs" / PROGRAM / "instruments").iterdir())) == len(INSTRUMENTS) + extra
            )
        finally:
            registry.dispose()
    assert counts[2] == counts[8], (
        counts
    )  # six more instruments, 18 more links, 36 more ratings: no more queries


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="forked workers are used on Linux only")
def test_dossiers_assembled_in_workers_give_the_serial_site_byte_for_byte(
    demo_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The demo registry (studies, plans, runs, team edges) grown by six instruments: the site whose dossiers are
    assembled in forked workers is the serial one, and every dossier was assembled in a worker (a worker that read
    the registry would have been refused, and the site built serially)."""
    from ivdossier.reports import parallel
    from ivdossier.workflows import dossiers as wd

    db = tmp_path / "r.sqlite"
    shutil.copy(demo_dir / "ivdossier.sqlite", db)
    _grow(str(db), 6)
    log = tmp_path / "pids.txt"
    real = wd._dossier_input

    def logged(*args: Any, **kwargs: Any) -> Any:
        with log.open("a", encoding="utf-8") as f:
            f.write(f"{os.getpid()}\n")
        return real(*args, **kwargs)

    registry = open_registry(str(db))
    try:
        with registry.reading() as s:
            monkeypatch.setattr(parallel, "MIN_PARALLEL", 10**9)
            serial = wd.write_site(s, tmp_path / "serial", generated_at=WHEN)
            monkeypatch.setattr(parallel, "MIN_PARALLEL", 2)
            monkeypatch.setattr(os, "cpu_count", lambda: 2)
            monkeypatch.setattr(wd, "_dossier_input", logged)
            forked = wd.write_site(s, tmp_path / "forked", generated_at=WHEN)
            assert (
                s.execute(select(func.count()).select_from(Instrument)).scalar_one() == len(INSTRUMENTS) + 6
            )
    finally:
        registry.dispose()
    pids = log.read_text(encoding="utf-8").split()
    assert len(pids) == len(INSTRUMENTS) + 6 and str(os.getpid()) not in pids
    assert (tmp_path / "serial" / "studies.html").exists()  # the prior-use sections were read before the fork
    root_s, root_f = (tmp_path / "serial").resolve(), (tmp_path / "forked").resolve()
    assert [p.relative_to(root_f) for p in forked] == [p.relative_to(root_s) for p in serial]
    for p in serial:
        assert (root_f / p.relative_to(root_s)).read_bytes() == p.read_bytes(), p


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="forked workers are used on Linux only")
def test_a_forked_worker_may_not_read_the_registry(
    demo_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A query through the session in a forked worker is refused before it reaches the shared connection; the
    render falls back to this process, where the same query runs, and the session stays usable."""
    from ivdossier.reports import parallel
    from ivdossier.workflows.dossiers import _no_reads_in_forked_workers

    monkeypatch.setattr(parallel, "MIN_PARALLEL", 2)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    registry = open_registry(str(demo_dir / "ivdossier.sqlite"))
    try:
        with registry.reading() as s:

            def read(i: int) -> tuple[int, int]:
                return os.getpid(), s.execute(select(func.count()).select_from(Instrument)).scalar_one() + i

            with _no_reads_in_forked_workers(s):
                out = parallel.render_parallel(list(range(4)), read)
            assert out == [
                (os.getpid(), len(INSTRUMENTS) + i) for i in range(4)
            ]  # all read here, none forked
            # the refusal itself, seen from a forked child
            ctx = multiprocessing.get_context("fork")
            receive, send = ctx.Pipe(duplex=False)

            def child() -> None:
                try:
                    s.execute(select(func.count()).select_from(Instrument))
                    send.send("read")
                except RuntimeError as exc:
                    send.send(str(exc))

            with _no_reads_in_forked_workers(s):
                process = ctx.Process(target=child)
                process.start()
                message = receive.recv()
                process.join()
            assert message.startswith("a forked site worker tried to read the registry")
            assert s.execute(select(func.count()).select_from(Instrument)).scalar_one() == len(INSTRUMENTS)
    finally:
        registry.dispose()


def test_preloading_pauses_the_garbage_collector_and_restores_it(
    demo_dir: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import gc

    from ivdossier.registry import bulk
    from ivdossier.workflows import dossiers as wd

    seen: list[bool] = []
    real = bulk.runs_by_instrument

    def watched(*args: Any, **kwargs: Any) -> Any:
        seen.append(gc.isenabled())
        return real(*args, **kwargs)

    monkeypatch.setattr(bulk, "runs_by_instrument", watched)
    registry = open_registry(str(demo_dir / "ivdossier.sqlite"))
    try:
        with registry.reading() as s:
            assert gc.isenabled()
            wd.RegistryReader(s).preload(bulk.instruments(s))
            assert seen == [False] and gc.isenabled()
            monkeypatch.setattr(bulk, "runs_by_instrument", lambda *a, **k: 1 / 0)
            with pytest.raises(ZeroDivisionError):
                wd.RegistryReader(s).preload(bulk.instruments(s))
            assert gc.isenabled()  # restored after a failed read too
            monkeypatch.setattr(bulk, "runs_by_instrument", real)
            gc.disable()
            try:
                wd.RegistryReader(s).preload([])
                assert not gc.isenabled()  # left off when it was off
            finally:
                gc.enable()
    finally:
        registry.dispose()
