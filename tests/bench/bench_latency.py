"""Benchmark: last instance acknowledged -> outputs acknowledged by the archive, end to end.

The series is the 1,220-instance phantom (20 slices x 61 offsets x 128 x 128,
``quant.phantom.make_phantom(slices=20, size=128)`` through ``node.synth.series_from_arrays``),
written once as files and sent by DCMTK ``storescu`` (``TCP_NODELAY=1``) into a
:class:`node.service.Node` whose destination is the archive: a real Orthanc and, separately, a
DCMTK ``storescp`` writing to disk. The figures come from the node's latency records:

- ``primary_ms``: last instance received -> every object of the primary method (Parametric
  Map, derived MR, Secondary Capture) acknowledged by the archive;
- ``total_ms``: -> every model-free output acknowledged.

Goals on the 2-core development machine: primary median <= 1.0 s, p95 <= 1.5 s; all model-free
outputs <= 2.0 s median. The anchor, measured in the same run and interleaved with the node
runs (A B A B ...), is the plain transfer of the same files by ``storescu`` into ``storescp``
writing to disk: the network floor. Ratios are taken pair by pair.

Each run starts a new node on a new spool (the cost model's start-up calibration is measured
once per process); the model-based deferred pass is off (it runs outside the budget and would
only take CPU from the next run). ``fsync`` is the config's safe default unless ``--no-fsync``.

Run: ``.venv/bin/python -m tests.bench.bench_latency [--runs 5] [--archive both|orthanc|storescp] [--tmpfs]``
"""

from __future__ import annotations

import argparse
import dataclasses
import logging
import statistics
import tempfile
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from node.config import default_config
from node.memory import tune_allocator
from node.service import Node, SeriesOutcome
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.bench import add_tmpfs_option, use_tmpfs
from tests.peers import Orthanc, StoreSCP, storescu

OFFSETS, SIZE = 61, 128


def make_files(folder: Path, *, slices: int, size: int = SIZE, seed: int = 0) -> list[Path]:
    """The phantom series as DICOM files, in acquisition order."""
    ph = make_phantom(slices=slices, size=size, seed=seed)
    assert ph.signal.shape[-1] == OFFSETS, ph.signal.shape
    return write_series(series_from_arrays(ph.signal, ph.offsets_ppm, seed=f"bench-{slices}"),
                        folder)


@contextmanager
def archive(kind: str, folder: Path) -> Iterator[str]:
    """A running archive of ``kind`` (``orthanc`` or ``storescp``); yields its AE@HOST:PORT."""
    if kind == "orthanc":
        with Orthanc(folder) as o:
            yield f"{o.ae_title}@127.0.0.1:{o.dicom_port}"
    elif kind == "storescp":
        with StoreSCP(folder) as s:
            yield f"{s.ae_title}@127.0.0.1:{s.port}"
    else:
        raise ValueError(f"archive: expected 'orthanc' or 'storescp', got {kind!r}")


def node_run(work: Path, dest: str, files: list[Path], *, fsync: bool = True) -> dict[str, Any]:
    """One series through a fresh node; returns its latency record plus the ingest time."""
    base = default_config(base_dir=work)
    proto = dataclasses.replace(base.protocols[0], model_based=False)
    cfg = base.with_overrides(port=0, spool_dir=work / "spool", log_dir=work / "logs",
                              fsync=fsync, destinations=[dest], protocols=(proto,))
    done = threading.Event()
    got: list[SeriesOutcome] = []

    def on_outcome(o: SeriesOutcome) -> None:
        got.append(o)
        done.set()

    with Node(cfg, on_outcome=on_outcome) as node:
        t0 = time.perf_counter()
        storescu(node.port, files)
        ingest = time.perf_counter() - t0
        if not done.wait(300):
            raise RuntimeError("the node did not finish the series within 300 s")
    rec = dict(got[0].record)
    if not got[0].ok:
        raise RuntimeError(f"series failed: {got[0].error}")
    rec["ingest_s"] = ingest
    return rec


def anchor_run(work: Path, files: list[Path]) -> float:
    """The plain transfer: storescu -> storescp writing to disk (seconds)."""
    with StoreSCP(work / "anchor") as scp:
        t0 = time.perf_counter()
        storescu(scp.port, files, called_ae=scp.ae_title)
        return time.perf_counter() - t0


