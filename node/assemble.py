"""Assembly of received instances into saturation series: protocol match, header rules, completion.

Each instance is matched to a protocol (:class:`~node.config.MatchRule`), its saturation offset
read by the protocol's :class:`~node.config.OffsetRule`, its slice position computed as
``ImagePositionPatient . n`` with ``n = row x column`` direction cosines of
ImageOrientationPatient (PS3.3 C.7.6.2.1.1), and its pixels decoded ONCE, as it arrives, into a
per-slice float32 stack that grows as new frames appear. Frames are ordered by offset (ties by
InstanceNumber, then SOP Instance UID), never by arrival; slices by position along the normal.
An M0 frame is one with ``|offset| >= m0_threshold_ppm``.

Completion: when the expected frame count is reached (see
:meth:`~node.config.Protocol.expected_count`), or else after ``idle_timeout_s`` without a new
frame of that series. The release of an association is only a hint: it shortens the wait to
``release_grace_s`` for series whose expected count is unknown. A series released incomplete is
processed (``complete=False``, ``missing`` says what is absent) when every slice holds an M0 and
the protocol's required offsets; otherwise it is held (logged, ``on_held`` called) and a later
frame of it wakes it up again.

One timer thread waits on a :class:`threading.Condition` for the earliest deadline; one worker
thread builds the :class:`~node.types.AssembledSeries` and calls ``on_complete``, so the
receive handlers never wait for either.

Log lines name series by their pseudonymous key only (:func:`node.types.series_key`).
"""

from __future__ import annotations

import bisect
import enum
import logging
import math
import queue
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from pydicom import Dataset
from pydicom.datadict import tag_for_keyword
from pydicom.dataelem import DataElement, RawDataElement
from pydicom.multival import MultiValue
from pydicom.tag import Tag

from node.companion import CompanionFrame, CompanionSeries, CompanionStore, attach, to_physical
from node.config import CompanionRule, NodeConfig, OffsetRule, Protocol
from node.fastpath import new_dataset, tag_key
from node.types import AssembledSeries, series_key
from quant import spectra_from_frames
from quant.parts import in_parts

__all__ = [
    "OFFSET_TOLERANCE_PPM",
    "SLICE_TOLERANCE_MM",
    "Assembler",
    "AssemblyError",
    "Frame",
    "FrameHeader",
    "Placed",
    "Prepared",
    "header_uid",
    "header_us",
    "private_block_element",
    "read_offset_ppm",
    "slice_geometry",
]

log = logging.getLogger("cest_node.assemble")

OFFSET_TOLERANCE_PPM = 1e-3
"""Offsets closer than this are the same offset (repeats are kept as separate columns)."""
SLICE_TOLERANCE_MM = 0.01
"""Frames whose positions along the slice normal differ by less than this are one slice."""
_ORIENTATION_TOLERANCE = 1e-4
_PIXEL_DATA = tag_key(0x7FE00010)
_PER_FRAME = tag_key(0x52009230)  # PerFrameFunctionalGroupsSequence
_SHARED = tag_key(0x52009229)  # SharedFunctionalGroupsSequence


class AssemblyError(ValueError):
    """An instance cannot be placed: a header the protocol needs is missing or inconsistent.

    The message names the attribute and the problem, never a patient attribute.
    """


class Placed(enum.Enum):
    """What :meth:`Assembler.place` did with an instance."""

    ADDED = "added"
    DUPLICATE = "duplicate"  # SOP Instance UID already in the series: first one kept
    LATE = "late"  # the series was already released
    UNMATCHED = "unmatched"  # no protocol matches (only from :meth:`Assembler.add`)


@dataclass
class Frame:
    """One decoded frame, ready to be placed."""

    offset_ppm: float
    position_mm: float
    pixels: np.ndarray  # (rows, cols) float32
    tiebreak: tuple[int, str, int]  # (InstanceNumber, SOP Instance UID, frame number)
    frame_number: int | None = None  # 1-based for multi-frame instances, None for single
    header: Dataset | None = None  # multi-frame: the frame's own header (see _frame_header)


@dataclass
class Prepared:
    """A matched, decoded instance (output of :meth:`Assembler.prepare`)."""

    key: str
    protocol: Protocol
    sop_instance_uid: str
    header: Dataset  # the dataset without its pixel data
    frames: list[Frame]
    orientation: tuple[float, ...]
    rows: int
    cols: int
    images_in_acquisition: int | None = None
    companion: CompanionRule | None = None  # set for an instance of a companion series
    study_uid: str = ""
    companion_frames: list[CompanionFrame] = field(default_factory=list)
    spacing: tuple[float, float] = (1.0, 1.0)
    companion_units: str = ""


# --------------------------------------------------------------------------- header rules
def _candidates(ds: Dataset, frame_index: int | None) -> list[Dataset]:
    """Datasets to search for an attribute, most specific first.

    For a multi-frame (enhanced) instance: the items of the frame's per-frame functional
    group macros, then those of the shared functional groups, then the top level.
    """
    out: list[Dataset] = []
    if frame_index is not None:
        for tag in (_PER_FRAME, _SHARED):
            if tag in ds:
                seq = ds[tag].value
                idx = frame_index if tag == _PER_FRAME else 0
                if len(seq) > idx:
                    group = seq[idx]
                    out.append(group)
                    for elem in group:
                        if elem.VR == "SQ":
                            out.extend(elem.value)
    out.append(ds)
    return out


def _creator_matches(d: Dataset, tag: int, elem: Any, creator: str,
                     creator_b: bytes | None) -> bool:
    """Whether the element at ``tag`` of ``d`` holds ``creator``, as pydicom compares it
    (``elem.value == creator``, the value converted by pydicom).

    A plain explicit-VR LO element of 7-bit text (no ESC, no backslash) is compared from its
    bytes (pydicom strips only trailing spaces and NULs from it, PS3.5 6.2); anything else is
    converted by pydicom.
    """
    if creator_b is not None and type(elem) is RawDataElement and elem.VR == "LO":
        raw = elem.value
        if (isinstance(raw, bytes) and raw and raw.isascii() and b"\\" not in raw
                and b"\x1b" not in raw):
            return raw.rstrip(b"\0 ") == creator_b
    return bool(d[tag].value == creator)


def _creator_bytes(creator: str) -> bytes | None:
    """``creator`` as bytes when a byte comparison of a plain LO gives pydicom's answer."""
    if (creator.isascii() and "\\" not in creator and "\x1b" not in creator
            and creator == creator.rstrip("\0 ")):
        return creator.encode("ascii")
    return None


