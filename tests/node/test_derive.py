"""The output builders of node.derive, checked against the DICOM standard and real tools.

Sources outside the project: dciodvfy (dicom3tools) checks each object against the PS3.3
IODs; DCMTK dcmj2pnm renders what a viewer shows; pydicom reads the files back; PS3.3
C.11.1 (Modality LUT: value = stored x slope + intercept) and C.7.6.16.2.11 (Real World Value
Mapping) define what the numbers mean.
"""

from __future__ import annotations

import io
import subprocess
from pathlib import Path

import numpy as np
import pydicom
import pytest
from PIL import Image

from node import __version__
from node.derive import BUILDERS, DerivedRequest, output_uid
from node.derive.concepts import PRIVATE_SCHEME
from node.derive.mr import PADDING_VALUE, quantise, rescale_slope
from node.derive.render import RESEARCH_BANNER, colour_lut, fuse
from node.derive.sc import patient_orientation
from node.synth import PRIVATE_CREATOR, PRIVATE_GROUP, series_from_arrays
from tests.peers import PEER_ENV, assert_dciodvfy_clean, require

SLICES, ROWS, COLS = 3, 24, 32  # not square, so a swap of rows and columns shows
OFFSETS = [3.5, -300.0, -3.5]  # acquisition order; -300 ppm is M0 (our synth convention)
TITLE = "MTRasym 3.5 ppm (B0-corrected)"


def _offset(ds: pydicom.Dataset) -> float:
    return float(ds.private_block(PRIVATE_GROUP, PRIVATE_CREATOR)[0x10].value)


def make_case(slices: int = SLICES, rows: int = ROWS, cols: int = COLS, *, seed: int = 7,
              offsets: list[float] | None = None):
    """Source series (node.synth), per-slice M0 references, a map with NaN, the M0 images."""
    rng = np.random.default_rng(seed)
    offsets = offsets or OFFSETS
    yy, xx = np.mgrid[:rows, :cols]
    inside = ((yy - rows / 2) / (rows * 0.45)) ** 2 + ((xx - cols / 2) / (cols * 0.45)) ** 2 < 1
    m0 = np.where(inside, 1.0, 0.03)[None].repeat(slices, 0).astype(np.float32)
    signal = np.stack([m0 * (0.5 if abs(o) < 20 else 1.0) for o in offsets], axis=-1)
    series = series_from_arrays(signal, offsets, seed=f"derive-test-{seed}")
    for ds in series:
        del ds.PixelData  # header-only, as node.assemble hands them on
    refs = sorted((d for d in series if _offset(d) == -300.0),
                  key=lambda d: float(d.ImagePositionPatient[2]))
    values = (xx / cols * 8.0 - 3.0)[None].repeat(slices, 0).astype(np.float32)
    values += rng.normal(0.0, 0.1, values.shape).astype(np.float32)
    values[:, ~inside] = np.nan
    return series, refs, values, m0 * 3000.0


def make_request(kind: str = "parametric_map", method: str = "mtr_asym", **kw) -> DerivedRequest:
    series, refs, values, m0 = make_case()
    opts = dict(references=refs, values=values, method=method, title=TITLE, unit_ucum="%",
                series_uid=f"1.2.826.0.1.3680043.10.1.{len(kind)}", series_number=200,
                m0=m0, display_range=(-3.0, 5.0))
    opts.update(kw)
    return DerivedRequest(**opts)  # type: ignore[arg-type]


def _write(datasets, folder: Path) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i, ds in enumerate(datasets):
        p = folder / f"out{i:03d}.dcm"
        ds.save_as(p, enforce_file_format=True)
        paths.append(p)
    return paths


# ------------------------------------------------------------------ every kind
@pytest.mark.peers
@pytest.mark.parametrize("kind", sorted(BUILDERS))
@pytest.mark.parametrize("method", ["mtr_asym", "apt_star"])  # a standard and a private code
def test_every_output_passes_dciodvfy(kind, method, tmp_path):
    # PS3.3 IODs (A.75 Parametric Map, A.4 MR Image, A.8.1 Secondary Capture) via dciodvfy
    out = BUILDERS[kind](make_request(kind, method))
    assert_dciodvfy_clean(_write(out, tmp_path))


