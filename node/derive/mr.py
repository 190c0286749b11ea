"""Derived classic MR image builder (PS3.3 A.4, MR Image IOD), written with pydicom.

The copy any viewer can show: one single-frame MR Image per slice in the source geometry,
ImageType DERIVED\\SECONDARY, signed 16-bit stored values with Rescale Slope/Intercept so the
viewer's read-out is in the map's unit, a Real World Value Mapping saying the same in UCUM,
a window from the request's display range, and a Source Image Sequence to the slice's source.

Quantisation: one Rescale Slope for the whole series (so one window fits every slice), the
smallest of 1, 2, 2.5, 5 x 10^k that keeps the largest magnitude (of the valid values and the
display range) within +-32767; values are rounded, so the error is at most half a slope.
Invalid (NaN) voxels are stored as -32768, declared as Pixel Padding Value (0028,0120): a
viewer that honours padding shows them as background, and no valid voxel takes that value.
"""

from __future__ import annotations

import math

import highdicom as hd
import numpy as np
from pydicom import Dataset
from pydicom.datadict import dictionary_VR, tag_for_keyword
from pydicom.dataset import FileMetaDataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import UID, ExplicitVRLittleEndian, MRImageStorage

from node.derive.concepts import declare_private_scheme, is_private, quantity_concept
from node.derive.request import (
    MANUFACTURER,
    PATIENT_STUDY_KEYWORDS,
    RESEARCH_STATEMENT,
    SERIES_KEYWORDS,
    SOFTWARE_VERSIONS,
    DerivedRequest,
    content_label,
    copy_keywords,
    now_da_tm,
    output_uid,
    research_description,
    slice_copy,
    source_image_item,
)

KIND = "mr"
PADDING_VALUE = -32768
MAX_STORED = 32767

# MR Image Module (PS3.3 C.8.3.1) attributes copied from the source when present; the Type 1
# ones get a neutral value when the source lacks them, the Type 2 ones an empty value.
_MR_TYPE1 = {"ScanningSequence": "RM", "SequenceVariant": "NONE"}
_MR_TYPE2 = ("ScanOptions", "MRAcquisitionType", "EchoTime", "EchoTrainLength",
             "RepetitionTime")
_MR_TYPE3 = ("SequenceName", "MagneticFieldStrength", "ImagingFrequency", "ImagedNucleus",
             "SpacingBetweenSlices", "FlipAngle", "ProtocolName")
_GEOMETRY = ("ImagePositionPatient", "ImageOrientationPatient", "PixelSpacing",
             "SliceThickness", "SliceLocation")


def rescale_slope(values: np.ndarray, display_range: tuple[float, float]) -> float:
    """The series' Rescale Slope: the smallest 1, 2, 2.5 or 5 x 10^k step that fits."""
    finite = values[np.isfinite(values)]
    peak = max(abs(display_range[0]), abs(display_range[1]))
    if finite.size:
        peak = max(peak, float(np.abs(finite).max()))
    if peak == 0.0:
        return 1.0
    raw = peak / MAX_STORED
    exp = math.floor(math.log10(raw))
    for mant in (1.0, 2.0, 2.5, 5.0, 10.0):
        step = float(f"{mant * 10.0**exp:.6g}")
        if step * MAX_STORED >= peak:
            return step
    raise AssertionError("unreachable: 10 x 10^k always fits")


def quantise(values: np.ndarray, slope: float) -> np.ndarray:
    """Stored int16 values: round(value / slope), NaN -> :data:`PADDING_VALUE`."""
    valid = np.isfinite(values)
    q = np.rint(np.where(valid, values, 0.0) / slope)
    q = np.clip(q, -MAX_STORED, MAX_STORED).astype(np.int16)
    q[~valid] = PADDING_VALUE
    return q


def _ds_str(x: float) -> str:
    """A DS value (at most 16 characters)."""
    s = f"{x:.10g}"
    return s if len(s) <= 16 else f"{x:.6g}"