def private_block_element(d: Dataset, group: int, creator: str) -> int | None:
    """The element number (0x10-0xFF) of the private creator ``creator`` in ``group`` of ``d``,
    or None when ``d`` has no such block: what ``d.private_block(group, creator)`` finds,
    without building the block.

    PS3.5 7.8.1: the creator element (gggg,00xx) reserves the block (gggg,xx00-xxFF). As in
    pydicom, the lowest element holding the creator wins, and an empty creator or an even
    group raises ValueError.
    """
    cached = d._private_blocks.get((group, creator))
    if cached is not None:
        return int(cached.block_start >> 8)
    if not creator:
        raise ValueError("Private creator must have a value")
    if group % 2 == 0:
        raise ValueError("Tag must be private if private creator is given")
    dd = d._dict
    base = group << 16
    creator_b = _creator_bytes(creator)
    first = dd.get(base | 0x10)  # type: ignore[call-overload]
    if first is not None and _creator_matches(d, base | 0x10, first, creator, creator_b):
        return 0x10
    head = group << 8
    elements = sorted(t & 0xFF for t in dd if t >> 8 == head and (t & 0xFF) > 0x10)
    for e in elements:
        if _creator_matches(d, base | e, dd[base | e], creator, creator_b):  # type: ignore[index]
            return e
    return None


def _locate(cands: Iterable[Dataset], keyword: str | None = None, tag: int | None = None,
            private_creator: str | None = None) -> tuple[Dataset, int] | None:
    """Where the first value of ``_find`` is: (data set, tag), None when absent everywhere."""
    if private_creator is not None and tag is not None:
        group, byte = tag >> 16, tag & 0xFF
        for d in cands:
            e = private_block_element(d, group, private_creator)
            if e is None:
                continue
            t = group << 16 | e << 8 | byte
            if t in d._dict:
                return d, t
        return None
    number = tag
    if keyword is not None:
        number = tag_for_keyword(keyword)
        if number is None:  # not a keyword: pydicom's own handling of the name
            for d in cands:
                if keyword in d:
                    return d, int(Tag(keyword))
            return None
    if number is None:
        return None
    for d in cands:
        if number in d._dict:
            return d, number
    return None


def _find(cands: Iterable[Dataset], keyword: str | None = None, tag: int | None = None,
          private_creator: str | None = None) -> Any:
    """The first value found in ``cands`` (None when absent everywhere).

    A private element (``tag`` with ``private_creator``) is looked up as through
    ``Dataset.private_block`` (see :func:`private_block_element`).
    """
    where = _locate(cands, keyword, tag, private_creator)
    if where is None:
        return None
    d, t = where
    return d[t].value


def _number_at(where: tuple[Dataset, int]) -> Any:
    """The value at ``where``: a float read from the bytes of a plain single-valued DS/IS
    (see :func:`_raw_numbers`), else pydicom's value."""
    d, t = where
    fast = _raw_numbers(d, t)
    if fast is not None and len(fast) == 1:
        return fast[0]
    return d[t].value


def _as_text(value: Any) -> str:
    if isinstance(value, bytes | bytearray):
        return bytes(value).decode("latin-1").strip("\x00 ")
    if isinstance(value, MultiValue | list | tuple):
        return "\\".join(str(v) for v in value)
    return str(value).strip()


def _as_number(value: Any, what: str) -> float:
    if isinstance(value, MultiValue | list | tuple):
        if len(value) != 1:
            raise AssemblyError(f"{what}: expected one number, got {len(value)} values")
        value = value[0]
    if isinstance(value, bytes | bytearray):  # e.g. a private DS read as UN (implicit VR)
        value = _as_text(value)
    try:
        x = float(value)
    except (TypeError, ValueError):
        raise AssemblyError(f"{what}: not a number ({_as_text(value)[:40]!r})") from None
    if not math.isfinite(x):
        raise AssemblyError(f"{what}: not a finite number")
    return x


def read_offset_ppm(ds: Dataset, rule: OffsetRule, *, frame_index: int | None = None) -> float:
    """The saturation offset of one instance (or one frame of it) in ppm.

    Parameters
    ----------
    ds
        The instance.
    rule
        Where the offset is (see :class:`~node.config.OffsetRule`).
    frame_index
        0-based frame of a multi-frame instance: the frame's functional groups are
        searched first.

    Raises
    ------
    AssemblyError
        The attribute is missing, is not a number, does not match the regex, the list index
        is out of range, or ImagingFrequency is missing for a Hz offset.

    Notes
    -----
    Hz to ppm: ``offset_ppm = offset_hz / f0_MHz``, with f0 the instance's ImagingFrequency
    (0018,0084) in MHz (PS3.3 C.8.3.1); a frequency in Hz divided by one in MHz is ppm.
    """
    cands = _candidates(ds, frame_index)
    if rule.kind == "list":
        assert rule.order_by is not None
        raw = _find(cands, keyword=rule.order_by)
        if raw is None:
            raise AssemblyError(f"{rule.order_by}: missing (needed to pick the offset from "
                                "the protocol's list)")
        order = _as_number(raw, rule.order_by)
        if order != int(order):
            raise AssemblyError(f"{rule.order_by}: expected an integer, got {order:g}")
        idx = int(order) - rule.order_start
        if not 0 <= idx < len(rule.values_ppm):
            raise AssemblyError(
                f"{rule.order_by}: value {int(order)} is outside the protocol's list "
                f"({rule.order_start}..{rule.order_start + len(rule.values_ppm) - 1})")
        return float(rule.values_ppm[idx])
    where = _locate(cands, keyword=rule.keyword, tag=rule.tag,
                    private_creator=rule.private_creator)
    pattern = rule.pattern
    if where is None:
        found = None
    elif pattern is not None:  # the text as pydicom gives it
        found = where[0][where[1]].value
    else:
        found = _number_at(where)
    if found is None:
        raise AssemblyError(f"offset {rule.describe()}: missing")
    if pattern is not None:
        text = _as_text(found)
        m = pattern.search(text)
        if m is None:
            raise AssemblyError(f"offset {rule.describe()}: the regex does not match the value")
        group = "value" if "value" in pattern.groupindex else 1
        value = _as_number(m.group(group), f"offset {rule.describe()}")
    else:
        value = (found if type(found) is float
                 else _as_number(found, f"offset {rule.describe()}"))
    if rule.unit == "hz":
        at = _locate(cands, keyword="ImagingFrequency")
        freq = None if at is None else _number_at(at)
        if freq is None:
            raise AssemblyError("ImagingFrequency: missing (needed to convert a Hz offset)")
        f0 = _as_number(freq, "ImagingFrequency")
        if f0 <= 0:
            raise AssemblyError(f"ImagingFrequency: must be > 0 MHz, got {f0:g}")
        value = value / f0
    return value


