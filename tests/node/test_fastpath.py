"""node.fastpath: codecs checked against pynetdicom's and pydicom's own, and the fast receive path
checked end to end with real peers (DCMTK storescu, a pynetdicom SCU) on 127.0.0.1.

What the node stores must be byte for byte the data set that was sent (PS3.10: preamble, DICM,
group 0002, then the data set as received), through the fast path and through the library.
The receive tests of tests/node/test_receive.py run here a second time with the fast path off.
"""

from __future__ import annotations

import contextlib
import random
import socket
import struct
import threading
import time
from io import BytesIO
from pathlib import Path

import numpy as np
import pytest
from pydicom import Dataset, dcmread
from pydicom.dataset import FileMetaDataset
from pydicom.filereader import read_dataset
from pydicom.sequence import Sequence
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian, MRImageStorage
from pynetdicom import AE, PYNETDICOM_IMPLEMENTATION_UID, PYNETDICOM_IMPLEMENTATION_VERSION
from pynetdicom.dimse_messages import C_ECHO_RQ, C_ECHO_RSP, C_STORE_RQ, C_STORE_RSP
from pynetdicom.dimse_primitives import C_ECHO, C_STORE
from pynetdicom.dsutils import create_file_meta, encode, encode_file_meta
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node import fastpath
from node.config import parse_config
from node.receive import STATUS_SOP_MISMATCH, Receiver
from node.synth import series_from_arrays, write_series
from tests.node import test_receive as _rx
from tests.peers import storescu

OFFSETS = [-300.0, 3.5, -3.5, 1.0, -1.0]
SLICES = 2
UID_CLASS = str(MRImageStorage)
UID_INST = "1.2.826.0.1.3680043.10.999.1.2.3"  # odd length: padded


def _library_command(primitive, message_cls) -> bytes:
    """The command set bytes pynetdicom itself would put on the wire."""
    msg = message_cls()
    msg.primitive_to_message(primitive)
    return encode(msg.command_set, True, True)


# --------------------------------------------------------------------------- codecs
@pytest.mark.parametrize(("status", "comment"), [(0x0000, ""), (0xA900, "Rows/Columns: 9 x 8"),
                                                 (0xC001, "odd")])
def test_store_response_is_the_library_encoding(status, comment):
    # reference: pynetdicom's C_STORE_RSP message built from a primitive (PS3.7 9.3.1.2)
    rsp = C_STORE()
    rsp.MessageIDBeingRespondedTo = 17
    rsp.AffectedSOPClassUID = UID_CLASS
    rsp.AffectedSOPInstanceUID = UID_INST
    rsp.Status = status
    if comment:
        rsp.ErrorComment = comment
    ours = fastpath.encode_store_response(17, UID_CLASS, UID_INST, status, comment)
    assert ours == _library_command(rsp, C_STORE_RSP)


def test_store_command_parse_matches_the_library_request():
    rq = C_STORE()
    rq.MessageID = 4711
    rq.AffectedSOPClassUID = UID_CLASS
    rq.AffectedSOPInstanceUID = UID_INST
    rq.Priority = 2
    rq.MoveOriginatorApplicationEntityTitle = "MOVER"
    rq.MoveOriginatorMessageID = 3
    rq.DataSet = BytesIO(b"\x08\x00\x18\x00UI\x00\x00")  # any data set: CommandDataSetType
    cmd = _library_command(rq, C_STORE_RQ)
    mid, cls, inst, dtype = fastpath.parse_store_command(cmd)  # type: ignore[misc]
    assert (mid, cls, inst) == (4711, UID_CLASS, UID_INST)
    assert dtype != 0x0101  # a data set follows (PS3.7 Table E.1-1)
    # anything else is left to the library: another command, a cut-short or foreign element
    echo = C_ECHO()
    echo.MessageID = 1
    echo.AffectedSOPClassUID = Verification
    assert fastpath.parse_store_command(_library_command(echo, C_ECHO_RQ)) is None
    assert fastpath.parse_store_command(cmd[:-3]) is None
    assert fastpath.parse_store_command(cmd + b"\x00\x00\x01\x09\x02\x00\x00\x00\x01\x00") is None
    assert fastpath.parse_store_command(b"") is None


