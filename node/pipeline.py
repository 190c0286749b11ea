"""Runs quant on an assembled series: normalise, B0, then one method at a time.

The node's only door into quant. It turns an :class:`~node.types.AssembledSeries` into
arrays, calls the pure functions, and hands back maps with what the derive builders need.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

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
    z_uncorrected: np.ndarray | None = None
    saturation: dict[str, float] = field(default_factory=dict)


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
    saturation: dict[str, float] | None = None,
) -> Prepared:
    """Normalise by M0, mask the brain, estimate and correct the B0 shift.

    ``saturation`` (``b1_ut``, ``tsat_s``, ``field_t``) is kept for the methods that model
    the saturation (Bloch-McConnell fits).
    """
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
        shift_ppm=b0.shift_ppm, valid=b0.valid, seconds=seconds, z_uncorrected=z,
        saturation=dict(saturation or {}),
    )


def _call(info: object, z: np.ndarray, offsets: np.ndarray, t1: np.ndarray | None,
          saturation: dict[str, float]) -> np.ndarray:
    kwargs: dict[str, object] = {"t1_s": t1}
    if getattr(info, "needs_saturation", False):
        kwargs.update(saturation)
    return np.asarray(info.compute(z, offsets, **kwargs), dtype=np.float32)  # type: ignore[attr-defined]


def compute(
    prep: Prepared,
    name: str,
    *,
    t1_s: np.ndarray | None = None,
    chunk_voxels: int | None = None,
    between_chunks: Callable[[int, int], bool] | None = None,
) -> MethodResult:
    """Run one registered method on prepared spectra.

    Model-free methods run on the whole array at once. With ``chunk_voxels``, the method
    runs on the brain voxels in chunks of that many (the fits of the deferred pass), and
    ``between_chunks(done, total)`` is called before each chunk: it may wait (to give way to
    a primary pass) and returns False to abandon the method (shutdown), which raises
    :class:`Abandoned`.
    """
    info = METHODS[name]
    z = prep.z if info.needs_b0 or prep.z_uncorrected is None else prep.z_uncorrected
    t0 = time.perf_counter()
    if chunk_voxels is None:
        values = _call(info, z, prep.offsets_ppm, t1_s, prep.saturation)
    else:
        idx = np.flatnonzero(prep.mask.ravel())
        flat = z.reshape(-1, z.shape[-1])
        t1_flat = None if t1_s is None else np.asarray(t1_s).reshape(-1)
        out = np.full(flat.shape[0], np.nan, dtype=np.float32)
        for start in range(0, idx.size, chunk_voxels):
            if between_chunks is not None and not between_chunks(start, idx.size):
                raise Abandoned(f"{name} abandoned after {start} of {idx.size} voxels")
            sel = idx[start:start + chunk_voxels]
            out[sel] = _call(info, flat[sel], prep.offsets_ppm,
                             None if t1_flat is None else t1_flat[sel], prep.saturation)
        values = out.reshape(z.shape[:-1])
    seconds = time.perf_counter() - t0
    return MethodResult(
        name=name, title=info.title, unit_ucum=info.unit_ucum, values=values,
        seconds=seconds, n_voxels=int(np.count_nonzero(prep.mask)),
    )


class Abandoned(RuntimeError):
    """A chunked method was stopped before its end (the node is shutting down)."""


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