def _raw_numbers(ds: Dataset, tag: int) -> list[float] | None:
    """The numbers of a not-yet-converted explicit-VR DS/IS element, read from its bytes.

    A hot-path shortcut around pydicom's value conversion (which builds and validates a
    DSfloat per value); None whenever the element is absent, already converted, implicit VR,
    or any value is not a plain number: the caller then takes pydicom's path.
    """
    elem = ds._dict.get(tag_key(tag))
    if type(elem) is not RawDataElement or elem.VR not in ("DS", "IS") or not elem.value:
        return None
    try:
        out = [float(v) for v in elem.value.split(b"\\")]
    except ValueError:
        return None
    return out if all(math.isfinite(v) for v in out) else None


def _raw_us(ds: Dataset, tag: int) -> int | None:
    """A not-yet-converted explicit-VR US element of one value, read from its two bytes."""
    elem = ds._dict.get(tag_key(tag))
    if (type(elem) is not RawDataElement or elem.VR != "US" or elem.length != 2
            or not elem.is_little_endian):
        return None
    return int.from_bytes(elem.value or b"", "little")


def _raw_text(ds: Dataset, tag: int) -> str | None:
    """The text of a not-yet-converted explicit-VR LO/SH/CS element of one value, read from
    its bytes, as pydicom gives it: 7-bit text without ESC or backslash (so every DICOM
    character set reads it the same), trailing spaces and NULs stripped (PS3.5 6.2). None
    for anything else (the caller then takes pydicom's path)."""
    elem = ds._dict.get(tag_key(tag))
    if type(elem) is not RawDataElement or elem.VR not in ("LO", "SH", "CS"):
        return None
    raw = elem.value
    if (not isinstance(raw, bytes) or not raw or not raw.isascii() or b"\\" in raw
            or b"\x1b" in raw):
        return None
    return raw.rstrip(b"\0 ").decode("ascii")


def header_uid(ds: Dataset, tag: int, keyword: str) -> str:
    """A UID element's text, as ``str(ds.<keyword>)`` gives it; raises AttributeError when
    absent, as that does.

    A plain UID of one value not yet converted (explicit or implicit VR) is read from its
    bytes: ASCII, trailing NULs and spaces stripped, as pydicom's ``convert_UI``. Anything
    else (converted, empty, multi-valued, non-ASCII) takes pydicom's path. pydicom's
    conversion costs about 19 us per UID (value hooks, the validation regex), four UIDs per
    instance on the receive path; this about 1 us (measured with timeit here).
    """
    elem = ds._dict.get(tag_key(tag))
    if type(elem) is RawDataElement and elem.VR in ("UI", None):
        raw = elem.value
        if isinstance(raw, bytes) and raw and raw.isascii() and b"\\" not in raw:
            text = raw.rstrip(b"\0 ").decode("ascii")
            if text:
                return text
    return str(getattr(ds, keyword))


def header_us(ds: Dataset, tag: int, keyword: str) -> int:
    """``int(ds.get(keyword, 0) or 0)`` for a US element, read from its bytes where plain."""
    fast = _us_value(ds, tag)
    return fast if fast is not None else int(ds.get(keyword, 0) or 0)


def _raw_int(ds: Dataset, tag: int) -> int | None:
    """A plain single-valued IS element (raw, explicit VR) holding an integer, as an int."""
    fast = _raw_numbers(ds, tag)
    if fast is None or len(fast) != 1 or fast[0] != int(fast[0]):
        return None
    return int(fast[0])


def _us_value(ds: Dataset, tag: int) -> int | None:
    """A US element of one value, raw or already converted by pydicom (None otherwise)."""
    elem = ds._dict.get(tag_key(tag))
    if type(elem) is DataElement and type(elem.value) is int:
        return elem.value
    return _raw_us(ds, tag)


def _match_text(ds: Dataset, attribute: str) -> str | None:
    """``_as_text(ds.get(attribute))`` for a match rule, None when absent (or None); a plain
    text element is read from its bytes (:func:`_raw_text`)."""
    tag = tag_for_keyword(attribute)
    if tag is not None:
        fast = _raw_text(ds, tag)
        if fast is not None:
            return fast.strip()
    value = ds.get(attribute)
    return None if value is None else _as_text(value)
_PLAIN_TS: dict[bytes | str, bool] = {}  # transfer syntax (raw bytes or UID) -> plain


def _plain_syntax(ds: Dataset) -> bool:
    """Whether the file meta's Transfer Syntax is uncompressed little endian (False when
    there is none). Answers are kept per raw value, so the UID is converted once."""
    meta = getattr(ds, "file_meta", None)
    elem = None if meta is None else meta._dict.get(0x00020010)
    key: bytes | str | None = None
    if type(elem) is RawDataElement and isinstance(elem.value, bytes):
        key = elem.value
    elif type(elem) is DataElement and isinstance(elem.value, str):
        key = str(elem.value)
    plain = None if key is None else _PLAIN_TS.get(key)
    if plain is None:
        ts = getattr(meta, "TransferSyntaxUID", None)
        plain = ts is not None and bool(not ts.is_compressed and ts.is_little_endian)
        if key is not None and len(_PLAIN_TS) < 64:
            _PLAIN_TS[key] = plain
    return plain


def _same_orientation(a: tuple[float, ...], b: tuple[float, ...]) -> bool:
    """``np.allclose(a, b, atol=_ORIENTATION_TOLERANCE)`` (rtol 1e-5) for two short tuples."""
    if a == b and math.isfinite(sum(a)):  # equal and finite: close (the common case)
        return True
    return len(a) == len(b) and all(
        abs(x - y) <= _ORIENTATION_TOLERANCE + 1e-5 * abs(y) for x, y in zip(a, b, strict=True))


def _normal_position(p: list[float], o: list[float]) -> tuple[float, tuple[float, ...]]:
    nx = o[1] * o[5] - o[2] * o[4]
    ny = o[2] * o[3] - o[0] * o[5]
    nz = o[0] * o[4] - o[1] * o[3]
    norm = math.sqrt(nx * nx + ny * ny + nz * nz)
    if not all(math.isfinite(v) for v in p) or not norm > 0.5:
        raise AssemblyError("ImageOrientationPatient: row and column cosines are not orthogonal "
                            "unit vectors")
    return (p[0] * (nx / norm) + p[1] * (ny / norm) + p[2] * (nz / norm),
            tuple(float(v) for v in o))


