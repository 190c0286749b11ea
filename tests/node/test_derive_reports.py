"""The per-series report builders: Structured Report, Segmentation, summary page, QC notes.

Sources outside the project: dciodvfy (dicom3tools) checks each object against the PS3.3
IODs; highdicom reads the SR (PS3.16 TID 1500) and the SEG back; DCMTK dcmj2pnm renders the
summary page as a viewer would; numpy computes every statistic independently of quant.qc.
Geometry: DICOM PS3.3 C.7.6.2.1.1 (LPS patient coordinates, +x towards the patient's left;
the column index grows along the first ImageOrientationPatient triplet).
"""

from __future__ import annotations

import copy
import subprocess
from pathlib import Path

import highdicom as hd
import numpy as np
import pydicom
import pytest
from PIL import Image
from pydicom.sr.codedict import codes

from node.derive import BUILDERS, REPORT_BUILDERS, DerivedRequest, ReportRequest, qc_note
from node.derive.concepts import PRIVATE_SCHEME, quantity_concept
from node.derive.render import RESEARCH_BANNER
from node.derive.seg import SEGMENT_DESCRIPTION, candidate_mask
from node.derive.sr import ASYMMETRY_INDEX, QC_GATE, QC_GROUP_ID, QC_PASSED, VOXEL_COUNT
from node.derive.summary import render_page
from node.synth import PRIVATE_CREATOR, PRIVATE_GROUP, series_from_arrays
from quant.phantom import make_phantom
from quant.qc import QcFigures, QcReason, qc_gates
from quant.registry import METHODS
from tests.peers import PEER_ENV, assert_dciodvfy_clean, require

METHODS4 = ("mtr_asym", "apt_star", "mtr_asym_t1", "arex")  # the four model-free measures
FIGURES = QcFigures(b0_low_ppm=-0.31, b0_high_ppm=0.28, sampled_low_ppm=-6.0,
                    sampled_high_ppm=6.0, snr=84.5, max_motion_mm=0.42, valid_fraction=0.973)


def _offset(ds: pydicom.Dataset) -> float:
    return float(ds.private_block(PRIVATE_GROUP, PRIVATE_CREATOR)[0x10].value)


def make_report_case(*, slices: int = 3, size: int = 32, seed: int = 1,
                     methods: tuple[str, ...] = METHODS4):
    """The phantom as DICOM (node.synth), its header-only M0 references per slice in slice
    order, and the model-free maps computed by the registry on the phantom's Z-spectra."""
    from node import pipeline

    ph = make_phantom(slices=slices, size=size, seed=seed)
    series = series_from_arrays(ph.signal, ph.offsets_ppm, seed=f"report-test-{seed}")
    refs = sorted((d for d in series if _offset(d) < -20.0),
                  key=lambda d: float(d.ImagePositionPatient[2]))
    for d in refs:
        del d.PixelData
    prep = pipeline.prepare(ph.signal, ph.offsets_ppm)
    maps = {}
    for m in methods:
        info = METHODS[m]
        values = np.asarray(info.compute(prep.z, prep.offsets_ppm, t1_s=ph.t1_s), np.float32)
        maps[m] = (info.title, info.unit_ucum, values)
    return ph, refs, prep, maps


@pytest.fixture(scope="module")
def case():
    return make_report_case()


def make_req(case, **kw) -> ReportRequest:
    ph, refs, prep, maps = case
    opts = dict(references=refs, maps=maps, mask=prep.mask, m0=prep.m0, qc=FIGURES,
                series_uid="1.2.826.0.1.3680043.10.7.1", series_number=9101)
    opts.update(kw)
    return ReportRequest(**opts)  # type: ignore[arg-type]


def parametric_map(case, method: str) -> pydicom.Dataset:
    _, refs, _, maps = case
    title, unit, values = maps[method]
    req = DerivedRequest(references=refs, values=values, method=method, title=title,
                         unit_ucum=unit, series_uid="1.2.826.0.1.3680043.10.7.2",
                         series_number=9102)
    return BUILDERS["parametric_map"](req)[0]


