"""Budget honesty: the scheduler's cost model measured on this machine and kept up to date.

At start-up, :func:`calibrate` runs a short warm-up on a small synthetic phantom through the
same code a series takes (:func:`node.pipeline.prepare`, :func:`node.pipeline.compute` and the
output builders) and replaces the cost model's default figures with what this machine does.
The warm-up also pays the first-call costs (imports, caches) before the first series arrives.

After every series, :func:`learn_from_record` reads the stage times of its latency record and
refreshes the build and send figures (the compute figures are refreshed by the processor as
each method runs), and adds ``measured_parts_s`` beside the ``predicted_parts_s`` the plan
made, so that each record shows what was predicted and what happened, part by part.

Send cost is not measured at start-up (no archive is contacted before the first series): it
starts from the default and follows the measured sends.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from pydicom import Dataset

from node import pipeline
from node.derive import BUILDERS, DerivedRequest
from node.schedule import DEFAULT_OUTPUTS, CostModel, objects_per_kind
from quant.registry import METHODS

log = logging.getLogger("cest_node.calibrate")

#: Phantom used by the warm-up: 3 slices of 128 x 128 (about 26,000 brain voxels): the build
#: cost per slice grows with the pixels of a slice (an RGB Secondary Capture costs 5 ms per slice
#: at 64 x 64 and 15 ms at 128 x 128 here), so the warm-up uses the common CEST matrix; about
#: half a second on a 2-core machine once the phantom's spectra are cached.
WARMUP_SLICES = 3
WARMUP_SIZE = 128


@dataclass
class CalibrationReport:
    """What the start-up calibration measured.

    Attributes
    ----------
    seconds
        Wall time of the whole warm-up (phantom included).
    compute_s_per_voxel
        Measured compute seconds per brain voxel, per model-free method.
    build_s_fixed, build_s_per_slice
        Measured build seconds of each output kind (fixed part per series, part per slice).
    before, after
        The cost model's figures before and after (:meth:`CostModel.snapshot`).
    cached
        True when the figures were measured earlier in this process (:func:`calibrate_for`).
    """

    seconds: float
    compute_s_per_voxel: dict[str, float] = field(default_factory=dict)
    build_s_fixed: dict[str, float] = field(default_factory=dict)
    build_s_per_slice: dict[str, float] = field(default_factory=dict)
    before: dict[str, Any] = field(default_factory=dict)
    after: dict[str, Any] = field(default_factory=dict)
    cached: bool = False


def _references(slices: int, size: int, seed: int) -> tuple[Any, list[Dataset]]:
    """The warm-up phantom and one header-only reference dataset per slice (its M0 frame)."""
    from node.synth import series_from_arrays  # the phantom scanner; only needed here
    from quant.phantom import make_phantom

    ph = make_phantom(slices=slices, size=size, seed=seed)
    datasets = series_from_arrays(ph.signal, ph.offsets_ppm, seed=f"calibration-{seed}",
                                  series_description="cest-node calibration phantom")
    m0_index = int(np.flatnonzero(np.abs(ph.offsets_ppm) >= 20.0)[0])
    refs = []
    for s in range(slices):  # series_from_arrays: offset by offset, slice by slice within
        ds = datasets[m0_index * slices + s]
        hdr = Dataset({t: e for t, e in ds.items() if t != 0x7FE00010})
        hdr.file_meta = ds.file_meta
        refs.append(hdr)
    return ph, refs


def _best_of(fn: Any, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def calibrate(
    cost: CostModel,
    *,
    methods: Iterable[str] | None = None,
    outputs: Iterable[str] = DEFAULT_OUTPUTS,
    slices: int = WARMUP_SLICES,
    size: int = WARMUP_SIZE,
    repeats: int = 2,
    seed: int = 0,
) -> CalibrationReport:
    """Measure this machine's compute and build costs and write them into ``cost``.

    Parameters
    ----------
    cost
        The cost model to update in place (the processor's).
    methods
        Methods to time (default: every model-free method of the registry); model-based
        methods never run inside the budget and are not timed here.
    outputs
        Output kinds to time.
    slices, size
        The warm-up phantom: ``slices`` slices of ``size`` x ``size``; at least 2 slices (the
        build cost is fitted as a fixed part plus a part per slice from 1 and ``slices``).
    repeats
        Each timing is the best of this many runs (the least disturbed one).

    Returns
    -------
    CalibrationReport
    """
    if slices < 2:
        raise ValueError(f"slices: the calibration needs at least 2 slices, got {slices}")
    if size < 16:
        raise ValueError(f"size: the calibration phantom needs at least 16 x 16, got {size}")
    if repeats < 1:
        raise ValueError(f"repeats: at least 1, got {repeats}")
    t_start = time.perf_counter()
    before = cost.snapshot()
    ph, refs = _references(slices, size, seed)
    prep = pipeline.prepare(ph.signal, ph.offsets_ppm)
    names = [m for m in (methods if methods is not None else METHODS)
             if m in METHODS and METHODS[m].model_free and not METHODS[m].needs_t1]
    report = CalibrationReport(seconds=0.0, before=before)
    values = None
    n_voxels = max(int(np.count_nonzero(prep.mask)), 1)
    for name in names:
        res = pipeline.compute(prep, name)  # the first call pays any one-time cost
        seconds = _best_of(lambda name=name: pipeline.compute(prep, name), repeats)
        per_voxel = seconds / n_voxels
        cost.compute_s_per_voxel[name] = per_voxel
        report.compute_s_per_voxel[name] = per_voxel
        if values is None:
            values = res
    if values is None:  # no model-free method to time: build with the primary's stand-in
        values = pipeline.MethodResult("mtr_asym", "MTRasym", "%",
                                       np.zeros(ph.m0.shape, np.float32), 0.0, n_voxels)
    lo_hi = pipeline.display_range(values.values)
    for kind in outputs:
        if kind not in BUILDERS:
            raise ValueError(f"outputs: unknown output kind {kind!r}")

        def build(n: int, kind: str = kind) -> None:
            req = DerivedRequest(
                references=refs[:n], values=values.values[:n], method=values.name,
                title=values.title, unit_ucum=values.unit_ucum,
                series_uid="2.25.1", series_number=1,
                m0=prep.m0[:n] if kind == "secondary_capture" else None, display_range=lo_hi,
            )
            BUILDERS[kind](req)

        build(1)  # first call: imports and caches
        t_one = _best_of(lambda: build(1), repeats)
        t_all = _best_of(lambda: build(slices), repeats)
        per_slice = max(t_all - t_one, 0.0) / (slices - 1)
        fixed = max(t_one - per_slice, 0.0)
        cost.build_s_fixed[kind] = fixed
        cost.build_s_per_slice[kind] = per_slice
        report.build_s_fixed[kind] = fixed
        report.build_s_per_slice[kind] = per_slice
    report.after = cost.snapshot()
    report.seconds = time.perf_counter() - t_start
    log.info("cost model calibrated in %.2f s: compute %s s/voxel; build %s s/slice",
             report.seconds,
             ", ".join(f"{k} {v:.2e}" for k, v in report.compute_s_per_voxel.items()),
             ", ".join(f"{k} {v:.4f}" for k, v in report.build_s_per_slice.items()))
    return report


def measured_parts(record: Mapping[str, Any]) -> dict[str, dict[str, float]]:
    """What each method of a series cost, from its latency record's ``stages_ms``.

    ``{method: {"compute", "build", "send", "total"}}`` in seconds, the same shape as the
    plan's ``predicted_parts_s``. Stage names: ``method:NAME``, ``build:NAME:KIND``, and for
    the send part ``outbox:NAME`` (the durable write before sending) with ``send:NAME`` (or
    ``write:NAME`` offline).
    """
    stages = record.get("stages_ms") or {}
    out: dict[str, dict[str, float]] = {}
    for stage, ms in stages.items():
        parts = stage.split(":")
        if len(parts) < 2:
            continue
        kind, name = parts[0], parts[1]
        slot = {"method": "compute", "build": "build", "send": "send", "write": "send",
                "outbox": "send"}.get(kind)
        if slot is None:
            continue
        m = out.setdefault(name, {"compute": 0.0, "build": 0.0, "send": 0.0})
        m[slot] += float(ms) / 1000.0
    for m in out.values():
        m["total"] = m["compute"] + m["build"] + m["send"]
        for k in m:
            m[k] = round(m[k], 6)
    return out


def learn_from_record(cost: CostModel, record: dict[str, Any]) -> None:
    """Refresh the build and send figures from one series' record, and add
    ``measured_parts_s`` to the record (beside ``predicted_parts_s``).

    The compute figures are learned by the processor itself as each method runs. A record
    without ``slices`` (written by an older node) only gets ``measured_parts_s``.
    """
    record["measured_parts_s"] = measured_parts(record)
    slices = record.get("slices")
    if not isinstance(slices, int) or slices <= 0:
        return
    stages = record.get("stages_ms") or {}
    built: dict[str, list[str]] = {}
    for stage, ms in stages.items():
        parts = stage.split(":")
        # the per-series reports ("build:report:<kind>") are one object each, whatever the
        # slice count, and never planned: they stay out of the per-method cost model
        if parts[0] == "build" and len(parts) == 3 and parts[1] != "report":
            cost.learn_build(parts[2], seconds=float(ms) / 1000.0, n_slices=slices)
            built.setdefault(parts[1], []).append(parts[2])
    delivered: dict[str, float] = {}  # the outbox's durable write counts as part of sending
    for stage, ms in stages.items():
        parts = stage.split(":")
        if parts[0] in ("send", "outbox") and len(parts) == 2 and parts[1] in built:
            delivered[parts[1]] = delivered.get(parts[1], 0.0) + float(ms) / 1000.0
    for name, seconds in delivered.items():
        n = sum(objects_per_kind(k, slices) for k in built[name])
        cost.learn_send(seconds=seconds, n_objects=n)


_CACHE: dict[tuple[Any, ...], CalibrationReport] = {}
_CACHE_LOCK = threading.Lock()


def calibrate_for(cost: CostModel, protocols: Iterable[Any], **kwargs: Any) -> CalibrationReport:
    """Calibrate ``cost`` for the methods and outputs of the given protocols.

    The figures of a machine do not change within one process, so a second node started in
    the same process (tests, ``process`` after ``serve``) reuses the first measurement
    (``report.cached`` is True) instead of repeating the warm-up.
    """
    protocols = list(protocols)
    methods = tuple(sorted({m for p in protocols for m in p.methods}))
    outputs = tuple(k for k in DEFAULT_OUTPUTS if any(k in p.outputs for p in protocols))
    key = (methods, outputs, tuple(sorted(kwargs.items())))
    with _CACHE_LOCK:
        cached = _CACHE.get(key)
        if cached is None:
            cached = calibrate(cost, methods=methods, outputs=outputs, **kwargs)
            _CACHE[key] = cached
            return cached
    cost.compute_s_per_voxel.update(cached.compute_s_per_voxel)
    cost.build_s_fixed.update(cached.build_s_fixed)
    cost.build_s_per_slice.update(cached.build_s_per_slice)
    return replace(cached, cached=True, before=cached.before, after=cost.snapshot())