@pytest.mark.parametrize(("status", "comment", "instance"), [
    (0x0000, "", UID_INST), (0xB000, "coerced", UID_INST), (0xA700, " out of space  ", ""),
    (0xC001, "x" * 64, UID_INST)])
def test_store_response_parse_gives_the_library_primitive(status, comment, instance):
    # reference: pynetdicom's own encoder and decoder of a C-STORE-RSP (PS3.7 9.3.1.2): the
    # fast send path's primitive has the fields the library's decoder gives for the same bytes
    rsp = C_STORE()
    rsp.MessageIDBeingRespondedTo = 65535
    rsp.AffectedSOPClassUID = UID_CLASS
    if instance:
        rsp.AffectedSOPInstanceUID = instance
    rsp.Status = status
    if comment:
        rsp.ErrorComment = comment
    cmd = _library_command(rsp, C_STORE_RSP)
    msg = C_STORE_RSP()
    msg.command_set = read_dataset(BytesIO(cmd), True, True)
    lib = msg.message_to_primitive()
    mid, st, cls, inst, text = fastpath.parse_store_response(cmd)  # type: ignore[misc]
    assert (mid, st) == (lib.MessageIDBeingRespondedTo, lib.Status) == (65535, status)
    assert cls == lib.AffectedSOPClassUID and inst == (lib.AffectedSOPInstanceUID or "")
    assert text == (lib.ErrorComment or "")
    # anything else is the library's: a request, another response, more elements, cut short
    assert fastpath.parse_store_response(cmd[:-3]) is None
    echo = C_ECHO()
    echo.MessageIDBeingRespondedTo = 1
    echo.AffectedSOPClassUID = Verification
    echo.Status = 0
    assert fastpath.parse_store_response(_library_command(echo, C_ECHO_RSP)) is None
    error_id = struct.pack("<HHLH", 0x0000, 0x0903, 2, 7)  # (0000,0903) Error ID: not read here
    assert fastpath.parse_store_response(cmd + error_id) is None
    assert fastpath.parse_store_response(b"") is None


def test_part10_prefix_is_what_pydicom_writes():
    # reference: pydicom's encoding of pynetdicom's create_file_meta (PS3.10 7.1); several
    # instance UIDs in turn, of the same and of other lengths (odd ones padded with a NUL,
    # PS3.5 9.1), so that the prefixes built from the kept template are checked too
    for ts in (ExplicitVRLittleEndian, ImplicitVRLittleEndian):
        for inst in (UID_INST, UID_INST[:-1] + "9", UID_INST + "1", UID_INST + "12", UID_INST):
            ours, ours_meta = fastpath.part10_prefix_and_meta(
                UID_CLASS, inst, str(ts), implementation_class_uid=PYNETDICOM_IMPLEMENTATION_UID,
                implementation_version=PYNETDICOM_IMPLEMENTATION_VERSION)
            meta = create_file_meta(sop_class_uid=UID_CLASS, sop_instance_uid=inst,
                                    transfer_syntax=ts)
            assert ours == b"\x00" * 128 + b"DICM" + encode_file_meta(meta)
            back = fastpath.file_meta_from_prefix(ours)
            assert isinstance(back, FileMetaDataset)
            assert _raw_view(ours_meta) == _raw_view(back)
            assert back.TransferSyntaxUID == ts and back.MediaStorageSOPInstanceUID == inst
            assert ours_meta.MediaStorageSOPInstanceUID == inst


def _raw_view(ds: Dataset) -> list[tuple]:
    return [(int(e.tag), e.VR, e.length, e.value, e.value_tell) for e in ds._dict.values()]


