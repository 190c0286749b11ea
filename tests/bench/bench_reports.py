"""Build times of the per-series report builders for 20 slices x 128 x 128 with 4 methods.

Run: ``python -m tests.bench.bench_reports [--repeats N]``. Prints the median of N runs of
the ReportRequest (validation and the hemisphere statistics of every map), the Structured
Report, the Segmentation and the summary page, each with its written size, and, in the same
run as the baseline, the four per-method Parametric Maps the node builds for the same
series anyway, so the ratio says what the reports add.
"""

from __future__ import annotations

import argparse
import io
import statistics
import time

from node.derive import BUILDERS, REPORT_BUILDERS, DerivedRequest, ReportRequest
from quant.qc import QcFigures, qc_gates
from tests.node.test_derive_reports import METHODS4, make_report_case

SLICES, SIZE = 20, 128


def median_ms(fn, repeats: int) -> tuple[float, object]:
    times, out = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        times.append((time.perf_counter() - t) * 1000.0)
    return statistics.median(times), out


def written_kib(datasets) -> float:
    total = 0
    for ds in datasets:
        buf = io.BytesIO()
        ds.save_as(buf, enforce_file_format=True)
        total += buf.tell()
    return total / 1024.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()
    t = time.perf_counter()
    ph, refs, prep, maps = make_report_case(slices=SLICES, size=SIZE, methods=METHODS4)
    print(f"phantom {SLICES} x {SIZE} x {SIZE}, methods {', '.join(METHODS4)} "
          f"(made in {time.perf_counter() - t:.1f} s); median of {args.repeats} runs")
    figures = QcFigures(b0_low_ppm=-0.3, b0_high_ppm=0.3, sampled_low_ppm=-6.0,
                        sampled_high_ppm=6.0, snr=12.0, max_motion_mm=0.4, valid_fraction=0.97)
    reasons = qc_gates(figures)

    def pms():
        out = []
        for i, (m, (title, unit, values)) in enumerate(maps.items()):
            out += BUILDERS["parametric_map"](DerivedRequest(
                references=refs, values=values, method=m, title=title, unit_ucum=unit,
                series_uid=f"1.2.826.0.1.3680043.10.8.{i + 1}", series_number=400 + i))
        return out

    base_ms, pm_list = median_ms(pms, args.repeats)
    pm_by_method = {m: pm for m, pm in zip(maps, pm_list, strict=True)}

    def request() -> ReportRequest:
        return ReportRequest(references=refs, maps=maps, mask=prep.mask, m0=prep.m0,
                             qc=figures, qc_reasons=reasons, parametric_maps=pm_by_method,
                             series_uid="1.2.826.0.1.3680043.10.8.9", series_number=409)

    req_ms, req = median_ms(request, args.repeats)
    assert isinstance(req, ReportRequest)
    rows = [("ReportRequest (4 maps)", req_ms, None)]
    total = req_ms
    for kind, builder in REPORT_BUILDERS.items():
        ms, out = median_ms(lambda b=builder: b(req), args.repeats)
        rows.append((kind, ms, written_kib(out)))
        total += ms
    rows.append(("all reports", total, None))
    print(f"{'step':<24}{'median ms':>12}{'KiB':>10}{'vs 4 PMs':>10}")
    for name, ms, kib in rows:
        size = f"{kib:10.0f}" if kib is not None else f"{'':>10}"
        print(f"{name:<24}{ms:12.1f}{size}{ms / base_ms:10.2f}")
    print(f"{'baseline: 4 PMs':<24}{base_ms:12.1f}{written_kib(pm_list):10.0f}{1.0:10.2f}")


if __name__ == "__main__":
    main()
