"""Companion series of a saturation series: a separate M0, a WASSR series, a T1 map, a B1 map.

A protocol lists its companions (``[[protocols.companions]]``, :class:`~node.config.CompanionRule`),
each found among the instances of the *same study* by its own match rule. The assembler keeps
their frames here as they arrive (:class:`CompanionStore`, before or after the saturation
series), and when a saturation series completes it waits up to each rule's ``timeout_s`` for a
*ready* companion of every configured kind. A companion series is ready when it holds its
ImagesInAcquisition (0020,1002) frames, or else when no instance of it has arrived for the
node's ``release_grace_s``. When several series of one kind exist in the study, the one whose
last instance arrived last is used.

Placement (:func:`attach`): a companion slice serves a saturation slice when their positions
along the slice normal (``ImagePositionPatient . (row x column)``, PS3.3 C.7.6.2.1.1) agree
within ``slice_tolerance_mm``; the matrix, the orientation (direction cosines within 1e-3), the
pixel spacing (relative 1e-3) and the in-plane origin (within half a pixel) must agree too:
no resampling is done, a companion that does not line up is left out with a note naming the
problem. Repeated frames of one slice are averaged (M0, T1, B1).

Values:

* M0 and WASSR: signal after the Modality LUT (Rescale Slope/Intercept, PS3.3 C.11.1). WASSR
  frames at ``|offset| >= m0_threshold_ppm`` are dropped (the shift estimator scales each voxel
  by its own baseline); the columns are sorted by offset and every slice must hold the same
  offsets.
* T1 in seconds and B1 relative to nominal: a Real World Value Mapping (0040,9096) of the
  instance (or of the frame's functional groups) whose MeasurementUnitsCodeSequence is a UCUM
  unit we know (T1: ``s``, ``ms``; B1: ``%``, ``1``, ``{ratio}``) maps the *stored* values
  (``value = stored * RealWorldValueSlope + RealWorldValueIntercept``, PS3.3 C.7.6.16.2.11);
  otherwise the Modality LUT output times the rule's ``scale``, in the rule's ``unit``.
  Values ``<= 0`` (background, failed fits) become NaN.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np
from pydicom import Dataset

from node.config import CompanionRule, Protocol
from node.types import AssembledSeries, Companion

__all__ = [
    "CompanionFrame",
    "CompanionSeries",
    "CompanionStore",
    "attach",
    "to_physical",
]

OFFSET_TOLERANCE_PPM = 1e-3
_UNIT_FACTORS = {
    "t1": {"s": 1.0, "ms": 1e-3},
    "b1": {"relative": 1.0, "1": 1.0, "{ratio}": 1.0, "ratio": 1.0, "percent": 0.01, "%": 0.01},
}


@dataclass
class CompanionFrame:
    """One decoded frame of a companion series (values already in the kind's unit)."""

    position_mm: float
    origin: tuple[float, float, float]  # ImagePositionPatient
    values: np.ndarray  # (rows, cols) float32
    offset_ppm: float = math.nan  # WASSR only


@dataclass
class CompanionSeries:
    """The frames of one companion series received so far."""

    key: str
    study_uid: str
    protocol: str
    rule: CompanionRule
    rows: int
    cols: int
    orientation: tuple[float, ...]
    spacing: tuple[float, float]
    expected: int | None = None
    frames: list[CompanionFrame] = field(default_factory=list)
    sops: set[str] = field(default_factory=set)
    last_at: float = 0.0  # monotonic
    unit_detail: str = ""

    def ready(self, now: float, grace_s: float) -> bool:
        """All ImagesInAcquisition frames are here, or nothing came for ``grace_s``."""
        if self.expected is not None and len(self.frames) >= self.expected:
            return True
        return now - self.last_at >= grace_s

    def ready_at(self, grace_s: float) -> float:
        """When :meth:`ready` turns true if nothing more arrives (monotonic)."""
        if self.expected is not None and len(self.frames) >= self.expected:
            return -math.inf
        return self.last_at + grace_s

    def snapshot(self) -> CompanionSeries:
        """A copy whose frame list no longer grows (handed to the worker thread)."""
        return CompanionSeries(self.key, self.study_uid, self.protocol, self.rule, self.rows,
                               self.cols, self.orientation, self.spacing, self.expected,
                               list(self.frames), set(self.sops), self.last_at, self.unit_detail)


class CompanionStore:
    """Companion series by study, kept ``retention_s`` after their last instance.

    Not thread-safe by itself: the :class:`~node.assemble.Assembler` calls it under its lock.
    At most ``max_series`` series are kept (the oldest go first).
    """

    def __init__(self, *, retention_s: float = 4 * 3600.0, max_series: int = 64):
        self.retention_s = retention_s
        self.max_series = max_series
        self._series: dict[str, CompanionSeries] = {}

    def __len__(self) -> int:
        return len(self._series)

    def add(self, series: CompanionSeries, sop_uid: str, frames: Iterable[CompanionFrame],
            now: float) -> bool:
        """Add one instance's frames; False for a SOP Instance UID already held (ignored).

        ``series`` describes the instance's series; the first instance of a series defines
        its matrix and orientation.

        Raises
        ------
        ValueError
            The instance's matrix or orientation differs from its series'.
        """
        self._expire(now)
        held = self._series.get(series.key)
        if held is None:
            held = series
            self._series[series.key] = held
            while len(self._series) > self.max_series:
                oldest = min(self._series.values(), key=lambda c: c.last_at)
                del self._series[oldest.key]
        elif (series.rows, series.cols) != (held.rows, held.cols):
            raise ValueError(f"Rows/Columns: {series.rows} x {series.cols} differs from the "
                             f"companion series' {held.rows} x {held.cols}")
        elif not np.allclose(series.orientation, held.orientation, atol=1e-4):
            raise ValueError("ImageOrientationPatient: differs from the companion series'")
        if sop_uid in held.sops:
            return False
        held.sops.add(sop_uid)
        held.frames.extend(frames)
        held.last_at = now
        if series.expected is not None:
            held.expected = series.expected
        return True

    def find(self, study_uid: str, protocol: str, kind: str) -> CompanionSeries | None:
        """The companion of this study, protocol and kind whose last instance came last."""
        found = [c for c in self._series.values() if c.study_uid == study_uid
                 and c.protocol == protocol and c.rule.kind == kind]
        return max(found, key=lambda c: c.last_at) if found else None

    def _expire(self, now: float) -> None:
        for key in [k for k, c in self._series.items() if now - c.last_at > self.retention_s]:
            del self._series[key]


# --------------------------------------------------------------------------- values
def _known_unit(code: str, kind: str) -> bool:
    return code in _UNIT_FACTORS.get(kind, {})


def to_physical(stored: np.ndarray, cands: list[Dataset], rule: CompanionRule
                ) -> tuple[np.ndarray, str]:
    """Stored pixel values of one frame in the kind's unit (T1: s, B1: relative).

    ``cands`` are the datasets searched for the frame's attributes, most specific first (the
    frame's functional group items, the shared ones, the top level). See the module docstring
    for the rule. Returns the values (float32, NaN where ``<= 0``) and how they were read.
    """
    kind = rule.kind
    for d in cands:
        for item in d.get("RealWorldValueMappingSequence", []) or []:
            units = item.get("MeasurementUnitsCodeSequence") or []
            code = str(units[0].get("CodeValue", "")) if len(units) else ""
            if not _known_unit(code, kind) or "RealWorldValueSlope" not in item:
                continue
            slope = float(item.RealWorldValueSlope)
            icpt = float(item.get("RealWorldValueIntercept", 0.0) or 0.0)
            values = (stored.astype(np.float64) * slope + icpt) * _UNIT_FACTORS[kind][code]
            return _positive(values), f"Real World Value Mapping in {code}"
    slope, icpt = 1.0, 0.0
    for d in cands:  # the most specific Modality LUT
        if "RescaleSlope" in d or "RescaleIntercept" in d:
            slope = float(d.get("RescaleSlope", 1.0) or 1.0)
            icpt = float(d.get("RescaleIntercept", 0.0) or 0.0)
            break
    values = (stored.astype(np.float64) * slope + icpt) * rule.scale
    if kind in _UNIT_FACTORS:
        values = values * _UNIT_FACTORS[kind][rule.unit]
        return _positive(values), f"rule unit {rule.unit} x {rule.scale:g}"
    return values.astype(np.float32), "signal"


def _positive(values: np.ndarray) -> np.ndarray:
    out = values.astype(np.float32)
    out[~(out > 0)] = np.nan
    return out


# --------------------------------------------------------------------------- placement
def _geometry(ref: Dataset) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    o = np.array([float(v) for v in ref.ImageOrientationPatient])
    ipp = np.array([float(v) for v in ref.ImagePositionPatient])
    sp = np.array([float(v) for v in ref.PixelSpacing])
    return o[:3], o[3:], ipp, sp


def _place_one(series: AssembledSeries, comp: CompanionSeries, m0_threshold_ppm: float
               ) -> Companion | str:
    kind, rule = comp.rule.kind, comp.rule
    rows, cols = series.signal.shape[1:3]
    if (comp.rows, comp.cols) != (rows, cols):
        return (f"{kind} companion: matrix {comp.rows} x {comp.cols} differs from the series' "
                f"{rows} x {cols} (no resampling)")
    if not series.references:
        return f"{kind} companion: the series has no reference headers"
    r_dir, c_dir, _, spacing = _geometry(series.references[0])
    if not np.allclose(comp.orientation, np.concatenate([r_dir, c_dir]), atol=1e-3):
        return f"{kind} companion: orientation differs from the series'"
    if not np.allclose(comp.spacing, spacing, rtol=1e-3):
        return (f"{kind} companion: pixel spacing {comp.spacing[0]:g} x {comp.spacing[1]:g} mm "
                f"differs from the series' {spacing[0]:g} x {spacing[1]:g} mm")
    normal = np.cross(r_dir, c_dir)
    normal /= np.linalg.norm(normal)
    positions = np.array([f.position_mm for f in comp.frames])
    picked: list[list[CompanionFrame]] = []
    for i, ref in enumerate(series.references):
        _, _, ipp, _ = _geometry(ref)
        pos = float(ipp @ normal)
        near = np.flatnonzero(np.abs(positions - pos) <= rule.slice_tolerance_mm)
        if near.size == 0:
            return f"{kind} companion: no slice within {rule.slice_tolerance_mm:g} mm of " \
                   f"slice {i} ({pos:.2f} mm along the normal)"
        frames = [comp.frames[j] for j in near]
        d = np.asarray(frames[0].origin) - ipp
        if (abs(float(d @ r_dir)) > 0.5 * spacing[1] or abs(float(d @ c_dir)) > 0.5 * spacing[0]):
            return f"{kind} companion: in-plane position of slice {i} differs by more than " \
                   "half a pixel"
        picked.append(frames)
    if kind != "wassr":
        values = np.stack([np.mean([f.values for f in fr], axis=0) for fr in picked]
                          ).astype(np.float32)
        unit = {"t1": "s", "b1": "1"}.get(kind, "")
        return Companion(kind, values, None, unit, comp.key,
                         f"{comp.unit_detail}; {len(picked)} slices")
    per_slice: list[tuple[np.ndarray, np.ndarray]] = []
    for fr in picked:
        sat = [f for f in fr if abs(f.offset_ppm) < m0_threshold_ppm]
        offs = np.array([f.offset_ppm for f in sat])
        order = np.argsort(offs, kind="stable")
        per_slice.append((offs[order], np.stack([sat[j].values for j in order], axis=-1)))
    offs0 = per_slice[0][0]
    if offs0.size < 5:
        return f"wassr companion: {offs0.size} offsets per slice, at least 5 are needed"
    for i, (offs, _) in enumerate(per_slice):
        if offs.shape != offs0.shape or not np.allclose(offs, offs0, atol=OFFSET_TOLERANCE_PPM):
            return f"wassr companion: slice {i} holds other offsets than slice 0"
    values = np.stack([v for _, v in per_slice]).astype(np.float32)
    return Companion("wassr", values, offs0.astype(np.float64), "", comp.key,
                     f"{offs0.size} offsets; {len(picked)} slices")


def attach(series: AssembledSeries, protocol: Protocol,
           found: dict[str, CompanionSeries | None]) -> AssembledSeries:
    """Place the companions found for ``series`` into its geometry (in place; returned).

    ``found`` maps each configured kind to its (snapshot) companion series or None. Kinds that
    are missing or do not line up get a line in ``series.companion_notes``.
    """
    for rule in protocol.companions:
        comp = found.get(rule.kind)
        if comp is None or not comp.frames:
            series.companion_notes.append(
                f"{rule.kind} companion: none arrived within {rule.timeout_s:g} s")
            continue
        placed = _place_one(series, comp, protocol.m0_threshold_ppm)
        if isinstance(placed, str):
            series.companion_notes.append(placed)
        else:
            series.companions[rule.kind] = placed
    return series
