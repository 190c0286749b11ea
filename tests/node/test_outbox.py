"""The outbox's retry policy and its final failure, with a real node and real peers.

A send that never succeeds within ``send_retry_for_s`` is marked failed, logged as an error
and listed by ``cest-node status`` (in-process and through the command line).
"""

from __future__ import annotations

import logging
import random
import subprocess
import sys
import threading
import time

import pytest

from node.config import load_config
from node.outbox import RetryPolicy
from node.service import Node, SeriesOutcome
from node.status import read_status
from tests.node.test_archive_down import ignore_refused_socket_leak
from tests.node.test_recovery import REPO, SLICES, expected_series, make_series, write_config
from tests.peers import free_port, storescu

pytestmark = pytest.mark.peers


def test_backoff_doubles_with_equal_jitter_up_to_the_cap():
    # exponential back-off with "equal jitter": d/2 + U(0, d/2) (common practice, from memory)
    policy = RetryPolicy(retry_for_s=60, backoff_s=1.0, backoff_max_s=8.0)
    rng = random.Random(7)
    for attempt, d in [(1, 1.0), (2, 2.0), (3, 4.0), (4, 8.0), (5, 8.0), (30, 8.0)]:
        waits = [policy.delay(attempt, rng) for _ in range(200)]
        assert d / 2 <= min(waits) and max(waits) <= d
        assert max(waits) - min(waits) > d / 4  # jittered, not one fixed wait
    with pytest.raises(ValueError, match="backoff_max_s must be >= backoff_s"):
        RetryPolicy(backoff_s=5.0, backoff_max_s=1.0)
    with pytest.raises(ValueError, match="attempt must be >= 1"):
        policy.delay(0, rng)


def _run(tmp_path, dest_port: int, **cfg_over):
    files, uid, key = make_series(tmp_path, f"outbox-{dest_port}")
    cfg_path = write_config(tmp_path / "node" / "node.toml", dest_port=dest_port,
                            methods=["mtr_asym"], **cfg_over)
    cfg = load_config(cfg_path)
    done = threading.Event()
    outcomes: list[SeriesOutcome] = []

    def on_outcome(o: SeriesOutcome) -> None:
        outcomes.append(o)
        done.set()

    return files, uid, key, cfg_path, cfg, done, outcomes, on_outcome


@ignore_refused_socket_leak
def test_send_failing_past_the_retry_time_is_marked_failed_and_reported(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="cest_node.outbox")
    files, uid, key, cfg_path, cfg, done, outcomes, on_outcome = _run(
        tmp_path, free_port(), retry_for_s=1.0, backoff_s=0.2, backoff_max_s=0.4)
    n = sum(expected_series(uid, ["mtr_asym"], SLICES).values())
    with Node(cfg, on_outcome=on_outcome) as node:
        storescu(node.port, files)
        assert done.wait(30)
        deadline = time.monotonic() + 15
        while read_status(cfg).outbox["failed"] < n and time.monotonic() < deadline:
            time.sleep(0.1)
    st = read_status(cfg)
    assert st.outbox["failed"] == n and st.outbox["retrying"] == 0
    assert st.recent[0].key == key and st.recent[0].outcome == "send failed"
    assert st.waiting[0].state == "failed" and st.waiting[0].attempts >= 2
    errors = [r for r in caplog.records if r.levelno == logging.ERROR and "FAILED" in r.getMessage()]
    assert errors and key in errors[0].getMessage()
    # and the command line says so too
    res = subprocess.run([sys.executable, "-m", "node.cli", "status", "--config", str(cfg_path)],
                         cwd=REPO, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr
    assert f"failed {n}" in res.stdout and "failed   " + key in res.stdout