@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_research_marks_equipment_and_links(kind, tmp_path):
    req = make_request(kind, note="QC: B0 fit poor in 3% of voxels")
    out = BUILDERS[kind](req)
    back = [pydicom.dcmread(p) for p in _write(out, tmp_path)]
    ref = req.references[0]
    for ds in back:
        # Content Qualification (0018,9004) = RESEARCH (PS3.3 C.8.13.2 / C.12.1)
        assert ds.ContentQualification == "RESEARCH"
        assert ds.SeriesDescription.startswith("RESEARCH ")
        assert "QC: B0" in ds.SeriesDescription
        assert len(ds.SeriesDescription) <= 64  # LO (PS3.5 Table 6.2-1)
        assert ds.Manufacturer == "cest-node"
        assert __version__ in str(ds.SoftwareVersions)
        assert ds.BodyPartExamined == ref.BodyPartExamined
        assert ds.StudyInstanceUID == ref.StudyInstanceUID
        assert ds.PatientID == ref.PatientID
        assert ds.SeriesInstanceUID == req.series_uid
        assert ds.SeriesInstanceUID != ref.SeriesInstanceUID
        if kind != "secondary_capture":  # the upscaled preview keeps no frame of reference
            assert ds.FrameOfReferenceUID == ref.FrameOfReferenceUID
    assert len({ds.SOPInstanceUID for ds in back}) == len(back)


@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_rebuild_gives_the_same_uids(kind):
    a = [ds.SOPInstanceUID for ds in BUILDERS[kind](make_request(kind))]
    b = [ds.SOPInstanceUID for ds in BUILDERS[kind](make_request(kind))]
    assert a == b
    # 2.25 form of a UUID (PS3.5 B.2): at most 64 characters, digits only after the root
    assert all(u.startswith("2.25.") and len(u) <= 64 and u[5:].isdigit() for u in a)
    assert a[0] == output_uid(make_request(kind).series_uid, {"parametric_map": "pm",
                              "derived_mr": "mr", "secondary_capture": "sc"}[kind], 0)


def test_output_uids_differ_between_series_and_kinds():
    uids = {output_uid(s, k, i) for s in ("1.2.3", "1.2.4") for k in ("pm", "mr") for i in (0, 1)}
    assert len(uids) == 8


# ------------------------------------------------------------------ Parametric Map
def _frame_sources(pm) -> list[str]:
    """The first source SOP Instance UID of every frame, in frame order."""
    return [f.DerivationImageSequence[0].SourceImageSequence[0].ReferencedSOPInstanceUID
            for f in pm.PerFrameFunctionalGroupsSequence]


def _frame_order(pm, req: DerivedRequest) -> list[int]:
    """For each frame, the index of its slice in ``req.references`` (highdicom orders the
    frames along the slice normal itself; each frame names its source)."""
    index = {r.SOPInstanceUID: i for i, r in enumerate(req.references)}
    return [index[u] for u in _frame_sources(pm)]


def test_parametric_map_round_trip_keeps_float_values_and_nan(tmp_path):
    req = make_request()
    (path,) = _write(BUILDERS["parametric_map"](req), tmp_path)
    pm = pydicom.dcmread(path)
    assert pm.SOPClassUID == "1.2.840.10008.5.1.4.1.1.30"  # Parametric Map Storage (PS3.4)
    assert pm.BitsAllocated == 32 and "FloatPixelData" in pm
    arr = pm.pixel_array
    assert arr.dtype == np.float32 and arr.shape == req.values.shape
    order = _frame_order(pm, req)
    assert sorted(order) == list(range(SLICES))
    # NaN stays NaN (documented in node/derive/pm.py); assert_array_equal treats NaN as equal
    np.testing.assert_array_equal(arr, req.values[order])
    assert np.isnan(arr).sum() == np.isnan(req.values).sum() > 0


