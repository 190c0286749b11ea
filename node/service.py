"""The running node: receive -> assemble -> schedule -> quant -> derive -> outbox -> send, timed.

:class:`Processor` turns one :class:`~node.types.AssembledSeries` into derived objects and
hands each batch to a ``deliver`` callable (the outbox and sender in ``serve``, a folder
writer in ``process``). :class:`Node` wires a :class:`~node.receive.Receiver` to a processor,
the :class:`~node.outbox.Outbox` and a :class:`~node.send.Sender`, records each series' state
in the spool's index, resumes after a crash (:mod:`node.recovery`), and writes one latency
record per pass.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor, wait
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
from pydicom import Dataset
from pydicom.uid import ParametricMapStorage as PARAMETRIC_MAP

from node import pipeline
from node.calibrate import CalibrationReport, calibrate_for, learn_from_record
from node.config import NodeConfig, Protocol
from node.derive import (
    BUILDERS,
    REPORT_BUILDERS,
    DerivedRequest,
    ReportRequest,
    header_only,
    qc_note,
)
from node.derive.render import robust_range, warm_render
from node.memory import (
    collect_between_series,
    freeze_startup_objects,
    limit_blas_threads,
    reserve_heap,
    tune_allocator,
    tune_gc,
)
from node.metrics import metrics_for
from node.outbox import Outbox, OutboxWorker, RetryPolicy
from node.receive import Receiver
from node.recovery import Recovery
from node.schedule import CostModel, plan_methods
from node.send import Sender, SendReport, SendSession, SendSettings
from node.spool import Spool
from node.timing import LatencyLog, SeriesClock
from node.types import AssembledSeries, OutputBatch, uid_from
from quant import warm_b0, warm_fits
from quant.qc import (
    QcFigures,
    QcReason,
    QcThresholds,
    b0_range,
    qc_gates,
    snr_from_m0,
    valid_fraction,
)
from quant.registry import METHODS

log = logging.getLogger("cest_node.service")

#: Output kinds in the order they are built and sent (the viewer-friendly ones first).
OUTPUT_ORDER = ("derived_mr", "secondary_capture", "parametric_map")

T = TypeVar("T")
Deliver = Callable[[OutputBatch, SeriesClock], bool]
Submit = Callable[[OutputBatch, SeriesClock], "Future[bool]"]

#: What the node's outputs are, for the association a pass keeps open (PS3.4 Annex B; every
#: builder writes Explicit VR Little Endian). Anything else opens an association of its own.
OUTPUT_CONTEXTS = tuple((c, "1.2.840.10008.1.2.1") for c in (
    "1.2.840.10008.5.1.4.1.1.4",       # MR Image Storage
    "1.2.840.10008.5.1.4.1.1.7",       # Secondary Capture Image Storage
    "1.2.840.10008.5.1.4.1.1.30",      # Parametric Map Storage
    "1.2.840.10008.5.1.4.1.1.88.34",   # Comprehensive 3D SR Storage
    "1.2.840.10008.5.1.4.1.1.66.4",    # Segmentation Storage
))


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
    failed: bool = False
    """Processing raised (the series is marked failed); a send still retrying is not this."""
    abandoned: bool = False
    """The deferred pass stopped on shutdown (it runs again at the next start)."""
    pending: list[tuple[str, Any]] = field(default_factory=list, repr=False, compare=False)
    """Batches handed to the processor's ``submit`` and not yet settled (label, future)."""


def parametric_map_of(datasets: Sequence[Dataset]) -> Dataset | None:
    """The Parametric Map among a method's built outputs (None when it has none)."""
    return next((d for d in datasets if d.SOPClassUID == PARAMETRIC_MAP), None)


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