def slice_geometry(ds: Dataset, *, frame_index: int | None = None
                   ) -> tuple[float, tuple[float, ...]]:
    """Position along the slice normal (mm) and the direction cosines of one frame.

    ``position = IPP . (r x c)`` with r, c the row and column direction cosines of
    ImageOrientationPatient (PS3.3 C.7.6.2.1.1; the normal is their cross product).
    """
    if frame_index is None:  # single frame: straight from the bytes when they are plain
        fast_p, fast_o = _raw_numbers(ds, 0x00200032), _raw_numbers(ds, 0x00200037)
        if fast_p is not None and fast_o is not None and len(fast_p) == 3 and len(fast_o) == 6:
            return _normal_position(fast_p, fast_o)
    cands = _candidates(ds, frame_index)
    ipp = _find(cands, keyword="ImagePositionPatient")
    iop = _find(cands, keyword="ImageOrientationPatient")
    if ipp is None or len(ipp) != 3:
        raise AssemblyError("ImagePositionPatient: missing or not 3 values")
    if iop is None or len(iop) != 6:
        raise AssemblyError("ImageOrientationPatient: missing or not 6 values")
    try:
        p = [float(v) for v in ipp]
        o = [float(v) for v in iop]
    except (TypeError, ValueError):
        raise AssemblyError("ImagePositionPatient/ImageOrientationPatient: not numbers") from None
    return _normal_position(p, o)


def _header_only(ds: Dataset) -> Dataset:
    """A shallow copy of ``ds`` without Pixel Data (elements shared, not re-parsed)."""
    elems = dict(ds._dict)
    elems.pop(_PIXEL_DATA, None)
    hdr = new_dataset(elems)
    if hasattr(ds, "file_meta"):
        hdr.file_meta = ds.file_meta
    implicit, little = ds.original_encoding
    hdr.set_original_encoding(implicit, little, ds.original_character_set)
    return hdr


def _decode_pixels(ds: Dataset, *, modality: bool = True, rows: int | None = None,
                   cols: int | None = None) -> np.ndarray:
    """Stored pixel values as float32 ``(frames, rows, cols)``, Modality LUT applied.

    With ``modality=False`` the stored values are returned as they are.

    Uncompressed little-endian single-sample data is read straight from the Pixel Data bytes
    (one copy); anything else goes through pydicom's ``pixel_array``. Rescale Slope and
    Intercept (PS3.3 C.11.1) are applied when present at the top level; per-frame ones by the
    caller.
    """
    rows = rows or _raw_us(ds, 0x00280010) or int(ds.Rows)
    cols = cols or _raw_us(ds, 0x00280011) or int(ds.Columns)
    n_frames = int(ds.get("NumberOfFrames", 1) or 1) if tag_key(0x00280008) in ds._dict else 1
    arr: np.ndarray | None = None
    raw = ds._dict.get(_PIXEL_DATA)
    if (_plain_syntax(ds)
            and (_raw_us(ds, 0x00280002) or int(ds.get("SamplesPerPixel", 1))) == 1
            and raw is not None):
        bits = _raw_us(ds, 0x00280100) or int(ds.BitsAllocated)
        stored = _raw_us(ds, 0x00280101) or int(ds.get("BitsStored", bits))
        rep = _raw_us(ds, 0x00280103)
        signed = (rep if rep is not None else int(ds.get("PixelRepresentation", 0))) == 1
        data = raw.value if isinstance(raw, DataElement | RawDataElement) else None
        if bits in (8, 16, 32) and stored == bits and isinstance(data, bytes | bytearray):
            dtype = np.dtype(f"<{'i' if signed else 'u'}{bits // 8}")
            need = rows * cols * n_frames * dtype.itemsize
            if len(data) < need:
                raise AssemblyError(f"PixelData: {len(data)} bytes, expected {need}")
            arr = np.frombuffer(data, dtype=dtype, count=rows * cols * n_frames)
    if arr is None:
        try:
            arr = np.asarray(ds.pixel_array)
        except Exception as exc:  # pydicom raises many kinds; name the problem, keep going
            raise AssemblyError(f"PixelData: cannot decode ({type(exc).__name__}: "
                                f"{str(exc)[:80]})") from None
        if arr.ndim == 3 and n_frames == 1:
            raise AssemblyError("PixelData: more than one sample per pixel is not supported")
    out = arr.reshape(n_frames, rows, cols).astype(np.float32)
    if not modality:
        return out
    fast_s, fast_i = _raw_numbers(ds, 0x00281053), _raw_numbers(ds, 0x00281052)
    dd = ds._dict
    slope: Any = (fast_s[0] if fast_s is not None and len(fast_s) == 1
                  else ds.get("RescaleSlope") if 0x00281053 in dd else None)
    intercept: Any = (fast_i[0] if fast_i is not None and len(fast_i) == 1
                      else ds.get("RescaleIntercept") if 0x00281052 in dd else None)
    if slope is not None and float(slope) != 1.0:
        out *= np.float32(float(slope))
    if intercept is not None and float(intercept) != 0.0:
        out += np.float32(float(intercept))
    return out


_FRAME_KEYWORDS = ("ImagePositionPatient", "ImageOrientationPatient", "PixelSpacing",
                   "SliceThickness", "SpacingBetweenSlices")


class FrameHeader(Dataset):
    """A single-frame view of one frame of a multi-frame (Enhanced MR) instance.

    Its elements are those of a single-frame image (see :func:`_frame_header`), so the
    builders that take one header per slice (derived MR, Secondary Capture) read it like a
    classic MR header. Two plain attributes (not DICOM elements) keep the way back to the
    real instance, for the builders that must name it (Parametric Map, Segmentation):

    ``multiframe``
        The instance's own header without its pixel data: functional groups kept, one object
        shared by the views of all its frames.
    ``frame_number``
        The frame's number in the instance, 1-based (Referenced Frame Number, PS3.3 C.7.6.1.1).
    """

    multiframe: Dataset
    frame_number: int


def _frame_header(header: Dataset, cands: list[Dataset], frame_number: int) -> FrameHeader:
    """A single-frame view of one frame of a multi-frame instance, for the derive builders.

    The instance's top-level elements (shared, not copied) without the functional group
    sequences and NumberOfFrames, plus the frame's geometry (ImagePositionPatient,
    ImageOrientationPatient, PixelSpacing, SliceThickness) from its functional groups
    (PS3.3 C.7.6.16.2: Plane Position, Plane Orientation, Pixel Measures). ``header`` itself
    is kept as :attr:`FrameHeader.multiframe`.
    """
    drop = {_PER_FRAME, _SHARED, Tag(0x0028, 0x0008)}
    hdr = FrameHeader({t: e for t, e in header._dict.items() if t not in drop})
    if hasattr(header, "file_meta"):
        hdr.file_meta = header.file_meta
    for kw in _FRAME_KEYWORDS:
        value = _find(cands[:-1], keyword=kw)
        if value is not None:
            setattr(hdr, kw, value)
    hdr.multiframe = header
    hdr.frame_number = frame_number
    return hdr


