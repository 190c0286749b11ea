"""Latency metrics a site can watch: an optional Prometheus endpoint.

:class:`NodeMetrics` keeps the node's counters and histograms in a private
:class:`prometheus_client.CollectorRegistry` (one per node, so several nodes in one process
never share figures) and, when enabled, serves them over HTTP in the Prometheus text
exposition format (``GET /metrics``). The endpoint is off by default and listens on loopback
by default (``[metrics]`` in the config).

What is measured, from what the node sees:

- ``cest_node_stage_seconds{protocol, stage, method}`` (histogram): every stage of every series
  from its latency record (``prepare``, ``normalise``, ``b0``, ``compute``, ``build:KIND``,
  ``send``; ``method`` is the registry name, empty for stages shared by the methods);
- ``cest_node_primary_seconds{protocol}`` and ``cest_node_end_to_end_seconds{protocol}``
  (histograms): last instance received to the primary method's outputs acknowledged, and to
  every model-free output acknowledged;
- ``cest_node_deferred_seconds{protocol}`` (histogram): the deferred (model-based) pass;
- ``cest_node_instances_total{protocol}``, ``cest_node_series_total{protocol}``,
  ``cest_node_series_failed_total{protocol}`` (counters);
- ``cest_node_refused_instances_total`` (counter): C-STORE requests answered with a failure
  status (PS3.7 C.4.2.1.4: 0xA7xx, 0xA9xx, 0xCxxx);
- ``cest_node_send_failures_total`` (counter): derived objects an archive did not acknowledge
  when they were sent (with the outbox they wait there for a retry);
- ``cest_node_methods_skipped_total{protocol, method}`` (counter);
- ``cest_node_budget_met_total{protocol}``, ``cest_node_budget_missed_total{protocol}``
  (counters) and ``cest_node_budget_met_ratio{protocol}`` (gauge, met / (met + missed)).

No patient data reaches the metrics: the only labels are the protocol name, the stage and the
method (names from the config and the registry), never a series key or a DICOM attribute.

prometheus_client is an optional dependency (the ``metrics`` extra); without it the node
still runs (:func:`metrics_for` gives an object that records nothing) and only an enabled
endpoint is an error.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Iterable, Mapping
from typing import Any

log = logging.getLogger("cest_node.metrics")

#: Histogram buckets (seconds) for end-to-end latency: fine around the 1-2 s goals, up to the
#: budgets a protocol may set.
LATENCY_BUCKETS = (0.1, 0.25, 0.5, 0.75, 1.0, 1.25, 1.5, 2.0, 3.0, 5.0, 7.5, 10.0, 15.0, 30.0,
                   60.0, 120.0)
#: Buckets (seconds) for single stages, from a few milliseconds up.
STAGE_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0,
                 30.0, 120.0)
#: Buckets (seconds) for the deferred pass of the model-based fits.
DEFERRED_BUCKETS = (1.0, 5.0, 10.0, 30.0, 60.0, 120.0, 300.0, 600.0, 1800.0, 3600.0)


def _prometheus() -> Any:
    try:
        import prometheus_client
    except ImportError as exc:  # pragma: no cover - the extra is installed in the test env
        raise ValueError("metrics.enabled: the Prometheus endpoint needs prometheus_client "
                         "(pip install 'cest-node[metrics]')") from exc
    return prometheus_client


def stage_labels(stage: str) -> tuple[str, str]:
    """``(stage, method)`` labels of a ``stages_ms`` key.

    ``method:NAME`` -> ``("compute", NAME)``; ``build:NAME:KIND`` -> ``("build:KIND", NAME)``;
    ``send:NAME`` / ``write:NAME`` -> ``("send", NAME)`` / ``("write", NAME)``; anything else
    (``prepare``, ``normalise``, ``b0``) -> ``(stage, "")``.
    """
    parts = stage.split(":")
    if parts[0] == "method" and len(parts) == 2:
        return "compute", parts[1]
    if parts[0] == "build" and len(parts) == 3:
        return f"build:{parts[2]}", parts[1]
    if parts[0] in ("send", "write") and len(parts) == 2:
        return parts[0], parts[1]
    return stage, ""


class NodeMetrics:
    """The node's metrics in a registry of its own, optionally served over HTTP.

    Parameters
    ----------
    registry
        A :class:`prometheus_client.CollectorRegistry` (default: a new, private one).

    Examples
    --------
    >>> m = NodeMetrics()                                   # doctest: +SKIP
    >>> m.observe({"protocol": "p", "total_ms": 900.0, "budget_met": True, ...})
    >>> port = m.serve("127.0.0.1", 0)                      # GET /metrics
    """

    def __init__(self, registry: Any | None = None):
        pc = _prometheus()
        self._pc = pc
        self.registry = registry if registry is not None else pc.CollectorRegistry()
        r = self.registry
        self.stage = pc.Histogram("cest_node_stage_seconds", "Duration of one stage of a series",
                                  ["protocol", "stage", "method"], buckets=STAGE_BUCKETS,
                                  registry=r)
        self.primary = pc.Histogram(
            "cest_node_primary_seconds",
            "Last instance received to the primary method's outputs acknowledged",
            ["protocol"], buckets=LATENCY_BUCKETS, registry=r)
        self.end_to_end = pc.Histogram(
            "cest_node_end_to_end_seconds",
            "Last instance received to every model-free output acknowledged",
            ["protocol"], buckets=LATENCY_BUCKETS, registry=r)
        self.deferred = pc.Histogram("cest_node_deferred_seconds",
                                     "Duration of the deferred pass (model-based methods)",
                                     ["protocol"], buckets=DEFERRED_BUCKETS, registry=r)
        self.instances = pc.Counter("cest_node_instances", "Instances of processed series",
                                    ["protocol"], registry=r)
        self.series = pc.Counter("cest_node_series", "Series processed (budget-bound pass)",
                                 ["protocol"], registry=r)
        self.series_failed = pc.Counter("cest_node_series_failed",
                                        "Series whose processing or sending failed",
                                        ["protocol"], registry=r)
        self.refused = pc.Counter("cest_node_refused_instances",
                                  "C-STORE requests answered with a failure status", registry=r)
        self.send_failures = pc.Counter("cest_node_send_failures",
                                        "Derived objects an archive did not acknowledge when "
                                        "sent", registry=r)
        self.skipped = pc.Counter("cest_node_methods_skipped",
                                  "Methods skipped (budget, missing input)",
                                  ["protocol", "method"], registry=r)
        self.budget_met = pc.Counter("cest_node_budget_met",
                                     "Series whose model-free outputs were acknowledged within "
                                     "the budget", ["protocol"], registry=r)
        self.budget_missed = pc.Counter("cest_node_budget_missed",
                                        "Series whose model-free outputs took longer than the "
                                        "budget", ["protocol"], registry=r)
        self.budget_ratio = pc.Gauge("cest_node_budget_met_ratio",
                                     "Fraction of series within the budget since start",
                                     ["protocol"], registry=r)
        self._counts: dict[str, list[int]] = {}
        self._lock = threading.Lock()
        self._server: Any = None
        self._thread: threading.Thread | None = None

    # ------------------------------------------------------------------ observations
    def observe(self, record: Mapping[str, Any]) -> None:
        """Take one latency record (either pass) into the metrics."""
        protocol = str(record.get("protocol", ""))
        for stage, ms in (record.get("stages_ms") or {}).items():
            name, method = stage_labels(str(stage))
            self.stage.labels(protocol, name, method).observe(float(ms) / 1000.0)
        if record.get("pass") == "deferred":
            if record.get("deferred_ms") is not None:
                self.deferred.labels(protocol).observe(float(record["deferred_ms"]) / 1000.0)
            if not record.get("ok", True):
                self.series_failed.labels(protocol).inc()
            return
        self.series.labels(protocol).inc()
        self.instances.labels(protocol).inc(int(record.get("instances") or 0))
        if not record.get("ok", True):
            self.series_failed.labels(protocol).inc()
        for method in record.get("skipped") or {}:
            self.skipped.labels(protocol, str(method)).inc()
        if record.get("primary_ms") is not None:
            self.primary.labels(protocol).observe(float(record["primary_ms"]) / 1000.0)
        if record.get("total_ms") is not None:
            self.end_to_end.labels(protocol).observe(float(record["total_ms"]) / 1000.0)
        met = record.get("budget_met")
        if met is None:
            return
        met_c, missed_c = self.budget_met.labels(protocol), self.budget_missed.labels(protocol)
        (met_c if met else missed_c).inc()  # both exist from the first series: rates work
        with self._lock:
            c = self._counts.setdefault(protocol, [0, 0])
            c[0 if met else 1] += 1
            ratio = c[0] / (c[0] + c[1])
        self.budget_ratio.labels(protocol).set(ratio)

    def refusal(self, status: int) -> None:
        """Count a C-STORE answered with ``status`` when it is a failure (not 0x0000, not a
        warning 0xB000-0xBFFF or 0x0107/0x0116, PS3.7 C.4.2.1.4 and Annex C)."""
        if status == 0 or 0xB000 <= status <= 0xBFFF or status in (0x0107, 0x0116):
            return
        self.refused.inc()

    def send_failed(self, objects: int) -> None:
        """Count derived objects that an archive did not acknowledge."""
        if objects > 0:
            self.send_failures.inc(objects)

    def observe_send(self, method: str, reports: Iterable[Any]) -> None:
        """Take the :class:`~node.send.SendReport` of each destination of one batch."""
        for rep in reports:
            self.send_failed(int(getattr(rep, "failed", 0)))

    # ------------------------------------------------------------------ exposition
    def text(self) -> str:
        """The metrics in the Prometheus text exposition format."""
        return bytes(self._pc.generate_latest(self.registry)).decode("utf-8")

    def serve(self, host: str = "127.0.0.1", port: int = 9464) -> int:
        """Serve ``/metrics`` over HTTP on ``host:port`` (port 0: the OS picks one) from a
        daemon thread; returns the bound port."""
        if self._server is not None:
            return int(self._server.server_address[1])
        try:
            server, thread = self._pc.start_http_server(port, addr=host, registry=self.registry)
        except OSError as exc:
            raise ValueError(f"metrics.port: cannot listen on {host}:{port} ({exc})") from exc
        self._server, self._thread = server, thread
        bound = int(server.server_address[1])
        log.info("metrics on http://%s:%d/metrics", host, bound)
        return bound

    @property
    def port(self) -> int | None:
        """The bound port while serving, else None."""
        return None if self._server is None else int(self._server.server_address[1])

    def stop(self) -> None:
        """Stop serving (the figures stay)."""
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            if self._thread is not None:
                self._thread.join(timeout=5)
            self._server = self._thread = None


class _NoMetrics:
    """Stands in for :class:`NodeMetrics` when prometheus_client is not installed and the
    endpoint is off: the node calls the same methods, nothing is recorded."""

    port = None

    def observe(self, record: Mapping[str, Any]) -> None:
        return None

    def refusal(self, status: int) -> None:
        return None

    def send_failed(self, objects: int) -> None:
        return None

    def observe_send(self, method: str, reports: Iterable[Any]) -> None:
        return None

    def serve(self, host: str = "127.0.0.1", port: int = 9464) -> int:
        _prometheus()  # raises the ValueError that names the missing package
        raise ValueError("metrics.enabled: prometheus_client is not installed")

    def stop(self) -> None:
        return None


def metrics_for(settings: Any) -> NodeMetrics | _NoMetrics:
    """The metrics of one node for its ``[metrics]`` settings (:class:`~node.config.MetricsSettings`).

    A private registry each time. Without prometheus_client: a recorder of nothing when the
    endpoint is off, ValueError when it is on.
    """
    try:
        import prometheus_client  # noqa: F401
    except ImportError:
        if getattr(settings, "enabled", False):
            _prometheus()  # raises the ValueError that names the missing package
        return _NoMetrics()
    return NodeMetrics()