@dataclass
class DeferredJob:
    """The model-based methods of a series, run after its model-free outputs were sent."""

    series: AssembledSeries
    protocol: Protocol
    prep: pipeline.Prepared
    methods: list[str]
    reported: list[tuple[pipeline.MethodResult, Dataset | None]] = field(default_factory=list)
    """The budget-bound pass's maps with their Parametric Maps (header only), which the
    deferred report covers beside the fits; empty for a job resumed after a restart."""


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
    submit
        Optional ``f(batch, clock) -> Future[bool]``: delivers in the background, in the
        order submitted. With it the budget-bound pass streams: each output kind is handed
        over as soon as it is built, and the pass builds the next while it is sent; the
        primary's acknowledgement is marked when its last batch is stored. The deferred pass
        always uses ``deliver``.
    """

    #: voxels per chunk of a model-based fit in the deferred pass (between chunks the pass
    #: gives way to a primary pass and notices a shutdown)
    CHUNK_VOXELS = 4096

    def __init__(self, config: NodeConfig, deliver: Deliver, *, cost: CostModel | None = None,
                 keep_maps: bool = False, submit: Submit | None = None):
        self.config = config
        self.deliver = deliver
        self.submit = submit
        self.cost = cost or CostModel.from_registry(METHODS)
        self.keep_maps = keep_maps

    def process(self, series: AssembledSeries) -> tuple[SeriesOutcome, DeferredJob | None]:
        """The budget-bound pass: the primary method, then the model-free methods that fit.

        Returns the outcome (with its latency record) and the deferred job of the model-based
        methods, if the protocol has any (run it with :meth:`run_deferred`).
        """
        protocol = self.config.protocol(series.protocol)
        clock = SeriesClock(series.key)
        for name, t in series.clock.items():
            clock.mark(name, t)
        clock.mark("processing_start")
        outcome = SeriesOutcome(series.key, protocol.name, ok=False)
        job = None
        try:
            job = self._process(series, protocol, clock, outcome)
        except Exception as exc:  # a failure of one series never stops the node
            self._settle(outcome)
            outcome.ok = False
            outcome.failed = True
            outcome.error = f"{type(exc).__name__}: {exc}"
            log.exception("series %s: processing failed", series.key)
        outcome.record = clock.record(
            budget_s=protocol.budget_s,
            protocol=protocol.name,
            instances=series.instance_count,
            slices=int(series.signal.shape[0]),
            complete=series.complete,
            missing=series.missing,
            methods=outcome.methods,
            skipped=outcome.skipped,
            deferred=outcome.deferred,
            objects=outcome.objects,
            ok=outcome.ok,
            error=outcome.error,
        )
        return outcome, job

    def run_deferred(self, job: DeferredJob, *,
                     between_chunks: Callable[[int, int], bool] | None = None) -> SeriesOutcome:
        """The deferred pass: model-based fits, chunk by chunk, each method's outputs sent as
        soon as it is done. Its latency record has ``"pass": "deferred"``."""
        series, protocol = job.series, job.protocol
        clock = SeriesClock(series.key)
        clock.mark("deferred_start")
        outcome = SeriesOutcome(series.key, protocol.name, ok=True)
        figures, reasons = self._qc(job.prep, protocol)
        note = self._note(series, reasons)
        fitted: list[tuple[pipeline.MethodResult, Dataset | None]] = []
        for name in job.methods:
            last_log = [time.monotonic()]

            def progress(done: int, total: int, name: str = name,
                         last_log: list[float] = last_log) -> bool:
                if time.monotonic() - last_log[0] > 5.0:
                    log.info("series %s: deferred %s %d%% (%d of %d voxels)", series.key,
                             name, 100 * done // max(total, 1), done, total)
                    last_log[0] = time.monotonic()
                return True if between_chunks is None else between_chunks(done, total)

            try:
                with clock.stage(f"method:{name}"):
                    res = pipeline.compute(job.prep, name, chunk_voxels=self.CHUNK_VOXELS,
                                           between_chunks=progress)
                built = self._emit(series, protocol, job.prep, res, clock, outcome, note=note)
                fitted.append((res, parametric_map_of(built)))
                log.info("series %s: deferred %s done in %.1f s", series.key, name, res.seconds)
            except pipeline.Abandoned as exc:
                outcome.ok = False
                outcome.abandoned = True
                outcome.error = str(exc)
                log.warning("series %s: %s", series.key, exc)
                break
            except Exception as exc:
                outcome.ok = False
                outcome.error = f"{name}: {type(exc).__name__}: {exc}"
                log.exception("series %s: deferred %s failed", series.key, name)
        if fitted and not outcome.abandoned:
            try:  # a second report covering every map of the series, the fits included
                self._reports(series, protocol, job.prep, job.reported + fitted, figures,
                              reasons, clock, outcome, deferred=[r.name for r, _ in fitted])
            except Exception as exc:
                outcome.ok = False
                outcome.error = outcome.error or f"report: {type(exc).__name__}: {exc}"
                log.exception("series %s: deferred report failed", series.key)
        clock.mark("last_ack")
        outcome.record = clock.record(
            budget_s=protocol.budget_s, protocol=protocol.name, methods=outcome.methods,
            objects=outcome.objects, ok=outcome.ok, error=outcome.error, **{"pass": "deferred"},
        )
        # the budget binds the model-free pass only
        outcome.record["budget_met"] = None
        outcome.record["total_ms"] = None
        outcome.record["deferred_ms"] = round(clock.since("deferred_start") * 1000.0, 1)
        return outcome

    def deferred_job(self, series: AssembledSeries, methods: list[str]) -> DeferredJob:
        """The deferred job of a series whose budget-bound pass is already done (recovery)."""
        protocol = self.config.protocol(series.protocol)
        return DeferredJob(series, protocol, self._prepare(series, protocol), list(methods))

    def _prepare(self, series: AssembledSeries, protocol: Protocol) -> pipeline.Prepared:
        """Normalise, B0 (WASSR when a companion has it), T1/B1/M0 companions, motion; and
        the B0-corrected band the model-free methods read (:meth:`pipeline.Prepared.band`),
        so that its time counts in ``prepare`` (stage ``b0_band``) before the plan is made,
        not in the first method's compute, where the cost model would take it for that
        method's own (predicted 0.004 s, measured 0.07 s for MTRasym before this)."""
        prep = pipeline.prepare_series(series, protocol)
        for name in protocol.methods:
            info = METHODS.get(name)
            if info is not None and info.model_free and info.needs_b0 and info.reads_ppm:
                prep.band(info.reads_ppm)  # one band serves them all
                break
        return prep

    @staticmethod
    def _qc(prep: pipeline.Prepared, protocol: Protocol) -> tuple[QcFigures, list[QcReason]]:
        """The series' QC figures (B0 range, SNR of M0, valid fraction, motion) and gates."""
        mask = prep.mask
        if not mask.any():
            figures = QcFigures(valid_fraction=0.0)
        else:
            lo, hi = b0_range(prep.shift_ppm, mask)
            offs = prep.offsets_ppm
            figures = QcFigures(
                b0_low_ppm=lo, b0_high_ppm=hi,
                sampled_low_ppm=float(offs.min()), sampled_high_ppm=float(offs.max()),
                snr=snr_from_m0(prep.m0, mask).snr,
                max_motion_mm=None if prep.motion is None else prep.motion.max_displacement_mm,
                valid_fraction=valid_fraction(np.where(prep.valid, 1.0, np.nan), mask),
            )
        q = protocol.qc
        thresholds = QcThresholds(
            min_snr=q.min_snr, max_motion_mm=q.max_motion_mm,
            min_valid_fraction=q.min_valid_fraction, max_abs_b0_ppm=q.max_abs_b0_ppm,
            measure_offset_ppm=3.5,
        )
        return figures, qc_gates(figures, thresholds)

    # ------------------------------------------------------------------------------------
    def _process(self, series: AssembledSeries, protocol: Protocol, clock: SeriesClock,
                 outcome: SeriesOutcome) -> DeferredJob | None:
        with clock.stage("prepare"):
            prep = self._prepare(series, protocol)
        for name, sec in prep.seconds.items():
            clock.add(name, sec * 1000.0)
        slices = series.signal.shape[0]
        n_voxels = int(np.count_nonzero(prep.mask))
        plan = plan_methods(
            protocol.methods, registry=METHODS, cost=self.cost, n_voxels=n_voxels,
            n_slices=slices, n_outputs=len(protocol.outputs), budget_s=protocol.budget_s,
            elapsed_s=clock.since("last_instance") if "last_instance" in clock.marks else 0.0,
            have_t1=prep.t1_s is not None, deferred_enabled=protocol.model_based,
            outputs=protocol.outputs,
        )
        outcome.skipped = dict(plan.skipped)
        outcome.deferred = list(plan.deferred)
        clock.info["predicted_s"] = plan.predicted_s
        clock.info["predicted_parts_s"] = plan.predicted_parts_s
        for name, why in plan.skipped.items():
            log.info("series %s: method %s skipped: %s", series.key, name, why)
        with clock.stage("qc"):
            figures, reasons = self._qc(prep, protocol)
        note = self._note(series, reasons)
        if reasons:
            clock.info["qc"] = [r.code for r in reasons]
            log.warning("series %s: QC gates failed: %s", series.key,
                        "; ".join(r.message for r in reasons))
        measured: dict[str, float] = {}
        results: list[tuple[pipeline.MethodResult, Dataset | None]] = []
        primary_sent: Any = None
        for name in plan.run:
            with clock.stage(f"method:{name}"):
                res = pipeline.compute(prep, name)
            measured[name] = res.seconds
            self.cost.learn(name, seconds=res.seconds, n_voxels=max(res.n_voxels, 1))
            if primary_sent is not None:
                # the primary's objects go out before this method's are built: building
                # holds the GIL and would slow every send of the primary (measured with
                # Orthanc: 41 primary objects in 0.9 s while the next method was built
                # beside them, 0.5 s alone)
                with clock.stage("wait:primary"):
                    wait([primary_sent])
                primary_sent = None
            built = self._emit(series, protocol, prep, res, clock, outcome, note=note,
                               stream=True)
            results.append((res, parametric_map_of(built)))
            if name == plan.primary:
                self._when_sent(outcome, lambda: clock.mark("primary_ack"))
                if outcome.pending:
                    primary_sent = outcome.pending[-1][1]
        clock.info["measured_s"] = {k: round(v, 4) for k, v in measured.items()}
        self._reports(series, protocol, prep, results, figures, reasons, clock, outcome,
                      stream=True)
        self._settle(outcome)
        clock.mark("last_ack")
        outcome.ok = not outcome.error
        if plan.deferred:
            return DeferredJob(series, protocol, prep, list(plan.deferred),
                               reported=[(r, None if pm is None else header_only(pm))
                                         for r, pm in results])
        return None

    def _hand_over(self, batch: OutputBatch, clock: SeriesClock, outcome: SeriesOutcome, *,
                   stream: bool) -> None:
        """Deliver a batch now, or submit it (``stream`` and a ``submit``) to settle later."""
        if not batch.datasets:
            return
        if stream and self.submit is not None:
            outcome.pending.append((batch.label, self.submit(batch, clock)))
            return
        if not self.deliver(batch, clock):
            outcome.error = outcome.error or f"{batch.label}: not every object was stored"

    @staticmethod
    def _when_sent(outcome: SeriesOutcome, action: Callable[[], object]) -> None:
        """Run ``action`` once every batch submitted so far is settled (now, if none is
        pending: the submitted batches are delivered in order, so the last one's end is)."""
        if not outcome.pending:
            action()
            return
        outcome.pending[-1][1].add_done_callback(lambda _f: action())

    @staticmethod
    def _settle(outcome: SeriesOutcome) -> None:
        """Wait for the submitted batches; a batch not stored is the outcome's error."""
        pending, outcome.pending = outcome.pending, []
        for label, fut in pending:
            try:
                ok = bool(fut.result())
            except Exception as exc:  # a delivery that raised: its objects are unaccounted
                log.error("%s: delivery failed: %s: %s", label, type(exc).__name__, exc)
                ok = False
            if not ok:
                outcome.error = outcome.error or f"{label}: not every object was stored"

    @staticmethod
    def _note(series: AssembledSeries, reasons: list[QcReason]) -> str:
        """SeriesDescription note: the QC tags first (descriptions are cut at 64 characters)."""
        parts = [qc_note(reasons), "" if series.complete else "incomplete series"]
        return " ".join(p for p in parts if p)

    def _reports(self, series: AssembledSeries, protocol: Protocol, prep: pipeline.Prepared,
                 results: list[tuple[pipeline.MethodResult, Dataset | None]],
                 figures: QcFigures, reasons: list[QcReason], clock: SeriesClock,
                 outcome: SeriesOutcome, *, deferred: list[str] | None = None,
                 stream: bool = False) -> None:
        """The per-series outputs (SR, summary page, Segmentation) from every model-free map,
        sent after the per-method outputs so they never delay the primary.

        With ``deferred`` (the fits of the deferred pass, which ``results`` ends with) it is
        the deferred pass's report: an SR and a summary page covering every map of
        ``results`` in a series of their own (SeriesDescription ``... incl. deferred``;
        ``deferred maps`` when the job was resumed after a restart and holds only the fits).
        Its series UID names the maps it covers, so a report of other content never reuses
        a UID. The first report stays as sent; the Segmentation is not repeated (its region
        is of the first map, which the fits do not change).
        """
        kinds = [k for k in REPORT_BUILDERS if k in protocol.outputs
                 and (deferred is None or k != "segmentation")]
        if not kinds or not results or not prep.mask.any():
            return
        source_uid = str(series.references[0].SeriesInstanceUID)
        source_number = series.references[0].get("SeriesNumber")
        names = [r.name for r, _ in results]
        if deferred is None:
            what, extra = "report", ""
        else:
            what = "report-deferred:" + ",".join(names)
            extra = "incl. deferred" if len(names) > len(deferred) else "deferred maps"
        note = " ".join(x for x in (extra, "" if series.complete else "incomplete series") if x)
        datasets: list[Dataset] = []
        for i, kind in enumerate(kinds):
            number = output_series_number(source_number, "report", kind)
            req = ReportRequest(
                references=series.references,
                maps={r.name: (r.title, r.unit_ucum, r.values) for r, _ in results},
                mask=prep.mask,
                series_uid=output_series_uid(source_uid, what, kind),
                # the first report's number, and the next ones for the deferred report
                series_number=number if deferred is None else number + 1 + i,
                m0=prep.m0,
                m0_range=self._m0_range(prep),  # else each request computes it again
                qc=figures,
                qc_reasons=reasons,
                parametric_maps={r.name: pm for r, pm in results if pm is not None},
                display_ranges={r.name: r.display for r, _ in results},
                candidate_n_sd=protocol.qc.candidate_n_sd,
                note=note,
            )
            with clock.stage(f"build:report:{kind}"):
                datasets.extend(REPORT_BUILDERS[kind](req))
        self._hand_over(OutputBatch(series.key, datasets, label="report"), clock, outcome,
                        stream=stream)
        outcome.objects += len(datasets)

    @staticmethod
    def _m0_range(prep: pipeline.Prepared) -> tuple[float, float]:
        """The grey window of the series' M0 under the colour overlays, computed once per
        series (a percentile of every voxel: about 5 ms at 40 slices here) and kept with the
        prepared spectra, whose M0 it is."""
        if prep.m0_range is None:
            prep.m0_range = robust_range(prep.m0)
        return prep.m0_range

    def _emit(self, series: AssembledSeries, protocol: Protocol, prep: pipeline.Prepared,
              res: pipeline.MethodResult, clock: SeriesClock, outcome: SeriesOutcome,
              *, note: str | None = None, stream: bool = False) -> list[Dataset]:
        """Build every configured output of one method and deliver them as one batch (with
        ``stream``, hand each output kind over as soon as it is built)."""
        name = res.name
        if self.keep_maps:
            outcome.maps[name] = res.values
        source_uid = str(series.references[0].SeriesInstanceUID)
        source_number = series.references[0].get("SeriesNumber")
        datasets: list[Dataset] = []
        streaming = stream and self.submit is not None
        lo_hi = res.display
        m0_range = self._m0_range(prep) if "secondary_capture" in protocol.outputs else None
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
                m0_range=m0_range if kind == "secondary_capture" else None,
                note=self._note(series, []) if note is None else note,
            )
            try:
                with clock.stage(f"build:{name}:{kind}"):
                    built = BUILDERS[kind](req)
            except Exception as exc:  # one output kind failing never costs the others
                log.exception("series %s: %s %s not built", series.key, name, kind)
                outcome.error = outcome.error or f"{name} {kind}: {type(exc).__name__}: {exc}"
                continue
            datasets.extend(built)
            if streaming:
                self._hand_over(OutputBatch(series.key, built, label=name), clock, outcome,
                                stream=True)
        if not streaming:
            self._hand_over(OutputBatch(series.key, datasets, label=name), clock, outcome,
                            stream=False)
        outcome.objects += len(datasets)
        outcome.methods.append(name)
        return datasets


