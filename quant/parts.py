"""Row ranges of a compiled loop on several threads.

The compiled loops of :mod:`quant._jit` release the interpreter lock (numba ``nogil``) and
compute every row on its own, so a batch cut into contiguous row ranges, one per thread,
gives the same values bit for bit as one call over the whole batch, in a fraction of the
time where cores are free: in a node that is right after a series' last instance, when the
receive, the sender and the archive all wait for these loops. numpy's own expressions gain
nothing this way here (the B0 band's resample, about 40 numpy calls a block, took 135 ms on
two threads against 118 ms on one), so only the compiled loops use it: the brain voxels'
gather (:func:`quant.normalize`), the finite check (:func:`quant.finite_rows`), the B0
estimate, and the layout of a series' slices (:func:`quant.spectra_from_frames`, by the
assembler).

:func:`in_parts` runs one part on the calling thread and the others on a small shared pool
(``workers() - 1`` threads, made on first use and again in a forked child). A part must not
call :func:`in_parts` itself: a part waiting for the pool from inside the pool could wait
for ever.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor

__all__ = ["in_parts", "set_workers", "workers"]

#: at most this many threads by default, however many cores the machine has: the loops are
#: memory-bound and a node has other threads to run
DEFAULT_MAX_WORKERS = 4

_lock = threading.Lock()
_workers: int | None = None  # None: the default
_pool: ThreadPoolExecutor | None = None
_pool_pid = 0


def workers() -> int:
    """Threads a batch is cut for: :func:`set_workers`'s, else the cores this process may run
    on, at most :data:`DEFAULT_MAX_WORKERS`."""
    if _workers is not None:
        return _workers
    try:
        cpus = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cpus = os.cpu_count() or 1
    return max(1, min(DEFAULT_MAX_WORKERS, cpus))


def set_workers(n: int | None) -> None:
    """Cut batches for ``n`` threads from now on (1: every loop on the calling thread; None:
    the default)."""
    global _workers, _pool
    if n is not None and (isinstance(n, bool) or not isinstance(n, int) or n < 1):
        raise ValueError(f"workers must be a positive integer or None, got {n!r}")
    with _lock:
        _workers = n
        old, _pool = _pool, None
    if old is not None:
        old.shutdown(wait=False)


def _executor() -> ThreadPoolExecutor:
    """The shared pool of ``workers() - 1`` threads (made again after :func:`set_workers`,
    which drops it, and in a forked child, which has none of its threads)."""
    global _pool, _pool_pid
    with _lock:
        if _pool is None or _pool_pid != os.getpid():
            _pool = ThreadPoolExecutor(max(1, workers() - 1), thread_name_prefix="quant-part")
            _pool_pid = os.getpid()
        return _pool


def in_parts(n: int, part: Callable[[int, int], object], *, min_rows: int = 4096) -> None:
    """Call ``part(lo, hi)`` for contiguous ranges covering ``0..n``, at most one range per
    thread of :func:`workers` and none shorter than ``min_rows`` (one call ``part(0, n)``
    where the batch is too small to cut). Returns when every part has returned; the first
    exception of a part is raised then."""
    w = workers()
    k = min(w, n // max(min_rows, 1))
    if k <= 1:
        part(0, n)
        return
    bounds = [n * i // k for i in range(k + 1)]
    pool = _executor()  # its threads start as parts arrive
    futures: list[Future[object]] = []
    here = [(bounds[0], bounds[1])]
    for i in range(1, k):
        try:
            futures.append(pool.submit(part, bounds[i], bounds[i + 1]))
        except RuntimeError:  # the pool was shut down meanwhile (set_workers): run it here
            here.append((bounds[i], bounds[i + 1]))
    try:
        for lo, hi in here:
            part(lo, hi)
    finally:  # every part writes into the caller's arrays: none may still run after a raise
        errors = [f.exception() for f in futures]
    for exc in errors:
        if exc is not None:
            raise exc