def build(req: DerivedRequest, *, template: bool = True) -> list[Dataset]:
    """Build one derived MR Image per slice of a request.

    The first slice's object is built attribute by attribute; with ``template`` (the default)
    the others are that object with their own UIDs, number, geometry, source reference and
    pixels (:func:`_like`), as the Secondary Capture builder does: pydicom's attribute
    setting (keyword lookup, conversion and validation of each value, about 25 us an element)
    was most of the build, 2.4 ms a slice here. A slice whose reference differs from the
    first's in anything else the object takes from it gets its own full build.
    ``tests/node/test_derive.py`` checks that both ways give the same objects.

    Returns
    -------
    list of Dataset
        One MR Image Storage dataset per slice, in the order of ``req.references``.
    """
    assert req.display_range is not None
    slope = rescale_slope(req.values, req.display_range)
    stored = quantise(req.values, slope)
    center, width = req.window
    concept = quantity_concept(req.method, req.title)
    rwvm = hd.pm.RealWorldValueMapping(
        lut_label=content_label(req.method),
        lut_explanation=req.title[:64],
        unit=hd.sr.CodedConcept(req.unit_ucum, "UCUM", req.unit_meaning),
        value_range=(-MAX_STORED, MAX_STORED),
        slope=slope,
        intercept=0.0,
        quantity_definition=concept,
    )
    date, time_ = now_da_tm()
    description = research_description(req.title, "MR", req.note)
    comments = f"{req.title} [{req.unit_ucum}]. {req.note + ' ' if req.note else ''}{RESEARCH_STATEMENT}"
    derivation = (f"{SOFTWARE_VERSIONS}: {req.title} ({req.method}) computed from the "
                  f"saturation series; stored = round(value / {_ds_str(slope)}), invalid = "
                  f"{PADDING_VALUE}. {RESEARCH_STATEMENT}")
    out: list[Dataset] = []
    first: Dataset | None = None
    first_ref = _from_ref(req.references[0])
    for i, ref in enumerate(req.references):
        uid = UID(output_uid(req.series_uid, KIND, i))
        pixels = np.ascontiguousarray(stored[i]).tobytes()
        like = (_like(first, first_ref, ref, uid, i + 1, pixels)
                if first is not None and template else None)
        if like is not None:
            out.append(like)
            continue
        ds = Dataset()
        ds.file_meta = FileMetaDataset()
        ds.file_meta.MediaStorageSOPClassUID = MRImageStorage
        ds.file_meta.MediaStorageSOPInstanceUID = uid
        ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
        copy_keywords(ds, ref, PATIENT_STUDY_KEYWORDS)
        ds.SOPClassUID = MRImageStorage
        ds.SOPInstanceUID = uid
        ds.InstanceCreationDate = date
        ds.InstanceCreationTime = time_
        ds.ContentQualification = "RESEARCH"
        ds.ImageType = ["DERIVED", "SECONDARY", "OTHER"]
        # General Series
        ds.Modality = "MR"
        ds.SeriesInstanceUID = req.series_uid
        ds.SeriesNumber = req.series_number
        ds.SeriesDescription = description
        ds.SeriesDate = date
        ds.SeriesTime = time_
        copy_keywords(ds, ref, SERIES_KEYWORDS)
        # Frame of Reference
        ds.FrameOfReferenceUID = ref.FrameOfReferenceUID
        ds.PositionReferenceIndicator = ref.get("PositionReferenceIndicator", "")
        # General Equipment
        ds.Manufacturer = MANUFACTURER
        ds.ManufacturerModelName = MANUFACTURER
        ds.SoftwareVersions = SOFTWARE_VERSIONS
        # General Image
        ds.InstanceNumber = i + 1
        ds.ContentDate = date
        ds.ContentTime = time_
        ds.DerivationDescription = derivation[:1024]
        ds.SourceImageSequence = DicomSequence([source_image_item(ref)])
        ds.ImageComments = comments[:10240]
        ds.BurnedInAnnotation = "NO"
        # Image Plane
        for kw in _GEOMETRY:
            if kw in ref:
                setattr(ds, kw, ref[kw].value)
        # MR Image
        for kw, default in _MR_TYPE1.items():
            setattr(ds, kw, ref.get(kw, default))
        for kw in _MR_TYPE2:
            setattr(ds, kw, ref.get(kw, ""))
        copy_keywords(ds, ref, _MR_TYPE3)
        # Image Pixel, with the Modality LUT (rescale) and VOI LUT (window)
        ds.SamplesPerPixel = 1
        ds.PhotometricInterpretation = "MONOCHROME2"
        ds.Rows = int(ref.Rows)
        ds.Columns = int(ref.Columns)
        ds.BitsAllocated = 16
        ds.BitsStored = 16
        ds.HighBit = 15
        ds.PixelRepresentation = 1
        ds.PixelPaddingValue = PADDING_VALUE
        ds.RescaleIntercept = "0"
        ds.RescaleSlope = _ds_str(slope)
        ds.WindowCenter = _ds_str(center)
        ds.WindowWidth = _ds_str(width)
        ds.WindowCenterWidthExplanation = f"{req.title} [{req.unit_ucum}]"[:64]
        ds.RealWorldValueMappingSequence = DicomSequence([rwvm])
        if is_private(concept):
            declare_private_scheme(ds)
        ds.PixelData = pixels
        out.append(ds)
        if first is None:  # the template stays the first slice's object
            first = ds
    return out


#: What the object takes from its slice's reference besides the geometry: a slice whose
#: reference differs from the first's in any of them gets its own full build
_FROM_REF = (*PATIENT_STUDY_KEYWORDS, *SERIES_KEYWORDS, "FrameOfReferenceUID",
             "PositionReferenceIndicator", "Rows", "Columns", *_MR_TYPE1, *_MR_TYPE2,
             *_MR_TYPE3)


def _tag(keyword: str) -> int:
    tag = tag_for_keyword(keyword)
    if tag is None:
        raise AssertionError(f"not a DICOM keyword: {keyword}")
    return tag


_GEOMETRY_TAGS = tuple((t, dictionary_VR(t)) for t in map(_tag, _GEOMETRY))


def _from_ref(ref: Dataset) -> tuple[tuple[str, ...], tuple[bool, ...]]:
    """What a reference gives the object besides the geometry's values: the :data:`_FROM_REF`
    attributes as text, and which geometry attributes it has."""
    return (tuple("" if (v := ref.get(kw)) is None else str(v) for kw in _FROM_REF),
            tuple(kw in ref for kw in _GEOMETRY))


def _like(first: Dataset, first_ref: tuple[tuple[str, ...], tuple[bool, ...]], ref: Dataset,
          uid: UID, number: int, pixels: bytes) -> Dataset | None:
    """``first`` with another slice's UIDs, number, geometry, source and pixels
    (:func:`node.derive.request.slice_copy`, as the Secondary Capture builder does); None when
    the slice's reference is not like the first's (its object is then built in full)."""
    if _from_ref(ref) != first_ref:  # the first slice's reference's, from :func:`_from_ref`
        return None
    geometry = tuple((tag, vr, ref[tag].value) for tag, vr in _GEOMETRY_TAGS if tag in ref)
    return slice_copy(first, uid, number, ref, (
        *geometry, (0x7FE00010, first[0x7FE00010].VR, pixels)))  # int16: even length
