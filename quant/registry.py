"""The method registry the scheduler reads: what each map is, what it needs, what it costs.

Every entry's ``compute(z, offsets_ppm, *, t1_s=None) -> map`` takes normalised, B0-corrected
Z-spectra ``(..., n)`` with their offsets and returns the map ``(...)``. ``cost_s_per_voxel``
is the seconds per voxel of ``compute`` measured by ``python -m tests.bench.bench_modelfree``
on one core (20 x 128 x 128 x 61, float32), rounded up; the shared normalisation and B0
correction are not included (the benchmark prints them). Model-based methods are added by
their own modules with :func:`register`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from quant.measures import APT_BAND_PPM, APT_OFFSET_PPM, apt_star, arex, mtr_asym, mtr_asym_t1

__all__ = ["MethodInfo", "METHODS", "PRIMARY_METHOD", "PREPARE_COST_S_PER_VOXEL", "register", "get_method"]

Compute = Callable[..., NDArray[np.floating]]


@dataclass(frozen=True)
class MethodInfo:
    """One registered method.

    Attributes
    ----------
    name : registry key, e.g. ``'mtr_asym'``.
    title : human title for series descriptions.
    unit_ucum : unit of the map in UCUM (``'%'``, ``'%/s'``).
    needs_t1 : True when ``compute`` requires ``t1_s``.
    model_free : False for fits (the scheduler defers them).
    cost_s_per_voxel : measured seconds per voxel of ``compute``.
    compute : ``compute(z, offsets_ppm, *, t1_s=None) -> map``.
    needs_b0 : True when the method expects B0-corrected input; False for fits that model the
        water shift themselves (they get the uncorrected spectra).
    needs_saturation : True when ``compute`` also takes the saturation parameters
        ``b1_ut``, ``tsat_s`` and ``field_t`` as keyword arguments (Bloch-McConnell fits).
    reads_ppm : the offsets whose Z ``compute`` evaluates, when it reads only a few (each is
        interpolated from its four nearest samples, :func:`quant.measures.z_at`); a caller
        may then pass only the columns around them (:func:`band_columns`). None: the whole
        spectrum.
    """

    name: str
    title: str
    unit_ucum: str
    needs_t1: bool
    model_free: bool
    cost_s_per_voxel: float
    compute: Compute
    needs_b0: bool = True
    needs_saturation: bool = False
    reads_ppm: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        if not self.name or not self.name.replace("_", "").isalnum():
            raise ValueError(f"method name must be a non-empty identifier, got {self.name!r}")
        if not (np.isfinite(self.cost_s_per_voxel) and self.cost_s_per_voxel > 0):
            raise ValueError(f"cost_s_per_voxel of {self.name} must be positive")
        if not callable(self.compute):
            raise ValueError(f"compute of {self.name} must be callable")


METHODS: dict[str, MethodInfo] = {}
"""name -> MethodInfo, in registration order (the primary method first)."""

PRIMARY_METHOD = "mtr_asym"


def register(info: MethodInfo, *, replace: bool = False) -> MethodInfo:
    """Add a method to :data:`METHODS`; a second registration under one name needs ``replace``."""
    if not isinstance(info, MethodInfo):
        raise ValueError("register takes a MethodInfo")
    if info.name in METHODS and not replace and METHODS[info.name] is not info:
        raise ValueError(f"method {info.name!r} is already registered")
    METHODS[info.name] = info
    return info


def get_method(name: str) -> MethodInfo:
    """The registered method ``name``; a ValueError lists the known names otherwise."""
    try:
        return METHODS[name]
    except KeyError:
        raise ValueError(f"unknown method {name!r}; known: {', '.join(METHODS)}") from None


def _mtr_asym(z: Any, offsets_ppm: Any, *, t1_s: Any = None) -> NDArray[np.floating]:
    return mtr_asym(z, offsets_ppm)


def _mtr_asym_t1(z: Any, offsets_ppm: Any, *, t1_s: Any = None) -> NDArray[np.floating]:
    return mtr_asym_t1(z, offsets_ppm, t1_s)


def _apt_star(z: Any, offsets_ppm: Any, *, t1_s: Any = None) -> NDArray[np.floating]:
    return apt_star(z, offsets_ppm)


def _arex(z: Any, offsets_ppm: Any, *, t1_s: Any = None) -> NDArray[np.floating]:
    return arex(z, offsets_ppm, t1_s)


PREPARE_COST_S_PER_VOXEL = 2e-6
"""Seconds per voxel of the shared preparation (normalise, estimate and correct B0), measured
by the same benchmark and rounded up; it is paid once per series, not per method."""

def band_columns(offsets_ppm: Any, reads_ppm: tuple[float, ...], *, margin: int = 1) -> NDArray[np.intp]:
    """The columns of ascending ``offsets_ppm`` a method with ``reads_ppm`` needs: for each
    offset read, its four nearest samples (the interpolation of :func:`quant.measures.z_at`)
    and ``margin`` more on each side, so that the same four are the nearest among the
    columns kept. Ascending, without repeats.

    Examples
    --------
    >>> band_columns(np.arange(-5.0, 5.5, 0.5), (3.5,)).tolist()
    [14, 15, 16, 17, 18, 19]
    """
    off = np.asarray(offsets_ppm, dtype=np.float64)
    keep: set[int] = set()
    for t in reads_ppm:
        k = int(np.searchsorted(off, t))
        lo, hi = k - 2 - margin, k + 1 + margin
        keep.update(j for j in range(lo, hi + 1) if 0 <= j < off.size)
    return np.asarray(sorted(keep), dtype=np.intp)


APT_READS = (-APT_OFFSET_PPM, APT_OFFSET_PPM)
APT_STAR_READS = (APT_BAND_PPM[0], APT_OFFSET_PPM, APT_BAND_PPM[1])

register(MethodInfo("mtr_asym", "MTRasym 3.5 ppm (B0-corrected)", "%", False, True, 3e-8, _mtr_asym,
                    reads_ppm=APT_READS))
register(MethodInfo("mtr_asym_t1", "MTRasym / T1 3.5 ppm", "%/s", True, True, 3e-8, _mtr_asym_t1,
                    reads_ppm=APT_READS))
register(MethodInfo("apt_star", "APT* linear reference 3.5 ppm", "%", False, True, 3e-8, _apt_star,
                    reads_ppm=APT_STAR_READS))
register(MethodInfo("arex", "AREX 3.5 ppm", "%/s", True, True, 4e-8, _arex, reads_ppm=APT_READS))
