"""The builders on an Enhanced MR source: one multi-frame instance holds every (slice, offset)
frame, the requests carry single-frame views of it (node.assemble.FrameHeader).

Sources outside the project: dciodvfy (dicom3tools) checks the objects against their PS3.3
IODs; PS3.3 C.7.6.16 (a functional group macro such as Plane Orientation or Pixel Measures
sits either in the shared or in every per-frame item, from memory) and C.7.6.16.2.6
(Derivation Image Macro, Referenced Frame Number) say what the references mean; highdicom
reads the SR back.
"""

from __future__ import annotations

import copy

import highdicom as hd
import numpy as np
import pytest
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import EnhancedMRImageStorage

from node import pipeline
from node.derive import BUILDERS, REPORT_BUILDERS, DerivedRequest, ReportRequest
from node.service import write_datasets
from node.synth import enhanced_series, series_from_arrays
from quant.phantom import make_phantom
from tests.node.harness import assembled
from tests.peers import assert_dciodvfy_clean

SLICES, SIZE, SEED = 3, 24, 5
PM_UID = "1.2.826.0.1.3680043.10.77.1"


@pytest.fixture(scope="module")
def phantom():
    return make_phantom(slices=SLICES, size=SIZE, seed=SEED)


@pytest.fixture(scope="module")
def enhanced(phantom):
    return enhanced_series(phantom.signal, phantom.offsets_ppm, seed="derive-enh")


@pytest.fixture(scope="module")
def series(enhanced):
    return assembled([enhanced])


@pytest.fixture(scope="module")
def mtr(series):
    prep = pipeline.prepare(series.signal, series.offsets_ppm)
    return prep, pipeline.compute(prep, "mtr_asym")


def _pm(references, values):
    return BUILDERS["parametric_map"](DerivedRequest(
        references=references, values=values, method="mtr_asym", title="MTRasym",
        unit_ucum="%", series_uid=PM_UID, series_number=3))[0]


def _geometry(pm):
    """(per-frame positions, shared orientation, shared spacing and thickness) of a PM."""
    shared = pm.SharedFunctionalGroupsSequence[0]
    return ([[float(v) for v in f.PlanePositionSequence[0].ImagePositionPatient]
             for f in pm.PerFrameFunctionalGroupsSequence],
            [float(v) for v in shared.PlaneOrientationSequence[0].ImageOrientationPatient],
            [float(v) for v in shared.PixelMeasuresSequence[0].PixelSpacing],
            float(shared.PixelMeasuresSequence[0].SliceThickness))


def _per_frame_geometry(enhanced):
    """The same instance with Plane Orientation and Pixel Measures in every frame's groups
    instead of the shared ones (as some scanners write them)."""
    moved = copy.deepcopy(enhanced)
    shared = moved.SharedFunctionalGroupsSequence[0]
    for name in ("PlaneOrientationSequence", "PixelMeasuresSequence"):
        for item in moved.PerFrameFunctionalGroupsSequence:
            item[name] = copy.deepcopy(shared[name])
        del shared[name]
    return moved


def test_pm_geometry_comes_from_the_functional_groups(series, mtr, phantom, enhanced):
    _, res = mtr
    pm = _pm(series.references, res.values)
    classic = assembled(series_from_arrays(phantom.signal, phantom.offsets_ppm,
                                           seed="derive-enh"))
    assert _geometry(pm) == _geometry(_pm(classic.references, res.values))
    shared = enhanced.SharedFunctionalGroupsSequence[0]
    positions, iop, spacing, thickness = _geometry(pm)
    assert iop == [float(v) for v in shared.PlaneOrientationSequence[0].ImageOrientationPatient]
    assert spacing == [float(v) for v in shared.PixelMeasuresSequence[0].PixelSpacing]
    assert len(positions) == SLICES  # one PM frame per slice, not per source frame
    assert int(pm.NumberOfFrames) == SLICES < int(enhanced.NumberOfFrames)


@pytest.mark.peers
def test_per_frame_orientation_and_measures_give_the_same_pm(series, mtr, enhanced, tmp_path):
    _, res = mtr
    moved = _per_frame_geometry(enhanced)
    got = assembled([moved])
    pm = _pm(got.references, res.values)
    assert _geometry(pm) == _geometry(_pm(series.references, res.values))
    # the instance the request keeps is not changed by the builder
    assert "PlaneOrientationSequence" not in got.references[0].multiframe \
        .SharedFunctionalGroupsSequence[0]
    assert_dciodvfy_clean(write_datasets([pm], tmp_path))


