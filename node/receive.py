"""The node's DICOM door: a pynetdicom Storage SCP (MR, Enhanced MR) with Verification.

Handlers are thin translators: DICOM in, our types out, a PS3.7 status back (PS3.4 Annex B.2.3
C-STORE statuses):

========  ==========================================================================
0x0000    success: the instance is on disk in the spool (or belongs to no protocol
          and was ignored, which is logged by series key only)
0xA700    out of resources: the spool could not write it, its file system has less than
          ``min_free_mb`` free, or the instance is beyond ``max_rows``/``max_cols`` or
          would take its series beyond ``max_frames_per_series``
0xA900    data set does not match SOP class (class differs from the request, no
          pixel data, matrix or orientation differs from its series)
0xC000    cannot understand: unparsable data set
0xC001    cannot understand: a header the protocol needs is missing or wrong
========  ==========================================================================

Every failure status carries an ErrorComment naming the problem (never patient data).

Calling AE titles not in ``allowed_calling_aets`` are rejected at association (A-ASSOCIATE-RJ,
"calling AE title not recognised"), peers outside ``allowed_peer_addresses`` too (permanent,
no reason given), and an association beyond ``max_associations`` transiently (local limit
exceeded). With ``[tls] receive`` the node listens with TLS only (:mod:`node.tls`).

A duplicate SOP Instance UID is acknowledged once more and changes nothing; when its frames
differ from the first copy the first is kept, and the series is flagged (logged, and the
flags are added to the spool's detail for the series when it completes), as it is when an
instance is refused because its matrix or orientation differs from the series'. TCP_NODELAY is set on every accepted socket: with Nagle's
algorithm on, small C-STORE responses wait for delayed ACKs (measured on this machine: 1,200
instances took 106 s instead of 1.4 s between DCMTK peers).
"""

from __future__ import annotations

import ipaddress
import logging
import shutil
import socket
import threading
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from pydicom import Dataset, dcmread
from pydicom.datadict import dictionary_VR
from pydicom.uid import (
    EnhancedMRImageStorage,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    JPEG2000Lossless,
    JPEGLosslessSV1,
    JPEGLSLossless,
    MRImageStorage,
    RLELossless,
)
from pynetdicom import AE, PYNETDICOM_IMPLEMENTATION_UID, PYNETDICOM_IMPLEMENTATION_VERSION, evt
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node import fastpath
from node.assemble import Assembler, AssemblyError, Placed, header_uid, header_us
from node.config import NodeConfig
from node.spool import Spool, SpoolError
from node.tls import server_context
from node.types import AssembledSeries, series_key

__all__ = [
    "STATUS_BAD_HEADER",
    "STATUS_CANNOT_UNDERSTAND",
    "STATUS_OUT_OF_RESOURCES",
    "STATUS_SOP_MISMATCH",
    "STATUS_SUCCESS",
    "STORAGE_CLASSES",
    "Receiver",
]

log = logging.getLogger("cest_node.receive")

STATUS_SUCCESS = 0x0000
STATUS_OUT_OF_RESOURCES = 0xA700
STATUS_SOP_MISMATCH = 0xA900
STATUS_CANNOT_UNDERSTAND = 0xC000
STATUS_BAD_HEADER = 0xC001

FREE_SPACE_RECHECK_S = 0.1
"""Longest time between two measurements of the spool's free space (``min_free_mb``)."""

STORAGE_CLASSES = (MRImageStorage, EnhancedMRImageStorage)
"""SOP classes the node accepts as Storage SCP."""
TRANSFER_SYNTAXES = (ExplicitVRLittleEndian, ImplicitVRLittleEndian,
                     # lossless compressed syntaxes, decoded once on arrival by pydicom's pixel
                     # handlers (python-gdcm for the JPEG family; pydicom's own RLE decoder)
                     JPEGLosslessSV1, JPEGLSLossless, JPEG2000Lossless, RLELossless)


def _status(code: int, comment: str = "") -> Dataset:
    ds = Dataset()
    ds.Status = code
    if comment:
        ds.ErrorComment = comment[:64]  # LO: at most 64 characters
    return ds


# explicit VR with a 2-byte reserved field and a 4-byte length (PS3.5 7.1.2, Table 7.1-1)
_LONG_VRS = frozenset(b"OB OD OF OL OV OW SQ SV UC UN UR UT UV".split())
_ITEM, _ITEM_END, _SEQ_END = 0xFFFEE000, 0xFFFEE00D, 0xFFFEE0DD
_UNDEFINED = 0xFFFFFFFF