def test_parametric_map_frames_follow_the_source_geometry():
    req = make_request()
    (pm,) = BUILDERS["parametric_map"](req)
    shared = pm.SharedFunctionalGroupsSequence[0]
    ref0 = req.references[0]
    assert [float(x) for x in shared.PlaneOrientationSequence[0].ImageOrientationPatient] == [
        float(x) for x in ref0.ImageOrientationPatient]
    assert [float(x) for x in shared.PixelMeasuresSequence[0].PixelSpacing] == [
        float(x) for x in ref0.PixelSpacing]
    order = _frame_order(pm, req)
    for frame, i in zip(pm.PerFrameFunctionalGroupsSequence, order, strict=True):
        ref = req.references[i]
        pos = [float(x) for x in frame.PlanePositionSequence[0].ImagePositionPatient]
        assert pos == pytest.approx([float(x) for x in ref.ImagePositionPatient])
        src = frame.DerivationImageSequence[0].SourceImageSequence
        assert [s.ReferencedSOPInstanceUID for s in src] == [ref.SOPInstanceUID]
    # frames run monotonically along the slice normal (one direction, no jumps)
    z = [float(f.PlanePositionSequence[0].ImagePositionPatient[2])
         for f in pm.PerFrameFunctionalGroupsSequence]
    assert np.all(np.diff(z) < 0) or np.all(np.diff(z) > 0)


def test_parametric_map_real_world_value_mapping_in_ucum():
    # PS3.3 C.7.6.16.2.11: Measurement Units Code Sequence in UCUM, Quantity Definition
    (pm,) = BUILDERS["parametric_map"](make_request())
    rwvm = pm.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence[0]
    unit = rwvm.MeasurementUnitsCodeSequence[0]
    assert (unit.CodeValue, unit.CodingSchemeDesignator) == ("%", "UCUM")
    assert float(rwvm.RealWorldValueSlope) == 1.0 and float(rwvm.RealWorldValueIntercept) == 0.0
    qty = rwvm.QuantityDefinitionSequence[0].ConceptCodeSequence[0]
    # DCM 113098 "Magnetization Transfer Ratio" (PS3.16, CID 7180)
    assert (qty.CodeValue, qty.CodingSchemeDesignator) == ("113098", "DCM")
    assert "CodingSchemeIdentificationSequence" not in pm


def test_private_quantity_code_declares_its_scheme():
    # a private coding scheme is identified in the SOP Common module (PS3.3 C.12.1)
    (pm,) = BUILDERS["parametric_map"](make_request(method="arex", unit_ucum="s-1",
                                                     title="AREX 3.5 ppm"))
    rwvm = pm.SharedFunctionalGroupsSequence[0].RealWorldValueMappingSequence[0]
    qty = rwvm.QuantityDefinitionSequence[0].ConceptCodeSequence[0]
    assert qty.CodingSchemeDesignator == PRIVATE_SCHEME and qty.CodeValue == "CN-AREX"
    assert rwvm.MeasurementUnitsCodeSequence[0].CodeMeaning == "per second"
    assert [x.CodingSchemeDesignator for x in pm.CodingSchemeIdentificationSequence] == [
        PRIVATE_SCHEME]


@pytest.mark.peers
def test_parametric_map_with_every_source_listed(tmp_path):
    series, refs, values, m0 = make_case()
    others = [d for d in series if d not in refs]
    req = DerivedRequest(references=refs, values=values, method="mtr_asym", title=TITLE,
                         unit_ucum="%", series_uid="1.2.826.0.1.3680043.10.1.77",
                         series_number=3, sources=others)
    (pm,) = BUILDERS["parametric_map"](req)
    for frame in pm.PerFrameFunctionalGroupsSequence:
        pos = frame.PlanePositionSequence[0].ImagePositionPatient
        (ref,) = [r for r in refs if np.allclose([float(x) for x in r.ImagePositionPatient],
                                                 [float(x) for x in pos])]
        listed = {s.ReferencedSOPInstanceUID
                  for s in frame.DerivationImageSequence[0].SourceImageSequence}
        same_slice = {d.SOPInstanceUID for d in series
                      if d.ImagePositionPatient == ref.ImagePositionPatient}
        assert listed == same_slice  # all saturation frames of that slice
    assert_dciodvfy_clean(_write([pm], tmp_path))