def test_parse_dataset_equals_pydicom_reader():
    ds = series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1]
    buf = BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    raw = buf.getvalue()
    start = 132 + 12 + int.from_bytes(raw[140:144], "little")
    data = raw[start:]
    ours = fastpath.parse_dataset(data, str(ExplicitVRLittleEndian))
    ref = read_dataset(BytesIO(data), False, True)
    assert _raw_view(ours) == _raw_view(ref)
    assert ours.original_encoding == ref.original_encoding
    assert ours.original_character_set == ref.original_character_set
    assert ours.SOPInstanceUID == ds.SOPInstanceUID and ours.PixelData == ds.PixelData
    # an undefined-length sequence is not "simple": pydicom parses it, same result
    ds.ReferencedImageSequence = Sequence([Dataset()])
    ds.ReferencedImageSequence[0].ReferencedSOPInstanceUID = UID_INST
    buf = BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    raw = buf.getvalue()
    data = raw[132 + 12 + int.from_bytes(raw[140:144], "little"):]
    got = fastpath.parse_dataset(data, str(ExplicitVRLittleEndian))
    assert got.ReferencedImageSequence[0].ReferencedSOPInstanceUID == UID_INST
    # implicit VR always goes through pydicom
    imp = fastpath.parse_dataset(encode(ds, True, True), str(ImplicitVRLittleEndian))
    assert imp.SOPInstanceUID == ds.SOPInstanceUID


@pytest.mark.parametrize("charset", ["ISO_IR 100", "ISO_IR 192", "ISO 2022 IR 100"])
def test_character_sets_decode_as_pydicom_reader(charset):
    # SpecificCharacterSet (PS3.3 C.12.1.1.2) decides how text decodes; the scanner keeps
    # pydicom's encodings per raw value, so the second data set of a series is decoded from
    # the kept ones: both must read as pydicom's own reader reads them, each its own list
    ds = series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1]
    ds.SpecificCharacterSet = charset
    ds.PatientName = "Müller^Jörg"  # the synthetic phantom's invented name, Latin-1 letters
    ts = str(ExplicitVRLittleEndian)
    data = encode(ds, False, True)
    first, second = (fastpath.parse_dataset(data, ts) for _ in range(2))
    ref = read_dataset(BytesIO(data), False, True)
    for got in (first, second):
        assert got.original_character_set == ref.original_character_set
        assert str(got.PatientName) == str(ref.PatientName) == "Müller^Jörg"
    assert first.original_character_set is not second.original_character_set


def test_scan_dataset_says_when_the_framing_is_known_whole():
    # the receiver skips its own framing walk only for what the fast scanner read to the
    # exact end without a sequence (PS3.5 7.1: defined-length elements, 7.5: sequences)
    ds = series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1]
    ts = str(ExplicitVRLittleEndian)
    plain = encode(ds, False, True)
    got, framed = fastpath.scan_dataset(plain, ts)
    assert framed and got.SOPInstanceUID == ds.SOPInstanceUID
    assert fastpath.scan_dataset(bytearray(plain), ts)[1]
    assert not fastpath.scan_dataset(plain[:-3], ts)[1]  # a cut value: pydicom's reader
    assert not fastpath.scan_dataset(encode(ds, True, True), str(ImplicitVRLittleEndian))[1]
    ds.ReferencedImageSequence = Sequence([Dataset()])
    ds.ReferencedImageSequence[0].ReferencedSOPInstanceUID = UID_INST
    got, framed = fastpath.scan_dataset(encode(ds, False, True), ts)  # a sequence
    assert not framed
    assert got.ReferencedImageSequence[0].ReferencedSOPInstanceUID == UID_INST


def _walked(data: bytes) -> int:
    rows = np.empty((fastpath._WALK_MAX, 4), np.int64)
    return int(fastpath._walk_explicit_le(np.frombuffer(data, np.uint8), fastpath._VR_CODE,
                                          fastpath._VR_LONG, rows))


