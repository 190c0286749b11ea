"""Bad input at the node's door: each gets a PS3.7 status, and the node keeps working.

A real Node (receiver, processor, sender to a DCMTK storescp) runs on loopback. Bad objects go
in over real associations: a pynetdicom SCU sends crafted data sets, and raw bytes exactly as
written (pynetdicom's ``STORE_SEND_CHUNKED_DATASET`` mode streams a file's data set without
decoding it); DCMTK ``storescu`` sends damaged files. After every bad input the node answers
C-ECHO and processes a good series sent after it.

Statuses are those of PS3.4 Annex B.2.3 (C-STORE): 0xA700 out of resources, 0xA900 data set
does not match SOP class, 0xCxxx cannot understand.
"""

from __future__ import annotations

import io
import re
import struct
from collections.abc import Callable
from pathlib import Path

import pytest
from pydicom import Dataset, dcmread
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_dataset, write_file_meta_info
from pydicom.uid import (
    CTImageStorage,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    MRImageStorage,
)
from pynetdicom import AE, _config

from node.receive import (
    STATUS_BAD_HEADER,
    STATUS_OUT_OF_RESOURCES,
    STATUS_SOP_MISMATCH,
    STATUS_SUCCESS,
)
from node.synth import write_series
from tests.node.harness import SCANNER, assert_node_alive, good_series, running_node, series_key_of
from tests.peers import storescu

pytestmark = pytest.mark.peers

CANNOT_UNDERSTAND = range(0xC000, 0xD000)  # PS3.4 B.2.3: the whole Cxxx family
MAX_FRAMES = 30  # a series of 12 frames fits, a 31st frame does not


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("bad-input")
    with running_node(tmp, max_rows=512, max_cols=512, max_frames_per_series=MAX_FRAMES) as (
            nd, archive, collect):
        yield nd, archive, collect, tmp


class Scu:
    """One pynetdicom association to the node (MR Image Storage, explicit and implicit VR)."""

    def __init__(self, port: int):
        ae = AE(ae_title=SCANNER)
        ae.add_requested_context(MRImageStorage, ExplicitVRLittleEndian)
        ae.add_requested_context(MRImageStorage, ImplicitVRLittleEndian)
        self.assoc = ae.associate("127.0.0.1", port, ae_title="CESTNODE")
        assert self.assoc.is_established

    def store(self, ds: Dataset) -> Dataset:
        rsp = self.assoc.send_c_store(ds)
        assert rsp is not None and "Status" in rsp, "no C-STORE response"
        return rsp

    def store_raw(self, path: Path) -> Dataset:
        """Send a file's data set bytes as they are (no decoding on our side)."""
        old = _config.STORE_SEND_CHUNKED_DATASET
        _config.STORE_SEND_CHUNKED_DATASET = True
        try:
            rsp = self.assoc.send_c_store(path)
        finally:
            _config.STORE_SEND_CHUNKED_DATASET = old
        assert rsp is not None and "Status" in rsp, "no C-STORE response"
        return rsp

    def close(self) -> None:
        if self.assoc.is_established:
            self.assoc.release()


def raw_file(path: Path, body: bytes, *, sop_uid: str, ts=ExplicitVRLittleEndian,
             sop_class=MRImageStorage) -> Path:
    """A PS3.10 file: preamble, valid file meta, then ``body`` as the data set, unchecked."""
    meta = Dataset()
    meta.MediaStorageSOPClassUID = sop_class
    meta.MediaStorageSOPInstanceUID = sop_uid
    meta.TransferSyntaxUID = ts
    meta.ImplementationClassUID = "2.25.1"
    buf = io.BytesIO()
    buf.write(b"\x00" * 128 + b"DICM")
    write_file_meta_info(buf, meta, enforce_standard=True)  # type: ignore[arg-type]
    path.write_bytes(buf.getvalue() + body)
    return path


def dataset_bytes(ds: Dataset) -> bytes:
    """The explicit VR little endian encoding of a data set (without file meta)."""
    fp = DicomBytesIO()
    fp.is_little_endian, fp.is_implicit_VR = True, False
    write_dataset(fp, ds)
    return fp.getvalue()


# ------------------------------------------------------------------ the bad inputs
# each: (name, make(tmp, scu) -> response, check(status, comment))
def _series(seed: str) -> list[Dataset]:
    return good_series(seed)


