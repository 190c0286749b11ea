"""Enhanced MR Image Storage input: one multi-frame instance holding every frame of the series.

Frames are placed by their per-frame Plane Position and read their offset per frame (PS3.3
C.7.6.16 Multi-frame Functional Groups; C.7.6.16.2.2 Frame Content, C.7.6.16.2.3 Plane
Position). The object is checked against its IOD by dciodvfy (dicom3tools), sent by DCMTK
storescu to the running node, and the maps must equal those of the same phantom sent as a
classic one-instance-per-frame series; so must the Parametric Map, whose source is the
multi-frame instance itself.
"""

from __future__ import annotations

import copy
from dataclasses import replace

import numpy as np
import pytest
from pydicom import dcmread
from pydicom.uid import (
    Comprehensive3DSRStorage,
    EnhancedMRImageStorage,
    MRImageStorage,
    ParametricMapStorage,
    SecondaryCaptureImageStorage,
    SegmentationStorage,
)

from node import pipeline
from node.assemble import AssemblyError, read_offset_ppm
from node.config import OffsetRule, default_config
from node.derive import BUILDERS, DerivedRequest
from node.service import Node
from node.synth import enhanced_series, series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.node.harness import Collect, assembled
from tests.peers import StoreSCP, assert_dciodvfy_clean, storescu

SLICES, SIZE, SEED = 2, 32, 21


@pytest.fixture(scope="module")
def phantom():
    return make_phantom(slices=SLICES, size=SIZE, seed=SEED)


@pytest.fixture(scope="module")
def enhanced(phantom):
    return enhanced_series(phantom.signal, phantom.offsets_ppm, seed="enh")


def _assemble(datasets, protocol=None):
    cfg = default_config()
    return assembled(datasets, cfg if protocol is None else cfg.with_overrides(protocols=(protocol,)))


@pytest.fixture(scope="module")
def classic(phantom):
    return _assemble(series_from_arrays(phantom.signal, phantom.offsets_ppm, seed="enh"))


@pytest.mark.peers
def test_enhanced_instance_passes_dciodvfy(enhanced, tmp_path):
    # dciodvfy (dicom3tools) checks the Enhanced MR Image IOD, PS3.3 A.36.2
    path = write_series([enhanced], tmp_path)[0]
    assert_dciodvfy_clean([path])


def test_per_frame_private_offset_places_every_frame_like_the_classic_series(enhanced, classic):
    got = _assemble([enhanced])
    assert got.complete
    np.testing.assert_array_equal(got.offsets_ppm, classic.offsets_ppm)
    # same stored values, same placement by per-frame position and offset
    np.testing.assert_array_equal(got.signal, classic.signal)
    # each slice's reference is a single-frame view with that frame's geometry
    for ref, cref in zip(got.references, classic.references, strict=True):
        assert "PerFrameFunctionalGroupsSequence" not in ref
        assert [float(v) for v in ref.ImagePositionPatient] == \
            [float(v) for v in cref.ImagePositionPatient]
        assert [float(v) for v in ref.PixelSpacing] == [float(v) for v in cref.PixelSpacing]
        assert ref.SOPInstanceUID == enhanced.SOPInstanceUID


def test_ordered_list_by_per_frame_temporal_position_index(phantom, enhanced, classic):
    # TemporalPositionIndex sits in each frame's FrameContentSequence (PS3.3 C.7.6.16.2.2)
    proto = replace(default_config().protocols[0],
                    offset=OffsetRule(values_ppm=tuple(float(v) for v in phantom.offsets_ppm),
                                      order_by="TemporalPositionIndex"))
    got = _assemble([enhanced], proto)
    np.testing.assert_array_equal(got.offsets_ppm, classic.offsets_ppm)
    np.testing.assert_array_equal(got.signal, classic.signal)


def test_per_frame_offset_missing_in_one_frame_is_named(enhanced):
    broken = copy.deepcopy(enhanced)  # the fixture is shared: never change it
    item = broken.PerFrameFunctionalGroupsSequence[3]
    del item[(0x0029, 0x0010)]
    del item[(0x0029, 0x1010)]
    rule = default_config().protocols[0].offset
    assert read_offset_ppm(broken, rule, frame_index=2) == pytest.approx(
        float(enhanced.PerFrameFunctionalGroupsSequence[2][0x0029, 0x1010].value))
    with pytest.raises(AssemblyError, match=r"offset \(0029,xx10\) of 'CESTNODE SIM 1'.*missing"):
        read_offset_ppm(broken, rule, frame_index=3)


