"""Data set encoding for the sender: pydicom's own encoder, with each element's bytes kept.

The outputs of one series (a derived MR image or a Secondary Capture per slice, the frames of a
Parametric Map) repeat most of their elements: patient, study, equipment, the same codes and
units. pydicom encodes each of them again for every object, at about 40 us an element here
(``pydicom.filewriter.write_data_element``: a buffer, the writer lookup, the charset conversion
per call): 4 ms a derived MR image of 96 elements, 36 ms a 20-frame Parametric Map. This module
walks a data set as ``pydicom.filewriter.write_dataset`` does (the same order, the same
encoding decisions, the same sequence and item framing, PS3.5 7.1 and 7.5) and writes every
element that is not a sequence through ``write_data_element`` itself, once per distinct
(tag, VR, value, character set, VR form): a later element equal in all of these gets the bytes
written the first time.

An element is kept only when its value is of a type whose encoding depends on nothing but what
the key holds: str, int, float, small bytes, UID, DS and IS (with their original string), and
multi-values of these. Anything else (person names, numpy values, buffered or raw values, large
bulk data) is written by pydicom each time, as before. The result is byte for byte what
``pynetdicom.dsutils.encode`` gives (tested on every output kind the node builds); anything this
walk does not expect raises and the caller uses pynetdicom's encoder instead.

Pure encoding: no files, no sockets.
"""

from __future__ import annotations

from typing import Any

from pydicom import Dataset
from pydicom.charset import convert_encodings, default_encoding
from pydicom.dataelem import DataElement, RawDataElement
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import correct_ambiguous_vr, write_data_element
from pydicom.multival import MultiValue
from pydicom.uid import UID
from pydicom.valuerep import IS, DSdecimal, DSfloat

__all__ = ["encode", "memo_size"]

MEMO_MAX = 50_000
"""Element encodings kept (about 100 bytes each); the memo starts over beyond this."""

_BYTES_MAX = 256  # longer bytes values (bulk data) are written each time, not kept
_ITEM = b"\xfe\xff\x00\xe0"  # (FFFE,E000) Item, little endian
_ITEM_END = b"\xfe\xff\x0d\xe0\x00\x00\x00\x00"  # (FFFE,E00D) Item Delimitation, length 0
_SEQ_END = b"\xfe\xff\xdd\xe0\x00\x00\x00\x00"  # (FFFE,E0DD) Sequence Delimitation, length 0

_memo: dict[tuple[Any, ...], bytes] = {}  # threads share it: each get and set is atomic


def memo_size() -> int:
    """Element encodings kept now."""
    return len(_memo)


def encode(ds: Dataset, implicit_vr: bool) -> bytes:
    """``ds`` encoded in Implicit (``implicit_vr``) or Explicit VR Little Endian, as
    ``pynetdicom.dsutils.encode(ds, implicit_vr, True)`` encodes it; raises where pydicom's
    encoder would, or where the walk meets what it does not expect (the caller then uses
    pydicom's path)."""
    fp = DicomBytesIO()
    fp.is_implicit_VR = implicit_vr
    fp.is_little_endian = True
    _write_dataset(fp, ds, default_encoding)
    if len(_memo) > MEMO_MAX:
        _memo.clear()
    return fp.getvalue()