def framing_problem(data: bytes | memoryview, *, implicit: bool) -> str:
    """Why the bytes of a little-endian data set do not form a whole chain of elements.

    pydicom decodes a truncated data set without complaint (a cut inside an element header
    ends the data set, a cut inside a value shortens it), so the receiver checks the framing
    itself: every element header and value must fit, items and sequences of undefined length
    must end with their delimiters (PS3.5 7.1 and 7.5), and the last element must end exactly
    at the end of the data. Returns ``""`` when the framing is whole.
    """
    buf = memoryview(data)
    try:
        end = _walk(buf, 0, len(buf), implicit=implicit, until=None)
    except ValueError as exc:
        return str(exc)
    return "" if end == len(buf) else f"{len(buf) - end} stray bytes after the last element"


def _walk(buf: memoryview, pos: int, end: int, *, implicit: bool, until: int | None) -> int:
    """Skip elements from ``pos``; stop at ``end`` or after the delimiter tag ``until``."""
    while pos < end:
        if end - pos < 8:
            raise ValueError(f"element header cut short at byte {pos}")
        group, elem = int.from_bytes(buf[pos:pos + 2], "little"), int.from_bytes(
            buf[pos + 2:pos + 4], "little")
        tag = group << 16 | elem
        if tag in (_ITEM_END, _SEQ_END):
            pos += 8
            if tag != until:
                raise ValueError(f"unexpected delimiter at byte {pos - 8}")
            return pos
        if implicit or group == 0xFFFE:
            vr, length, pos = b"", int.from_bytes(buf[pos + 4:pos + 8], "little"), pos + 8
        else:
            vr = bytes(buf[pos + 4:pos + 6])
            if vr in _LONG_VRS:
                if end - pos < 12:
                    raise ValueError(f"element header cut short at byte {pos}")
                length, pos = int.from_bytes(buf[pos + 8:pos + 12], "little"), pos + 12
            else:
                length, pos = int.from_bytes(buf[pos + 6:pos + 8], "little"), pos + 8
        if length == _UNDEFINED:
            # a sequence (or item, or encapsulated pixel data) closed by a delimiter
            if tag == _ITEM:
                pos = _walk(buf, pos, end, implicit=implicit, until=_ITEM_END)
            elif not implicit and vr not in (b"SQ", b"UN"):
                pos = _walk_fragments(buf, pos, end)  # encapsulated (PS3.5 A.4)
            else:
                pos = _walk(buf, pos, end, implicit=implicit if vr != b"UN" else True,
                            until=_SEQ_END)
            continue
        if length > end - pos:
            raise ValueError(f"element ({group:04X},{elem:04X}) value cut short: {length} "
                             f"bytes declared, {end - pos} left")
        if tag == _ITEM or vr == b"SQ" or (implicit and _is_sequence(tag)):
            _walk(buf, pos, pos + length, implicit=implicit, until=None)
        pos += length
    if until is not None:
        raise ValueError("data set ends before a sequence or item delimiter")
    return pos


def _walk_fragments(buf: memoryview, pos: int, end: int) -> int:
    """Skip the items of encapsulated pixel data (the Basic Offset Table, then fragments:
    defined-length items of bytes, not data sets) up to its sequence delimiter."""
    while end - pos >= 8:
        tag = (int.from_bytes(buf[pos:pos + 2], "little") << 16
               | int.from_bytes(buf[pos + 2:pos + 4], "little"))
        length = int.from_bytes(buf[pos + 4:pos + 8], "little")
        pos += 8
        if tag == _SEQ_END:
            return pos
        if tag != _ITEM or length == _UNDEFINED:
            raise ValueError(f"encapsulated pixel data: no item at byte {pos - 8}")
        if length > end - pos:
            raise ValueError(f"encapsulated pixel data: fragment cut short: {length} bytes "
                             f"declared, {end - pos} left")
        pos += length
    raise ValueError("encapsulated pixel data ends before its sequence delimiter")


def _is_sequence(tag: int) -> bool:
    try:
        return str(dictionary_VR(tag)) == "SQ"
    except KeyError:
        return False


