"""``cest-node status``: what the node holds, read from the spool's index and the latency log.

Three parts: the series in flight (receiving, held, released and not yet processed, or with
a deferred pass to run), the recent series with their outcome and latency, and the outbox
(objects per send state, and which series wait for which destination, retrying or failed).
The index is opened read-only; a running node is not disturbed. Series are named by their
pseudonymous key only.
"""

from __future__ import annotations

import json
import sqlite3
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from node.config import NodeConfig
from node.timing import LatencyLog

__all__ = ["SeriesLine", "StatusReport", "WaitingLine", "format_status", "read_status"]

IN_FLIGHT = ("receiving", "held", "complete", "incomplete", "deferring")
DONE = ("processed", "failed")


@dataclass
class SeriesLine:
    """One series."""

    key: str
    protocol: str
    state: str
    instances: int
    expected: int | None
    last_instance_at: float
    detail: str = ""
    error: str = ""
    outcome: str = ""  # done, sending, retrying, failed, processing failed
    primary_ms: float | None = None
    total_ms: float | None = None
    sends: dict[str, int] = field(default_factory=dict)


@dataclass
class WaitingLine:
    """Objects of one series not yet stored at one destination."""

    key: str
    destination: str
    state: str  # retrying or failed (or pending/sending while a send runs)
    objects: int
    attempts: int
    next_at: float | None
    detail: str


@dataclass
class StatusReport:
    """What :func:`read_status` found."""

    spool_dir: str
    schema: int
    in_flight: list[SeriesLine] = field(default_factory=list)
    recent: list[SeriesLine] = field(default_factory=list)
    outbox: dict[str, int] = field(default_factory=dict)
    waiting: list[WaitingLine] = field(default_factory=list)

    def to_json(self) -> str:
        return json.dumps(asdict(self), indent=1)


def _connect(path: Path) -> sqlite3.Connection:
    if not path.exists():
        raise ValueError(f"status: no spool index at {path} (has the node run with this "
                         "config?)")
    return sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10.0)


def _outcome(state: str, sends: dict[str, int]) -> str:
    if state == "failed":
        return "processing failed"
    if sends.get("failed"):
        return "send failed"
    if sends.get("retrying"):
        return "retrying"
    if sends.get("pending") or sends.get("sending"):
        return "sending"
    if state == "deferring":
        return "deferred pass"
    return "done" if sends else ("done, no output" if state == "processed" else state)


def read_status(config: NodeConfig, *, recent: int = 10) -> StatusReport:
    """Read the spool's index (read-only) and the latency log of ``config``."""
    db = _connect(Path(config.spool_dir) / "index.sqlite")
    try:
        schema = int(db.execute("PRAGMA user_version").fetchone()[0])
        if schema < 2:
            raise ValueError(f"status: the spool index has schema {schema}; a node of this "
                             "version has to open it once (it migrates it)")
        report = StatusReport(str(config.spool_dir), schema)
        sends: dict[str, dict[str, int]] = {}
        for key, state, n in db.execute(
                "SELECT o.series_key, s.state, COUNT(*) FROM sends s JOIN outputs o "
                "ON o.sop_uid = s.sop_uid GROUP BY o.series_key, s.state"):
            sends.setdefault(key, {})[state] = int(n)
        cols = ("key, protocol, state, n_instances, expected, last_at, detail, error")
        marks = ",".join("?" * len(IN_FLIGHT))
        for row in db.execute(f"SELECT {cols} FROM series WHERE state IN ({marks}) "
                              "ORDER BY first_at", IN_FLIGHT):
            line = SeriesLine(*row)
            line.sends = sends.get(line.key, {})
            line.outcome = _outcome(line.state, line.sends)
            report.in_flight.append(line)
        marks = ",".join("?" * len(DONE))
        for row in db.execute(f"SELECT {cols} FROM series WHERE state IN ({marks}) "
                              "ORDER BY processed_at DESC LIMIT ?", (*DONE, recent)):
            line = SeriesLine(*row)
            line.sends = sends.get(line.key, {})
            line.outcome = _outcome(line.state, line.sends)
            report.recent.append(line)
        report.outbox = {s: 0 for s in ("pending", "sending", "sent", "retrying", "failed")}
        for state, n in db.execute("SELECT state, COUNT(*) FROM sends GROUP BY state"):
            report.outbox[state] = int(n)
        for row in db.execute(
                "SELECT o.series_key, s.destination, s.state, COUNT(*), MAX(s.attempts), "
                "MIN(s.next_at), MAX(s.detail) FROM sends s JOIN outputs o ON o.sop_uid = "
                "s.sop_uid WHERE s.state != 'sent' GROUP BY o.series_key, s.destination, "
                "s.state ORDER BY s.state, MIN(s.first_at)"):
            report.waiting.append(WaitingLine(*row))
    finally:
        db.close()
    latency: dict[str, dict[str, Any]] = {}
    for rec in LatencyLog(config.log_dir).read() if Path(config.log_dir).exists() else []:
        if rec.get("pass") != "deferred" and "series" in rec:
            latency[str(rec["series"])] = rec
    for line in report.recent + report.in_flight:
        last = latency.get(line.key)
        if last is not None:
            line.primary_ms, line.total_ms = last.get("primary_ms"), last.get("total_ms")
    return report


def _ago(t: float | None, now: float) -> str:
    if t is None:
        return "-"
    d = t - now
    return f"in {d:.0f} s" if d >= 0 else f"{-d:.0f} s ago"


def _ms(v: float | None) -> str:
    return "-" if v is None else f"{v:.0f} ms"


def format_status(report: StatusReport, *, now: float | None = None) -> str:
    """The report as text for a terminal."""
    now = time.time() if now is None else now
    out = [f"spool {report.spool_dir} (index schema {report.schema})",
           f"series in flight: {len(report.in_flight)}"]
    for s in report.in_flight:
        count = f"{s.instances}/{s.expected}" if s.expected else f"{s.instances}"
        out.append(f"  {s.key}  {s.state:<10} {count:>9} instances  {s.protocol}  last "
                   f"instance {_ago(s.last_instance_at, now)}"
                   + (f"  ({s.detail[:80]})" if s.detail else ""))
    out.append(f"recent series: {len(report.recent)}")
    for s in report.recent:
        sent = s.sends.get("sent", 0)
        total = sum(s.sends.values())
        out.append(f"  {s.key}  {s.outcome:<17} {s.instances:>5} instances  primary "
                   f"{_ms(s.primary_ms):>8}  total {_ms(s.total_ms):>8}  {sent}/{total} "
                   f"objects stored" + (f"  error: {s.error[:80]}" if s.error else ""))
    ob = report.outbox
    out.append("outbox: " + ", ".join(f"{k} {ob.get(k, 0)}" for k in
                                      ("pending", "sending", "retrying", "failed", "sent")))
    for w in report.waiting:
        nxt = f", next try {_ago(w.next_at, now)}" if w.state == "retrying" else ""
        out.append(f"  {w.state:<8} {w.key} -> {w.destination}: {w.objects} objects, "
                   f"{w.attempts} attempts{nxt}" + (f"; {w.detail[:80]}" if w.detail else ""))
    return "\n".join(out)