def _write_dataset(fp: DicomBytesIO, dataset: Dataset, parent_encoding: Any,
                   corrected: bool = False) -> None:
    """``pydicom.filewriter.write_dataset`` (pydicom 3.0) with a fixed little-endian ``fp``.

    ``corrected``: an enclosing data set's ``correct_ambiguous_vr`` has been through this one
    (it walks every nested item), so its second pass here, which pydicom makes and which can
    find nothing left to resolve, is not made again.
    """
    get_item: Any = dataset.get_item
    if ((fp.is_implicit_VR, True) != dataset.original_encoding
            or dataset.original_character_set != dataset._character_set):
        if not corrected:
            dataset = correct_ambiguous_vr(dataset, True)
            corrected = True
        get_item = dataset.__getitem__
    encoding = dataset.get("SpecificCharacterSet", parent_encoding)
    enc_key = tuple(encoding) if isinstance(encoding, list | tuple | MultiValue) else encoding
    implicit = fp.is_implicit_VR
    for tag in sorted(dataset._dict, key=int):  # tag order; int keys: no Python __lt__
        if tag.element == 0 and tag.group > 6:  # retired group lengths (PS3.5 7.2)
            continue
        elem = get_item(tag)
        if type(elem) is RawDataElement:
            write_data_element(fp, elem, encoding)
            continue
        if elem.VR == "SQ":
            _write_sequence(fp, elem, encoding, corrected)
            continue
        value = elem.value
        if (type(value) is bytes and len(value) > _BYTES_MAX and elem.VR in _BULK_VR
                and not elem.is_undefined_length):
            _write_bulk(fp, elem.tag, elem.VR, value)
            continue
        key = _value_key(value)
        if key is None or elem.is_buffered or elem.is_undefined_length:
            write_data_element(fp, elem, encoding)
            continue
        key = (int(tag), elem.VR, implicit, enc_key, key)
        data = _memo.get(key)
        if data is None:
            sub = DicomBytesIO()
            sub.is_implicit_VR = implicit
            sub.is_little_endian = True
            write_data_element(sub, elem, encoding)
            data = sub.getvalue()
            _memo[key] = data
        fp.write(data)


def _write_sequence(fp: DicomBytesIO, elem: DataElement, encoding: Any,
                    corrected: bool) -> None:
    """A sequence element as ``write_data_element`` writes one (PS3.5 7.5): its items encoded
    here (``write_sequence_item``: defined item lengths unless an item asks for undefined),
    then the element's header, with an undefined length when the element has one."""
    encodings = convert_encodings(encoding or [default_encoding])
    body = DicomBytesIO()
    body.is_implicit_VR = fp.is_implicit_VR
    body.is_little_endian = True
    if not elem.is_empty:
        for item in elem.value:
            inner = DicomBytesIO()
            inner.is_implicit_VR = fp.is_implicit_VR
            inner.is_little_endian = True
            _write_dataset(inner, item, encodings, corrected)
            content = inner.getvalue()
            body.write(_ITEM)
            if getattr(item, "is_undefined_length_sequence_item", False):
                body.write_UL(0xFFFFFFFF)
                body.write(content)
                body.write(_ITEM_END)
            else:
                body.write_UL(len(content))
                body.write(content)
    value = body.getvalue()
    undefined = elem.is_undefined_length
    fp.write_tag(elem.tag)
    if not fp.is_implicit_VR:
        fp.write(b"SQ\x00\x00")  # SQ has a 4-byte length after 2 reserved bytes (PS3.5 7.1.2)
    fp.write_UL(0xFFFFFFFF if undefined else len(value))
    fp.write(value)
    if undefined:
        fp.write(_SEQ_END)


_BULK_VR = frozenset({"OB", "OW", "OF", "OD", "OL", "OV"})


def _write_bulk(fp: DicomBytesIO, tag: Any, vr: str, value: bytes) -> None:
    """A long OB/OW/OF/OD/OL/OV value as ``write_data_element`` writes it (its writers
    ``write_OBvalue``/``write_OWvalue``: the bytes, then a NUL to even length), without its
    two intermediate copies of the value."""
    pad = len(value) % 2
    fp.write_tag(tag)
    if not fp.is_implicit_VR:
        fp.write(vr.encode("ascii") + b"\x00\x00")  # a 32-bit length after 2 reserved bytes
    fp.write_UL(len(value) + pad)
    fp.write(value)
    if pad:
        fp.write(b"\x00")


_PLAIN = (str, int, UID)


def _value_key(value: Any) -> tuple[Any, ...] | None:
    """What a value's encoding depends on, hashable; None when the value is not one kept."""
    t = type(value)
    if t in _PLAIN:
        return (t, value)
    if t is float:
        return (t, repr(value))  # repr: -0.0 and 0.0 are equal keys, not equal bytes
    if t is bytes:
        return (t, value) if len(value) <= _BYTES_MAX else None
    if t in (DSfloat, DSdecimal, IS):
        return (t, getattr(value, "original_string", None), str(value))
    if t in (MultiValue, list, tuple):
        keys = []
        for v in value:
            k = _value_key(v)
            if k is None:
                return None
            keys.append(k)
        return ("multi", tuple(keys))
    return None
