"""Archive down: Orthanc is not running when the series arrives and starts later on the same
ports; the outputs wait in the outbox, are retried with back-off (each attempt logged), and
all arrive, none twice. Real node, real storescu, real Orthanc on loopback."""

from __future__ import annotations

import logging
import threading
import time

import pytest

from node.config import load_config
from node.service import Node, SeriesOutcome
from node.status import read_status
from tests.node.test_recovery import (
    SLICES,
    expected_series,
    make_series,
    orthanc_counts,
    wait_counts,
    write_config,
)
from tests.peers import Orthanc, free_port, storescu

pytestmark = pytest.mark.peers

# pynetdicom 3.0.4 drops its socket unclosed when a connection is refused (see test_send.py);
# only that warning is ignored, in the tests that send to a closed port.
ignore_refused_socket_leak = pytest.mark.filterwarnings(
    "ignore:Exception ignored in. <socket.socket:pytest.PytestUnraisableExceptionWarning"
)


@ignore_refused_socket_leak
def test_outputs_wait_for_the_archive_and_arrive_once(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="cest_node.outbox")
    files, uid, key = make_series(tmp_path, "archive-down")
    orthanc = Orthanc(tmp_path / "orthanc", dicom_port=free_port(), http_port=free_port())
    methods = ["mtr_asym", "apt_star"]
    cfg = load_config(write_config(tmp_path / "node" / "node.toml", dest_port=orthanc.dicom_port,
                                   methods=methods, backoff_s=0.2, backoff_max_s=0.8))
    done = threading.Event()
    outcomes: list[SeriesOutcome] = []

    def on_outcome(o: SeriesOutcome) -> None:
        outcomes.append(o)
        done.set()

    expected = expected_series(uid, methods, SLICES)
    n = sum(expected.values())
    with Node(cfg, on_outcome=on_outcome) as node:
        storescu(node.port, files)
        assert done.wait(30)
        assert outcomes[0].record["unsent"] == n  # nothing acknowledged: all in the outbox
        time.sleep(1.5)  # several retries (0.2 s doubling to 0.8 s, with jitter)
        st = read_status(cfg)
        assert st.outbox["retrying"] + st.outbox["sending"] == n and st.outbox["sent"] == 0
        assert st.recent[0].key == key and st.recent[0].outcome in ("retrying", "sending")
        with orthanc:
            assert wait_counts(orthanc, expected) == expected
            time.sleep(1.0)  # a late duplicate send would show here
            assert orthanc_counts(orthanc) == expected
            assert orthanc.instance_count() == n
        st = read_status(cfg)
    assert st.outbox["sent"] == n and st.outbox["retrying"] == st.outbox["failed"] == 0
    assert st.recent[0].outcome == "done"
    retries = [r.getMessage() for r in caplog.records if "retry in" in r.getMessage()]
    assert len(retries) >= 3, retries  # each failed attempt logged with its next wait
    assert all(key in m for m in retries)