def pixel_spacing(ds: Dataset) -> tuple[float, float]:
    """PixelSpacing (row spacing, column spacing) in mm, from the top level or the shared /
    first per-frame Pixel Measures (PS3.3 C.7.6.16.2.1); (1, 1) when absent."""
    value = _find(_candidates(ds, 0 if _PER_FRAME in ds else None), keyword="PixelSpacing")
    try:
        if value is not None and len(value) == 2:
            return float(value[0]), float(value[1])
    except (TypeError, ValueError):
        pass
    return (1.0, 1.0)


# --------------------------------------------------------------------------- series state
@dataclass
class _Slice:
    position_mm: float
    stack: np.ndarray  # (capacity, rows, cols) float32
    offsets: list[float] = field(default_factory=list)
    ties: list[tuple[int, str, int]] = field(default_factory=list)
    headers: list[Dataset] = field(default_factory=list)

    @property
    def count(self) -> int:
        return len(self.offsets)


@dataclass
class _Series:
    key: str
    protocol: Protocol
    rows: int
    cols: int
    orientation: tuple[float, ...]
    expected: int | None
    capacity: int
    slices: list[_Slice] = field(default_factory=list)
    sops: set[str] = field(default_factory=set)
    n_frames: int = 0
    first_at: float = 0.0
    last_at: float = 0.0
    deadline: float = math.inf  # monotonic
    released_hint: bool = False
    held: bool = False
    study_uid: str = ""
    by_position: dict[float, _Slice] = field(default_factory=dict)

    def slice_for(self, position: float) -> _Slice:
        # the first slice within SLICE_TOLERANCE_MM of ``position``; slices are only ever
        # appended, so the answer for one exact position never changes: kept by position
        known = self.by_position.get(position)
        if known is not None:
            return known
        found = self._first_within(position)
        self.by_position[position] = found
        return found

    def _first_within(self, position: float) -> _Slice:
        for s in self.slices:
            if abs(s.position_mm - position) < SLICE_TOLERANCE_MM:
                return s
        new = _Slice(position, np.empty((self.capacity, self.rows, self.cols), np.float32))
        self.slices.append(new)
        return new


