"""Instrument pages rendered on several cores: the serial render is the reference (exact identity, byte for byte)."""

from __future__ import annotations

import dataclasses
import gc
import multiprocessing
import os
import sys
import weakref
from functools import partial
from pathlib import Path

import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.reports import mdtext as mt
from ivdossier.reports import parallel
from ivdossier.reports import site as site_module
from ivdossier.reports.inputs import DossierInput, InstrumentInfo, ProgramInfo
from ivdossier.reports.sample import PROGRAM, make_run, sample_input
from ivdossier.reports.site import PendingDossier, build_site
from ivdossier.workflows.verdicts import with_verdicts

linux_only = pytest.mark.skipif(
    not sys.platform.startswith("linux"), reason="forked workers are used on Linux only"
)


@pytest.fixture
def forced(monkeypatch: pytest.MonkeyPatch) -> None:
    """The parallel path even for a handful of items and on a one-core machine (two workers)."""
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 2)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)


def _tagged(i: int) -> tuple[int, int, bool]:
    return i, os.getpid(), mt.html_target()


# The first items of the first two chunks (37 items, 2 workers) meet at a barrier made before the fork, so the
# worker holding chunk 0 waits until another process has taken chunk 1: both workers render.
_MEET = multiprocessing.get_context("fork").Barrier(2) if sys.platform.startswith("linux") else None
_CHUNK = -(-37 // (2 * parallel._CHUNKS_PER_WORKER))


def _tagged_after_meeting(i: int) -> tuple[int, int, bool]:
    if i in (0, _CHUNK) and _MEET is not None:
        _MEET.wait(timeout=60)
    return _tagged(i)


def test_worker_count_rules(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(os, "cpu_count", lambda: 8)
    assert parallel.worker_count(parallel.MIN_PARALLEL - 1) == 0
    assert parallel.worker_count(parallel.MIN_PARALLEL) == (4 if sys.platform.startswith("linux") else 0)
    monkeypatch.setattr(os, "cpu_count", lambda: 1)
    assert parallel.worker_count(10_000) == 0
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    monkeypatch.setattr(sys, "platform", "darwin")
    assert parallel.worker_count(10_000) == 0


@linux_only
@pytest.mark.usefixtures("forced")
def test_order_kept_workers_used_and_context_inherited() -> None:
    items = list(range(37))  # not a multiple of the chunk count
    with mt.for_html():
        out = parallel.render_parallel(items, _tagged_after_meeting)
    assert [i for i, _, _ in out] == items
    assert os.getpid() not in {pid for _, pid, _ in out}  # rendered by workers, not by this process
    assert len({pid for _, pid, _ in out}) == 2
    assert all(html for _, _, html in out)  # the for_html() context variable is seen by the workers
    assert not any(html for _, _, html in parallel.render_parallel(items, _tagged))


@linux_only
@pytest.mark.usefixtures("forced")
def test_an_error_in_a_worker_is_the_serial_error() -> None:
    def fail_on_7(i: int) -> str:
        if i in (7, 30):
            raise InvalidInputError(f"item {i} is bad; fix it.")
        return str(i)

    with pytest.raises(InvalidInputError, match=r"^item 7 is bad; fix it\.$"):
        parallel.render_parallel(list(range(40)), fail_on_7)


@linux_only
@pytest.mark.usefixtures("forced")
def test_a_worker_that_dies_falls_back_to_the_serial_render() -> None:
    parent = os.getpid()

    def die_in_worker(i: int) -> str:
        if os.getpid() != parent and i == 3:
            os._exit(3)
        return f"page {i}"

    assert parallel.render_parallel(list(range(20)), die_in_worker) == [f"page {i}" for i in range(20)]


def _dossiers() -> list[DossierInput]:
    second = ProgramInfo(slug="telehealth-ed-2", title="A second question")
    out = [sample_input()]
    for k, (program, slug) in enumerate(
        [(PROGRAM, "mast"), (second, "z"), (PROGRAM, "rollout"), (second, "fees"), (second, "z")]
    ):
        base = sample_input(n_links=3, n_runs=2)
        out.append(
            dataclasses.replace(
                base,
                program=program,
                instrument=InstrumentInfo(slug=slug, name=f"Instrument {k}"),
                runs=(make_run(k + 1, plots=k % 2 == 0),),
            )
        )
    return [with_verdicts(d) for d in out]


def _site(out: Path) -> tuple[list[str], dict[str, bytes]]:
    written = build_site(out, [PROGRAM], _dossiers(), [])
    root = out.resolve()
    return [p.relative_to(root).as_posix() for p in written], {
        p.relative_to(root).as_posix(): p.read_bytes() for p in root.rglob("*") if p.is_file()
    }


@linux_only
def test_parallel_site_is_byte_identical_to_the_serial_site(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 10**9)
    serial_order, serial_files = _site(tmp_path / "serial")

    log = tmp_path / "pids.txt"
    real = site_module.dossier_html

    def logged(d: DossierInput, *, preamble: str = "") -> str:
        with log.open("a", encoding="utf-8") as f:
            f.write(f"{os.getpid()}\n")
        return real(d, preamble=preamble)

    monkeypatch.setattr(site_module, "dossier_html", logged)
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 2)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    parallel_order, parallel_files = _site(tmp_path / "parallel")

    pids = log.read_text(encoding="utf-8").split()
    assert len(pids) == 6 and str(os.getpid()) not in pids  # every dossier page was rendered in a worker
    assert parallel_order == serial_order  # same pages in the same order
    assert sum(1 for rel in serial_order if "/instruments/" in rel) == 6
    assert parallel_files.keys() == serial_files.keys()
    for rel, data in serial_files.items():
        assert parallel_files[rel] == data, rel


@linux_only
@pytest.mark.usefixtures("forced")
def test_a_failing_page_fails_the_parallel_build_as_the_serial_one_and_writes_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = site_module.dossier_html

    def broken_for_z(d: DossierInput, *, preamble: str = "") -> str:
        if d.instrument.slug == "z":
            raise InvalidInputError("instrument z cannot be rendered; fix its record.")
        return real(d, preamble=preamble)

    monkeypatch.setattr(site_module, "dossier_html", broken_for_z)
    with pytest.raises(InvalidInputError, match=r"^instrument z cannot be rendered; fix its record\.$"):
        build_site(tmp_path / "site", [PROGRAM], _dossiers(), [])
    assert not (tmp_path / "site").exists()
    assert [p.name for p in tmp_path.iterdir()] == []


def _pending(dossiers: list[DossierInput], fail: str = "", die_in_worker: str = "") -> list[PendingDossier]:
    """The dossiers as pending ones, assembled where their pages are rendered; `fail` names an instrument whose
    assembly raises, `die_in_worker` one whose assembly kills the worker (in a worker only)."""
    parent = os.getpid()

    def assemble(d: DossierInput) -> DossierInput:
        if d.instrument.slug == fail:
            raise InvalidInputError(f"instrument {fail} cannot be assembled; fix its record.")
        if d.instrument.slug == die_in_worker and os.getpid() != parent:
            os._exit(3)
        return d

    return [
        PendingDossier(program=d.program, slug=d.instrument.slug, assemble=partial(assemble, d))
        for d in dossiers
    ]


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in root.rglob("*") if p.is_file()}