def _frames_at(enhanced, ipp):
    """1-based numbers of the frames of ``enhanced`` whose per-frame Plane Position is ``ipp``
    (PS3.3 C.7.6.16.2.3)."""
    want = [float(v) for v in ipp]
    return sorted(i + 1 for i, item in enumerate(enhanced.PerFrameFunctionalGroupsSequence)
                  if np.allclose([float(v) for v in item.PlanePositionSequence[0]
                                  .ImagePositionPatient], want, atol=1e-3))


def _pm_frames(pm):
    """(ImagePositionPatient, float frame) of each frame of a Parametric Map, in file order."""
    pixels = pm.pixel_array.reshape(-1, pm.Rows, pm.Columns)
    return [([float(v) for v in item.PlanePositionSequence[0].ImagePositionPatient], pixels[k])
            for k, item in enumerate(pm.PerFrameFunctionalGroupsSequence)]


@pytest.mark.peers
def test_storescu_enhanced_to_node_to_storescp_maps_equal_the_classic_run(
        tmp_path, enhanced, classic):
    # every output of an Enhanced MR source, the Parametric Map included: highdicom takes the
    # multi-frame instance itself as the PM's source (node/derive/sources.py)
    proto = replace(default_config().protocols[0], methods=("mtr_asym", "apt_star"),
                    model_based=False,
                    outputs=("derived_mr", "secondary_capture", "parametric_map",
                             "structured_report", "segmentation"))
    collect = Collect()
    path = write_series([enhanced], tmp_path / "scanner")[0]
    with StoreSCP(tmp_path / "archive") as archive:
        cfg = default_config(base_dir=tmp_path).with_overrides(
            port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False,
            destinations=[f"{archive.ae_title}@127.0.0.1:{archive.port}"],
            protocols=(proto,), release_grace_s=0.5)
        with Node(cfg, on_outcome=collect, keep_maps=True) as node:
            storescu(node.port, [path])
            (outcome,) = collect.wait(1)
            assert outcome.ok, outcome.error
            files = archive.wait_for(outcome.objects)
    # the classic series through the same pipeline, offline
    prep = pipeline.prepare(classic.signal, classic.offsets_ppm)
    classic_maps = {name: pipeline.compute(prep, name).values for name in ("mtr_asym", "apt_star")}
    for name, values in classic_maps.items():
        np.testing.assert_array_equal(outcome.maps[name], values)
    # the derived objects of an Enhanced MR source pass their IODs (dciodvfy)
    one_of_each = {}
    pms = []
    for f in files:
        ds = dcmread(f, stop_before_pixels=True)
        one_of_each.setdefault(str(ds.SOPClassUID), f)
        if ds.SOPClassUID == ParametricMapStorage:
            pms.append(f)
    assert set(one_of_each) == {MRImageStorage, SecondaryCaptureImageStorage,
                                ParametricMapStorage, Comprehensive3DSRStorage,
                                SegmentationStorage}
    assert_dciodvfy_clean(one_of_each.values())
    assert len(pms) == 2
    for f in pms:
        pm = dcmread(f)
        name = {"MTR_ASYM": "mtr_asym", "APT_STAR": "apt_star"}[pm.ContentLabel]
        # the PM built from the classic series by the same builder: same frame positions in
        # the same order, the same float32 values (NaN where invalid)
        classic_pm = BUILDERS["parametric_map"](DerivedRequest(
            references=classic.references, values=classic_maps[name], method=name,
            title=name, unit_ucum="%", series_uid="1.2.826.0.1.3680043.10.1", series_number=1))[0]
        got, want = _pm_frames(pm), _pm_frames(classic_pm)
        assert len(got) == SLICES
        for (gp, gv), (wp, wv) in zip(got, want, strict=True):
            assert gp == pytest.approx(wp, abs=1e-4)
            np.testing.assert_array_equal(gv, wv)
        # the source is the real multi-frame instance, named once (Source Image Sequence of
        # the General Image module, PS3.3 C.7.6.1, from memory), each PM frame derived from
        # every frame of its slice (Derivation Image Macro, PS3.3 C.7.6.16.2.6: Referenced
        # Frame Number per source frame)
        assert [(r.ReferencedSOPClassUID, r.ReferencedSOPInstanceUID)
                for r in pm.SourceImageSequence] == [(EnhancedMRImageStorage,
                                                      enhanced.SOPInstanceUID)]
        for item, (ipp, _) in zip(pm.PerFrameFunctionalGroupsSequence, got, strict=True):
            srcs = item.DerivationImageSequence[0].SourceImageSequence
            assert {s.ReferencedSOPInstanceUID for s in srcs} == {enhanced.SOPInstanceUID}
            assert sorted(int(s.ReferencedFrameNumber) for s in srcs) == \
                _frames_at(enhanced, ipp)
            assert len(srcs) == classic.signal.shape[-1]