def test_compiled_scan_equals_the_python_scan(monkeypatch):
    # Explicit VR Little Endian element headers (PS3.5 7.1.2): tag, VR, 2-byte length, or 2
    # reserved bytes and a 4-byte length for OB/OD/OF/OL/OV/OW/SQ/UC/UN/UR/UT/SV/UV; the
    # compiled walk must give what the Python scanner gives, element for element, for every
    # data set, simple or not, whole or cut anywhere
    ds = series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1]
    ds.add_new(0x00091010, "LO", "")  # a zero-length value: pydicom's empty raw value
    ds.add_new(0x00091011, "UT", "x" * 70000)  # a long VR whose length needs the 4th byte
    ds.add_new(0x00091012, "OB", b"")  # a long VR, empty
    plain = encode(ds, False, True)
    assert _walked(plain) == len(ds)
    ref = fastpath._scan_explicit_le(plain)
    assert fastpath._scan_compiled(plain) == ref and ref[0] is not None and not ref[1]
    for cut in [*range(0, 600), *range(len(plain) - 80, len(plain) + 1)]:
        part = plain[:cut]
        assert fastpath._scan_compiled(part) == fastpath._scan_explicit_le(part), cut
    assert _walked(plain[:-3]) == -1  # a cut value is not simple
    bad_vr = plain[:4] + b"ZZ" + plain[6:]
    assert _walked(bad_vr) == -1 and fastpath._scan_compiled(bad_vr) == (None, False)
    item = struct.pack("<HHL", 0xFFFE, 0xE000, 0) + plain  # an item at the top level
    assert fastpath._scan_compiled(item) == (None, False)
    # a sequence of defined length (PS3.5 7.5.1) with one item of defined length: kept raw,
    # flagged as a sequence, by both
    uid = struct.pack("<HH2sH", 0x0008, 0x1155, b"UI", 4) + b"1.2\x00"
    item = struct.pack("<HHL", 0xFFFE, 0xE000, len(uid)) + uid
    sq = struct.pack("<HH2sHL", 0x0008, 0x1140, b"SQ", 0, len(item)) + item + plain
    assert _walked(sq) == len(ds) + 1
    got = fastpath._scan_compiled(sq)
    assert got == fastpath._scan_explicit_le(sq) and got[1]
    # more elements than the walk lists: the Python scanner's result, the same
    monkeypatch.setattr(fastpath, "_WALK_MAX", 8)
    assert fastpath._scan_compiled(plain) == ref


def test_new_dataset_is_a_dataset_like_pydicoms_own():
    # the receive path's Dataset without __init__ (fastpath.new_dataset) against pydicom's
    # constructor: the same attributes and values, the elements the given dict itself, and
    # no container shared between two data sets
    raw = fastpath._scan_explicit_le(encode(
        series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1], False, True))[0]
    assert raw is not None
    ours, ref, other = fastpath.new_dataset(raw), Dataset(raw), fastpath.new_dataset({})
    assert type(ours) is Dataset and ours.__dict__ == ref.__dict__ and ours._dict is raw
    for k, v in ours.__dict__.items():
        if isinstance(v, dict | list | set) and k != "_dict":
            assert v is not other.__dict__[k] and v is not fastpath._DS_STATE[k], k
    assert ours.SOPInstanceUID == ref.SOPInstanceUID and ours.Rows == ref.Rows
    ours.private_block(0x0029, "CESTNODE SIM 1")
    assert not other._private_blocks  # a private block read in one, not in the other