@linux_only
def test_pending_dossiers_assembled_in_workers_give_the_site_of_the_assembled_dossiers(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 10**9)
    reference = build_site(tmp_path / "serial", [PROGRAM], _dossiers(), [])
    log = tmp_path / "pids.txt"

    def logged(d: DossierInput) -> DossierInput:
        with log.open("a", encoding="utf-8") as f:
            f.write(f"{os.getpid()}\n")
        return d

    pending = [
        PendingDossier(program=d.program, slug=d.instrument.slug, assemble=partial(logged, d))
        for d in _dossiers()
    ]
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 2)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    written = build_site(tmp_path / "parallel", [PROGRAM], pending, [])

    pids = log.read_text(encoding="utf-8").split()
    assert len(pids) == 6 and str(os.getpid()) not in pids  # every dossier was assembled in a worker
    root_s, root_p = (tmp_path / "serial").resolve(), (tmp_path / "parallel").resolve()
    assert [p.relative_to(root_p) for p in written] == [p.relative_to(root_s) for p in reference]
    assert _files(root_p) == _files(root_s)


@linux_only
@pytest.mark.usefixtures("forced")
def test_a_worker_dying_while_assembling_falls_back_to_the_serial_build(tmp_path: Path) -> None:
    build_site(tmp_path / "reference", [PROGRAM], _dossiers(), [])
    build_site(tmp_path / "site", [PROGRAM], _pending(_dossiers(), die_in_worker="rollout"), [])
    assert _files((tmp_path / "site").resolve()) == _files((tmp_path / "reference").resolve())


