"""The input of the per-series report builders (Structured Report, Segmentation, summary page).

A :class:`ReportRequest` holds every method's map of one source series together, with the
brain mask, the M0 images, the quality figures and the reasons of the QC gates. It is
validated once when made (each map through a :class:`~node.derive.request.DerivedRequest`,
so the same rules hold as for the per-method outputs), and it computes the per-hemisphere
statistics once for all three builders.

How the node calls them
-----------------------
One request per output series, as for the per-method builders::

    reasons = quant.qc.qc_gates(figures, thresholds)
    note = qc_note(reasons)                      # "QC:B0,SNR" or ""
    # every DerivedRequest of the series gets the note first, so a cut at 64 characters
    # never drops it: note=" ".join(x for x in (note, "incomplete series") if x)
    req = ReportRequest(references=..., maps={m: (title, unit, values)}, mask=prep.mask,
                        m0=prep.m0, qc=figures, qc_reasons=reasons,
                        series_uid=..., series_number=..., parametric_maps={m: pm})
    datasets = REPORT_BUILDERS["structured_report"](req)

Left and right
--------------
Patient left is +x of DICOM's LPS patient coordinates (PS3.3 C.7.6.2.1.1); the array axis
and direction that point there come from ImageOrientationPatient
(:func:`quant.qc.left_axis_from_orientation`), the midline is the mask's centroid along that
axis (:func:`quant.qc.hemisphere_stats`).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
from pydicom import Dataset

from node.derive.request import RESEARCH_MARKER, DerivedRequest, _check_ascii
from quant.qc import (
    HemisphereStats,
    QcFigures,
    QcReason,
    hemisphere_stats,
    left_axis_from_orientation,
    valid_fraction,
)

#: Short tags of the QC gate codes of :func:`quant.qc.qc_gates` for SeriesDescription (ours).
QC_TAGS = {
    "b0_range": "B0",
    "snr": "SNR",
    "snr_unknown": "SNR?",
    "motion": "MOTION",
    "valid_fraction": "VALID",
}


def qc_note(reasons: list[QcReason]) -> str:
    """The SeriesDescription note of a series whose QC failed: ``"QC:B0,SNR"``; ``""`` if none.

    Every output of the series carries it (the node passes it as ``note`` of each
    :class:`~node.derive.request.DerivedRequest`, first, and the report builders add it
    themselves), so a series list shows which maps are unreliable.
    """
    tags: list[str] = []
    for r in reasons:
        tag = QC_TAGS.get(r.code, re.sub(r"[^A-Z0-9?]", "", r.code.upper())[:8] or "QC")
        if tag not in tags:
            tags.append(tag)
    return f"QC:{','.join(tags)}" if tags else ""


def report_description(title: str, suffix: str, req: ReportRequest) -> str:
    """SeriesDescription (LO, 64 characters) of a report output: the research marker, the
    title, the kind and the request's notes; the title is shortened, never the QC note."""
    tail = f" {suffix}" + (f" {req.description_note}" if req.description_note else "")
    room = 64 - len(RESEARCH_MARKER) - 1 - len(tail)
    return f"{RESEARCH_MARKER} {title[:max(room, 0)]}{tail}"[:64]


@dataclass(frozen=True)
class MethodSummary:
    """One method's map in the report: its title, unit and hemisphere statistics."""

    method: str
    title: str
    unit_ucum: str
    unit_meaning: str
    values: np.ndarray
    display_range: tuple[float, float]
    hemispheres: HemisphereStats
    valid_fraction: float


def _bool_mask(mask: object, shape: tuple[int, ...]) -> np.ndarray:
    m = np.asarray(mask)
    if m.dtype != bool:
        raise ValueError(f"mask must be a boolean array, got dtype {m.dtype}")
    if m.shape != shape:
        raise ValueError(f"mask has shape {m.shape} but the maps have {shape}")
    if not m.any():
        raise ValueError("mask selects no voxels: there is no brain to report on")
    return m


