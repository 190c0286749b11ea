"""Benchmark: time from the last instance of a 20-slice series to its primary outputs stored.

The end-to-end setup of tests/node/test_end_to_end.py: DCMTK ``storescu`` sends the phantom
(20 slices of 96 x 96, scrambled order) to a :class:`node.service.Node`, which sends its
derived objects to a real Orthanc. The figure is the latency log's ``primary_ms`` (last
instance received -> every object of the primary method acknowledged by the archive), and
``total_ms`` (-> the last object of the budget-bound pass). Each run is a new series (new UIDs)
and a new spool. Median of ``--runs`` runs. With ``--compare`` the same runs are made without
the outbox's file and database writes (``Node(..., durable=False)``), interleaved, so the two
are side by side from the same run.

Run: ``.venv/bin/python -m tests.bench.bench_primary_latency [--runs 5] [--compare]``
"""

from __future__ import annotations

import argparse
import inspect
import json
import statistics
import tempfile
import threading
from pathlib import Path

from node.config import default_config
from node.memory import tune_allocator
from node.service import Node, SeriesOutcome
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.peers import Orthanc, storescu

SLICES, SIZE = 20, 96


def one_run(work: Path, orthanc: Orthanc, files: list[Path], *, durable: bool) -> dict:
    cfg = default_config(base_dir=work).with_overrides(
        port=0, spool_dir=work / "spool", log_dir=work / "logs", fsync=False,
        destinations=[f"{orthanc.ae_title}@127.0.0.1:{orthanc.dicom_port}"])
    cond = threading.Condition()
    outcomes: list[SeriesOutcome] = []

    def on_outcome(o: SeriesOutcome) -> None:
        with cond:
            outcomes.append(o)
            cond.notify_all()

    kwargs = {"durable": durable} if "durable" in inspect.signature(Node).parameters else {}
    with Node(cfg, on_outcome=on_outcome, **kwargs) as node:
        storescu(node.port, files)
        with cond:
            assert cond.wait_for(lambda: len(outcomes) >= 1, timeout=120)
    rec = json.loads((work / "logs" / "latency.jsonl").read_text().splitlines()[0])
    return {"primary_ms": rec["primary_ms"], "total_ms": rec["total_ms"],
            "objects": outcomes[0].objects}


def main() -> None:
    tune_allocator()  # as `cest-node` does first thing (node.memory)
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--compare", action="store_true",
                    help="also run without the outbox (durable=False), interleaved")
    args = ap.parse_args()
    ph = make_phantom(slices=SLICES, size=SIZE, seed=1)
    modes = [True, False] if args.compare else [True]
    results: dict[bool, list[dict]] = {m: [] for m in modes}
    with tempfile.TemporaryDirectory() as tmp, Orthanc(Path(tmp) / "orthanc") as orthanc:
        for run in range(args.runs):
            for mode in modes:
                work = Path(tmp) / f"run{run}-{mode}"
                ds = series_from_arrays(ph.signal, ph.offsets_ppm, seed=f"bench-{run}-{mode}")
                files = write_series(ds, work / "scanner")
                results[mode].append(one_run(work, orthanc, files, durable=mode))
    for mode in modes:
        p = [r["primary_ms"] for r in results[mode]]
        t = [r["total_ms"] for r in results[mode]]
        print(f"{'outbox' if mode else 'no outbox'}: {SLICES} slices x {SIZE}^2, "
              f"{results[mode][0]['objects']} objects in the budget pass; primary_ms median "
              f"{statistics.median(p):.0f} (runs {', '.join(f'{x:.0f}' for x in p)}); "
              f"total_ms median {statistics.median(t):.0f}")
    if args.compare:
        ratio = (statistics.median(r["primary_ms"] for r in results[True])
                 / statistics.median(r["primary_ms"] for r in results[False]))
        print(f"ratio primary_ms outbox / no outbox: {ratio:.2f}")


if __name__ == "__main__":
    main()