# --------------------------------------------------------------------------- the assembler
class Assembler:
    """Builds :class:`~node.types.AssembledSeries` from instances as they arrive.

    Parameters
    ----------
    config
        The node config (protocols, ``idle_timeout_s``, ``release_grace_s``).
    on_complete
        Called from the assembler's worker thread with each released series (one at a time,
        in release order). Exceptions are logged and do not stop the worker.
    on_held
        Optional ``f(series_key, missing_text)``, called from the timer thread when a series
        is held (incomplete and not processable at the idle timeout).

    Notes
    -----
    Call :meth:`start` (or use it as a context manager) before :meth:`add`/:meth:`place`,
    and :meth:`stop` at the end. For offline use, :meth:`flush` releases every open series
    at once and waits until ``on_complete`` has been called for them.

    Examples
    --------
    >>> done = []
    >>> with Assembler(cfg, done.append) as asm:      # doctest: +SKIP
    ...     for ds in datasets:
    ...         asm.add(ds)
    ...     asm.flush()
    """

    def __init__(
        self,
        config: NodeConfig,
        on_complete: Callable[[AssembledSeries], None],
        *,
        on_held: Callable[[str, str], None] | None = None,
    ):
        self.config = config
        self.on_complete = on_complete
        self.on_held = on_held
        self._cond = threading.Condition()
        self._series: dict[str, _Series] = {}
        self._released: OrderedDict[str, float] = OrderedDict()
        self._work: queue.Queue[tuple[_Series, float, dict[str, CompanionSeries | None]]
                                | None] = queue.Queue()
        self._companions = CompanionStore()
        # released saturation series waiting for companions: key -> (series, released, deadline)
        self._waiting: dict[str, tuple[_Series, float, float]] = {}
        self._stopping = False
        self._timer: threading.Thread | None = None
        self._worker: threading.Thread | None = None

    # ------------------------------------------------------------------ lifecycle
    def start(self) -> Assembler:
        """Start the timer and worker threads (idempotent)."""
        if self._timer is None:
            self._stopping = False
            self._timer = threading.Thread(target=self._timer_loop, name="cest-assemble-timer",
                                           daemon=True)
            self._worker = threading.Thread(target=self._worker_loop,
                                            name="cest-assemble-worker", daemon=True)
            self._timer.start()
            self._worker.start()
        return self

    def stop(self, *, timeout: float = 30.0) -> None:
        """Stop the threads; series already queued are finished first, open ones stay open."""
        with self._cond:
            self._stopping = True
            self._cond.notify_all()
        if self._timer is not None:
            self._timer.join(timeout)
        if self._worker is not None:
            self._work.put(None)
            self._worker.join(timeout)
        self._timer = self._worker = None

    def __enter__(self) -> Assembler:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # ------------------------------------------------------------------ intake
    def match(self, ds: Dataset) -> Protocol | None:
        """The first protocol whose match rule fits ``ds`` (None: ignore the instance)."""
        for proto in self.config.protocols:
            text = _match_text(ds, proto.match.attribute)
            if text is not None and proto.match.pattern.search(text):
                return proto
        return None

    def match_companion(self, ds: Dataset) -> tuple[Protocol, CompanionRule] | None:
        """The first protocol companion rule that fits ``ds`` (tried before the protocols'
        own match rules, which are usually broader)."""
        for proto in self.config.protocols:
            for rule in proto.companions:
                text = _match_text(ds, rule.match.attribute)
                if text is not None and rule.match.pattern.search(text):
                    return proto, rule
        return None

    def prepare(self, ds: Dataset) -> Prepared | None:
        """Match, read the header rules and decode the pixels of one instance (no state).

        Returns None when no protocol matches. Safe to call from any thread; the receiver
        calls it before writing the instance to the spool. An instance of a companion series
        (:mod:`node.companion`) gives a Prepared with ``companion`` set.

        Raises
        ------
        AssemblyError
            A header the protocol needs is missing or wrong, or the pixels cannot be decoded.
        """
        found = self.match_companion(ds)
        rule = found[1] if found is not None else None
        proto = found[0] if found is not None else self.match(ds)
        if proto is None:
            return None
        # the UIDs from their raw bytes where plain (header_uid), else through pydicom
        try:
            study = header_uid(ds, 0x0020000D, "StudyInstanceUID")
            series = header_uid(ds, 0x0020000E, "SeriesInstanceUID")
            sop = header_uid(ds, 0x00080018, "SOPInstanceUID")
        except AttributeError as exc:
            raise AssemblyError(f"{exc.name or 'a UID'}: missing") from None
        if _PIXEL_DATA not in ds._dict:
            raise AssemblyError("PixelData: missing")
        fast_rows, fast_cols = _us_value(ds, 0x00280010), _us_value(ds, 0x00280011)
        if fast_rows is not None and fast_cols is not None:
            rows, cols = fast_rows, fast_cols
        else:
            try:
                rows, cols = int(ds.Rows), int(ds.Columns)
            except (AttributeError, TypeError, ValueError):
                raise AssemblyError("Rows/Columns: missing or not integers") from None
        if rows < 1 or cols < 1:
            raise AssemblyError(f"Rows/Columns: {rows} x {cols} is empty")
        physical = rule is not None and rule.kind in ("t1", "b1")
        pixels = _decode_pixels(ds, modality=not physical, rows=rows, cols=cols)
        multi = _PER_FRAME in ds._dict
        fast_in = _raw_int(ds, 0x00200013)
        instance_number = (fast_in if fast_in is not None
                           else int(ds.get("InstanceNumber", 0) or 0))
        frames: list[Frame] = []
        cframes: list[CompanionFrame] = []
        units = ""
        orientation: tuple[float, ...] = ()
        header = _header_only(ds)
        for i in range(pixels.shape[0]):
            fi = i if multi else None
            position, orient = slice_geometry(ds, frame_index=fi)
            if orientation and not _same_orientation(orient, orientation):
                raise AssemblyError("ImageOrientationPatient: differs between frames")
            orientation = orient
            if rule is not None:
                cands = _candidates(ds, fi)
                ipp = tuple(float(v) for v in _find(cands, keyword="ImagePositionPatient"))
                if physical:
                    img, units = to_physical(pixels[i], cands, rule)
                else:
                    img = pixels[i]
                    if multi:
                        img = self._frame_rescale(img, cands)
                off = (read_offset_ppm(ds, rule.offset, frame_index=fi)
                       if rule.offset is not None else math.nan)
                cframes.append(CompanionFrame(position, ipp, img, off))  # type: ignore[arg-type]
                continue
            offset = read_offset_ppm(ds, proto.offset, frame_index=fi)
            img = pixels[i]
            frame_header = None
            if multi:
                cands = _candidates(ds, fi)
                img = self._frame_rescale(img, cands)
                frame_header = _frame_header(header, cands, i + 1)
            frames.append(Frame(offset, position, img, (instance_number, str(sop), i),
                                frame_number=i + 1 if multi else None, header=frame_header))
        fast_iia = _raw_int(ds, 0x00201002)
        iia = (fast_iia if fast_iia is not None
               else ds.get("ImagesInAcquisition") if tag_key(0x00201002) in ds._dict else None)
        try:
            images = int(iia) if iia not in (None, "") else None
        except (TypeError, ValueError):
            images = None
        return Prepared(series_key(str(study), str(series)), proto, str(sop), header,
                        frames, orientation, rows, cols, images, companion=rule,
                        study_uid=str(study), companion_frames=cframes,
                        spacing=pixel_spacing(ds) if rule is not None else (1.0, 1.0),
                        companion_units=units)

    @staticmethod
    def _frame_rescale(img: np.ndarray, cands: list[Dataset]) -> np.ndarray:
        """Per-frame Rescale Slope/Intercept (Pixel Value Transformation, PS3.3 C.7.6.16.2.9)."""
        slope, icpt = _find(cands[:-1], "RescaleSlope"), _find(cands[:-1], "RescaleIntercept")
        if slope is not None:
            img = img * np.float32(float(slope))
        if icpt is not None:
            img = img + np.float32(float(icpt))
        return img

    def check_fits(self, prep: Prepared) -> None:
        """Raise the :class:`AssemblyError` that :meth:`place` would raise for the matrix
        size or orientation of an instance, without placing it (the receiver checks before
        answering and places after; see :meth:`node.receive.Receiver._store`)."""
        if prep.companion is not None:
            return
        with self._cond:
            s = self._series.get(prep.key)
            if s is not None:
                _check_fits(prep, s)

    def place(self, prep: Prepared) -> Placed:
        """Put a prepared instance's frames into its series (the only stateful step).

        Returns what happened (:class:`Placed`). When the series reaches its expected count it
        is handed to the worker at once.

        Raises
        ------
        AssemblyError
            The instance does not fit its series (matrix size or orientation differs);
            nothing is changed.
        """
        if prep.companion is not None:
            return self._place_companion(prep)
        now_wall, now = time.time(), time.monotonic()
        with self._cond:
            s = self._series.get(prep.key)
            if s is None:
                if prep.key in self._released:
                    log.info("series %s: instance arrived after the series was released; "
                             "ignored", prep.key)
                    return Placed.LATE
                proto = prep.protocol
                expected = proto.expected_count(prep.images_in_acquisition)
                per_slice = (proto.expected_offsets or len(proto.offset.values_ppm)
                             or (expected if expected and expected <= 256 else 64))
                s = _Series(prep.key, proto, prep.rows, prep.cols, prep.orientation, expected,
                            capacity=max(per_slice, 1), first_at=now_wall,
                            study_uid=prep.study_uid)
                self._series[prep.key] = s
                log.info("series %s: new, protocol %s, expecting %s frames", prep.key,
                         proto.name, expected if expected is not None else "an unknown count of")
                new_series = True
            else:
                new_series = False
            _check_fits(prep, s)
            if prep.sop_instance_uid in s.sops:
                log.info("series %s: duplicate instance ignored (first kept)", s.key)
                return Placed.DUPLICATE
            s.sops.add(prep.sop_instance_uid)
            for fr in prep.frames:
                sl = s.slice_for(fr.position_mm)
                if sl.count == sl.stack.shape[0]:
                    grown = np.empty((2 * sl.stack.shape[0], s.rows, s.cols), np.float32)
                    grown[: sl.count] = sl.stack
                    sl.stack = grown
                sl.stack[sl.count] = fr.pixels
                sl.offsets.append(fr.offset_ppm)
                sl.ties.append(fr.tiebreak)
                sl.headers.append(fr.header if fr.header is not None else prep.header)
                s.n_frames += 1
            s.last_at = now_wall
            if s.held:
                log.info("series %s: held series woke up on a new instance", s.key)
                s.held = False
                new_series = True  # the timer may be waiting for nothing: wake it
            s.deadline = now + self.config.idle_timeout_s
            if s.expected is not None and s.n_frames >= s.expected:
                self._on_deadline_locked(s)
            elif new_series:
                self._cond.notify_all()
        return Placed.ADDED

    def _place_companion(self, prep: Prepared) -> Placed:
        """Keep the frames of a companion instance; wake any saturation series waiting."""
        rule = prep.companion
        assert rule is not None
        cs = CompanionSeries(prep.key, prep.study_uid, prep.protocol.name, rule, prep.rows,
                             prep.cols, prep.orientation, prep.spacing,
                             expected=prep.images_in_acquisition,
                             unit_detail=prep.companion_units)
        with self._cond:
            try:
                added = self._companions.add(cs, prep.sop_instance_uid, prep.companion_frames,
                                             time.monotonic())
            except ValueError as exc:
                raise AssemblyError(str(exc)) from None
            if not added:
                log.info("companion series %s: duplicate instance ignored", prep.key)
                return Placed.DUPLICATE
            self._cond.notify_all()
        return Placed.ADDED

    def add(self, ds: Dataset) -> Placed:
        """:meth:`prepare` and :meth:`place` in one call (offline use and tests)."""
        prep = self.prepare(ds)
        if prep is None:
            return Placed.UNMATCHED
        return self.place(prep)

    def hint_release(self, keys: Iterable[str]) -> None:
        """An association that delivered frames of these series was released (a hint only).

        Series of unknown expected size are released ``release_grace_s`` after their last
        frame, unless another frame arrives first; other series keep their idle timeout.
        """
        with self._cond:
            changed = False
            for key in keys:
                s = self._series.get(key)
                if s is not None and s.expected is None:
                    s.released_hint = True
                    grace = time.monotonic() + self.config.release_grace_s
                    if grace < s.deadline:
                        s.deadline = grace
                        changed = True
            if changed:
                self._cond.notify_all()

    def flush(self, *, wait: bool = True, timeout: float | None = None) -> None:
        """Release every open series now (as at their idle timeout) and optionally wait.

        Series that cannot be processed are held, as at a timeout. With ``wait``, returns
        once ``on_complete`` has returned for every released series.
        """
        with self._cond:
            for s in list(self._series.values()):
                if not s.held:
                    s.deadline = -math.inf
            for key, (s, at, _) in list(self._waiting.items()):
                self._waiting[key] = (s, at, -math.inf)
            self._cond.notify_all()
        if wait:
            deadline = None if timeout is None else time.monotonic() + timeout
            with self._cond:
                while self._waiting or any(not s.held for s in self._series.values()):
                    left = None if deadline is None else deadline - time.monotonic()
                    if left is not None and left <= 0:
                        raise TimeoutError("flush: series still open")
                    self._cond.wait(left)
            self._work.join()

    def open_series(self) -> dict[str, int]:
        """Open (receiving or held) series: key -> frames so far."""
        with self._cond:
            return {k: s.n_frames for k, s in self._series.items()}

    # ------------------------------------------------------------------ threads
    def _release_locked(self, s: _Series, now_wall: float) -> None:
        del self._series[s.key]
        self._released[s.key] = now_wall
        while len(self._released) > 10000:
            self._released.popitem(last=False)
        if s.protocol.companions:
            wait = max(rule.timeout_s for rule in s.protocol.companions)
            self._waiting[s.key] = (s, now_wall, time.monotonic() + wait)
            self._check_waiting_locked()
        else:
            self._work.put((s, now_wall, {}))
        self._cond.notify_all()

    def _companions_for(self, s: _Series, now: float
                        ) -> tuple[dict[str, CompanionSeries | None], float | None]:
        """The ready companion of each kind (None when absent), and when to look again.

        The second value is None when every kind is ready, else the soonest time (monotonic)
        a kind's state may change on its own (a companion turning ready by quiet time, or the
        kind's timeout).
        """
        out: dict[str, CompanionSeries | None] = {}
        again: list[float] = []
        released = self._released.get(s.key, time.time())
        waited = time.time() - released
        for rule in s.protocol.companions:
            comp = self._companions.find(s.study_uid, s.protocol.name, rule.kind)
            if comp is not None and comp.ready(now, self.config.release_grace_s):
                out[rule.kind] = comp.snapshot()
                continue
            out[rule.kind] = None
            if waited < rule.timeout_s:
                again.append(now + rule.timeout_s - waited)
                if comp is not None:
                    again.append(comp.ready_at(self.config.release_grace_s))
        return out, (min(again) if again else None)

    def _check_waiting_locked(self) -> float | None:
        """Hand on the waiting series whose companions are all ready or timed out; returns the
        soonest time (monotonic) another check is due, None when nothing waits."""
        now = time.monotonic()
        due: list[float] = []
        for key, (s, at, deadline) in list(self._waiting.items()):
            found, again = self._companions_for(s, now)
            if again is None or deadline <= now:
                del self._waiting[key]
                have = sorted(k for k, v in found.items() if v is not None)
                log.info("series %s: companions %s", key, ", ".join(have) or "none")
                self._work.put((s, at, found))
                self._cond.notify_all()
            else:
                due.append(min(again, deadline))
        return min(due) if due else None

    def _timer_loop(self) -> None:
        with self._cond:
            while not self._stopping:
                now = time.monotonic()
                due = [s for s in self._series.values() if not s.held and s.deadline <= now]
                for s in due:
                    self._on_deadline_locked(s)
                pending = [s.deadline for s in self._series.values() if not s.held]
                if self._waiting:
                    nxt = self._check_waiting_locked()
                    if nxt is not None:
                        pending.append(max(nxt, time.monotonic() + 0.01))
                wait = (min(pending) - time.monotonic()) if pending else None
                if wait is None or wait > 0:
                    self._cond.wait(wait)

    def _on_deadline_locked(self, s: _Series) -> None:
        complete, missing, processable = _assess(s)
        if complete or processable:
            self._release_locked(s, time.time())
            return
        s.held = True
        log.warning("series %s: held, cannot be processed: %s", s.key, missing)
        self._cond.notify_all()
        if self.on_held is not None:
            try:
                self.on_held(s.key, missing)
            except Exception:
                log.exception("series %s: on_held callback failed", s.key)

    def _worker_loop(self) -> None:
        while True:
            item = self._work.get()
            try:
                if item is None:
                    return
                s, released_at, found = item
                try:
                    result = _finish(s, released_at)
                    if s.protocol.companions:
                        attach(result, s.protocol, found)
                        for note in result.companion_notes:
                            log.warning("series %s: %s", s.key, note)
                except Exception:
                    log.exception("series %s: assembly failed", s.key)
                    continue
                if result.complete:
                    log.info("series %s: complete, %d frames, %d slices x %d offsets", s.key,
                             result.instance_count, result.signal.shape[0],
                             result.signal.shape[-1])
                else:
                    log.warning("series %s: released incomplete after the idle timeout: %s",
                                s.key, result.missing)
                try:
                    self.on_complete(result)
                except Exception:
                    log.exception("series %s: on_complete failed", s.key)
            finally:
                self._work.task_done()


