"""``cest-node stats``: figures of a period from the latency log, and the QA picture.

The percentiles are checked against Python's ``statistics.quantiles(method="inclusive")``, an
independent implementation of the same definition (Hyndman & Fan type 7, Am Stat 1996). The
log comes from a real run (DCMTK ``storescu`` -> node -> DCMTK ``storescp``) plus synthetic
records of an invented week.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import statistics
import threading
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from node import stats
from node.cli import main
from node.config import default_config
from node.service import Node
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.peers import StoreSCP, storescu

T0 = dt.datetime(2031, 3, 3, 7, 0, tzinfo=dt.UTC)  # an invented Monday


def _iso(t: dt.datetime) -> str:
    return t.strftime("%Y-%m-%dT%H:%M:%S.") + f"{t.microsecond // 1000:03d}Z"


def synthetic_records(n: int = 60, *, seed: int = 4) -> list[dict]:
    """An invented week of series: ~1 s primary, ~1.6 s total, a few over a 2 s budget, one
    deferred pass per series."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        t = T0 + dt.timedelta(hours=2.7 * i + float(rng.uniform(0, 1)))
        primary = float(rng.gamma(9.0, 0.11)) * 1000
        total = primary + float(rng.gamma(6.0, 0.1)) * 1000
        budget = 2.0 if i < 40 else 2.5  # the site raised the budget mid-week
        key = f"s-{i:016x}"
        out.append({"series": key, "logged_at": _iso(t + dt.timedelta(seconds=3)),
                    "t_last_instance": _iso(t), "protocol": "cest_apt_phantom",
                    "stages_ms": {"prepare": round(float(rng.uniform(300, 700)), 1),
                                  "method:mtr_asym": round(float(rng.uniform(3, 9)), 1),
                                  "send:mtr_asym": round(float(rng.uniform(100, 400)), 1)},
                    "primary_ms": round(primary, 1), "total_ms": round(total, 1),
                    "budget_s": budget, "budget_met": total <= budget * 1000, "ok": True,
                    "skipped": {"arex": "needs a T1 map"}})
        out.append({"series": key, "logged_at": _iso(t + dt.timedelta(seconds=40)),
                    "pass": "deferred", "protocol": "cest_apt_phantom",
                    "stages_ms": {"method:lda": 30000.0}, "primary_ms": None,
                    "total_ms": None, "budget_s": budget, "budget_met": None,
                    "deferred_ms": 31000.0 + i, "ok": True})
    return out


def _write(path: Path, records: list[dict], mode: str = "w") -> Path:
    with open(path, mode, encoding="utf-8") as f:
        for r in records:
            f.write(json.dumps(r) + "\n")
    return path


def test_percentiles_match_the_type7_definition():
    recs = synthetic_records()
    s = stats.summarize(recs)
    totals = [r["total_ms"] for r in recs if r.get("pass") != "deferred"]
    q = statistics.quantiles(totals, n=100, method="inclusive")  # q[49] = p50, q[94] = p95
    assert s.series == 60 and s.total is not None and s.total.n == 60
    assert s.total.p50 == pytest.approx(q[49])
    assert s.total.p95 == pytest.approx(q[94])
    assert s.total.max == max(totals)
    prim = [r["primary_ms"] for r in recs if r.get("pass") != "deferred"]
    assert s.primary is not None
    assert s.primary.p95 == pytest.approx(statistics.quantiles(prim, n=100,
                                                               method="inclusive")[94])
    met = sum(1 for r in recs if r.get("budget_met") is True)
    assert (s.budget_met, s.budget_missed) == (met, 60 - met) and 0 < met < 60
    assert s.budget_ratio == pytest.approx(met / 60)
    assert s.deferred is not None and s.deferred.n == 60 and s.deferred.max == 31059.0
    assert s.stages["prepare"].n == 60 and s.stages["deferred method:lda"].n == 60
    assert s.skipped == {"arex": 60}


