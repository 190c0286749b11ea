# The subclasses below reach into pynetdicom's private attributes, which its type hints do
# not declare (and attach our own state to its objects): these checks cannot hold there.
# mypy: disable-error-code="attr-defined, union-attr, arg-type, assignment"
"""A faster C-STORE receive path for pynetdicom 3.0.x acceptor associations, and fast codecs.

pynetdicom spends most of an incoming C-STORE in waiting and in generic machinery, not in the
user's handler (measured on this machine, 1,200 instances of 34 kB: the association thread
sleeps in a hard-coded ``time.sleep(0.001)`` per loop, the DUL thread in
``time.sleep(_run_loop_delay)``, and 43 % of the CPU goes to building and encoding each
C-STORE response). This module removes those costs for one association at a time, by
swapping the classes of the association's own objects for subclasses defined here
(:func:`install`), before the association thread starts:

- the DUL thread waits in ``select`` on the socket and on a wake-up socket pair (written when
  a primitive is queued for sending), instead of sleeping between polls;
- the DIMSE layer parses the command set of each message itself (PS3.7 6.3.1: Implicit VR
  Little Endian, group 0000). A C-STORE-RQ with a data set, on an accepted presentation
  context whose abstract syntax is one of ours, SOP class equal to the context's, in Explicit
  or Implicit VR Little Endian, is collected as raw bytes (the data set exactly as sent) and
  handed to the association thread as a :class:`StoreRequest`. EVERYTHING ELSE (C-ECHO, any
  other command, a command the parser does not understand) is replayed into pynetdicom's own
  DIMSE decoder, fragment for fragment, and served by the library as usual;
- once the association is established (Sta6), the association thread reads the socket
  itself: each read takes whatever the socket holds into a buffer (a command and its data
  set usually come in one read), P-DATA-TF PDUs are cut from it, and any other PDU, with
  every byte read after it, is handed back to the DUL, which reads the socket from then on.
  The reactor's checks (release, abort, timers) run once per message, not once per PDU;
- the association thread waits on an Event set by the message and ACSE queues instead of
  sleeping, calls the store function directly (no event objects), and answers with a
  C-STORE-RSP command set encoded here (:func:`encode_store_response`, byte-identical to the
  library's encoding; tested) sent through the DUL's normal queue and state machine.

The state machine, ACSE (release, abort), timers and every non-C-STORE message stay the
library's. The events ``EVT_DIMSE_RECV``/``EVT_DIMSE_SENT``/``EVT_C_STORE`` are not triggered
for fast C-STOREs (the receiver binds none of them).

These are private internals of pynetdicom: :func:`supported` allows only the tested version
range (:data:`SUPPORTED_VERSIONS`, pinned in pyproject.toml as well) and the exact classes the
subclasses derive from; anywhere else :func:`install` returns False and the library path runs.

On the send side, :func:`store_direct` writes a C-STORE request's PDUs in one call, and
:func:`install_requestor` puts the same select-waiting DUL on a requestor association (the
rest of that association stays the library's).

The codecs (:func:`encode_part10_prefix`, :func:`parse_dataset`) are plain DICOM (PS3.5,
PS3.10) and are checked against pydicom's own encoder and parser in the tests.
"""

from __future__ import annotations

import logging
import queue
import select
import socket
import ssl
import struct
import threading
import time
from collections.abc import Callable, Collection
from dataclasses import dataclass
from io import BytesIO
from typing import Any

import numpy as np
from numba import njit
from pydicom import Dataset
from pydicom import config as pydicom_config
from pydicom.charset import convert_encodings, default_encoding
from pydicom.dataelem import RawDataElement, convert_raw_data_element, empty_value_for_VR
from pydicom.dataset import FileMetaDataset
from pydicom.filereader import read_dataset
from pydicom.tag import BaseTag
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian

from node import encoder

__all__ = [
    "SUPPORTED_VERSIONS",
    "StoreRequest",
    "encode_direct",
    "encode_part10_prefix",
    "encode_store_request",
    "encode_store_response",
    "install",
    "install_requestor",
    "new_dataset",
    "on_store_response",
    "parse_dataset",
    "parse_store_command",
    "parse_store_response",
    "part10_prefix_and_meta",
    "pdata_stream",
    "scan_dataset",
    "store_direct",
    "supported",
    "tag_key",
    "warm_scan",
]

log = logging.getLogger("cest_node.fastpath")

SUPPORTED_VERSIONS = ("3.0.",)
"""pynetdicom version prefixes whose internals this module was written and tested against."""

_POLL_S = 0.02  # longest wait of either loop: bounds the reaction to anything not woken
_RECV_BUFFER = 1 << 19  # bytes: a read takes up to this much (a PDU beyond it grows it)
_UNLIMITED_READ = 1 << 28  # bytes: the longest PDU buffered whole when we announce no limit
_LITTLE_ENDIAN_TS = (str(ExplicitVRLittleEndian), str(ImplicitVRLittleEndian))


# =========================================================================== codecs
def _even(b: bytes, pad: bytes) -> bytes:
    return b + pad if len(b) % 2 else b


def _elem_implicit(tag: int, value: bytes) -> bytes:
    return struct.pack("<HHL", tag >> 16, tag & 0xFFFF, len(value)) + value


def encode_store_response(message_id: int, sop_class_uid: str, sop_instance_uid: str,
                          status: int, error_comment: str = "") -> bytes:
    """The command set of a C-STORE-RSP (PS3.7 9.3.1.2), Implicit VR Little Endian.

    Elements in tag order: (0000,0000) CommandGroupLength, (0000,0002) AffectedSOPClassUID,
    (0000,0100) CommandField 0x8001, (0000,0120) MessageIDBeingRespondedTo, (0000,0800)
    CommandDataSetType 0x0101 (no data set), (0000,0900) Status, (0000,0902) ErrorComment
    (only when given, at most 64 characters, LO padded with a space), (0000,1000)
    AffectedSOPInstanceUID. UIDs are padded to even length with NUL (PS3.5 9.1).
    """
    body = b"".join((
        _elem_implicit(0x00000002, _even(sop_class_uid.encode("ascii"), b"\x00")),
        _elem_implicit(0x00000100, struct.pack("<H", 0x8001)),
        _elem_implicit(0x00000120, struct.pack("<H", message_id)),
        _elem_implicit(0x00000800, struct.pack("<H", 0x0101)),
        _elem_implicit(0x00000900, struct.pack("<H", status)),
        (_elem_implicit(0x00000902, _even(error_comment[:64].encode("ascii", "replace"), b" "))
         if error_comment else b""),
        _elem_implicit(0x00001000, _even(sop_instance_uid.encode("ascii"), b"\x00")),
    ))
    return _elem_implicit(0x00000000, struct.pack("<L", len(body))) + body


def encode_store_request(message_id: int, sop_class_uid: str, sop_instance_uid: str, *,
                         priority: int = 2) -> bytes:
    """The command set of a C-STORE-RQ with a data set (PS3.7 9.3.1.1), Implicit VR Little
    Endian: (0000,0000) CommandGroupLength, (0000,0002) AffectedSOPClassUID, (0000,0100)
    CommandField 0x0001, (0000,0110) MessageID, (0000,0700) Priority, (0000,0800)
    CommandDataSetType 0x0001 (a data set follows: any value but 0x0101), (0000,1000)
    AffectedSOPInstanceUID; byte-identical to pynetdicom's encoding of the same request
    (tested; its ``send_c_store`` also asks priority 2)."""
    body = b"".join((
        _elem_implicit(0x00000002, _even(sop_class_uid.encode("ascii"), b"\x00")),
        _elem_implicit(0x00000100, struct.pack("<H", 0x0001)),
        _elem_implicit(0x00000110, struct.pack("<H", message_id)),
        _elem_implicit(0x00000700, struct.pack("<H", priority)),
        _elem_implicit(0x00000800, struct.pack("<H", 0x0001)),
        _elem_implicit(0x00001000, _even(sop_instance_uid.encode("ascii"), b"\x00")),
    ))
    return _elem_implicit(0x00000000, struct.pack("<L", len(body))) + body