def test_prefix_and_meta_equal_the_prefix_read_back():
    for ts in (ExplicitVRLittleEndian, ImplicitVRLittleEndian):
        kw = {"implementation_class_uid": PYNETDICOM_IMPLEMENTATION_UID,
              "implementation_version": PYNETDICOM_IMPLEMENTATION_VERSION}
        prefix, meta = fastpath.part10_prefix_and_meta(UID_CLASS, UID_INST, str(ts), **kw)
        assert prefix == fastpath.encode_part10_prefix(UID_CLASS, UID_INST, str(ts), **kw)
        back = fastpath.file_meta_from_prefix(prefix)
        assert isinstance(meta, FileMetaDataset)
        assert _raw_view(meta) == _raw_view(back)
        assert meta.TransferSyntaxUID == ts and meta.MediaStorageSOPInstanceUID == UID_INST


def test_supported_names_the_version():
    ok, why = fastpath.supported()
    assert ok, why  # pyproject pins pynetdicom to the tested range


# --------------------------------------------------------------------------- end to end
def _cfg(tmp_path: Path, **node):
    return parse_config({
        "node": {"port": 0, "spool_dir": str(tmp_path / "spool"), "idle_timeout_s": 20.0,
                 "release_grace_s": 0.2, **node},
        "protocols": [{
            "name": "apt",
            "match": {"attribute": "SeriesDescription", "regex": "^CEST APT phantom"},
            "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"},
            "expected_frames": SLICES * len(OFFSETS),
        }],
    })


def _dataset_part(raw: bytes) -> tuple[bytes, bytes]:
    """(group 0002 bytes, data set bytes) of a PS3.10 file."""
    assert raw[128:132] == b"DICM"
    end = 132 + 12 + int.from_bytes(raw[140:144], "little")
    return raw[132:end], raw[end:]


@pytest.mark.peers
@pytest.mark.parametrize("max_pdu", [262144, 4096])  # 4096: every data set in fragments
@pytest.mark.parametrize("fast", [True, False])
def test_storescu_instances_are_stored_byte_identical(tmp_path, fast, max_pdu):
    done = threading.Event()
    got: list = []
    rng = np.random.default_rng(11)
    signal = rng.random((SLICES, 16, 16, len(OFFSETS))).astype(np.float32)
    files = write_series(series_from_arrays(signal, OFFSETS, scale=3000.0), tmp_path / "src")
    random.Random(2).shuffle(files)
    rx = Receiver(_cfg(tmp_path, max_pdu=max_pdu), lambda s: (got.append(s), done.set()),
                  fast_path=fast).start()
    try:
        storescu(rx.port, files)
        assert done.wait(10), "series not assembled"
        assert rx.fast_stores == (len(files) if fast else 0)
        (series,) = got
        stored = {dcmread(p).SOPInstanceUID: p for p in rx.spool.instance_paths(series.key)}
    finally:
        rx.stop()
    assert len(stored) == len(files)
    for f in files:
        sent = f.read_bytes()
        uid = dcmread(f).SOPInstanceUID
        meta, body = _dataset_part(stored[uid].read_bytes())
        assert body == _dataset_part(sent)[1]  # the data set exactly as sent
        fm = dcmread(stored[uid]).file_meta
        assert (fm.MediaStorageSOPInstanceUID, fm.TransferSyntaxUID) == (uid, ExplicitVRLittleEndian)
        assert fm.ImplementationClassUID == PYNETDICOM_IMPLEMENTATION_UID
        assert len(meta) > 0
    ref = np.rint(signal * 3000).astype(np.float32)  # the stored values (node.synth: rint)
    np.testing.assert_array_equal(series.signal, ref[..., np.argsort(OFFSETS)])


