"""Resources: the free-space guard of the spool and the limit on simultaneous associations.

Real Node / Receiver on loopback, DCMTK storescu and pynetdicom SCUs. PS3.4 B.2.3: 0xA700 is
"Refused: Out of Resources"; PS3.8 9.3.4: an A-ASSOCIATE-RJ with result transient, source
DUL presentation, reason "local limit exceeded" is the refusal of one association too many.
"""

from __future__ import annotations

import logging
import re
import shutil
import time

import pytest
from pydicom.uid import ExplicitVRLittleEndian, MRImageStorage
from pynetdicom import AE
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node.receive import STATUS_OUT_OF_RESOURCES, STATUS_SUCCESS, Receiver
from node.synth import write_series
from tests.node.harness import (
    SCANNER,
    assert_node_alive,
    good_series,
    node_config,
    running_node,
    series_key_of,
)
from tests.peers import storescu

pytestmark = pytest.mark.peers


def _leftovers(spool_root):
    """Instance files and temporary files anywhere in the spool."""
    return sorted(p.name for p in spool_root.rglob("*") if p.suffix in (".dcm", ".tmp"))


def test_below_min_free_space_instances_get_a700_and_nothing_partial_is_left(tmp_path):
    with running_node(tmp_path) as (nd, archive, collect):
        rx = nd.receiver
        free_mb = shutil.disk_usage(rx.spool.root).free / 2**20
        guard_on = rx.config.with_overrides(min_free_mb=free_mb + 10**6)  # more than is free
        guard_off = rx.config
        dss = good_series("disk")
        files = write_series(dss, tmp_path / "scanner")
        key = series_key_of(dss[0])
        # the first half arrives while there is room
        storescu(nd.port, files[:6], calling_ae=SCANNER)
        assert len(rx.spool.instance_paths(key)) == 6
        # the disk "fills": the threshold is now above the free space
        rx.config = guard_on
        res = storescu(nd.port, files[6:], calling_ae=SCANNER, extra=["-nh", "-v"], check=False)
        responses = re.findall(r"Received Store Response \(([^)]*)\)", res.stdout + res.stderr)
        assert responses == ["Refused: OutOfResources"] * 6, responses
        # nothing of the refused instances anywhere: 6 files, 6 index rows, no temporary file
        assert len(_leftovers(rx.spool.root)) == 6
        rec = rx.spool.series(key)
        assert rec is not None and rec.n_instances == 6
        assert nd.receiver.assembler.open_series()[key] == 6
        # room again: the scanner re-sends the refused half and the series is processed
        rx.config = guard_off
        storescu(nd.port, files[6:], calling_ae=SCANNER)
        out = collect.wait_for(lambda os: any(o.key == key for o in os))
        (mine,) = [o for o in out if o.key == key]
        assert mine.ok and mine.record["instances"] == len(dss)
        archive.wait_for(1)


def test_a_new_series_below_min_free_space_leaves_no_trace(tmp_path, caplog):
    caplog.set_level(logging.ERROR, logger="cest_node.receive")
    cfg = node_config(tmp_path, min_free_mb=10**9)  # a petabyte: never free here
    with Receiver(cfg, lambda s: None) as rx:
        ae = AE(ae_title=SCANNER)
        ae.add_requested_context(MRImageStorage, ExplicitVRLittleEndian)
        ae.add_requested_context(Verification)
        assoc = ae.associate("127.0.0.1", rx.port, ae_title="CESTNODE")
        try:
            for ds in good_series("disk-new")[:3]:
                rsp = assoc.send_c_store(ds)
                assert rsp.Status == STATUS_OUT_OF_RESOURCES
                assert "min_free_mb" in rsp.ErrorComment
            assert assoc.send_c_echo().Status == STATUS_SUCCESS  # Verification still works
        finally:
            assoc.release()
        assert rx.spool.all_series() == []
        assert _leftovers(rx.spool.root) == []
        assert not [p for p in rx.spool.root.iterdir() if p.is_dir()]
    assert "below min_free_mb" in caplog.text


def _scu() -> AE:
    ae = AE(ae_title=SCANNER)
    ae.add_requested_context(MRImageStorage, ExplicitVRLittleEndian)
    return ae


def test_associations_beyond_the_limit_are_rejected(tmp_path, caplog):
    caplog.set_level(logging.WARNING, logger="cest_node.receive")
    with running_node(tmp_path, max_associations=2) as (nd, archive, collect):
        held = [_scu().associate("127.0.0.1", nd.port, ae_title="CESTNODE") for _ in range(2)]
        try:
            assert all(a.is_established for a in held)
            # a third and fourth at once: both refused (transient, local limit exceeded)
            extra = [_scu().associate("127.0.0.1", nd.port, ae_title="CESTNODE")
                     for _ in range(2)]
            assert all(a.is_rejected for a in extra)
            files = write_series(good_series("limit"), tmp_path / "limit")
            res = storescu(nd.port, files[:1], calling_ae=SCANNER, check=False)
            assert res.returncode != 0 and "reject" in (res.stdout + res.stderr).lower()
            # the held associations still work
            for a in held:
                assert a.send_c_store(good_series("held")[0]).Status == STATUS_SUCCESS
        finally:
            for a in held:
                a.release()
        assert "too many associations" in caplog.text
        # pynetdicom counts an association until its thread has ended, which is a moment after
        # the release: wait for that (bounded) before the next scanner comes
        deadline = time.monotonic() + 10
        while nd.receiver._ae.active_associations and time.monotonic() < deadline:
            time.sleep(0.02)
        assert not nd.receiver._ae.active_associations
        # below the limit again: a scanner gets in and its series is processed
        assert_node_alive(nd, archive, collect, tmp_path, seed="after-limit")
