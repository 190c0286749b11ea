"""Comprehensive 3D SR builder: a TID 1500 Measurement Report per series, with highdicom.

Content (PS3.16 TID 1500 "Measurement Report", one TID 1501 "Measurements and Qualitative
Evaluations" group per method and one for quality):

* per method, per hemisphere (finding site SCT 372073000 "Cerebral hemisphere" with
  laterality SCT 7771000 "Left" / 24028007 "Right", PS3.16 CID 244): the mean (derivation
  SCT 373098007 "Mean") and sample SD (SCT 386136009 "Standard Deviation"; both in PS3.16
  CID 7464) of the map inside the brain mask, named by the method's quantity concept
  (:mod:`node.derive.concepts`) in the map's UCUM unit, and the number of voxels with a
  value; then the asymmetry index ``2 (L - R) / (L + R)``, the difference ``L - R`` and the
  fraction of brain voxels with a valid value. The group refers to the method's Parametric
  Map when the request has it, else to the source slices.
* quality: the water shift range in the brain and the sampled offset range (ppm), the M0
  signal-to-noise ratio (DCM 111787 "Signal to Noise Ratio"), the largest in-plane frame
  displacement (mm), the valid fraction of the series, and one qualitative evaluation per
  failed QC gate (or one saying every gate passed).

Where DICOM has no concept (voxel count, asymmetry index, B0 range, motion, QC gates) the
concept is a code of our private scheme 99CESTNODE, declared in the Coding Scheme
Identification Sequence. A figure that was not measured (None, or NaN because a hemisphere
is empty) is left out rather than written as a number.

Document flags: Completion COMPLETE, Verification UNVERIFIED (no person has checked it),
PreliminaryFlag PRELIMINARY (SR Document General Module, PS3.3 C.17.2), and Content
Qualification RESEARCH as on every output of ours.
"""

from __future__ import annotations

import math

import highdicom as hd
from highdicom.sr.coding import CodedConcept
from pydicom import Dataset
from pydicom.sr.codedict import codes
from pydicom.sr.coding import Code

from node import __version__
from node.derive.concepts import PRIVATE_SCHEME, declare_private_scheme, quantity_concept
from node.derive.report import ReportRequest, report_description
from node.derive.request import (
    MANUFACTURER,
    SOFTWARE_VERSIONS,
    frame_of,
    output_uid,
)

KIND = "sr"


def _private(value: str, meaning: str) -> CodedConcept:
    return CodedConcept(value, PRIVATE_SCHEME, meaning)


# Our concepts: pydicom's copy of the PS3.16 code dictionaries (codes.DCM, codes.SCT) has no
# concept for a voxel count, a hemispheric asymmetry index, a water-shift range, a frame
# displacement or a QC gate (searched by name on this machine).
VOXEL_COUNT = _private("CN-NVOXELS", "Number of voxels with a valid value")
ASYMMETRY_INDEX = _private("CN-ASYM-INDEX", "Hemispheric asymmetry index 2(L-R)/(L+R)")
HEMI_DIFFERENCE = _private("CN-HEMI-DIFF", "Left minus right hemisphere mean")
VALID_FRACTION = _private("CN-VALID-FRAC", "Brain voxels with a valid value")
B0_LOW = _private("CN-B0-LOW", "Low end of water shift range in brain")
B0_HIGH = _private("CN-B0-HIGH", "High end of water shift range in brain")
SAMPLED_LOW = _private("CN-SAT-LOW", "Lowest sampled saturation offset")
SAMPLED_HIGH = _private("CN-SAT-HIGH", "Highest sampled saturation offset")
MOTION_MAX = _private("CN-MOTION-MAX", "Largest in-plane frame displacement")
QC_GATE = _private("CN-QC-GATE", "Quality gate")
QC_PASSED = _private("CN-QC-PASS", "All quality gates passed")
QC_REASON_CODES = {
    "b0_range": _private("CN-QC-B0", "B0 range beyond the sampled offsets"),
    "snr": _private("CN-QC-SNR", "M0 signal-to-noise ratio below the limit"),
    "snr_unknown": _private("CN-QC-SNR-UNK", "M0 signal-to-noise ratio not measurable"),
    "motion": _private("CN-QC-MOTION", "Motion beyond the limit"),
    "valid_fraction": _private("CN-QC-VALID", "Too few brain voxels with a valid value"),
}
QC_GROUP_ID = "quality control"

