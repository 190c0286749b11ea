"""Segmentation builder (PS3.3 A.51, Segmentation IOD, BINARY), with highdicom.

One segment: the **research candidate region** of one method's map, i.e. the brain voxels of
each hemisphere whose value lies more than ``n`` SDs below the mean of the other hemisphere
(:func:`quant.qc.candidate_region`, applied to the left half against the right half's
statistics and to the right half against the left's). It marks where a measure departs
from the contralateral side, for a researcher to look at; it is not a lesion segmentation
and not a diagnosis, and the segment says so in its label and description.

Codes: segmented property category SCT 309825002 "Spatial and Relational Concept" (PS3.16
CID 7150). We do not use SCT 49755003 "Morphologically Abnormal Structure", which would
assert an abnormality (a diagnostic statement we cannot make from a threshold). The
property type is ours (99CESTNODE ``CN-CANDIDATE``), as no standard type says "below the
contralateral mean"; the anatomic region is SCT 12738006 "Brain". Algorithm family DCM
123105 "Histogram Analysis" (CID 7162), the closest family for a threshold set from the
distribution (mean and SD) of the other hemisphere's values.
"""

from __future__ import annotations

import highdicom as hd
import numpy as np
from highdicom.sr.coding import CodedConcept
from pydicom import Dataset
from pydicom.sr.codedict import codes

from node import __version__
from node.derive.concepts import PRIVATE_SCHEME, declare_private_scheme
from node.derive.report import ReportRequest, report_description
from node.derive.request import (
    MANUFACTURER,
    RESEARCH_STATEMENT,
    SERIES_KEYWORDS,
    SOFTWARE_VERSIONS,
    content_label,
    copy_keywords,
    output_uid,
)
from node.derive.sources import source_arguments
from quant.qc import candidate_region

KIND = "seg"
SEGMENT_LABEL = "research candidate region"
SEGMENT_DESCRIPTION = "research candidate region (not a lesion diagnosis)"
CANDIDATE_TYPE = CodedConcept("CN-CANDIDATE", PRIVATE_SCHEME,
                              "Research candidate region below contralateral mean")
# SCT 309825002 "Spatial and Relational Concept", PS3.16 CID 7150 (pydicom's copy)
CATEGORY = codes.cid7150.SpatialAndRelationalConcept


def candidate_mask(req: ReportRequest) -> np.ndarray:
    """The research candidate region of ``req.candidate_method``, ``(slices, rows, cols)``.

    ``left & (v < mean_R - n SD_R)`` united with ``right & (v < mean_L - n SD_L)``, each
    through :func:`quant.qc.candidate_region`; a side whose other half has no mean or SD
    (fewer than two valid voxels) contributes nothing.
    """
    assert req.candidate_method is not None
    ms = req.methods[req.candidate_method]
    left, right = req.hemisphere_masks()
    out = np.zeros(req.mask.shape, dtype=bool)
    for side_mask, other in ((left, ms.hemispheres.right), (right, ms.hemispheres.left)):
        if not (np.isfinite(other.mean) and np.isfinite(other.sd)):
            continue
        out |= candidate_region(ms.values, side_mask, contralateral_mean=other.mean,
                                contralateral_sd=other.sd, n_sd=req.candidate_n_sd,
                                min_voxels=req.candidate_min_voxels)
    return out


def build(req: ReportRequest) -> list[Dataset]:
    """Build the binary Segmentation of the research candidate region of a request.

    Returns
    -------
    list of Dataset
        One Segmentation with one segment; a frame per source slice that holds part of the
        region (every slice, all empty, when the region is empty, so the object still says
        "none found").
    """
    assert req.candidate_method is not None
    method = req.candidate_method
    ms = req.methods[method]
    region = candidate_mask(req)
    n_sd = f"{req.candidate_n_sd:g}"
    algorithm = hd.AlgorithmIdentificationSequence(
        name="cest-node candidate region",
        family=codes.cid7162.HistogramAnalysis,
        version=__version__,
        parameters={"method": method, "n_sd": n_sd,
                    "min_voxels": str(req.candidate_min_voxels)},
    )
    segment = hd.seg.SegmentDescription(
        segment_number=1,
        segment_label=SEGMENT_LABEL,
        segmented_property_category=CATEGORY,
        segmented_property_type=CANDIDATE_TYPE,
        algorithm_type=hd.seg.SegmentAlgorithmTypeValues.AUTOMATIC,
        algorithm_identification=algorithm,
        tracking_uid=output_uid(req.series_uid, "seg-track", 1),
        tracking_id=f"candidate {method}"[:64],
        anatomic_regions=[codes.SCT.Brain],
    )
    segment.SegmentDescription = SEGMENT_DESCRIPTION
    seg = hd.seg.Segmentation(
        # an Enhanced MR source: the instance, with per-frame references (node.derive.sources)
        **source_arguments(req.references),
        pixel_array=region.astype(np.uint8),
        segmentation_type=hd.seg.SegmentationTypeValues.BINARY,
        segment_descriptions=[segment],
        series_instance_uid=req.series_uid,
        series_number=req.series_number,
        sop_instance_uid=output_uid(req.series_uid, KIND, 0),
        instance_number=1,
        manufacturer=MANUFACTURER,
        manufacturer_model_name=MANUFACTURER,
        software_versions=SOFTWARE_VERSIONS,
        device_serial_number="0",
        content_label=content_label("candidate"),
        content_description="Research candidate region, not a diagnosis",
        omit_empty_frames=bool(region.any()),
    )
    copy_keywords(seg, req.references[0], SERIES_KEYWORDS)
    seg.ContentQualification = "RESEARCH"
    seg.SeriesDescription = report_description(f"candidate {ms.title}", "SEG", req)
    seg.ImageComments = (
        f"{SEGMENT_DESCRIPTION}: brain voxels of {ms.title} [{ms.unit_ucum}] more than {n_sd} "
        f"SD below the contralateral hemisphere mean. {RESEARCH_STATEMENT}"
    )[:10240]
    declare_private_scheme(seg)
    return [seg]
