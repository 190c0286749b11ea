"""node.receive.framing_problem: the element chain of a data set as sent, checked without
decoding it (pydicom reads a truncated data set without complaint).

Sources: PS3.5 7.1 (element encoding), 7.5 (sequences and items, delimiters), A.4
(encapsulated pixel data: a Basic Offset Table item, then fragment items of bytes, closed by a
Sequence Delimitation Item). The data sets are pydicom's own encodings.
"""

from __future__ import annotations

import numpy as np
from pydicom import Dataset
from pydicom.encaps import encapsulate
from pydicom.sequence import Sequence
from pynetdicom.dsutils import encode

from node.receive import framing_problem
from node.synth import series_from_arrays


def _encapsulated() -> bytes:
    ds = series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1]
    # fragments that would read as garbage elements if walked as a data set
    ds.PixelData = encapsulate([b"\xfe\xff\x00\xe0\x10\x00\x00\x00" * 4, b"\x10\x00" * 9])
    ds["PixelData"].VR = "OB"
    ds["PixelData"].is_undefined_length = True
    return encode(ds, False, True)


def test_encapsulated_pixel_data_is_framed_whole():
    data = _encapsulated()
    assert framing_problem(data, implicit=False) == ""


def test_a_cut_fragment_or_a_missing_delimiter_is_named():
    data = _encapsulated()
    assert "sequence delimiter" in framing_problem(data[:-8], implicit=False)
    assert "fragment cut short" in framing_problem(data[:-14], implicit=False)


def test_sequences_and_a_cut_header():
    ds = series_from_arrays(np.ones((1, 4, 4, 2), np.float32), [-300.0, 3.5])[1]
    ds.ReferencedImageSequence = Sequence([Dataset()])
    ds.ReferencedImageSequence[0].ReferencedSOPInstanceUID = "1.2.3.4"
    for implicit in (False, True):
        data = encode(ds, implicit, True)
        assert framing_problem(data, implicit=implicit) == ""
        cut = data[:len(data) - len(ds.PixelData) - 5]  # inside the Pixel Data header
        assert framing_problem(cut, implicit=implicit)
