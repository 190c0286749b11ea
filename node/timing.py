"""The series clock and the latency log.

Every stage of a series stamps its clock; when the series is done, one JSON line goes to
``<log_dir>/latency.jsonl``. The line names the series by its pseudonymous key only: no
patient name, ID, birth date or accession number ever reaches it.
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

LATENCY_FILE = "latency.jsonl"


@dataclass
class SeriesClock:
    """Wall-clock marks and stage durations of one series.

    ``marks`` are absolute times (``time.time()``, seconds) of events such as
    ``first_instance``, ``last_instance``, ``complete``, ``last_ack``; ``stages`` are
    durations in milliseconds, in the order they ran.
    """

    key: str
    marks: dict[str, float] = field(default_factory=dict)
    stages: dict[str, float] = field(default_factory=dict)
    info: dict[str, Any] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def mark(self, name: str, when: float | None = None) -> float:
        t = time.time() if when is None else when
        with self._lock:
            self.marks[name] = t
        return t

    def add(self, stage: str, ms: float) -> None:
        with self._lock:
            self.stages[stage] = round(self.stages.get(stage, 0.0) + ms, 3)

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        """Time a block; the duration is added to ``stages[name]`` even if it raises."""
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.add(name, (time.perf_counter() - t0) * 1000.0)

    def since(self, mark: str) -> float:
        """Seconds elapsed since a mark (0 when the mark is missing)."""
        t = self.marks.get(mark)
        return 0.0 if t is None else time.time() - t

    def record(self, *, budget_s: float, **extra: Any) -> dict[str, Any]:
        """The latency-log record of this series."""
        with self._lock:
            marks = dict(self.marks)
            stages = dict(self.stages)
            info = dict(self.info)
        start = marks.get("last_instance")
        end = marks.get("last_ack")
        total_ms = None if start is None or end is None else round((end - start) * 1000.0, 1)
        primary_end = marks.get("primary_ack")
        primary_ms = (
            None if start is None or primary_end is None
            else round((primary_end - start) * 1000.0, 1)
        )
        rec: dict[str, Any] = {
            "series": self.key,
            "logged_at": _iso(time.time()),
            **{f"t_{k}": _iso(v) for k, v in marks.items()},
            "stages_ms": stages,
            "primary_ms": primary_ms,
            "total_ms": total_ms,
            "budget_s": budget_s,
            "budget_met": None if total_ms is None else total_ms <= budget_s * 1000.0,
            **info,
            **extra,
        }
        return rec


def _iso(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(t)) + f".{int((t % 1) * 1000):03d}Z"


class LatencyLog:
    """Append-only JSON-lines latency log, safe to share between threads."""

    def __init__(self, log_dir: str | Path):
        self.path = Path(log_dir) / LATENCY_FILE
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._lock = threading.Lock()

    def write(self, record: dict[str, Any]) -> None:
        line = json.dumps(record, sort_keys=False, default=str)
        with self._lock, open(self.path, "a", encoding="utf-8") as f:
            f.write(line + "\n")

    def read(self) -> list[dict[str, Any]]:
        if not self.path.exists():
            return []
        with open(self.path, encoding="utf-8") as f:
            return [json.loads(ln) for ln in f if ln.strip()]