# ------------------------------------------------------------------ derived MR
def test_derived_mr_values_within_one_quantisation_step(tmp_path):
    req = make_request("derived_mr")
    paths = _write(BUILDERS["derived_mr"](req), tmp_path)
    for i, path in enumerate(paths):
        ds = pydicom.dcmread(path)
        assert list(ds.ImageType)[:2] == ["DERIVED", "SECONDARY"]
        assert ds.SOPClassUID == "1.2.840.10008.5.1.4.1.1.4"  # MR Image Storage (PS3.4)
        stored = ds.pixel_array
        assert stored.dtype == np.int16
        slope, icpt = float(ds.RescaleSlope), float(ds.RescaleIntercept)
        value = stored * slope + icpt  # PS3.3 C.11.1.1.2 Modality LUT
        valid = np.isfinite(req.values[i])
        assert np.all(np.abs(value[valid] - req.values[i][valid]) <= slope / 2 + 1e-9)
        assert np.all(stored[~valid] == PADDING_VALUE) and ds.PixelPaddingValue == PADDING_VALUE
        assert np.all(stored[valid] != PADDING_VALUE)
        # the Real World Value Mapping says the same as the rescale, in UCUM
        rwvm = ds.RealWorldValueMappingSequence[0]
        assert float(rwvm.RealWorldValueSlope) == slope
        assert rwvm.MeasurementUnitsCodeSequence[0].CodeValue == "%"
        # window from the display range (PS3.3 C.11.2.1.2: centre and width)
        assert float(ds.WindowCenter) == pytest.approx(1.0)
        assert float(ds.WindowWidth) == pytest.approx(8.0)
        ref = req.references[i]
        assert ds.SourceImageSequence[0].ReferencedSOPInstanceUID == ref.SOPInstanceUID
        assert ds.ImagePositionPatient == ref.ImagePositionPatient
        assert ds.ImageOrientationPatient == ref.ImageOrientationPatient
        assert ds.PixelSpacing == ref.PixelSpacing
        assert (ds.Rows, ds.Columns) == (ROWS, COLS)


@pytest.mark.parametrize("peak", [0.003, 1.0, 7.3, 250.0, 4.0e4])
def test_rescale_slope_fits_and_is_a_round_step(peak):
    rng = np.random.default_rng(3)
    values = (rng.uniform(-1.0, 1.0, (2, 5, 5)) * peak).astype(np.float32)
    values[0, 0, 0] = np.float32(peak)
    slope = rescale_slope(values, (-peak / 2, peak / 2))
    mant = slope / 10.0 ** np.floor(np.log10(slope))
    assert round(mant, 6) in (1.0, 2.0, 2.5, 5.0)
    q = quantise(values, slope)
    assert np.all(np.abs(q * slope - values) <= slope / 2 * (1 + 1e-6))
    assert slope / 2.5 * 32767 < peak <= slope * 32767 * (1 + 1e-9)  # smallest such step


def test_rescale_slope_of_an_all_nan_map():
    values = np.full((1, 2, 2), np.nan, dtype=np.float32)
    assert rescale_slope(values, (0.0, 0.0)) == 1.0
    assert np.all(quantise(values, 1.0) == PADDING_VALUE)


# ------------------------------------------------------------------ Secondary Capture
@pytest.mark.peers
def test_secondary_capture_renders_with_dcmj2pnm(tmp_path):
    req = make_request("secondary_capture")
    out = BUILDERS["secondary_capture"](req)
    assert len(out) == SLICES
    paths = _write(out, tmp_path / "sc")
    exe = require("dcmj2pnm")
    png = tmp_path / "slice1.png"
    # +on: PNG output, -il: not interlaced, +Wm: min-max window (DCMTK dcmj2pnm options)
    res = subprocess.run([exe, "+on", "-il", "+Wm", str(paths[0]), str(png)],
                         capture_output=True, text=True, timeout=60, env=PEER_ENV)
    assert res.returncode == 0, res.stderr
    im = np.asarray(Image.open(png).convert("RGB"))
    ds = pydicom.dcmread(paths[0])
    assert im.shape == (ds.Rows, ds.Columns, 3)
    assert max(ds.Rows, ds.Columns) >= 512  # upscaled so the text is readable
    np.testing.assert_array_equal(im, ds.pixel_array)  # what a viewer shows is what we drew
    # the research banner (yellow text) is burned into the bottom band
    band = im[-30:]
    assert np.sum((band[..., 0] > 200) & (band[..., 1] > 150) & (band[..., 2] < 120)) > 200


