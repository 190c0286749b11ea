"""node.assemble: header rules (offset, slice, M0), ordering, completion, holding."""

from __future__ import annotations

import random
import threading
from io import BytesIO

import numpy as np
import pytest
from pydicom import dcmread
from pydicom.uid import ImplicitVRLittleEndian

from node.assemble import Assembler, AssemblyError, Placed, read_offset_ppm, slice_geometry
from node.config import default_config, parse_config
from node.synth import GAMMA_MHZ_PER_T, series_from_arrays

OFFSETS = [-300.0, 3.5, -3.5, 0.0, 2.0, -2.0, -300.0]  # two M0 frames: a repeat
SLICES, ROWS, COLS = 3, 6, 5


def _signal(seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.random((SLICES, ROWS, COLS, len(OFFSETS))).astype(np.float32)


def _series(**kw):
    return series_from_arrays(_signal(), OFFSETS, scale=3000.0, **kw)


def _expected(sig: np.ndarray) -> np.ndarray:
    # what node.synth stores: uint16 of signal*3000, as float32
    return np.clip(np.rint(sig * 3000.0), 0, 65535).astype(np.uint16).astype(np.float32)


def _cfg(**proto):
    base = {
        "node": {"idle_timeout_s": 30.0},
        "protocols": [{
            "name": "t",
            "match": {"attribute": "SeriesDescription", "regex": "^CEST APT phantom"},
            "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"},
            **proto,
        }],
    }
    return parse_config(base)


def _assemble(datasets, cfg=None):
    out = []
    with Assembler(cfg or _cfg(), out.append) as asm:
        for ds in datasets:
            assert asm.add(ds) is Placed.ADDED
        asm.flush(timeout=10)
    assert len(out) == 1
    return out[0]


# ----------------------------------------------------------------------------- offset rules
def test_offset_from_private_tag_in_explicit_and_implicit_vr():
    ds = _series()[SLICES]  # synth order: offset by offset, slice by slice -> 3.5 ppm, slice 0
    rule = default_config().protocols[0].offset
    assert read_offset_ppm(ds, rule) == pytest.approx(3.5)
    # after an implicit VR round trip the private DS arrives as UN bytes (PS3.5 7.8, 6.2.2)
    buf = BytesIO()
    ds.file_meta.TransferSyntaxUID = ImplicitVRLittleEndian
    ds.save_as(buf, enforce_file_format=True)
    back = dcmread(BytesIO(buf.getvalue()))
    assert back.file_meta.TransferSyntaxUID == ImplicitVRLittleEndian
    assert read_offset_ppm(back, rule) == pytest.approx(3.5)


def test_offset_from_keyword_text_regex():
    cfg = _cfg(offset={"keyword": "ImageComments",
                       "regex": r"sat offset (?P<value>[-+0-9.]+) ppm"})
    for ds, off in zip(_series()[::SLICES], OFFSETS, strict=True):
        assert read_offset_ppm(ds, cfg.protocols[0].offset) == pytest.approx(off)


def test_offset_in_hz_uses_the_instance_frequency():
    ds = _series(field_t=3.0)[2 * SLICES]
    # 3 T proton: f0 = 42.577478 MHz/T * 3 T (CODATA 2018); -3.5 ppm * f0 = -447.06 Hz
    f0 = GAMMA_MHZ_PER_T * 3.0
    ds.add_new(0x00189087, "FD", -3.5 * f0)  # a standard FD element used as an Hz carrier here
    cfg = _cfg(offset={"tag": "(0018,9087)", "unit": "hz"})
    assert read_offset_ppm(ds, cfg.protocols[0].offset) == pytest.approx(-3.5, abs=1e-6)
    ds.ImagingFrequency = f"{2 * f0:.6f}"  # the conversion follows this instance's frequency
    assert read_offset_ppm(ds, cfg.protocols[0].offset) == pytest.approx(-1.75, abs=1e-6)
    del ds.ImagingFrequency
    with pytest.raises(AssemblyError, match=r"ImagingFrequency: missing"):
        read_offset_ppm(ds, cfg.protocols[0].offset)