@pytest.mark.peers
def test_fast_path_falls_back_for_other_messages_on_one_association(tmp_path):
    dss = series_from_arrays(np.random.default_rng(4).random((SLICES, 8, 8, len(OFFSETS))),
                             OFFSETS)
    rx = Receiver(_cfg(tmp_path), lambda s: None, fast_path=True).start()
    ae = AE(ae_title="SCANNER1")
    ae.add_requested_context(MRImageStorage, [ImplicitVRLittleEndian])
    ae.add_requested_context(Verification)
    try:
        assoc = ae.associate("127.0.0.1", rx.port, ae_title="CESTNODE")
        assert assoc.is_established
        try:
            assert assoc.send_c_echo().Status == 0x0000  # the library's path
            assert assoc.send_c_store(dss[0]).Status == 0x0000  # ours, Implicit VR
            nopix = dss[1].copy()
            del nopix.PixelData
            st = assoc.send_c_store(nopix)
            assert st.Status == STATUS_SOP_MISMATCH and "PixelData" in st.ErrorComment
            assert assoc.send_c_echo().Status == 0x0000
            assert assoc.send_c_store(dss[2]).Status == 0x0000
        finally:
            assoc.release()
        assert assoc.is_released
        assert rx.fast_stores == 3
        (rec,) = rx.spool.all_series()
        assert rec.n_instances == 2
        back = dcmread(rx.spool.path_for(rec.key, dss[2].SOPInstanceUID))
        assert back.file_meta.TransferSyntaxUID == ImplicitVRLittleEndian
        assert back.PixelData == dss[2].PixelData
    finally:
        rx.stop()


# --------------------------------------------------------------------------- raw PDUs
def _item(kind: int, value: bytes) -> bytes:
    """A PS3.8 9.3.2 variable item: type, reserved, 2-byte length, value."""
    return struct.pack(">BBH", kind, 0, len(value)) + value


def _associate_rq(called: str, calling: str, abstract: str, transfer: str) -> bytes:
    """A-ASSOCIATE-RQ (PS3.8 9.3.2) with one presentation context (ID 1) and the user
    information items PS3.7 D.3.3 requires (Maximum Length 0: no limit; Implementation
    Class UID)."""
    pc = bytes([1, 0, 0, 0]) + _item(0x30, abstract.encode()) + _item(0x40, transfer.encode())
    user = (_item(0x51, struct.pack(">L", 0))
            + _item(0x52, PYNETDICOM_IMPLEMENTATION_UID.encode()))
    body = (struct.pack(">HH", 1, 0) + called.encode().ljust(16) + calling.encode().ljust(16)
            + bytes(32) + _item(0x10, b"1.2.840.10008.3.1.1.1") + _item(0x20, pc)
            + _item(0x50, user))
    return struct.pack(">BBL", 0x01, 0, len(body)) + body


def _read_pdu(sock: socket.socket) -> tuple[int, bytes]:
    def exactly(n: int) -> bytes:
        out = b""
        while len(out) < n:
            got = sock.recv(n - len(out))
            assert got, "the node closed the connection"
            out += got
        return out
    head = exactly(6)
    return head[0], exactly(struct.unpack(">L", head[2:])[0])


@contextlib.contextmanager
def _associated(port: int):
    """A raw TCP connection to the node with an accepted association (our A-ASSOCIATE-RQ for
    MR Image Storage in Explicit VR Little Endian, its A-ASSOCIATE-AC read), Nagle off."""
    with socket.create_connection(("127.0.0.1", port), timeout=10) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.sendall(_associate_rq("CESTNODE", "SCANNER1", UID_CLASS,
                                   str(ExplicitVRLittleEndian)))
        kind, _ = _read_pdu(sock)
        assert kind == 0x02  # A-ASSOCIATE-AC
        yield sock


RELEASE_RQ = struct.pack(">BBL", 0x05, 0, 4) + bytes(4)  # A-RELEASE-RQ (PS3.8 9.3.6)


def _response_status(body: bytes) -> int:
    """Status (0000,0900) of the C-STORE-RSP in one P-DATA-TF body (one PDV, PS3.8 9.3.5)."""
    assert body[5] == 0x03  # the last fragment of a command
    cmd, pos = body[6:], 0
    while pos < len(cmd):  # Implicit VR Little Endian elements (PS3.7 6.3.1)
        group, elem, length = struct.unpack_from("<HHL", cmd, pos)
        if (group, elem) == (0x0000, 0x0900):
            return struct.unpack_from("<H", cmd, pos + 8)[0]
        pos += 8 + length
    raise AssertionError("no Status in the response")