def pdata_stream(context_id: int, command: bytes, data: bytes, max_pdu: int) -> bytearray:
    """The P-DATA-TF PDUs (PS3.8 9.3.5) of one DIMSE message, back to back in one buffer, one
    PDV per PDU as pynetdicom fragments it: the command in fragments with message control
    header 0x01 (the last 0x03), then the data set with 0x00 (the last 0x02). Each PDU's
    variable field (the PDV item: its 4-byte length, context ID, header and value) is at most
    ``max_pdu`` bytes, the peer's Maximum Length Received (PS3.8 D.1; 0: no limit).

    Each PDU's 12 header bytes are packed in place and its fragment copied once: a list of
    per-PDU bytes joined again copied every fragment twice and allocated an object per PDU,
    holding the interpreter lock throughout (1.34 ms against 0.12 ms for a 1.18 MB RGB
    Secondary Capture in 16 kB PDUs, medians of 200 here), on the sender's thread while the
    next output is built."""
    step = max_pdu - 6 if max_pdu else 0
    parts = []
    total = 0
    for value, more, last in ((memoryview(command), 0x01, 0x03), (memoryview(data), 0x00, 0x02)):
        n = len(value)
        size = step if step > 0 else max(n, 1)
        count = -(-max(n, 1) // size)
        parts.append((value, more, last, n, size))
        total += n + 12 * count
    out = bytearray(total)
    view = memoryview(out)
    at = 0
    for value, more, last, n, size in parts:
        for pos in range(0, max(n, 1), size):
            chunk = value[pos:pos + size]
            k = len(chunk)
            struct.pack_into(">BBLLBB", out, at, 0x04, 0, k + 6, k + 2, context_id,
                             last if pos + size >= n else more)
            view[at + 12:at + 12 + k] = chunk
            at += 12 + k
    return out


def _elem_explicit(tag: int, vr: bytes, value: bytes) -> bytes:
    if vr in (b"OB", b"OW", b"UN", b"SQ", b"UT", b"UC", b"UR", b"OF", b"OD", b"OL", b"OV"):
        return struct.pack("<HH2s2xL", tag >> 16, tag & 0xFFFF, vr, len(value)) + value
    return struct.pack("<HH2sH", tag >> 16, tag & 0xFFFF, vr, len(value)) + value


def _meta_elements(sop_class_uid: str, sop_instance_uid: str, transfer_syntax_uid: str,
                   implementation_class_uid: str, implementation_version: str
                   ) -> list[tuple[int, bytes, bytes]]:
    uid = lambda s: _even(s.encode("ascii"), b"\x00")  # noqa: E731
    body = [
        (0x00020001, b"OB", b"\x00\x01"),
        (0x00020002, b"UI", uid(sop_class_uid)),
        (0x00020003, b"UI", uid(sop_instance_uid)),
        (0x00020010, b"UI", uid(transfer_syntax_uid)),
        (0x00020012, b"UI", uid(implementation_class_uid)),
        (0x00020013, b"SH", _even(implementation_version.encode("ascii"), b" ")),
    ]
    length = sum(len(v) + (12 if vr == b"OB" else 8) for _, vr, v in body)
    return [(0x00020000, b"UL", struct.pack("<L", length)), *body]


def encode_part10_prefix(sop_class_uid: str, sop_instance_uid: str, transfer_syntax_uid: str,
                         *, implementation_class_uid: str, implementation_version: str) -> bytes:
    """Preamble, ``DICM`` and File Meta Information of a PS3.10 file (PS3.10 7.1).

    Explicit VR Little Endian group 0002: FileMetaInformationGroupLength,
    FileMetaInformationVersion 00\\01, MediaStorageSOPClassUID, MediaStorageSOPInstanceUID,
    TransferSyntaxUID, ImplementationClassUID, ImplementationVersionName: the same elements,
    in the same encoding, as pynetdicom's ``create_file_meta`` written by pydicom (tested).
    """
    return part10_prefix_and_meta(
        sop_class_uid, sop_instance_uid, transfer_syntax_uid,
        implementation_class_uid=implementation_class_uid,
        implementation_version=implementation_version)[0]


def part10_prefix_and_meta(sop_class_uid: str, sop_instance_uid: str,
                           transfer_syntax_uid: str, *, implementation_class_uid: str,
                           implementation_version: str) -> tuple[bytes, FileMetaDataset]:
    """:func:`encode_part10_prefix` and the same file meta as a FileMetaDataset of raw
    elements (what :func:`file_meta_from_prefix` reads back from it, without reading).

    Every instance of a series has the same file meta but for its SOP Instance UID: the
    first of each (class, syntax, implementation, UID length) is built whole and kept; the
    next ones are a shallow copy with their own element dict and UID element (about 4 us
    against 20 us for a new FileMetaDataset, which validates its elements, here).
    """
    inst = _even(sop_instance_uid.encode("ascii"), b"\x00")
    key = (sop_class_uid, transfer_syntax_uid, implementation_class_uid,
           implementation_version, len(inst))
    cached = _META_CACHE.get(key)
    if cached is not None:
        head, tail, template, tag, offset = cached
        # what copy.copy does for a Dataset (no copy hooks of its own: a new object, the
        # template's attributes), without copy's generic machinery (about 15 us of 20 here)
        meta = _NEW_META(FileMetaDataset)
        meta.__dict__.update(template.__dict__)
        elems = dict(template._dict)
        elems[tag] = RawDataElement(tag, "UI", len(inst), inst, offset, False, True)
        object.__setattr__(meta, "_dict", elems)
        return b"".join((head, inst, tail)), meta
    prefix, meta = _prefix_and_meta(sop_class_uid, sop_instance_uid, transfer_syntax_uid,
                                    implementation_class_uid, implementation_version)
    tag = tag_key(0x00020003)
    elem = meta._dict[tag]
    at = 132 + elem.value_tell  # the UID value in the prefix (offsets count from the group)
    if prefix[at:at + len(inst)] == inst and len(_META_CACHE) < 64:
        # a template of its own (never handed out, so never converted or changed by a caller)
        template = _prefix_and_meta(sop_class_uid, sop_instance_uid, transfer_syntax_uid,
                                    implementation_class_uid, implementation_version)[1]
        _META_CACHE[key] = (prefix[:at], prefix[at + len(inst):], template, tag,
                            elem.value_tell)
    return prefix, meta


_NEW_META = FileMetaDataset.__new__
_META_CACHE: dict[tuple[str, str, str, str, int],
                  tuple[bytes, bytes, FileMetaDataset, BaseTag, int]] = {}


def _prefix_and_meta(sop_class_uid: str, sop_instance_uid: str, transfer_syntax_uid: str,
                     implementation_class_uid: str, implementation_version: str
                     ) -> tuple[bytes, FileMetaDataset]:
    elems = _meta_elements(sop_class_uid, sop_instance_uid, transfer_syntax_uid,
                           implementation_class_uid, implementation_version)
    parts = [b"\x00" * 128, b"DICM"]
    raw: dict[BaseTag, RawDataElement] = {}
    pos = 0  # offsets within the group, as file_meta_from_prefix gives them
    for number, vr, value in elems:
        head = _elem_explicit(number, vr, value)
        parts.append(head)
        pos += len(head) - len(value)
        tag = _TAGS.get(number) or BaseTag(number)
        raw[tag] = RawDataElement(tag, _VR_TEXT[vr], len(value), value, pos, False, True)
        pos += len(value)
    meta = FileMetaDataset(raw)
    meta.set_original_encoding(False, True)
    return b"".join(parts), meta


_ENCODED_VR = frozenset(
    v.encode() for v in ("AE", "AS", "AT", "CS", "DA", "DS", "DT", "FL", "FD", "IS", "LO", "LT",
                         "OB", "OD", "OF", "OL", "OV", "OW", "PN", "SH", "SL", "SQ", "SS", "ST",
                         "SV", "TM", "UC", "UI", "UL", "UN", "UR", "US", "UT", "UV"))
_VR_TEXT = {v: v.decode() for v in _ENCODED_VR}
_LONG_VR = frozenset(v.encode() for v in ("OB", "OD", "OF", "OL", "OV", "OW", "SQ", "UC", "UN",
                                          "UR", "UT", "SV", "UV"))
_EXPLICIT_HEAD = struct.Struct("<HH2sH")
_U32 = struct.Struct("<L")


_TAGS: dict[int, BaseTag] = {}  # BaseTag per tag number seen (a few hundred at most)
_SCAN_ONE = (None, False)
_EMPTY: dict[tuple[str, bool], Any] = {}  # empty raw value per (VR, pydicom's None-as-empty)
_RAW_NEW = tuple.__new__  # RawDataElement(...) without the namedtuple's Python-level __new__
_RAW_DEFAULTS = (RawDataElement._field_defaults["is_raw"],
                 RawDataElement._field_defaults["is_buffered"])


def tag_key(number: int) -> BaseTag:
    """The BaseTag this module's scanner uses as the key of element ``number``.

    A dict lookup of a Dataset's elements with a plain int finds the entry by hash, then
    compares keys with ``BaseTag.__eq__``, a Python-level method (about 0.5 us a call); with
    the key object itself the comparison is an identity check. Readers of scanned data sets
    (:mod:`node.assemble`) look their tags up with these objects.
    """
    tag = _TAGS.get(number)
    if tag is None:
        tag = BaseTag(number)
        if len(_TAGS) < 4096:
            _TAGS[number] = tag
    return tag


def _empty_raw(vr: str) -> Any:
    key = (vr, bool(pydicom_config.use_none_as_empty_text_VR_value))
    value = _EMPTY.get(key, _EMPTY)
    if value is _EMPTY:
        value = _EMPTY[key] = empty_value_for_VR(vr, raw=True)
    return value


_VR_LIST = sorted(_ENCODED_VR)  # the walk's VR codes: index into this list
_VR_NAMES = [_VR_TEXT[v] for v in _VR_LIST]
_VR_CODE = np.full(65536, -1, np.int16)  # the VR's two bytes (little-endian u16) -> code
for _i, _v in enumerate(_VR_LIST):
    _VR_CODE[_v[0] | _v[1] << 8] = _i
_VR_LONG = np.array([v in _LONG_VR for v in _VR_LIST])
_VR_SQ = _VR_LIST.index(b"SQ")
_WALK_MAX = 1024  # elements the compiled walk lists; a data set with more: the Python scan


@njit(cache=True, nogil=True)
def _walk_explicit_le(buf: np.ndarray, vr_code: np.ndarray, vr_long: np.ndarray,
                      out: np.ndarray) -> int:  # pragma: no cover - compiled (tested)
    """The top-level elements of an Explicit VR Little Endian data set (PS3.5 7.1.2: tag,
    two-letter VR, a 2-byte length, or 2 reserved bytes and a 4-byte length for the long
    VRs): rows of (tag number, VR code, value offset, value length) into ``out``; returns
    their count, -1 when the data set is not simple (see :func:`_scan_explicit_le`), or -2
    when it has more elements than ``out`` has rows."""
    pos, end, n = 0, buf.shape[0], 0
    while pos < end:
        if end - pos < 8:
            return -1
        if n >= out.shape[0]:
            return -2
        group = np.int64(buf[pos]) | np.int64(buf[pos + 1]) << 8
        code = vr_code[np.int64(buf[pos + 4]) | np.int64(buf[pos + 5]) << 8]
        if code < 0 or group == 0xFFFE:
            return -1
        length = np.int64(buf[pos + 6]) | np.int64(buf[pos + 7]) << 8
        out[n, 0] = group << 16 | np.int64(buf[pos + 2]) | np.int64(buf[pos + 3]) << 8
        pos += 8
        if vr_long[code]:
            if end - pos < 4:
                return -1
            length = (np.int64(buf[pos]) | np.int64(buf[pos + 1]) << 8
                      | np.int64(buf[pos + 2]) << 16 | np.int64(buf[pos + 3]) << 24)
            pos += 4
        if length == 0xFFFFFFFF or pos + length > end:
            return -1
        out[n, 1] = code
        out[n, 2] = pos
        out[n, 3] = length
        n += 1
        pos += length
    return n


def _scan_compiled(data: bytes) -> tuple[dict[BaseTag, RawDataElement] | None, bool]:
    """:func:`_scan_explicit_le`, with the walk over the element headers compiled (the same
    elements and result; tested against it): about a third less time for an instance of 65
    elements here. A data set the walk finds not simple is left to pydicom at once, as the
    Python scan would leave it; one of more than :data:`_WALK_MAX` elements is scanned by
    :func:`_scan_explicit_le`."""
    rows = np.empty((min(_WALK_MAX, len(data) // 8 + 1), 4), np.int64)
    n = _walk_explicit_le(np.frombuffer(data, np.uint8), _VR_CODE, _VR_LONG, rows)
    if n == -1:
        return _SCAN_ONE
    if n < 0:
        return _scan_explicit_le(data)
    out: dict[BaseTag, RawDataElement] = {}
    tags_get, names, new, cls, sq = _TAGS.get, _VR_NAMES, _RAW_NEW, RawDataElement, _VR_SQ
    is_raw, is_buffered = _RAW_DEFAULTS
    has_sq = False
    for number, code, pos, length in rows[:n].tolist():
        tag = tags_get(number) or tag_key(number)
        vr = names[code]
        has_sq = has_sq or code == sq
        out[tag] = new(cls, (tag, vr, length, data[pos:pos + length] if length
                             else _empty_raw(vr), pos, False, True, is_raw, is_buffered))
    return out, has_sq


def warm_scan() -> None:
    """Compile (or load from the on-disk cache) the scanner's walk, before the first C-STORE
    needs it (about a second for numba's first compile, once per machine)."""
    _scan_compiled(b"\x08\x00\x18\x00UI\x02\x001\x00")


def _scan_explicit_le(data: bytes) -> tuple[dict[BaseTag, RawDataElement] | None, bool]:
    """(raw elements of an Explicit VR Little Endian data set, whether one is a sequence), or
    (None, False) when the data set is not simple.

    Simple means: every VR is a known one, every length is defined, no item delimiter at the
    top level, and the elements end exactly at the end of the data. Anything else is left to
    pydicom's parser. Sequences of defined length are kept raw, not walked.
    """
    out: dict[BaseTag, RawDataElement] = {}
    pos, end = 0, len(data)
    unpack, u32 = _EXPLICIT_HEAD.unpack_from, _U32.unpack_from
    known, long_vr, vr_text, tags = _ENCODED_VR, _LONG_VR, _VR_TEXT, _TAGS
    new, cls = _RAW_NEW, RawDataElement
    is_raw, is_buffered = _RAW_DEFAULTS
    has_sq = False
    while pos < end:
        if end - pos < 8:
            return _SCAN_ONE
        group, elem, vr_b, length = unpack(data, pos)
        if vr_b not in known or group == 0xFFFE:
            return _SCAN_ONE
        pos += 8
        if vr_b in long_vr:
            if end - pos < 4:
                return _SCAN_ONE
            length = u32(data, pos)[0]
            pos += 4
            if vr_b == b"SQ":
                has_sq = True
        if length == 0xFFFFFFFF or pos + length > end:
            return _SCAN_ONE
        number = group << 16 | elem
        tag = tags.get(number) or tag_key(number)
        vr = vr_text[vr_b]
        out[tag] = new(cls, (tag, vr, length, data[pos:pos + length] if length
                             else _empty_raw(vr), pos, False, True, is_raw, is_buffered))
        pos += length
    return out, has_sq


_DS_STATE = Dataset().__dict__  # a new Dataset's own attributes, this pydicom's
_DS_FRESH = tuple(k for k, v in _DS_STATE.items()
                  if k != "_dict" and isinstance(v, dict | list | set))
_DS_SHARED = {k: v for k, v in _DS_STATE.items() if k != "_dict" and k not in _DS_FRESH}


def new_dataset(elements: dict[BaseTag, Any]) -> Dataset:
    """``Dataset(elements)``: the same attributes, each container its own copy, set without
    the Python-level ``__setattr__`` of each (about 14 us an instance here, twice on the
    receive path). Dataset's ``__init__`` sets only lowercase names, which its ``__setattr__``
    passes to ``object.__setattr__`` as they are (pydicom 3.0); the template is read from a
    real ``Dataset()`` of the installed pydicom (tested equal)."""
    ds = Dataset.__new__(Dataset)
    state = ds.__dict__
    state.update(_DS_SHARED)
    for k in _DS_FRESH:
        state[k] = _DS_STATE[k].copy()
    state["_dict"] = elements
    return ds


def scan_dataset(data: bytes | bytearray | memoryview, transfer_syntax_uid: str
                 ) -> tuple[Dataset, bool]:
    """:func:`parse_dataset`, and whether the data set's framing is known whole: True when
    the fast scanner read every element to the exact end and none is a sequence (the caller
    must still check the framing of anything else; pydicom decodes truncation silently)."""
    implicit = str(transfer_syntax_uid) == str(ImplicitVRLittleEndian)
    raw, has_sq = (None, False) if implicit else _scan_compiled(
        data if isinstance(data, bytes) else bytes(data))
    if raw is None:
        return read_dataset(BytesIO(data), implicit, True), False
    ds = new_dataset(raw)  # Dataset(raw, parent_encoding=default_encoding)
    cs = raw.get(_CHARSET_TAG)
    encoding: Any = default_encoding if cs is None else _charset_encodings(cs)
    ds.set_original_encoding(False, True, encoding)
    return ds, not has_sq


_CHARSET_TAG = tag_key(0x00080005)
_CHARSETS: dict[tuple[str, bytes], Any] = {}  # (VR, raw SpecificCharacterSet) -> encodings


def _charset_encodings(elem: RawDataElement) -> Any:
    """pydicom's encodings for a raw SpecificCharacterSet element, kept per raw value (a
    series repeats one value; converting it costs about 10 us an instance)."""
    value = elem.value
    key = (str(elem.VR), bytes(value)) if isinstance(value, bytes | bytearray) else None
    found = None if key is None else _CHARSETS.get(key)
    if found is None:
        found = convert_encodings(convert_raw_data_element(elem).value)
        if key is not None and len(_CHARSETS) < 64:
            _CHARSETS[key] = found
    return list(found) if isinstance(found, list) else found  # each data set its own list


def parse_dataset(data: bytes, transfer_syntax_uid: str) -> Dataset:
    """A pydicom Dataset of raw (not yet converted) elements, as ``read_dataset`` gives.

    Explicit VR Little Endian data sets of defined-length elements are scanned here (about
    four times faster than pydicom's reader, same elements, values, offsets and encoding;
    tested); anything else goes through :func:`pydicom.filereader.read_dataset`.
    """
    return scan_dataset(data, transfer_syntax_uid)[0]


def file_meta_from_prefix(prefix: bytes) -> FileMetaDataset:
    """The FileMetaDataset of a prefix made by :func:`encode_part10_prefix` (raw elements)."""
    raw = _scan_explicit_le(prefix[132:])[0]
    if raw is None:  # pragma: no cover - our own encoder's output is always simple
        raise ValueError("file meta: not a simple Explicit VR Little Endian group")
    meta = FileMetaDataset(raw)
    meta.set_original_encoding(False, True)
    return meta


# --------------------------------------------------------------------------- command sets
_IMPLICIT_HEAD = struct.Struct("<HHL")
_US = struct.Struct("<H")
# command elements a C-STORE-RQ may carry (PS3.7 9.3.1.1), and how to read each
_STORE_RQ_TAGS = {0x0000: "UL", 0x0002: "UI", 0x0100: "US", 0x0110: "US", 0x0700: "US",
                  0x0800: "US", 0x1000: "UI", 0x1030: "AE", 0x1031: "US"}


def _command_values(cmd: bytes, tags: dict[int, str]) -> dict[int, Any] | None:
    """The values of a command set's elements (Implicit VR Little Endian, group 0000 only,
    PS3.7 6.3.1) by element number: US as int, UI and LO as text; None when an element is
    not one of ``tags`` (element number -> VR), has a wrong length or cannot be read."""
    values: dict[int, Any] = {}
    pos, end = 0, len(cmd)
    try:
        while pos < end:
            group, elem, length = _IMPLICIT_HEAD.unpack_from(cmd, pos)
            pos += 8
            kind = tags.get(elem)
            if group != 0x0000 or kind is None or pos + length > end:
                return None
            raw = cmd[pos:pos + length]
            pos += length
            if kind == "US":
                if length != 2:
                    return None
                values[elem] = _US.unpack(raw)[0]
            elif kind == "UL":
                if length != 4:
                    return None
            elif kind == "LO":  # trailing padding stripped, leading spaces kept (as pydicom)
                values[elem] = raw.decode("ascii").rstrip("\x00 ")
            else:
                values[elem] = raw.decode("ascii").rstrip("\x00 ")
    except (struct.error, UnicodeDecodeError):
        return None
    return values


def parse_store_command(cmd: bytes) -> tuple[int, str, str, int] | None:
    """(MessageID, AffectedSOPClassUID, AffectedSOPInstanceUID, CommandDataSetType) of a
    C-STORE-RQ command set, or None for any other command or anything unexpected.

    The command set is Implicit VR Little Endian, group 0000 only (PS3.7 6.3.1); the elements
    of a C-STORE-RQ are those of PS3.7 Table 9.3-1. An element outside that table, a wrong
    length, or a missing required element gives None (the caller then lets pynetdicom decode
    the message).
    """
    values = _command_values(cmd, _STORE_RQ_TAGS)
    if values is None or values.get(0x0100) != 0x0001:
        return None
    try:
        return values[0x0110], values[0x0002], values[0x1000], values[0x0800]
    except KeyError:
        return None


_STORE_RSP_TAGS = {0x0000: "UL", 0x0002: "UI", 0x0100: "US", 0x0120: "US", 0x0800: "US",
                   0x0900: "US", 0x0902: "LO", 0x1000: "UI"}


def parse_store_response(cmd: bytes) -> tuple[int, int, str, str, str] | None:
    """(MessageIDBeingRespondedTo, Status, AffectedSOPClassUID, AffectedSOPInstanceUID,
    ErrorComment) of a C-STORE-RSP command set (PS3.7 Table 9.3-2), "" for an absent UID or
    comment; None for any other command, one with a data set, or one with any element beyond
    these (Offending Element, Error ID, ...: the caller lets pynetdicom decode it)."""
    values = _command_values(cmd, _STORE_RSP_TAGS)
    if (values is None or values.get(0x0100) != 0x8001 or values.get(0x0800) != 0x0101
            or 0x0120 not in values or 0x0900 not in values):
        return None
    return (values[0x0120], values[0x0900], values.get(0x0002, ""), values.get(0x1000, ""),
            values.get(0x0902, ""))


# =========================================================================== the fast path
@dataclass(frozen=True, slots=True)
class StoreRequest:
    """One C-STORE-RQ taken by the fast path, with its data set exactly as received."""

    context_id: int
    message_id: int
    sop_class_uid: str
    sop_instance_uid: str
    transfer_syntax_uid: str
    dataset: bytes


StoreFunction = Callable[[Any, StoreRequest], "tuple[int, str] | tuple[int, str, Callable[[], None]]"]
"""``f(association, request) -> (status, error_comment[, after])``; an exception answers
0xC211. ``after``, when given, runs once the response is on its way (work that must not delay
the answer: the sender prepares its next request meanwhile); its exceptions are logged."""


def supported() -> tuple[bool, str]:
    """Whether the installed pynetdicom is one this module was tested with (and why not)."""
    try:
        import pynetdicom
        from pynetdicom.association import Association
        from pynetdicom.dimse import DIMSEServiceProvider
        from pynetdicom.dul import DULServiceProvider
    except ImportError as exc:  # pragma: no cover
        return False, f"pynetdicom not importable: {exc}"
    version = str(pynetdicom.__version__)
    if not version.startswith(SUPPORTED_VERSIONS):
        return False, f"pynetdicom {version} is not in the tested range {SUPPORTED_VERSIONS}"
    for cls, names in ((Association, ("_run_reactor", "_serve_request", "kill")),
                       (DULServiceProvider, ("run_reactor", "_process_recv_primitive",
                                             "_is_transport_event", "kill_dul", "send_pdu")),
                       (DIMSEServiceProvider, ("receive_primitive", "send_msg", "get_msg"))):
        missing = [n for n in names if not hasattr(cls, n)]
        if missing:
            return False, f"pynetdicom {version}: {cls.__name__} lacks {missing}"
    return True, ""


def _pdv_items(buf: bytearray, pos: int, end: int) -> list[tuple[int, int, bytes]] | None:
    """The PDV items of a P-DATA-TF body (PS3.8 9.3.5.1: 4-byte length, context ID, message
    control header, fragment) as (context ID, header, fragment); None when an item does not
    fit the PDU."""
    pdvs: list[tuple[int, int, bytes]] = []
    with memoryview(buf) as view:
        while pos < end:
            if end - pos < 6:
                return None
            item = struct.unpack_from(">L", buf, pos)[0]
            if item < 2 or pos + 4 + item > end:
                return None
            pdvs.append((buf[pos + 4], buf[pos + 5], bytes(view[pos + 6:pos + 4 + item])))
            pos += 4 + item
    return pdvs


class _WakeQueue(queue.Queue):
    """A Queue that calls ``wake()`` after every put."""

    def __init__(self, wake: Callable[[], None]):
        super().__init__()
        self._wake = wake

    def put(self, item: Any, block: bool = True, timeout: float | None = None) -> None:
        super().put(item, block, timeout)
        self._wake()


class _State:
    """Per-association fast-path state (attached as ``assoc._cest_fast``)."""

    def __init__(self, store: StoreFunction, abstract_syntaxes: Collection[str]):
        self.store = store
        self.abstract = frozenset(str(a) for a in abstract_syntaxes)
        self.ready = threading.Event()  # set by every put to the DIMSE and ACSE queues
        self.wake_r, self.wake_w = socket.socketpair()
        self.wake_r.setblocking(False)
        self.wake_w.setblocking(False)
        self.contexts: dict[int, tuple[str, str]] | None = None
        # DIMSE reassembly: "idle" | "lib" (fragments go to pynetdicom) | "data" (ours)
        self.mode = "idle"
        self.cmd: list[tuple[int, bytes]] = []  # buffered command PDVs (context, pdv bytes)
        self.parts: list[bytes] = []
        self.req: tuple[int, int, str, str, str] | None = None  # (cx, msg id, class, inst, ts)
        self.fast_count = 0
        # socket ownership: "dul" (the library reads it) or "assoc" (the association thread
        # reads P-DATA-TF itself while in Sta6); PDUs it does not handle are handed back
        # through `pending`, which the DUL then reads as if from the wire
        self.owner = "dul"
        self.want_socket = False
        self.granted = threading.Event()
        self.pending = bytearray()
        self.send_lock = threading.Lock()
        # the association thread's receive buffer: bytes read, rbuf[rlo:rhi] not yet taken
        self.rbuf = bytearray(_RECV_BUFFER)
        self.rlo = self.rhi = 0
        # the longest PDU the association thread buffers whole: the Maximum Length we
        # announced (set at install), else a bound; a longer one is the library's to read
        self.max_read = _UNLIMITED_READ
        # a requestor's: called with (message ID, status) of each C-STORE-RSP it decodes
        self.on_response: Callable[[int, int], None] | None = None
        # a requestor's DUL cuts P-DATA-TF PDUs from the buffer itself (the library the rest)
        self.dul_reads = False
        self.dul_pdus = 0  # P-DATA-TF PDUs it took
        self.max_read_known = False

    def make_room(self, need: int) -> None:
        """Let the receive buffer hold ``need`` bytes from its read position: the unread
        rest moved to the front when they would not fit after it, the buffer grown when
        they would not fit at all."""
        if self.rlo == self.rhi:
            self.rlo = self.rhi = 0
        if self.rlo + need > len(self.rbuf):
            rest = self.rbuf[self.rlo:self.rhi]
            if need > len(self.rbuf):
                self.rbuf = bytearray(max(need, 2 * len(self.rbuf)))
            self.rbuf[:len(rest)] = rest
            self.rlo, self.rhi = 0, len(rest)

    def take_pdata(self) -> list[tuple[int, int, bytes]] | int | None:
        """The next P-DATA-TF in the receive buffer, cut into its PDV items (the read position
        then past it); or, as an int, how many bytes from the read position it needs
        buffered to be whole; or None when what is buffered is not one to take (another
        PDU type, a length beyond :attr:`max_read` (PS3.8 D.1), a malformed item)."""
        buf, lo = self.rbuf, self.rlo
        if self.rhi - lo < 6:
            return 6
        length = struct.unpack_from(">L", buf, lo + 2)[0]
        if buf[lo] != 0x04 or length > self.max_read:
            return None
        if self.rhi - lo < 6 + length:
            return 6 + length
        pdvs = _pdv_items(buf, lo + 6, lo + 6 + length)
        if pdvs is not None:
            self.rlo = lo + 6 + length
        return pdvs

    def to_pending(self) -> None:
        """Move every unread byte of the receive buffer to ``pending`` (the library's)."""
        if self.rlo != self.rhi:
            self.pending += self.rbuf[self.rlo:self.rhi]
        self.rlo = self.rhi = 0

    def wake_dul(self) -> None:
        try:
            self.wake_w.send(b"\x00")
        except (BlockingIOError, OSError):
            pass  # full (a wake-up is pending anyway) or closed (the DUL has ended)

    def close(self) -> None:
        for s in (self.wake_r, self.wake_w):
            try:
                s.close()
            except OSError:  # pragma: no cover
                pass


def install(assoc: Any, store: StoreFunction, *, abstract_syntaxes: Collection[str]) -> bool:
    """Put the fast path on an acceptor association before its thread starts.

    Call it from an ``EVT_CONN_OPEN`` handler (pynetdicom triggers it before
    ``Association.start``). Returns False, leaving the association untouched, when the
    pynetdicom version or the classes are not the tested ones, the socket is TLS, or the
    association is not an acceptor that has not started.
    """
    ok, why = supported()
    if not ok:
        log.info("fast receive path off: %s", why)
        return False
    from pynetdicom.association import Association
    from pynetdicom.dimse import DIMSEServiceProvider
    from pynetdicom.dul import DULServiceProvider
    from pynetdicom.transport import AssociationSocket

    try:
        if (type(assoc) is not Association or not assoc.is_acceptor or assoc.is_alive()
                or type(assoc.dul) is not DULServiceProvider or assoc.dul.is_alive()
                or type(assoc.dimse) is not DIMSEServiceProvider
                or getattr(assoc.dul, "_target", None) != assoc.dul.run_reactor):
            return False
        if type(assoc.dul.socket) is not AssociationSocket:
            return False
        sock = assoc.dul.socket.socket
        if sock is None or isinstance(sock, ssl.SSLSocket):
            return False
        if not (assoc.dimse.msg_queue.empty() and assoc.dul.to_user_queue.empty()
                and assoc.dul.to_provider_queue.empty()):
            return False
    except AttributeError:
        return False
    st = _State(store, abstract_syntaxes)
    announced = int(getattr(assoc.ae, "maximum_pdu_size", 0) or 0)  # our Maximum Length
    if announced:
        st.max_read = announced
    assoc._cest_fast = st
    assoc.dimse.msg_queue = _WakeQueue(st.ready.set)
    assoc.dul.to_user_queue = _WakeQueue(st.ready.set)
    assoc.dul.to_provider_queue = _WakeQueue(st.wake_dul)
    assoc.__class__ = _classes()[0]
    assoc.dul.__class__ = _classes()[1]
    # the DUL thread was built with target=self.run_reactor (bound before the class swap)
    assoc.dul._target = assoc.dul.run_reactor
    assoc.dimse.__class__ = _classes()[2]
    assoc.dul.socket.__class__ = _classes()[3]
    return True


_CLASSES: tuple[type, type, type, type, type] | None = None


def _classes() -> tuple[type, type, type, type, type]:
    """The five subclasses, defined on first use (only once pynetdicom is known good)."""
    global _CLASSES
    if _CLASSES is not None:
        return _CLASSES
    from pynetdicom import evt
    from pynetdicom.association import Association
    from pynetdicom.dimse import DIMSEServiceProvider
    from pynetdicom.dimse_primitives import C_STORE
    from pynetdicom.dul import DULServiceProvider
    from pynetdicom.pdu import A_ABORT_RQ
    from pynetdicom.pdu_primitives import P_DATA
    from pynetdicom.transport import AssociationSocket

    class FastAssociation(Association):
        """Waits on an Event instead of sleeping; serves fast C-STOREs itself."""

        def _run_reactor(self) -> None:  # mirrors Association._run_reactor (3.0.4)
            st: _State = self._cest_fast
            self._is_paused = False
            st.want_socket = True
            st.wake_dul()
            st.granted.wait(1.0)
            while not self._kill:
                self._is_paused = True
                self._reactor_checkpoint.wait()
                self._is_paused = False
                st.ready.clear()
                context_id, msg = self.dimse.get_msg(block=False)
                if msg is not None:
                    if isinstance(msg, StoreRequest):
                        self._cest_serve(msg)
                    else:
                        self._serve_request(msg, context_id)
                if self.is_established and self.acse.is_release_requested():
                    self.acse.send_release(is_response=True)
                    logging.getLogger("pynetdicom.association").info("Association Released")
                    self.is_released = True
                    self.is_established = False
                    evt.trigger(self, evt.EVT_RELEASED, {})
                    self.kill()
                    return
                if self.acse.is_aborted():
                    self.dul.receive_pdu(wait=False)
                    self.is_aborted = True
                    self.is_established = False
                    evt.trigger(self, evt.EVT_ABORTED, {})
                    self.kill()
                    return
                if not self.dul.is_alive():
                    self.kill()
                    return
                if self.dul.idle_timer_expired():
                    logging.getLogger("pynetdicom.association").error("Network timeout reached")
                    if self.network_timeout_response == "A-RELEASE":
                        self._is_paused = True
                        self._reactor_checkpoint.wait()
                        self.release()
                        self._is_paused = False
                    else:
                        self.abort()
                    self.kill()
                    return
                if st.owner == "assoc":
                    # after a served message too, unless another is queued: one pass of
                    # this loop (and of its checks) per instance, not one per PDU
                    if msg is None or self.dimse.msg_queue.empty():
                        self._cest_read()
                elif msg is None:
                    st.ready.wait(_POLL_S)

        def _cest_give_back(self) -> None:
            """Hand the socket, and every byte read from it and not taken, back to the DUL
            for good."""
            st: _State = self._cest_fast
            st.to_pending()
            st.owner = "dul"
            st.wake_dul()

        def _cest_fill(self, sock: Any, need: int) -> int:
            """Read until the receive buffer holds ``need`` bytes past its read position.

            Returns 1 when it does, 0 when nothing more came within :data:`_POLL_S` (the
            bytes read so far stay buffered for the next call), -1 when the peer closed the
            connection or the socket failed. Each read takes whatever the socket holds, up
            to the buffer's end (a command and its data set often come in one read); the
            socket is waited on only when a read finds nothing.
            """
            st: _State = self._cest_fast
            st.make_room(need)
            with memoryview(st.rbuf) as view:
                while st.rhi - st.rlo < need:
                    try:
                        k = sock.recv_into(view[st.rhi:], 0, socket.MSG_DONTWAIT)
                    except BlockingIOError:
                        try:
                            ready, _, _ = select.select([sock], [], [], _POLL_S)
                        except (OSError, ValueError):
                            return -1
                        if not ready:
                            return 0
                        continue
                    except OSError:
                        return -1
                    if not k:
                        return -1
                    st.rhi += k
            return 1

        def _cest_read(self) -> None:
            """Take P-DATA-TF PDUs (Sta6) until one completes a message or none is waiting.

            Anything else (another PDU type, one longer than we announced, a malformed
            P-DATA-TF, the end of the connection) is handed back to the DUL with every byte
            buffered after it, and the DUL reads the socket from then on.
            """
            st: _State = self._cest_fast
            sock = self.dul.socket.socket if self.dul.socket is not None else None
            if sock is None or self.dul.state_machine.current_state != "Sta6":
                self._cest_give_back()
                return
            while not self._kill:
                got = st.take_pdata()
                if isinstance(got, int):  # not whole yet: read on
                    filled = self._cest_fill(sock, got)
                    if filled == 0:
                        return  # nothing within the poll: the reactor's checks, then again
                    if filled > 0:
                        continue
                    got = None  # the end of the connection: the DUL reads it
                if got is None:
                    self._cest_give_back()
                    return
                self.dul._idle_timer.restart()
                if self.dimse._cest_take(st, got):
                    return  # a C-STORE is queued: the reactor serves it

        def _cest_send(self, pdu: bytes) -> bool:
            """Send an encoded PDU now, unless the DUL has something queued before it."""
            st: _State = self._cest_fast
            sock = self.dul.socket.socket if self.dul.socket is not None else None
            if sock is None or not self.dul.to_provider_queue.empty():
                return False
            with st.send_lock:
                try:
                    sock.sendall(pdu)
                except OSError:
                    return False
            return True

        def _cest_serve(self, req: StoreRequest) -> None:
            st: _State = self._cest_fast
            after = None
            try:
                result = st.store(self, req)
                status, comment = result[0], result[1]
                if len(result) > 2:
                    after = result[2]
            except Exception:
                log.exception("C-STORE handler failed; answering 0xC211")
                status, comment = 0xC211, ""
            try:
                self._cest_respond(req, status, comment)
            finally:
                if after is not None:
                    try:
                        after()
                    except Exception:
                        log.exception("C-STORE: the work after the response failed")

        def _cest_respond(self, req: StoreRequest, status: int, comment: str) -> None:
            if not self.is_established:
                return
            cmd = encode_store_response(req.message_id, req.sop_class_uid,
                                        req.sop_instance_uid, status, comment)
            peer_max = int(self.requestor.maximum_length or 0)
            if peer_max and len(cmd) + 6 > peer_max:  # too small a PDU: the library fragments
                rsp = C_STORE()
                rsp.MessageIDBeingRespondedTo = req.message_id
                rsp.AffectedSOPClassUID = req.sop_class_uid
                rsp.AffectedSOPInstanceUID = req.sop_instance_uid
                rsp.Status = status
                if comment:
                    rsp.ErrorComment = comment[:64]
                self.dimse.send_msg(rsp, req.context_id)
                return
            # P-DATA-TF (PS3.8 9.3.5): one PDV, last command fragment (control header 0x03);
            # in Sta6 sending it is the whole of action DT-1, the state stays Sta6
            pdv = struct.pack(">LB", len(cmd) + 2, req.context_id) + b"\x03" + cmd
            if (self.dul.state_machine.current_state == "Sta6"
                    and self._cest_send(struct.pack(">BBL", 0x04, 0, len(pdv)) + pdv)):
                return
            pdata = P_DATA()
            pdata.presentation_data_value_list.append((req.context_id, b"\x03" + cmd))
            self.dul.send_pdu(pdata)

        def kill(self) -> None:
            st = getattr(self, "_cest_fast", None)
            if st is not None:
                st.ready.set()
                st.wake_dul()
            super().kill()

    class FastDUL(DULServiceProvider):
        """Waits in select on the socket and the wake-up pair instead of sleeping."""

        def kill_dul(self) -> None:
            super().kill_dul()
            self.assoc._cest_fast.wake_dul()

        def run_reactor(self) -> None:  # mirrors DULServiceProvider.run_reactor (3.0.4)
            st: _State = self.assoc._cest_fast
            self._idle_timer.start()
            idle = False
            try:
                while True:
                    if not self.assoc._dul_ready.is_set():
                        self.assoc._dul_ready.set()
                    if (st.want_socket and st.owner == "dul" and not st.pending
                            and self.event_queue.empty()):
                        # the association thread may start before the A-ASSOCIATE-AC is
                        # out (Sta3): it gets the socket once established, between two
                        # PDUs, or never when the association ends first
                        state = self.state_machine.current_state
                        if state == "Sta6":
                            st.want_socket = False
                            st.owner = "assoc"
                            st.granted.set()
                            st.ready.set()
                        elif state not in ("Sta2", "Sta3"):
                            st.want_socket = False
                            st.granted.set()
                    if idle:
                        sock = self.socket.socket if self.socket is not None else None
                        if (st.owner != "dul" or st.pending
                                or not getattr(self.socket, "_is_connected", False)):
                            sock = None  # a requestor's socket before it connects: not yet
                        waits = [st.wake_r] + ([sock] if sock is not None else [])
                        try:
                            ready, _, _ = select.select(waits, [], [], _POLL_S)
                        except (OSError, ValueError):
                            ready = []
                            time.sleep(0.001)  # socket closed under us: the checks below end it
                        if st.wake_r in ready:
                            try:
                                while st.wake_r.recv(4096):
                                    pass
                            except (BlockingIOError, OSError):
                                pass
                    if self._kill_thread:
                        break
                    if self.artim_timer.expired:
                        self.event_queue.put("Evt18")
                    try:
                        if self._process_recv_primitive():
                            pass
                        elif (st.dul_reads and st.owner == "dul"
                              and (took := self._cest_read_pdata()) is not None):
                            if took:  # (False: nothing to read now; not the library's turn)
                                self._idle_timer.restart()
                        elif ((st.owner == "dul" or st.pending) and st.rlo == st.rhi
                              and self._is_transport_event()):
                            self._idle_timer.restart()
                    except Exception as exc:
                        dul_log = logging.getLogger("pynetdicom.dul")
                        dul_log.error("Exception in DUL.run(), aborting association")
                        dul_log.exception(exc)
                        abort_pdu = A_ABORT_RQ()
                        abort_pdu.source = 0x02
                        abort_pdu.reason_diagnostic = 0x00
                        self.socket.send(abort_pdu.encode())
                        self.assoc.is_aborted = True
                        self.assoc.is_established = False
                        self.assoc._kill = True
                        self._kill_thread = True
                        return
                    try:
                        event = self.event_queue.get(block=False)
                    except queue.Empty:
                        idle = True
                        continue
                    self.state_machine.do_action(event)
                    idle = False
            finally:
                st.owner = "dul"
                st.granted.set()
                st.ready.set()
                st.close()

        def _cest_read_pdata(self) -> bool | None:
            """A requestor's P-DATA-TF PDUs, cut from what the socket holds here instead of
            by the library's PDU decoder, events and state machine: in Sta6 receiving a
            P-DATA-TF is the whole of action DT-2 (the primitive to the DIMSE layer, the
            state stays Sta6). One read a call. True when bytes were taken, False when there
            were none to read, None when the library's reader is to run: outside Sta6, at
            the end of the connection or at any other PDU, with every byte buffered in
            ``pending``, which it reads first (``EVT_PDU_RECV`` is not triggered for the
            PDUs taken here)."""
            st: _State = self.assoc._cest_fast
            sock = self.socket.socket if self.socket is not None else None
            if sock is None or st.pending or self.state_machine.current_state != "Sta6":
                st.to_pending()
                return None
            if not st.max_read_known:  # negotiated by now: what we announced, or no limit
                st.max_read = int(self.assoc.requestor.maximum_length or 0) or _UNLIMITED_READ
                st.max_read_known = True
            read = False
            while True:
                got = st.take_pdata()
                if got is None:  # not ours: the library's
                    st.to_pending()
                    return None
                if isinstance(got, int):  # not whole yet
                    if read:
                        return True
                    st.make_room(got)
                    try:
                        with memoryview(st.rbuf) as view:
                            k = sock.recv_into(view[st.rhi:], 0, socket.MSG_DONTWAIT)
                    except BlockingIOError:
                        return False
                    except OSError:
                        k = 0
                    if not k:  # closed or failed: the library reads it, ends the association
                        st.to_pending()
                        return None
                    st.rhi += k
                    read = True
                    continue
                st.dul_pdus += 1
                prim = P_DATA()
                prim.presentation_data_value_list.extend(
                    (cx, bytes((flags,)) + fragment) for cx, flags, fragment in got)
                self.assoc.dimse.receive_primitive(prim)

    class FastDIMSE(DIMSEServiceProvider):
        """Splits incoming PDVs: simple C-STOREs are ours, everything else the library's."""

        def _cest_contexts(self, st: _State) -> dict[int, tuple[str, str]]:
            if st.contexts is None:
                st.contexts = {
                    int(cx.context_id): (str(cx.abstract_syntax), str(cx.transfer_syntax[0]))
                    for cx in self.assoc.accepted_contexts
                }
            return st.contexts

        def _cest_to_library(self, context_id: int, pdv: bytes) -> None:
            one = P_DATA()
            one.presentation_data_value_list.append((context_id, pdv))
            super().receive_primitive(one)

        def receive_primitive(self, primitive: Any) -> None:
            """A P-DATA primitive from the DUL (before the association thread reads the
            socket itself, or after it gave it back)."""
            self._cest_take(self.assoc._cest_fast,
                            [(cx, pdv[0], pdv[1:])
                             for cx, pdv in primitive.presentation_data_value_list])

        def _cest_take(self, st: _State, pdvs: list[tuple[int, int, bytes]]) -> bool:
            """PDVs as (context ID, message control header, fragment) (PS3.8 E.2); True when
            they completed a C-STORE of ours, now on the message queue."""
            queued = False
            for context_id, flags, fragment in pdvs:
                if st.mode == "lib":
                    self._cest_to_library(context_id, bytes((flags,)) + fragment)
                    if self.message is None:
                        st.mode = "idle"
                    continue
                if st.mode == "data":
                    if flags & 1 or st.req is None or context_id != st.req[0]:
                        # a command (or another context) in the middle of our data set: give
                        # the library the whole story so that it reports the violation
                        log.warning("C-STORE data set interrupted by another PDV; passing the "
                                    "message to pynetdicom")
                        self._cest_fallback(st)
                        self._cest_to_library(context_id, bytes((flags,)) + fragment)
                        if self.message is None:
                            st.mode = "idle"
                        continue
                    st.parts.append(fragment)
                    if flags & 2:
                        cx, mid, cls, inst, ts = st.req
                        data = st.parts[0] if len(st.parts) == 1 else b"".join(st.parts)
                        st.mode, st.parts, st.req, st.cmd = "idle", [], None, []
                        st.fast_count += 1
                        self.msg_queue.put((cx, StoreRequest(cx, mid, cls, inst, ts, data)))
                        queued = True
                    continue
                # idle: a message begins (or continues with command fragments)
                pdv = bytes((flags,)) + fragment
                if not flags & 1:
                    self._cest_to_library(context_id, pdv)
                    st.mode = "idle" if self.message is None else "lib"
                    continue
                st.cmd.append((context_id, pdv))
                if not flags & 2:
                    continue
                parsed = parse_store_command(b"".join(p[1:] for _, p in st.cmd))
                cx_info = self._cest_contexts(st).get(context_id)
                if (parsed is not None and parsed[3] != 0x0101 and cx_info is not None
                        and cx_info[0] in st.abstract and cx_info[0] == parsed[1]
                        and cx_info[1] in _LITTLE_ENDIAN_TS):
                    st.req = (context_id, parsed[0], parsed[1], parsed[2], cx_info[1])
                    st.mode = "data"
                    continue
                self._cest_fallback(st)
            return queued

        def _cest_fallback(self, st: _State) -> None:
            """Replay what was buffered for the current message into the library."""
            cmd, parts, req = st.cmd, st.parts, st.req
            st.cmd, st.parts, st.req, st.mode = [], [], None, "idle"
            for cx, pdv in cmd:
                self._cest_to_library(cx, pdv)
            if req is not None and parts:
                for i, part in enumerate(parts):
                    self._cest_to_library(req[0], b"\x00" + part)  # not-last data fragments
                    del i
            st.mode = "idle" if self.message is None else "lib"

    class FastSocket(AssociationSocket):
        """Serves bytes handed back by the association thread first; sends under a lock."""

        @property
        def ready(self) -> bool:
            if self.assoc._cest_fast.pending:
                return True
            return bool(AssociationSocket.ready.fget(self))

        def recv(self, nr_bytes: int) -> bytearray:
            pending = self.assoc._cest_fast.pending
            if not pending:
                return super().recv(nr_bytes)
            out = bytearray(pending[:nr_bytes])
            del pending[:len(out)]
            if len(out) < nr_bytes:
                out += super().recv(nr_bytes - len(out))
            return out

        def send(self, bytestream: bytes) -> None:
            with self.assoc._cest_fast.send_lock:
                super().send(bytestream)

    class FastRequestorDIMSE(DIMSEServiceProvider):
        """A requestor's DIMSE: decodes a C-STORE-RSP that comes whole in one PDV itself."""

        def receive_primitive(self, primitive: Any) -> None:
            pdvs = primitive.presentation_data_value_list
            if self.message is None and len(pdvs) == 1 and pdvs[0][1][:1] == b"\x03":
                context_id, pdv = pdvs[0]
                parsed = parse_store_response(pdv[1:])
                if parsed is not None:
                    msg_id, status, sop_class, sop_uid, comment = parsed
                    rsp = C_STORE()
                    rsp.MessageIDBeingRespondedTo = msg_id
                    rsp.Status = status
                    if sop_class:
                        rsp.AffectedSOPClassUID = sop_class
                    if sop_uid:
                        rsp.AffectedSOPInstanceUID = sop_uid
                    if comment:
                        rsp.ErrorComment = comment
                    st: _State = self.assoc._cest_fast
                    if st.on_response is not None:
                        st.on_response(msg_id, status)
                    st.fast_count += 1
                    self.msg_queue.put((context_id, rsp))
                    return
            super().receive_primitive(primitive)

    _CLASSES = (FastAssociation, FastDUL, FastDIMSE, FastSocket, FastRequestorDIMSE)
    return _CLASSES


# =========================================================================== send side
def install_requestor(assoc: Any, sock: Any = None) -> bool:
    """Put the select-waiting DUL (the receive path's, :func:`install`) on a requestor
    association before its DUL thread starts, so that a C-STORE response is read as soon as it
    arrives instead of at the next poll of pynetdicom's sleeping loop (``_run_loop_delay``:
    5,000 wake-ups a second at the sender's 0.2 ms, each taking the GIL from the threads that
    build outputs). The DUL always owns the socket. The DIMSE layer decodes a C-STORE-RSP
    that comes in one PDV itself (:func:`parse_store_response`; pynetdicom's decoder took
    about 0.85 ms a response here), as the library's ``C_STORE`` primitive on the message
    queue, without ``EVT_DIMSE_RECV`` (:func:`on_store_response` tells the sender instead);
    any other message goes to the library's decoder. The association stays the library's.

    With ``sock``, the association's ``AssociationSocket`` (``_create_socket`` returns it
    before ``set_socket``), the DUL also cuts P-DATA-TF PDUs from the socket itself
    (``_cest_read_pdata``), leaving every other PDU to the library's reader; the socket
    becomes the receive path's ``FastSocket`` for that (bytes handed over are read first).

    Call it from ``AE._create_socket`` (pynetdicom calls it before ``Association.request``
    starts the DUL). Returns False, leaving the association untouched, when the pynetdicom
    version or the classes are not the tested ones, the association is not a requestor whose
    DUL has not started, or a primitive is already queued.
    """
    ok, why = supported()
    if not ok:
        log.info("fast send wait off: %s", why)
        return False
    from pynetdicom.association import Association
    from pynetdicom.dimse import DIMSEServiceProvider
    from pynetdicom.dul import DULServiceProvider
    from pynetdicom.transport import AssociationSocket

    try:
        dul = assoc.dul
        if (type(assoc) is not Association or not assoc.is_requestor
                or type(assoc.dimse) is not DIMSEServiceProvider
                or type(dul) is not DULServiceProvider or dul.is_alive()
                or getattr(dul, "_target", None) != dul.run_reactor
                or not dul.to_provider_queue.empty()):
            return False
    except AttributeError:
        return False
    st = _State(_no_store, ())
    assoc._cest_fast = st
    dul.to_provider_queue = _WakeQueue(st.wake_dul)
    dul.__class__ = _classes()[1]
    dul._target = dul.run_reactor  # bound before the class swap
    assoc.dimse.__class__ = _classes()[4]
    if type(sock) is AssociationSocket:  # it serves bytes handed over first: the DUL may cut
        sock.__class__ = _classes()[3]
        st.dul_reads = True
    return True


def on_store_response(assoc: Any, callback: Callable[[int, int], None]) -> bool:
    """Have a requestor association put on by :func:`install_requestor` call
    ``callback(message_id, status)`` for each C-STORE-RSP it decodes itself (those do not
    trigger ``EVT_DIMSE_RECV``); False, and nothing set, for any other association."""
    st = getattr(assoc, "_cest_fast", None)
    if st is None or not assoc.is_requestor:
        return False
    st.on_response = callback
    return True


def _no_store(assoc: Any, req: StoreRequest) -> tuple[int, str]:  # pragma: no cover
    # a requestor serves no C-STORE: its DIMSE layer stays the library's
    return 0xC211, "not an acceptor"


def encode_direct(ds: Dataset) -> bytes | None:
    """The data set bytes :func:`store_direct` would send for ``ds`` (in its file meta's
    transfer syntax), or None where that path does not apply or the data set cannot be
    encoded. The sender encodes the next object with it while the archive is still storing
    the one before.

    The bytes are those of the library's own encoder (``pynetdicom.dsutils.encode``, as
    ``send_c_store`` uses), written by :func:`node.encoder.encode`, which keeps the encoding
    of elements that repeat between objects; where that raises, the library's encoder runs
    (and logs and gives None where it fails too)."""
    from pynetdicom.dsutils import encode  # the library's encoder, as send_c_store uses

    try:
        ts = str(ds.file_meta.TransferSyntaxUID)
    except AttributeError:
        return None
    if ts not in _LITTLE_ENDIAN_TS:
        return None
    implicit = ts == str(ImplicitVRLittleEndian)
    try:
        return encoder.encode(ds, implicit)
    except Exception:  # noqa: BLE001 - the library's encoder decides, and reports
        return encode(ds, implicit, True)


def store_direct(assoc: Any, ds: Dataset, msg_id: int, *, data: bytes | None = None,
                 then: Callable[[], None] | None = None) -> Dataset | None:
    """``assoc.send_c_store(ds, msg_id=msg_id)`` for a requestor association, with the
    request's PDUs written on the socket in one call; None (nothing sent) where this path
    does not apply and the caller must use the library's.

    pynetdicom sends each PDU through its DUL thread and state machine, one queue round trip
    and one ``send`` per PDU (16 kB each for most archives), behind a reactor pause that
    polls every 0.1 ms: about 4 ms per 40 kB derived MR image to storescp here, 6.5 ms per
    1.2 MB Secondary Capture. Here the command set is encoded directly
    (:func:`encode_store_request`), the data set by the library's own encoder in the
    context's transfer syntax, both cut into P-DATA-TF PDUs as the library cuts them
    (:func:`pdata_stream`, one buffer) and written with one ``sendall``; in Sta6 sending P-DATA is the
    whole of action DT-1 and the state stays Sta6, so the state machine has nothing to do.
    The response comes back through the DUL thread and the message queue (decoded by
    :func:`install_requestor`'s DIMSE layer, or the library's for anything unusual) and is
    checked by the library's own ``_check_received_status``; on a DIMSE timeout the
    association is aborted as the library does.

    Applies only on a plain TCP socket (not TLS: an SSL socket must not be written by one
    thread while another reads it), an established association in Sta6 with nothing queued
    for the DUL, a data set whose file meta names an accepted context's transfer syntax
    (Explicit or Implicit VR Little Endian) for its SOP class, and a message queue that keeps
    responses from the reactor (``node.send.ResponseQueue``: the caller checks).

    ``data``, when given, is ``ds`` already encoded by :func:`encode_direct`; ``then`` is
    called once the request is on the wire, before the wait for its response (the sender
    encodes its next object there, while the archive works).
    """
    dul = getattr(assoc, "dul", None)
    sock_w = getattr(dul, "socket", None)
    sock = getattr(sock_w, "socket", None)
    if (sock is None or isinstance(sock, ssl.SSLSocket) or not assoc.is_established
            or not assoc.is_requestor or dul.state_machine.current_state != "Sta6"
            or not dul.to_provider_queue.empty()):
        return None
    try:
        sop_class = str(ds.SOPClassUID)
        sop_uid = str(ds.SOPInstanceUID)
        ts = str(ds.file_meta.TransferSyntaxUID)
    except AttributeError:
        return None
    if ts not in _LITTLE_ENDIAN_TS:
        return None
    context = next((cx for cx in assoc.accepted_contexts
                    if str(cx.abstract_syntax) == sop_class and cx.transfer_syntax
                    and str(cx.transfer_syntax[0]) == ts), None)
    if context is None or context.context_id is None:
        return None
    if data is None:
        data = encode_direct(ds)
    if data is None:
        return None
    command = encode_store_request(msg_id, sop_class, sop_uid)
    max_pdu = int(assoc.acceptor.maximum_length or 0)
    try:
        sock.sendall(pdata_stream(int(context.context_id), command, data, max_pdu))
    except OSError:
        assoc.abort()  # part of a message may be on the wire: this association is done
        raise
    dul._idle_timer.restart()
    if then is not None:
        then()
    _, rsp = assoc.dimse.get_msg(block=True)
    if rsp is None:
        assoc._handle_no_response()
        return Dataset()
    return assoc._check_received_status(rsp)
