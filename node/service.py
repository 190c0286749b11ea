"""The running node: receive -> assemble -> schedule -> quant -> derive -> send, timed.

:class:`Processor` turns one :class:`~node.types.AssembledSeries` into derived objects and
hands each batch to a ``deliver`` callable (the sender in ``serve``, a folder writer in
``process``). :class:`Node` wires a :class:`~node.receive.Receiver` to a processor and a
:class:`~node.send.Sender`, and writes one latency record per series.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from pydicom import Dataset

from node import pipeline
from node.config import NodeConfig, Protocol
from node.derive import BUILDERS, DerivedRequest
from node.receive import Receiver
from node.schedule import CostModel, plan_methods
from node.send import Sender, SendSettings
from node.timing import LatencyLog, SeriesClock
from node.types import AssembledSeries, OutputBatch, uid_from
from quant.registry import METHODS

log = logging.getLogger("cest_node.service")

#: Output kinds in the order they are built and sent (the viewer-friendly ones first).
OUTPUT_ORDER = ("derived_mr", "secondary_capture", "parametric_map")

Deliver = Callable[[OutputBatch, SeriesClock], bool]


@dataclass
class SeriesOutcome:
    """What happened to one series (also the latency record's core)."""

    key: str
    protocol: str
    ok: bool
    methods: list[str] = field(default_factory=list)
    skipped: dict[str, str] = field(default_factory=dict)
    deferred: list[str] = field(default_factory=list)
    objects: int = 0
    error: str = ""
    record: dict[str, Any] = field(default_factory=dict)
    maps: dict[str, np.ndarray] = field(default_factory=dict)


def output_series_uid(source_series_uid: str, method: str, kind: str) -> str:
    """Deterministic UID of a derived series: the same source, method and kind give the same
    UID, so a rebuild after a crash is idempotent at the archive."""
    return uid_from(source_series_uid, "derived", method, kind)


def output_series_number(source_number: int | None, method: str, kind: str) -> int:
    """SeriesNumber of a derived series: ``source * 100 + 10 * method + kind`` (ours)."""
    names = list(METHODS)
    m = names.index(method) if method in names else len(names)
    k = OUTPUT_ORDER.index(kind) if kind in OUTPUT_ORDER else 9
    base = int(source_number) if source_number else 1
    return base * 100 + 10 * (m % 10) + k + 1


class Processor:
    """Computes, builds and delivers the outputs of assembled series.

    Parameters
    ----------
    config
        The node config (protocols).
    deliver
        ``f(batch, clock) -> ok``: stores one batch of derived objects somewhere.
    cost
        The scheduler's cost model (shared so that measurements refine it).
    keep_maps
        Keep the computed maps in the outcome (tests and the demo use them).
    """

    def __init__(self, config: NodeConfig, deliver: Deliver, *, cost: CostModel | None = None,
                 keep_maps: bool = False):
        self.config = config
        self.deliver = deliver
        self.cost = cost or CostModel.from_registry(METHODS)
        self.keep_maps = keep_maps

    def process(self, series: AssembledSeries) -> SeriesOutcome:
        protocol = self.config.protocol(series.protocol)
        clock = SeriesClock(series.key)
        for name, t in series.clock.items():
            clock.mark(name, t)
        clock.mark("processing_start")
        outcome = SeriesOutcome(series.key, protocol.name, ok=False)
        try:
            self._process(series, protocol, clock, outcome)
        except Exception as exc:  # a failure of one series never stops the node
            outcome.ok = False
            outcome.error = f"{type(exc).__name__}: {exc}"
            log.exception("series %s: processing failed", series.key)
        clock.mark("done")
        outcome.record = clock.record(
            budget_s=protocol.budget_s,
            protocol=protocol.name,
            instances=series.instance_count,
            complete=series.complete,
            missing=series.missing,
            methods=outcome.methods,
            skipped=outcome.skipped,
            deferred=outcome.deferred,
            objects=outcome.objects,
            ok=outcome.ok,
            error=outcome.error,
        )
        return outcome

    # ------------------------------------------------------------------------------------
    def _process(self, series: AssembledSeries, protocol: Protocol, clock: SeriesClock,
                 outcome: SeriesOutcome) -> None:
        with clock.stage("prepare"):
            prep = pipeline.prepare(series.signal, series.offsets_ppm,
                                    m0_threshold_ppm=protocol.m0_threshold_ppm)
        for name, sec in prep.seconds.items():
            clock.add(name, sec * 1000.0)
        slices = series.signal.shape[0]
        n_voxels = int(np.count_nonzero(prep.mask))
        plan = plan_methods(
            protocol.methods, registry=METHODS, cost=self.cost, n_voxels=n_voxels,
            n_slices=slices, n_outputs=len(protocol.outputs), budget_s=protocol.budget_s,
            elapsed_s=clock.since("last_instance") if "last_instance" in clock.marks else 0.0,
            have_t1=False,
        )
        outcome.skipped = dict(plan.skipped)
        outcome.deferred = list(plan.deferred)
        clock.info["predicted_s"] = plan.predicted_s
        for name, why in plan.skipped.items():
            log.info("series %s: method %s skipped: %s", series.key, name, why)
        source_uid = str(series.references[0].SeriesInstanceUID)
        source_number = series.references[0].get("SeriesNumber")
        all_ok = True
        measured: dict[str, float] = {}
        for name in plan.run:
            with clock.stage(f"method:{name}"):
                res = pipeline.compute(prep, name)
            measured[name] = res.seconds
            self.cost.learn(name, seconds=res.seconds, n_voxels=max(res.n_voxels, 1))
            if self.keep_maps:
                outcome.maps[name] = res.values
            datasets: list[Dataset] = []
            lo_hi = pipeline.display_range(res.values)
            for kind in OUTPUT_ORDER:
                if kind not in protocol.outputs:
                    continue
                req = DerivedRequest(
                    references=series.references,
                    values=res.values,
                    method=name,
                    title=res.title,
                    unit_ucum=res.unit_ucum,
                    series_uid=output_series_uid(source_uid, name, kind),
                    series_number=output_series_number(source_number, name, kind),
                    m0=prep.m0 if kind == "secondary_capture" else None,
                    display_range=lo_hi,
                    note="" if series.complete else "incomplete series",
                )
                with clock.stage(f"build:{name}:{kind}"):
                    datasets.extend(BUILDERS[kind](req))
            batch = OutputBatch(series.key, datasets, label=name)
            ok = self.deliver(batch, clock)
            all_ok &= ok
            outcome.objects += len(datasets)
            outcome.methods.append(name)
            if name == plan.primary:
                clock.mark("primary_ack")
        clock.info["measured_s"] = {k: round(v, 4) for k, v in measured.items()}
        clock.mark("last_ack")
        outcome.ok = all_ok


class Node:
    """The long-running service: a receiver in front of a processor and a sender.

    Parameters
    ----------
    config
        The node config. Destinations receive every derived object.
    on_outcome
        Optional callback with every :class:`SeriesOutcome` (after its latency record is
        written), e.g. for the demo to wait on.
    """

    def __init__(self, config: NodeConfig, *, on_outcome: Callable[[SeriesOutcome], None] | None = None,
                 keep_maps: bool = False, send_settings: SendSettings | None = None):
        self.config = config
        self.latency = LatencyLog(config.log_dir)
        self._stop = threading.Event()
        self.sender = Sender(send_settings or SendSettings(calling_ae=config.ae_title),
                             stop=self._stop)
        self.processor = Processor(config, self._deliver, keep_maps=keep_maps)
        self.receiver = Receiver(config, self._on_series)
        self.on_outcome = on_outcome
        self._unsent_dir = Path(config.spool_dir) / "unsent"

    @property
    def port(self) -> int | None:
        return self.receiver.port

    def start(self) -> Node:
        self._stop.clear()
        self.receiver.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        self.receiver.stop()

    def __enter__(self) -> Node:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # ------------------------------------------------------------------------------------
    def _on_series(self, series: AssembledSeries) -> None:
        outcome = self.processor.process(series)
        self.latency.write(outcome.record)
        log.info(
            "series %s: %s, %d objects, primary %s ms, total %s ms (budget %s s)",
            series.key, "done" if outcome.ok else "FAILED", outcome.objects,
            outcome.record.get("primary_ms"), outcome.record.get("total_ms"),
            outcome.record.get("budget_s"),
        )
        if self.on_outcome is not None:
            self.on_outcome(outcome)

    def _deliver(self, batch: OutputBatch, clock: SeriesClock) -> bool:
        if not self.config.destinations:
            log.warning("series %s: no destination configured; %d objects kept in %s",
                        batch.key, len(batch.datasets), self._unsent_dir)
            write_datasets(batch.datasets, self._unsent_dir / batch.key)
            return True
        ok = True
        with clock.stage(f"send:{batch.label}"):
            reports = self.sender.send_batch(batch, self.config.destinations)
        for rep in reports:
            if not rep.ok:
                ok = False
                failed = [batch.datasets[i.index] for i in rep.items if not i.stored]
                folder = self._unsent_dir / batch.key
                write_datasets(failed, folder)
                log.error("series %s: %d objects not stored at %s; kept in %s", batch.key,
                          len(failed), rep.destination, folder)
        return ok


def write_datasets(datasets: Sequence[Dataset], folder: str | Path) -> list[Path]:
    """Write derived objects as PS3.10 files named by SOP Instance UID (atomic per file)."""
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    for ds in datasets:
        path = out / f"{ds.SOPInstanceUID}.dcm"
        tmp = path.with_suffix(".tmp")
        ds.save_as(tmp, enforce_file_format=True)
        tmp.replace(path)
        paths.append(path)
    return paths


def wait_until(cond: threading.Condition, predicate: Callable[[], bool], timeout: float) -> bool:
    """Wait on ``cond`` until ``predicate()`` holds or ``timeout`` seconds pass."""
    deadline = time.monotonic() + timeout
    with cond:
        while not predicate():
            left = deadline - time.monotonic()
            if left <= 0:
                return False
            cond.wait(left)
        return True
