"""RGB Secondary Capture builder (PS3.3 A.8.1, Secondary Capture Image IOD), with highdicom.

One image per slice: the map colour-fused over the M0 image, a colour bar with the unit and
a numeric scale, the method title and the burned-in words "RESEARCH USE ONLY — NOT FOR
DIAGNOSIS" (so Burned In Annotation is YES). The preview is upscaled, so it keeps the
patient orientation but not the pixel spacing of the source.
"""

from __future__ import annotations

import highdicom as hd
import numpy as np
from pydicom import Dataset
from pydicom.sequence import Sequence as DicomSequence

from node.derive.render import SliceRenderer
from node.derive.request import (
    MANUFACTURER,
    RESEARCH_STATEMENT,
    SERIES_KEYWORDS,
    SOFTWARE_VERSIONS,
    DerivedRequest,
    copy_keywords,
    output_uid,
    research_description,
    slice_copy,
    source_image_item,
)

KIND = "sc"


def _letters(v: np.ndarray) -> str:
    """Patient orientation letters of a direction (PS3.3 C.7.6.1.1.1: x L, y P, z H)."""
    names = (("R", "L"), ("A", "P"), ("F", "H"))
    order = np.argsort(-np.abs(v))
    out = ""
    for axis in order:
        if abs(v[axis]) > 1e-3:
            out += names[axis][1] if v[axis] > 0 else names[axis][0]
    return out[:3] or "L"


def patient_orientation(ref: Dataset) -> tuple[str, str]:
    """Row and column directions of the source as Patient Orientation (0020,0020) values."""
    iop = np.asarray([float(x) for x in ref.ImageOrientationPatient], dtype=np.float64)
    return _letters(iop[:3]), _letters(iop[3:])


def build(req: DerivedRequest, *, template: bool = True) -> list[Dataset]:
    """Build one RGB Secondary Capture per slice of a request (needs ``req.m0``).

    highdicom builds the first slice's object; with ``template`` (the default) the others are
    that object with their own pixels, SOP Instance UID, Instance Number and source
    reference, since everything else it takes from a reference image is of the patient, the
    study or the equipment, the same for every slice of a series. highdicom's checks of the
    reference's IOD were 60 % of the build (about 8 ms a slice here);
    ``tests/node/test_derive.py`` checks that both ways give the same objects.

    Returns
    -------
    list of Dataset
        One Secondary Capture Image Storage dataset per slice, in the order of
        ``req.references``.
    """
    if req.m0 is None:
        raise ValueError("the secondary_capture output needs m0 images for the overlay")
    assert req.display_range is not None
    n = len(req.references)
    rows, cols = req.values.shape[1:]
    renderer = SliceRenderer(rows, cols, title=req.title, unit=req.unit_ucum,
                             display_range=req.display_range)
    assert req.m0_range is not None  # DerivedRequest sets it with m0
    m0_range = req.m0_range
    description = research_description(req.title, "SC", req.note)
    comments = (f"{req.title} [{req.unit_ucum}] over M0. {req.note + ' ' if req.note else ''}"
                f"{RESEARCH_STATEMENT}")
    out: list[Dataset] = []
    first: Dataset | None = None
    first_ref = _from_ref(req.references[0])
    for i, ref in enumerate(req.references):
        rgb = renderer.render(req.values[i], req.m0[i], m0_range=m0_range,
                              label=f"slice {i + 1}/{n}")
        uid = output_uid(req.series_uid, KIND, i)
        like = (_like(first, first_ref, rgb, uid, i + 1, ref)
                if first is not None and template else None)
        if like is not None:
            out.append(like)
            continue
        sc = hd.sc.SCImage.from_ref_dataset(
            ref_dataset=ref,
            pixel_array=rgb,
            photometric_interpretation=hd.PhotometricInterpretationValues.RGB,
            bits_allocated=8,
            coordinate_system=hd.CoordinateSystemNames.PATIENT,
            series_instance_uid=req.series_uid,
            series_number=req.series_number,
            sop_instance_uid=uid,
            instance_number=i + 1,
            manufacturer=MANUFACTURER,
            patient_orientation=patient_orientation(ref),
            transfer_syntax_uid=hd.UID("1.2.840.10008.1.2.1"),
        )
        copy_keywords(sc, ref, SERIES_KEYWORDS)
        sc.SeriesDescription = description
        sc.SoftwareVersions = SOFTWARE_VERSIONS
        sc.ContentQualification = "RESEARCH"
        sc.BurnedInAnnotation = "YES"
        sc.ImageType = ["DERIVED", "SECONDARY"]
        sc.ImageComments = comments[:10240]
        sc.DerivationDescription = (f"{SOFTWARE_VERSIONS}: {req.title} ({req.method}) "
                                    f"colour-fused over M0. {RESEARCH_STATEMENT}")[:1024]
        sc.SourceImageSequence = DicomSequence([source_image_item(ref)])
        out.append(sc)
        if first is None:  # the template stays the first slice's object
            first = sc
    return out


def _from_ref(ref: Dataset) -> tuple[str, ...]:
    """What highdicom takes from a reference (:data:`_SHARED`, and the orientation behind
    Patient Orientation) as text: two references with the same give the same object."""
    return (*(_text(ref.get(kw)) for kw in _SHARED), _text(ref.get("ImageOrientationPatient")))


def _like(first: Dataset, first_ref: tuple[str, ...], rgb: np.ndarray, uid: str, number: int,
          ref: Dataset) -> Dataset | None:
    """``first`` with another slice's pixels, UIDs, number and source
    (:func:`node.derive.request.slice_copy`); None when the slice's reference is not like the
    first's (its object is then built in full)."""
    if rgb.shape != (first[0x00280010].value, first[0x00280011].value, 3) or (
            _from_ref(ref) != first_ref):  # the first slice's reference's
        return None
    data = np.ascontiguousarray(rgb, dtype=np.uint8).tobytes()  # PlanarConfiguration 0
    # even length (PS3.5 7.1.1)
    return slice_copy(first, uid, number, ref,
                      ((0x7FE00010, "OB", data + b"\0" if len(data) % 2 else data),))


def _text(value: object) -> str:
    """A shared attribute's value as text: highdicom keeps dates and times as DA/TM objects,
    which never compare equal to the reference's plain strings (so the template was never
    used, and every slice cost a full build)."""
    return "" if value is None else str(value)


#: What highdicom copies from the reference image (patient, study): a slice whose reference
#: differs in any of them gets its own full build.
_SHARED = ("PatientID", "PatientName", "PatientBirthDate", "PatientSex", "StudyInstanceUID",
           "AccessionNumber", "StudyID", "StudyDate", "StudyTime", "ReferringPhysicianName")
