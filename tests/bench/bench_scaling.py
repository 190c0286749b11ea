"""Benchmark: how the latency after the last instance grows with the series size.

The setup of :mod:`tests.bench.bench_latency` (DCMTK ``storescu`` -> node -> archive, the
phantom at 61 offsets x 128 x 128) at 5, 20 and 40 slices (305, 1,220 and 2,440 instances).
For each size: medians of ``--runs`` runs of ``primary_ms`` and ``total_ms`` (last instance
received -> primary / all model-free outputs acknowledged), beside the anchor measured
interleaved in the same run (the plain ``storescu`` -> ``storescp`` transfer of the same files).
The slopes are least-squares lines through the medians against the instance count (ms per 100
instances), and the growth from the smallest to the largest series is set beside the growth of
the series itself: the latency after the last instance should grow far slower than the size.

Run: ``.venv/bin/python -m tests.bench.bench_scaling [--runs 5] [--slices 5 20 40]
[--archive storescp|orthanc] [--tmpfs]``
"""

from __future__ import annotations

import argparse
import logging
import statistics
import tempfile
from pathlib import Path

import numpy as np

from node.memory import tune_allocator
from tests.bench import add_tmpfs_option, use_tmpfs
from tests.bench.bench_latency import make_files, measure, p95


def main() -> None:
    tune_allocator()  # as `cest-node` does first thing (node.memory)
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--slices", type=int, nargs="+", default=[5, 20, 40])
    ap.add_argument("--archive", choices=["orthanc", "storescp"], default="storescp")
    ap.add_argument("--no-fsync", action="store_true")
    add_tmpfs_option(ap)
    args = ap.parse_args()
    print(use_tmpfs(args), flush=True)
    logging.basicConfig(level=logging.ERROR)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for slices in args.slices:
            files = make_files(Path(tmp) / f"s{slices}", slices=slices)
            print(f"{slices} slices ({len(files)} instances) -> {args.archive}:", flush=True)
            m = measure(files, args.archive, args.runs, fsync=not args.no_fsync)
            rows.append((slices, len(files), m))
    med = statistics.median
    print(f"\n{'slices':>6s} {'instances':>9s} {'anchor s':>9s} {'ingest s':>9s} "
          f"{'primary s':>10s} {'p95':>6s} {'all MF s':>9s} {'p95':>6s}")
    for slices, n, m in rows:
        print(f"{slices:6d} {n:9d} {med(m['anchor']):9.2f} {med(m['ingest']):9.2f} "
              f"{med(m['primary']):10.2f} {p95(m['primary']):6.2f} {med(m['total']):9.2f} "
              f"{p95(m['total']):6.2f}")
    if len(rows) >= 2:
        n = np.array([r[1] for r in rows], dtype=float)
        for label, key in (("anchor transfer", "anchor"), ("ingest", "ingest"),
                           ("primary", "primary"), ("all model-free", "total")):
            y = np.array([med(r[2][key]) for r in rows])
            slope, _ = np.polyfit(n, y, 1)
            growth = y[-1] / y[0]
            print(f"slope {label:16s} {1000 * slope * 100:8.1f} ms per 100 instances; "
                  f"x{growth:.2f} from {int(n[0])} to {int(n[-1])} instances "
                  f"(series x{n[-1] / n[0]:.1f})")


if __name__ == "__main__":
    main()
