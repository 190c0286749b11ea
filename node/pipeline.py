"""Runs quant on an assembled series: normalise, B0, then one method at a time.

The node's only door into quant. It turns an :class:`~node.types.AssembledSeries` into
arrays, calls the pure functions, and hands back maps with what the derive builders need.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

import quant
from quant.motion import register_frames
from quant.registry import METHODS, band_columns
from quant.wassr import wassr_shift

if TYPE_CHECKING:
    from node.config import Protocol
    from node.types import AssembledSeries


@dataclass
class FrameMotion:
    """The in-plane motion of every frame (``(slices, n_offsets)`` arrays, columns of the
    assembled signal, :class:`quant.motion.MotionResult` sign convention), for QC."""

    dy_mm: np.ndarray
    dx_mm: np.ndarray
    angle_deg: np.ndarray | None
    measured: np.ndarray
    offsets_ppm: np.ndarray
    max_displacement_mm: float


@dataclass
class Prepared:
    """The Z-spectra of a series after normalisation, with their B0 shift.

    The spectra are kept for the brain voxels only: ``zv_uncorrected`` is
    ``(n_voxels, n_sat)``, row ``i`` the voxel at flat index ``index[i]`` of the
    ``(slices, rows, cols)`` volume (``index`` is ``flatnonzero(mask)``); ``shift_v`` is each
    row's B0 shift. The B0-corrected rows :attr:`zv` (NaN where the shift could not be
    corrected) are computed on first use, for the methods that read the whole spectrum (the
    fits of the deferred pass); the model-free methods read a few offsets only and get just
    the columns around them (:meth:`band`), so the budget-bound pass never resamples the
    whole spectrum. ``offsets_ppm`` are sorted; ``m0`` is the reference image; :attr:`z` is
    the whole volume (NaN outside the mask), built on first use.
    """

    zv_uncorrected: np.ndarray
    shift_v: np.ndarray
    index: np.ndarray
    offsets_ppm: np.ndarray
    m0: np.ndarray
    mask: np.ndarray
    shift_ppm: np.ndarray
    valid: np.ndarray
    seconds: dict[str, float]
    saturation: dict[str, float] = field(default_factory=dict)
    t1_s: np.ndarray | None = None
    """T1 (s) per voxel from a T1 companion, NaN where unknown; None without one."""
    b1_rel: np.ndarray | None = None
    """Relative B1 (1 = nominal) from a B1 companion; None without one."""
    b1_outside: np.ndarray | None = None
    """Brain voxels whose relative B1 is unknown or off nominal by more than the tolerance."""
    motion: FrameMotion | None = None
    """Motion of every frame when motion correction ran."""
    b0_source: str = "internal"
    """``"internal"`` (estimated from the Z-spectra) or ``"wassr"``."""
    m0_source: str = "series"
    """``"series"`` (the series' own M0 frames) or ``"companion"``."""
    corrected: np.ndarray | None = field(default=None, repr=False)
    """The B0-corrected rows once computed (or given: :meth:`of_voxels`)."""
    given: bool = False
    """``corrected`` was given, not computed from ``zv_uncorrected`` and ``shift_v``."""
    m0_range: tuple[float, float] | None = None
    """The grey window of ``m0`` under the colour overlays, once computed (the node's
    Processor sets it; every method's Secondary Capture uses it)."""
    _cache: dict[object, np.ndarray] = field(default_factory=dict, repr=False, compare=False)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False, compare=False)

    def __getstate__(self) -> dict[str, object]:
        """Picklable (the Dask engine ships jobs): without the lock and the cached views."""
        state = dict(self.__dict__)
        state["_lock"] = None
        state["_cache"] = {}
        return state

    def __setstate__(self, state: dict[str, object]) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()

    @classmethod
    def of_voxels(cls, z: np.ndarray, offsets_ppm: np.ndarray, *,
                  z_uncorrected: np.ndarray | None = None,
                  saturation: dict[str, float] | None = None) -> Prepared:
        """Spectra ``(n, n_sat)`` taken as they are (every voxel valid, no shift): a chunk of
        voxels on a worker (:mod:`node.distributed`); ``z`` is taken as corrected."""
        n = z.shape[0]
        zero = np.zeros(n, dtype=z.dtype)
        return cls(zv_uncorrected=z if z_uncorrected is None else z_uncorrected, shift_v=zero,
                   index=np.arange(n), offsets_ppm=offsets_ppm,
                   m0=np.ones(n, dtype=z.dtype), mask=np.ones(n, dtype=bool),
                   shift_ppm=zero, valid=np.ones(n, dtype=bool), seconds={},
                   saturation=dict(saturation or {}), corrected=z, given=True)

    @property
    def zv(self) -> np.ndarray:
        """``(n_voxels, n_sat)`` B0-corrected rows (computed on first use)."""
        with self._lock:
            if self.corrected is None:
                t0 = time.perf_counter()
                self.corrected = quant.resample_shifted(self.zv_uncorrected, self.offsets_ppm,
                                                        self.shift_v)
                self.seconds["b0_resample"] = time.perf_counter() - t0
            return self.corrected

    def band(self, reads_ppm: tuple[float, ...]) -> tuple[np.ndarray, np.ndarray]:
        """B0-corrected rows at (at least) the columns a method reading ``reads_ppm`` needs
        (:func:`quant.registry.band_columns`) and their offsets. The same values as those
        columns of :attr:`zv` (the same spline, evaluated at fewer points).

        One resample serves every model-free method: the columns all of them read (their
        union, with ``reads_ppm``). It is returned whole, not cut to the method's own
        columns: a model-free measure reads the samples nearest each offset it reads
        (:func:`quant.measures.z_at`), and the union holds the same nearest samples with the
        same margin, so the values are the same bit for bit (tested), without a copy of the
        band per method (12 of 20 columns of 353,000 rows: 11.5 ms at 40 slices here)."""
        union = band_columns(self.offsets_ppm, tuple(sorted(
            {*reads_ppm, *(t for m in METHODS.values() if m.model_free and m.reads_ppm
                           for t in m.reads_ppm)})))
        key = ("band", tuple(union.tolist()))
        with self._lock:
            if key not in self._cache:
                if self.given:
                    assert self.corrected is not None
                    self._cache[key] = self.corrected[:, union]
                else:
                    t0 = time.perf_counter()
                    self._cache[key] = quant.resample_shifted(
                        self.zv_uncorrected, self.offsets_ppm, self.shift_v, columns=union)
                    self.seconds["b0_band"] = time.perf_counter() - t0
            band = self._cache[key]
        return band, self.offsets_ppm[union]

    def volume(self, rows: np.ndarray) -> np.ndarray:
        """Per-voxel rows ``(n_voxels, ...)`` scattered into the volume, NaN elsewhere."""
        out = np.full((self.mask.size, *rows.shape[1:]), np.nan, dtype=rows.dtype)
        out[self.index] = rows
        return out.reshape(*self.mask.shape, *rows.shape[1:])

    @property
    def z(self) -> np.ndarray:
        """``(slices, rows, cols, n_sat)`` B0-corrected spectra, NaN outside the mask."""
        if "z" not in self._cache:
            self._cache["z"] = self.volume(self.zv)
        return self._cache["z"]

    @property
    def z_uncorrected(self) -> np.ndarray:
        """:attr:`z` before the B0 correction."""
        if "zu" not in self._cache:
            self._cache["zu"] = self.volume(self.zv_uncorrected)
        return self._cache["zu"]