def _check_fits(prep: Prepared, s: _Series) -> None:
    """The AssemblyError of an instance whose matrix size or orientation is not its series'."""
    if (prep.rows, prep.cols) != (s.rows, s.cols):
        raise AssemblyError(f"Rows/Columns: {prep.rows} x {prep.cols} differs from the "
                            f"series' {s.rows} x {s.cols}")
    if not _same_orientation(prep.orientation, s.orientation):
        raise AssemblyError("ImageOrientationPatient: differs from the series'")


# --------------------------------------------------------------------------- finishing
def _clusters(values: list[float]) -> list[float]:
    """Distinct offsets (within OFFSET_TOLERANCE_PPM), ascending."""
    out: list[float] = []
    for v in sorted(values):
        if not out or v - out[-1] > OFFSET_TOLERANCE_PPM:
            out.append(v)
    return out


def _cluster_index(centres: list[float], v: float) -> int:
    # bisect on the list: numpy's searchsorted costs a few us per call in conversions, and
    # this runs once per frame (1,220 frames: 4 ms) while the series is released
    i = bisect.bisect_left(centres, v - OFFSET_TOLERANCE_PPM)
    while i < len(centres) - 1 and centres[i] < v - OFFSET_TOLERANCE_PPM:
        i += 1
    return min(i, len(centres) - 1)


