"""node.send against real DICOM peers on loopback: DCMTK storescp, Orthanc, a pynetdicom SCP.

Status meanings are those of PS3.7 Annex C and C.4.2.1.4 (C-STORE); association rejection and
presentation context negotiation those of PS3.8 9.3.
"""

from __future__ import annotations

import io
import logging
import queue
import threading
from pathlib import Path

import highdicom as hd
import numpy as np
import pytest
from pydicom import Dataset, dcmread
from pydicom.uid import (
    ImplicitVRLittleEndian,
    MRImageStorage,
    ParametricMapStorage,
    SecondaryCaptureImageStorage,
)
from pynetdicom import AE, AllStoragePresentationContexts, dimse, evt
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node import fastpath
from node.archive import EmbeddedArchive
from node.send import (
    FAILED,
    STORED,
    UNSENT,
    WARNING,
    Destination,
    Sender,
    SendSettings,
    _FastWaitAE,
    build_contexts,
    classify_status,
    contexts_for,
    echo,
    guard_reactor_race,
    send_batch,
)
from node.synth import series_from_arrays
from node.types import OutputBatch, series_key
from tests.peers import Orthanc, StoreSCP, free_port

# pynetdicom 3.0.4 drops its socket without closing it when the connection is refused
# (transport.AssociationSocket.connect: shutdown, then ``self.socket = None``); CPython closes the
# fd when the object is freed and warns with a ResourceWarning, which strict pytest turns into an
# error. Only the tests that connect to a closed port ignore exactly that warning.
ignore_refused_socket_leak = pytest.mark.filterwarnings(
    "ignore:Exception ignored in. <socket.socket:pytest.PytestUnraisableExceptionWarning"
)

PATIENT_NAME = "PHANTOM^SENDTEST"
PATIENT_ID = "SENDTEST-0042"


# --------------------------------------------------------------------------- objects to send
def mr_batch(n_slices: int = 2, n_offsets: int = 3, size: int = 16, seed: str = "send") -> list[Dataset]:
    """Small MR Image Storage instances (node.synth's convention), seeded pixel values."""
    rng = np.random.default_rng(7)
    offsets = [-300.0, *np.linspace(-4.0, 4.0, n_offsets - 1)]
    signal = rng.uniform(0.2, 1.0, (n_slices, size, size, n_offsets))
    return series_from_arrays(
        signal, offsets, seed=seed, patient_name=PATIENT_NAME, patient_id=PATIENT_ID
    )


def parametric_map(sources: list[Dataset]) -> Dataset:
    """A float32 Parametric Map over the given single-frame sources (highdicom 0.28)."""
    rng = np.random.default_rng(11)
    rows, cols = int(sources[0].Rows), int(sources[0].Columns)
    mapping = hd.pm.RealWorldValueMapping(
        lut_label="MTRasym",
        lut_explanation="MTRasym in percent",
        unit=hd.sr.CodedConcept("%", "UCUM", "%"),
        value_range=(-100.0, 100.0),
        slope=1.0,
        intercept=0.0,
    )
    return hd.pm.ParametricMap(
        source_images=sources,
        pixel_array=rng.normal(0.0, 1.0, (len(sources), rows, cols)).astype(np.float32),
        series_instance_uid=hd.UID(),
        series_number=1001,
        sop_instance_uid=hd.UID(),
        instance_number=1,
        manufacturer="cest-node tests",
        manufacturer_model_name="send test",
        software_versions="0",
        device_serial_number="0",
        contains_recognizable_visual_features=False,
        real_world_value_mappings=[mapping],
        voi_lut_transformations=[hd.VOILUTTransformation(window_center=0.0, window_width=10.0)],
    )


