"""The time budget: which methods run for a series, in which order, and why others do not.

The protocol's budget runs from the last instance received to the last output acknowledged.
The primary method (the first in the protocol's list) always runs and is sent first. Each
further model-free method runs only if its predicted cost (compute + build + send) fits what is
left of the budget; otherwise it is skipped with a reason that goes to the latency log.
Model-based methods never run inside the budget: they go to the deferred pass.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

#: The output kinds in build order (node.config.OUTPUT_KINDS; repeated so this module needs no
#: config import).
DEFAULT_OUTPUTS: tuple[str, ...] = ("parametric_map", "derived_mr", "secondary_capture")


#: Build seconds of each output kind: a fixed part per series plus a part per slice, measured on
#: the 2-core development machine (128 x 128 slices, 1 to 20 of them: Parametric Map 17 ms + 2.3
#: ms per slice, RGB Secondary Capture 14-21 ms per slice, derived MR 1-3 ms per slice); the
#: start-up calibration (:mod:`node.calibrate`) replaces them on the machine the node runs on.
DEFAULT_BUILD_S_FIXED = {"parametric_map": 0.015, "secondary_capture": 0.0, "derived_mr": 0.0}
DEFAULT_BUILD_S_PER_SLICE = {"parametric_map": 0.0025, "secondary_capture": 0.015,
                             "derived_mr": 0.003}

#: Objects each output kind makes per series: one multi-frame Parametric Map, one image per slice
#: for the others.
_PER_SERIES = {"parametric_map": True}


def objects_per_kind(kind: str, n_slices: int) -> int:
    """Objects one method's output of ``kind`` makes for a series of ``n_slices`` slices."""
    return 1 if _PER_SERIES.get(kind, False) else n_slices


@dataclass
class CostModel:
    """Predicted seconds per stage, calibrated on this machine and refreshed from measurements.

    Three parts make a method's predicted cost: compute (``compute_s_per_voxel[method]`` times
    the brain voxels), build (``build_s_fixed[kind]`` plus ``build_s_per_slice[kind]`` times the
    slices, for each output kind) and send (``send_s_per_object`` times the objects). Each starts from a default (the
    registry's compute figure, :data:`DEFAULT_BUILD_S_PER_SLICE`), is replaced by the start-up
    calibration and then follows the measured figures of every series by an exponential moving
    average (weight ``alpha``), so the prediction follows the machine it runs on.
    """

    compute_s_per_voxel: dict[str, float] = field(default_factory=dict)
    build_s_per_slice: dict[str, float] = field(
        default_factory=lambda: dict(DEFAULT_BUILD_S_PER_SLICE))
    build_s_fixed: dict[str, float] = field(default_factory=lambda: dict(DEFAULT_BUILD_S_FIXED))
    #: 10 ms per derived object, outbox write included: measured on the development machine
    #: (41 objects of a 20-slice method in 0.44 s to storescp, tests/bench/bench_stages.py);
    #: refreshed from every series' measured send
    send_s_per_object: float = 0.010
    alpha: float = 0.3

    @classmethod
    def from_registry(cls, methods: Mapping[str, Any]) -> CostModel:
        return cls({name: float(m.cost_s_per_voxel) for name, m in methods.items()})

    def predict_parts(self, method: str, *, n_voxels: int, n_slices: int,
                      outputs: Sequence[str] = DEFAULT_OUTPUTS) -> dict[str, float]:
        """Predicted seconds of one method: ``{"compute", "build", "send", "total"}``."""
        per_voxel = self.compute_s_per_voxel.get(method, 1e-6)
        compute = per_voxel * max(n_voxels, 0)
        build = sum(self.build_s_fixed.get(k, 0.0) + self.build_s_per_slice.get(k, 0.02) * n_slices
                    for k in outputs)
        objects = sum(objects_per_kind(k, n_slices) for k in outputs)
        send = self.send_s_per_object * objects
        return {"compute": compute, "build": build, "send": send,
                "total": compute + build + send}

    def predict(self, method: str, *, n_voxels: int, n_slices: int, n_outputs: int = 3,
                outputs: Sequence[str] | None = None) -> float:
        """Predicted seconds of one method (compute + build + send).

        ``outputs`` names the output kinds; without it, the first ``n_outputs`` of the
        three kinds are assumed.
        """
        kinds = DEFAULT_OUTPUTS[:max(n_outputs, 1)] if outputs is None else outputs
        return self.predict_parts(method, n_voxels=n_voxels, n_slices=n_slices,
                                  outputs=kinds)["total"]

    def _blend(self, old: float | None, measured: float) -> float:
        return measured if old is None else (1 - self.alpha) * old + self.alpha * measured

    def learn(self, method: str, *, seconds: float, n_voxels: int) -> None:
        """Refresh a method's compute cost from one measurement."""
        if n_voxels <= 0 or seconds <= 0:
            return
        self.compute_s_per_voxel[method] = self._blend(
            self.compute_s_per_voxel.get(method), seconds / n_voxels)

    def learn_build(self, kind: str, *, seconds: float, n_slices: int) -> None:
        """Refresh an output kind's build cost per slice from one measurement (one method's
        outputs of that kind); the fixed part stays as calibrated."""
        if n_slices <= 0 or seconds <= 0:
            return
        per_slice = max(seconds - self.build_s_fixed.get(kind, 0.0), 0.0) / n_slices
        self.build_s_per_slice[kind] = self._blend(self.build_s_per_slice.get(kind), per_slice)

    def learn_send(self, *, seconds: float, n_objects: int) -> None:
        """Refresh the send cost per object from one batch (every destination, in parallel)."""
        if n_objects <= 0 or seconds <= 0:
            return
        self.send_s_per_object = self._blend(self.send_s_per_object, seconds / n_objects)

    def snapshot(self) -> dict[str, Any]:
        """The current figures (for the log and the calibration report)."""
        return {"compute_s_per_voxel": dict(self.compute_s_per_voxel),
                "build_s_fixed": dict(self.build_s_fixed),
                "build_s_per_slice": dict(self.build_s_per_slice),
                "send_s_per_object": self.send_s_per_object}


