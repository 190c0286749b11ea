"""``cest-node stats``: what the latency log says about a period.

Reads ``latency.jsonl`` (one JSON line per pass of a series, :mod:`node.timing`), keeps the
records of a chosen period, and summarises them: p50, p95 and maximum of every stage and of the
end-to-end figures (``primary_ms``: last instance received to the primary method's outputs
acknowledged; ``total_ms``: to every model-free output acknowledged), the share of series that
kept their budget, and the deferred pass. :func:`plot` draws the end-to-end latency of every
series over time against its budget line, the picture for a QA meeting.

Percentiles are the linear interpolation between order statistics (type 7 of Hyndman & Fan,
"Sample quantiles in statistical packages", Am Stat 1996; numpy's default).
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from node.timing import LATENCY_FILE

__all__ = ["Figures", "Summary", "format_summary", "parse_time", "plot", "read_records",
           "summarize"]


def parse_time(text: str, *, what: str = "time") -> dt.datetime:
    """An ISO 8601 date or date-time as an aware UTC datetime (naive means UTC).

    ``2024-05-01``, ``2024-05-01T08:00``, ``2024-05-01T08:00:00.123Z``, ``...+02:00``.
    """
    t = text.strip()
    if t.endswith("Z"):
        t = t[:-1] + "+00:00"
    try:
        value = dt.datetime.fromisoformat(t)
    except ValueError:
        raise ValueError(f"{what}: {text!r} is not an ISO 8601 date or date-time "
                         "(e.g. 2024-05-01 or 2024-05-01T08:00:00Z)") from None
    if value.tzinfo is None:
        value = value.replace(tzinfo=dt.UTC)
    return value.astimezone(dt.UTC)


def record_time(rec: Mapping[str, Any]) -> dt.datetime | None:
    """When a series' clock started: its last instance (else when the record was logged)."""
    for key in ("t_last_instance", "logged_at"):
        v = rec.get(key)
        if isinstance(v, str):
            try:
                return parse_time(v)
            except ValueError:
                continue
    return None