def secondary_capture(ref: Dataset) -> Dataset:
    """An RGB Secondary Capture in the study of ``ref`` (highdicom 0.28)."""
    rows, cols = int(ref.Rows), int(ref.Columns)
    rgb = np.zeros((rows, cols, 3), np.uint8)
    rgb[..., 0] = 200
    return hd.sc.SCImage.from_ref_dataset(
        ref,
        pixel_array=rgb,
        photometric_interpretation="RGB",
        bits_allocated=8,
        coordinate_system="PATIENT",
        patient_orientation=("L", "P"),
        series_instance_uid=hd.UID(),
        sop_instance_uid=hd.UID(),
        series_number=1002,
        instance_number=1,
        manufacturer="cest-node tests",
    )


def mixed_batch() -> list[Dataset]:
    """MR + Parametric Map + Secondary Capture: three SOP classes, two transfer syntaxes."""
    mr = mr_batch()
    return [*mr, parametric_map(mr[:2]), secondary_capture(mr[0])]


def fast_settings(**kw: object) -> SendSettings:
    opts: dict[str, object] = {
        "calling_ae": "CESTNODE", "retries": 2, "backoff_s": 0.05,
        "connect_timeout_s": 2.0, "acse_timeout_s": 5.0, "dimse_timeout_s": 3.0,
    }
    opts.update(kw)
    return SendSettings(**opts)  # type: ignore[arg-type]


# --------------------------------------------------------------------------- plain checks
def test_status_classes_follow_ps3_7() -> None:
    # PS3.7 C.4.2.1.4: 0x0000 success; 0xB000/0xB006/0xB007 warnings (stored);
    # 0xA7xx out of resources (transient, worth a retry); 0xA9xx data set does not match SOP
    # class and 0xCxxx cannot understand (permanent); 0x0122 SOP class not supported (Annex C).
    assert classify_status(0x0000) == (STORED, False)
    for warning in (0xB000, 0xB006, 0xB007):
        assert classify_status(warning) == (WARNING, False)
    assert classify_status(0xA700) == (FAILED, True)
    assert classify_status(0xA7FF) == (FAILED, True)
    assert classify_status(0xA900) == (FAILED, False)
    assert classify_status(0xC000) == (FAILED, False)
    assert classify_status(0x0122) == (FAILED, False)


def test_contexts_come_from_the_batch() -> None:
    batch = mixed_batch()
    contexts = build_contexts(batch)
    by_class = {str(cx.abstract_syntax): list(cx.transfer_syntax) for cx in contexts}
    # exactly the three classes present, Parametric Map included (pynetdicom's
    # StoragePresentationContexts lacks it: that is why the list is built from the batch)
    assert set(by_class) == {MRImageStorage, ParametricMapStorage, SecondaryCaptureImageStorage}
    # the data set's own transfer syntax first; Implicit VR LE as the PS3.5 10.1 default fallback
    assert by_class[MRImageStorage][0] == batch[0].file_meta.TransferSyntaxUID
    assert by_class[MRImageStorage][-1] == ImplicitVRLittleEndian


def test_bad_input_is_named() -> None:
    mr = mr_batch()
    with pytest.raises(ValueError, match="same SOPInstanceUID"):
        Sender(fast_settings()).send([mr[0], mr[0]], ("ARCHIVE", "127.0.0.1", 104))
    bare = Dataset()
    bare.SOPClassUID = MRImageStorage
    bare.SOPInstanceUID = "1.2.3.4"
    with pytest.raises(ValueError, match="no file_meta.TransferSyntaxUID"):
        Sender(fast_settings()).send([bare], ("ARCHIVE", "127.0.0.1", 104))
    with pytest.raises(ValueError, match="not of the form AE@HOST:PORT"):
        Destination.parse("ARCHIVE-127.0.0.1")
    with pytest.raises(ValueError, match="longer than 16 characters"):
        Destination("A" * 17, "127.0.0.1", 104)
    with pytest.raises(ValueError, match="port must be an integer"):
        Destination("ARCHIVE", "127.0.0.1", 70000)
    with pytest.raises(ValueError, match="retries must be a non-negative integer"):
        SendSettings(retries=-1)
    with pytest.raises(ValueError, match="dimse_timeout_s must be > 0"):
        SendSettings(dimse_timeout_s=0)
    assert Destination.parse("PACS@10.0.0.5:11112") == Destination("PACS", "10.0.0.5", 11112)


