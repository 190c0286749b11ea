"""Benchmark: the model-free chain per voxel, and where the time of a series goes per stage.

Part 1, arrays only: the 20 x 128 x 128 x 61 phantom (``make_phantom(slices=20, size=128)``)
through :func:`node.pipeline.prepare` (normalise by M0 and brain mask, B0 estimate and
correction) and :func:`node.pipeline.compute` for every model-free method (AREX and MTRasym/T1
with the phantom's T1 map). Median of ``--runs`` runs, in ns per brain voxel, and as a ratio
to the anchor measured in the same run: one ``numpy.copy`` of the signal array, a single pass
over the data (the memory floor of any stage).

Part 2, end to end: ``--series`` series through the node (DCMTK ``storescu`` -> node -> DCMTK
``storescp``, as :mod:`tests.bench.bench_latency`); the median of every stage of the latency
records' ``stages_ms`` and its share of the median ``total_ms`` (last instance -> all
model-free outputs acknowledged), then the cost model's honesty: the median ratio measured /
predicted of each part (compute, build, send) of each method.

Run: ``.venv/bin/python -m tests.bench.bench_stages [--runs 5] [--series 5] [--slices 20] [--tmpfs]``
"""

from __future__ import annotations

import argparse
import logging
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from node import pipeline
from node.memory import tune_allocator
from quant.phantom import make_phantom
from quant.registry import METHODS
from tests.bench import add_tmpfs_option, use_tmpfs
from tests.bench.bench_latency import make_files, measure


def _time(fn, runs: int) -> list[float]:
    out = []
    for _ in range(runs):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return out


def chain_per_voxel(runs: int, slices: int) -> None:
    ph = make_phantom(slices=slices, size=128, seed=0)
    sig, offs = ph.signal, ph.offsets_ppm
    prep = pipeline.prepare(sig, offs)  # warm
    n_brain = int(np.count_nonzero(prep.mask))
    n_all = int(np.prod(sig.shape[:-1]))
    med = statistics.median
    anchor: list[float] = []
    stages: dict[str, list[float]] = {"normalise": [], "b0": []}
    methods = [m for m, info in METHODS.items() if info.model_free]
    for m in methods:
        stages[m] = []
    for _ in range(runs):  # interleaved: anchor, prepare, methods
        anchor.append(_time(lambda: np.copy(sig), 1)[0])
        p = pipeline.prepare(sig, offs)
        stages["normalise"].append(p.seconds["normalise"])
        stages["b0"].append(p.seconds["b0"])
        for m in methods:
            t1 = ph.t1_s if METHODS[m].needs_t1 else None
            stages[m].append(pipeline.compute(p, m, t1_s=t1).seconds)
    a = med(anchor)
    print(f"model-free chain: {slices} x 128 x 128 x {len(offs)}, {n_brain} brain voxels of "
          f"{n_all}, {runs} runs (medians)")
    print(f"  {'stage':24s} {'ms':>9s} {'ns/brain voxel':>15s} {'x anchor':>9s}")
    print(f"  {'anchor: numpy.copy':24s} {1000 * a:9.1f} {1e9 * a / n_brain:15.1f} {1.0:9.2f}")
    total = 0.0
    for name, ts in stages.items():
        t = med(ts)
        total += t
        print(f"  {name:24s} {1000 * t:9.1f} {1e9 * t / n_brain:15.1f} {t / a:9.2f}")
    print(f"  {'whole chain':24s} {1000 * total:9.1f} {1e9 * total / n_brain:15.1f} "
          f"{total / a:9.2f}")


def stages_end_to_end(n_series: int, slices: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        files = make_files(Path(tmp) / "series", slices=slices)
        print(f"\nend to end: {n_series} series of {len(files)} instances -> storescp",
              flush=True)
        m = measure(files, "storescp", n_series, quiet=True)
    recs = m["records"]
    med = statistics.median
    total = med(r["total_ms"] for r in recs)
    names: list[str] = []
    for r in recs:
        names += [k for k in r["stages_ms"] if k not in names]
    print(f"  median last instance -> all model-free acknowledged: {total:.0f} ms "
          f"(primary {med(r['primary_ms'] for r in recs):.0f} ms)")
    print(f"  {'stage':40s} {'median ms':>10s} {'share':>7s}")
    for k in names:
        v = med(r["stages_ms"].get(k, 0.0) for r in recs)
        print(f"  {k:40s} {v:10.1f} {100 * v / total:6.1f}%")
    print("  (prepare = normalise + b0 + b0_band; it and the stages after it fall after the last "
          "instance)")
    print(f"\n  cost model honesty, median measured / predicted over {len(recs)} series")
    print(f"  {'method':12s} {'part':8s} {'predicted s':>12s} {'measured s':>11s} {'ratio':>7s}")
    for method in recs[0].get("measured_parts_s", {}):
        for part in ("compute", "build", "send", "total"):
            pairs = [(r["predicted_parts_s"][method][part], r["measured_parts_s"][method][part])
                     for r in recs if method in r.get("predicted_parts_s", {})
                     and method in r.get("measured_parts_s", {})]
            if not pairs:
                continue
            p, q = med(x for x, _ in pairs), med(y for _, y in pairs)
            ratio = med(y / x for x, y in pairs if x > 0) if any(x > 0 for x, _ in pairs) else 0
            print(f"  {method:12s} {part:8s} {p:12.4f} {q:11.4f} {ratio:7.2f}")


def main() -> None:
    tune_allocator()  # as `cest-node` does first thing (node.memory)
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--series", type=int, default=5, help="series end to end (0: skip)")
    ap.add_argument("--slices", type=int, default=20)
    add_tmpfs_option(ap)
    args = ap.parse_args()
    print(use_tmpfs(args), flush=True)
    logging.basicConfig(level=logging.ERROR)
    chain_per_voxel(args.runs, args.slices)
    if args.series:
        stages_end_to_end(args.series, args.slices)


if __name__ == "__main__":
    main()
