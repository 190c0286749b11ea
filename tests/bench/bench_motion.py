"""Benchmark: registration of 20 slices x 61 frames x 128 x 128 float32 to the M0.

``python -m tests.bench.bench_motion``: median of 5 runs of the batched
:func:`quant.motion.register_frames` beside a per-frame loop of the same function (the
baseline: one call per frame and slice), in the same run; prints the times and the ratio.
"""

from __future__ import annotations

import time

import numpy as np
from scipy import ndimage

from quant.motion import apply_motion, register_frames

SLICES, FRAMES, N = 20, 61, 128
RUNS = 5


def make_data(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    yy, xx = np.mgrid[:N, :N].astype(np.float64)
    brain = ((yy - 64) / 50) ** 2 + ((xx - 62) / 42) ** 2 < 1
    blob = ((yy - 50) / 12) ** 2 + ((xx - 70) / 9) ** 2 < 1
    img = ndimage.gaussian_filter(brain * 1.0 + 0.3 * blob, 1.0) * 100.0
    ref = np.broadcast_to(img, (SLICES, N, N)).astype(np.float32)
    shifts = rng.uniform(-2.0, 2.0, (FRAMES, 2))
    one = apply_motion(
        np.broadcast_to(img[..., None], (N, N, FRAMES)), -shifts[:, 0], -shifts[:, 1]
    )
    sig = np.broadcast_to(one, (SLICES, N, N, FRAMES)) + rng.normal(
        0.0, 2.0, (SLICES, N, N, FRAMES)
    )
    return sig.astype(np.float32), ref, shifts


def batched(sig: np.ndarray, ref: np.ndarray) -> np.ndarray:
    return register_frames(sig, ref).dy_px


def per_frame(sig: np.ndarray, ref: np.ndarray) -> np.ndarray:
    out = np.empty(sig.shape[:1] + sig.shape[-1:])
    for s in range(sig.shape[0]):
        for f in range(sig.shape[-1]):
            out[s, f] = register_frames(sig[s, :, :, f : f + 1], ref[s]).dy_px[0]
    return out


def median_time(fn, *args) -> tuple[float, np.ndarray]:
    times, result = [], None
    for _ in range(RUNS):
        t0 = time.perf_counter()
        result = fn(*args)
        times.append(time.perf_counter() - t0)
    return float(np.median(times)), result


def main() -> None:
    rng = np.random.default_rng(2024)
    sig, ref, shifts = make_data(rng)
    t_batch, dy_b = median_time(batched, sig, ref)
    t_loop, dy_l = median_time(per_frame, sig, ref)
    err = np.abs(dy_b - shifts[None, :, 0]).max()
    print(f"registration {SLICES} slices x {FRAMES} frames x {N} x {N} float32, median of {RUNS}")
    print(f"  batched   : {t_batch:8.3f} s  ({1e3 * t_batch / (SLICES * FRAMES):.2f} ms/frame)")
    print(f"  per frame : {t_loop:8.3f} s  ({1e3 * t_loop / (SLICES * FRAMES):.2f} ms/frame)")
    print(f"  ratio per-frame / batched: {t_loop / t_batch:.2f}")
    print(
        f"  largest |dy error| {err:.4f} px; batched vs loop max diff {np.abs(dy_b - dy_l).max():.2e}"
    )


if __name__ == "__main__":
    main()
