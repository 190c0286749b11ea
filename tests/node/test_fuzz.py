"""Fuzzing the receive path: hypothesis-made data sets over a real association to a real Node.

Two families of cases, drawn by hypothesis with a fixed derandomised seed and a bounded count:
header mutations (attributes the node reads set to drawn values or deleted, pixel data of a
drawn length) and byte mutations of an encoded data set (bytes overwritten, cut, inserted),
sent exactly as made. Every C-STORE must get a PS3.7 status (PS3.4 B.2.3: success, 0xA700,
0xA900 or the 0xCxxx family), the association must stay usable, and afterwards the node must
answer C-ECHO and process a good series.
"""

from __future__ import annotations

import collections
import io

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydicom import Dataset, dcmread
from pydicom.filebase import DicomBytesIO
from pydicom.filewriter import write_dataset

from tests.node.harness import assert_node_alive, good_series, running_node
from tests.node.test_bad_input import Scu, dataset_bytes, raw_file

pytestmark = pytest.mark.peers

MAX_EXAMPLES = 60  # per family
ALLOWED = {0x0000, 0xA700, 0xA900} | set(range(0xC000, 0xD000))

US = st.integers(0, 65535)
DS = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False, width=32).map(
    lambda x: float(f"{x:.6g}"))
HEADER_FIELDS = {
    "Rows": US | st.sampled_from([0, 1, 16, 17]),
    "Columns": US | st.sampled_from([0, 1, 16, 17]),
    "BitsAllocated": st.sampled_from([1, 8, 12, 16, 32, 64]),
    "BitsStored": st.sampled_from([1, 8, 12, 16, 32]),
    "HighBit": st.integers(0, 31),
    "PixelRepresentation": st.sampled_from([0, 1, 2]),
    "SamplesPerPixel": st.sampled_from([1, 2, 3, 4]),
    "NumberOfFrames": st.integers(0, 100000).map(str),
    "ImagePositionPatient": st.lists(DS, min_size=0, max_size=4),
    "ImageOrientationPatient": st.lists(DS, min_size=0, max_size=7),
    "RescaleSlope": DS,
    "RescaleIntercept": DS,
    "ImagesInAcquisition": st.integers(0, 10**6).map(str),
    "InstanceNumber": st.integers(-(2**31), 2**31 - 1).map(str),
    "SeriesDescription": st.sampled_from(["CEST APT phantom", "CEST APT phantom fuzz", "", "x"]),
}

header_case = st.fixed_dictionaries({}, optional={
    **{k: v | st.none() for k, v in HEADER_FIELDS.items()},  # None deletes the attribute
    "pixel_bytes": st.integers(0, 2048),
    "offset": DS | st.none(),
})

byte_case = st.tuples(
    st.lists(st.tuples(st.floats(0, 1, exclude_max=True), st.integers(0, 255)), max_size=8),
    st.floats(0, 1) | st.none(),  # where to cut (None: no cut)
    st.binary(max_size=16),  # bytes inserted at the first overwrite position
)


def _base(n: int) -> Dataset:
    ds = good_series("fuzz")[n % 12]
    ds.SeriesDescription = "CEST APT phantom fuzz"
    return ds


def _mutate_header(ds: Dataset, case: dict) -> Dataset:
    for name, value in case.items():
        if name == "pixel_bytes":
            ds.PixelData = bytes(value)
        elif name == "offset":
            block = ds.private_block(0x0029, "CESTNODE SIM 1")
            if value is None:
                del ds[block.get_tag(0x10)]
            else:
                block[0x10].value = value
        elif value is None:
            if name in ds:
                delattr(ds, name)
        else:
            setattr(ds, name, value)
    if "PixelData" in ds:
        ds["PixelData"].VR = "OW"  # stays encodable whatever BitsAllocated became
    return ds