class Receiver:
    """Storage SCP in front of the spool and the assembler.

    Parameters
    ----------
    config
        The node config (AE title, host, port, allowlist, spool, max PDU, protocols).
    on_complete
        Called from the assembler's worker thread with each released
        :class:`~node.types.AssembledSeries` (see :class:`~node.assemble.Assembler`).
    spool
        An existing :class:`~node.spool.Spool` (default: one at ``config.spool_dir``).
    fast_path
        Serve C-STOREs through :mod:`node.fastpath` (pynetdicom's internals, tested versions
        only; anything it does not handle still goes through the library). None (default):
        on whenever :func:`node.fastpath.supported` says so. Both paths store the same bytes
        and answer the same statuses.

    Attributes
    ----------
    spool, assembler
        The spool and the assembler the handlers feed.
    port
        The bound TCP port once started (the OS-chosen one when ``config.port`` is 0).

    Examples
    --------
    >>> with Receiver(cfg, on_complete=print) as rx:      # doctest: +SKIP
    ...     print(rx.port)
    """

    def __init__(
        self,
        config: NodeConfig,
        on_complete: Callable[[AssembledSeries], None],
        *,
        spool: Spool | None = None,
        fast_path: bool | None = None,
    ):
        self.config = config
        self.fast_path = fastpath.supported()[0] if fast_path is None else bool(fast_path)
        self.fast_stores = 0
        """C-STOREs served by the fast path so far (the rest went through the library)."""
        self.spool = spool if spool is not None else Spool(config.spool_dir, fsync=config.fsync)
        self._user_on_complete = on_complete
        self.assembler = Assembler(config, self._on_complete, on_held=self._on_held)
        self._server: Any = None
        self._assoc_series: dict[int, set[str]] = {}
        self._assoc_lock = threading.Lock()
        self.port: int | None = None
        self.flags: dict[str, list[str]] = {}
        """Series key -> why it was flagged (refused or conflicting instances)."""
        self.on_status: Callable[[int], None] | None = None
        """Called with the status code of every C-STORE response (the node's metrics)."""
        self._free = (-FREE_SPACE_RECHECK_S, 0.0, 0.0)  # (measured at, MiB free, MiB since)

    # ------------------------------------------------------------------ lifecycle
    def start(self) -> Receiver:
        """Bind and listen (non-blocking); :attr:`port` holds the bound port."""
        if self._server is not None:
            return self
        ae = AE(ae_title=self.config.ae_title)
        ae.maximum_pdu_size = self.config.max_pdu
        for cls in STORAGE_CLASSES:
            ae.add_supported_context(cls, list(TRANSFER_SYNTAXES))
        ae.add_supported_context(Verification, list(TRANSFER_SYNTAXES))
        if self.config.allowed_calling_aets:
            ae.require_calling_aet = list(self.config.allowed_calling_aets)
        ae.maximum_associations = self.config.max_associations
        tls = self.config.tls
        ssl_context = server_context(tls) if tls is not None and tls.receive else None
        handlers: list[Any] = [
            (evt.EVT_CONN_OPEN, self._on_conn_open),
            (evt.EVT_REQUESTED, self._on_requested),
            (evt.EVT_C_STORE, self._on_store_observed),
            (evt.EVT_C_ECHO, self._on_echo),
            (evt.EVT_RELEASED, self._on_assoc_end),
            (evt.EVT_ABORTED, self._on_assoc_end),
            (evt.EVT_REJECTED, self._on_rejected),
        ]
        self.assembler.start()
        self.spool.warm()
        fastpath.warm_scan()  # the data set scanner's compiled walk, before the first C-STORE
        self._server = ae.start_server((self.config.host, self.config.port), block=False,
                                       evt_handlers=handlers, ssl_context=ssl_context)
        self.port = int(self._server.server_address[1])
        self._ae = ae
        log.info("listening as %s on %s:%d%s", self.config.ae_title, self.config.host, self.port,
                 " (TLS)" if ssl_context is not None else "")
        return self

    def stop(self) -> None:
        """Stop listening, end open associations, stop the assembler, close the spool index."""
        if self._server is not None:
            self._server.shutdown()
            self._server = None
            self._ae.shutdown()
        self.assembler.stop()
        self.spool.close()

    def __enter__(self) -> Receiver:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # ------------------------------------------------------------------ handlers
    def _on_conn_open(self, event: Any) -> None:
        # pynetdicom 3.0 never sets TCP_NODELAY itself; the accepted socket is reachable as
        # assoc.dul.socket.socket (an AssociationSocket wrapping the socket.socket)
        try:
            sock = event.assoc.dul.socket.socket
            if sock is not None:
                sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        except (AttributeError, OSError) as exc:
            log.warning("could not set TCP_NODELAY on an accepted socket: %s", exc)
        if self.fast_path:
            fastpath.install(event.assoc, self._fast_store, abstract_syntaxes=STORAGE_CLASSES)

    def _on_echo(self, event: Any) -> int:
        return STATUS_SUCCESS

    def _on_requested(self, event: Any) -> None:
        """A-ASSOCIATE-RQ received: refuse a peer address outside the allowlist."""
        nets = self.config.allowed_peer_addresses
        if not nets:
            return
        assoc = event.assoc
        address = str(assoc.requestor.address)
        try:
            ip = ipaddress.ip_address(address.split("%")[0])
            if isinstance(ip, ipaddress.IPv6Address) and ip.ipv4_mapped is not None:
                ip = ip.ipv4_mapped
            allowed = any(ip in net for net in nets)
        except ValueError:
            allowed = False
        if not allowed:
            log.warning("association from %s rejected: address not on the allowlist", address)
            # A-ASSOCIATE-RJ: rejected-permanent, service-user, no reason given (PS3.8 9.3.4)
            assoc.acse.send_reject(0x01, 0x01, 0x01)
            assoc.kill()

    def _on_rejected(self, event: Any) -> None:
        prim = getattr(event.assoc.acceptor, "primitive", None)
        reasons: dict[tuple[Any, Any], str] = {
            (0x01, 0x03): "calling AE title not on the allowlist",
            (0x01, 0x07): "called AE title not recognised",
            (0x03, 0x02): "too many associations (max_associations)"}
        why = reasons.get((getattr(prim, "result_source", None), getattr(prim, "diagnostic", None)),
                          "rejected")
        log.warning("association from %s rejected: %s", event.assoc.requestor.address, why)

    def _flag(self, key: str, reason: str) -> None:
        """Mark a series: an instance of it was refused or conflicted (logged, kept)."""
        with self._assoc_lock:
            reasons = self.flags.setdefault(key, [])
            if len(reasons) < 20:
                reasons.append(reason)
        log.warning("series %s flagged: %s", key, reason)

    def _limits(self, ds: Dataset, key: str) -> Dataset | None:
        """0xA700 when the spool is short of space or the instance is beyond a size limit."""
        cfg = self.config
        free_mb = self._free_mb()
        if free_mb < cfg.min_free_mb:
            log.error("series %s: instance refused, spool has %.0f MiB free, below "
                      "min_free_mb %g", key, free_mb, cfg.min_free_mb)
            return _status(STATUS_OUT_OF_RESOURCES, "spool free space below min_free_mb")
        try:
            rows = header_us(ds, 0x00280010, "Rows")
            cols = header_us(ds, 0x00280011, "Columns")
            frames = int(ds.get("NumberOfFrames", 1) or 1) if 0x00280008 in ds else 1
        except (TypeError, ValueError):
            return None  # prepare() names the problem
        problem = ""
        if rows > cfg.max_rows or cols > cfg.max_cols:
            problem = f"Rows/Columns {rows} x {cols} beyond max {cfg.max_rows} x {cfg.max_cols}"
        elif frames + self.assembler.open_series().get(key, 0) > cfg.max_frames_per_series:
            problem = f"series beyond max_frames_per_series {cfg.max_frames_per_series}"
        if problem:
            log.warning("series %s: instance refused: %s", key, problem)
            return _status(STATUS_OUT_OF_RESOURCES, problem)
        return None

    def _free_mb(self) -> float:
        """Free space of the spool's file system in MiB: measured at most every
        :data:`FREE_SPACE_RECHECK_S`, less what the spool has written since (an instance
        is far smaller than any sane ``min_free_mb``, so the estimate errs on the safe side
        between measurements)."""
        now = time.monotonic()
        checked, free, written = self._free
        if now - checked >= FREE_SPACE_RECHECK_S:
            try:
                free = shutil.disk_usage(self.spool.root).free / 2**20
            except OSError:
                free = 0.0
            self._free = (now, free, 0.0)
            return free
        return free - written

    def _wrote(self, n_bytes: int) -> None:
        checked, free, written = self._free
        self._free = (checked, free, written + n_bytes / 2**20)

    def _same_as_stored(self, prep: Any, path: Any) -> bool:
        """Whether a re-sent instance places the same frames as the copy in the spool."""
        try:
            first = self.assembler.prepare(dcmread(path))
        except Exception:
            return False
        if first is None or len(first.frames) != len(prep.frames):
            return False
        return all(a.offset_ppm == b.offset_ppm and a.position_mm == b.position_mm
                   and np.array_equal(a.pixels, b.pixels)
                   for a, b in zip(first.frames, prep.frames, strict=True))

    def _observe(self, code: int) -> None:
        if self.on_status is not None:
            try:
                self.on_status(code)
            except Exception:  # an observer never changes the answer to the peer
                log.exception("C-STORE status observer failed")

    def _on_store_observed(self, event: Any) -> Dataset | int:
        """EVT_C_STORE (the library path): the data set bytes as received, to :meth:`_store`."""
        try:
            data = event.request.DataSet.getvalue()
            ts = str(event.context.transfer_syntax)
            requested = str(event.request.AffectedSOPClassUID)
        except Exception as exc:
            data, ts, requested = None, "", ""
            problem = f"no data set ({type(exc).__name__})"
        code, comment = (self._store(data, ts, requested, id(event.assoc)) if data is not None
                         else self._refuse_unparsable(problem))
        self._observe(code)
        return _status(code, comment) if comment else code

    def _fast_store(self, assoc: Any, req: fastpath.StoreRequest
                    ) -> tuple[int, str] | tuple[int, str, Callable[[], None]]:
        """The fast path's C-STORE (see :mod:`node.fastpath`): the same :meth:`_store`, with
        the frames placed after the response is sent."""
        self.fast_stores += 1
        after: list[Callable[[], None]] = []
        code, comment = self._store(req.dataset, req.transfer_syntax_uid, req.sop_class_uid,
                                    id(assoc), after=after)
        self._observe(code)
        return (code, comment, after[0]) if after else (code, comment)

    @staticmethod
    def _refuse_unparsable(broken: str) -> tuple[int, str]:
        log.warning("C-STORE: data set refused, %s", broken)
        return STATUS_CANNOT_UNDERSTAND, f"truncated or malformed: {broken}"

    def _store(self, data: bytes, ts: str, requested_class: str, assoc_id: int, *,
               after: list[Callable[[], None]] | None = None) -> tuple[int, str]:
        """One C-STORE data set (bytes as sent) -> (PS3.7 status, ErrorComment or "").

        Success is answered only once the instance is on disk in the spool (fsync'd when
        configured), never before. With ``after`` (a list), the placing of the frames into
        their series is appended to it instead of done here, for the caller to run once the
        response is sent: everything that can refuse the instance (its header, its matrix
        and orientation against its series, the spool) is decided before. About a tenth of
        the work of an instance then overlaps the sender's next request.
        """
        implicit = ts == str(ImplicitVRLittleEndian)
        try:
            ds, framed = fastpath.scan_dataset(data, ts)
        except Exception as exc:
            ds, framed, parse_error = None, False, exc
        # a data set the fast scanner read whole, without sequences, is known to be framed
        # right; anything else gets the full walk (pydicom decodes truncation silently)
        if not framed:
            try:
                broken = framing_problem(data, implicit=implicit)
            except Exception as exc:
                broken = f"no data set ({type(exc).__name__})"
            if broken:
                return self._refuse_unparsable(broken)
        try:
            if ds is None:
                raise parse_error
            sop_class = header_uid(ds, 0x00080016, "SOPClassUID")
            sop_uid = header_uid(ds, 0x00080018, "SOPInstanceUID")
            study_uid = header_uid(ds, 0x0020000D, "StudyInstanceUID")
            series_uid = header_uid(ds, 0x0020000E, "SeriesInstanceUID")
            prefix, ds.file_meta = fastpath.part10_prefix_and_meta(
                sop_class, sop_uid, ts, implementation_class_uid=PYNETDICOM_IMPLEMENTATION_UID,
                implementation_version=PYNETDICOM_IMPLEMENTATION_VERSION)
        except Exception as exc:  # any parse error is the peer's data, never our crash
            log.warning("C-STORE: unparsable data set (%s)", type(exc).__name__)
            return STATUS_CANNOT_UNDERSTAND, f"unparsable data set: {type(exc).__name__}"
        key = series_key(study_uid, series_uid)
        if sop_class != requested_class:
            log.warning("series %s: SOP Class UID differs from the C-STORE request", key)
            return STATUS_SOP_MISMATCH, "SOPClassUID differs from the C-STORE request"
        refused = self._limits(ds, key)
        if refused is not None:
            return int(refused.Status), str(refused.get("ErrorComment", ""))
        try:
            prep = self.assembler.prepare(ds)
        except AssemblyError as exc:
            code = STATUS_SOP_MISMATCH if "PixelData: missing" in str(exc) else STATUS_BAD_HEADER
            log.warning("series %s: instance refused: %s", key, exc)
            return code, str(exc)
        except Exception as exc:
            log.warning("series %s: instance refused, header unreadable (%s)", key,
                        type(exc).__name__)
            return STATUS_CANNOT_UNDERSTAND, f"unreadable header: {type(exc).__name__}"
        if prep is None:
            log.info("series %s: matches no protocol; acknowledged and ignored", key)
            return STATUS_SUCCESS, ""
        try:
            self.assembler.check_fits(prep)
        except AssemblyError as exc:
            self._flag(key, f"instance refused: {exc}")
            return STATUS_SOP_MISMATCH, str(exc)
        stored = (self.spool.path_for(key, sop_uid) if self.spool.contains(key, sop_uid)
                  else None)
        if stored is not None and stored.exists():
            # a duplicate SOP Instance UID: the first copy stays
            if not self._same_as_stored(prep, stored):
                self._flag(key, "conflicting duplicate SOP Instance UID, first copy kept")
                return STATUS_SUCCESS, ""
            log.info("series %s: duplicate instance, same as the stored copy", key)
        else:
            try:
                expected = prep.protocol.expected_count(prep.images_in_acquisition)
                self.spool.store(key, sop_uid, (prefix, data),
                                 protocol=prep.protocol.name, expected=expected)
                self._wrote(len(prefix) + len(data))
            except SpoolError as exc:
                log.error("%s", exc)
                return STATUS_OUT_OF_RESOURCES, "cannot write the instance to the spool"
        if after is not None:
            after.append(lambda: self._place(prep, key, sop_uid, assoc_id, answered=True))
            return STATUS_SUCCESS, ""
        try:
            self._place(prep, key, sop_uid, assoc_id, answered=False)
        except AssemblyError as exc:
            return STATUS_SOP_MISMATCH, str(exc)
        return STATUS_SUCCESS, ""

    def _place(self, prep: Any, key: str, sop_uid: str, assoc_id: int, *,
               answered: bool) -> None:
        """Place a stored instance's frames. A refusal (another association made the series
        with another matrix between the check and now) is re-raised before the answer; after a
        success was answered the instance stays in the spool and the series is flagged."""
        try:
            placed = self.assembler.place(prep)
        except AssemblyError as exc:
            if not answered:
                self.spool.discard(key, sop_uid)
                self._flag(key, f"instance refused: {exc}")
                raise
            log.error("series %s: instance acknowledged but not placed: %s", key, exc)
            self._flag(key, f"instance acknowledged but not placed (kept in the spool): {exc}")
            return
        if placed is Placed.ADDED:
            with self._assoc_lock:
                self._assoc_series.setdefault(assoc_id, set()).add(key)

    def _on_assoc_end(self, event: Any) -> None:
        with self._assoc_lock:
            keys = self._assoc_series.pop(id(event.assoc), set())
        if keys:
            self.assembler.hint_release(keys)

    # ------------------------------------------------------------------ assembler callbacks
    def _on_complete(self, series: AssembledSeries) -> None:
        state = "complete" if series.complete else "incomplete"
        with self._assoc_lock:
            flags = self.flags.pop(series.key, [])
        detail = "; ".join([series.missing] * bool(series.missing)
                           + [f"flagged: {f}" for f in flags])
        try:
            self.spool.set_state(series.key, state, detail=detail)
        except Exception:
            log.exception("series %s: could not record state %s", series.key, state)
        self._user_on_complete(series)

    def _on_held(self, key: str, missing: str) -> None:
        self.spool.set_state(key, "held", detail=missing)