@pytest.mark.parametrize("workers", [False, True])
def test_a_failing_assembly_is_the_serial_error_and_writes_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, workers: bool
) -> None:
    if workers and not sys.platform.startswith("linux"):
        pytest.skip("forked workers are used on Linux only")
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 2 if workers else 10**9)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    with pytest.raises(InvalidInputError, match=r"^instrument fees cannot be assembled; fix its record\.$"):
        build_site(tmp_path / "site", [PROGRAM], _pending(_dossiers(), fail="fees"), [])
    assert list(tmp_path.iterdir()) == []


def test_a_pending_dossier_must_assemble_as_the_instrument_it_names(tmp_path: Path) -> None:
    d = _dossiers()[1]
    wrong = PendingDossier(program=d.program, slug="not-" + d.instrument.slug, assemble=lambda: d)
    with pytest.raises(RuntimeError, match="was assembled as"):
        build_site(tmp_path / "site", [PROGRAM], [wrong], [])
    assert list(tmp_path.iterdir()) == []


class _Node:
    def __init__(self) -> None:
        self.me = self  # a reference cycle: only the garbage collector frees it


_REFS: list[weakref.ref[_Node]] = []


def _cycle_then_count(i: int) -> tuple[int, int, bool]:
    """Make one reference cycle; return this process's id, how many of its earlier cycles are still alive, and
    whether automatic garbage collection is on."""
    alive = sum(1 for r in _REFS if r() is not None)
    _REFS.append(weakref.ref(_Node()))
    return os.getpid(), alive, gc.isenabled()


@linux_only
@pytest.mark.usefixtures("forced")
def test_workers_collect_garbage_every_few_items_not_while_rendering_each(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(parallel, "_COLLECT_EVERY", 3)
    n = 112  # 2 workers x 8 chunks: chunks of 7, collected after items 3 and 6 of each and at its end
    size = -(-n // (2 * parallel._CHUNKS_PER_WORKER))
    out = parallel.render_parallel(list(range(n)), _cycle_then_count)
    assert gc.isenabled() and os.getpid() not in {pid for pid, _, _ in out}
    assert not any(enabled for _, _, enabled in out)  # automatic collection is off while items render
    for start in range(0, n, size):
        # the cycles made since the last collection are alive; all earlier ones (other chunks too) were collected
        assert [alive for _, alive, _ in out[start : start + size]] == [0, 1, 2, 0, 1, 2, 0]


@linux_only
@pytest.mark.parametrize("workers", [False, True])
def test_each_result_is_handed_over_in_order_in_this_process(
    monkeypatch: pytest.MonkeyPatch, workers: bool
) -> None:
    monkeypatch.setattr(parallel, "MIN_PARALLEL", 2 if workers else 10**9)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    seen: list[tuple[int, tuple[int, int, bool], int]] = []
    items = list(range(37))
    out = parallel.render_parallel(items, _tagged, lambda i, r: seen.append((i, r, os.getpid())))
    assert [(i, r) for i, r, _ in seen] == list(enumerate(out))
    assert [i for i, _, _ in out] == items
    assert {pid for _, _, pid in seen} == {os.getpid()}
    assert (os.getpid() in {pid for _, pid, _ in out}) is not workers


@linux_only
@pytest.mark.usefixtures("forced")
def test_an_error_in_the_hand_over_is_raised_as_it_is_without_a_serial_retry() -> None:
    parent = os.getpid()
    in_parent: list[int] = []

    def render(i: int) -> int:
        if os.getpid() == parent:
            in_parent.append(i)
        return i

    def refuse_5(i: int, r: int) -> None:
        if i == 5:
            raise OSError(28, "No space left on device")

    with pytest.raises(OSError, match="No space left"):
        parallel.render_parallel(list(range(40)), render, refuse_5)
    assert in_parent == []  # the items were not rendered again here


@linux_only
@pytest.mark.usefixtures("forced")
def test_a_failing_page_leaves_the_previous_site_as_it_was(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    build_site(tmp_path / "site", [PROGRAM], _dossiers(), [])
    before = _files((tmp_path / "site").resolve())
    real = site_module.dossier_html

    def broken_for_fees(d: DossierInput, *, preamble: str = "") -> str:
        if d.instrument.slug == "fees":  # rendered after pages already staged
            raise InvalidInputError("instrument fees cannot be rendered; fix its record.")
        return real(d, preamble=preamble)

    monkeypatch.setattr(site_module, "dossier_html", broken_for_fees)
    with pytest.raises(InvalidInputError, match="instrument fees cannot be rendered"):
        build_site(tmp_path / "site", [PROGRAM], _dossiers(), [])
    assert _files((tmp_path / "site").resolve()) == before
    assert [p.name for p in tmp_path.iterdir()] == ["site"]