def p95(values: list[float]) -> float:
    """95th percentile, linear interpolation (Hyndman & Fan type 7, numpy's default)."""
    return float(np.percentile(values, 95))


def measure(files: list[Path], kind: str, runs: int, *, fsync: bool = True,
            quiet: bool = False) -> dict[str, Any]:
    """``runs`` interleaved pairs (anchor, node); the per-run figures in seconds."""
    out: dict[str, list[float]] = {"anchor": [], "ingest": [], "primary": [], "total": []}
    records: list[dict[str, Any]] = []
    with tempfile.TemporaryDirectory() as tmp, archive(kind, Path(tmp) / "archive") as dest:
        for i in range(runs):
            work = Path(tmp) / f"run{i}"
            out["anchor"].append(anchor_run(work, files))
            rec = node_run(work, dest, files, fsync=fsync)
            records.append(rec)
            out["ingest"].append(rec["ingest_s"])
            out["primary"].append(rec["primary_ms"] / 1000)
            out["total"].append(rec["total_ms"] / 1000)
            if not quiet:
                print(f"  run {i + 1}: anchor {out['anchor'][-1]:.2f} s, ingest "
                      f"{out['ingest'][-1]:.2f} s, primary {out['primary'][-1]:.2f} s, "
                      f"all model-free {out['total'][-1]:.2f} s, methods "
                      f"{','.join(rec.get('methods', []))}", flush=True)
    return {**out, "records": records}


def report(name: str, m: dict[str, Any]) -> None:
    a, prim, tot, ing = m["anchor"], m["primary"], m["total"], m["ingest"]
    med = statistics.median
    print(f"{name}: {len(a)} runs, {m['records'][0]['instances']} instances")
    print(f"  {'':38s} {'median':>8s} {'p95':>8s}   goal")
    print(f"  {'anchor storescu -> storescp (transfer)':38s} {med(a):8.2f} {p95(a):8.2f}")
    print(f"  {'ingest storescu -> node':38s} {med(ing):8.2f} {p95(ing):8.2f}")
    print(f"  {'last instance -> primary acknowledged':38s} {med(prim):8.2f} {p95(prim):8.2f}"
          f"   median <= 1.0 s, p95 <= 1.5 s: "
          f"{'met' if med(prim) <= 1.0 and p95(prim) <= 1.5 else 'NOT met'}")
    print(f"  {'last instance -> all model-free acked':38s} {med(tot):8.2f} {p95(tot):8.2f}"
          f"   median <= 2.0 s: {'met' if med(tot) <= 2.0 else 'NOT met'}")
    pr = [p / x for p, x in zip(prim, a, strict=True)]
    tr = [t / x for t, x in zip(tot, a, strict=True)]
    ir = [t / x for t, x in zip(ing, a, strict=True)]
    print(f"  ratios to the anchor, pair by pair (median): primary {med(pr):.2f}, all "
          f"model-free {med(tr):.2f}, ingest {med(ir):.2f}")


def main() -> None:
    tune_allocator()  # as `cest-node` does first thing (node.memory)
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--slices", type=int, default=20)
    ap.add_argument("--archive", choices=["both", "orthanc", "storescp"], default="both")
    ap.add_argument("--no-fsync", action="store_true", help="spool without fsync")
    add_tmpfs_option(ap)
    args = ap.parse_args()
    where = use_tmpfs(args)
    logging.basicConfig(level=logging.ERROR)
    if args.runs < 5:
        print("note: fewer than 5 runs; the medians are rough")
    with tempfile.TemporaryDirectory() as tmp:
        files = make_files(Path(tmp) / "series", slices=args.slices)
        kinds = ["orthanc", "storescp"] if args.archive == "both" else [args.archive]
        print(f"series: {len(files)} instances ({args.slices} slices x {OFFSETS} offsets x "
              f"{SIZE} x {SIZE}); fsync {'off' if args.no_fsync else 'on'}; {where}", flush=True)
        for kind in kinds:
            print(f"archive {kind}:", flush=True)
            m = measure(files, kind, args.runs, fsync=not args.no_fsync)
            report(f"node -> {kind}", m)


if __name__ == "__main__":
    main()
