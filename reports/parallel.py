"""Render many independent pages on several cores, in order, with the serial result as the reference.

Only on Linux, through forked workers: the items and the render function are inherited by the workers (nothing is
pickled on the way in, only the rendered text on the way back), together with the caller's context variables (for
example :func:`ivdossier.reports.mdtext.for_html`). Anywhere else, for few items, on one core, or when the workers
fail in any way, the items are rendered serially in this process, so an error is the one the serial render raises.
"""

from __future__ import annotations

import contextvars
import gc
import multiprocessing
import os
import sys
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor
from typing import Any, TypeVar

T = TypeVar("T")
R = TypeVar("R")

#: Fewer items than this are rendered serially. Measured on 2 cores with dossier pages of the scale registry
#: (benchmarks/bench_registry_scale.py), caches warm: 100 pages 116 ms serial vs 139 ms forked, 200 pages 223 vs
#: 236 ms, 400 pages 909 vs 570 ms (starting the workers and sending the pages back costs about 40 ms + 0.4 ms a page).
MIN_PARALLEL = 200
MAX_WORKERS = 4
# Chunks a worker takes one at a time: more, smaller chunks end the workers closer together (a worker that finishes
# early takes the next chunk), at a few milliseconds each.
_CHUNKS_PER_WORKER = 8
_COLLECT_EVERY = 100

# The job the forked workers inherit: (items, render function, the caller's context). Set only while one parallel
# render runs; the lock keeps a second one (another thread, or a render inside a render) on the serial path.
_JOB: tuple[Sequence[Any], Callable[[Any], Any], contextvars.Context] | None = None
_LOCK = threading.Lock()


def worker_count(n_items: int) -> int:
    """How many worker processes `n_items` pages get: 0 (render serially) or 2 to MAX_WORKERS."""
    cpus = os.cpu_count() or 1
    if not sys.platform.startswith("linux") or cpus < 2 or n_items < max(MIN_PARALLEL, 2):
        return 0
    return min(cpus, MAX_WORKERS)


def render_parallel(
    items: Sequence[T], fn: Callable[[T], R], each: Callable[[int, R], None] | None = None
) -> list[R]:
    """``[fn(item) for item in items]``, computed on several cores when that pays (see the module docstring).

    `each(i, result)` is called in this process for every result as soon as it is back, in order (while later
    items are still being rendered); after a failure of the workers it is called again for every item, with the
    results of the serial render.
    """
    workers = worker_count(len(items))
    if workers and _LOCK.acquire(blocking=False):
        try:
            return _render_forked(items, fn, workers, each)
        except _EachFailed as exc:
            raise exc.error from None  # the caller's own step failed, not the workers: no serial retry
        except Exception:
            pass  # whatever went wrong in or with the workers, the serial render below repeats it or succeeds
        finally:
            _LOCK.release()
    out = []
    for i, item in enumerate(items):
        out.append(fn(item))
        if each is not None:
            each(i, out[-1])
    return out


def _render_forked(
    items: Sequence[T], fn: Callable[[T], R], workers: int, each: Callable[[int, R], None] | None
) -> list[R]:
    global _JOB
    n = len(items)
    size = -(-n // (workers * _CHUNKS_PER_WORKER))
    bounds = [(start, min(start + size, n)) for start in range(0, n, size)]
    _JOB = (items, fn, contextvars.copy_context())
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("fork"))
    try:
        # The workers are forked at the first submission. Frozen objects are never scanned by a worker's garbage
        # collector, so the inherited memory stays shared instead of being copied page by page.
        gc.freeze()
        try:
            chunks = pool.map(_render_chunk, bounds)
        finally:
            gc.unfreeze()
        out: list[R] = []
        for chunk in chunks:
            for result in chunk:
                if each is not None:
                    try:
                        each(len(out), result)
                    except Exception as exc:
                        raise _EachFailed(exc) from exc
                out.append(result)
        return out
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
        _JOB = None


class _EachFailed(Exception):
    """An error raised by the caller's `each` while the workers rendered (re-raised as it is)."""

    def __init__(self, error: Exception) -> None:
        super().__init__(str(error))
        self.error = error


def _render_chunk(bounds: tuple[int, int]) -> list[Any]:
    """In a worker: render items[start:stop] of the inherited job, under the caller's context variables."""
    if _JOB is None:
        raise RuntimeError("no parallel render job was inherited (workers must be forked)")
    items, fn, context = _JOB
    start, stop = bounds
    # The garbage collector runs after every _COLLECT_EVERY items (and at the chunk's end) instead of every few
    # hundred allocations, which mostly rescan what the worker keeps (its caches); garbage waits that long at most.
    gc.disable()
    try:
        out = []
        for i in range(start, stop):
            out.append(context.run(fn, items[i]))
            if (i - start + 1) % _COLLECT_EVERY == 0:
                gc.collect(0)
        return out
    finally:
        gc.enable()
        gc.collect(0)