def read_records(path: str | Path, *, since: dt.datetime | None = None,
                 until: dt.datetime | None = None) -> list[dict[str, Any]]:
    """The records of a latency log within ``[since, until)``, oldest first.

    ``path`` is the log file or the folder holding ``latency.jsonl``. A line that is not a
    JSON object is an error naming its line number (the log is ours; a bad line means damage).
    """
    p = Path(path)
    if p.is_dir():
        p = p / LATENCY_FILE
    if not p.exists():
        raise ValueError(f"{p}: no latency log there")
    out: list[tuple[dt.datetime, dict[str, Any]]] = []
    with open(p, encoding="utf-8") as f:
        for n, line in enumerate(f, 1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError as exc:
                raise ValueError(f"{p}:{n}: not a JSON line ({exc.msg})") from None
            if not isinstance(rec, dict):
                raise ValueError(f"{p}:{n}: expected a JSON object, got {type(rec).__name__}")
            t = record_time(rec)
            if t is None:
                raise ValueError(f"{p}:{n}: record without a time (t_last_instance, logged_at)")
            if since is not None and t < since:
                continue
            if until is not None and t >= until:
                continue
            out.append((t, rec))
    out.sort(key=lambda x: x[0])
    return [r for _, r in out]


@dataclass(frozen=True)
class Figures:
    """p50, p95 and maximum of some durations (ms), and how many there were."""

    n: int
    p50: float
    p95: float
    max: float

    @classmethod
    def of(cls, values: Iterable[float]) -> Figures | None:
        v = np.asarray([float(x) for x in values], dtype=np.float64)
        if v.size == 0:
            return None
        p50, p95 = np.percentile(v, [50.0, 95.0])  # Hyndman & Fan type 7
        return cls(int(v.size), float(p50), float(p95), float(v.max()))


@dataclass
class Summary:
    """What :func:`summarize` found."""

    series: int
    first: dt.datetime | None
    last: dt.datetime | None
    primary: Figures | None
    total: Figures | None
    deferred: Figures | None
    stages: dict[str, Figures] = field(default_factory=dict)
    budget_met: int = 0
    budget_missed: int = 0
    failed: int = 0
    skipped: dict[str, int] = field(default_factory=dict)
    protocols: dict[str, int] = field(default_factory=dict)

    @property
    def budget_ratio(self) -> float | None:
        """Series within their budget over series with a budget verdict (None without any)."""
        n = self.budget_met + self.budget_missed
        return None if n == 0 else self.budget_met / n


def _is_deferred(rec: Mapping[str, Any]) -> bool:
    return rec.get("pass") == "deferred"


def summarize(records: Sequence[Mapping[str, Any]]) -> Summary:
    """Summarise latency records (both passes; the budget binds the model-free pass only)."""
    bound = [r for r in records if not _is_deferred(r)]
    deferred = [r for r in records if _is_deferred(r)]
    stages: dict[str, list[float]] = {}
    for r in bound:
        for name, ms in (r.get("stages_ms") or {}).items():
            stages.setdefault(str(name), []).append(float(ms))
    for r in deferred:
        for name, ms in (r.get("stages_ms") or {}).items():
            stages.setdefault(f"deferred {name}", []).append(float(ms))
    times = [t for t in (record_time(r) for r in bound) if t is not None]
    skipped: dict[str, int] = {}
    protocols: dict[str, int] = {}
    for r in bound:
        for m in r.get("skipped") or {}:
            skipped[str(m)] = skipped.get(str(m), 0) + 1
        name = str(r.get("protocol", ""))
        protocols[name] = protocols.get(name, 0) + 1
    return Summary(
        series=len(bound),
        first=min(times) if times else None,
        last=max(times) if times else None,
        primary=Figures.of(r["primary_ms"] for r in bound if r.get("primary_ms") is not None),
        total=Figures.of(r["total_ms"] for r in bound if r.get("total_ms") is not None),
        deferred=Figures.of(r["deferred_ms"] for r in deferred
                            if r.get("deferred_ms") is not None),
        stages={k: f for k, v in stages.items() if (f := Figures.of(v)) is not None},
        budget_met=sum(1 for r in bound if r.get("budget_met") is True),
        budget_missed=sum(1 for r in bound if r.get("budget_met") is False),
        failed=sum(1 for r in records if r.get("ok") is False),
        skipped=skipped,
        protocols=protocols,
    )


def _ms(v: float) -> str:
    return f"{v:9.1f}"


def format_summary(s: Summary, *, since: dt.datetime | None = None,
                   until: dt.datetime | None = None) -> str:
    """The summary as a plain-text table (milliseconds)."""
    def when(t: dt.datetime | None) -> str:
        return "-" if t is None else t.strftime("%Y-%m-%d %H:%M:%S")

    lines = [
        "cest-node latency summary (research use only)",
        f"period      {when(since) if since else 'start of log'} .. "
        f"{when(until) if until else 'end of log'}",
        f"series      {s.series} (first {when(s.first)}, last {when(s.last)} UTC)",
    ]
    if s.protocols:
        lines.append("protocols   " + ", ".join(f"{k} {v}" for k, v in sorted(s.protocols.items())))
    ratio = s.budget_ratio
    lines.append("budget met  " + ("-" if ratio is None else
                                   f"{s.budget_met} of {s.budget_met + s.budget_missed} "
                                   f"({100 * ratio:.1f} %)"))
    if s.failed:
        lines.append(f"failed      {s.failed} passes")
    if s.skipped:
        lines.append("skipped     " + ", ".join(f"{k} {v}x" for k, v in sorted(s.skipped.items())))
    lines.append("")
    lines.append(f"{'':40s} {'n':>5s} {'p50 ms':>9s} {'p95 ms':>9s} {'max ms':>9s}")
    rows: list[tuple[str, Figures | None]] = [
        ("end to end: primary outputs", s.primary),
        ("end to end: all model-free outputs", s.total),
        ("deferred pass", s.deferred),
    ]
    for label, f in rows:
        if f is not None:
            lines.append(f"{label:40s} {f.n:5d} {_ms(f.p50)} {_ms(f.p95)} {_ms(f.max)}")
    if s.stages:
        lines.append("stages")
        for name in s.stages:
            f = s.stages[name]
            lines.append(f"  {name:38s} {f.n:5d} {_ms(f.p50)} {_ms(f.p95)} {_ms(f.max)}")
    return "\n".join(lines)


def plot(records: Sequence[Mapping[str, Any]], path: str | Path, *,
         title: str = "End-to-end latency per series") -> Path:
    """Draw the end-to-end latency of every series over time against its budget (PNG).

    One point per series at the time of its last instance: filled for the moment all its
    model-free outputs were acknowledged (``total_ms``), a small open mark for its primary
    outputs (``primary_ms``); the budget is a stepped line (it may change with the config);
    a series over its budget is drawn in the warning colour and counted in the legend. The
    running median of the last ten series shows the trend. Matplotlib with the Agg backend
    (no display needed).
    """
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    bound = [r for r in records if not _is_deferred(r) and r.get("total_ms") is not None]
    if not bound:
        raise ValueError("plot: no series with an end-to-end latency in the chosen period")
    times = [record_time(r) for r in bound]
    t = [x.replace(tzinfo=None) for x in times if x is not None]
    total = np.array([float(r["total_ms"]) / 1000 for r in bound])
    primary = np.array([np.nan if r.get("primary_ms") is None else float(r["primary_ms"]) / 1000
                        for r in bound])
    budget = np.array([float(r.get("budget_s") or np.nan) for r in bound])
    over = total > budget
    n_over = int(np.count_nonzero(over))
    tn = np.asarray(mdates.date2num(t), dtype=np.float64)

    fig, ax = plt.subplots(figsize=(10, 5.2), dpi=110)
    ok_c, warn_c, prim_c, budget_c = "#1f5f8b", "#d1495b", "#6a9fb5", "#3b3b3b"
    ax.step(tn, budget, where="post", color=budget_c, lw=1.6, ls="--", label="budget", zorder=2)
    ax.scatter(tn[~over], total[~over], s=30,
               color=ok_c, zorder=4, label="all model-free outputs acknowledged")
    if n_over:
        ax.scatter(tn[over], total[over], s=42,
                   color=warn_c, marker="D", zorder=5, label=f"over budget ({n_over})")
    ax.scatter(tn, primary, s=18, facecolors="none", edgecolors=prim_c, zorder=3,
               label="primary outputs acknowledged")
    if len(total) >= 3:
        k = min(10, len(total))
        run = np.array([np.median(total[max(0, i - k + 1): i + 1]) for i in range(len(total))])
        ax.plot(tn, run, color=ok_c, lw=1.0, alpha=0.6, label=f"running median ({k} series)")
    ymax = float(np.nanmax(np.concatenate([total, budget[np.isfinite(budget)], [0.0]])))
    ax.set_ylim(0, ymax * 1.3 + 0.05)  # room for the legend above the points
    ax.set_ylabel("seconds after the last instance received")
    ax.set_xlabel("time of the last instance (UTC)")
    met = len(total) - n_over
    ax.set_title(f"{title}\n{len(total)} series, {t[0]:%Y-%m-%d %H:%M} to "
                 f"{t[-1]:%Y-%m-%d %H:%M}; {met} of {len(total)} within budget "
                 f"({100 * met / len(total):.1f} %); median {np.median(total):.2f} s, "
                 f"p95 {np.percentile(total, 95):.2f} s", fontsize=10)
    locator = mdates.AutoDateLocator()
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    ax.grid(True, axis="y", color="#dddddd", lw=0.8)
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(loc="upper left", fontsize=8, frameon=False, ncol=2)
    fig.text(0.99, 0.01, "cest-node - research use only, not for diagnosis", ha="right",
             va="bottom", fontsize=7, color="#777777")
    fig.tight_layout()
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, format="png")
    plt.close(fig)
    return out