def test_offset_from_ordered_list_by_acquisition_number():
    # synth numbers AcquisitionNumber 1..n in acquisition order (node/synth.py)
    cfg = _cfg(offset={"values_ppm": OFFSETS, "order_by": "AcquisitionNumber"})
    rule = cfg.protocols[0].offset
    dss = _series()
    assert [read_offset_ppm(d, rule) for d in dss[::SLICES]] == OFFSETS
    dss[0].AcquisitionNumber = 99
    with pytest.raises(AssemblyError, match=r"AcquisitionNumber: value 99 is outside the "
                                            r"protocol's list \(1\.\.7\)"):
        read_offset_ppm(dss[0], rule)
    del dss[1].AcquisitionNumber
    with pytest.raises(AssemblyError, match=r"AcquisitionNumber: missing"):
        read_offset_ppm(dss[1], rule)


def test_offset_rule_errors_name_the_problem():
    ds = _series()[0]
    rule = _cfg(offset={"keyword": "ImageComments", "regex": r"offset=([0-9.]+)"}).protocols[0].offset
    with pytest.raises(AssemblyError, match=r"offset ImageComments in ppm via regex: the regex "
                                            r"does not match"):
        read_offset_ppm(ds, rule)
    rule = _cfg(offset={"keyword": "ImageComments"}).protocols[0].offset
    with pytest.raises(AssemblyError, match=r"offset ImageComments in ppm: not a number"):
        read_offset_ppm(ds, rule)
    rule = _cfg(offset={"tag": "(0029,xx11)", "private_creator": "CESTNODE SIM 1"}).protocols[0].offset
    with pytest.raises(AssemblyError, match=r"offset \(0029,xx11\) of 'CESTNODE SIM 1' in ppm: missing"):
        read_offset_ppm(ds, rule)


def test_slice_position_is_ipp_dot_normal_for_an_oblique_slice():
    ds = _series()[0]
    # rotate the row/column cosines 30 degrees about x; normal = r x c (PS3.3 C.7.6.2.1.1)
    a = np.deg2rad(30.0)
    r, c = np.array([1.0, 0, 0]), np.array([0, np.cos(a), np.sin(a)])
    ds.ImageOrientationPatient = [f"{v:.8f}" for v in (*r, *c)]
    ds.ImagePositionPatient = ["10", "20", "30"]
    pos, orient = slice_geometry(ds)
    n = np.cross(r, c)
    assert pos == pytest.approx(float(np.dot([10, 20, 30], n)), abs=1e-6)
    assert orient == pytest.approx((*r, *c), abs=1e-7)
    ds.ImageOrientationPatient = ["1", "0", "0", "1", "0", "0"]
    with pytest.raises(AssemblyError, match=r"ImageOrientationPatient: row and column cosines"):
        slice_geometry(ds)


# ----------------------------------------------------------------------------- assembly
def test_scrambled_arrival_gives_identical_stacks_ordered_by_offset():
    sig = _signal()
    dss = _series()
    rng = random.Random(11)
    results = []
    for _ in range(3):
        order = dss[:]
        rng.shuffle(order)
        results.append(_assemble(order))
    first = results[0]
    for other in results[1:]:
        np.testing.assert_array_equal(other.signal, first.signal)
        np.testing.assert_array_equal(other.offsets_ppm, first.offsets_ppm)
    # offsets ascending; the two M0 repeats sit at -300 in InstanceNumber order
    assert first.offsets_ppm.tolist() == sorted(OFFSETS)
    perm = sorted(range(len(OFFSETS)), key=lambda k: (OFFSETS[k], k))
    np.testing.assert_array_equal(first.signal, _expected(sig)[..., perm])
    assert first.signal.dtype == np.float32 and first.signal.flags.c_contiguous
    assert first.complete and first.missing == ""
    assert first.instance_count == len(dss)
    # references are each slice's M0 frame; sources follow the columns
    for s, ref in enumerate(first.references):
        assert float(ref.private_block(0x0029, "CESTNODE SIM 1")[0x10].value) == -300.0
        assert "PixelData" not in ref
        assert [float(d.private_block(0x0029, "CESTNODE SIM 1")[0x10].value)
                for d in first.sources[s]] == sorted(OFFSETS)


def test_slices_grouped_and_sorted_by_position_along_the_normal():
    sig = _signal()
    dss = _series()
    # reverse the slice positions: slice index 0 of synth now lies highest along the normal
    for ds in dss:
        ipp = [float(v) for v in ds.ImagePositionPatient]
        ipp[2] = -ipp[2]
        ds.ImagePositionPatient = [f"{v:.3f}" for v in ipp]
    res = _assemble(dss)
    perm = sorted(range(len(OFFSETS)), key=lambda k: (OFFSETS[k], k))
    np.testing.assert_array_equal(res.signal, _expected(sig)[::-1][..., perm])
    zs = [float(r.ImagePositionPatient[2]) for r in res.references]
    assert zs == sorted(zs)


