"""The site of a whole registry: pages for runs, plans and studies, dossiers identical to those built one at a
time, and a number of database queries that does not grow with the number of instruments."""

from __future__ import annotations

import random
import re
import shutil
from pathlib import Path

import pytest
from sqlalchemy import event

from ivdossier.registry.db import open_registry
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
