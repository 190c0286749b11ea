"""node.receive + node.spool with real peers: DCMTK storescu/echoscu and a pynetdicom SCU.

Everything runs on 127.0.0.1 with OS-assigned ports; the receiver is stopped in teardown.
"""

from __future__ import annotations

import logging
import random
import stat
import threading
from pathlib import Path

import numpy as np
import pytest
from pydicom import dcmread
from pydicom.uid import MRImageStorage
from pynetdicom import AE

from node.config import parse_config
from node.receive import (
    STATUS_BAD_HEADER,
    STATUS_SOP_MISMATCH,
    Receiver,
)
from node.spool import SCHEMA_VERSION
from node.synth import series_from_arrays, write_series
from tests.peers import echoscu, storescu

pytestmark = pytest.mark.peers

OFFSETS = [-300.0, 3.5, -3.5, 1.0, -1.0]
SLICES = 2
# unique strings: if any reaches a log line, patient data leaked (issue: no patient data in logs)
PATIENT = {"patient_name": "ZQXNAME^UNIQUE", "patient_id": "ZQXID4711",
           "patient_birth_date": "19010203", "accession_number": "ZQXACC99"}


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


def _signal():
    return np.random.default_rng(3).random((SLICES, 8, 8, len(OFFSETS))).astype(np.float32)


class _Collect:
    def __init__(self):
        self.series = []
        self.event = threading.Event()

    def __call__(self, s):
        self.series.append(s)
        self.event.set()


@pytest.fixture
def node(tmp_path):
    got = _Collect()
    rx = Receiver(_cfg(tmp_path, allowed_calling_aets=["SCANNER1"]), got).start()
    try:
        yield rx, got
    finally:
        rx.stop()


def test_storescu_series_lands_in_spool_and_assembles(tmp_path, node, caplog):
    caplog.set_level(logging.DEBUG)
    rx, got = node
    dss = series_from_arrays(_signal(), OFFSETS, scale=3000.0, **PATIENT)
    files = write_series(dss, tmp_path / "src")
    random.Random(5).shuffle(files)  # scrambled arrival order
    storescu(rx.port, files)  # TCP_NODELAY=1 in the peer's environment (tests/peers.py)
    assert got.event.wait(10), "series not assembled"
    (s,) = got.series
    assert s.complete and s.signal.shape == (SLICES, 8, 8, len(OFFSETS))
    assert s.offsets_ppm.tolist() == sorted(OFFSETS)
    ref = np.clip(np.rint(_signal() * 3000), 0, 65535).astype(np.uint16).astype(np.float32)
    np.testing.assert_array_equal(s.signal, ref[..., np.argsort(OFFSETS)])
    # spool: one 0600 file per instance in a 0700 folder, readable back as the same instance
    paths = rx.spool.instance_paths(s.key)
    assert len(paths) == len(files)
    assert stat.S_IMODE(rx.spool.root.stat().st_mode) == 0o700
    assert stat.S_IMODE(paths[0].parent.stat().st_mode) == 0o700
    assert {stat.S_IMODE(p.stat().st_mode) for p in paths} == {0o600}
    by_uid = {d.SOPInstanceUID: d for d in dss}
    for p in paths:
        back = dcmread(p)
        assert back.PixelData == by_uid[back.SOPInstanceUID].PixelData
    rec = rx.spool.series(s.key)
    assert rec is not None and (rec.state, rec.n_instances, rec.protocol) == ("complete", 10, "apt")
    assert rx.spool.schema_version == SCHEMA_VERSION
    text = caplog.text + "".join(str(r.args) for r in caplog.records)
    for value in PATIENT.values():
        assert value not in text
    assert s.key in caplog.text


def test_echoscu_and_unknown_calling_ae(tmp_path, node):
    rx, _ = node
    assert echoscu(rx.port, calling_ae="SCANNER1") == 0
    assert echoscu(rx.port, calling_ae="INTRUDER") != 0
    files = write_series(series_from_arrays(_signal(), OFFSETS), tmp_path / "src")
    res = storescu(rx.port, files[:1], calling_ae="INTRUDER", check=False)
    assert res.returncode != 0
    # pynetdicom SCU: A-ASSOCIATE-RJ, not an accepted-then-failed association
    ae = AE(ae_title="INTRUDER")
    ae.add_requested_context(MRImageStorage)
    assoc = ae.associate("127.0.0.1", rx.port, ae_title="CESTNODE")
    assert assoc.is_rejected
    assert rx.spool.all_series() == []


def test_unmatched_series_is_acknowledged_and_ignored(tmp_path, node):
    rx, got = node
    dss = series_from_arrays(_signal(), OFFSETS, series_description="T2 FLAIR axial")
    files = write_series(dss, tmp_path / "src")
    res = storescu(rx.port, files)  # succeeds: every instance answered 0x0000
    assert res.returncode == 0
    rx.assembler.flush(timeout=5)
    assert got.series == []
    assert rx.spool.all_series() == []
    assert not any(rx.spool.root.glob("s-*"))


def test_bad_instances_get_ps37_statuses(tmp_path, node):
    rx, got = node
    dss = series_from_arrays(_signal(), OFFSETS)
    ae = AE(ae_title="SCANNER1")
    ae.add_requested_context(MRImageStorage)
    assoc = ae.associate("127.0.0.1", rx.port, ae_title="CESTNODE")
    assert assoc.is_established
    try:
        nopix = dss[0].copy()
        del nopix.PixelData
        st = assoc.send_c_store(nopix)
        assert st.Status == STATUS_SOP_MISMATCH and "PixelData" in st.ErrorComment
        nooff = dss[1].copy()
        del nooff[0x00290010]  # the private creator: the offset cannot be found
        st = assoc.send_c_store(nooff)
        assert st.Status == STATUS_BAD_HEADER and "missing" in st.ErrorComment
        wrong = dss[2].copy()
        wrong.Rows = 9
        wrong.PixelData = bytes(2 * 9 * 8)
        assert assoc.send_c_store(dss[3]).Status == 0x0000
        st = assoc.send_c_store(wrong)
        assert st.Status == STATUS_SOP_MISMATCH and "Rows/Columns" in st.ErrorComment
        # the node still works: a good instance after the bad ones is stored
        assert assoc.send_c_store(dss[4]).Status == 0x0000
    finally:
        assoc.release()
    (rec,) = rx.spool.all_series()
    assert rec.n_instances == 2
    assert len(rx.spool.instance_paths(rec.key)) == 2
    assert echoscu(rx.port, calling_ae="SCANNER1") == 0
