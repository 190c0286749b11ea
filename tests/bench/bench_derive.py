"""Build times of the output builders for a 20-slice, 128 x 128 series.

Run: ``python -m tests.bench.bench_derive [--repeats N]``. Prints the median of N runs of
each builder beside the target figure of the issue, and, in the same run, the baselines
that explain the choices: the Parametric Map listing all 1,220 source instances
(``further_source_images``) and plain serialisation of the built objects.
"""

from __future__ import annotations

import argparse
import io
import statistics
import time

import numpy as np

from node.derive import BUILDERS, DerivedRequest
from node.synth import PRIVATE_CREATOR, PRIVATE_GROUP, series_from_arrays

SLICES, SIZE, N_OFFSETS = 20, 128, 61
TARGET_MS = {"parametric_map": 250.0, "secondary_capture": 320.0, "derived_mr": 120.0}


def make_requests() -> tuple[DerivedRequest, DerivedRequest]:
    """A request for the node's default (no further sources) and one listing every source."""
    rng = np.random.default_rng(11)
    offsets = [-300.0, *np.linspace(-6.0, 6.0, N_OFFSETS - 1)]
    yy, xx = np.mgrid[:SIZE, :SIZE]
    inside = (yy - SIZE / 2) ** 2 + (xx - SIZE / 2) ** 2 < (0.45 * SIZE) ** 2
    m0 = np.where(inside, 1.0, 0.02).astype(np.float32)
    signal = np.broadcast_to(m0[None, :, :, None], (SLICES, SIZE, SIZE, N_OFFSETS))
    series = series_from_arrays(signal, offsets, seed="bench-derive")
    for ds in series:
        del ds.PixelData
    m0_sets = [d for d in series
               if float(d.private_block(PRIVATE_GROUP, PRIVATE_CREATOR)[0x10].value) == -300.0]
    refs = sorted(m0_sets, key=lambda d: float(d.ImagePositionPatient[2]))
    others = [d for d in series if d not in m0_sets]
    values = rng.normal(1.0, 2.0, (SLICES, SIZE, SIZE)).astype(np.float32)
    values[:, ~inside] = np.nan
    common = dict(references=refs, values=values, method="mtr_asym",
                  title="MTRasym 3.5 ppm (B0-corrected)", unit_ucum="%",
                  series_uid="1.2.826.0.1.3680043.10.2.1", series_number=300,
                  m0=np.broadcast_to(m0 * 3000.0, values.shape).copy(), display_range=(-3.0, 5.0))
    return DerivedRequest(**common), DerivedRequest(**common, sources=others)  # type: ignore[arg-type]


def median_ms(fn, repeats: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        times.append((time.perf_counter() - t) * 1000.0)
    return statistics.median(times), out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7)
    args = parser.parse_args()
    req, req_all = make_requests()
    for build in BUILDERS.values():  # warm-up: first use of highdicom builds its tables
        build(req)
    print(f"{SLICES} slices x {SIZE} x {SIZE}, median of {args.repeats} runs")
    print(f"{'builder':<22}{'ms':>9}{'target ms':>11}{'ratio':>8}{'write ms':>10}")
    for name, build in BUILDERS.items():
        ms, out = median_ms(lambda b=build: b(req), args.repeats)

        def write(datasets=out) -> None:
            for ds in datasets:  # type: ignore[union-attr]
                ds.save_as(io.BytesIO(), enforce_file_format=True)

        wms, _ = median_ms(write, args.repeats)
        print(f"{name:<22}{ms:9.1f}{TARGET_MS[name]:11.0f}{ms / TARGET_MS[name]:8.2f}{wms:10.1f}")
    pm = BUILDERS["parametric_map"]
    ms_all, _ = median_ms(lambda: pm(req_all), max(1, min(3, args.repeats)))
    ms_one, _ = median_ms(lambda: pm(req), args.repeats)
    print(f"parametric_map listing all {len(req_all.sources or [])} further sources: "
          f"{ms_all:.0f} ms vs {ms_one:.0f} ms without ({ms_all / ms_one:.0f}x)")


if __name__ == "__main__":
    main()
