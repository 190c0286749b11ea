"""Plain types that cross room boundaries inside node/.

They hold no DICOM networking and no I/O. A series travels down the chain as an
:class:`AssembledSeries`; the outputs travel to the sender as :class:`OutputBatch`.
"""

from __future__ import annotations

import hashlib
import uuid
from dataclasses import dataclass, field
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from pydicom import Dataset


_UID_NAMESPACE = uuid.UUID("6f1d2c1e-6b58-4a55-9d0e-6b0b6c3e2a11")  # ours, drawn once


def uid_from(*parts: object) -> str:
    """A deterministic UID in the 2.25 form (PS3.5 B.2) from a UUID5 of the parts."""
    return "2.25." + str(uuid.uuid5(_UID_NAMESPACE, "/".join(str(p) for p in parts)).int)


@lru_cache(maxsize=1024)
def series_key(study_uid: str, series_uid: str) -> str:
    """Pseudonymous key of a series for logs and file names.

    A truncated SHA-256 of the study and series instance UIDs: stable for the same
    series, and it reveals no patient attribute (common practice for log pseudonyms).
    Cached: every instance of a series asks for the same key.
    """
    digest = hashlib.sha256(f"{study_uid}\x00{series_uid}".encode()).hexdigest()
    return f"s-{digest[:16]}"


@dataclass
class Companion:
    """A companion series (M0, WASSR, T1 map, B1 map) placed in the saturation series' geometry.

    Attributes
    ----------
    kind
        ``"m0"``, ``"wassr"``, ``"t1"`` or ``"b1"``.
    values
        float32 in the saturation series' slice order and matrix: ``(slices, rows, cols)``
        for M0 (signal), T1 (seconds) and B1 (relative, 1 = nominal); ``(slices, rows, cols,
        n_offsets)`` for WASSR (signal, columns in ``offsets_ppm`` order).
    offsets_ppm
        WASSR only: the sorted offsets of the columns (M0 frames left out); else None.
    unit
        ``"s"`` (T1), ``"1"`` (relative B1), ``""`` (signal).
    key
        Pseudonymous key of the companion series.
    detail
        How the values were read (unit source, slices matched), for logs.
    """

    kind: str
    values: np.ndarray
    offsets_ppm: np.ndarray | None = None
    unit: str = ""
    key: str = ""
    detail: str = ""


@dataclass
class AssembledSeries:
    """A saturation series ready for computation.

    Attributes
    ----------
    key
        Pseudonymous series key (:func:`series_key`).
    protocol
        Name of the matched protocol in the config.
    signal
        float32 array ``(slices, rows, cols, n_offsets)``: every received frame,
        placed by slice (ascending position along the slice normal) and by offset.
    offsets_ppm
        float64 ``(n_offsets,)``, the saturation offset of each column of ``signal``,
        sorted ascending (M0 frames, |offset| >= the protocol's M0 threshold, included).
    references
        One header-only pydicom Dataset per slice (same order as ``signal``), taken from
        that slice's M0 frame when there is one, else from its first frame; the derive
        builders use them for geometry, patient/study and Source Image Sequence.
    sources
        All header-only source datasets, ``sources[slice][offset_index]`` (None where a
        frame is missing).
    complete
        True when the expected frame count arrived; False when released by idle timeout.
    missing
        Human-readable description of what is missing (empty when complete).
    clock
        Times (seconds, ``time.time()``) of events: ``first_instance``, ``last_instance``,
        ``complete``.
    companions
        Companion series of the protocol that arrived in time, by kind (:class:`Companion`,
        in this series' slice geometry; slices matched by position along the normal).
    companion_notes
        Why a configured companion is absent (not arrived, geometry differs), one line each.
    """

    key: str
    protocol: str
    signal: np.ndarray
    offsets_ppm: np.ndarray
    references: list[Dataset]
    sources: list[list[Dataset | None]]
    complete: bool = True
    missing: str = ""
    clock: dict[str, float] = field(default_factory=dict)
    instance_count: int = 0
    companions: dict[str, Companion] = field(default_factory=dict)
    companion_notes: list[str] = field(default_factory=list)


@dataclass
class OutputBatch:
    """Derived objects of one series for one destination, sent over one association."""

    key: str
    datasets: list[Dataset]
    label: str = ""