def _encode(ds: Dataset) -> bytes:
    fp = DicomBytesIO()
    fp.is_little_endian, fp.is_implicit_VR = True, False
    write_dataset(fp, ds)
    return fp.getvalue()


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fuzz")
    with running_node(tmp, max_rows=512, max_cols=512, max_frames_per_series=200) as (
            nd, archive, collect):
        yield nd, archive, collect, tmp


class _Link:
    """The fuzzer's association, reopened when the node ends one (it never should)."""

    def __init__(self, port: int):
        self.port = port
        self.scu = Scu(port)
        self.reopened = 0

    def ensure(self) -> Scu:
        if not self.scu.assoc.is_established:
            self.reopened += 1
            self.scu = Scu(self.port)
        return self.scu


def test_fuzzed_headers(live):
    nd, archive, collect, tmp = live
    link = _Link(nd.port)
    statuses: collections.Counter[int] = collections.Counter()
    count = [0]

    @settings(max_examples=MAX_EXAMPLES, derandomize=True, deadline=None, database=None,
              suppress_health_check=[HealthCheck.too_slow])
    @given(case=header_case)
    def one(case):
        count[0] += 1
        ds = _mutate_header(_base(count[0]), case)
        ds.SOPInstanceUID = f"2.25.77{count[0]}"
        body = _encode(ds)
        path = raw_file(tmp / "hdr.dcm", body, sop_uid=ds.SOPInstanceUID)
        rsp = link.ensure().store_raw(path)
        status = int(rsp.Status)
        statuses[status] += 1
        assert status in ALLOWED, f"status 0x{status:04X} for {case}"

    try:
        one()
    finally:
        link.scu.close()
    print("fuzz statuses:", {f"0x{k:04X}": v for k, v in sorted(statuses.items())})
    assert link.reopened == 0, "the node ended the fuzzer's association"
    assert count[0] >= MAX_EXAMPLES
    # both accepted and refused cases were drawn (the fuzzer reached past the door)
    assert statuses[0] > 0 and sum(v for k, v in statuses.items() if k) > 0, statuses
    assert_node_alive(nd, archive, collect, tmp, seed="after-header-fuzz")


def test_fuzzed_bytes(live):
    nd, archive, collect, tmp = live
    link = _Link(nd.port)
    statuses: collections.Counter[int] = collections.Counter()
    count = [0]
    template = dataset_bytes(_base(0))

    @settings(max_examples=MAX_EXAMPLES, derandomize=True, deadline=None, database=None,
              suppress_health_check=[HealthCheck.too_slow])
    @given(case=byte_case)
    def one(case):
        count[0] += 1
        flips, cut, inserted = case
        body = bytearray(template)
        for where, value in flips:
            body[int(where * len(body))] = value
        if flips and inserted:
            at = int(flips[0][0] * len(body))
            body[at:at] = inserted
        if cut is not None:
            del body[int(cut * len(body)):]
        uid = f"2.25.88{count[0]}"
        rsp = link.ensure().store_raw(raw_file(tmp / "bytes.dcm", bytes(body), sop_uid=uid))
        status = int(rsp.Status)
        statuses[status] += 1
        assert status in ALLOWED, f"status 0x{status:04X} for {case}"

    try:
        one()
    finally:
        link.scu.close()
    print("fuzz statuses:", {f"0x{k:04X}": v for k, v in sorted(statuses.items())})
    assert link.reopened == 0, "the node ended the fuzzer's association"
    assert count[0] >= MAX_EXAMPLES
    assert sum(v for k, v in statuses.items() if k >= 0xC000) > 0, statuses
    assert_node_alive(nd, archive, collect, tmp, seed="after-byte-fuzz")


def test_a_fuzzed_case_reads_back():
    """The header mutation helper really changes what the node reads (a check of the fuzzer)."""
    ds = _mutate_header(_base(1), {"Rows": 17, "offset": 2.5, "ImagePositionPatient": None})
    back = dcmread(io.BytesIO(_encode(ds)), force=True)
    assert back.Rows == 17 and "ImagePositionPatient" not in back
    assert float(back.private_block(0x0029, "CESTNODE SIM 1")[0x10].value) == 2.5