def test_rescale_slope_and_intercept_are_applied():
    dss = _series()
    for ds in dss:
        ds.RescaleSlope, ds.RescaleIntercept = "2", "-1"
    res = _assemble(dss)
    plain = _assemble(_series())
    np.testing.assert_allclose(res.signal, plain.signal * 2 - 1)


def test_complete_on_expected_count_without_waiting():
    done = threading.Event()
    out = []

    def on_complete(s):
        out.append(s)
        done.set()

    cfg = _cfg(expected_frames=SLICES * len(OFFSETS))
    with Assembler(cfg, on_complete) as asm:
        for ds in _series():
            asm.add(ds)
        assert done.wait(5), "series not released on reaching its expected count"
        assert asm.add(_series()[0]) is Placed.LATE
    assert out[0].complete and out[0].clock["complete"] >= out[0].clock["last_instance"]


def test_idle_timeout_releases_incomplete_series_with_missing_text():
    cfg = parse_config({
        "node": {"idle_timeout_s": 0.2},
        "protocols": [{"name": "t", "expected_frames": SLICES * len(OFFSETS),
                       "match": {"attribute": "SeriesDescription", "regex": "phantom"},
                       "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"}}],
    })
    # synth order: offset by offset, slice by slice; instance 11 is 0 ppm (index 3) in slice 1
    dss = [d for d in _series() if d.InstanceNumber != 3 * SLICES + 2]
    done = threading.Event()
    out = []
    with Assembler(cfg, lambda s: (out.append(s), done.set())) as asm:
        for ds in dss:
            asm.add(ds)
        assert done.wait(5)
    (res,) = out
    assert not res.complete
    assert "20 of 21 expected frames" in res.missing
    assert "slice 1 lacks +0.000 ppm" in res.missing
    assert np.isnan(res.signal[..., list(res.offsets_ppm).index(0.0)]).any()


def test_series_without_needed_offsets_is_held_and_wakes_up():
    cfg = parse_config({
        "node": {"idle_timeout_s": 0.2},
        "protocols": [{"name": "t",
                       "match": {"attribute": "SeriesDescription", "regex": "phantom"},
                       "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"}}],
    })
    dss = _series()
    no_m0 = [d for d in dss if float(d.private_block(0x0029, "CESTNODE SIM 1")[0x10].value) != -300]
    m0 = [d for d in dss if d not in no_m0]
    held = threading.Event()
    done = threading.Event()
    notes = []
    out = []
    with Assembler(cfg, lambda s: (out.append(s), done.set()),
                   on_held=lambda k, m: (notes.append((k, m)), held.set())) as asm:
        for ds in no_m0:
            asm.add(ds)
        assert held.wait(5)
        assert not out
        assert "slice 0 has no M0" in notes[0][1]
        for ds in m0:  # the M0 frames arrive late: the held series wakes up
            asm.add(ds)
        assert done.wait(5)
    assert out[0].complete and out[0].signal.shape == (SLICES, ROWS, COLS, len(OFFSETS))


def test_duplicates_unmatched_and_inconsistent_instances():
    out = []
    with Assembler(_cfg(), out.append) as asm:
        dss = _series()
        assert asm.add(dss[0]) is Placed.ADDED
        assert asm.add(dss[0]) is Placed.DUPLICATE
        other = _series(series_description="T1 survey", series_uid="2.25.1")[0]
        assert asm.add(other) is Placed.UNMATCHED
        bad = _series()[1]
        bad.Rows = ROWS + 1
        bad.PixelData = bytes(2 * (ROWS + 1) * COLS)
        with pytest.raises(AssemblyError, match=r"Rows/Columns: 7 x 5 differs from the series' 6 x 5"):
            asm.add(bad)
        nopix = _series()[2]
        del nopix.PixelData
        with pytest.raises(AssemblyError, match=r"PixelData: missing"):
            asm.add(nopix)
        short = _series()[3]
        short.PixelData = b"\x00\x01"
        with pytest.raises(AssemblyError, match=r"PixelData: 2 bytes, expected 60"):
            asm.add(short)
        assert asm.open_series() == {asm.prepare(dss[0]).key: 1}  # type: ignore[union-attr]


