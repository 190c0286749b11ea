"""The output builders: one per output kind, each ``build(req) -> list[Dataset]``.

Every object they make is research content: SeriesDescription starts with ``RESEARCH``,
Content Qualification (0018,9004) is RESEARCH, Manufacturer is ``cest-node`` with our
Software Versions, and it lives in a new series of the source's study, linked to the
source images. SOP Instance UIDs are derived from the output series UID and the index
(:func:`output_uid`), so a rebuild gives the same UIDs.

``BUILDERS`` maps the output names of a protocol's ``outputs`` list to the builders:

``parametric_map``
    :func:`node.derive.pm.build`, one float32 Parametric Map (PS3.3 A.75) per series.
``derived_mr``
    :func:`node.derive.mr.build`, one int16 derived MR Image (PS3.3 A.4) per slice.
``secondary_capture``
    :func:`node.derive.sc.build`, one RGB Secondary Capture (PS3.3 A.8.1) per slice.

``REPORT_BUILDERS`` holds the per-series builders, which take a :class:`ReportRequest`
(every method's map of one source series, the brain mask, QC figures and reasons):

``structured_report``
    :func:`node.derive.sr.build`, one Comprehensive 3D SR (TID 1500) of hemisphere
    statistics and quality figures.
``segmentation``
    :func:`node.derive.seg.build`, one binary Segmentation of the research candidate region.
``summary``
    :func:`node.derive.summary.build`, one RGB Secondary Capture with every map side by side.
"""

from __future__ import annotations

from collections.abc import Callable

from pydicom import Dataset

from node.derive import iodtable, mr, pm, sc, seg, sr, summary
from node.derive.report import ReportRequest, qc_note
from node.derive.request import RESEARCH_MARKER, DerivedRequest, header_only, output_uid

iodtable.install()  # highdicom's IOD table lookups, remembered (node.derive.iodtable)

Builder = Callable[[DerivedRequest], list[Dataset]]

BUILDERS: dict[str, Builder] = {
    "parametric_map": pm.build,
    "derived_mr": mr.build,
    "secondary_capture": sc.build,
}

ReportBuilder = Callable[[ReportRequest], list[Dataset]]

REPORT_BUILDERS: dict[str, ReportBuilder] = {
    "structured_report": sr.build,
    "segmentation": seg.build,
    "summary": summary.build,
}

__all__ = ["BUILDERS", "REPORT_BUILDERS", "RESEARCH_MARKER", "Builder", "DerivedRequest",
           "ReportBuilder", "ReportRequest", "header_only", "output_uid", "qc_note"]
