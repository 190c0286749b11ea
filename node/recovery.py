"""Crash recovery: on start, resume what the spool's index says was interrupted.

The index (:mod:`node.spool`) is read once, before the receiver listens, so a series that
arrives after the start is never taken for an interrupted one. Then, on a thread of its own:

=====================  ========================================================================
series state           what happens
=====================  ========================================================================
``receiving``, held    its spooled instances are placed into the live assembler again; the
                       series keeps waiting for the rest, its idle clock restarted (a series
                       already whole is released at once)
``complete``,          reassembled from the spool (a private assembler, flushed) and processed
``incomplete``         as if it had just been released
``deferring``          reassembled and its remaining model-based methods queued for the
                       deferred pass (the budget-bound outputs are in the outbox already)
``processed``,         nothing: their unsent outputs are the outbox's (:meth:`Outbox.resume`)
``failed``
=====================  ========================================================================

Outputs are deterministic (same UIDs), so processing a series again after a crash rebuilds the
same objects; the outbox sends each destination only what it has not acknowledged. A recovered
series keeps its first and last instance times from the index, so its latency record spans the
downtime.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from pydicom import dcmread

from node.assemble import Assembler, AssemblyError
from node.config import NodeConfig
from node.spool import Spool
from node.types import AssembledSeries

__all__ = ["Recovery", "RecoveryPlan", "reassemble"]

log = logging.getLogger("cest_node.recovery")

OPEN_STATES = ("receiving", "held")
UNPROCESSED_STATES = ("complete", "incomplete")


@dataclass
class RecoveryPlan:
    """Series keys by what recovery does with them."""

    reload: list[str] = field(default_factory=list)
    process: list[str] = field(default_factory=list)
    deferred: list[str] = field(default_factory=list)

    def __bool__(self) -> bool:
        return bool(self.reload or self.process or self.deferred)


def plan_recovery(spool: Spool) -> RecoveryPlan:
    """What the index says is interrupted."""
    plan = RecoveryPlan()
    for rec in spool.all_series():
        if rec.state in OPEN_STATES:
            plan.reload.append(rec.key)
        elif rec.state in UNPROCESSED_STATES:
            plan.process.append(rec.key)
        elif rec.state == "deferring":
            plan.deferred.append(rec.key)
    return plan


def reassemble(config: NodeConfig, spool: Spool, key: str, *,
               timeout_s: float = 120.0) -> AssembledSeries | None:
    """The series ``key`` assembled again from its spooled instances (None when it cannot be:
    no instance left, or not processable).

    Its clock keeps the index's first and last instance times.
    """
    out: list[AssembledSeries] = []
    asm = Assembler(config, out.append)
    n = 0
    with asm:
        for path in spool.instance_paths(key):
            try:
                ds = dcmread(path)
                asm.add(ds)
                n += 1
            except (OSError, ValueError, AssemblyError) as exc:
                log.error("series %s: a spooled instance cannot be read again (%s)", key,
                          type(exc).__name__)
        asm.flush(timeout=timeout_s)
    if not out:
        log.error("series %s: cannot be reassembled from %d spooled instances", key, n)
        return None
    series = out[0]
    rec = spool.series(key)
    if rec is not None:
        series.clock["first_instance"] = rec.first_at
        series.clock["last_instance"] = rec.last_at
    series.clock["recovered"] = time.time()
    return series


class Recovery:
    """Resumes interrupted series (see the module docstring).

    Parameters
    ----------
    config, spool, assembler
        The node's config, spool and live assembler.
    process
        ``f(series)``: the node's budget-bound pass.
    defer
        ``f(series, methods)``: queue a deferred pass.

    The plan is read when the object is made: make it before the receiver listens.
    """

    def __init__(self, config: NodeConfig, spool: Spool, assembler: Assembler, *,
                 process: Callable[[AssembledSeries], None],
                 defer: Callable[[AssembledSeries, tuple[str, ...]], None]):
        self.config = config
        self.spool = spool
        self.assembler = assembler
        self.process = process
        self.defer = defer
        self.plan = plan_recovery(spool)
        self._done = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._rebuilding: set[str] = set()
        self._lock = threading.Lock()

    def start(self) -> Recovery:
        if not self.plan:
            self._done.set()
            return self
        log.info("recovery: %d open series to reload, %d to process, %d deferred passes to "
                 "run again", len(self.plan.reload), len(self.plan.process),
                 len(self.plan.deferred))
        self._thread = threading.Thread(target=self._run, name="cest-recovery", daemon=True)
        self._thread.start()
        return self

    def wait(self, timeout: float | None = None) -> bool:
        return self._done.wait(timeout)

    def join(self, timeout: float = 60.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
            self._thread = None

    def rebuild(self, key: str) -> None:
        """Process a series again (its outputs' files are lost), on a short-lived thread."""
        with self._lock:
            if key in self._rebuilding:
                return
            self._rebuilding.add(key)

        def run() -> None:
            try:
                series = reassemble(self.config, self.spool, key)
                if series is not None and not self._stop.is_set():
                    self.process(series)
            except Exception:
                log.exception("series %s: rebuild failed", key)
            finally:
                with self._lock:
                    self._rebuilding.discard(key)

        threading.Thread(target=run, name="cest-rebuild", daemon=True).start()

    # ------------------------------------------------------------------------------------
    def _run(self) -> None:
        try:
            for key in self.plan.reload:
                if self._stop.is_set():
                    return
                self._reload(key)
            for key in self.plan.process:
                if self._stop.is_set():
                    return
                series = reassemble(self.config, self.spool, key)
                if series is not None:
                    log.info("series %s: released before the last stop and not processed; "
                             "processing it now", key)
                    self.process(series)
            for key in self.plan.deferred:
                if self._stop.is_set():
                    return
                methods = self.spool.deferred_methods(key)
                series = reassemble(self.config, self.spool, key)
                if series is not None and methods:
                    log.info("series %s: deferred pass (%s) interrupted by the last stop; "
                             "queued again", key, ", ".join(methods))
                    self.defer(series, methods)
        except Exception:
            log.exception("recovery failed")
        finally:
            self._done.set()

    def _reload(self, key: str) -> None:
        """Place an open series' spooled instances into the live assembler again."""
        placed = 0
        for path in self.spool.instance_paths(key):
            try:
                prep = self.assembler.prepare(dcmread(path))
                if prep is None:
                    continue
                self.assembler.place(prep)
                placed += 1
            except (OSError, ValueError, AssemblyError) as exc:
                log.error("series %s: a spooled instance cannot be placed again (%s)", key,
                          type(exc).__name__)
        log.info("series %s: %d spooled instances reloaded; waiting for the rest", key, placed)
