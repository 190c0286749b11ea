"""Model-free APT measures from normalised, B0-corrected Z-spectra.

Each function takes ``z (..., n)`` and ``offsets_ppm (n,)`` (any order, no repeats) and gives a
map ``(...)`` in the dtype of ``z``. The value of ``Z`` at an offset is the sample there
(within 1e-3 ppm) or, between samples, the cubic through the four nearest samples (local, so
that a NaN far away does not spread); an offset outside the sampled range raises. A NaN in a
used sample gives NaN for that voxel. The journal references below are given from memory.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from quant.spectra import as_float, check_offsets

__all__ = ["z_at", "mtr_asym", "mtr_asym_t1", "apt_star", "arex", "APT_OFFSET_PPM", "APT_BAND_PPM"]

APT_OFFSET_PPM = 3.5
"""The amide resonance, ppm downfield of water."""

APT_BAND_PPM = (2.7, 4.3)
"""Default lower and upper boundaries of the amide dip for the linear reference (ours: 3.5 +- 0.8 ppm,
outside the amide line's half width at 3 T and 1-2 uT, above the amine shoulder)."""

_EXACT_TOL = 1e-3


def _weights(off: NDArray[np.float64], target: float) -> tuple[NDArray[np.intp], NDArray[np.float64]]:
    """Indices and weights of the samples that give Z(target)."""
    lo, hi = float(off.min()), float(off.max())
    if target < lo - _EXACT_TOL or target > hi + _EXACT_TOL:
        raise ValueError(
            f"offsets_ppm do not cover {target:+.3f} ppm (sampled {lo:+.3f} to {hi:+.3f} ppm)"
        )
    d = np.abs(off - target)
    i = int(np.argmin(d))
    if d[i] <= _EXACT_TOL:
        return np.array([i]), np.array([1.0])
    order = np.argsort(off)
    so = off[order]
    k = int(np.searchsorted(so, target))
    start = min(max(k - 2, 0), max(so.size - 4, 0))
    idx = order[start : start + 4]
    xs = off[idx]
    w = np.ones(idx.size)
    for a in range(idx.size):  # Lagrange basis through the (up to) four nearest samples
        for b in range(idx.size):
            if a != b:
                w[a] *= (target - xs[b]) / (xs[a] - xs[b])
    return idx, w


def _prepare(z: ArrayLike, offsets_ppm: ArrayLike) -> tuple[NDArray[np.floating], NDArray[np.float64]]:
    zz = as_float(z, "z")
    if zz.ndim < 1:
        raise ValueError("z must have an offset axis (its last axis)")
    off = check_offsets(offsets_ppm, zz.shape[-1])
    if np.unique(np.round(off / 1e-6)).size != off.size:
        raise ValueError("offsets_ppm has repeated offsets; average them first (normalize)")
    return zz, off


def z_at(z: ArrayLike, offsets_ppm: ArrayLike, offset_ppm: float, *, band_ppm: float = 0.0) -> NDArray[np.floating]:
    """Z at one offset: the sample, the local cubic between samples, or the mean of the
    samples within ``offset +- band_ppm / 2`` when ``band_ppm > 0``."""
    zz, off = _prepare(z, offsets_ppm)
    return _z_at(zz, off, offset_ppm, band_ppm)


def _z_at(zz: NDArray[np.floating], off: NDArray[np.float64], target: float, band: float) -> NDArray[np.floating]:
    if band < 0 or not np.isfinite(band):
        raise ValueError(f"band_ppm must be >= 0, got {band!r}")
    if band > 0:
        idx = np.flatnonzero(np.abs(off - target) <= band / 2 + 1e-9)
        if idx.size == 0:
            raise ValueError(f"no sampled offset within {target:+.3f} +- {band / 2:.3f} ppm")
        return np.mean(np.take(zz, idx, axis=-1), axis=-1, dtype=zz.dtype)
    idx, w = _weights(off, float(target))
    if idx.size == 1:
        return zz[..., int(idx[0])].copy()
    return np.take(zz, idx, axis=-1) @ w.astype(zz.dtype)


def _t1(t1_s: ArrayLike | None, zz: NDArray[np.floating], who: str) -> NDArray[np.floating]:
    if t1_s is None:
        raise ValueError(f"{who} needs a T1 map (t1_s in seconds) and none was given")
    t1 = np.asarray(t1_s, dtype=zz.dtype)
    try:
        t1 = np.broadcast_to(t1, zz.shape[:-1])
    except ValueError:
        raise ValueError(
            f"t1_s has shape {np.shape(t1_s)} but the spectra's voxels are {zz.shape[:-1]}"
        ) from None
    with np.errstate(invalid="ignore"):
        bad = np.isfinite(t1) & (t1 <= 0)
    if np.any(bad):
        raise ValueError(
            f"t1_s must be positive: {int(bad.sum())} voxels are <= 0 (mark unknown voxels NaN)"
        )
    return t1


def mtr_asym(
    z: ArrayLike, offsets_ppm: ArrayLike, *, offset_ppm: float = APT_OFFSET_PPM, band_ppm: float = 0.0
) -> NDArray[np.floating]:
    """Magnetisation-transfer ratio asymmetry in percent.

    ``MTRasym(dw) = 100 * (Z(-dw) - Z(+dw))``, at ``offset_ppm`` (default 3.5 ppm, the amide) or
    averaged over the band ``dw +- band_ppm/2`` on both sides.
    Source: Zhou, Payen, Wilson, Traystman & van Zijl, Nat Med 2003;9:1085-1090 (APT imaging);
    Guivel-Scharen et al., J Magn Reson 1998;133:36-45 (the asymmetry analysis).

    Examples
    --------
    >>> x = np.array([-3.5, 0.0, 3.5])
    >>> float(mtr_asym(np.array([0.8, 0.1, 0.78]), x))  # doctest: +ELLIPSIS
    2.0...
    """
    zz, off = _prepare(z, offsets_ppm)
    d = abs(float(offset_ppm))
    lab = _z_at(zz, off, d, band_ppm)
    ref = _z_at(zz, off, -d, band_ppm)
    ref -= lab
    ref *= 100.0
    return ref


def mtr_asym_t1(
    z: ArrayLike,
    offsets_ppm: ArrayLike,
    t1_s: ArrayLike | None,
    *,
    offset_ppm: float = APT_OFFSET_PPM,
    band_ppm: float = 0.0,
    tsat_s: float | None = None,
) -> NDArray[np.floating]:
    """MTRasym normalised by the water T1, in percent per second.

    ``MTRasym_T1 = MTRasym / T1`` and, with ``tsat_s``, ``MTRasym / (T1 (1 - exp(-tsat/T1)))``.
    From the proton-transfer-ratio relation ``MTRasym ~ k_sw x_s alpha T1 (1 - exp(-tsat/T1))``
    (Zhou & van Zijl, Prog NMR Spectrosc 2006;48:109-136): dividing by the T1 factor removes
    the water relaxation from the contrast, leaving ``k_sw x_s alpha`` (%/s).

    Raises ``ValueError`` without a T1 map or with a non-positive T1 (NaN marks unknown voxels).
    """
    zz, off = _prepare(z, offsets_ppm)
    t1 = _t1(t1_s, zz, "mtr_asym_t1")
    m = mtr_asym(zz, off, offset_ppm=offset_ppm, band_ppm=band_ppm)
    if tsat_s is not None:
        if not (np.isfinite(tsat_s) and tsat_s > 0):
            raise ValueError(f"tsat_s must be positive, got {tsat_s!r}")
        with np.errstate(over="ignore"):
            return m / (t1 * -np.expm1(-tsat_s / t1))
    return m / t1


def _linear_reference(
    zz: NDArray[np.floating], off: NDArray[np.float64], target: float, lower: float, upper: float
) -> NDArray[np.floating]:
    if not (lower < target < upper):
        raise ValueError(
            f"the reference boundaries must bracket the offset: lower {lower} < {target} < upper {upper}"
        )
    zl = _z_at(zz, off, lower, 0.0)
    zu = _z_at(zz, off, upper, 0.0)
    t = (target - lower) / (upper - lower)
    return zl * (1.0 - t) + zu * t


def apt_star(
    z: ArrayLike,
    offsets_ppm: ArrayLike,
    *,
    offset_ppm: float = APT_OFFSET_PPM,
    lower_ppm: float = APT_BAND_PPM[0],
    upper_ppm: float = APT_BAND_PPM[1],
) -> NDArray[np.floating]:
    """Apparent APT from a linear baseline under the amide dip, in percent.

    ``APT* = 100 * (Z_ref(3.5) - Z(3.5))``, ``Z_ref`` the straight line through
    ``Z(lower_ppm)`` and ``Z(upper_ppm)`` (defaults 2.7 and 4.3 ppm). Because the direct-
    saturation tail is concave there, the chord lies slightly below it and APT* is an
    underestimate ("apparent"); at 3 T and about 1 uT, where the amide dip is shallow and broad,
    that bias can exceed the dip and APT* can be negative: read it as a contrast between
    tissues. Source: the linear (three-offset) baseline under a CEST dip
    as used by Jin, Wang, Zong & Kim, Magn Reson Med 2013;69:760-770 (from memory).
    """
    zz, off = _prepare(z, offsets_ppm)
    d = float(offset_ppm)
    ref = _linear_reference(zz, off, d, float(lower_ppm), float(upper_ppm))
    ref -= _z_at(zz, off, d, 0.0)
    ref *= 100.0
    return ref


def arex(
    z: ArrayLike,
    offsets_ppm: ArrayLike,
    t1_s: ArrayLike | None,
    *,
    offset_ppm: float = APT_OFFSET_PPM,
    reference: str = "mirror",
    lower_ppm: float = APT_BAND_PPM[0],
    upper_ppm: float = APT_BAND_PPM[1],
) -> NDArray[np.floating]:
    """Apparent exchange-dependent relaxation, in percent per second.

    ``MTR_Rex = 1/Z_lab - 1/Z_ref`` and ``AREX = MTR_Rex * R1`` with ``R1 = 1/T1``; ``Z_lab`` is
    ``Z(+3.5 ppm)``, ``Z_ref`` the opposite offset (``reference='mirror'``) or the linear
    baseline of :func:`apt_star` (``reference='linear'``). Reported ``100 * AREX`` (%/s).
    Source: Zaiss, Xu, Goerke et al., NMR Biomed 2014;27:240-252 (inverse Z-spectrum
    analysis). It assumes a saturation well above the amide exchange rate
    (``w1 >> k_sw``, full labelling) and a near steady state; then the inverse metric removes
    spillover and semisolid MT and, with R1, the water T1. A voxel whose Z <= 0 is NaN.
    """
    zz, off = _prepare(z, offsets_ppm)
    t1 = _t1(t1_s, zz, "arex")
    d = float(offset_ppm)
    if reference == "mirror":
        zref = _z_at(zz, off, -abs(d), 0.0)
    elif reference == "linear":
        zref = _linear_reference(zz, off, d, float(lower_ppm), float(upper_ppm))
    else:
        raise ValueError(f"reference must be 'mirror' or 'linear', got {reference!r}")
    zlab = _z_at(zz, off, d, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ok = (zlab > 0) & (zref > 0)
        val = (1.0 / zlab - 1.0 / zref) / t1 * 100.0
    return np.where(ok, val, np.nan).astype(zz.dtype, copy=False)