def _dribble(sock: socket.socket, data: bytes, rng: random.Random) -> None:
    """Write ``data`` in pieces of 1 byte to 3 kB, pausing now and then, so that the node's
    reads end anywhere: inside a PDU header, a PDV header, a command or a data set."""
    pos = 0
    while pos < len(data):
        n = rng.choice([1, 2, 5, 6, 7, 300, 3000])
        sock.sendall(data[pos:pos + n])
        pos += n
        if rng.random() < 0.3:
            time.sleep(0.002)


@pytest.mark.peers
def test_fast_path_reads_pdus_split_anywhere_and_a_release_behind_the_data(tmp_path):
    """The association thread reads whatever the socket holds: PDUs cut at any byte are
    completed by later reads, and an A-RELEASE-RQ that arrives in the same read as the last
    P-DATA-TF goes to the library with the C-STORE still answered before the A-RELEASE-RP
    (PS3.8 9.3.5, 9.3.6; the stored data sets byte-identical to those sent)."""
    dss = series_from_arrays(np.random.default_rng(5).random((SLICES, 8, 8, len(OFFSETS))),
                             OFFSETS)[:2]
    rx = Receiver(_cfg(tmp_path), lambda s: None, fast_path=True).start()
    rng = random.Random(7)
    try:
        with _associated(rx.port) as sock:
            streams = []
            for i, ds in enumerate(dss):
                data = encode(ds, False, True)
                cmd = fastpath.encode_store_request(i + 1, UID_CLASS, str(ds.SOPInstanceUID))
                streams.append(bytes(fastpath.pdata_stream(1, cmd, data, 1000)))
            _dribble(sock, streams[0], rng)
            kind, body = _read_pdu(sock)
            assert kind == 0x04 and _response_status(body) == 0x0000
            sock.sendall(streams[1] + RELEASE_RQ)  # one write: one read on the node's side
            kind, body = _read_pdu(sock)
            assert kind == 0x04 and _response_status(body) == 0x0000  # answered first
            kind, body = _read_pdu(sock)
            assert kind == 0x06  # then A-RELEASE-RP
        assert rx.fast_stores == 2
        rx.spool.flush()
        (rec,) = rx.spool.all_series()
        for ds in dss:
            stored = rx.spool.path_for(rec.key, ds.SOPInstanceUID).read_bytes()
            assert _dataset_part(stored)[1] == encode(ds, False, True)  # byte-identical
    finally:
        rx.stop()


@pytest.mark.peers
def test_fast_path_reads_a_pdu_beyond_its_buffer_and_many_pdus_in_one_read(tmp_path):
    """The association thread reads as much as the socket holds: a P-DATA-TF larger than its
    read buffer (no Maximum Length: the PS3.8 D.1 value 0), a PDU holding both the command
    and the data set (two PDV items, PS3.8 9.3.5.1), and many small PDUs that arrive in one
    read are each taken whole, answered in order, and stored byte-identical."""
    big = series_from_arrays(np.random.default_rng(8).random((1, 512, 640, len(OFFSETS))),
                             OFFSETS, seed="big")[0]
    small = series_from_arrays(np.random.default_rng(9).random((SLICES, 8, 8, len(OFFSETS))),
                               OFFSETS)[:2]
    rx = Receiver(_cfg(tmp_path, max_pdu=0), lambda s: None, fast_path=True).start()
    try:
        with _associated(rx.port) as sock:
            sent = [big, *small]
            data = [encode(ds, False, True) for ds in sent]
            cmds = [fastpath.encode_store_request(i + 1, UID_CLASS, str(ds.SOPInstanceUID))
                    for i, ds in enumerate(sent)]
            assert len(data[0]) > fastpath._RECV_BUFFER  # the premise: beyond the buffer
            stream = bytes(fastpath.pdata_stream(1, cmds[0], data[0], 0))  # one data PDU
            both = (struct.pack(">LBB", len(cmds[1]) + 2, 1, 0x03) + cmds[1]
                    + struct.pack(">LBB", len(data[1]) + 2, 1, 0x02) + data[1])
            stream += struct.pack(">BBL", 0x04, 0, len(both)) + both
            stream += bytes(fastpath.pdata_stream(1, cmds[2], data[2], 64))  # 64-byte PDUs
            sock.sendall(stream)
            for _ in sent:
                kind, body = _read_pdu(sock)
                assert kind == 0x04 and _response_status(body) == 0x0000
            sock.sendall(RELEASE_RQ)
            kind, _ = _read_pdu(sock)
            assert kind == 0x06  # A-RELEASE-RP
        assert rx.fast_stores == 3
        rx.spool.flush()
        stored = {}
        for rec in rx.spool.all_series():
            for path in rx.spool.instance_paths(rec.key):
                stored[dcmread(path).SOPInstanceUID] = path.read_bytes()
        for ds, raw in zip(sent, data, strict=True):
            assert _dataset_part(stored[ds.SOPInstanceUID])[1] == raw  # byte-identical
    finally:
        rx.stop()