def test_per_frame_pixel_spacing_that_differs_is_named(enhanced, mtr):
    _, res = mtr
    moved = _per_frame_geometry(enhanced)
    moved.PerFrameFunctionalGroupsSequence[5].PixelMeasuresSequence[0].PixelSpacing = [2.0, 2.0]
    got = assembled([moved])
    with pytest.raises(ValueError, match="PixelMeasuresSequence of frame 6 differs"):
        _pm(got.references, res.values)


def test_mixed_and_broken_frame_views_are_refused(series, mtr, phantom):
    _, res = mtr
    classic = assembled(series_from_arrays(phantom.signal, phantom.offsets_ppm,
                                           seed="derive-enh"))
    mixed = [series.references[0], *classic.references[1:]]
    with pytest.raises(ValueError, match=r"references\[1\] is a single-frame image"):
        _pm(mixed, res.values)
    broken = copy.copy(series.references[1])
    broken.multiframe = series.references[1].multiframe
    broken.frame_number = 10_000
    with pytest.raises(ValueError, match=r"references\[1\]\.frame_number 10000 is outside"):
        _pm([series.references[0], broken, series.references[2]], res.values)


@pytest.mark.peers
def test_reports_of_an_enhanced_source_name_its_frames(series, mtr, tmp_path):
    prep, res = mtr
    req = ReportRequest(references=series.references,
                        maps={"mtr_asym": (res.title, res.unit_ucum, res.values)},
                        mask=prep.mask, m0=prep.m0, series_uid="1.2.826.0.1.3680043.10.77.2",
                        series_number=9)
    out = [d for kind in ("structured_report", "segmentation")
           for d in REPORT_BUILDERS[kind](req)]
    paths = write_datasets(out, tmp_path)
    assert_dciodvfy_clean(paths)
    # SR without a Parametric Map: the group names the instance once, with the frame numbers
    # of the slices' reference frames (TID 1500 source images, read back by highdicom)
    sr = hd.sr.srread(next(p for p, d in zip(paths, out, strict=True)
                           if d.Modality == "SR"))
    groups = {str(g.tracking_identifier): g for g in sr.content.get_image_measurement_groups()}
    group = groups["mtr_asym"]
    (src,) = group.source_images
    assert src.referenced_sop_instance_uid == series.references[0].SOPInstanceUID
    assert src.referenced_sop_class_uid == EnhancedMRImageStorage
    assert list(src.referenced_frame_numbers) == sorted(
        r.frame_number for r in series.references)
    # SEG: the instance is its source, every SEG frame derived from frames of the instance
    seg = next(d for d in out if d.Modality == "SEG")
    assert [r.ReferencedSOPInstanceUID for r in seg.SourceImageSequence] == [
        series.references[0].SOPInstanceUID]
    for item in seg.PerFrameFunctionalGroupsSequence:
        for s in item.DerivationImageSequence[0].SourceImageSequence:
            assert s.ReferencedSOPInstanceUID == series.references[0].SOPInstanceUID
            assert 1 <= int(s.ReferencedFrameNumber) <= series.references[0].multiframe \
                .NumberOfFrames


def test_views_keep_the_instance_header_without_pixels(series, enhanced):
    # one header object per instance, shared by the frame views, pixel data dropped
    mfs = {id(r.multiframe) for r in series.references}
    assert len(mfs) == 1
    mf = series.references[0].multiframe
    assert "PixelData" not in mf
    assert len(mf.PerFrameFunctionalGroupsSequence) == int(enhanced.NumberOfFrames)
    # each view's frame: the per-frame position of that frame is the view's position
    for ref in series.references:
        item = mf.PerFrameFunctionalGroupsSequence[ref.frame_number - 1]
        assert [float(v) for v in item.PlanePositionSequence[0].ImagePositionPatient] == \
            [float(v) for v in ref.ImagePositionPatient]
    assert isinstance(mf.PerFrameFunctionalGroupsSequence, DicomSequence)
    assert np.isfinite(series.signal).all()