# --------------------------------------------------------------------------- real peers
@pytest.mark.peers
def test_mixed_batch_to_storescp_over_one_association(
    storescp: StoreSCP, caplog: pytest.LogCaptureFixture
) -> None:
    batch = mixed_batch()
    caplog.set_level(logging.DEBUG)
    report = Sender(fast_settings()).send(batch, (storescp.ae_title, "127.0.0.1", storescp.port),
                                          key="s-test")
    assert report.ok, report.items
    assert (report.sent, report.failed) == (len(batch), 0)
    assert len(report.attempts) == 1  # one association for the batch
    assert report.attempts[0].tcp_nodelay is True
    assert all(i.status == 0x0000 and i.attempts == 1 for i in report.items)
    files = storescp.wait_for(len(batch))
    got = {str(dcmread(f, stop_before_pixels=True).SOPInstanceUID): f for f in files}
    assert set(got) == {str(ds.SOPInstanceUID) for ds in batch}
    # the archive holds what was sent: float pixels of the Parametric Map, bytes of the MR
    pm = dcmread(got[str(batch[-2].SOPInstanceUID)])
    assert pm.SOPClassUID == ParametricMapStorage
    assert pm.FloatPixelData == batch[-2].FloatPixelData
    assert dcmread(got[str(batch[0].SOPInstanceUID)]).PixelData == batch[0].PixelData
    # no patient attribute in our log lines (PS3.15 E de-identification spirit; project rule)
    ours = "\n".join(r.getMessage() for r in caplog.records if r.name.startswith("node."))
    assert "s-test" in ours
    assert PATIENT_NAME not in ours and PATIENT_ID not in ours


def test_session_carries_several_batches_over_one_association(storescp: StoreSCP) -> None:
    """A SendSession keeps the association between batches of different SOP classes (each
    (class, syntax) was proposed up front) and releases it on close; storescp stores all."""
    mr = mr_batch(n_slices=3, seed="session")
    pm, sc = parametric_map(mr[:3]), secondary_capture(mr[0])
    dest = (storescp.ae_title, "127.0.0.1", storescp.port)
    sender = Sender(fast_settings())
    with sender.session(contexts_for([mr[0], pm, sc])) as session:
        reports = [sender.send(b, dest, key="s-test", session=session)
                   for b in (mr[:4], [sc], mr[4:], [pm])]
        assert session.associations == 1
        assert [r.attempts[0].reused for r in reports] == [False, True, True, True]
        assert session.assoc is not None and session.assoc.is_established
        assert session.assoc.dul._run_loop_delay == SendSettings().loop_delay_s
        # the DUL waits in select for the responses (node.fastpath.install_requestor)
        assert type(session.assoc.dul).__name__ == "FastDUL"
    assert session.assoc is None  # released on close
    assert all(r.ok and len(r.attempts) == 1 for r in reports)
    sent = {str(d.SOPInstanceUID) for d in [*mr, pm, sc]}
    files = storescp.wait_for(len(sent))
    assert {str(dcmread(f, stop_before_pixels=True).SOPInstanceUID) for f in files} == sent