def _truncated_pixels(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("raw-trunc")[0]
    body = dataset_bytes(ds)
    return scu.store_raw(raw_file(tmp / "trunc.dcm", body[:-100], sop_uid=ds.SOPInstanceUID))


def _truncated_header(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("raw-trunc-hdr")[0]
    body = dataset_bytes(ds)
    assert framing_cut_inside_header(body)
    return scu.store_raw(raw_file(tmp / "trunc-hdr.dcm", body[:90], sop_uid=ds.SOPInstanceUID))


def framing_cut_inside_header(body: bytes) -> bool:
    """Byte 90 falls inside the value of the SOP Instance UID (0008,0018) of our phantom."""
    at = body.find(b"\x08\x00\x18\x00UI")
    return 0 < at < 90 < at + 8 + int.from_bytes(body[at + 6:at + 8], "little")


def _garbage(tmp: Path, scu: Scu) -> Dataset:
    junk = bytes((i * 37 + 11) % 256 for i in range(4000))
    return scu.store_raw(raw_file(tmp / "garbage.dcm", junk, sop_uid="2.25.999001"))


def _empty(tmp: Path, scu: Scu) -> Dataset:
    return scu.store_raw(raw_file(tmp / "empty.dcm", b"", sop_uid="2.25.999002"))


def _huge_length(tmp: Path, scu: Scu) -> Dataset:
    # the first element (0008,0005 or 0008,0008 ...) claims a value longer than the data set
    ds = _series("raw-len")[0]
    body = bytearray(dataset_bytes(ds))
    # explicit VR short form: tag(4) VR(2) length(2): make the first length 0xFFF0
    body[6:8] = struct.pack("<H", 0xFFF0)
    return scu.store_raw(raw_file(tmp / "len.dcm", bytes(body), sop_uid=ds.SOPInstanceUID))


def _explicit_as_implicit(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("raw-ts")[0]
    return scu.store_raw(raw_file(tmp / "ts.dcm", dataset_bytes(ds), sop_uid=ds.SOPInstanceUID,
                                  ts=ImplicitVRLittleEndian))


def _sop_class_mismatch(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("ct")[0]
    ds.SOPClassUID = CTImageStorage  # the data set says CT, the request says MR
    return scu.store_raw(raw_file(tmp / "ct.dcm", dataset_bytes(ds), sop_uid=ds.SOPInstanceUID))


def _no_pixels(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("nopix")[0]
    del ds.PixelData
    return scu.store(ds)


def _short_pixels(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("shortpix")[0]
    ds.PixelData = ds.PixelData[:100]
    return scu.store(ds)


def _matrix_differs(tmp: Path, scu: Scu) -> Dataset:
    dss = _series("matrix")
    assert scu.store(dss[0]).Status == STATUS_SUCCESS
    bad = dss[1]
    bad.Rows, bad.Columns = 8, 8
    bad.PixelData = bytes(2 * 8 * 8)
    return scu.store(bad)


def _orientation_differs(tmp: Path, scu: Scu) -> Dataset:
    dss = _series("orient")
    assert scu.store(dss[0]).Status == STATUS_SUCCESS
    bad = dss[1]
    bad.ImageOrientationPatient = [0, 1, 0, 0, 0, -1]  # sagittal in an axial series
    return scu.store(bad)


def _no_offset(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("nooff")[0]
    del ds[0x00290010]  # the private creator: the offset element cannot be found
    return scu.store(ds)


def _offset_bytes(tmp: Path, scu: Scu, seed: str, text: bytes) -> Dataset:
    """The offset element's DS value replaced by ``text`` in the encoded bytes (pydicom would
    refuse to write it)."""
    ds = _series(seed)[0]
    block = ds.private_block(0x0029, "CESTNODE SIM 1")
    block[0x10].value = "12345.6789"
    body = dataset_bytes(ds)
    assert body.count(b"12345.6789") == 1
    body = body.replace(b"12345.6789", text.ljust(10))
    return scu.store_raw(raw_file(tmp / f"{seed}.dcm", body, sop_uid=ds.SOPInstanceUID))


def _offset_text(tmp: Path, scu: Scu) -> Dataset:
    return _offset_bytes(tmp, scu, "offtext", b"abc")


def _offset_nan(tmp: Path, scu: Scu) -> Dataset:
    return _offset_bytes(tmp, scu, "offnan", b"NaN")


def _no_position(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("nopos")[0]
    del ds.ImagePositionPatient
    return scu.store(ds)


def _degenerate_orientation(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("iop0")[0]
    ds.ImageOrientationPatient = [1, 0, 0, 1, 0, 0]  # rows parallel to columns
    return scu.store(ds)


def _zero_rows(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("rows0")[0]
    ds.Rows = 0
    return scu.store(ds)


def _absurd_matrix(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("absurd")[0]
    ds.Rows, ds.Columns = 60000, 60000  # 14 GB as float32, with 512 bytes of pixels
    return scu.store(ds)


def _absurd_frames(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("frames")[0]
    ds.NumberOfFrames = 100000
    return scu.store(ds)


def _series_too_long(tmp: Path, scu: Scu) -> Dataset:
    # 3 good series' worth of frames under one series UID: the 31st frame is refused
    dss = _series("long")
    uid = dss[0].SeriesInstanceUID
    n = 0
    for rep in range(3):
        for ds in _series(f"long-{rep}"):
            ds.SeriesInstanceUID = uid
            ds.StudyInstanceUID = dss[0].StudyInstanceUID
            ds.ImagePositionPatient = [0.0, 0.0, 5.0 * rep]  # another slice each time
            ds.SeriesDescription = "CEST APT phantom long"
            ds.ImagesInAcquisition = 100  # the series is not complete at 12 frames
            rsp = scu.store(ds)
            n += 1
            if n <= MAX_FRAMES:
                assert rsp.Status == STATUS_SUCCESS, hex(rsp.Status)
            else:
                return rsp
    raise AssertionError("never beyond the limit")


def _no_sop_instance_uid(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("nouid")[0]
    body = dataset_bytes(ds)
    ds2 = dcmread(io.BytesIO(body), force=True)
    del ds2.SOPInstanceUID
    return scu.store_raw(raw_file(tmp / "nouid.dcm", dataset_bytes(ds2), sop_uid="2.25.999003"))


def _bits_12(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("bits")[0]
    ds.BitsAllocated = 12  # not a multiple of 8: nothing can decode it
    return scu.store(ds)


def _rgb_in_mr(tmp: Path, scu: Scu) -> Dataset:
    ds = _series("rgb")[0]
    ds.SamplesPerPixel = 3
    ds.PhotometricInterpretation = "RGB"
    ds.PlanarConfiguration = 0
    return scu.store(ds)


BAD: list[tuple[str, Callable[[Path, Scu], Dataset], Callable[[int], bool], str]] = [
    ("truncated pixel data (raw)", _truncated_pixels, lambda s: s in CANNOT_UNDERSTAND, ""),
    ("truncated header (raw)", _truncated_header, lambda s: s in CANNOT_UNDERSTAND, ""),
    ("garbage bytes (raw)", _garbage, lambda s: s in CANNOT_UNDERSTAND, ""),
    ("empty data set (raw)", _empty, lambda s: s in CANNOT_UNDERSTAND, ""),
    ("element length beyond the data (raw)", _huge_length,
     lambda s: s in CANNOT_UNDERSTAND, ""),
    ("explicit VR bytes under implicit VR", _explicit_as_implicit,
     lambda s: s in CANNOT_UNDERSTAND, ""),
    ("SOP class differs from the request", _sop_class_mismatch,
     lambda s: s == STATUS_SOP_MISMATCH, "SOPClassUID"),
    ("no pixel data", _no_pixels, lambda s: s == STATUS_SOP_MISMATCH, "PixelData"),
    ("pixel data too short", _short_pixels, lambda s: s == STATUS_BAD_HEADER, "PixelData"),
    ("matrix differs inside the series", _matrix_differs,
     lambda s: s == STATUS_SOP_MISMATCH, "Rows/Columns"),
    ("orientation differs inside the series", _orientation_differs,
     lambda s: s == STATUS_SOP_MISMATCH, "ImageOrientationPatient"),
    ("offset element missing", _no_offset, lambda s: s == STATUS_BAD_HEADER, "missing"),
    ("offset not a number", _offset_text, lambda s: s in CANNOT_UNDERSTAND, ""),
    ("offset NaN", _offset_nan, lambda s: s in CANNOT_UNDERSTAND, ""),
    ("ImagePositionPatient missing", _no_position, lambda s: s == STATUS_BAD_HEADER,
     "ImagePositionPatient"),
    ("orientation not orthogonal", _degenerate_orientation, lambda s: s == STATUS_BAD_HEADER,
     "not orthogon"),
    ("zero rows", _zero_rows, lambda s: s == STATUS_BAD_HEADER, "Rows/Columns"),
    ("60000 x 60000 matrix", _absurd_matrix, lambda s: s == STATUS_OUT_OF_RESOURCES, "max"),
    ("100000 frames in one instance", _absurd_frames, lambda s: s == STATUS_OUT_OF_RESOURCES,
     "max_frames_per_series"),
    ("series beyond max_frames_per_series", _series_too_long,
     lambda s: s == STATUS_OUT_OF_RESOURCES, "max_frames_per_series"),
    ("SOP Instance UID missing (raw)", _no_sop_instance_uid,
     lambda s: s in CANNOT_UNDERSTAND, ""),
    ("BitsAllocated 12", _bits_12, lambda s: s in CANNOT_UNDERSTAND, "PixelData"),
    ("three samples per pixel in MR", _rgb_in_mr, lambda s: s in CANNOT_UNDERSTAND, ""),
]


@pytest.mark.parametrize(("name", "make", "ok_status", "comment"), BAD, ids=[b[0] for b in BAD])
def test_bad_input_gets_a_status_and_the_node_keeps_working(live, name, make, ok_status, comment):
    nd, archive, collect, tmp = live
    scu = Scu(nd.port)
    try:
        rsp = make(tmp, scu)
        status = int(rsp.Status)
        assert ok_status(status), f"{name}: status 0x{status:04X}"
        text = str(rsp.get("ErrorComment", ""))
        assert comment in text, f"{name}: ErrorComment {text!r}"
        # the same association still works: a good instance of another series is stored
        assert scu.store(_series(f"after-{name}")[0]).Status == STATUS_SUCCESS
    finally:
        scu.close()
    assert_node_alive(nd, archive, collect, tmp, seed=f"alive-{name}")


def test_refused_instance_flags_its_series(live):
    nd, _, _, _ = live
    scu = Scu(nd.port)
    try:
        dss = _series("flagged")
        assert scu.store(dss[0]).Status == STATUS_SUCCESS
        bad = dss[1]
        bad.ImageOrientationPatient = [0, 1, 0, 0, 0, -1]
        assert scu.store(bad).Status == STATUS_SOP_MISMATCH
    finally:
        scu.close()
    key = series_key_of(dss[0])
    assert any("ImageOrientationPatient" in f for f in nd.receiver.flags[key])
    # the refused copy left nothing in the spool; the first instance is there
    assert len(nd.receiver.spool.instance_paths(key)) == 1


def test_duplicates_are_idempotent_and_the_first_copy_is_kept(live):
    nd, archive, collect, tmp = live
    dss = _series("dup")
    key = series_key_of(dss[0])
    scu = Scu(nd.port)
    try:
        for ds in dss[:5]:
            assert scu.store(ds).Status == STATUS_SUCCESS
        first = nd.receiver.spool.path_for(key, str(dss[3].SOPInstanceUID)).read_bytes()
        # an identical re-send: acknowledged, nothing changes
        assert scu.store(dss[3]).Status == STATUS_SUCCESS
        # a conflicting duplicate: same SOP Instance UID, other pixels; first kept, flagged
        other = dss[3].copy()
        other.PixelData = bytes(len(dss[3].PixelData))
        assert scu.store(other).Status == STATUS_SUCCESS
        assert nd.receiver.spool.path_for(key, str(dss[3].SOPInstanceUID)).read_bytes() == first
        assert any("conflicting duplicate" in f for f in nd.receiver.flags[key])
        for ds in dss[5:]:
            assert scu.store(ds).Status == STATUS_SUCCESS
    finally:
        scu.close()
    out = collect.wait_for(lambda os: any(o.key == key for o in os))
    (mine,) = [o for o in out if o.key == key]
    assert mine.ok and mine.record["instances"] == len(dss)
    rec = nd.receiver.spool.series(key)
    assert rec is not None and rec.n_instances == len(dss)
    assert "conflicting duplicate" in rec.detail


def test_dcmtk_storescu_damaged_files(live):
    """DCMTK storescu (dcmdata writes and reads the files) sends damaged objects: every one
    gets a failure status and the rest of the run goes on (-nh)."""
    nd, archive, collect, tmp = live
    folder = tmp / "damaged"
    dss = _series("dcmtk-damaged")
    short = dss[0].copy()
    short.PixelData = short.PixelData[:64]
    big = dss[1].copy()
    big.Rows = big.Columns = 4096  # beyond max_rows 512
    big.PixelData = bytes(2 * 16 * 16)
    nooff = dss[2].copy()
    del nooff[0x00290010]
    files = write_series([short, big, nooff], folder)
    good = write_series(_series("dcmtk-good"), tmp / "dcmtk-good")
    res = storescu(nd.port, [*files, *good], calling_ae=SCANNER, extra=["-nh", "-v"],
                   check=False)
    # DCMTK prints each response's PS3.7 status by name, in the order of the files
    responses = re.findall(r"Received Store Response \(([^)]*)\)", res.stdout + res.stderr)
    assert len(responses) == 3 + len(good), responses
    assert responses[3:] == ["Success"] * len(good)
    assert responses[0] == "Error: CannotUnderstand", responses  # pixel data cut short
    assert "OutOfResources" in responses[1], responses  # 4096 x 4096
    assert responses[2] == "Error: CannotUnderstand", responses  # no offset element
    key = series_key_of(_series("dcmtk-good")[0])
    out = collect.wait_for(lambda os: any(o.key == key for o in os))
    assert [o for o in out if o.key == key][0].ok
    assert nd.receiver.spool.instance_paths(series_key_of(dss[0])) == []