@pytest.mark.peers
def test_a_pdu_longer_than_announced_goes_to_the_library_and_the_node_serves_on(
        tmp_path, monkeypatch):
    """A P-DATA-TF whose length field claims more than the Maximum Length the node announced
    (PS3.8 D.1; here 2 GB, as a broken or hostile peer might) is not buffered by the
    association thread: the library reads it, the association ends when the peer goes, and
    the next association is served."""
    dss = series_from_arrays(np.random.default_rng(6).random((SLICES, 8, 8, len(OFFSETS))),
                             OFFSETS)[:1]
    fast_association = fastpath._classes()[0]
    fill, needs = fast_association._cest_fill, []

    def recording_fill(self, sock, need):
        needs.append(need)
        return fill(self, sock, need)

    monkeypatch.setattr(fast_association, "_cest_fill", recording_fill)
    rx = Receiver(_cfg(tmp_path, max_pdu=16384), lambda s: None, fast_path=True).start()
    try:
        with _associated(rx.port) as sock:
            sock.sendall(struct.pack(">BBL", 0x04, 0, 0x7FFFFFF0) + b"\x00" * 64)
            time.sleep(0.3)
        assert needs and max(needs) == 6  # the header only: the claimed length never buffered
        # a second association is served as usual, by the fast path
        with _associated(rx.port) as sock:
            cmd = fastpath.encode_store_request(1, UID_CLASS, str(dss[0].SOPInstanceUID))
            sock.sendall(bytes(fastpath.pdata_stream(1, cmd, encode(dss[0], False, True),
                                                      16384)))
            kind, body = _read_pdu(sock)
            assert kind == 0x04 and _response_status(body) == 0x0000
            sock.sendall(RELEASE_RQ)
            kind, _ = _read_pdu(sock)
            assert kind == 0x06
        assert rx.fast_stores == 1
        assert max(needs) <= 16384 + 6  # PDUs within the announced length are buffered whole
    finally:
        rx.stop()


# --------------------------------------------------------------------------- library path
@pytest.fixture
def node(tmp_path):
    """test_receive's fixture, with the fast path off (the library serves every C-STORE)."""
    got = _rx._Collect()
    rx = Receiver(_rx._cfg(tmp_path, allowed_calling_aets=["SCANNER1"]), got,
                  fast_path=False).start()
    try:
        yield rx, got
    finally:
        assert rx.fast_stores == 0
        rx.stop()


_LIBRARY_RERUNS = [name for name in dir(_rx) if name.startswith("test_")
                   and "node" in _rx.__dict__[name].__code__.co_varnames]
for _name in _LIBRARY_RERUNS:  # collected here under this module's `node` fixture
    globals()[f"{_name}__library_path"] = pytest.mark.peers(_rx.__dict__[_name])
