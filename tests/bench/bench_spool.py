"""Benchmark: the spool's durable write of one instance (``fsync`` on), with and without its
journal, and with the journal fresh or already written once.

``node.spool.Spool.store`` of 34 kB instances (the size of a 128 x 128 MR image), one thread, on
the spool's own file system. Without the journal every instance is flushed twice (its data,
then its folder's new name); with it, once (its bytes appended to the journal). The journal's
first pass over its file converts preallocated extents as it writes them (a metadata commit
per flush); later passes overwrite blocks already written, and their flush is data only. Each
configuration stores ``--rounds`` rounds of ``--instances`` instances (a checkpoint between
rounds) and prints the median store time of each round, then the ratios to the plain flushes
measured in the same run.

Run: ``.venv/bin/python -m tests.bench.bench_spool [--instances 600] [--rounds 3]``
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
from pathlib import Path

from node.spool import Spool


def rounds(root: Path, journal_mb: int, n: int, k: int) -> list[float]:
    """Median seconds per store for each of ``k`` rounds of ``n`` instances."""
    os.environ["CEST_NODE_SPOOL_JOURNAL_MB"] = str(journal_mb)
    data = (b"\x00" * 128 + b"DICM" + b"\x00" * 200, os.urandom(34000))
    sp = Spool(root, fsync=True)
    out = []
    try:
        for r in range(k):
            ts = []
            for i in range(n):
                t0 = time.perf_counter()
                sp.store(f"s-{r:016x}", f"1.2.826.0.1.3680043.10.999.{r}.{i}", data,
                         protocol="bench")
                ts.append(time.perf_counter() - t0)
            if sp._journal is not None:
                sp._journal.checkpoint()  # as the idle spool does between series
            out.append(statistics.median(ts))
    finally:
        sp.close()
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--instances", type=int, default=600)
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    saved = os.environ.get("CEST_NODE_SPOOL_JOURNAL_MB")
    try:
        with tempfile.TemporaryDirectory() as tmp:
            plain = rounds(Path(tmp) / "plain", 0, args.instances, args.rounds)
            journal = rounds(Path(tmp) / "journal", 256, args.instances, args.rounds)
    finally:
        if saved is None:
            os.environ.pop("CEST_NODE_SPOOL_JOURNAL_MB", None)
        else:
            os.environ["CEST_NODE_SPOOL_JOURNAL_MB"] = saved
    print(f"Spool.store with fsync, 34 kB instances, median of {args.instances} per round:")
    for r, (a, b) in enumerate(zip(plain, journal, strict=True)):
        kind = "fresh journal" if r == 0 else "journal written before"
        print(f"  round {r + 1}: plain flushes {1e6 * a:5.0f} us   journal {1e6 * b:5.0f} us "
              f"({kind})   ratio {b / a:4.2f}")


if __name__ == "__main__":
    main()
