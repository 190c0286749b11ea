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


@dataclass
class CostModel:
    """Predicted seconds per stage, calibrated on this machine and refreshed from measurements.

    ``compute_s_per_voxel`` starts from the registry's figure for each method; after each series
    the measured figure updates it by an exponential moving average (weight ``alpha``), so the
    prediction follows the machine it runs on.
    """

    compute_s_per_voxel: dict[str, float] = field(default_factory=dict)
    output_s_per_slice: float = 0.02
    send_s_per_object: float = 0.004
    alpha: float = 0.3

    @classmethod
    def from_registry(cls, methods: Mapping[str, Any]) -> CostModel:
        return cls({name: float(m.cost_s_per_voxel) for name, m in methods.items()})

    def predict(self, method: str, *, n_voxels: int, n_slices: int, n_outputs: int) -> float:
        per_voxel = self.compute_s_per_voxel.get(method, 1e-6)
        objects = n_slices * 2 + 1  # derived MR + SC per slice, one Parametric Map
        return (
            per_voxel * n_voxels
            + self.output_s_per_slice * n_slices * max(n_outputs, 1) / 3.0
            + self.send_s_per_object * objects
        )

    def learn(self, method: str, *, seconds: float, n_voxels: int) -> None:
        if n_voxels <= 0 or seconds <= 0:
            return
        measured = seconds / n_voxels
        old = self.compute_s_per_voxel.get(method)
        self.compute_s_per_voxel[method] = (
            measured if old is None else (1 - self.alpha) * old + self.alpha * measured
        )


@dataclass
class Plan:
    primary: str
    run: list[str]
    deferred: list[str]
    skipped: dict[str, str]
    predicted_s: dict[str, float]


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
) -> Plan:
    """Decide what runs now, what is deferred and what is skipped (with the reason).

    ``elapsed_s`` is the time already spent since the last instance when the plan is made.
    """
    if not methods:
        raise ValueError("a protocol needs at least one method (the first is the primary)")
    primary = methods[0]
    run: list[str] = []
    deferred: list[str] = []
    skipped: dict[str, str] = {}
    predicted: dict[str, float] = {}
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
        p = cost.predict(name, n_voxels=n_voxels, n_slices=n_slices, n_outputs=n_outputs)
        predicted[name] = round(p, 4)
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
                predicted_s=predicted)