def test_session_reopens_after_the_association_is_lost(storescp: StoreSCP) -> None:
    """When the kept association is gone (aborted here), the next batch opens a new one and
    is stored; a batch the kept association cannot carry (a class not proposed) too."""
    mr = mr_batch(n_slices=2, seed="session-lost")
    sc = secondary_capture(mr[0])
    dest = (storescp.ae_title, "127.0.0.1", storescp.port)
    sender = Sender(fast_settings())
    with sender.session(contexts_for(mr[:1])) as session:
        first = sender.send(mr[:3], dest, session=session)
        assert session.assoc is not None
        session.assoc.abort()
        second = sender.send(mr[3:], dest, session=session)
        third = sender.send([sc], dest, session=session)  # SC was not proposed up front
        assert session.associations == 3
    assert first.ok and second.ok and third.ok
    assert not second.attempts[0].reused and not third.attempts[0].reused
    files = storescp.wait_for(len(mr) + 1)
    assert len({str(dcmread(f, stop_before_pixels=True).SOPInstanceUID) for f in files}) == len(mr) + 1


@pytest.mark.peers
def test_batch_to_orthanc(orthanc: Orthanc) -> None:
    batch = mixed_batch()
    out = OutputBatch(key=series_key("a", "b"), datasets=batch, label="test")
    (report,) = Sender(fast_settings()).send_batch(
        out, [(orthanc.ae_title, "127.0.0.1", orthanc.dicom_port)]
    )
    assert report.ok, report.items
    assert orthanc.wait_for(len(batch)) == len(batch)
    series = orthanc.series()
    by_uid = {s["MainDicomTags"]["SeriesInstanceUID"]: len(s["Instances"]) for s in series}
    expected: dict[str, int] = {}
    for ds in batch:
        expected[str(ds.SeriesInstanceUID)] = expected.get(str(ds.SeriesInstanceUID), 0) + 1
    assert by_uid == expected
    instances = orthanc.get("/instances")
    assert isinstance(instances, list) and len(instances) == len(batch)


@pytest.mark.peers
def test_two_destinations_in_parallel(storescp: StoreSCP, orthanc: Orthanc) -> None:
    batch = mr_batch()
    out = OutputBatch(key="s-two", datasets=batch)
    reports = Sender(fast_settings()).send_batch(
        out,
        [(storescp.ae_title, "127.0.0.1", storescp.port),
         Destination(orthanc.ae_title, "127.0.0.1", orthanc.dicom_port)],
    )
    assert [r.destination.port for r in reports] == [storescp.port, orthanc.dicom_port]
    assert all(r.ok for r in reports)
    assert len(storescp.wait_for(len(batch))) == len(batch)
    assert orthanc.wait_for(len(batch)) == len(batch)


@ignore_refused_socket_leak
def test_nobody_listening_retries_then_reports(caplog: pytest.LogCaptureFixture) -> None:
    batch = mr_batch()
    port = free_port()  # released at once: nothing listens there
    caplog.set_level(logging.INFO, logger="node.send")
    report = send_batch(batch, ("NOBODY", "127.0.0.1", port), retries=2, backoff_s=0.02,
                        key="s-lost")
    assert not report.ok
    assert (report.sent, report.failed) == (0, len(batch))
    assert len(report.attempts) == 3  # first try + 2 retries, then give up
    assert all(not a.established and "cannot connect" in a.error for a in report.attempts)
    assert all(i.outcome == UNSENT for i in report.items)
    # the final failure is logged with the count of unsent objects, and no patient attribute
    final = [r.getMessage() for r in caplog.records if r.levelno == logging.ERROR]
    assert any(f"{len(batch)} of {len(batch)} objects NOT stored" in m and "s-lost" in m
               for m in final)
    assert PATIENT_NAME not in caplog.text and PATIENT_ID not in caplog.text


MR_ONLY_PROFILE = """\
[[TransferSyntaxes]]
[Uncompressed]
TransferSyntax1 = LocalEndianExplicit
TransferSyntax2 = LittleEndianImplicit
[[PresentationContexts]]
[MROnlyContexts]
PresentationContext1 = VerificationSOPClass\\Uncompressed
PresentationContext2 = MRImageStorage\\Uncompressed
[[Profiles]]
[MROnly]
PresentationContexts = MROnlyContexts
"""