@dataclass
class Plan:
    primary: str
    run: list[str]
    deferred: list[str]
    skipped: dict[str, str]
    predicted_s: dict[str, float]
    #: per method ``{"compute", "build", "send", "total"}`` seconds, as predicted when planned
    predicted_parts_s: dict[str, dict[str, float]] = field(default_factory=dict)


def plan_methods(
    methods: Sequence[str],
    *,
    registry: Mapping[str, Any],
    cost: CostModel,
    n_voxels: int,
    n_slices: int,
    n_outputs: int,
    budget_s: float,
    elapsed_s: float,
    have_t1: bool,
    deferred_enabled: bool = True,
    outputs: Sequence[str] | None = None,
) -> Plan:
    """Decide what runs now, what is deferred and what is skipped (with the reason).

    ``elapsed_s`` is the time already spent since the last instance when the plan is made.
    ``outputs`` names the protocol's output kinds (default: the first ``n_outputs`` kinds).
    """
    if not methods:
        raise ValueError("a protocol needs at least one method (the first is the primary)")
    primary = methods[0]
    run: list[str] = []
    deferred: list[str] = []
    skipped: dict[str, str] = {}
    predicted: dict[str, float] = {}
    parts: dict[str, dict[str, float]] = {}
    kinds = tuple(DEFAULT_OUTPUTS[:max(n_outputs, 1)] if outputs is None else outputs)
    # per method only the kinds each method makes: the per-series reports (structured_report,
    # summary) are built once after every method, never planned (as node.calibrate learns
    # them); counted per method, they had doubled each method's predicted build and send
    kinds = tuple(k for k in kinds if k in DEFAULT_OUTPUTS)
    left = budget_s - elapsed_s
    for i, name in enumerate(methods):
        info = registry.get(name)
        if info is None:
            skipped[name] = "unknown method"
            continue
        if info.needs_t1 and not have_t1:
            skipped[name] = "needs a T1 map and the series has none"
            continue
        if not info.model_free:
            if deferred_enabled:
                deferred.append(name)
            else:
                skipped[name] = "model-based methods are switched off for this protocol"
            continue
        part = cost.predict_parts(name, n_voxels=n_voxels, n_slices=n_slices, outputs=kinds)
        p = part["total"]
        predicted[name] = round(p, 4)
        parts[name] = {k: round(v, 6) for k, v in part.items()}
        if i == 0 or name == primary:
            run.append(name)
            left -= p
            continue
        if p <= left:
            run.append(name)
            left -= p
        else:
            skipped[name] = (
                f"predicted {p:.2f} s does not fit the {max(left, 0.0):.2f} s left of the "
                f"{budget_s:g} s budget"
            )
    if primary not in run:
        # The primary always runs when it can run at all; if it cannot, say so loudly.
        reason = skipped.get(primary, "not model-free")
        raise ValueError(f"primary method {primary!r} cannot run: {reason}")
    return Plan(primary=primary, run=run, deferred=deferred, skipped=skipped,
                predicted_s=predicted, predicted_parts_s=parts)