class Node:
    """The long-running service: a receiver in front of a processor, an outbox and a sender.

    Parameters
    ----------
    config
        The node config. Destinations receive every derived object.
    on_outcome
        Optional callback with every :class:`SeriesOutcome` (after its latency record is
        written): the budget-bound pass and, later, the deferred pass of each series
        (``outcome.record["pass"] == "deferred"``).
    keep_maps
        Keep the computed maps in the outcomes (tests, the demo).
    send_settings
        The sender's settings (default: the config's AE title and TLS, one quick retry per
        send; the outbox retries after that).
    durable
        True (the default): every output goes through the :class:`~node.outbox.Outbox`
        (file and index row before the send, retried with back-off, resumed after a crash).
        False sends straight from memory (only to measure what the outbox costs).

    Notes
    -----
    State lives in the spool's index (:mod:`node.spool`, :mod:`node.outbox`): on
    :meth:`start` the node resumes what a crash interrupted (:mod:`node.recovery`): open
    series are reloaded into the assembler (their idle clock restarts), released but
    unprocessed series are reassembled from the spool and processed, series whose deferred
    pass had not finished run it, and unsent outputs are sent.

    Model-based methods run on a deferred thread, one series at a time, in chunks of voxels;
    before each chunk the deferred pass waits while any budget-bound pass is running, so it
    never delays the next series' primary outputs by more than one chunk.
    """

    def __init__(self, config: NodeConfig, *, on_outcome: Callable[[SeriesOutcome], None] | None = None,
                 keep_maps: bool = False, send_settings: SendSettings | None = None,
                 durable: bool = True):
        self.config = config
        self.durable = durable
        self.latency = LatencyLog(config.log_dir)
        self._stop = threading.Event()
        self.sender = Sender(send_settings or SendSettings(
            calling_ae=config.ae_title, tls=config.tls, retries=1, backoff_s=0.2),
            stop=self._stop)
        self.processor = Processor(config, self._deliver, keep_maps=keep_maps,
                                   submit=self._submit)
        # the budget-bound passes' batches, delivered in order on one thread, each
        # destination over an association kept open while a pass streams (SendSession)
        self._delivery: ThreadPoolExecutor | None = None
        self._sessions: dict[str, SendSession] = {}
        self.spool = Spool(config.spool_dir, fsync=config.fsync)
        self.receiver = Receiver(config, self._on_series, spool=self.spool)
        self.outbox = Outbox(config.spool_dir, policy=RetryPolicy(
            retry_for_s=config.send_retry_for_s, backoff_s=config.send_backoff_s,
            backoff_max_s=config.send_backoff_max_s))
        self.worker = OutboxWorker(self.outbox, self.sender, config.destinations, self._stop,
                                   on_missing=self._rebuild)
        self.metrics = metrics_for(config.metrics)
        self.receiver.on_status = self.metrics.refusal
        self.calibration: CalibrationReport | None = None
        self.on_outcome = on_outcome
        self._unsent_dir = Path(config.spool_dir) / "unsent"
        self._deferred: queue.Queue[DeferredJob | None] = queue.Queue()
        self._busy = 0  # budget-bound passes running
        self._busy_cond = threading.Condition()
        self._deferred_thread: threading.Thread | None = None
        self._recovery: Recovery | None = None

    @property
    def port(self) -> int | None:
        return self.receiver.port

    def start(self) -> Node:
        self._stop.clear()
        tune_allocator()  # before the threads and the calibration (node.memory)
        # the B0 estimate's compiled loop (numba), loaded before the first series needs it
        # (numba's import and the load: about 1 s once per process), and before the heap
        # reserve, so that numba's and LLVM's long-lived allocations are not placed inside
        # it (an ordering only: its effect was not measured on its own)
        warm_b0()
        warm_render()  # the Secondary Captures' compiled pixel loop, likewise
        reserve_heap()  # the first series' page faults, paid now (once per process)
        limit_blas_threads()  # one BLAS thread beside the node's own (node.memory)
        self._delivery = ThreadPoolExecutor(max_workers=1, thread_name_prefix="cest-deliver")
        self._deferred_thread = threading.Thread(target=self._deferred_loop,
                                                 name="cest-deferred", daemon=True)
        self._deferred_thread.start()
        if self.durable:
            self.outbox.resume()
            self.worker.start()
        if self.config.metrics.calibrate:
            self.calibration = calibrate_for(self.processor.cost, self.config.protocols)
        if any(p.model_based and any(m in METHODS and not METHODS[m].model_free
                                     for m in p.methods) for p in self.config.protocols):
            # the fits' compiled loops, loaded (or compiled, once per checkout) now rather
            # than by the first deferred pass, where compiling would hold the interpreter
            # for seconds beside the next series' primary pass
            warm_fits()
        if self.config.metrics.enabled:
            self.metrics.serve(self.config.metrics.host, self.config.metrics.port)
        # the plan is read before the receiver listens: a new series is never taken for an
        # interrupted one
        self._recovery = Recovery(self.config, self.spool, self.receiver.assembler,
                                  process=self._on_series, defer=self._defer_recovered)
        self.receiver.start()
        self._recovery.start()
        freeze_startup_objects()  # full GC passes skip the start-up objects (node.memory)
        tune_gc()  # young collections less often, full ones between series (node.memory)
        return self

    def stop(self) -> None:
        self._stop.set()
        with self._busy_cond:
            self._busy_cond.notify_all()
        if self._recovery is not None:
            self._recovery.join()
        self.receiver.stop()  # closes the spool too
        self.metrics.stop()
        self._deferred.put(None)
        if self._deferred_thread is not None:
            self._deferred_thread.join(timeout=30)
            self._deferred_thread = None
        delivery, self._delivery = self._delivery, None
        if delivery is not None:
            delivery.submit(self._close_sessions)
            delivery.shutdown(wait=True)
        self.worker.join()
        self.outbox.close()

    def __enter__(self) -> Node:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def wait_recovered(self, timeout: float | None = None) -> bool:
        """Wait until what :meth:`start` found to resume has been reloaded or processed."""
        return self._recovery is None or self._recovery.wait(timeout)

    # ------------------------------------------------------------------------------------
    def _on_series(self, series: AssembledSeries) -> None:
        with self._busy_cond:
            self._busy += 1
        try:
            outcome, job = self.processor.process(series)
        finally:
            with self._busy_cond:
                self._busy -= 1
                self._busy_cond.notify_all()
            delivery = self._delivery
            if delivery is not None:
                try:  # after the pass's last batch (the delivery thread runs in order)
                    delivery.submit(self._close_sessions)
                except RuntimeError:  # shut down meanwhile
                    pass
        self._mark(outcome, job)
        self._finish(outcome)
        if job is not None:
            self._deferred.put(job)
        # the pass is over, its outputs acknowledged: collect now, off the clock (node.memory)
        spent = collect_between_series()
        if spent > 0.05:
            log.info("series %s: full garbage collection took %.0f ms", outcome.key,
                     1e3 * spent)

    def _defer_recovered(self, series: AssembledSeries, methods: tuple[str, ...]) -> None:
        """A series whose deferred pass a crash interrupted: run that pass again."""
        self._deferred.put(self.processor.deferred_job(series, list(methods)))

    def _mark(self, outcome: SeriesOutcome, job: DeferredJob | None) -> None:
        """Record the end of a pass in the spool's index (atomic, one row)."""
        try:
            if outcome.failed:
                self.spool.mark_processed(outcome.key, "failed", error=outcome.error)
            elif job is not None:
                self.spool.mark_processed(outcome.key, "deferring", deferred=tuple(job.methods))
            else:
                self.spool.mark_processed(outcome.key, "processed")
        except Exception:  # the spool is closed on shutdown; the state stays as it was
            log.exception("series %s: could not record the end of processing", outcome.key)

    def _rebuild(self, key: str) -> None:
        """An output's file is lost (e.g. a power cut before it reached the disk)."""
        if self._recovery is not None:
            self._recovery.rebuild(key)

    def _finish(self, outcome: SeriesOutcome) -> None:
        learn_from_record(self.processor.cost, outcome.record)  # measured_parts_s, costs
        self.metrics.observe(outcome.record)
        self.latency.write(outcome.record)
        rec = outcome.record
        if rec.get("pass") == "deferred":
            log.info("series %s: deferred pass %s, %d objects in %s ms", outcome.key,
                     "done" if outcome.ok else "FAILED", outcome.objects, rec.get("deferred_ms"))
        else:
            log.info(
                "series %s: %s, %d objects, primary %s ms, total %s ms (budget %s s)",
                outcome.key, "done" if outcome.ok else "FAILED", outcome.objects,
                rec.get("primary_ms"), rec.get("total_ms"), rec.get("budget_s"),
            )
        if self.on_outcome is not None:
            self.on_outcome(outcome)

    def _give_way(self, done: int, total: int) -> bool:
        """Between chunks of a fit: wait while a budget-bound pass runs; False on shutdown."""
        with self._busy_cond:
            self._busy_cond.wait_for(lambda: self._busy == 0 or self._stop.is_set())
        return not self._stop.is_set()

    def _deferred_loop(self) -> None:
        while True:
            job = self._deferred.get()
            if job is None or self._stop.is_set():
                return
            try:
                outcome = self.processor.run_deferred(job, between_chunks=self._give_way)
            except Exception:  # never let one series end the deferred thread
                log.exception("series %s: deferred pass failed", job.series.key)
                continue
            if not outcome.abandoned:  # abandoned on shutdown: resumed at the next start
                self._mark(outcome, None)
            self._finish(outcome)

    def _submit(self, batch: OutputBatch, clock: SeriesClock) -> Future[bool]:
        """Deliver in the background, in order, over the pass's open associations (at once
        when the node is not started)."""
        delivery = self._delivery
        if delivery is not None:
            try:
                return delivery.submit(self._deliver, batch, clock, streamed=True)
            except RuntimeError:  # shut down meanwhile: deliver here
                pass
        done: Future[bool] = Future()
        done.set_result(self._deliver(batch, clock))
        return done

    def _close_sessions(self) -> None:
        """On the delivery thread, when no pass streams: release the kept associations,
        unless another pass is running (its next batch would reopen them)."""
        with self._busy_cond:
            if self._busy:
                return
        sessions, self._sessions = self._sessions, {}
        for session in sessions.values():
            try:
                session.close()
            except Exception:  # a release that fails leaves nothing to clean up here
                log.debug("release of a kept association failed", exc_info=True)

    def _session(self, dest: Any, streamed: bool) -> SendSession | None:
        if not streamed:
            return None
        key = str(dest)
        if key not in self._sessions:
            self._sessions[key] = self.sender.session(OUTPUT_CONTEXTS)
        return self._sessions[key]

    def _deliver(self, batch: OutputBatch, clock: SeriesClock, *, streamed: bool = False) -> bool:
        if not self.config.destinations:
            log.warning("series %s: no destination configured; %d objects kept in %s",
                        batch.key, len(batch.datasets), self._unsent_dir)
            write_datasets(batch.datasets, self._unsent_dir / batch.key)
            return True
        if not self.durable:
            return self._send_from_memory(batch, clock, streamed=streamed)
        with clock.stage(f"outbox:{batch.label}"):
            claim = self.outbox.put(batch, [str(d) for d in self.config.destinations])
        dests = [d for d in self.config.destinations if claim.get(str(d))]

        reports: list[SendReport] = []

        def one(dest: Any) -> int:
            idx = claim[str(dest)]
            chosen = [batch.datasets[i] for i in idx]
            report = self.sender.send(chosen, dest, key=batch.key,
                                      session=self._session(dest, streamed))
            reports.append(report)
            return self.outbox.record(report, [str(d.SOPInstanceUID) for d in chosen],
                                      series_key=batch.key, datasets=chosen)

        with clock.stage(f"send:{batch.label}"):
            unsent = _each_destination(one, dests)
        self.metrics.observe_send(batch.label, reports)
        if sum(unsent):
            clock.info["unsent"] = clock.info.get("unsent", 0) + sum(unsent)
            log.warning("series %s: %d objects of %s wait in the outbox for a retry", batch.key,
                        sum(unsent), batch.label)
            return False
        return True

    def _send_from_memory(self, batch: OutputBatch, clock: SeriesClock, *,
                          streamed: bool = False) -> bool:
        ok = True
        with clock.stage(f"send:{batch.label}"):
            reports = _each_destination(
                lambda dest: self.sender.send(batch.datasets, dest, key=batch.key,
                                              session=self._session(dest, streamed)),
                list(self.config.destinations))
        self.metrics.observe_send(batch.label, reports)
        for rep in reports:
            if not rep.ok:
                ok = False
                failed = [batch.datasets[i.index] for i in rep.items if not i.stored]
                folder = self._unsent_dir / batch.key
                write_datasets(failed, folder)
                log.error("series %s: %d objects not stored at %s; kept in %s", batch.key,
                          len(failed), rep.destination, folder)
        return ok


def _each_destination(send: Callable[[Any], T], destinations: Sequence[Any]) -> list[T]:
    """``send(dest)`` for every destination, in parallel threads when there are several."""
    if len(destinations) == 1:
        return [send(destinations[0])]
    with ThreadPoolExecutor(max_workers=max(len(destinations), 1),
                            thread_name_prefix="send") as pool:
        return list(pool.map(send, destinations))


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
