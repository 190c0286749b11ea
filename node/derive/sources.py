"""The source images of a highdicom derived image (Parametric Map, Segmentation).

highdicom takes either single-frame source images, one per output frame, or ONE multi-frame
source image whose frames it matches to the output frames by position (highdicom 0.28,
``_Image._init_multiframe_image``; measured on this machine). Our requests hold one
reference per slice; for an Enhanced MR source each is a view of one frame of the instance
(:class:`node.assemble.FrameHeader`), while the instance holds every (slice, offset) frame.

For such a source :func:`source_arguments` gives highdicom the instance itself, the output's
plane positions (one per slice, from the per-frame Plane Position of the frame the reference
views), and lets highdicom take orientation and pixel measures from the instance's
functional groups. highdicom then matches every output frame to the source frames at its
position (every offset of that slice) and writes a Derivation Image / Source Image item with
Referenced Frame Number for each (PS3.3 C.7.6.16.2.6 Derivation Image Macro; Referenced
Frame Number from the Image SOP Instance Reference Macro, PS3.3 Table 10-3, from memory),
and the Source Image Sequence names the instance once.

highdicom reads orientation and pixel measures of a multi-frame source from its Shared
Functional Groups (PS3.3 C.7.6.16.2.1 Pixel Measures, C.7.6.16.2.4 Plane Orientation). A
scanner may put them per frame instead; when every frame has the same values, the instance
handed to highdicom is a shallow copy whose shared item also holds them (the per-frame
items are untouched), else the request is refused with a ValueError naming the attribute.
"""

from __future__ import annotations

import copy
from typing import Any

import highdicom as hd
import numpy as np
from pydicom import Dataset
from pydicom.dataelem import DataElement
from pydicom.sequence import Sequence as DicomSequence
from pydicom.tag import Tag

from node.derive.request import multiframe_sources

_SHARED_GEOMETRY = ("PlaneOrientationSequence", "PixelMeasuresSequence")
_SHARED_TAG = Tag(0x5200, 0x9229)  # SharedFunctionalGroupsSequence
_ORIENTATION_TOLERANCE = 1e-4  # direction cosines; the assembler uses the same


def _geometry_values(item: Dataset, name: str) -> tuple[float, ...]:
    inner = item[name][0]
    if name == "PlaneOrientationSequence":
        return tuple(float(v) for v in inner.ImageOrientationPatient)
    return tuple(float(v) for v in inner.PixelSpacing) + tuple(
        float(inner.get(kw)) if inner.get(kw) not in (None, "") else float("nan")
        for kw in ("SliceThickness", "SpacingBetweenSlices"))


def for_highdicom(mf: Dataset) -> Dataset:
    """``mf`` as highdicom reads a multi-frame source: orientation and pixel measures in the
    shared functional groups (a shallow copy when they are per frame and agree)."""
    shared = mf.SharedFunctionalGroupsSequence[0]
    missing = [n for n in _SHARED_GEOMETRY if n not in shared]
    if not missing:
        return mf
    frames = mf.PerFrameFunctionalGroupsSequence
    new_shared = Dataset(dict(shared._dict))  # copy.copy would share the element dict
    for name in missing:
        if not all(name in f for f in frames):
            raise ValueError(f"multi-frame source: {name} is neither shared nor in every frame")
        first = _geometry_values(frames[0], name)
        for i, f in enumerate(frames):
            got = _geometry_values(f, name)
            if len(got) != len(first) or not np.allclose(got, first, atol=_ORIENTATION_TOLERANCE,
                                                         equal_nan=True):
                raise ValueError(f"multi-frame source: {name} of frame {i + 1} differs from "
                                 "frame 1; one derived image cannot hold both geometries")
        new_shared[name] = copy.copy(frames[0][name])
    elems = dict(mf._dict)
    # a new element: setting the attribute on the copy would change the element both share
    elems[_SHARED_TAG] = DataElement(_SHARED_TAG, "SQ", DicomSequence([new_shared]))
    view = Dataset(elems)
    if hasattr(mf, "file_meta"):
        view.file_meta = mf.file_meta
    return view


def source_arguments(references: list[Dataset], *,
                     sources: list[Dataset] | None = None) -> dict[str, Any]:
    """Keyword arguments ``source_images``, ``further_source_images`` (and for a multi-frame
    source ``plane_positions``) of a highdicom derived image with one frame per reference.

    Classic source: the references, and ``sources`` as further sources. Multi-frame source:
    the first instance as the source image, any other instance the references are frames
    of as a further source (highdicom matches its frames too); ``sources`` is not used, as
    the per-frame references already name every frame of each slice.
    """
    multiframe = multiframe_sources(references)
    if not multiframe:
        return {"source_images": references, "further_source_images": sources}
    instances = [for_highdicom(mf) for mf in multiframe]
    positions = [
        hd.PlanePositionSequence(hd.CoordinateSystemNames.PATIENT,
                                 [float(v) for v in ref.ImagePositionPatient])
        for ref in references
    ]
    return {"source_images": instances[:1], "further_source_images": instances[1:] or None,
            "plane_positions": positions}