@dataclass
class MethodResult:
    name: str
    title: str
    unit_ucum: str
    values: np.ndarray
    seconds: float
    n_voxels: int
    _display: tuple[float, float] | None = field(default=None, repr=False, compare=False)

    @property
    def display(self) -> tuple[float, float]:
        """:func:`display_range` of :attr:`values`, computed once: every output of the map
        and the reports use it (two percentiles of up to a few hundred thousand voxels, about
        10 ms each at 40 slices here)."""
        if self._display is None:
            self._display = display_range(self.values)
        return self._display


def prepare(
    signal: np.ndarray,
    offsets_ppm: np.ndarray,
    *,
    m0_threshold_ppm: float = 20.0,
    saturation: dict[str, float] | None = None,
    m0: np.ndarray | None = None,
    b0_shift_ppm: np.ndarray | None = None,
    t1_s: np.ndarray | None = None,
    b1_rel: np.ndarray | None = None,
    b1_tolerance: float = 0.2,
    motion_correction: bool = False,
    motion_rotation: bool = False,
    spacing_mm: tuple[float, float] = (1.0, 1.0),
    frame_times: np.ndarray | None = None,
) -> Prepared:
    """Optionally register the frames, normalise by M0, mask the brain, correct the B0 shift.

    ``saturation`` (``b1_ut``, ``tsat_s``, ``field_t``) is kept for the methods that model
    the saturation (Bloch-McConnell fits). The companions (``m0``, ``b0_shift_ppm`` from a
    WASSR series, ``t1_s``, ``b1_rel``, all ``(slices, rows, cols)``) replace or add to what
    the series gives:

    * ``m0``: the reference for ``Z = S / M0`` (the series' own M0 frames are then dropped).
    * ``b0_shift_ppm``: used as the B0 shift instead of the internal estimate; voxels where it
      is NaN are invalid (NaN in ``z``).
    * ``t1_s`` and ``b1_rel`` are kept in the result; ``b1_outside`` marks brain voxels with
      ``|b1_rel - 1| > b1_tolerance`` or unknown B1.
    * ``motion_correction``: every frame is registered to the M0 (``m0``, or the mean of the
      series' M0 frames) by :func:`quant.motion.register_frames` (translation, plus rotation
      with ``motion_rotation``; one motion per frame shared by all slices, since a rigid head
      moves every slice together), in ``spacing_mm`` (PixelSpacing order); ``frame_times``
      (acquisition order of each column) guides the interpolation of low-signal frames.
    """
    seconds: dict[str, float] = {}
    motion: FrameMotion | None = None
    offsets_ppm = np.asarray(offsets_ppm, dtype=np.float64)
    if motion_correction:
        t0 = time.perf_counter()
        if m0 is not None:
            ref = np.asarray(m0, dtype=signal.dtype)
        else:
            is_m0 = np.abs(offsets_ppm) >= m0_threshold_ppm
            if not is_m0.any():
                raise ValueError("motion correction needs an M0: the series has no frame at "
                                 f"|offset| >= {m0_threshold_ppm:g} ppm and no M0 companion")
            ref = np.nanmean(signal[..., is_m0], axis=-1)
        res = register_frames(np.nan_to_num(signal), np.nan_to_num(ref), spacing_mm=spacing_mm,
                              rotation=motion_rotation, shared_across_slices=True,
                              frame_times=frame_times)
        signal = np.where(np.isnan(signal), np.nan, res.aligned).astype(signal.dtype)
        motion = FrameMotion(res.dy_mm, res.dx_mm, res.angle_deg, res.measured, offsets_ppm,
                             res.max_displacement_mm)
        seconds["motion"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    signal = np.asarray(signal)
    ref = quant.m0_reference(signal, offsets_ppm, m0=m0, m0_threshold_ppm=m0_threshold_ppm)
    mask = quant.brain_mask(ref)
    index = np.flatnonzero(mask.ravel())
    # only the brain voxels from here on, gathered, sorted and normalised in one pass; every
    # stage after it works on (n_voxels, n)
    spec = quant.normalize(signal, offsets_ppm, m0=ref, m0_threshold_ppm=m0_threshold_ppm,
                           voxels=index)
    zv = spec.z
    t1 = time.perf_counter()
    seconds["normalise"] = t1 - t0
    given_v = None
    if b0_shift_ppm is not None:
        shift = np.asarray(b0_shift_ppm)
        if shift.shape != mask.shape:
            raise ValueError(f"b0_shift_ppm has shape {shift.shape}, the series "
                             f"{mask.shape}")
        shift = shift.astype(zv.dtype, copy=False)
        given_v = shift.reshape(-1)[index]
    if given_v is None:
        shift_v = quant.estimate_b0_shift(zv, spec.offsets_ppm)
        shift = np.full(mask.shape, np.nan, dtype=zv.dtype)
        shift.reshape(-1)[index] = shift_v
    else:
        shift_v = given_v
    valid = np.zeros(mask.shape, dtype=bool)
    # as quant.correct_b0 has it: the shift known and the spectrum finite
    valid.reshape(-1)[index] = np.isfinite(shift_v) & quant.finite_rows(zv)
    seconds["b0"] = time.perf_counter() - t1
    b1_outside = None
    if b1_rel is not None:
        b1_rel = np.asarray(b1_rel, dtype=np.float32)
        if b1_rel.shape != mask.shape:
            raise ValueError(f"b1_rel has shape {b1_rel.shape}, the series {mask.shape}")
        with np.errstate(invalid="ignore"):
            b1_outside = mask & ~(np.abs(b1_rel - 1.0) <= b1_tolerance)
    if t1_s is not None and np.shape(t1_s) != mask.shape:
        raise ValueError(f"t1_s has shape {np.shape(t1_s)}, the series {mask.shape}")
    return Prepared(
        zv_uncorrected=zv, shift_v=shift_v, index=index, offsets_ppm=spec.offsets_ppm,
        m0=ref, mask=mask, shift_ppm=shift, valid=valid, seconds=seconds,
        saturation=dict(saturation or {}),
        t1_s=None if t1_s is None else np.asarray(t1_s, dtype=np.float32),
        b1_rel=b1_rel, b1_outside=b1_outside, motion=motion,
        b0_source="internal" if b0_shift_ppm is None else "wassr",
        m0_source="series" if m0 is None else "companion",
    )


def _frame_times(series: AssembledSeries) -> np.ndarray | None:
    """AcquisitionNumber of each column in the first slice, when every column has a distinct
    one (classic series); None otherwise (the frame index is then used)."""
    row = series.sources[0] if series.sources else []
    try:
        times = [float(ds.AcquisitionNumber) for ds in row]  # type: ignore[union-attr]
    except (AttributeError, TypeError, ValueError):
        return None
    return np.asarray(times) if len(set(times)) == len(times) else None


def prepare_series(series: AssembledSeries, protocol: Protocol) -> Prepared:
    """:func:`prepare` for an assembled series with its protocol's settings and companions.

    M0, WASSR, T1 and B1 companions (``series.companions``) are used as :func:`prepare`
    describes; the WASSR shift comes from :func:`quant.wassr.wassr_shift` with the rule's
    method. ``motion_correction`` and ``motion_rotation`` come from the protocol.
    """
    comps = series.companions
    seconds: dict[str, float] = {}
    shift = None
    if "wassr" in comps:
        t0 = time.perf_counter()
        rule = protocol.companion("wassr")
        w = comps["wassr"]
        assert w.offsets_ppm is not None
        shift = wassr_shift(w.values, w.offsets_ppm,
                            method=rule.wassr_method if rule is not None else "symmetry"
                            ).shift_ppm
        seconds["wassr"] = time.perf_counter() - t0
    b1_rule = protocol.companion("b1")
    spacing = (1.0, 1.0)
    if series.references and "PixelSpacing" in series.references[0]:
        ps = series.references[0].PixelSpacing
        spacing = (float(ps[0]), float(ps[1]))
    prep = prepare(
        series.signal, series.offsets_ppm, m0_threshold_ppm=protocol.m0_threshold_ppm,
        saturation={"b1_ut": protocol.b1_ut, "tsat_s": protocol.tsat_s,
                    "field_t": protocol.field_t},
        m0=comps["m0"].values if "m0" in comps else None,
        b0_shift_ppm=shift,
        t1_s=comps["t1"].values if "t1" in comps else None,
        b1_rel=comps["b1"].values if "b1" in comps else None,
        b1_tolerance=b1_rule.b1_tolerance if b1_rule is not None else 0.2,
        motion_correction=protocol.motion_correction,
        motion_rotation=protocol.motion_rotation,
        spacing_mm=spacing,
        frame_times=_frame_times(series) if protocol.motion_correction else None,
    )
    prep.seconds = {**seconds, **prep.seconds}
    return prep


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

    ``t1_s`` defaults to the T1 companion's map (``prep.t1_s``) when there is one.
    Model-free methods run on the whole array at once. With ``chunk_voxels``, the method
    runs on the brain voxels in chunks of that many (the fits of the deferred pass), and
    ``between_chunks(done, total)`` is called before each chunk: it may wait (to give way to
    a primary pass) and returns False to abandon the method (shutdown), which raises
    :class:`Abandoned`.
    """
    info = METHODS[name]
    if t1_s is None:
        t1_s = prep.t1_s
    offsets = prep.offsets_ppm
    if not info.needs_b0:
        zv = prep.zv_uncorrected
    elif info.reads_ppm is not None:
        zv, offsets = prep.band(info.reads_ppm)
    else:
        zv = prep.zv
    t1_v = None if t1_s is None else np.asarray(t1_s).reshape(-1)[prep.index]
    t0 = time.perf_counter()
    if chunk_voxels is None:
        rows = _call(info, zv, offsets, t1_v, prep.saturation)
    else:
        rows = np.full(zv.shape[0], np.nan, dtype=np.float32)
        for start in range(0, zv.shape[0], chunk_voxels):
            if between_chunks is not None and not between_chunks(start, zv.shape[0]):
                raise Abandoned(f"{name} abandoned after {start} of {zv.shape[0]} voxels")
            end = start + chunk_voxels
            rows[start:end] = _call(info, zv[start:end], offsets,
                                    None if t1_v is None else t1_v[start:end], prep.saturation)
    values = prep.volume(rows)
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