# The unit codes (UCUM; "{voxels}" is a UCUM annotation, of dimension 1)
_UNITS = {
    "1": CodedConcept("1", "UCUM", "no units"),
    "%": CodedConcept("%", "UCUM", "percent"),
    "ppm": CodedConcept("[ppm]", "UCUM", "parts per million"),
    "mm": CodedConcept("mm", "UCUM", "millimeter"),
    "voxels": CodedConcept("{voxels}", "UCUM", "voxels"),
}
# Device observer: the node itself (PS3.16 TID 1004); a fixed UID of ours
DEVICE_UID = output_uid("cest-node", "device-observer", 0)


def qc_reason_concept(code: str, message: str) -> CodedConcept:
    """The coded value of a failed QC gate; an unknown gate code gets a code made from it."""
    if code in QC_REASON_CODES:
        return QC_REASON_CODES[code]
    return _private(f"CN-QC-{code.upper()}"[:16], message[:64] or code)


def _measurement(name: CodedConcept | Code, value: float, unit: CodedConcept, *,
                 derivation: Code | None = None,
                 sites: list[hd.sr.FindingSite] | None = None) -> hd.sr.Measurement | None:
    if value is None or not math.isfinite(value):
        return None
    return hd.sr.Measurement(name=name, value=float(value), unit=unit, derivation=derivation,
                             finding_sites=sites)


def _source_slices(req: ReportRequest) -> list[hd.sr.SourceImageForMeasurementGroup]:
    """The source slices of a measurement group: one item per single-frame reference, or per
    multi-frame instance with the frame numbers of the slices' reference frames (Referenced
    Frame Number of an IMAGE content item, PS3.3 C.18.4 Image Reference Macro, from memory)."""
    frames: dict[str, tuple[str, list[int]]] = {}
    singles: list[hd.sr.SourceImageForMeasurementGroup] = []
    for ref in req.references:
        f = frame_of(ref)
        if f is None:
            singles.append(hd.sr.SourceImageForMeasurementGroup(str(ref.SOPClassUID),
                                                                str(ref.SOPInstanceUID)))
            continue
        entry = frames.setdefault(str(ref.SOPInstanceUID), (str(ref.SOPClassUID), []))
        entry[1].append(int(f[1]))
    return singles + [
        hd.sr.SourceImageForMeasurementGroup(cls, uid, referenced_frame_numbers=sorted(nums))
        for uid, (cls, nums) in frames.items()]


def _method_group(req: ReportRequest, index: int, method: str) -> hd.sr.MeasurementsAndQualitativeEvaluations:
    ms = req.methods[method]
    quantity = quantity_concept(method, ms.title)
    unit = CodedConcept(ms.unit_ucum, "UCUM", ms.unit_meaning)
    items: list[hd.sr.Measurement | None] = []
    for side, laterality in (("left", codes.SCT.Left), ("right", codes.SCT.Right)):
        st = getattr(ms.hemispheres, side)
        site = [hd.sr.FindingSite(codes.SCT.CerebralHemisphere, laterality=laterality)]
        items.append(_measurement(quantity, st.mean, unit, derivation=codes.SCT.Mean, sites=site))
        items.append(_measurement(quantity, st.sd, unit, derivation=codes.SCT.StandardDeviation,
                                  sites=site))
        items.append(_measurement(VOXEL_COUNT, float(st.n), _UNITS["voxels"], sites=site))
    brain = [hd.sr.FindingSite(codes.SCT.Brain)]
    items.append(_measurement(ASYMMETRY_INDEX, ms.hemispheres.asymmetry_index, _UNITS["1"],
                              sites=brain))
    items.append(_measurement(HEMI_DIFFERENCE, ms.hemispheres.difference, unit, sites=brain))
    items.append(_measurement(VALID_FRACTION, 100.0 * ms.valid_fraction, _UNITS["%"],
                              sites=brain))
    pm = req.parametric_maps.get(method)
    if pm is not None:
        sources = [hd.sr.SourceImageForMeasurementGroup(str(pm.SOPClassUID),
                                                        str(pm.SOPInstanceUID))]
    else:
        sources = _source_slices(req)
    return hd.sr.MeasurementsAndQualitativeEvaluations(
        tracking_identifier=hd.sr.TrackingIdentifier(
            uid=output_uid(req.series_uid, "sr-group", index), identifier=method[:64]),
        algorithm_id=hd.sr.AlgorithmIdentification(name=f"cest-node {method}"[:64],
                                                   version=__version__),
        finding_sites=brain,
        measurements=[m for m in items if m is not None],
        source_images=sources,
    )


