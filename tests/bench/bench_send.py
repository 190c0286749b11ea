"""Benchmark: node.send pushing a 1,220-instance MR series to DCMTK storescp over one association.

20 slices x 61 offsets x 128 x 128 uint16 (node.synth's convention, about 33 kB each), loopback,
storescp writing to disk with TCP_NODELAY=1. Runs are interleaved with the anchor, DCMTK
``storescu`` sending the same series (as files) to the same kind of storescp, and the ratio is
taken pair by pair. A third column runs the sender without its guard against pynetdicom's
reactor race, to show what the guard saves (stalls of one DIMSE timeout each).

Run: ``.venv/bin/python -m tests.bench.bench_send [--runs 5] [--no-unguarded]``
"""

from __future__ import annotations

import argparse
import logging
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from node.send import Sender, SendSettings
from node.synth import series_from_arrays, write_series
from tests.peers import StoreSCP, storescu


def make_series(slices: int = 20, offsets: int = 61, size: int = 128) -> list:
    rng = np.random.default_rng(2026)
    offs = [-300.0, *np.linspace(-6.0, 6.0, offsets - 1)]
    signal = rng.uniform(0.3, 1.0, (slices, size, size, offsets)).astype(np.float32)
    return series_from_arrays(signal, offs, seed="bench-send")


def run_sender(datasets: list, folder: Path, *, guard: bool) -> tuple[float, int, int, bool]:
    settings = SendSettings(dimse_timeout_s=3.0, guard_reactor_race=guard)
    with StoreSCP(folder) as scp:
        t0 = time.perf_counter()
        report = Sender(settings).send(datasets, (scp.ae_title, "127.0.0.1", scp.port))
        elapsed = time.perf_counter() - t0
    ledger = sum(a.recovered_from_ledger for a in report.attempts)
    return elapsed, len(report.attempts), ledger, report.ok


def run_storescu(files: list[Path], folder: Path) -> float:
    with StoreSCP(folder) as scp:
        t0 = time.perf_counter()
        storescu(scp.port, files, called_ae=scp.ae_title)
        return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--no-unguarded", action="store_true", help="skip the unguarded column")
    args = ap.parse_args()
    logging.basicConfig(level=logging.ERROR)
    datasets = make_series()
    n = len(datasets)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        files = write_series(datasets, root / "series")
        anchor, guarded, unguarded, ratios = [], [], [], []
        extra = {"assoc": [], "ledger": [], "u_assoc": [], "u_ledger": []}
        for run in range(args.runs):
            a = run_storescu(files, root / f"a{run}")
            g, assocs, ledger, ok = run_sender(datasets, root / f"g{run}", guard=True)
            assert ok, "guarded send failed"
            anchor.append(a)
            guarded.append(g)
            ratios.append(g / a)
            extra["assoc"].append(assocs)
            extra["ledger"].append(ledger)
            line = f"run {run + 1}: storescu {a:6.2f} s  node.send {g:6.2f} s ({assocs} assoc, {ledger} ledger)"
            if not args.no_unguarded:
                u, u_assocs, u_ledger, u_ok = run_sender(datasets, root / f"u{run}", guard=False)
                assert u_ok, "unguarded send failed"
                unguarded.append(u)
                extra["u_assoc"].append(u_assocs)
                extra["u_ledger"].append(u_ledger)
                line += f"  unguarded {u:6.2f} s ({u_assocs} assoc, {u_ledger} ledger)"
            print(line, flush=True)
    med = statistics.median
    print(f"\n{n} instances, median of {args.runs}:")
    print(f"  storescu -> storescp (anchor)     {med(anchor):6.2f} s  ({n / med(anchor):5.0f} /s)")
    print(f"  node.send -> storescp (guarded)   {med(guarded):6.2f} s  ({n / med(guarded):5.0f} /s)"
          f"  ratio to anchor, pairwise median {med(ratios):.2f}")
    print(f"    associations per run {extra['assoc']}, responses recovered from the ledger "
          f"{extra['ledger']}")
    if unguarded:
        print(f"  node.send -> storescp (unguarded) {med(unguarded):6.2f} s  max {max(unguarded):.2f} s")
        print(f"    associations per run {extra['u_assoc']}, responses recovered from the ledger "
              f"{extra['u_ledger']}")


if __name__ == "__main__":
    main()
