"""node.memory: the allocator keeps a series' memory for the next one (glibc, Linux).

The check is behavioural: the minor page faults of a process (``/proc/self/stat`` field 10,
proc(5)) while it allocates, fills and frees a large numpy array over and over. With glibc's
defaults every round maps fresh memory and faults it in again (a 64 MB array: about 16,000
faults of 4 KiB, or fewer with transparent huge pages); with :func:`node.memory.tune_allocator`
the rounds after the first reuse the heap and fault (almost) nothing.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc/Linux only")

SCRIPT = textwrap.dedent("""
    import sys
    import threading
    import numpy as np
    from node.memory import tune_allocator

    tuned = tune_allocator()

    def faults():
        with open("/proc/self/stat") as f:
            return int(f.read().rsplit(")", 1)[1].split()[7])

    out = {}

    def work():  # in a thread, as the node's processing runs
        a = np.ones((4, 1024, 1024, 4), np.float32); del a  # the first round warms the heap
        f0 = faults()
        for _ in range(5):
            a = np.ones((4, 1024, 1024, 4), np.float32)  # 64 MiB, touched
            del a
        out["per_round"] = (faults() - f0) / 5

    t = threading.Thread(target=work); t.start(); t.join()
    print(tuned, out["per_round"])
""")


#: what the environment may hold that would change the behaviour under test
TUNING_VARS = ("MALLOC_ARENA_MAX", "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def run_script(script: str, env_extra: dict[str, str]) -> str:
    """The stdout of ``script`` in a fresh interpreter (no tuning variables but ``env_extra``)."""
    env = {k: v for k, v in os.environ.items() if k not in TUNING_VARS} | env_extra
    return subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          env=env, timeout=60, check=True).stdout


def run(env_extra: dict[str, str]) -> tuple[bool, float]:
    tuned, per_round = run_script(SCRIPT, env_extra).split()
    return tuned == "True", float(per_round)


def test_tuned_allocator_reuses_memory_across_series() -> None:
    tuned, per_round = run({})
    if not tuned:
        pytest.skip("not glibc: the allocator is left as it is")
    default_tuned, default_per_round = run({"CEST_NODE_MALLOC": "default"})
    assert not default_tuned
    # 64 MiB = 16,384 pages of 4 KiB: the default maps and faults it in every round (fewer
    # faults if the kernel gives huge pages); tuned, the heap keeps it
    assert default_per_round > 20, default_per_round
    assert per_round < 0.1 * default_per_round, (per_round, default_per_round)


RESERVE_SCRIPT = textwrap.dedent("""
    import numpy as np
    from node.memory import reserve_heap

    reserved = reserve_heap(128)

    def faults():
        with open("/proc/self/stat") as f:
            return int(f.read().rsplit(")", 1)[1].split()[7])

    f0 = faults()
    a = np.ones((4, 1024, 1024, 4), np.float32)  # 64 MiB, touched: the first series' array
    print(reserved, faults() - f0)
""")


def test_heap_reserve_takes_the_first_series_page_faults() -> None:
    def first_array(env_extra: dict[str, str]) -> tuple[int, int]:
        reserved, n = run_script(RESERVE_SCRIPT, env_extra).split()
        return int(reserved), int(n)

    reserved, with_reserve = first_array({})
    if reserved == 0:
        pytest.skip("not glibc: the allocator is left as it is")
    _, without = first_array({"CEST_NODE_MALLOC": "default"})
    # 64 MiB is 16,384 pages of 4 KiB or 32 huge pages of 2 MiB (proc(5) minflt; the kernel
    # may give either): without a reserve the first array faults every one of them in, with
    # it none (the heap's pages were faulted in by the reserve and kept)
    assert without >= 16, without
    assert with_reserve <= 0.1 * without, (with_reserve, without)


FREEZE_SCRIPT = textwrap.dedent("""
    import gc
    from node.memory import freeze_startup_objects

    before = len(gc.get_objects())
    first, second = freeze_startup_objects(), freeze_startup_objects()
    print(first, second, before, gc.get_freeze_count(), len(gc.get_objects()))
""")


def test_start_up_objects_are_frozen_once() -> None:
    # gc.freeze (Python docs, gc module): frozen objects are ignored by later collections;
    # gc.get_objects lists the tracked objects of the collector's generations only
    def run_freeze(env_extra: dict[str, str]) -> list[str]:
        return run_script(FREEZE_SCRIPT, env_extra).split()

    first, second, before, frozen, after = run_freeze({})
    assert (first, second) == ("True", "False")  # once per process
    assert int(frozen) >= 0.9 * int(before)  # the start-up objects moved out...
    assert int(after) < 0.1 * int(before)  # ...of what a full collection walks
    first, _, _, frozen, _ = run_freeze({"CEST_NODE_GC": "default"})
    assert first == "False" and frozen == "0"


GC_SCRIPT = textwrap.dedent("""
    import gc
    import weakref
    from node.memory import GC_THRESHOLDS, collect_between_series, tune_gc

    class Node:
        pass

    before = gc.get_threshold()
    idle = collect_between_series()
    first, second = tune_gc(), tune_gc()
    after = gc.get_threshold()
    a, b = Node(), Node()
    a.other, b.other = b, a  # a reference cycle: only the cyclic collector frees it
    alive = weakref.ref(a)
    del a, b
    kept = alive() is not None  # a few allocations since: no automatic collection yet
    spent = collect_between_series()
    print(first, second, before == (700, 10, 10), after == GC_THRESHOLDS, idle > 0, kept,
          alive() is None, spent > 0)
""")


def test_collector_thresholds_and_the_collection_between_series() -> None:
    # gc.set_threshold / gc.get_threshold / gc.collect (Python docs, gc module); the
    # interpreter's default thresholds are 700, 10, 10 (CPython 3.11 Modules/gcmodule.c)
    first, second, default_before, tuned, idle, kept, freed, spent = run_script(
        GC_SCRIPT, {}).split()
    assert (first, second) == ("True", "False")  # once per process
    assert default_before == "True" and tuned == "True"
    assert idle == "False"  # untuned, the node leaves collecting to the interpreter
    assert (kept, freed, spent) == ("True", "True", "True")  # the cycle freed between series
    first, _, _, tuned, *_ = run_script(GC_SCRIPT, {"CEST_NODE_GC": "default"}).split()
    assert (first, tuned) == ("False", "False")  # left as it is


BLAS_SCRIPT = textwrap.dedent("""
    import numpy as np
    from threadpoolctl import threadpool_info
    from node.memory import limit_blas_threads

    before = [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]
    limited = limit_blas_threads()
    after = [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]
    print(limited, before, after)
""")


def test_blas_is_limited_to_one_thread() -> None:
    # threadpoolctl's threadpool_info reads the thread count from the BLAS library itself
    def run_blas(env_extra: dict[str, str]) -> str:
        return run_script(BLAS_SCRIPT, env_extra).strip()

    limited, _, after = run_blas({}).split(" ", 2)
    assert limited == "True" and after.strip("[]").split(", ") != [""]
    assert set(after.strip("[]").split(", ")) == {"1"}
    assert run_blas({"CEST_NODE_BLAS_THREADS": "0"}).startswith("False")
