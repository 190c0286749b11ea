"""Allocator settings for the long-running node process (glibc's malloc, Linux).

Each series makes a few large numpy arrays (tens of MB) and many middle-sized temporaries
(the row blocks of the B0 and spline stages). With glibc's defaults, arrays above the mmap
threshold are mapped and unmapped one by one, a thread's arena gives freed memory back to the
kernel, and the next series pays the page faults and the kernel's zeroing again: measured
here (``/proc/self/task/*/stat``, a 20 x 128 x 128 x 61 series just received by a node) as
0.25-0.4 s of kernel time and 5,000-7,000 page faults in the first ``prepare``, which took
0.45-1.2 s; with the settings below, no kernel time, no page fault after the first series,
and 0.17-0.23 s. They keep freed memory in the process for the next series instead
(resident memory stays at the peak of the largest series, which a processing node needs
anyway):

* ``M_ARENA_MAX`` 1: one arena for all threads, so memory one thread frees (the start-up
  calibration, the last series) serves the processing thread. numpy allocates large blocks
  rarely and small Python objects do not use malloc, so one arena's lock costs nothing seen;
* ``M_MMAP_MAX`` 0 and ``M_MMAP_THRESHOLD`` 32 MiB: every block from the heap (glibc still
  maps memory if the heap cannot grow), and a threshold that no longer moves;
* ``M_TRIM_THRESHOLD`` 1 GiB: do not give the top of the heap back after each series;
* ``M_TOP_PAD`` 256 MiB: grow the heap in large steps (address space only, until touched).

These are mallopt(3) parameters (values from glibc's ``malloc.h``). ``M_ARENA_MAX`` only
binds threads that have no arena yet, so :func:`tune_allocator` runs first thing in the
command line (:mod:`node.cli`) and again, harmlessly, when a :class:`~node.service.Node`
starts. ``CEST_NODE_MALLOC=default`` in the environment leaves the allocator as it is (for
comparison, or for a site that tunes it with glibc's own ``MALLOC_*_`` variables); on
another C library nothing is done.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import logging
import os

log = logging.getLogger("cest_node.memory")

M_TRIM_THRESHOLD = -1
M_TOP_PAD = -2
M_MMAP_THRESHOLD = -3
M_MMAP_MAX = -4
M_ARENA_MAX = -8

SETTINGS = {
    M_TRIM_THRESHOLD: 1 << 30,
    M_TOP_PAD: 256 << 20,
    M_MMAP_THRESHOLD: 32 << 20,
    M_MMAP_MAX: 0,
    M_ARENA_MAX: 1,
}

HEAP_RESERVE_MB = 384
"""Heap faulted in at start-up by :func:`reserve_heap` (about the peak of a 20 x 128 x 128 x 61
series' processing; ``CEST_NODE_HEAP_RESERVE_MB`` in the environment changes it, 0 turns it
off)."""

_done: bool | None = None
_reserved = False


_libc: list[ctypes.CDLL | None] = []


def glibc() -> ctypes.CDLL | None:
    """The process's C library when it is glibc (loaded once), else None: other C libraries'
    mallopt parameters differ. The allocator settings, the heap reserve and the spool's
    ``syncfs`` (:mod:`node.spool`) call it."""
    if not _libc:
        lib = None
        name = ctypes.util.find_library("c")
        if name:
            try:
                lib = ctypes.CDLL(name)
                if not (hasattr(lib, "gnu_get_libc_version") and hasattr(lib, "mallopt")):
                    lib = None
            except OSError:
                lib = None
        _libc.append(lib)
    return _libc[0]


def env_int(name: str, default: int) -> int:
    """An integer setting from the environment (``default`` when unset; a warning and
    ``default`` when it is not an integer). The node's ``CEST_NODE_*_MB`` and thread settings
    are read with it."""
    try:
        return int(os.environ.get(name, default))
    except ValueError:
        log.warning("%s is not an integer; using %d", name, default)
        return default


def tune_allocator() -> bool:
    """Apply :data:`SETTINGS` once per process; returns whether they are in force."""
    global _done
    if _done is not None:
        return _done
    _done = False
    if os.environ.get("CEST_NODE_MALLOC", "") == "default":
        return False
    libc = glibc()
    if libc is None:
        return False
    mallopt = libc.mallopt
    mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    mallopt.restype = ctypes.c_int
    ok = all(mallopt(param, value) == 1 for param, value in SETTINGS.items())
    if not ok:
        log.warning("memory: glibc refused some allocator settings; running with its defaults")
    _done = ok
    return ok


def reserve_heap(mb: int | None = None) -> int:
    """Fault ``mb`` MiB of heap in now, once per process, and free it again (kept by the
    settings above); returns the MiB reserved (0: not tuned, turned off, or done before).

    Without it the FIRST series after a start pays the page faults of its arrays: measured
    here (``tests/bench/bench_latency``, a new node per run in one process) as 0.3 s for the
    assembler's release of a 20 x 128 x 128 x 61 series in the first run against 0.05 s in
    the next, the kernel zeroing and mapping 80 MB of fresh pages. With the heap kept
    (:func:`tune_allocator`), memory faulted in once is reused by every later allocation, so
    paying it at start-up (about 0.2 s for 384 MiB) takes it off the first series' clock.
    Resident memory starts at the reserve instead of growing to it on the first series.
    """
    global _reserved
    if _reserved or not tune_allocator():
        return 0
    if mb is None:
        mb = env_int("CEST_NODE_HEAP_RESERVE_MB", HEAP_RESERVE_MB)
    _reserved = True
    if mb <= 0:
        return 0
    # plain malloc and memset, not numpy: numpy advises huge pages for large arrays, and a
    # huge-page fault here costs far more (384 MiB: 1.0 s against 0.19 s in 4 KiB pages)
    libc = glibc()
    assert libc is not None  # tune_allocator() found it
    libc.malloc.argtypes, libc.malloc.restype = [ctypes.c_size_t], ctypes.c_void_p
    libc.free.argtypes, libc.free.restype = [ctypes.c_void_p], None
    size = mb << 20
    ptr = libc.malloc(size)
    if not ptr:
        log.warning("memory: could not reserve %d MiB of heap", mb)
        return 0
    ctypes.memset(ptr, 0, size)  # every page written, so faulted in
    libc.free(ptr)
    return mb


_frozen = False


def freeze_startup_objects() -> bool:
    """Collect, then move every object alive now to the collector's permanent generation
    (``gc.freeze``), once per process; returns whether it was done now.

    The node's modules (pydicom's data dictionary, highdicom, numpy, scipy) and the start-up
    calibration leave some hundred thousand long-lived objects, and every full collection of
    CPython's cyclic garbage collector walks all of them: measured here as 140 ms for one
    full collection in the middle of a series (9 of them, 0.77 s in all, over three series),
    wherever it happens to fall, in the ingest or in the budget-bound pass. Frozen, they are
    skipped; a full collection then walks only what the series made (18 ms). Last series
    through a node on storescp, 4 runs each: primary 650-856 ms without, 580-654 ms with;
    all model-free outputs 1.19-1.44 s against 1.09-1.24 s (loaded machine).

    Objects frozen are never collected, so this is done once, when the node has started (the
    service's objects then live as long as the process). ``CEST_NODE_GC=default`` in the
    environment leaves the collector as it is.
    """
    global _frozen
    if _frozen or os.environ.get("CEST_NODE_GC", "") == "default":
        return False
    import gc

    _frozen = True
    gc.collect()
    gc.freeze()
    return True


GC_THRESHOLDS = (20_000, 20, 100)
"""Thresholds of CPython's cyclic collector in the node process (``gc.set_threshold``; the
interpreter's own are 700, 10, 10)."""

_gc_tuned = False


def tune_gc() -> bool:
    """Set :data:`GC_THRESHOLDS`, once per process; returns whether it was done now.

    Receiving a series makes about 100 container objects per instance (its header's raw
    elements, kept with the series until it is processed), so with the interpreter's
    thresholds a young collection runs every few instances and a full one once or twice a
    series, walking everything the series has made so far. Measured with ``gc.callbacks``
    while a node received the 1,220 instances of ``tests/bench/bench_ingest`` (start-up
    objects frozen): 125 collections of the youngest generation, 11 of the middle one and one
    full, 30-70 ms in all per series, the full one 14-50 ms in the middle of the ingest
    (one C-STORE answered that much later). With these thresholds: 4-5 young collections,
    8-11 ms in all. The full collections the interpreter would have run are then rare, so
    the node runs one itself when a series is done (:func:`collect_between_series`), so that
    whatever cyclic garbage a series leaves is freed before the next one, not after many.
    ``CEST_NODE_GC=default`` in the environment leaves the collector as it is.
    """
    global _gc_tuned
    if _gc_tuned or os.environ.get("CEST_NODE_GC", "") == "default":
        return False
    import gc

    _gc_tuned = True
    gc.set_threshold(*GC_THRESHOLDS)
    return True


def collect_between_series() -> float:
    """A full collection where :func:`tune_gc` is in force (after a series' pass, when its
    objects are garbage); returns its seconds (0.0: not tuned, nothing done)."""
    if not _gc_tuned:
        return 0.0
    import gc
    import time

    t0 = time.perf_counter()
    gc.collect()
    return time.perf_counter() - t0


BLAS_THREADS = 1
"""Threads of the BLAS library (OpenBLAS, MKL) in the node process
(``CEST_NODE_BLAS_THREADS`` in the environment changes it; 0 leaves the library's own)."""

_blas_limited: bool | None = None


def limit_blas_threads() -> bool:
    """Limit the BLAS library to :data:`BLAS_THREADS` threads, once per process (through
    threadpoolctl, which knows the symbols of every BLAS build numpy and scipy ship with);
    returns whether a limit is in force.

    The node's matrix products are small (a few thousand rows of 60 offsets at a time) and
    run beside its own threads (receiving, sending) on a machine of a few cores. With
    OpenBLAS's own thread pool (2 threads here) the B0 band resample of a 20-slice series
    took 0.35-0.7 s in one series out of two instead of 0.06 s, and 0.62 s on its first call
    in a process against 0.07 s with one thread (measured with ``quant.resample_shifted`` on
    the phantom; each BLAS thread faults in buffers of its own, and wakes up behind the
    node's threads). The model-based fits solve many small systems, which do not thread.
    """
    global _blas_limited
    if _blas_limited is not None:
        return _blas_limited
    _blas_limited = False
    n = env_int("CEST_NODE_BLAS_THREADS", BLAS_THREADS)
    if n <= 0:
        return False
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - a declared dependency
        log.warning("memory: threadpoolctl missing; the BLAS library keeps its own threads")
        return False
    threadpool_limits(limits=n, user_api="blas")  # not a context: in force from now on
    _blas_limited = True
    return True