@dataclass
class ReportRequest:
    """What the report builders need for one output series of one source series.

    Attributes
    ----------
    references
        One header-only source dataset per slice, in slice order (as for
        :class:`~node.derive.request.DerivedRequest`).
    maps
        ``{method: (title, unit_ucum, values)}``, ``values`` ``(slices, rows, cols)`` float,
        NaN = invalid; in the order the report lists them. At least one.
    mask
        The brain mask ``(slices, rows, cols)``, bool: the region of every statistic.
    series_uid, series_number
        The output series (one request builds one series).
    m0
        The unsaturated images; needed by the summary page.
    m0_range
        The grey window of ``m0`` under the summary page's colour maps; default as in
        DerivedRequest, which sets it with ``m0`` (the node passes the one its Secondary
        Captures use).
    qc
        Quality figures of the series (:class:`quant.qc.QcFigures`); a field left None is
        "not measured" and is left out of the report.
    qc_reasons
        What :func:`quant.qc.qc_gates` said about ``qc`` (empty: every gate passed).
    parametric_maps
        ``{method: Parametric Map dataset}`` already built for this series; the SR then
        refers to them as the source of each method's measurements.
    display_ranges
        ``{method: (low, high)}`` of the colour scales; default as in DerivedRequest.
    candidate_method
        The map the Segmentation thresholds; default the first of ``maps``.
    candidate_n_sd, candidate_min_voxels
        The threshold (SDs below the contralateral mean) and the smallest kept component
        of the research candidate region (:func:`quant.qc.candidate_region`).
    note
        Extra text for SeriesDescription after the QC note (e.g. ``"incomplete series"``).
    """

    references: list[Dataset]
    maps: dict[str, tuple[str, str, np.ndarray]]
    mask: np.ndarray
    series_uid: str
    series_number: int
    m0: np.ndarray | None = None
    m0_range: tuple[float, float] | None = None
    qc: QcFigures = field(default_factory=QcFigures)
    qc_reasons: list[QcReason] = field(default_factory=list)
    parametric_maps: dict[str, Dataset] = field(default_factory=dict)
    display_ranges: dict[str, tuple[float, float]] = field(default_factory=dict)
    candidate_method: str | None = None
    candidate_n_sd: float = 2.0
    candidate_min_voxels: int = 1
    note: str = ""
    methods: dict[str, MethodSummary] = field(init=False, repr=False)
    left_axis: int = field(init=False)
    left_is_increasing: bool = field(init=False)

    def __post_init__(self) -> None:
        if not isinstance(self.maps, dict) or not self.maps:
            raise ValueError("maps is empty: the report needs at least one method's map")
        _check_ascii("note", self.note)
        if not isinstance(self.qc, QcFigures):
            raise ValueError(f"qc must be a quant.qc.QcFigures, got {type(self.qc).__name__}")
        for r in self.qc_reasons:
            if not isinstance(r, QcReason):
                raise ValueError(f"qc_reasons must hold quant.qc.QcReason, got {r!r}")
        unknown = set(self.parametric_maps) - set(self.maps)
        if unknown:
            raise ValueError(f"parametric_maps names methods without a map: {sorted(unknown)}")
        for method, pm in self.parametric_maps.items():
            for kw in ("SOPClassUID", "SOPInstanceUID", "StudyInstanceUID"):
                if kw not in pm:
                    raise ValueError(f"parametric_maps[{method!r}] lacks {kw}")
        if self.candidate_method is None:
            self.candidate_method = next(iter(self.maps))
        elif self.candidate_method not in self.maps:
            raise ValueError(f"candidate_method {self.candidate_method!r} has no map "
                             f"(maps: {sorted(self.maps)})")
        if not (np.isfinite(self.candidate_n_sd) and self.candidate_n_sd >= 0):
            raise ValueError(f"candidate_n_sd must be a non-negative number, got "
                             f"{self.candidate_n_sd!r}")
        if int(self.candidate_min_voxels) != self.candidate_min_voxels or \
                self.candidate_min_voxels < 1:
            raise ValueError(f"candidate_min_voxels must be a positive integer, got "
                             f"{self.candidate_min_voxels!r}")
        methods: dict[str, MethodSummary] = {}
        refs: list[Dataset] | None = None
        for method, entry in self.maps.items():
            if not (isinstance(entry, tuple) and len(entry) == 3):
                raise ValueError(f"maps[{method!r}] must be (title, unit_ucum, values)")
            title, unit, values = entry
            # the per-method rules (shape, references, UIDs, units, m0) in one place
            dr = DerivedRequest(
                references=self.references if refs is None else refs, values=values,
                method=method, title=title, unit_ucum=unit, series_uid=self.series_uid,
                series_number=self.series_number, m0=self.m0 if refs is None else None,
                display_range=self.display_ranges.get(method),
                m0_range=self.m0_range if refs is None and self.m0 is not None else None,
            )
            if refs is None:
                refs = dr.references
                self.references = refs
                self.m0 = dr.m0
                self.m0_range = dr.m0_range
                self.mask = _bool_mask(self.mask, dr.values.shape)
                iop = [float(x) for x in refs[0].ImageOrientationPatient]
                self.left_axis, self.left_is_increasing = left_axis_from_orientation(iop)
            assert dr.display_range is not None
            methods[method] = MethodSummary(
                method=method, title=title, unit_ucum=unit, unit_meaning=dr.unit_meaning,
                values=dr.values, display_range=dr.display_range,
                hemispheres=hemisphere_stats(dr.values, self.mask, midline_axis=self.left_axis,
                                             left_is_increasing=self.left_is_increasing),
                valid_fraction=valid_fraction(dr.values, self.mask),
            )
        self.methods = methods

    @property
    def qc_note(self) -> str:
        """``"QC:..."`` when a gate failed (see :func:`qc_note`)."""
        return qc_note(self.qc_reasons)

    @property
    def description_note(self) -> str:
        """The QC note first, then :attr:`note`."""
        return " ".join(x for x in (self.qc_note, self.note) if x)

    def hemisphere_masks(self) -> tuple[np.ndarray, np.ndarray]:
        """Left and right hemisphere parts of the mask, by the rule of
        :func:`quant.qc.hemisphere_stats`: a voxel at least half a voxel from the midline
        towards patient left (right) is left (right); the midline voxel is neither."""
        mid = next(iter(self.methods.values())).hemispheres.midline_index
        axis = self.left_axis % self.mask.ndim
        shape = [1] * self.mask.ndim
        shape[axis] = self.mask.shape[axis]
        index = np.arange(self.mask.shape[axis], dtype=np.float64).reshape(shape)
        toward_left = (index - mid) if self.left_is_increasing else (mid - index)
        left = self.mask & np.broadcast_to(toward_left >= 0.5, self.mask.shape)
        right = self.mask & np.broadcast_to(toward_left <= -0.5, self.mask.shape)
        return left, right

    def representative_slice(self) -> int:
        """The slice with the most mask voxels (the one nearest the middle on a tie)."""
        counts = self.mask.reshape(self.mask.shape[0], -1).sum(axis=1)
        best = np.flatnonzero(counts == counts.max())
        middle = (self.mask.shape[0] - 1) / 2.0
        return int(best[np.argmin(np.abs(best - middle))])
