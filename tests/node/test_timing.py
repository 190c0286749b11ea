"""The series clock and the latency log (brief: one JSON line per series, no patient data)."""

from __future__ import annotations

import json

from node.timing import LatencyLog, SeriesClock


def test_record_measures_from_last_instance_to_last_ack(tmp_path):
    clock = SeriesClock("s-0123456789abcdef")
    clock.mark("first_instance", 1000.0)
    clock.mark("last_instance", 1002.0)
    clock.mark("primary_ack", 1002.5)
    clock.mark("last_ack", 1003.25)
    with clock.stage("b0"):
        pass
    clock.add("send:ARCHIVE", 12.5)
    clock.add("send:ARCHIVE", 2.5)
    rec = clock.record(budget_s=1.0)
    assert rec["total_ms"] == 1250.0
    assert rec["primary_ms"] == 500.0
    assert rec["budget_met"] is False
    assert rec["stages_ms"]["send:ARCHIVE"] == 15.0
    assert "b0" in rec["stages_ms"]
    log = LatencyLog(tmp_path)
    log.write(rec)
    log.write(clock.record(budget_s=10.0))
    lines = (tmp_path / "latency.jsonl").read_text().splitlines()
    assert len(lines) == 2
    assert json.loads(lines[1])["budget_met"] is True
    assert log.read()[0]["series"] == "s-0123456789abcdef"


def test_stage_is_recorded_even_when_the_block_raises():
    clock = SeriesClock("s-x")
    try:
        with clock.stage("derive"):
            raise RuntimeError("boom")
    except RuntimeError:
        pass
    assert clock.stages["derive"] >= 0.0
    assert clock.record(budget_s=1.0)["total_ms"] is None
