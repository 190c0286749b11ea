"""node.encoder: the sender's data set encoding, checked byte for byte against pydicom's own
encoder as pynetdicom calls it (``pynetdicom.dsutils.encode``, which ``send_c_store`` uses), on
every output kind the node builds and on values chosen to catch a memo that keys too little.

Reference: pydicom's ``filewriter.write_dataset`` (PS3.5 7.1 element encoding, 7.5 sequences
and items); the comparison is exact bytes, in Explicit and Implicit VR Little Endian.
"""

from __future__ import annotations

import numpy as np
import pytest
from pydicom import Dataset
from pydicom.sequence import Sequence
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian, MRImageStorage
from pynetdicom.dsutils import encode as library_encode

from node import encoder, fastpath
from node.derive import BUILDERS, REPORT_BUILDERS, DerivedRequest
from tests.node.test_derive_reports import make_report_case, make_req


def _same_as_library(datasets: list[Dataset]) -> None:
    for implicit in (False, True):
        for _ in range(2):  # the second pass reads every kept element back from the memo
            for ds in datasets:
                assert encoder.encode(ds, implicit) == library_encode(ds, implicit, True)


@pytest.fixture(scope="module")
def case():
    return make_report_case(slices=3, size=32)


@pytest.mark.parametrize("kind", sorted(BUILDERS))
def test_every_map_output_encodes_as_pydicom_does(case, kind):
    ph, refs, prep, maps = case
    title, unit, values = maps["mtr_asym"]
    req = DerivedRequest(references=refs, values=values, method="mtr_asym", title=title,
                         unit_ucum=unit, series_uid="1.2.826.0.1.3680043.10.7.3",
                         series_number=9103, m0=prep.m0, display_range=(-5.0, 10.0))
    out = BUILDERS[kind](req)
    assert out
    _same_as_library(out)


@pytest.mark.parametrize("kind", sorted(REPORT_BUILDERS))
def test_every_report_output_encodes_as_pydicom_does(case, kind):
    out = REPORT_BUILDERS[kind](make_req(case))
    assert out
    _same_as_library(out)


def _base(**elements) -> Dataset:
    ds = Dataset()
    ds.SOPClassUID = MRImageStorage
    ds.SOPInstanceUID = "1.2.826.0.1.3680043.10.999.5.1"
    for keyword, value in elements.items():
        setattr(ds, keyword, value)
    return ds


def test_values_equal_as_numbers_but_written_differently_are_kept_apart():
    # each pair is equal under Python's == (a memo keyed on the value alone would give the
    # first one's bytes to the second); pydicom writes them differently
    pairs = [
        dict(SliceThickness="1.50"), dict(SliceThickness="1.5"),  # DS keeps its string
        dict(PixelBandwidth=0.0), dict(PixelBandwidth=-0.0),  # FD: the sign bit
        dict(ImagePositionPatient=["0", "1.0", "2"]), dict(ImagePositionPatient=[0, 1, 2]),
        dict(InstanceNumber="0001"), dict(InstanceNumber=1),  # IS keeps its string
        dict(SeriesDescription="pH map"), dict(SeriesDescription="pH map "),
    ]
    datasets = []
    for p in pairs:
        ds = _base(**p)
        if "PixelBandwidth" in p:  # FD (0018,0095) is DS in the dictionary: set it as FD
            ds.add_new(0x00189087, "FD", p["PixelBandwidth"])  # Diffusion b-value, FD
            del ds.PixelBandwidth
        datasets.append(ds)
    _same_as_library(datasets)
    written = [encoder.encode(ds, False) for ds in datasets]
    assert all(written[i] != written[i + 1] for i in range(0, len(written), 2))


def test_the_character_set_is_part_of_what_is_kept():
    # the same text under ISO_IR 100 (Latin-1) and ISO_IR 192 (UTF-8) is different bytes
    # (PS3.5 6.1.2.3, 6.1.2.5)
    a = _base(SpecificCharacterSet="ISO_IR 100", SeriesDescription="Größe")
    b = _base(SpecificCharacterSet="ISO_IR 192", SeriesDescription="Größe")
    _same_as_library([a, b])
    assert encoder.encode(a, False) != encoder.encode(b, False)


def test_sequences_items_and_bulk_data_are_framed_as_pydicom_frames_them():
    inner = Dataset()
    inner.CodeValue = "113076"
    inner.CodingSchemeDesignator = "DCM"
    inner.CodeMeaning = "Segmentation"
    undefined_item = Dataset()
    undefined_item.ReferencedSOPInstanceUID = "1.2.826.0.1.3680043.10.999.5.2"
    undefined_item.is_undefined_length_sequence_item = True
    ds = _base()
    ds.DerivationCodeSequence = Sequence([inner, inner])  # defined-length items
    ds.SourceImageSequence = Sequence([undefined_item])
    ds["SourceImageSequence"].is_undefined_length = True
    ds.ReferencedImageSequence = Sequence([])  # empty
    outer = Dataset()
    outer.PurposeOfReferenceCodeSequence = Sequence([inner])  # nested
    ds.ReferencedSeriesSequence = Sequence([outer])
    ds.add_new(0x00291010, "OB", bytes(range(255)) * 3 + b"\x01")  # odd: padded
    ds.add_new(0x00291020, "OB", b"\x07" * 9)  # short: kept in the memo
    ds.PixelData = np.arange(40 * 40, dtype=np.uint16).tobytes()
    ds["PixelData"].VR = "OW"
    ds.FloatPixelData = np.linspace(0, 1, 300, dtype=np.float32).tobytes()
    _same_as_library([ds])


def test_ambiguous_vr_is_resolved_as_pydicom_resolves_it():
    # (0028,0106) Smallest Image Pixel Value is "US or SS": PixelRepresentation decides
    # (PS3.5 Annex A.1; pydicom's correct_ambiguous_vr)
    ds = _base(PixelRepresentation=1, BitsAllocated=16, BitsStored=16, HighBit=15)
    ds.add_new(0x00280106, "US or SS", -3)
    ds2 = _base(PixelRepresentation=0, BitsAllocated=16, BitsStored=16, HighBit=15)
    ds2.add_new(0x00280106, "US or SS", 3)
    # nested: an item's ambiguous element resolved by its parent's PixelRepresentation
    item = Dataset()
    item.add_new(0x00280107, "US or SS", -2)  # Largest Image Pixel Value
    ds3 = _base(PixelRepresentation=1, BitsAllocated=16, BitsStored=16, HighBit=15)
    ds3.add_new(0x00089124, "SQ", Sequence([item]))  # Derivation Image Sequence
    _same_as_library([ds, ds2, ds3])


def test_the_direct_send_path_encodes_with_it():
    ds = _base(SeriesDescription="x")
    ds.file_meta = fastpath.part10_prefix_and_meta(
        str(MRImageStorage), str(ds.SOPInstanceUID), str(ExplicitVRLittleEndian),
        implementation_class_uid="1.2.826.0.1.3680043.10.999.5", implementation_version="T")[1]
    before = encoder.memo_size()
    assert fastpath.encode_direct(ds) == library_encode(ds, False, True)
    assert encoder.memo_size() > before or before >= encoder.MEMO_MAX
    ds.file_meta.TransferSyntaxUID = ImplicitVRLittleEndian
    assert fastpath.encode_direct(ds) == library_encode(ds, True, True)