@pytest.mark.peers
def test_peer_refusing_a_sop_class_is_reported(tmp_path: Path) -> None:
    # DCMTK storescp with an association negotiation profile that accepts MR Image Storage
    # only: the Parametric Map's presentation context is refused (PS3.8 9.3.3.2, result 3
    # "abstract syntax not supported").
    cfg = tmp_path / "mr-only.cfg"
    cfg.write_text(MR_ONLY_PROFILE)
    mr = mr_batch()
    batch = [*mr, parametric_map(mr[:2])]
    with StoreSCP(tmp_path / "scp", extra=["-xf", str(cfg), "MROnly"]) as scp:
        report = Sender(fast_settings()).send(batch, (scp.ae_title, "127.0.0.1", scp.port))
        assert len(scp.wait_for(len(mr))) == len(mr)
    assert not report.ok
    assert (report.sent, report.failed) == (len(mr), 1)
    refused = report.items[-1]
    assert refused.outcome == FAILED
    assert "Parametric Map Storage not accepted" in refused.detail
    # a refused class is not retried (it would be refused again) nor even offered a C-STORE
    assert refused.attempts == 0
    assert len(report.attempts) == 1


@pytest.mark.peers
@ignore_refused_socket_leak
def test_echo_against_storescp(storescp: StoreSCP) -> None:
    result = echo(storescp.ae_title, "127.0.0.1", storescp.port, calling_ae="CESTNODE")
    assert result and result.status == 0x0000
    closed = echo("NOBODY", "127.0.0.1", free_port(), timeout_s=1.0)
    assert not closed and closed.status is None


# --------------------------------------------------------------------------- recovery
class StallingSCP:
    """A real pynetdicom Storage SCP that, the first time it sees instance ``stall_uid``,
    holds its response for ``stall_s`` (longer than the sender's DIMSE timeout), and answers
    ``statuses[uid]`` (default 0x0000)."""

    def __init__(self, stall_uid: str = "", stall_s: float = 0.0,
                 statuses: dict[str, int] | None = None) -> None:
        self.stall_uid = stall_uid
        self.stall_s = stall_s
        self.statuses = statuses or {}
        self.seen: list[str] = []
        self._release = threading.Event()
        self._lock = threading.Lock()

    def __enter__(self) -> StallingSCP:
        ae = AE(ae_title="STALLER")
        ae.supported_contexts = AllStoragePresentationContexts
        self.server = ae.start_server(("127.0.0.1", 0), block=False,
                                      evt_handlers=[(evt.EVT_C_STORE, self._on_store)])
        self.port = int(self.server.server_address[1])
        return self

    def __exit__(self, *exc: object) -> None:
        self._release.set()
        self.server.shutdown()

    def _on_store(self, event: evt.Event) -> int:
        uid = str(event.request.AffectedSOPInstanceUID)
        with self._lock:
            first = uid not in self.seen
            self.seen.append(uid)
        if uid == self.stall_uid and first:
            self._release.wait(self.stall_s)
        return self.statuses.get(uid, 0x0000)


@pytest.mark.peers
def test_warning_and_failure_statuses_are_reported() -> None:
    # PS3.7 C.4.2.1.4: 0xB007 "data set does not match SOP class" is a warning (stored);
    # 0xA900 is a failure of the same meaning (not stored, not retried: it would fail again).
    batch = mr_batch()
    statuses = {str(batch[1].SOPInstanceUID): 0xB007, str(batch[2].SOPInstanceUID): 0xA900}
    with StallingSCP(statuses=statuses) as scp:
        report = Sender(fast_settings()).send(batch, ("STALLER", "127.0.0.1", scp.port))
    assert (report.sent, report.warnings, report.failed) == (len(batch) - 1, 1, 1)
    assert report.items[1].outcome == WARNING and report.items[1].status == 0xB007
    assert "does not match SOP class" in report.items[1].detail
    assert report.items[2].outcome == FAILED and report.items[2].status == 0xA900
    assert report.items[2].attempts == 1 and len(report.attempts) == 1
    assert report.attempts[0].fast_responses == len(batch)  # decoded without the library


