"""Runs quant on an assembled series: normalise, B0, then one method at a time.

The node's only door into quant. It turns an :class:`~node.types.AssembledSeries` into
arrays, calls the pure functions, and hands back maps with what the derive builders need.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

import quant
from quant.registry import METHODS


@dataclass
class Prepared:
    """The Z-spectra of a series after normalisation and B0 correction.

    ``z`` is ``(slices, rows, cols, n_sat)`` with NaN outside the brain mask and where the B0
    shift could not be corrected; ``offsets_ppm`` are sorted; ``m0`` is the reference image.
    """

    z: np.ndarray
    offsets_ppm: np.ndarray
    m0: np.ndarray
    mask: np.ndarray
    shift_ppm: np.ndarray
    valid: np.ndarray
    seconds: dict[str, float]


@dataclass
class MethodResult:
    name: str
    title: str
    unit_ucum: str
    values: np.ndarray
    seconds: float
    n_voxels: int


def prepare(
    signal: np.ndarray,
    offsets_ppm: np.ndarray,
    *,
    m0_threshold_ppm: float = 20.0,
) -> Prepared:
    """Normalise by M0, mask the brain, estimate and correct the B0 shift."""
    seconds: dict[str, float] = {}
    t0 = time.perf_counter()
    spec = quant.normalize(signal, offsets_ppm, m0_threshold_ppm=m0_threshold_ppm)
    mask = quant.brain_mask(spec.m0)
    z = np.where(mask[..., None], spec.z, np.nan).astype(spec.z.dtype, copy=False)
    t1 = time.perf_counter()
    seconds["normalise"] = t1 - t0
    shift = quant.estimate_b0_shift(z, spec.offsets_ppm)
    b0 = quant.correct_b0(z, spec.offsets_ppm, shift_ppm=shift)
    seconds["b0"] = time.perf_counter() - t1
    return Prepared(
        z=b0.z, offsets_ppm=spec.offsets_ppm, m0=spec.m0, mask=mask,
        shift_ppm=b0.shift_ppm, valid=b0.valid, seconds=seconds,
    )


def compute(prep: Prepared, name: str, *, t1_s: np.ndarray | None = None) -> MethodResult:
    """Run one registered method on prepared spectra."""
    info = METHODS[name]
    t0 = time.perf_counter()
    values = info.compute(prep.z, prep.offsets_ppm, t1_s=t1_s)
    values = np.asarray(values, dtype=np.float32)
    seconds = time.perf_counter() - t0
    return MethodResult(
        name=name, title=info.title, unit_ucum=info.unit_ucum, values=values,
        seconds=seconds, n_voxels=int(np.count_nonzero(prep.mask)),
    )


def display_range(values: np.ndarray, *, low: float = 2.0, high: float = 98.0) -> tuple[float, float]:
    """Window for overlays and derived images: the 2nd-98th percentile of valid voxels
    (common practice for automatic windowing), widened to a non-empty interval."""
    v = values[np.isfinite(values)]
    if v.size == 0:
        return (0.0, 1.0)
    lo, hi = (float(x) for x in np.percentile(v, [low, high]))
    if hi - lo < 1e-6:
        lo, hi = lo - 0.5, hi + 0.5
    return (lo, hi)