def _write(ds: pydicom.Dataset, path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    ds.save_as(path, enforce_file_format=True)
    return path


def numpy_hemispheres(values: np.ndarray, mask: np.ndarray, *, left_is_high_column: bool):
    """Independent of quant.qc: midline = mean column index of the mask; a voxel at least half
    a column away from it belongs to that side (our documented rule)."""
    cols = np.broadcast_to(np.arange(mask.shape[-1], dtype=np.float64), mask.shape)
    mid = cols[mask].mean()
    high, low = mask & (cols >= mid + 0.5), mask & (cols <= mid - 0.5)
    left, right = (high, low) if left_is_high_column else (low, high)
    out = {}
    for side, m in (("left", left), ("right", right)):
        v = values[m & np.isfinite(values)].astype(np.float64)
        out[side] = (v.mean(), v.std(ddof=1), v.size)
    return out, left, right


def _measurements(group) -> dict[tuple[str, str, str], float]:
    """{(concept code, derivation code, laterality code): value} of a TID 1501 group."""
    out = {}
    for m in group.get_measurements():
        deriv = m.derivation.value if m.derivation is not None else ""
        lat = ""
        for site in m.finding_sites:
            if site.laterality is not None:
                lat = site.laterality.value
        out[(m.name.value, deriv, lat)] = m.value
    return out


# ------------------------------------------------------------------ dciodvfy
@pytest.mark.peers
@pytest.mark.parametrize("kind", sorted(REPORT_BUILDERS))
@pytest.mark.parametrize("failed", [False, True])
def test_report_outputs_pass_dciodvfy(case, kind, failed, tmp_path):
    reasons = qc_gates(QcFigures(snr=8.0, max_motion_mm=3.1)) if failed else []
    req = make_req(case, qc_reasons=reasons, candidate_n_sd=1.0,
                   parametric_maps={"mtr_asym": parametric_map(case, "mtr_asym")})
    out = REPORT_BUILDERS[kind](req)
    assert len(out) == 1
    path = _write(out[0], tmp_path / f"{kind}.dcm")
    assert_dciodvfy_clean([path])  # dicom3tools: no "Error" line against the PS3.3 IOD
    ds = pydicom.dcmread(path)
    assert ds.SeriesDescription.startswith("RESEARCH")
    assert ds.ContentQualification == "RESEARCH"
    assert len(ds.SeriesDescription) <= 64  # LO (PS3.5 Table 6.2-1)
    assert ("QC:SNR,MOTION" in ds.SeriesDescription) is failed


@pytest.mark.peers
def test_empty_candidate_region_still_makes_a_valid_segmentation(case, tmp_path):
    ph, refs, prep, maps = case
    flat = np.where(prep.mask, 1.0, np.nan).astype(np.float32)
    req = make_req(case, maps={"mtr_asym": ("flat", "%", flat)})
    assert not candidate_mask(req).any()  # SD 0, nothing below the other side's mean
    ds = REPORT_BUILDERS["segmentation"](req)[0]
    path = _write(ds, tmp_path / "seg.dcm")
    assert_dciodvfy_clean([path])
    seg = hd.seg.segread(path)
    px = seg.get_pixels_by_source_instance([str(r.SOPInstanceUID) for r in refs],
                                           segment_numbers=[1])
    assert px.shape == (len(refs), *prep.mask.shape[1:], 1) and not px.any()


# ------------------------------------------------------------------ Structured Report
def test_sr_numbers_equal_numpy_on_the_maps(case, tmp_path):
    ph, refs, prep, maps = case
    pm = parametric_map(case, "mtr_asym")
    req = make_req(case, parametric_maps={"mtr_asym": pm})
    path = _write(REPORT_BUILDERS["structured_report"](req)[0], tmp_path / "sr.dcm")
    sr = hd.sr.srread(path)  # highdicom parses TID 1500 back
    # SR Document General Module (PS3.3 C.17.2): flags as the issue asks
    assert (sr.PreliminaryFlag, sr.VerificationFlag, sr.CompletionFlag) == (
        "PRELIMINARY", "UNVERIFIED", "COMPLETE")
    assert sr.ContentQualification == "RESEARCH"
    assert any(i.CodingSchemeDesignator == PRIVATE_SCHEME
               for i in sr.CodingSchemeIdentificationSequence)
    groups = {str(g.tracking_identifier): g for g in sr.content.get_image_measurement_groups()}
    assert set(groups) == {*METHODS4, QC_GROUP_ID}
    mask = prep.mask
    # synth writes ImageOrientationPatient 1\0\0\0\1\0: columns grow towards patient left
    for method in METHODS4:
        values = maps[method][2]
        expect, _, _ = numpy_hemispheres(values, mask, left_is_high_column=True)
        got = _measurements(groups[method])
        # the same quantity concept as the method's Parametric Map (DCM 113098 for MTRasym)
        concept = quantity_concept(method, maps[method][0]).value
        for side, lat in (("left", codes.SCT.Left.value), ("right", codes.SCT.Right.value)):
            mean, sd, n = expect[side]
            matching = [k for k in got if k[1] == codes.SCT.Mean.value and k[2] == lat]
            assert len(matching) == 1
            assert matching[0][0] == concept
            np.testing.assert_allclose(got[matching[0]], mean, rtol=1e-9)
            sd_key = next(k for k in got
                          if k[1] == codes.SCT.StandardDeviation.value and k[2] == lat)
            np.testing.assert_allclose(got[sd_key], sd, rtol=1e-9)
            assert got[(VOXEL_COUNT.value, "", lat)] == n
        ai = 2 * (expect["left"][0] - expect["right"][0]) / (expect["left"][0] + expect["right"][0])
        np.testing.assert_allclose(got[(ASYMMETRY_INDEX.value, "", "")], ai, rtol=1e-9)
        valid = np.isfinite(values[mask]).mean() * 100
        np.testing.assert_allclose(got[("CN-VALID-FRAC", "", "")], valid, rtol=1e-9)
    # the mtr_asym group refers to its Parametric Map, and the evidence lists it
    src = groups["mtr_asym"].source_images
    assert [s.referenced_sop_instance_uid for s in src] == [pm.SOPInstanceUID]
    evidence = {i.ReferencedSOPInstanceUID
                for st in sr.CurrentRequestedProcedureEvidenceSequence
                for se in st.ReferencedSeriesSequence for i in se.ReferencedSOPSequence}
    assert pm.SOPInstanceUID in evidence and refs[0].SOPInstanceUID in evidence
    # the quality group: figures as given, in their units
    qc = _measurements(groups[QC_GROUP_ID])
    assert qc[(codes.DCM.SignalToNoiseRatio.value, "", "")] == pytest.approx(84.5)
    assert qc[("CN-B0-LOW", "", "")] == pytest.approx(-0.31)
    assert qc[("CN-B0-HIGH", "", "")] == pytest.approx(0.28)
    assert qc[("CN-MOTION-MAX", codes.SCT.Maximum.value, "")] == pytest.approx(0.42)
    assert qc[("CN-VALID-FRAC", "", "")] == pytest.approx(97.3)
    evals = groups[QC_GROUP_ID].get_qualitative_evaluations()
    assert [(e.name.value, e.value.value) for e in evals] == [(QC_GATE.value, QC_PASSED.value)]


def test_sr_left_right_follow_image_orientation(case, tmp_path):
    """A map 1 in the low-column half and 3 in the high-column half: with the synth
    orientation (row direction +x, patient left) left reads 3; with the row direction -x
    (ImageOrientationPatient -1\\0\\0\\0\\1\\0) left reads 1."""
    ph, refs, prep, maps = case
    cols = np.arange(prep.mask.shape[-1])
    mid = np.broadcast_to(cols, prep.mask.shape)[prep.mask].mean()
    half = np.where(cols > mid, 3.0, 1.0)
    values = np.where(prep.mask, half, np.nan).astype(np.float32)
    results = {}
    for name, iop in (("usual", ["1", "0", "0", "0", "1", "0"]),
                      ("mirrored", ["-1", "0", "0", "0", "1", "0"])):
        flipped = []
        for r in refs:
            d = copy.deepcopy(r)  # Dataset.copy() is shallow: it would change refs
            d.ImageOrientationPatient = iop
            flipped.append(d)
        req = make_req(case, references=flipped, maps={"mtr_asym": ("halves", "%", values)})
        sr = hd.sr.srread(_write(REPORT_BUILDERS["structured_report"](req)[0],
                                 tmp_path / f"{name}.dcm"))
        group = sr.content.get_image_measurement_groups()[0]
        got = _measurements(group)
        results[name] = {lat: got[("113098", codes.SCT.Mean.value, lat)]
                         for lat in (codes.SCT.Left.value, codes.SCT.Right.value)}
    left, right = codes.SCT.Left.value, codes.SCT.Right.value
    assert results["usual"] == {left: 3.0, right: 1.0}
    assert results["mirrored"] == {left: 1.0, right: 3.0}


def test_sr_leaves_out_what_was_not_measured(case, tmp_path):
    ph, refs, prep, maps = case
    cols = np.broadcast_to(np.arange(prep.mask.shape[-1]), prep.mask.shape)
    mid = cols[prep.mask].mean()
    values = maps["mtr_asym"][2].copy()
    values[cols <= mid - 0.5] = np.nan  # the right half (low columns) has no valid voxel
    req = make_req(case, maps={"mtr_asym": ("half", "%", values)}, qc=QcFigures(snr=50.0),
                   qc_reasons=[QcReason("motion", "motion up to 2.5 mm exceeds 2 mm")])
    sr = hd.sr.srread(_write(REPORT_BUILDERS["structured_report"](req)[0], tmp_path / "sr.dcm"))
    groups = {str(g.tracking_identifier): g for g in sr.content.get_image_measurement_groups()}
    got = _measurements(groups["mtr_asym"])
    right = codes.SCT.Right.value
    assert got[(VOXEL_COUNT.value, "", right)] == 0
    assert not [k for k in got if k[2] == right and k[0] != VOXEL_COUNT.value]
    assert (ASYMMETRY_INDEX.value, "", "") not in got  # NaN is not written as a number
    qc = _measurements(groups[QC_GROUP_ID])
    assert list(qc) == [(codes.DCM.SignalToNoiseRatio.value, "", "")]
    evals = groups[QC_GROUP_ID].get_qualitative_evaluations()
    assert [e.value.value for e in evals] == ["CN-QC-MOTION"]


# ------------------------------------------------------------------ Segmentation
def test_segmentation_recovers_a_planted_region(case, tmp_path):
    """Map 1 +- 0.05 (seeded noise) with a 3 x 3 block of 0.2 in the left half of every
    slice: at 5 SDs below the contralateral mean the region is exactly the block (a noise
    voxel passes 5 SDs with probability 3e-7, normal distribution)."""
    ph, refs, prep, maps = case
    rng = np.random.default_rng(5)
    values = (1.0 + rng.normal(0, 0.05, prep.mask.shape)).astype(np.float32)
    values[:, 14:17, 22:25] = 0.2  # columns > midline: patient left in the synth geometry
    values[~prep.mask] = np.nan
    req = make_req(case, maps={"arex": ("AREX", "/s", values)}, candidate_n_sd=5.0)
    expect = np.zeros(prep.mask.shape, bool)
    expect[:, 14:17, 22:25] = True
    expect &= prep.mask
    # numpy: left voxels below mean_R - 5 SD_R, right voxels below mean_L - 5 SD_L
    stats, left, right = numpy_hemispheres(values, prep.mask, left_is_high_column=True)
    thr_left = stats["right"][0] - 5 * stats["right"][1]
    thr_right = stats["left"][0] - 5 * stats["left"][1]
    np.testing.assert_array_equal((left & (values < thr_left)) | (right & (values < thr_right)),
                                  expect)
    ds = REPORT_BUILDERS["segmentation"](req)[0]
    path = _write(ds, tmp_path / "seg.dcm")
    seg = hd.seg.segread(path)
    px = seg.get_pixels_by_source_instance([str(r.SOPInstanceUID) for r in refs],
                                           segment_numbers=[1])
    np.testing.assert_array_equal(px[..., 0].astype(bool), expect)
    item = seg.SegmentSequence[0]
    assert item.SegmentLabel == "research candidate region"
    assert item.SegmentDescription == SEGMENT_DESCRIPTION
    assert "not a lesion diagnosis" in item.SegmentDescription
    assert item.SegmentedPropertyCategoryCodeSequence[0].CodeValue == "309825002"
    assert item.SegmentedPropertyTypeCodeSequence[0].CodingSchemeDesignator == PRIVATE_SCHEME
    assert seg.SegmentationType == "BINARY" and seg.ContentQualification == "RESEARCH"


# ------------------------------------------------------------------ summary page
@pytest.mark.peers
@pytest.mark.parametrize("failed", [False, True])
def test_summary_page_renders_with_dcmj2pnm(case, failed, tmp_path):
    reasons = qc_gates(QcFigures(b0_low_ppm=-0.4, b0_high_ppm=6.8, sampled_low_ppm=-6.0,
                                 sampled_high_ppm=6.0)) if failed else []
    req = make_req(case, qc_reasons=reasons)
    ds = REPORT_BUILDERS["summary"](req)[0]
    path = _write(ds, tmp_path / "summary.dcm")
    png = tmp_path / "summary.png"
    # +on: PNG output, -il: not interlaced (DCMTK dcmj2pnm options)
    res = subprocess.run([require("dcmj2pnm"), "+on", "-il", str(path), str(png)],
                         capture_output=True, text=True, timeout=60, env=PEER_ENV)
    assert res.returncode == 0, res.stderr
    im = np.asarray(Image.open(png).convert("RGB"))
    np.testing.assert_array_equal(im, pydicom.dcmread(path).pixel_array)
    np.testing.assert_array_equal(im, render_page(req))
    # four panels in a 2 x 2 grid of >= 512-pixel maps
    assert im.shape[0] > 2 * 512 and im.shape[1] > 2 * 512
    # the research banner (yellow text) in the bottom band
    band = im[-48:]
    assert np.sum((band[..., 0] > 200) & (band[..., 1] > 150) & (band[..., 2] < 120)) > 200
    # a failed gate shows as red text ("UNRELIABLE: ..."), and only then
    red = (im[..., 0] > 230) & (im[..., 1] < 140) & (im[..., 2] < 120)
    assert bool(red.sum() > 300) is failed
    if failed:
        assert "UNRELIABLE: B0 range" in ds.ImageComments
    assert RESEARCH_BANNER.split(" \u2014")[0] in "RESEARCH USE ONLY"
    assert ds.BurnedInAnnotation == "YES"


def test_summary_shows_the_slice_with_most_brain(case):
    ph, refs, prep, maps = case
    mask = prep.mask.copy()
    mask[0] = False
    mask[0, 10:20, 10:20] = True
    mask[2] = prep.mask[2]
    mask[2, 1:-1, 1:-1] = True  # the largest by construction
    req = make_req(case, mask=mask)
    counts = mask.reshape(mask.shape[0], -1).sum(1)
    assert req.representative_slice() == int(np.argmax(counts)) == 2
    ds = REPORT_BUILDERS["summary"](req)[0]
    assert ds.SourceImageSequence[0].ReferencedSOPInstanceUID == refs[2].SOPInstanceUID


# ------------------------------------------------------------------ QC notes
def test_qc_note_goes_into_every_series_description(case):
    reasons = qc_gates(QcFigures(b0_low_ppm=-7.0, b0_high_ppm=0.2, sampled_low_ppm=-6.0,
                                 sampled_high_ppm=6.0, snr=5.0))
    note = qc_note(reasons)
    assert note == "QC:B0,SNR"
    assert qc_note([]) == ""
    req = make_req(case, qc_reasons=reasons, note="incomplete series")
    for kind, builder in REPORT_BUILDERS.items():
        desc = builder(req)[0].SeriesDescription
        assert desc.startswith("RESEARCH") and len(desc) <= 64, kind
        assert "QC:B0,SNR incomplete series" in desc, kind
    # the per-method outputs: the node passes the note first in DerivedRequest.note; the
    # longest registry title still keeps it within 64 characters
    _, refs, _, maps = case
    longest = max((info.title for info in METHODS.values()), key=len)
    for kind in BUILDERS:
        dr = DerivedRequest(references=refs, values=maps["mtr_asym"][2], method="mtr_asym",
                            title=longest, unit_ucum="%", series_uid="1.2.826.0.1.3680043.10.7.3",
                            series_number=9103, m0=case[2].m0, note=note)
        assert note in BUILDERS[kind](dr)[0].SeriesDescription, kind


# ------------------------------------------------------------------ bad input
@pytest.mark.parametrize("change, match", [
    ({"maps": {}}, "maps is empty"),
    ({"mask": "int"}, "mask must be a boolean array"),
    ({"mask": "shape"}, "mask has shape"),
    ({"mask": "empty"}, "mask selects no voxels"),
    ({"candidate_method": "nope"}, "candidate_method 'nope' has no map"),
    ({"candidate_n_sd": -1.0}, "candidate_n_sd must be a non-negative"),
    ({"candidate_min_voxels": 0}, "candidate_min_voxels must be a positive"),
    ({"parametric_maps": {"nope": pydicom.Dataset()}}, "parametric_maps names methods"),
    ({"qc": {"snr": 3.0}}, "qc must be a quant.qc.QcFigures"),
    ({"qc_reasons": ["B0"]}, "qc_reasons must hold"),
    ({"maps": {"mtr_asym": ("t", "%")}}, r"must be \(title, unit_ucum, values\)"),
    ({"maps": {"mtr_asym": ("t", "%", np.zeros((2, 32, 32), np.float32))}},
     "values has 2 slices but references has 3"),
])
def test_bad_report_requests_are_refused(case, change, match):
    _, _, prep, _ = case
    change = dict(change)
    if change.get("mask") == "int":
        change["mask"] = prep.mask.astype(np.uint8)
    elif change.get("mask") == "shape":
        change["mask"] = prep.mask[:, :-1]
    elif change.get("mask") == "empty":
        change["mask"] = np.zeros_like(prep.mask)
    with pytest.raises(ValueError, match=match):
        make_req(case, **change)


def test_summary_without_m0_is_refused(case):
    req = make_req(case, m0=None)
    with pytest.raises(ValueError, match="summary page needs m0"):
        REPORT_BUILDERS["summary"](req)


def test_a_given_m0_window_is_the_one_the_summary_page_would_compute(case):
    """The node passes its Secondary Captures' M0 window to the summary page
    (ReportRequest.m0_range): the same pixels as the page's own robust_range of the M0."""
    from node.derive.render import robust_range

    req = make_req(case)
    own = REPORT_BUILDERS["summary"](req)[0]
    given = REPORT_BUILDERS["summary"](make_req(case, m0_range=robust_range(req.m0)))[0]
    assert own.PixelData == given.PixelData
    other = REPORT_BUILDERS["summary"](make_req(case, m0_range=(0.0, 1e-3)))[0]
    assert other.PixelData != own.PixelData
