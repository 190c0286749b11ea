"""``cest-node status`` on a live node: a series in flight, a recent one with its outcome and
latency, and the outbox, from the spool's index and the latency log (read-only), as text and
as JSON, through the command line."""

from __future__ import annotations

import json
import subprocess
import sys
import threading

import pytest

from node.config import load_config
from node.service import Node
from tests.node.test_recovery import REPO, SLICES, expected_series, make_series, write_config
from tests.peers import StoreSCP, storescu

pytestmark = pytest.mark.peers


def _status(cfg_path, *extra: str) -> str:
    res = subprocess.run([sys.executable, "-m", "node.cli", "status", "--config", str(cfg_path),
                          *extra], cwd=REPO, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr
    return res.stdout


def test_status_lists_in_flight_recent_and_outbox(tmp_path):
    done_files, done_uid, done_key = make_series(tmp_path, "status-done")
    open_files, _uid, open_key = make_series(tmp_path, "status-open", phantom_seed=6)
    done = threading.Event()
    with StoreSCP(tmp_path / "archive") as scp:
        cfg_path = write_config(tmp_path / "node" / "node.toml", dest_port=scp.port,
                                dest_ae=scp.ae_title, methods=["mtr_asym"])
        with Node(load_config(cfg_path), on_outcome=lambda o: done.set()) as node:
            storescu(node.port, done_files)
            assert done.wait(30)
            storescu(node.port, open_files[:50])
            report = json.loads(_status(cfg_path, "--json"))
            text = _status(cfg_path)
    n = sum(expected_series(done_uid, ["mtr_asym"], SLICES).values())
    flight = {s["key"]: s for s in report["in_flight"]}
    assert flight[open_key]["state"] == "receiving"
    assert flight[open_key]["instances"] == 50 and flight[open_key]["expected"] == len(open_files)
    recent = report["recent"][0]
    assert recent["key"] == done_key and recent["state"] == "processed"
    assert recent["outcome"] == "done" and recent["sends"] == {"sent": n}
    assert recent["instances"] == len(done_files)
    # latency from the latency log, the same figure the node wrote there
    rec = json.loads((tmp_path / "node" / "logs" / "latency.jsonl").read_text().splitlines()[0])
    assert recent["primary_ms"] == rec["primary_ms"] is not None
    assert report["outbox"]["sent"] == n and report["waiting"] == []
    assert f"{open_key}  receiving" in text and f"50/{len(open_files)} instances" in text
    assert f"{done_key}  done" in text and f"{n}/{n} objects stored" in text
    assert f"outbox: pending 0, sending 0, retrying 0, failed 0, sent {n}" in text
    # no patient attribute in what status prints (series are named by their key)
    assert "PHANTOM" not in text and "CESTPH" not in text


def test_status_without_a_spool_names_the_problem(tmp_path):
    cfg_path = write_config(tmp_path / "none" / "node.toml", dest_port=104, methods=["mtr_asym"])
    res = subprocess.run([sys.executable, "-m", "node.cli", "status", "--config", str(cfg_path)],
                         cwd=REPO, capture_output=True, text=True, timeout=60)
    assert res.returncode == 1 and "no spool index" in res.stderr