def test_period_selection(tmp_path):
    log = _write(tmp_path / "latency.jsonl", synthetic_records())
    since, until = T0 + dt.timedelta(days=1), T0 + dt.timedelta(days=2)
    recs = stats.read_records(tmp_path, since=since, until=until)
    times = [stats.record_time(r) for r in recs]
    assert recs and all(t is not None and since <= t < until for t in times)
    bound = [r for r in recs if r.get("pass") != "deferred"]
    assert len(bound) == 9  # one series every 2.7 h: 24 / 2.7 = 8.9
    assert len(stats.read_records(log)) == 120
    # naive times are UTC; offsets are honoured
    assert stats.parse_time("2031-03-04T09:00+02:00") == dt.datetime(2031, 3, 4, 7, 0,
                                                                      tzinfo=dt.UTC)
    assert stats.parse_time("2031-03-04") == dt.datetime(2031, 3, 4, tzinfo=dt.UTC)


def test_bad_input_is_named(tmp_path):
    with pytest.raises(ValueError, match="no latency log there"):
        stats.read_records(tmp_path)
    (tmp_path / "latency.jsonl").write_text('{"series": "s-1", "logged_at": '
                                            '"2031-03-03T07:00:00.000Z"}\nnot json\n')
    with pytest.raises(ValueError, match=r"latency\.jsonl:2: not a JSON line"):
        stats.read_records(tmp_path)
    with pytest.raises(ValueError, match="--since: 'last tuesday' is not an ISO 8601"):
        stats.parse_time("last tuesday", what="--since")
    with pytest.raises(ValueError, match="no series with an end-to-end latency"):
        stats.plot([], tmp_path / "x.png")


@pytest.mark.peers
def test_stats_of_a_real_run_plus_a_week(tmp_path, capsys):
    ph = make_phantom(slices=2, size=32, seed=8)
    files = write_series(series_from_arrays(ph.signal, ph.offsets_ppm, seed="stats"),
                         tmp_path / "scanner")
    done = threading.Event()
    with StoreSCP(tmp_path / "archive") as archive:
        base = default_config(base_dir=tmp_path)
        cfg = base.with_overrides(
            port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False,
            destinations=[f"{archive.ae_title}@127.0.0.1:{archive.port}"],
            protocols=(dataclasses.replace(base.protocols[0], model_based=False),))
        with Node(cfg, on_outcome=lambda o: done.set()) as node:
            storescu(node.port, files)
            assert done.wait(60)
    log = tmp_path / "logs" / "latency.jsonl"
    (real,) = [json.loads(ln) for ln in log.read_text().splitlines()]
    _write(log, synthetic_records(), mode="a")
    png = tmp_path / "qa" / "latency.png"
    assert main(["stats", "--log-dir", str(tmp_path / "logs"), "--plot", str(png)]) == 0
    out = capsys.readouterr().out
    assert "series      61" in out
    assert "end to end: all model-free outputs" in out and "stages" in out
    assert "build:mtr_asym:parametric_map" in out  # a stage only the real run has
    with Image.open(png) as im:  # a real PNG a slide can take
        assert im.format == "PNG" and im.size[0] >= 1000 and im.size[1] >= 500
    # only the real run: from its last instance to the start of the invented week
    assert main(["stats", "--log-dir", str(tmp_path / "logs"), "--since",
                 real["t_last_instance"], "--until", _iso(T0)]) == 0
    out = capsys.readouterr().out
    assert "series      1 " in out
    line = next(ln for ln in out.splitlines() if ln.startswith("end to end: all model-free"))
    assert float(line.split()[-1]) == pytest.approx(real["total_ms"], abs=0.1)
    # a bad option value is a one-line error and exit status 1
    assert main(["stats", "--log-dir", str(tmp_path / "logs"), "--until", "soon"]) == 1
    assert "--until: 'soon' is not an ISO 8601" in capsys.readouterr().err