# ----------------------------------------------------------------------------- fast lookups
def _encoded(ds, *, implicit: bool = False):
    """``ds`` written and read back as the receiver sees it: raw, not yet converted elements
    (explicit VR LE through node.fastpath's scanner, implicit VR through pydicom's reader)."""
    from pydicom.filebase import DicomBytesIO
    from pydicom.filewriter import write_dataset

    from node.fastpath import part10_prefix_and_meta, scan_dataset
    buf = DicomBytesIO()
    buf.is_little_endian, buf.is_implicit_VR = True, implicit
    write_dataset(buf, ds)
    ts = str(ImplicitVRLittleEndian) if implicit else "1.2.840.10008.1.2.1"
    out = scan_dataset(buf.getvalue(), ts)[0]
    if "SOPInstanceUID" in ds:
        out.file_meta = part10_prefix_and_meta(str(ds.SOPClassUID), str(ds.SOPInstanceUID), ts,
                                               implementation_class_uid="1.2.3",
                                               implementation_version="TEST")[1]
    return out


def _pydicom_block_element(ds, group, creator):
    # the reference: pydicom's own private block lookup (PS3.5 7.8.1), on a fresh copy so
    # neither side sees the other's converted values or cached blocks
    try:
        return ds.private_block(group, creator).block_start >> 8
    except KeyError:
        return None


@pytest.mark.parametrize("implicit", [False, True])
def test_private_block_element_agrees_with_pydicom_private_block(implicit):
    # PS3.5 7.8.1: (gggg,00xx) holds the creator of block (gggg,xx00-xxFF); any xx in
    # 0x10-0xFF. The direct lookup must find the same block as pydicom's private_block.
    from pydicom import Dataset

    from node.assemble import private_block_element
    ds = Dataset()
    ds.add_new(0x00290010, "LO", "OTHER VENDOR")
    ds.add_new(0x00290011, "LO", "CESTNODE SIM 1")  # even length after padding: "... 1 "
    ds.add_new(0x00290042, "LO", "SECOND\\VALUE")  # multi-valued: equals no single creator
    ds.add_new(0x002900FF, "LO", "LAST BLOCK")
    ds.add_new(0x00290080, "LO", "CESTNODE SIM 1")  # a repeat: the lowest block wins
    ds.add_new(0x00311020, "LO", "not a creator range")
    ds.add_new(0x00310020, "LO", "  LEADING")  # leading spaces are kept by pydicom
    for group, creator in [(0x0029, "CESTNODE SIM 1"), (0x0029, "OTHER VENDOR"),
                           (0x0029, "LAST BLOCK"), (0x0029, "SECOND"), (0x0029, "NOPE"),
                           (0x0029, "CESTNODE SIM"), (0x0031, "not a creator range"),
                           (0x0031, "  LEADING"), (0x0031, "LEADING"), (0x0033, "ANY")]:
        want = _pydicom_block_element(_encoded(ds, implicit=implicit), group, creator)
        got = private_block_element(_encoded(ds, implicit=implicit), group, creator)
        assert got == want, (hex(group), creator)
    assert private_block_element(_encoded(ds), 0x0029, "CESTNODE SIM 1") == 0x11
    assert private_block_element(_encoded(ds), 0x0029, "SECOND") is None
    # refused alike: an even group or an empty creator (pydicom raises ValueError)
    for group, creator in [(0x0028, "CESTNODE SIM 1"), (0x0029, "")]:
        with pytest.raises(ValueError):
            _encoded(ds).private_block(group, creator)
        with pytest.raises(ValueError):
            private_block_element(_encoded(ds), group, creator)


def test_private_block_element_non_ascii_creator_and_converted_elements():
    # a creator outside 7-bit text goes through pydicom's decoding (SpecificCharacterSet,
    # PS3.5 6.1); an element pydicom has already converted is compared by its value
    from pydicom import Dataset

    from node.assemble import private_block_element
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.add_new(0x00290010, "LO", "FABRIQUÉ")
    ds.add_new(0x00290020, "LO", "CESTNODE SIM 1")
    raw = _encoded(ds)
    assert private_block_element(raw, 0x0029, "FABRIQUÉ") == _pydicom_block_element(
        _encoded(ds), 0x0029, "FABRIQUÉ") == 0x10
    raw[0x00290020].value  # converted now  # noqa: B018
    assert private_block_element(raw, 0x0029, "CESTNODE SIM 1") == 0x20
    assert private_block_element(ds, 0x0029, "CESTNODE SIM 1") == 0x20  # built in memory


