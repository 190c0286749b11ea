"""The input of every output builder, and what the builders share.

A :class:`DerivedRequest` is validated once when it is made, so the builders trust it.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
import uuid
from dataclasses import dataclass, field

import numpy as np
from pydicom import Dataset
from pydicom.dataelem import DataElement
from pydicom.dataset import FileMetaDataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import UID

from node import __version__
from node.derive.render import robust_range

MANUFACTURER = "cest-node"
SOFTWARE_VERSIONS = f"cest-node {__version__}"
# The research marker that starts every SeriesDescription we write (ours, common practice to
# put such a word first so it shows in every series list).
RESEARCH_MARKER = "RESEARCH"
RESEARCH_STATEMENT = "Research use only, not for diagnosis. Not a medical device."

# Our own UUID namespace for output UIDs (drawn at random once; never change it, or rebuilt
# outputs get new UIDs).
_UID_NAMESPACE = uuid.UUID("3b0f8c52-9a1e-4c7e-8f2d-5d6a4e1b7c90")
_UID_RE = re.compile(r"^(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*))+$")

# Human meanings of the UCUM codes our methods use (UCUM, "The Unified Code for Units of
# Measure", Regenstrief Institute: "%" percent, "1" the unity, "s-1" / "/s" per second).
UCUM_MEANINGS = {
    "%": "percent",
    "1": "no units",
    "/s": "per second",
    "s-1": "per second",
    "s": "second",
    "ms": "millisecond",
    "Hz": "hertz",
    "[ppm]": "parts per million",
}


def output_uid(series_uid: str, kind: str, index: int) -> str:
    """Deterministic SOP Instance UID of output ``index`` of an output series.

    The ``2.25.<integer>`` form of a UUID (PS3.5 Annex B.2), the UUID being version 5 of our
    namespace and ``series_uid/kind/index``, so a rebuild of the same series gives the same
    UIDs and two output series never share one.
    """
    u = uuid.uuid5(_UID_NAMESPACE, f"{series_uid}/{kind}/{index}")
    return f"2.25.{u.int}"


def research_description(title: str, suffix: str, note: str = "") -> str:
    """SeriesDescription (LO, at most 64 characters) starting with the research marker."""
    text = f"{RESEARCH_MARKER} {title} {suffix}"
    if note:
        text = f"{text} {note}"
    return text[:64]


def content_label(method: str) -> str:
    """A CS value (upper case letters, digits, space, underscore; at most 16) from a name."""
    label = re.sub(r"[^A-Z0-9_ ]", "_", method.upper())[:16]
    return label or "MAP"


def now_da_tm() -> tuple[str, str]:
    """Current local date and time as DICOM DA and TM strings."""
    now = _dt.datetime.now()
    return now.strftime("%Y%m%d"), now.strftime("%H%M%S.%f")


# Attributes copied from the source reference into every output (Patient, General Study,
# Frame of Reference, and the series attributes that keep dciodvfy's conditions satisfied).
PATIENT_STUDY_KEYWORDS = (
    "SpecificCharacterSet",
    "PatientName",
    "PatientID",
    "IssuerOfPatientID",
    "PatientBirthDate",
    "PatientSex",
    "PatientAge",
    "PatientSize",
    "PatientWeight",
    "StudyInstanceUID",
    "StudyDate",
    "StudyTime",
    "ReferringPhysicianName",
    "StudyID",
    "AccessionNumber",
    "StudyDescription",
)
# highdicom 0.28 does not copy BodyPartExamined; without it dciodvfy asks for Laterality
# (General Series, Type 2C), so every builder copies it (measured on this machine).
SERIES_KEYWORDS = ("BodyPartExamined", "Laterality", "PatientPosition")


def copy_keywords(dst: Dataset, src: Dataset, keywords: tuple[str, ...]) -> None:
    """Copy the listed attributes from ``src`` to ``dst`` where ``src`` has them."""
    for kw in keywords:
        elem = src.get(kw)
        if elem is not None:
            setattr(dst, kw, elem)


def source_image_item(ref: Dataset) -> Dataset:
    """One Source Image Sequence item (PS3.3 C.7.6.1, Image SOP Instance Reference Macro).

    Purpose of reference DCM 121322 "Source image for image processing operation"
    (PS3.16 CID 7202).
    """
    purpose = Dataset()  # elements by tag: one item per output slice, about 3 x faster
    purpose[0x00080100] = DataElement(0x00080100, "SH", "121322")  # Code Value
    purpose[0x00080102] = DataElement(0x00080102, "SH", "DCM")  # Coding Scheme Designator
    purpose[0x00080104] = DataElement(0x00080104, "LO",  # Code Meaning
                                      "Source image for image processing operation")
    item = Dataset()
    item[0x00081150] = DataElement(0x00081150, "UI", ref.SOPClassUID)
    item[0x00081155] = DataElement(0x00081155, "UI", ref.SOPInstanceUID)
    # Purpose of Reference Code Sequence
    item[0x0040A170] = DataElement(0x0040A170, "SQ", DicomSequence([purpose]))
    return item


def slice_copy(first: Dataset, uid: str, number: int, ref: Dataset,
               elements: tuple[tuple[int, str, object], ...] = ()) -> Dataset:
    """Another slice's object made from ``first`` (the first slice's): its own SOP Instance
    UID (in the data set and the file meta), Instance Number, Source Image Sequence to
    ``ref``, and ``elements`` ``(tag, VR, value)``; every other element is ``first``'s.

    A shallow copy: a dict of its own holding ``first``'s element objects, and new element
    objects for what differs. ``Dataset(first)`` would share ``first``'s dict, and setting an
    attribute that exists changes its element in place, so neither may be used here (every
    slice would end with the last slice's UID). The builders that use it (derived MR,
    Secondary Capture) decide first that the slice's reference gives what the first's gave.
    """
    ds = Dataset(dict(first._dict))
    ds.set_original_encoding(False, True, first.original_character_set)
    ds[0x00080018] = DataElement(0x00080018, "UI", UID(uid))  # SOP Instance UID
    ds[0x00200013] = DataElement(0x00200013, "IS", number)  # Instance Number
    ds[0x00082112] = DataElement(0x00082112, "SQ",  # Source Image Sequence
                                 DicomSequence([source_image_item(ref)]))
    for tag, vr, value in elements:
        ds[tag] = DataElement(tag, vr, value)
    meta = FileMetaDataset(dict(first.file_meta._dict))
    meta[0x00020003] = DataElement(0x00020003, "UI", UID(uid))  # Media Storage SOP Instance
    ds.file_meta = meta
    return ds


def header_only(ds: Dataset) -> Dataset:
    """A shallow copy of a built object without its pixel data (group 7FE0: Pixel Data,
    Float and Double Float Pixel Data), e.g. a Parametric Map an SR cites by UID later."""
    out = Dataset({t: e for t, e in ds._dict.items() if t.group != 0x7FE0})
    if hasattr(ds, "file_meta"):
        out.file_meta = ds.file_meta
    return out


def frame_of(ref: Dataset) -> tuple[Dataset, int] | None:
    """``(instance header, frame number)`` when ``ref`` is a view of one frame of a
    multi-frame instance (it carries ``.multiframe`` and ``.frame_number``, as
    :class:`node.assemble.FrameHeader` does), else None."""
    mf = getattr(ref, "multiframe", None)
    if mf is None:
        return None
    return mf, getattr(ref, "frame_number", None)  # type: ignore[return-value]


def multiframe_sources(refs: list[Dataset]) -> list[Dataset]:
    """The distinct multi-frame instances the references are frames of (first seen first);
    empty for single-frame references. Raises ValueError when they mix the two kinds, or a
    frame view does not fit its instance."""
    frames = [frame_of(r) for r in refs]
    if all(f is None for f in frames):
        return []
    out: dict[str, Dataset] = {}
    for i, (ref, f) in enumerate(zip(refs, frames, strict=True)):
        if f is None:
            raise ValueError(f"references[{i}] is a single-frame image but other references "
                             "are frames of a multi-frame instance")
        mf, number = f
        for tag in ("SharedFunctionalGroupsSequence", "PerFrameFunctionalGroupsSequence",
                    "NumberOfFrames", "SOPInstanceUID"):
            if tag not in mf:
                raise ValueError(f"references[{i}].multiframe lacks {tag}")
        n_frames = int(mf.NumberOfFrames)
        if (isinstance(number, bool) or not isinstance(number, int)
                or not 1 <= number <= min(n_frames, len(mf.PerFrameFunctionalGroupsSequence))):
            raise ValueError(f"references[{i}].frame_number {number!r} is outside the "
                             f"instance's frames 1..{n_frames}")
        if str(mf.SOPInstanceUID) != str(ref.SOPInstanceUID):
            raise ValueError(f"references[{i}] names SOP Instance {ref.SOPInstanceUID} but is "
                             "a frame of another instance")
        out.setdefault(str(mf.SOPInstanceUID), mf)
    return list(out.values())


def _check_ascii(name: str, text: str) -> None:
    if not text.isascii() or not text.isprintable():
        raise ValueError(f"{name} must be printable ASCII (it goes into DICOM LO/LT), got {text!r}")


@dataclass
class DerivedRequest:
    """What a builder needs to write one derived series.

    Attributes
    ----------
    references
        One dataset per slice, in slice order: classic MR Image Storage headers of the source
        series (pixel data may be absent). Geometry, patient, study and the Source Image
        Sequence come from them. For a multi-frame (Enhanced MR) source each reference is a
        single-frame view of one frame of the instance that keeps the instance's header as
        ``.multiframe`` and its 1-based ``.frame_number`` (:class:`node.assemble.FrameHeader`):
        the Parametric Map and the Segmentation then name that instance, with frame numbers,
        and take the frame geometry from its functional groups.
    values
        The map, ``(slices, rows, cols)``, converted to float32; NaN marks an invalid voxel.
        Infinite values are refused.
    method
        The method's registry name (``mtr_asym``, ``apt_star``...); it selects the quantity
        concept (:mod:`node.derive.concepts`) and the content label.
    title
        Human name shown in descriptions and burned into the Secondary Capture,
        e.g. ``"MTRasym 3.5 ppm (B0-corrected)"``.
    unit_ucum
        UCUM code of the map's unit, e.g. ``"%"``.
    series_uid, series_number
        The output series (one request builds one series).
    m0
        The unsaturated images ``(slices, rows, cols)`` under the colour overlay of the
        Secondary Capture (only that builder needs them).
    m0_range
        ``(low, high)`` grey window of ``m0`` under the overlay; default (set here when ``m0``
        is given) :func:`node.derive.render.robust_range` of ``m0`` (a series' methods share
        one M0, so the node computes it once and passes it to each).
    display_range
        ``(low, high)`` of the window and the colour scale in the map's unit; default: the
        2nd and 98th percentiles of the valid voxels (common practice for a robust window).
    unit_meaning
        Code meaning of the unit; default from :data:`UCUM_MEANINGS`, else the code itself.
    sources
        Further source datasets (e.g. every saturation frame). The Parametric Map lists them
        per frame when given; that costs time (2.4 s for 1,200 sources, measured), so the node
        leaves it None: the series-level reference to the source series is always there.
    note
        Extra text for SeriesDescription and ImageComments (e.g. a QC warning).
    """

    references: list[Dataset]
    values: np.ndarray
    method: str
    title: str
    unit_ucum: str
    series_uid: str
    series_number: int
    m0: np.ndarray | None = None
    display_range: tuple[float, float] | None = None
    m0_range: tuple[float, float] | None = None
    unit_meaning: str = ""
    sources: list[Dataset] | None = None
    note: str = ""
    multiframe: list[Dataset] = field(init=False, default_factory=list, repr=False)
    """The multi-frame instances the references are frames of (empty for classic sources)."""

    def __post_init__(self) -> None:
        refs = list(self.references)
        if not refs:
            raise ValueError("references is empty: one source dataset per slice is needed")
        values = np.asarray(self.values)
        if values.ndim != 3:
            raise ValueError(f"values must be (slices, rows, cols), got shape {values.shape}")
        if not np.issubdtype(values.dtype, np.floating):
            raise ValueError(f"values must be a float array, got dtype {values.dtype}")
        values = values.astype(np.float32, copy=False)
        if np.isinf(values).any():
            raise ValueError("values contain infinite voxels; mark invalid voxels with NaN")
        if values.shape[0] != len(refs):
            raise ValueError(
                f"values has {values.shape[0]} slices but references has {len(refs)} datasets"
            )
        for i, ref in enumerate(refs):
            for kw in ("SOPClassUID", "SOPInstanceUID", "Rows", "Columns", "StudyInstanceUID",
                       "ImagePositionPatient", "ImageOrientationPatient", "PixelSpacing",
                       "FrameOfReferenceUID"):
                if kw not in ref:
                    raise ValueError(f"references[{i}] lacks {kw}")
            if (int(ref.Rows), int(ref.Columns)) != values.shape[1:]:
                raise ValueError(
                    f"references[{i}] is {ref.Rows} x {ref.Columns} but values are "
                    f"{values.shape[1]} x {values.shape[2]}"
                )
        if len({str(r.StudyInstanceUID) for r in refs}) != 1:
            raise ValueError("references come from more than one study")
        if len({str(r.FrameOfReferenceUID) for r in refs}) != 1:
            raise ValueError("references have more than one FrameOfReferenceUID")
        self.multiframe = multiframe_sources(refs)
        if not isinstance(self.series_uid, str) or len(self.series_uid) > 64 or not _UID_RE.match(
            self.series_uid
        ):
            raise ValueError(f"series_uid is not a valid DICOM UID: {self.series_uid!r}")
        if isinstance(self.series_number, bool) or not isinstance(self.series_number, int) or not (
            1 <= self.series_number <= 2**31 - 1
        ):
            raise ValueError(f"series_number must be a positive integer, got {self.series_number!r}")
        if not self.method:
            raise ValueError("method is empty")
        if not self.unit_ucum:
            raise ValueError("unit_ucum is empty")
        _check_ascii("title", self.title)
        _check_ascii("note", self.note)
        _check_ascii("unit_ucum", self.unit_ucum)
        if self.m0 is not None:
            m0 = np.asarray(self.m0)
            if m0.shape != values.shape:
                raise ValueError(f"m0 has shape {m0.shape} but values have {values.shape}")
            self.m0 = m0.astype(np.float32, copy=False)
        if self.m0_range is not None:
            g_lo, g_hi = (float(x) for x in self.m0_range)
            if not (math.isfinite(g_lo) and math.isfinite(g_hi) and g_hi > g_lo):
                raise ValueError(f"m0_range must be finite with high > low, got {self.m0_range!r}")
            self.m0_range = (g_lo, g_hi)
        elif self.m0 is not None:
            self.m0_range = robust_range(self.m0)
        if self.display_range is None:
            finite = values[np.isfinite(values)]
            if finite.size:
                lo, hi = (float(x) for x in np.percentile(finite, [2.0, 98.0]))
            else:
                lo, hi = 0.0, 1.0
            if not hi > lo:
                lo, hi = lo - 0.5, lo + 0.5
            self.display_range = (lo, hi)
        else:
            lo, hi = (float(x) for x in self.display_range)
            if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
                raise ValueError(
                    f"display_range must be finite with high > low, got {self.display_range!r}"
                )
            self.display_range = (lo, hi)
        if not self.unit_meaning:
            self.unit_meaning = UCUM_MEANINGS.get(self.unit_ucum, self.unit_ucum)
        self.references = refs
        self.values = values

    @property
    def window(self) -> tuple[float, float]:
        """Window centre and width (PS3.3 C.11.2.1.2) covering :attr:`display_range`."""
        assert self.display_range is not None
        lo, hi = self.display_range
        return (lo + hi) / 2.0, hi - lo
