"""Benchmark: ingest of a 1,220-instance MR series, DCMTK storescu -> cest-node vs -> storescp.

20 slices x 61 offsets x 128 x 128 uint16 (node.synth's convention, about 33 kB each), loopback,
one association. The anchor is DCMTK ``storescp`` writing every object to disk; the node is
:class:`node.receive.Receiver` (spool write, flushed to the disk with fsync on, and frame
decode into the series stack before each success status; the index row follows in a group
commit, see :mod:`node.spool`). Both peers run with ``TCP_NODELAY=1`` (the node sets it on every
accepted socket). Runs are interleaved (anchor, node, anchor, node, ...) and the ratio is taken
pair by pair, because storescp alone varies by a factor of two or more between runs here.
Every run's files are kept until the end: deleting them between runs (measured, then backed
out) slowed the next storescp run from 0.3-0.5 s to 0.6-0.8 s here, far more than the node's.
The benchmark process gets the node's start-up tuning (:mod:`node.memory`: allocator, heap
reserve, one BLAS thread, GC freeze and thresholds), as :meth:`node.service.Node.start` gives
the receiver in service.

Each configuration (fsync on and off; the fast path on and off; with fsync, the spool's journal
fresh or written over once before, as in a node that has received series before) is its own
set of pairs. The
time is storescu's wall clock, from its start to its exit after the last response; the node's
assembly of the complete series is waited for (not timed) before the next run. The summary
gives the median of the pairwise ratios and their range (the spread between pairs).

Run: ``.venv/bin/python -m tests.bench.bench_ingest [--runs 5] [--no-library] [--tmpfs]``
"""

from __future__ import annotations

import argparse
import logging
import os
import statistics
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from node.config import parse_config
from node.memory import (
    freeze_startup_objects,
    limit_blas_threads,
    reserve_heap,
    tune_allocator,
    tune_gc,
)
from node.receive import Receiver
from node.spool import Spool
from node.synth import series_from_arrays, write_series
from tests.bench import add_tmpfs_option, use_tmpfs
from tests.peers import StoreSCP, storescu

SLICES, OFFSETS, SIZE = 20, 61, 128


def make_files(root: Path) -> list[Path]:
    """The benchmark series written as PS3.10 files (seeded)."""
    rng = np.random.default_rng(2026)
    offs = [-300.0, *np.linspace(-6.0, 6.0, OFFSETS - 1)]
    signal = rng.uniform(0.3, 1.0, (SLICES, SIZE, SIZE, OFFSETS)).astype(np.float32)
    return write_series(series_from_arrays(signal, offs, seed="bench-ingest"), root)


def node_config(spool: Path, *, fsync: bool):
    return parse_config({
        "node": {"port": 0, "spool_dir": str(spool), "fsync": fsync, "idle_timeout_s": 60.0},
        "protocols": [{
            "name": "apt",
            "match": {"attribute": "SeriesDescription", "regex": "^CEST APT phantom"},
            "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"},
            "expected_offsets": OFFSETS, "expected_slices": SLICES,
            "required_offsets_ppm": [],  # the benchmark's grid has no exact +-3.5 ppm
        }],
    })


def warm_journal(spool: Path, n: int = 1300) -> None:
    """Write the spool's journal over once (a series' worth of 34 kB instances of a warm-up
    series, then a checkpoint), as it is in a node that has received series before: its
    later flushes overwrite blocks already written (``tests/bench/bench_spool.py``)."""
    sp = Spool(spool, fsync=True)
    try:
        data = (b"\x00" * 128 + b"DICM", os.urandom(34000))
        for i in range(n):
            sp.store("s-0000000000000000", f"1.2.826.0.1.3680043.10.999.9.{i}", data,
                     protocol="warm-up")
    finally:
        sp.close()  # the checkpoint: the journal starts over, its blocks written


def run_storescp(files: list[Path], folder: Path) -> float:
    with StoreSCP(folder) as scp:
        t0 = time.perf_counter()
        storescu(scp.port, files, called_ae=scp.ae_title)
        return time.perf_counter() - t0


def run_node(files: list[Path], spool: Path, *, fsync: bool, fast_path: bool) -> float:
    done = threading.Event()
    got: list = []

    def on_complete(series) -> None:
        got.append(series)
        done.set()

    with Receiver(node_config(spool, fsync=fsync), on_complete, fast_path=fast_path) as rx:
        t0 = time.perf_counter()
        storescu(rx.port, files)
        elapsed = time.perf_counter() - t0
        if not done.wait(60):
            raise RuntimeError("the node did not assemble the series")
    (series,) = got
    if not series.complete or series.instance_count != len(files):
        raise RuntimeError(f"series incomplete: {series.missing}")
    return elapsed


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5, help="pairs per configuration (>= 5)")
    ap.add_argument("--no-library", action="store_true",
                    help="skip the configurations with the fast path off")
    add_tmpfs_option(ap)
    args = ap.parse_args()
    print(use_tmpfs(args), flush=True)
    logging.basicConfig(level=logging.ERROR)
    tune_allocator()  # the node's start-up tuning, as Node.start applies it (node.memory)
    reserve_heap()
    limit_blas_threads()
    med = statistics.median
    # (fsync, fast path, the spool's journal written before: a node in service)
    configs = [(True, True, False), (True, True, True), (False, True, False)]
    if not args.no_library:
        configs += [(True, False, False), (False, False, False)]
    summary = []
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        files = make_files(root / "series")
        n = len(files)
        freeze_startup_objects()
        tune_gc()
        k = 0
        for fsync, fast, warm in configs:
            name = (f"fsync {'on ' if fsync else 'off'}{', journal warm' if warm else ''}, "
                    f"fast path {'on ' if fast else 'off'}")
            anchor, node, ratios = [], [], []
            for run in range(args.runs):
                k += 1
                if warm:
                    warm_journal(root / f"spool{k}")  # not timed
                a = run_storescp(files, root / f"scp{k}")
                b = run_node(files, root / f"spool{k}", fsync=fsync, fast_path=fast)
                anchor.append(a)
                node.append(b)
                ratios.append(b / a)
                print(f"{name}  pair {run + 1}: storescp {a:5.2f} s  cest-node {b:5.2f} s  "
                      f"ratio {b / a:4.2f}", flush=True)
            summary.append((name, med(anchor), med(node), med(ratios), min(ratios), max(ratios)))
    print(f"\n{n} instances ({SLICES} x {OFFSETS} x {SIZE} x {SIZE}), median of {args.runs} "
          "interleaved pairs:")
    for name, a, b, r, lo, hi in summary:
        print(f"  {name}: storescp {a:5.2f} s ({n / a:4.0f}/s)  cest-node {b:5.2f} s "
              f"({n / b:4.0f}/s)  ratio (pairwise median) {r:4.2f} (pairs {lo:4.2f}-{hi:4.2f})"
              "  goal <= 1.50")


if __name__ == "__main__":
    main()