def test_secondary_capture_attributes():
    req = make_request("secondary_capture")
    for i, ds in enumerate(BUILDERS["secondary_capture"](req)):
        assert ds.SOPClassUID == "1.2.840.10008.5.1.4.1.1.7"  # SC Image Storage (PS3.4)
        assert ds.PhotometricInterpretation == "RGB" and ds.SamplesPerPixel == 3
        assert ds.BurnedInAnnotation == "YES"
        assert ds.InstanceNumber == i + 1
        assert list(ds.PatientOrientation) == ["L", "P"]  # axial source, PS3.3 C.7.6.1.1.1
        assert ds.SourceImageSequence[0].ReferencedSOPInstanceUID == req.references[i].SOPInstanceUID
        assert "Research use only" in ds.ImageComments


def test_secondary_capture_template_gives_the_objects_highdicom_builds():
    """The slices after the first are the first object with their own pixels, UIDs, number
    and source (node.derive.sc.build): element for element what highdicom builds for each
    slice (highdicom's own build is the reference), apart from its creation timestamps."""
    req = make_request("secondary_capture")
    from node.derive import sc as sc_builder

    fast = sc_builder.build(req)
    full = sc_builder.build(req, template=False)
    stamps = {"InstanceCreationDate", "InstanceCreationTime", "ContentDate", "ContentTime",
              "DateOfSecondaryCapture", "TimeOfSecondaryCapture"}
    for a, b in zip(fast, full, strict=True):
        keys = {e.keyword or str(e.tag) for e in a} | {e.keyword or str(e.tag) for e in b}
        for kw in sorted(keys - stamps - {"ContributingEquipmentSequence"}):
            assert a.get(kw) == b.get(kw), kw
        for x, y in zip(a.ContributingEquipmentSequence, b.ContributingEquipmentSequence,
                        strict=True):
            assert ({e.keyword: e.value for e in x if e.keyword != "ContributionDateTime"}
                    == {e.keyword: e.value for e in y if e.keyword != "ContributionDateTime"})
        assert a.file_meta == b.file_meta
        assert a.PixelData == b.PixelData
    assert len({d.SOPInstanceUID for d in fast}) == len(fast)


def test_secondary_capture_template_is_used_for_a_plain_series(monkeypatch):
    """highdicom builds the first slice only when every slice's reference shares the
    patient and study attributes: highdicom keeps dates as DA/TM objects, which never equal
    the reference's strings, and a value-for-value comparison once sent every slice through
    a full build without any test noticing."""
    import highdicom as hd

    from node.derive import sc as sc_builder

    req = make_request("secondary_capture")
    assert len(req.references) > 1
    calls = []
    real = hd.sc.SCImage.from_ref_dataset

    def counted(*args, **kwargs):
        calls.append(1)
        return real(*args, **kwargs)

    monkeypatch.setattr(hd.sc.SCImage, "from_ref_dataset", counted)
    out = sc_builder.build(req)
    assert len(calls) == 1 and len(out) == len(req.references)
    # and a reference of another study still gets a build of its own
    calls.clear()
    req.references[1] = req.references[1].copy()
    req.references[1].StudyDate = "20250101"
    sc_builder.build(req)
    assert len(calls) == 2