def _layout(s: _Series) -> tuple[list[float], list[list[int]], list[list[list[int]]]]:
    """Distinct offsets, columns per distinct offset, and per slice the frames per offset."""
    centres = _clusters([o for sl in s.slices for o in sl.offsets])
    per_slice: list[list[list[int]]] = []
    for sl in s.slices:
        groups: list[list[int]] = [[] for _ in centres]
        for i, o in enumerate(sl.offsets):
            groups[_cluster_index(centres, o)].append(i)
        for g in groups:
            g.sort(key=sl.ties.__getitem__)  # repeats: by instance number, then UID
        per_slice.append(groups)
    mult = [max((len(g[c]) for g in per_slice), default=0) for c in range(len(centres))]
    columns: list[list[int]] = []
    col = 0
    for m in mult:
        columns.append(list(range(col, col + m)))
        col += m
    return centres, columns, per_slice


def _assess(s: _Series, layout: tuple[list[float], list[list[int]], list[list[list[int]]]]
            | None = None) -> tuple[bool, str, bool]:
    """(complete, missing text, processable) of an open series at its deadline (``layout``:
    :func:`_layout` of the series, when the caller has it)."""
    proto = s.protocol
    centres, columns, per_slice = _layout(s) if layout is None else layout
    order = sorted(range(len(s.slices)), key=lambda i: s.slices[i].position_mm)
    problems: list[str] = []
    if s.expected is not None and s.n_frames < s.expected:
        problems.append(f"{s.n_frames} of {s.expected} expected frames")
    holes: list[str] = []
    for rank, i in enumerate(order):
        lacking = [f"{centres[c]:+.3f}" for c, g in enumerate(per_slice[i])
                   if len(g) < len(columns[c])]
        if lacking:
            shown = ", ".join(lacking[:6]) + (f" and {len(lacking) - 6} more" if len(lacking) > 6
                                              else "")
            holes.append(f"slice {rank} lacks {shown} ppm")
    complete = not problems and not holes
    needed: list[str] = []
    for rank, i in enumerate(order):
        offs = np.asarray(s.slices[i].offsets)
        if (proto.companion("m0") is None
                and not (np.abs(offs) >= proto.m0_threshold_ppm).any()):
            needed.append(f"slice {rank} has no M0 (|offset| >= {proto.m0_threshold_ppm:g} ppm)")
        for req in proto.required_offsets_ppm:
            if not (np.abs(offs - req) <= proto.required_tolerance_ppm).any():
                needed.append(f"slice {rank} lacks required {req:+.2f} ppm")
    processable = not needed
    text = "; ".join(problems + holes[:5] + (["..."] if len(holes) > 5 else []) + needed[:10])
    return complete and processable, text, processable


def _finish(s: _Series, released_at: float) -> AssembledSeries:
    """Order frames by offset and slices by position into an AssembledSeries."""
    layout = _layout(s)
    complete, missing, _ = _assess(s, layout)
    centres, columns, per_slice = layout
    n_cols = sum(len(c) for c in columns)
    order = sorted(range(len(s.slices)), key=lambda i: s.slices[i].position_mm)
    # every slice is written whole below (a slice lacking columns is NaN-filled first)
    signal = np.empty((len(order), s.rows, s.cols, n_cols), np.float32)
    offsets = np.empty(n_cols, np.float64)
    for c, cols in enumerate(columns):
        offsets[cols] = centres[c]
    sources: list[list[Dataset | None]] = []
    references: list[Dataset] = []
    thr = s.protocol.m0_threshold_ppm
    copies: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    for out_i, i in enumerate(order):
        sl = s.slices[i]
        frame_idx: list[int] = []
        col_idx: list[int] = []
        for c, g in enumerate(per_slice[i]):
            frame_idx.extend(g)
            col_idx.extend(columns[c][: len(g)])
        # one gather per slice: (k, rows, cols) -> (rows, cols, k) into the target columns.
        # Where the slice fills every column (a complete series), one tiled copy takes each
        # column from its frame (quant.spectra_from_frames, below): 40 slices of 61 frames of
        # 128 x 128 in 66 ms here, where numpy's gather and transposed copy took 142 ms
        # (medians of 7); this runs after the last instance, on the clinical clock
        if len(col_idx) == n_cols:
            by_col = np.empty(n_cols, np.intp)
            by_col[col_idx] = frame_idx
            copies.append((sl.stack, by_col, signal[out_i]))
        else:
            signal[out_i] = np.nan
            signal[out_i][..., col_idx] = np.moveaxis(sl.stack[frame_idx], 0, -1)
        row: list[Dataset | None] = [None] * n_cols
        for fi, ci in zip(frame_idx, col_idx, strict=True):
            row[ci] = sl.headers[fi]
        sources.append(row)
        m0 = [fi for fi, ci in zip(frame_idx, col_idx, strict=True) if abs(offsets[ci]) >= thr]
        references.append(sl.headers[m0[0] if m0 else frame_idx[0]])

    def copy(lo: int, hi: int) -> None:
        for stack, by_col, out in copies[lo:hi]:
            spectra_from_frames(stack, by_col, out)

    in_parts(len(copies), copy, min_rows=1)  # slices on the free cores (quant.parts)
    return AssembledSeries(
        key=s.key,
        protocol=s.protocol.name,
        signal=signal,
        offsets_ppm=offsets,
        references=references,
        sources=sources,
        complete=complete,
        missing="" if complete else missing,
        clock={"first_instance": s.first_at, "last_instance": s.last_at,
               "complete": released_at},
        instance_count=len(s.sops),
    )

