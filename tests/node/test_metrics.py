"""The Prometheus endpoint: scraped over real HTTP after a real series.

DCMTK ``storescu`` plays the scanner, DCMTK ``storescp`` the archive; the node serves its
metrics on 127.0.0.1 with an OS-chosen port, and the text is parsed with prometheus_client's
own parser of the Prometheus text exposition format (the format's reference implementation in
Python).
"""

from __future__ import annotations

import dataclasses
import json
import urllib.request
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from node.config import ConfigError, MetricsSettings, default_config, parse_config
from node.metrics import NodeMetrics, metrics_for, stage_labels
from node.send import Destination, ItemResult, SendReport
from node.service import Node
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.node.harness import Collect
from tests.peers import StoreSCP, storescu

SLICES, SIZE = 2, 32
PATIENT = {"patient_name": "ZZMETRIC^NAME4471", "patient_id": "PID-METRIC-90210",
           "patient_birth_date": "19020304"}


def _samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """``{(sample name, sorted labels): value}`` from the exposition text."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def _scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10) as r:  # noqa: S310
        assert r.status == 200
        return r.read().decode()


@pytest.fixture(scope="module")
def series_files(tmp_path_factory):
    ph = make_phantom(slices=SLICES, size=SIZE, seed=5)
    ds = series_from_arrays(ph.signal, ph.offsets_ppm, seed="metrics", **PATIENT)
    return write_series(ds, tmp_path_factory.mktemp("scanner"))


@pytest.mark.peers
def test_metrics_scraped_after_a_real_series(tmp_path: Path, series_files):
    big = make_phantom(slices=1, size=48, seed=6)  # 48 x 48: beyond max_rows below
    too_big = write_series(series_from_arrays(big.signal[..., :1], big.offsets_ppm[:1],
                                              seed="too-big"), tmp_path / "big")
    collect = Collect()
    with StoreSCP(tmp_path / "archive") as archive:
        base = default_config(base_dir=tmp_path)
        proto = dataclasses.replace(base.protocols[0], model_based=False)
        cfg = base.with_overrides(
            port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False,
            destinations=[f"{archive.ae_title}@127.0.0.1:{archive.port}"], max_rows=40,
            protocols=(proto,), metrics=MetricsSettings(enabled=True, port=0))
        with Node(cfg, on_outcome=collect) as node:
            port = node.metrics.port
            assert port is not None and node.metrics._server.server_address[0] == "127.0.0.1"
            before = _samples(_scrape(port))
            assert before[("cest_node_refused_instances_total", ())] == 0
            storescu(node.port, series_files)
            (outcome,) = collect.wait(1)
            assert outcome.ok, outcome.error
            # one instance of 48 rows against max_rows 40: 0xA700 (PS3.7 C.4.2.1.4)
            res = storescu(node.port, too_big, check=False)
            assert "A700" in (res.stdout + res.stderr) or res.returncode != 0
            text = _scrape(port)
    rec = json.loads((tmp_path / "logs" / "latency.jsonl").read_text().splitlines()[0])
    s = _samples(text)
    p = (("protocol", proto.name),)
    assert s[("cest_node_series_total", p)] == 1
    assert s[("cest_node_instances_total", p)] == len(series_files) == rec["instances"]
    assert s[("cest_node_refused_instances_total", ())] == 1
    assert s[("cest_node_send_failures_total", ())] == 0
    # end-to-end and primary histograms hold this series' figures from its latency record
    assert s[("cest_node_end_to_end_seconds_count", p)] == 1
    assert s[("cest_node_end_to_end_seconds_sum", p)] == pytest.approx(rec["total_ms"] / 1000)
    assert s[("cest_node_primary_seconds_sum", p)] == pytest.approx(rec["primary_ms"] / 1000)
    # budget: 10 s for a 2-slice series is met; the ratio is met / (met + missed)
    assert rec["budget_met"] is True
    assert s[("cest_node_budget_met_total", p)] == 1
    assert s[("cest_node_budget_missed_total", p)] == 0
    assert s[("cest_node_budget_met_ratio", p)] == 1.0
    # every stage of the record is a histogram series with its stage and method labels
    for stage, ms in rec["stages_ms"].items():
        name, method = stage_labels(stage)
        labels = tuple(sorted({"protocol": proto.name, "stage": name, "method": method}.items()))
        assert s[("cest_node_stage_seconds_count", labels)] == 1, stage
        assert s[("cest_node_stage_seconds_sum", labels)] == pytest.approx(ms / 1000, abs=1e-6)
    assert ("cest_node_stage_seconds_count", tuple(sorted(
        {"protocol": proto.name, "stage": "build:parametric_map", "method": "mtr_asym"}.items()
    ))) in s
    # skipped methods are counted by name (AREX needs a T1 map the series has not)
    assert s[("cest_node_methods_skipped_total", (("method", "arex"),) + p)] == 1
    # no patient attribute and no series key in what a monitoring system collects
    for value in [*PATIENT.values(), outcome.key]:
        assert value not in text
    labels_used = {k for fam in text_string_to_metric_families(text) for smp in fam.samples
                   for k in smp.labels}
    assert labels_used <= {"protocol", "stage", "method", "le"}


def test_metrics_endpoint_is_off_by_default_and_on_loopback():
    # the documented default config (config/node.toml): endpoint off, loopback, port 9464
    m = default_config().metrics
    assert (m.enabled, m.host, m.port, m.calibrate) == (False, "127.0.0.1", 9464, True)


def test_metrics_config_errors_name_the_key():
    with pytest.raises(ConfigError, match=r"metrics\.port: "):
        parse_config({"metrics": {"port": 70000}})
    with pytest.raises(ConfigError, match=r"metrics\.enable: unknown key"):
        parse_config({"metrics": {"enable": True}})
    with pytest.raises(ConfigError, match=r"metrics\.enabled: "):
        parse_config({"metrics": {"enabled": "yes"}})
    cfg = parse_config({"metrics": {"enabled": True, "host": "0.0.0.0", "port": 0}})
    assert cfg.metrics == MetricsSettings(enabled=True, host="0.0.0.0", port=0)


def test_each_node_has_its_own_registry_and_ratio():
    a, b = metrics_for(MetricsSettings()), NodeMetrics()
    rec = {"protocol": "p", "stages_ms": {"prepare": 12.0, "method:mtr_asym": 3.0,
                                          "build:mtr_asym:derived_mr": 5.0, "send:mtr_asym": 9.0},
           "instances": 10, "primary_ms": 400.0, "total_ms": 900.0, "budget_s": 1.0,
           "budget_met": True, "ok": True, "skipped": {}}
    a.observe(rec)
    a.observe({**rec, "total_ms": 1500.0, "budget_met": False})
    # one destination stored 2 of 5 objects: 3 send failures
    items = [ItemResult(i, "1.2.840.10008.5.1.4.1.1.4", f"2.25.{i}",
                        outcome="stored" if i < 2 else "failed") for i in range(5)]
    a.observe_send("mtr_asym", [SendReport("k", Destination("A", "127.0.0.1", 104), items)])
    a.observe({**rec, "pass": "deferred", "budget_met": None, "total_ms": None,
               "deferred_ms": 4000.0, "stages_ms": {"method:lda": 3900.0}})
    a.refusal(0x0000)
    a.refusal(0xB000)  # a warning, not a refusal (PS3.7 C.4.2.1.4)
    a.refusal(0xA700)
    sa, sb = _samples(a.text()), _samples(b.text())
    p = (("protocol", "p"),)
    assert sa[("cest_node_budget_met_ratio", p)] == 0.5
    assert sa[("cest_node_series_total", p)] == 2
    assert sa[("cest_node_send_failures_total", ())] == 3
    assert sa[("cest_node_refused_instances_total", ())] == 1
    assert sa[("cest_node_deferred_seconds_sum", p)] == 4.0
    assert sa[("cest_node_stage_seconds_count", (("method", "lda"),) + p
               + (("stage", "compute"),))] == 1
    assert ("cest_node_series_total", p) not in sb  # the other node saw nothing
    assert sb[("cest_node_refused_instances_total", ())] == 0


def test_stage_labels():
    assert stage_labels("method:apt_star") == ("compute", "apt_star")
    assert stage_labels("build:arex:secondary_capture") == ("build:secondary_capture", "arex")
    assert stage_labels("send:mtr_asym") == ("send", "mtr_asym")
    assert stage_labels("b0") == ("b0", "")