def _qc_group(req: ReportRequest, index: int) -> hd.sr.MeasurementsAndQualitativeEvaluations:
    f = req.qc
    brain = [hd.sr.FindingSite(codes.SCT.Brain)]

    def opt(x: float | None) -> float:
        return float("nan") if x is None else float(x)

    items = [
        _measurement(B0_LOW, opt(f.b0_low_ppm), _UNITS["ppm"], sites=brain),
        _measurement(B0_HIGH, opt(f.b0_high_ppm), _UNITS["ppm"], sites=brain),
        _measurement(SAMPLED_LOW, opt(f.sampled_low_ppm), _UNITS["ppm"]),
        _measurement(SAMPLED_HIGH, opt(f.sampled_high_ppm), _UNITS["ppm"]),
        _measurement(codes.DCM.SignalToNoiseRatio, opt(f.snr), _UNITS["1"], sites=brain),
        _measurement(MOTION_MAX, opt(f.max_motion_mm), _UNITS["mm"],
                     derivation=codes.SCT.Maximum),
        _measurement(VALID_FRACTION, 100.0 * opt(f.valid_fraction), _UNITS["%"], sites=brain),
    ]
    if req.qc_reasons:
        seen: list[str] = []
        evaluations = []
        for r in req.qc_reasons:
            concept = qc_reason_concept(r.code, r.message)
            if concept.value not in seen:  # one evaluation per gate, however many messages
                seen.append(concept.value)
                evaluations.append(hd.sr.QualitativeEvaluation(QC_GATE, concept))
    else:
        evaluations = [hd.sr.QualitativeEvaluation(QC_GATE, QC_PASSED)]
    return hd.sr.MeasurementsAndQualitativeEvaluations(
        tracking_identifier=hd.sr.TrackingIdentifier(
            uid=output_uid(req.series_uid, "sr-group", index), identifier=QC_GROUP_ID),
        algorithm_id=hd.sr.AlgorithmIdentification(name="cest-node quality control",
                                                   version=__version__),
        measurements=[m for m in items if m is not None],
        qualitative_evaluations=evaluations,
    )


def build(req: ReportRequest) -> list[Dataset]:
    """Build the Comprehensive 3D SR (TID 1500) of a report request.

    Returns
    -------
    list of Dataset
        One Comprehensive 3D SR document; its evidence lists the source slices and the
        Parametric Maps it refers to.
    """
    observer = hd.sr.ObserverContext(
        observer_type=codes.DCM.Device,
        observer_identifying_attributes=hd.sr.DeviceObserverIdentifyingAttributes(
            uid=DEVICE_UID, name=MANUFACTURER, manufacturer_name=MANUFACTURER,
            model_name=MANUFACTURER),
    )
    groups = [_method_group(req, i, m) for i, m in enumerate(req.methods)]
    groups.append(_qc_group(req, len(groups)))
    report = hd.sr.MeasurementReport(
        observation_context=hd.sr.ObservationContext(observer_device_context=observer),
        # LOINC 24590-2 "MR Brain" (PS3.16 CID 100 takes LOINC procedure codes)
        procedure_reported=codes.LN.BrainMRI,
        imaging_measurements=groups,
    )
    evidence = list(req.references) + [req.parametric_maps[m] for m in req.methods
                                       if m in req.parametric_maps]
    sr = hd.sr.Comprehensive3DSR(
        evidence=evidence,
        content=report,
        series_instance_uid=req.series_uid,
        series_number=req.series_number,
        sop_instance_uid=output_uid(req.series_uid, KIND, 0),
        instance_number=1,
        manufacturer=MANUFACTURER,
        is_complete=True,
        is_final=False,
        is_verified=False,
    )
    sr.PreliminaryFlag = "PRELIMINARY"
    sr.ContentQualification = "RESEARCH"
    sr.SoftwareVersions = SOFTWARE_VERSIONS
    sr.SeriesDescription = report_description("CEST measurements", "SR", req)
    declare_private_scheme(sr)
    return [sr]