@pytest.mark.parametrize("implicit", [False, True])
def test_offset_from_a_private_block_other_than_0x10_honours_the_creator(implicit):
    # the offset element (0029,xx10) of the block whose creator matches, wherever it is;
    # the same element byte of another creator's block is not taken
    ds = _series()[0]
    true = float(ds.private_block(0x0029, "CESTNODE SIM 1")[0x10].value)
    del ds[0x00290010]
    del ds[0x00291010]
    ds.add_new(0x00290010, "LO", "OTHER VENDOR")
    ds.add_new(0x00291010, "DS", "99.0")  # same byte, other creator's block
    ds.add_new(0x00290043, "LO", "CESTNODE SIM 1")
    ds.add_new(0x00294310, "DS", f"{true:.4f}")
    rule = _cfg().protocols[0].offset
    raw = _encoded(ds, implicit=implicit)
    via_pydicom = float(_encoded(ds, implicit=implicit).private_block(0x0029, "CESTNODE SIM 1")
                        [0x10].value)
    assert read_offset_ppm(raw, rule) == via_pydicom == pytest.approx(true)
    del ds[0x00294310]  # the creator's block without the element: missing, not 99
    with pytest.raises(AssemblyError, match="missing"):
        read_offset_ppm(_encoded(ds, implicit=implicit), rule)


def test_prepare_from_raw_bytes_equals_prepare_from_converted_values():
    # the fast readers (match text, UIDs, Rows/Columns, InstanceNumber, ImagesInAcquisition,
    # offset, geometry, pixels) give what pydicom's converted values give
    datasets = _series()
    datasets[0].SeriesDescription = "CEST APT phantom  "  # trailing spaces: stripped
    datasets[1].InstanceNumber = "7"
    datasets[2].ImagesInAcquisition = 21
    asm = Assembler(_cfg(), lambda s: None)
    for ds in datasets:
        conv = _encoded(ds)
        for elem in conv:  # every value converted by pydicom first
            elem.value  # noqa: B018
        a, b = asm.prepare(_encoded(ds)), asm.prepare(conv)
        assert a is not None and b is not None
        assert (a.key, a.sop_instance_uid, a.rows, a.cols, a.orientation,
                a.images_in_acquisition) == (b.key, b.sop_instance_uid, b.rows, b.cols,
                                             b.orientation, b.images_in_acquisition)
        assert [(f.offset_ppm, f.position_mm, f.tiebreak) for f in a.frames] == \
            [(f.offset_ppm, f.position_mm, f.tiebreak) for f in b.frames]
        np.testing.assert_array_equal(a.frames[0].pixels, b.frames[0].pixels)
    bad = _series()[0]
    bad.SeriesDescription = " CEST APT phantom"  # leading space: _as_text strips it too
    assert asm.prepare(_encoded(bad)) is not None
    bad.SeriesDescription = "OTHER CEST APT phantom"
    assert asm.prepare(_encoded(bad)) is None


@pytest.mark.parametrize("implicit", [False, True])
def test_header_uid_and_us_read_raw_values_as_pydicom_does(implicit):
    # UIDs are padded with a trailing NUL to an even length (PS3.5 9.1, from memory); the
    # raw read must give exactly what pydicom's conversion gives, explicit and implicit VR
    from pydicom.dataset import Dataset
    from pydicom.filebase import DicomBytesIO
    from pydicom.filereader import read_dataset
    from pydicom.filewriter import write_dataset

    from node.assemble import header_uid, header_us
    ds = Dataset()
    ds.SOPInstanceUID = "1.2.3.45"  # odd length: written with a NUL pad
    ds.StudyInstanceUID = "1.2.3.4"
    ds.SeriesInstanceUID = ["1.2.3", "4.5.6"]  # multi-valued: pydicom's path
    ds.Rows = 96
    out = DicomBytesIO()
    out.is_little_endian, out.is_implicit_VR = True, implicit
    write_dataset(out, ds)
    raw = read_dataset(BytesIO(out.getvalue()), implicit, True)
    for tag, kw in ((0x00080018, "SOPInstanceUID"), (0x0020000D, "StudyInstanceUID"),
                    (0x0020000E, "SeriesInstanceUID")):
        expected = str(read_dataset(BytesIO(out.getvalue()), implicit, True)[kw].value)
        assert header_uid(raw, tag, kw) == expected
    assert header_uid(raw, 0x00080018, "SOPInstanceUID") == "1.2.3.45"
    assert header_us(raw, 0x00280010, "Rows") == 96
    assert header_us(raw, 0x00280011, "Columns") == 0  # absent: 0, as ds.get(...) or 0
    with pytest.raises(AttributeError):
        header_uid(raw, 0x00080016, "SOPClassUID")  # absent: as str(ds.SOPClassUID)