def test_secondary_capture_colours_follow_the_map():
    req = make_request("secondary_capture")
    (ds, *_) = BUILDERS["secondary_capture"](req)
    img = ds.pixel_array
    # find the map region (image starts below the title band; 512 / 32 = 16x upscaling)
    scale = -(-512 // max(ROWS, COLS))
    top = next(y for y in range(img.shape[0]) if img[y, scale * COLS // 2].max() > 60
               and abs(int(img[y, scale * COLS // 2, 0]) - int(img[y, scale * COLS // 2, 2])) > 10)
    row = top + scale * ROWS // 2 - scale * 2
    left = img[row, scale * 6].astype(float)    # low value (map rises with column)
    right = img[row, scale * (COLS - 6)].astype(float)
    luma = np.array([0.299, 0.587, 0.114])  # ITU-R BT.601 luma weights
    assert right @ luma > left @ luma + 40


def test_patient_orientation_of_sagittal_and_coronal():
    ds = pydicom.Dataset()
    ds.ImageOrientationPatient = [0, 1, 0, 0, 0, -1]  # sagittal: rows to P, columns to F
    assert patient_orientation(ds) == ("P", "F")
    ds.ImageOrientationPatient = [1, 0, 0, 0, 0, -1]  # coronal
    assert patient_orientation(ds) == ("L", "F")


def test_colour_ramp_luminance_rises_monotonically():
    # our design rule (common practice for sequential maps); BT.601 luma weights
    lut = colour_lut().astype(float)
    luma = lut @ np.array([0.299, 0.587, 0.114])
    assert np.all(np.diff(luma) > 0)


def test_fuse_leaves_invalid_voxels_grey():
    values = np.array([[np.nan, 0.0, 10.0]], dtype=np.float32)
    m0 = np.full((1, 3), 50.0, dtype=np.float32)
    rgb = fuse(values, m0, display_range=(0.0, 10.0), m0_range=(0.0, 100.0), alpha=0.5)
    assert rgb[0, 0].tolist() == [128, 128, 128]  # round(50 / 100 * 255)
    lut = colour_lut()
    expect_lo = np.rint(0.5 * 127.5 + 0.5 * lut[0].astype(float))
    expect_hi = np.rint(0.5 * 127.5 + 0.5 * lut[255].astype(float))
    assert rgb[0, 1].tolist() == expect_lo.tolist() and rgb[0, 2].tolist() == expect_hi.tolist()


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_compiled_fuse_and_upscale_is_the_numpy_reference(dtype):
    # reference: fuse (numpy) upscaled by np.repeat along both axes, pixel for pixel, every
    # byte; with NaN and +-inf in the map and in M0, values beyond both ends of the display
    # range, M0 below its window's low end, and the rest of the canvas untouched
    from node.derive.render import fuse_upscale

    rng = np.random.default_rng(21)
    for rows, cols, k, top in ((8, 6, 4, 5), (5, 7, 3, 0), (4, 4, 1, 2)):
        values = rng.normal(2.0, 3.0, (rows, cols)).astype(dtype)
        m0 = rng.uniform(-50.0, 1200.0, (rows, cols)).astype(dtype)
        values.flat[:4] = [np.nan, np.inf, -np.inf, 1e30]
        m0.flat[-3:] = [np.nan, np.inf, -np.inf]
        for dr, mr, alpha in (((-1.0, 5.0), (0.0, 1000.0), 0.7), ((0.3, 0.9), (10.0, 90.0), 0.5)):
            with np.errstate(over="ignore"):  # an infinite M0 overflows to inf, then 255
                ref = fuse(values, m0, display_range=dr, m0_range=mr, alpha=alpha)
            want = np.repeat(np.repeat(ref, k, 0), k, 1)
            canvas = rng.integers(0, 256, (top + rows * k + 3, cols * k + 5, 3), dtype=np.uint8)
            before = canvas.copy()
            fuse_upscale(values, m0, canvas, display_range=dr, m0_range=mr, k=k, top=top,
                         alpha=alpha)
            np.testing.assert_array_equal(canvas[top:top + rows * k, :cols * k], want)
            outside = np.ones(canvas.shape[:2], bool)
            outside[top:top + rows * k, :cols * k] = False
            np.testing.assert_array_equal(canvas[outside], before[outside])
    with pytest.raises(ValueError, match="fuse_upscale"):
        fuse_upscale(values, m0, np.zeros((3, 3, 3), np.uint8), display_range=(0.0, 1.0),
                     m0_range=(0.0, 1.0), k=2)


def test_banner_text_is_the_required_sentence():
    assert RESEARCH_BANNER == "RESEARCH USE ONLY \u2014 NOT FOR DIAGNOSIS"


# ------------------------------------------------------------------ bad input
@pytest.mark.parametrize(
    ("change", "match"),
    [
        ({"references": []}, "references is empty"),
        ({"values": np.zeros((SLICES, ROWS), np.float32)}, r"must be \(slices, rows, cols\)"),
        ({"values": np.zeros((SLICES, ROWS, COLS), np.int16)}, "must be a float array"),
        ({"values": np.full((SLICES, ROWS, COLS), np.inf, np.float32)}, "infinite"),
        ({"values": np.zeros((SLICES + 1, ROWS, COLS), np.float32)}, "4 slices but references has 3"),
        ({"values": np.zeros((SLICES, COLS, ROWS), np.float32)}, "references\\[0\\] is 24 x 32"),
        ({"series_uid": "1.2.abc"}, "series_uid is not a valid DICOM UID"),
        ({"series_uid": "1." + "2" * 70}, "series_uid is not a valid DICOM UID"),
        ({"series_number": 0}, "series_number must be a positive integer"),
        ({"display_range": (5.0, 5.0)}, "display_range must be finite with high > low"),
        ({"display_range": (0.0, float("nan"))}, "display_range must be finite"),
        ({"m0": np.zeros((1, ROWS, COLS), np.float32)}, "m0 has shape"),
        ({"title": "MTR\u00e4sym"}, "title must be printable ASCII"),
        ({"unit_ucum": ""}, "unit_ucum is empty"),
        ({"method": ""}, "method is empty"),
    ],
)
def test_bad_requests_are_refused(change, match):
    with pytest.raises(ValueError, match=match):
        make_request(**change)


def test_reference_without_geometry_is_refused():
    _, refs, values, _ = make_case()
    del refs[1].ImagePositionPatient
    with pytest.raises(ValueError, match=r"references\[1\] lacks ImagePositionPatient"):
        DerivedRequest(references=refs, values=values, method="mtr_asym", title=TITLE,
                       unit_ucum="%", series_uid="1.2.3", series_number=1)


def test_secondary_capture_needs_m0():
    with pytest.raises(ValueError, match="needs m0 images"):
        BUILDERS["secondary_capture"](make_request("secondary_capture", m0=None))


def test_default_display_range_is_robust():
    req = make_request(display_range=None)
    finite = req.values[np.isfinite(req.values)]
    assert req.display_range == pytest.approx(tuple(np.percentile(finite, [2.0, 98.0])))


@pytest.mark.peers
@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_all_invalid_map_still_builds_valid_objects(kind, tmp_path):
    req = make_request(kind, values=np.full((SLICES, ROWS, COLS), np.nan, np.float32),
                       display_range=None)
    assert_dciodvfy_clean(_write(BUILDERS[kind](req), tmp_path))


@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_latin1_patient_name_round_trips(kind, tmp_path):
    # synth sources declare ISO_IR 100 (PS3.3 C.12.1.1.2); the outputs keep that character set
    series, refs, values, m0 = make_case()
    for ds in refs:
        ds.PatientName = "PHANT\u00d6M^J\u00f6rg"  # invented
    req = DerivedRequest(references=refs, values=values, method="mtr_asym", title=TITLE,
                         unit_ucum="%", series_uid="1.2.826.0.1.3680043.10.1.5",
                         series_number=5, m0=m0)
    back = [pydicom.dcmread(p) for p in _write(BUILDERS[kind](req), tmp_path)]
    assert all(str(ds.PatientName) == "PHANT\u00d6M^J\u00f6rg" for ds in back)
    assert all(ds.SpecificCharacterSet == "ISO_IR 100" for ds in back)


def test_derived_mr_template_gives_the_objects_built_attribute_by_attribute():
    """The slices after the first are the first object with their own UIDs, number,
    geometry, source and pixels (node.derive.mr.build): element for element, and byte for
    byte once encoded, what the attribute-by-attribute build gives for each slice (that build
    is the reference: it is the one dciodvfy checks above); a reference unlike the first's
    in an attribute the object copies gets a full build of its own."""
    from pydicom.filewriter import dcmwrite

    from node.derive import mr as mr_builder

    req = make_request("derived_mr")
    assert len(req.references) > 2
    req.references[2] = req.references[2].copy()
    req.references[2].EchoTime = "7.5"  # unlike the first: built in full, and correct
    del req.references[2].SliceLocation

    def encoded(ds) -> bytes:
        buf = io.BytesIO()
        dcmwrite(buf, ds, enforce_file_format=True)
        return buf.getvalue()

    fast = mr_builder.build(req)
    full = mr_builder.build(req, template=False)
    assert len(fast) == len(full) == len(req.references)
    stamps = {"InstanceCreationTime", "ContentTime", "SeriesTime"}
    for a, b in zip(fast, full, strict=True):
        for kw in stamps:  # the two builds ran at different times
            b[kw].value = a[kw].value
        assert a == b
        assert a.file_meta == b.file_meta
    # encoded after every comparison: writing resolves ambiguous VRs (US or SS) in place, in
    # the elements the template's objects share, which the full build's objects do not
    for a, b in zip(fast, full, strict=True):
        assert encoded(a) == encoded(b)
    assert fast[2].EchoTime == 7.5 and "SliceLocation" not in fast[2]
    assert [d.InstanceNumber for d in fast] == list(range(1, len(fast) + 1))
    assert len({d.SOPInstanceUID for d in fast}) == len(fast)
    # the objects share the first's unchanged elements, never the ones that differ
    assert fast[1]["Modality"] is fast[0]["Modality"]
    assert fast[1]["SOPInstanceUID"] is not fast[0]["SOPInstanceUID"]
    assert fast[1].file_meta is not fast[0].file_meta


def test_a_given_m0_window_is_the_one_the_builder_would_compute():
    """The node computes the M0's grey window once per series and passes it to every
    method's Secondary Capture (DerivedRequest.m0_range): the same pixels as the builder's
    own robust_range of the same M0; a window that is not one is refused by name."""
    from node.derive.render import robust_range

    req = make_request("secondary_capture")
    given = make_request("secondary_capture", m0_range=robust_range(req.m0))
    a, b = BUILDERS["secondary_capture"](req), BUILDERS["secondary_capture"](given)
    assert [x.PixelData for x in a] == [y.PixelData for y in b]
    other = BUILDERS["secondary_capture"](make_request("secondary_capture", m0_range=(0.0, 1e-3)))
    assert other[0].PixelData != a[0].PixelData  # the window is used
    for bad in ((1.0, 1.0), (0.0, float("nan"))):
        with pytest.raises(ValueError, match="m0_range must be finite with high > low"):
            make_request("secondary_capture", m0_range=bad)


def test_a_method_result_computes_its_display_range_once(monkeypatch):
    from node import pipeline

    values = np.linspace(-1.0, 4.0, 1000).reshape(10, 10, 10).astype(np.float32)
    res = pipeline.MethodResult("mtr_asym", TITLE, "%", values, 0.0, 1000)
    calls = []
    real = pipeline.display_range
    monkeypatch.setattr(pipeline, "display_range", lambda v: calls.append(1) or real(v))
    assert res.display == real(values) == res.display
    assert len(calls) == 1


def test_the_remembered_iod_lookup_answers_as_highdicom_does():
    """node.derive.iodtable: highdicom's is_attribute_in_iod, memoised, in every module of
    highdicom that binds it; the same answer as highdicom's own function for attributes in
    and out of the IODs the builders make and read (PS3.3 IOD tables, as highdicom has them)."""
    import highdicom._standard_utils as su
    import highdicom.base
    import highdicom.sr.content

    from node.derive import iodtable

    assert iodtable.install()  # already in place: installed once, on import
    for mod in (su, highdicom.base, highdicom.sr.content):
        assert mod.is_attribute_in_iod is iodtable.is_attribute_in_iod
    original = iodtable._original
    assert original is not None and original is not iodtable.is_attribute_in_iod
    classes = ["1.2.840.10008.5.1.4.1.1.4", "1.2.840.10008.5.1.4.1.1.4.1",  # MR, Enhanced MR
               "1.2.840.10008.5.1.4.1.1.30", "1.2.840.10008.5.1.4.1.1.7",  # PM, SC
               "1.2.840.10008.5.1.4.1.1.88.34", "1.2.840.10008.5.1.4.1.1.66.4"]  # 3D SR, SEG
    for uid in classes:
        for kw in ("NumberOfFrames", "ContentDate", "PixelData", "FloatPixelData",
                   "ImagePositionPatient", "NotAnAttribute"):
            for ex in (None, ["IconImageSequence"]):
                assert iodtable.is_attribute_in_iod(kw, uid, ex) == original(kw, uid, ex), (
                    kw, uid, ex)
    with pytest.raises(KeyError, match="No IOD found"):
        iodtable.is_attribute_in_iod("PixelData", "1.2.3")