@pytest.mark.peers
def test_lost_response_reassociates_and_resends_only_the_unacknowledged() -> None:
    batch = mr_batch(n_slices=2, n_offsets=4)
    k = 3
    with StallingSCP(str(batch[k].SOPInstanceUID), stall_s=3.0) as scp:
        report = Sender(fast_settings(dimse_timeout_s=0.5)).send(
            batch, ("STALLER", "127.0.0.1", scp.port)
        )
    assert report.ok, report.items
    assert len(report.attempts) == 2
    assert report.attempts[0].acknowledged == k
    assert report.attempts[1].offered == len(batch) - k
    # acknowledged instances are never resent; the one whose response was lost is resent once
    assert [i.attempts for i in report.items] == [1] * k + [2] + [1] * (len(batch) - k - 1)
    assert scp.seen.count(str(batch[k].SOPInstanceUID)) == 2
    assert all(scp.seen.count(str(ds.SOPInstanceUID)) == 1 for i, ds in enumerate(batch) if i != k)


@pytest.mark.peers
def test_response_taken_by_the_library_reactor_is_not_resent(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Fault injection of the race measured with pynetdicom 3.0.4: the association's reactor
    # thread takes a C-STORE response off the DIMSE queue (it logs "Received unexpected C-STORE
    # service message"), and the sender then waits for the DIMSE timeout. Here the sender's own
    # blocking read hands the target response to the reactor's request handler, exactly what the
    # reactor does with it, and then waits again. The peer is real (the embedded archive).
    batch = mr_batch(n_slices=2, n_offsets=4)
    target_msg_id = 4
    original = dimse.DIMSEServiceProvider.get_msg
    stolen: list[int] = []

    def racing_get_msg(self: dimse.DIMSEServiceProvider, block: bool = False):  # type: ignore[no-untyped-def]
        cx, msg = original(self, block)
        if (block and msg is not None and not stolen
                and getattr(msg, "MessageIDBeingRespondedTo", None) == target_msg_id):
            stolen.append(target_msg_id)
            self.assoc._serve_request(msg, cx)  # what the reactor does with it
            return original(self, block)  # nothing else comes: DIMSE timeout
        return cx, msg

    monkeypatch.setattr(dimse.DIMSEServiceProvider, "get_msg", racing_get_msg)
    with EmbeddedArchive(tmp_path / "archive") as archive:
        report = Sender(fast_settings(dimse_timeout_s=0.5)).send(batch, archive.address)
        assert archive.wait_for(len(batch), timeout_s=10)
        received = archive.received
    assert stolen == [target_msg_id]
    assert report.ok, report.items
    assert report.attempts[0].recovered_from_ledger == 1
    assert report.items[target_msg_id - 1].attempts == 1  # known stored: not resent
    assert report.items[target_msg_id - 1].status == 0x0000
    assert received == len(batch)  # no duplicate at the archive
    assert len(report.attempts) == 2  # the aborted association was replaced for the rest


def test_response_queue_keeps_responses_for_the_waiting_sender() -> None:
    # The reactor polls with get(block=False) for requests; a response or the end-of-association
    # sentinel (None, None) must stay for send_c_store's blocking get.
    from pynetdicom.dimse_primitives import C_ECHO, C_STORE

    from node.send import ResponseQueue

    q = ResponseQueue()
    rsp = C_STORE()
    rsp.MessageIDBeingRespondedTo = 1
    rsp.Status = 0x0000
    q.put((1, rsp))
    with pytest.raises(queue.Empty):
        q.get(block=False)
    assert q.get(block=True, timeout=1) == (1, rsp)
    q.put((None, None))
    with pytest.raises(queue.Empty):
        q.get(block=False)
    assert q.get(block=True, timeout=1) == (None, None)
    req = C_ECHO()
    req.MessageID = 7
    q.put((3, req))
    assert q.get(block=False) == (3, req)  # a request still reaches the reactor


# --------------------------------------------------------------------------- the direct path
def test_direct_request_encodes_as_the_library_does() -> None:
    # node.fastpath.encode_store_request and pdata_stream against pynetdicom 3.0's own encoding
    # of the same C-STORE-RQ (dimse_messages.C_STORE_RQ.encode_msg, the reference here): the
    # command set byte for byte, and the P-DATA-TF PDUs (PS3.8 9.3.5) cut at the peer's
    # maximum length (PS3.8 D.1) as the library cuts them
    from pynetdicom.dimse_messages import C_STORE_RQ
    from pynetdicom.dimse_primitives import C_STORE
    from pynetdicom.dsutils import encode

    from node.fastpath import encode_store_request, pdata_stream

    ds = secondary_capture(mr_batch()[0])
    data = encode(ds, False, True)
    assert data is not None
    req = C_STORE()
    req.MessageID = 7
    req.Priority = 2
    req.AffectedSOPClassUID = ds.SOPClassUID
    req.AffectedSOPInstanceUID = ds.SOPInstanceUID
    req.DataSet = io.BytesIO(data)
    msg = C_STORE_RQ()
    msg.primitive_to_message(req)
    command = encode(msg.command_set, True, True)
    assert encode_store_request(7, str(ds.SOPClassUID), str(ds.SOPInstanceUID)) == command
    for max_pdu in (16384, 4096, 0):
        theirs = [pdu for p in msg.encode_msg(3, max_pdu) for pdu in _pdus_of(p)]
        assert pdata_stream(3, command, data, max_pdu) == b"".join(theirs)
    # and at the edges: a one-byte data set, lengths at and around a PDU's payload (the
    # command set itself spans several 64-byte PDUs)
    payload = bytes(range(256)) * 4
    for max_pdu in (64, 70, 0):
        for n in (1, 57, 58, 59, 116, 117, 1000):
            req.DataSet = io.BytesIO(payload[:n])
            msg = C_STORE_RQ()
            msg.primitive_to_message(req)
            theirs = [pdu for p in msg.encode_msg(3, max_pdu) for pdu in _pdus_of(p)]
            assert pdata_stream(3, command, payload[:n], max_pdu) == b"".join(theirs), (
                max_pdu, n)


def _pdus_of(primitive):  # type: ignore[no-untyped-def]
    from pynetdicom.pdu import P_DATA_TF
    pdu = P_DATA_TF()
    pdu.from_primitive(primitive)
    return [pdu.encode()]


def stored_data_sets(files: list[Path]) -> dict[str, bytes]:
    """SOP Instance UID -> the data set bytes of each stored file, after its file meta
    (preamble, "DICM", the group length element, then the group: PS3.10 7.1)."""
    out: dict[str, bytes] = {}
    for f in files:
        raw = f.read_bytes()
        ds = dcmread(f, stop_before_pixels=True)
        meta_end = 132 + 12 + int(ds.file_meta.FileMetaInformationGroupLength)
        out[str(ds.SOPInstanceUID)] = raw[meta_end:]
    return out


def test_direct_and_library_paths_store_the_same_objects(tmp_path: Path) -> None:
    """The same batch through the direct path and through pynetdicom's send_c_store, each to
    its own storescp: every object arrives, and the stored data sets are byte-identical."""
    batch = mixed_batch()
    got: dict[bool, dict[str, bytes]] = {}
    for direct in (True, False):
        with StoreSCP(tmp_path / f"scp-{direct}") as scp:
            report = Sender(fast_settings(direct_send=direct)).send(
                batch, (scp.ae_title, "127.0.0.1", scp.port))
            assert report.ok, report.items
            assert report.attempts[0].direct == (len(batch) if direct else 0)
            # with the fast wait (on with the direct path) the responses are decoded by its
            # DIMSE layer, as the library's C_STORE primitives (fastpath.install_requestor)
            assert report.attempts[0].fast_responses == (len(batch) if direct else 0)
            files = scp.wait_for(len(batch))
            got[direct] = stored_data_sets(files)
    assert set(got[True]) == {str(d.SOPInstanceUID) for d in batch}
    assert got[True] == got[False]


def test_an_object_that_cannot_be_encoded_fails_alone(tmp_path: Path) -> None:
    """The sender encodes each next object while the archive stores the one before; an object
    that cannot be encoded still fails as itself ("cannot send"), at its own turn, and the
    objects around it are stored, byte-identical to the library path's (storescp the peer)."""
    import copy
    import warnings

    from pydicom.dataelem import DataElement

    batch = mixed_batch()
    bad = copy.deepcopy(batch[2])
    bad.SOPInstanceUID = batch[2].SOPInstanceUID + ".9"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # pydicom warns of the str in a US element
        bad.add(DataElement(0x00280010, "US", "not a number"))  # Rows
    batch.insert(3, bad)
    got: dict[bool, dict[str, bytes]] = {}
    for direct in (True, False):
        with StoreSCP(tmp_path / f"scp-{direct}") as scp:
            report = Sender(fast_settings(direct_send=direct)).send(
                batch, (scp.ae_title, "127.0.0.1", scp.port))
            assert [i.index for i in report.items if not i.stored] == [3]
            assert report.items[3].outcome == FAILED
            assert report.items[3].detail.startswith("cannot send")
            assert report.attempts[0].direct == (len(batch) - 1 if direct else 0)
            files = scp.wait_for(len(batch) - 1)
            got[direct] = stored_data_sets(files)
    assert set(got[True]) == {str(d.SOPInstanceUID) for d in batch} - {str(bad.SOPInstanceUID)}
    assert got[True] == got[False]


@pytest.mark.peers
def test_the_fast_wait_reads_responses_itself_and_leaves_the_rest_to_the_library(
        tmp_path: Path) -> None:
    """On a requestor put on by fastpath.install_requestor the DUL thread cuts each P-DATA-TF
    from the socket itself (in Sta6 that is the whole of action DT-2, PS3.8 9.2): C-STORE
    responses through the direct path, a C-ECHO response through the library's DIMSE
    decoder; the A-RELEASE-RP, not a P-DATA-TF, goes to the library's reader and the
    association is released. storescp, a real peer, stores every object."""
    batch = mr_batch(n_slices=2, n_offsets=3)
    with StoreSCP(tmp_path / "scp") as scp:
        ae = _FastWaitAE(ae_title="CESTNODE")
        ae.add_requested_context(str(batch[0].SOPClassUID),
                                 str(batch[0].file_meta.TransferSyntaxUID))
        ae.add_requested_context(Verification)
        assoc = ae.associate("127.0.0.1", scp.port, ae_title=scp.ae_title,
                             evt_handlers=[(evt.EVT_CONN_OPEN, guard_reactor_race)])
        assert assoc.is_established
        try:
            for i, ds in enumerate(batch):
                rsp = fastpath.store_direct(assoc, ds, i + 1)
                assert rsp is not None and rsp.Status == 0x0000
            assert assoc.send_c_echo().Status == 0x0000  # the library's C-ECHO, our read
        finally:
            assoc.release()
        assert assoc.is_released
        st = assoc._cest_fast
        assert st.fast_count == len(batch)  # C-STORE-RSPs decoded by the fast DIMSE layer
        assert st.dul_pdus == len(batch) + 1  # and every P-DATA-TF cut by the DUL itself
        assert len(scp.wait_for(len(batch))) == len(batch)
