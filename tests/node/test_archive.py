"""node.archive (the demo's embedded Storage SCP) with real peers: DCMTK storescu/echoscu and
node.send. Statuses are those of PS3.7 C.4.2.1.4; the file format that of PS3.10 7.1."""

from __future__ import annotations

import struct
import threading
from pathlib import Path

import numpy as np
import pytest
from pydicom import Dataset, dcmread

from node.archive import EmbeddedArchive
from node.send import FAILED, Sender, SendSettings
from node.synth import series_from_arrays, write_series
from node.types import series_key
from tests.peers import echoscu, storescu


def mr_series(seed: str, n_slices: int = 2, n_offsets: int = 4, size: int = 16) -> list[Dataset]:
    rng = np.random.default_rng(3)
    offsets = [-300.0, *np.linspace(-3.5, 3.5, n_offsets - 1)]
    return series_from_arrays(rng.uniform(0.2, 1.0, (n_slices, size, size, n_offsets)), offsets,
                              seed=seed)


def dataset_bytes(path: Path) -> bytes:
    """The encoded data set of a PS3.10 file, after preamble, prefix and file meta group.

    PS3.10 7.1: 128-byte preamble, "DICM", then group 0002 in Explicit VR Little Endian whose
    first element (0002,0000) UL gives the length of the rest of the group.
    """
    raw = path.read_bytes()
    assert raw[128:132] == b"DICM"
    tag_group, tag_elem, vr, length = struct.unpack("<HH2sH", raw[132:140])
    assert (tag_group, tag_elem, vr, length) == (0x0002, 0x0000, b"UL", 4)
    (group_len,) = struct.unpack("<I", raw[140:144])
    return raw[144 + group_len:]


@pytest.mark.peers
def test_storescu_to_archive_files_are_identical(tmp_path: Path) -> None:
    first = mr_series("arch-a")
    second = mr_series("arch-b", n_slices=1, n_offsets=3)
    sent = write_series(first, tmp_path / "a") + write_series(second, tmp_path / "b")
    with EmbeddedArchive(tmp_path / "archive", ae_title="DEMOARCH") as archive:
        storescu(archive.port, sent, called_ae="DEMOARCH")
        assert archive.wait_for(len(sent), timeout_s=10)
        counts = archive.counts()
        files = archive.files()
        assert archive.connections_nodelay == [True]
    key_a = series_key(str(first[0].StudyInstanceUID), str(first[0].SeriesInstanceUID))
    key_b = series_key(str(second[0].StudyInstanceUID), str(second[0].SeriesInstanceUID))
    assert counts == {key_a: len(first), key_b: len(second)}
    for path in sent:
        uid = str(dcmread(path, stop_before_pixels=True).SOPInstanceUID)
        # storescu sends the files' own transfer syntax: the stored data set is byte for byte
        # the one in the sent file
        assert dataset_bytes(files[uid]) == dataset_bytes(path)
    # atomic writes leave no temporary file behind, and file names carry no patient attribute
    stored = [p for p in (tmp_path / "archive").rglob("*") if p.is_file()]
    assert len(stored) == len(sent)
    assert all(p.suffix == ".dcm" and p.parent.name.startswith("s-") for p in stored)


@pytest.mark.peers
def test_echoscu_gets_verification(tmp_path: Path) -> None:
    with EmbeddedArchive(tmp_path / "archive") as archive:
        assert echoscu(archive.port, called_ae=archive.ae_title) == 0


@pytest.mark.peers
def test_sender_to_archive_round_trip(tmp_path: Path) -> None:
    batch = mr_series("arch-c")
    with EmbeddedArchive(tmp_path / "archive") as archive:
        report = Sender(SendSettings(retries=0)).send(batch, archive.address, key="s-c")
        assert report.ok and len(report.attempts) == 1
        assert archive.wait_for(len(batch), timeout_s=10)
        files = archive.files()
        assert archive.received == len(batch)
        assert archive.connections_nodelay == [True]
    for ds in batch:
        back = dcmread(files[str(ds.SOPInstanceUID)])
        assert back.PixelData == ds.PixelData
        assert back.SOPClassUID == ds.SOPClassUID


@pytest.mark.peers
def test_write_failure_answers_out_of_resources_and_is_retried(tmp_path: Path) -> None:
    # A directory where the file should go makes the rename fail: the archive answers 0xA700
    # (PS3.7 C.4.2.1.4 "Refused: Out of Resources"), a transient failure the sender retries a
    # bounded number of times and then reports.
    batch = mr_series("arch-d", n_slices=1, n_offsets=3)
    bad = batch[1]
    key = series_key(str(bad.StudyInstanceUID), str(bad.SeriesInstanceUID))
    blocker = tmp_path / "archive" / key / f"{bad.SOPInstanceUID}.dcm"
    (blocker / "occupied").mkdir(parents=True)
    with EmbeddedArchive(tmp_path / "archive") as archive:
        report = Sender(SendSettings(retries=2, backoff_s=0.01)).send(batch, archive.address)
        failures = archive.failures
    assert (report.sent, report.failed) == (len(batch) - 1, 1)
    item = report.items[1]
    assert item.outcome == FAILED
    assert item.status == 0xA700 and item.attempts == 3
    assert len(report.attempts) == 3 and [a.offered for a in report.attempts] == [3, 1, 1]
    assert failures == 3


def test_wait_for_times_out_without_polling(tmp_path: Path) -> None:
    archive = EmbeddedArchive(tmp_path / "archive")
    archive.start()
    try:
        done = threading.Event()
        result: list[bool] = []

        def waiter() -> None:
            result.append(archive.wait_for(1, timeout_s=0.2))
            done.set()

        threading.Thread(target=waiter).start()
        assert done.wait(5)
        assert result == [False]
        assert archive.wait_for(0, timeout_s=0)
        with pytest.raises(ValueError, match="n must be >= 0"):
            archive.wait_for(-1, timeout_s=1)
        with pytest.raises(RuntimeError, match="already running"):
            archive.start()
    finally:
        archive.stop()
    archive.stop()  # idempotent


def test_bad_arguments_are_named(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="ae_title must be 1 to 16 characters"):
        EmbeddedArchive(tmp_path, ae_title="X" * 17)
    with pytest.raises(ValueError, match="port must be an integer"):
        EmbeddedArchive(tmp_path, port=-1)
