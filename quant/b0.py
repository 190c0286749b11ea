"""B0 correction: estimate each voxel's water shift from its own Z-spectrum, and resample.

Estimate. Near water the direct saturation dominates, and for a single pool in the steady
state (textbook Bloch equations) ``Z = R1 (D^2 + R2^2) / (R1 (D^2 + R2^2) + R2 w1^2)``, so
``y = Z / (1 - Z) = R1 (D^2 + R2^2) / (R2 w1^2)`` is exactly a parabola in the offset
``D = x - x0``. We therefore take the sampled minimum of each voxel's spectrum, fit
``y = a u^2 + b u + c`` (``u = x - x_min``) by weighted linear least squares to the points
within ``window_ppm`` of it, and report ``x0 = x_min - b / (2a)``. The weights
``(1 - Z)^4`` are the inverse variance of ``y`` for a constant noise in ``Z``. The fit is
closed-form (3 x 3 normal equations by Cramer's rule), one compiled loop over voxels (sums in
float64; :func:`quant._jit.b0_vertex`); it is exact for
one pool, and other pools (MT, NOE, amide) only bend the parabola slightly within +-0.6 ppm.
A voxel whose fit fails (fewer than 3 points, ``a <= 0``, the vertex outside the window or
beyond ``max_shift_ppm``) gets NaN.

Resample. The corrected spectrum is ``Z_c(x) = Z(x + shift)``: each voxel's natural cubic
spline through its samples is evaluated at the nominal offsets moved by its shift. The knots
are shared by all voxels, so the spline's second derivatives are one linear map of the data
(a matrix product); the evaluation at per-voxel positions is vectorised. A position outside
the sampled range gives NaN (no extrapolation).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import ArrayLike, NDArray

from quant.bloch import GAMMA_HZ_PER_T
from quant.parts import in_parts
from quant.spectra import as_float, check_offsets

__all__ = ["B0Result", "estimate_b0_shift", "correct_b0", "resample_shifted", "hz_to_ppm"]


def hz_to_ppm(b0_hz: ArrayLike, field_t: float) -> NDArray[np.float64]:
    """Frequency shift in Hz to ppm at ``field_t`` tesla (gamma/2pi = 42.577478 MHz/T, CODATA 2018)."""
    if field_t is None or not np.isfinite(field_t) or field_t <= 0:
        raise ValueError(f"field_t must be a positive field strength in tesla to convert Hz to ppm, got {field_t!r}")
    return np.asarray(b0_hz, dtype=np.float64) / (GAMMA_HZ_PER_T * 1e-6 * field_t)


def _sorted_offsets(z: NDArray[np.floating], offsets_ppm: ArrayLike) -> NDArray[np.float64]:
    if z.ndim < 1:
        raise ValueError("z must have an offset axis (its last axis)")
    off = check_offsets(offsets_ppm, z.shape[-1])
    if off.size < 4:
        raise ValueError("B0 correction needs at least 4 offsets")
    if np.any(np.diff(off) <= 0):
        raise ValueError("offsets_ppm must be ascending without repeats (use normalize first)")
    return off


def estimate_b0_shift(
    z: ArrayLike,
    offsets_ppm: ArrayLike,
    *,
    window_ppm: float = 0.6,
    max_shift_ppm: float = 1.0,
) -> NDArray[np.floating]:
    """Water shift in ppm per voxel, from the direct-saturation dip (see the module text).

    Parameters
    ----------
    z : (..., n) Z-spectra, offsets ascending.
    offsets_ppm : (n,) ascending.
    window_ppm : half-width of the fitted neighbourhood of the sampled minimum.
    max_shift_ppm : largest credible |shift|; beyond it the voxel is NaN.

    Returns
    -------
    shift_ppm : (...) in the dtype of ``z``; positive when the water dip sits at a positive
        offset. NaN where the fit fails.

    Examples
    --------
    >>> x = np.linspace(-2, 2, 41)
    >>> z = 1 - 0.9 / (1 + ((x - 0.13) / 0.4) ** 2)
    >>> round(float(estimate_b0_shift(z, x)), 3)
    0.13
    """
    zz = as_float(z, "z")
    off = _sorted_offsets(zz, offsets_ppm)
    if not (window_ppm > 0 and max_shift_ppm > 0):
        raise ValueError("window_ppm and max_shift_ppm must be positive")
    dt = zz.dtype
    cand = np.flatnonzero(np.abs(off) <= max_shift_ppm + window_ppm)
    if cand.size < 3:
        raise ValueError(
            f"offsets_ppm have fewer than 3 points within {max_shift_ppm + window_ppm:g} ppm of water"
        )
    from quant import _jit  # numba; loaded once (quant.warm_b0 at a node's start)

    flat = np.ascontiguousarray(zz.reshape(-1, zz.shape[-1]))
    shift = np.empty(flat.shape[0], dtype=dt)
    cols, xc, win = cand.astype(np.intp), off[cand], float(window_ppm)
    in_parts(flat.shape[0], lambda lo, hi: _jit.b0_vertex(flat[lo:hi], cols, xc, win,
                                                          shift[lo:hi]))
    with np.errstate(invalid="ignore"):
        shift[~(np.abs(shift) <= max_shift_ppm)] = np.nan
    return shift.reshape(zz.shape[:-1])


_ROWS = 2048  # row blocks of the resample keep its temporaries in cache


@lru_cache(maxsize=16)
def _natural_spline_operator(knots: tuple[float, ...]) -> NDArray[np.float64]:
    """Matrix L with M = L @ y: second derivatives of the natural cubic spline through y."""
    x = np.asarray(knots)
    n = x.size
    h = np.diff(x)
    t = np.zeros((n - 2, n - 2))
    d = np.zeros((n - 2, n))
    for i in range(1, n - 1):
        r = i - 1
        t[r, r] = (h[i - 1] + h[i]) / 3.0
        if r > 0:
            t[r, r - 1] = h[i - 1] / 6.0
        if r < n - 3:
            t[r, r + 1] = h[i] / 6.0
        d[r, i - 1] = 1.0 / h[i - 1]
        d[r, i] = -1.0 / h[i - 1] - 1.0 / h[i]
        d[r, i + 1] = 1.0 / h[i]
    op = np.zeros((n, n))
    op[1:-1] = np.linalg.solve(t, d)
    op.flags.writeable = False
    return op


def resample_shifted(
    z: ArrayLike, offsets_ppm: ArrayLike, shift_ppm: ArrayLike, *,
    columns: ArrayLike | None = None,
) -> NDArray[np.floating]:
    """Evaluate every voxel's natural cubic spline at ``offsets_ppm + shift_ppm``.

    Parameters
    ----------
    z : (..., n) with ascending ``offsets_ppm`` (n,).
    shift_ppm : (...) per-voxel shift (NaN gives a NaN voxel).
    columns : optional ascending indices of the offsets to evaluate (the spline is still
        that of all ``n`` samples); by default all.

    Returns
    -------
    (..., n) or (..., len(columns)), dtype of ``z``; NaN where the position falls outside the
    sampled range.

    Notes
    -----
    With the spline's second derivatives ``M`` (one matrix product for all voxels), the
    value in the knot interval ``[x_j, x_j+1]`` (width ``h``, ``b = (x - x_j) / h``,
    ``a = 1 - b``) is ``a y_j + b y_j+1 + ((a^3 - a) M_j + (b^3 - b) M_j+1) h^2 / 6``
    (the standard natural cubic spline). On a uniform grid a voxel's ``b`` is the same for all
    its offsets and the intervals are its nominal ones moved by a whole number of steps, so
    the voxels are grouped by that number and each group is a few array operations on
    column slices; other grids use a per-element interval search, in row chunks.
    """
    zz = as_float(z, "z")
    off = _sorted_offsets(zz, offsets_ppm)
    dt = zz.dtype
    vshape = zz.shape[:-1]
    s = np.asarray(shift_ppm)
    if s.shape != vshape:
        raise ValueError(f"shift_ppm has shape {s.shape} but the spectra's voxels are {vshape}")
    n = off.size
    cols = np.arange(n) if columns is None else np.asarray(columns, dtype=np.intp)
    if cols.ndim != 1 or (cols.size and (cols.min() < 0 or cols.max() >= n
                                         or np.any(np.diff(cols) <= 0))):
        raise ValueError(f"columns must be ascending indices into the {n} offsets")
    y = zz.reshape(-1, n)
    sv = s.reshape(-1).astype(dt)
    op = _natural_spline_operator(tuple(off.tolist())).astype(dt)
    h = np.diff(off)
    if np.allclose(h, h[0], rtol=1e-6, atol=0):
        out = _resample_uniform(y, op, sv, float(np.mean(h)), dt, cols)
    else:
        out = _resample_general(y, y @ op.T, sv, off.astype(dt), dt, cols)
    return out.reshape(*zz.shape[:-1], cols.size)


def _resample_uniform(
    y: NDArray[np.floating], op: NDArray[np.floating], sv: NDArray[np.floating], h: float,
    dt: np.dtype, cols: NDArray[np.intp],
) -> NDArray[np.floating]:
    from quant import _jit  # numba; loaded once (quant.warm_b0 at a node's start)

    n = y.shape[1]
    full = cols.size == n
    out = np.full((y.shape[0], cols.size), np.nan, dtype=dt)
    finite = np.isfinite(sv)
    q = np.where(finite, sv / h, 0.0).astype(np.float64)
    mi = np.floor(q)
    f = q - mi
    near = f > 1.0 - 1e-6
    mi[near] += 1.0
    f[near] = 0.0
    exact = f < 1e-6
    key = np.where(finite, mi.astype(np.int64) * 2 + exact, np.iinfo(np.int64).min)
    order = np.argsort(key, kind="stable")
    ks = key[order]
    bounds = np.flatnonzero(np.diff(ks)) + 1
    starts = np.concatenate([[0], bounds])
    ends = np.concatenate([bounds, [ks.size]])
    h2 = h * h / 6.0
    opt = np.ascontiguousarray(op.T)
    for g0, g1 in zip(starts.tolist(), ends.tolist(), strict=True):
        k = int(ks[g0])
        if k == np.iinfo(np.int64).min:
            continue  # NaN shifts stay NaN
        m = k // 2
        if abs(m) >= n:
            continue
        if full:
            lo, hi = max(0, -m), min(n, n - 1 - m)  # columns whose interval lies inside
            src = np.arange(lo, hi)  # output columns lo..hi-1 read samples lo+m..hi-1+m
        else:
            src = cols[(cols + m >= 0) & (cols + m <= n - 2)]
            knots = np.unique(np.concatenate([src + m, src + m + 1]))
            at = np.searchsorted(knots, src + m)
            pos = np.searchsorted(cols, src)
            opk = np.ascontiguousarray(opt[:, knots])
        for r0 in range(g0, g1, _ROWS):  # row blocks: gather, spline, evaluate in cache
            sel = order[r0 : min(r0 + _ROWS, g1)]
            yg = y[sel]
            if k % 2:  # exactly on the knots: the samples moved by m columns
                blk = np.full((sel.size, cols.size), np.nan, dtype=dt)
                ok = (cols + m >= 0) & (cols + m < n)
                blk[:, ok] = yg[:, cols[ok] + m]
                out[sel] = blk
                continue
            if src.size == 0:
                continue
            b = f[sel].astype(dt)[:, None]
            a = 1.0 - b
            ca = (a * a * a - a) * h2
            cb = (b * b * b - b) * h2
            if full:
                blk = np.full((sel.size, cols.size), np.nan, dtype=dt)
                mg = yg @ opt
                lo, hi = int(src[0]), int(src[-1]) + 1
                j0, j1 = lo + m, hi + m
                res = blk[:, lo:hi]
                np.multiply(yg[:, j0:j1], a, out=res)
                res += yg[:, j0 + 1 : j1 + 1] * b
                res += mg[:, j0:j1] * ca
                res += mg[:, j0 + 1 : j1 + 1] * cb
            else:
                mg = yg @ opk  # second derivatives at the knots used only
                # the same products and sums in the same order as the numpy expression
                # (a y_j + b y_j+1 + ca M_j + cb M_j+1), written straight into the output
                # rows: its four column gathers, temporaries and the scatter of the block
                # were 70 of the band's 130 ms at 40 slices here
                _jit.spline_rows(yg, mg, sel, src + m, at, pos, a[:, 0], b[:, 0], ca[:, 0],
                                 cb[:, 0], out)
                continue
            out[sel] = blk
    return out


def _resample_general(
    y: NDArray[np.floating], m2: NDArray[np.floating], sv: NDArray[np.floating], xs: NDArray[np.floating], dt: np.dtype,
    cols: NDArray[np.intp],
) -> NDArray[np.floating]:
    n = y.shape[1]
    out = np.empty((y.shape[0], cols.size), dtype=dt)
    h = np.diff(xs)
    step = 16384
    for r0 in range(0, y.shape[0], step):
        r1 = min(r0 + step, y.shape[0])
        pos = xs[cols][None, :] + sv[r0:r1, None]
        j = np.searchsorted(xs, pos.ravel(), side="right").reshape(pos.shape) - 1
        np.clip(j, 0, n - 2, out=j)
        hj = h[j]
        b = (pos - xs[j]) / hj
        a = 1.0 - b
        rows = np.arange(r1 - r0)[:, None]
        yc, mc = y[r0:r1], m2[r0:r1]
        val = a * yc[rows, j] + b * yc[rows, j + 1]
        val += ((a * a * a - a) * mc[rows, j] + (b * b * b - b) * mc[rows, j + 1]) * (hj * hj / 6.0)
        outside = (pos < xs[0] - 1e-6) | (pos > xs[-1] + 1e-6) | ~np.isfinite(pos)
        val[outside] = np.nan
        out[r0:r1] = val
    return out


@dataclass(frozen=True)
class B0Result:
    """B0-corrected spectra.

    Attributes
    ----------
    z : (..., n) corrected Z at the nominal offsets; NaN where it would need a point outside
        the sampled range, and in invalid voxels.
    shift_ppm : (...) the shift used (estimated or given).
    valid : (...) True where the shift is known and the input spectrum finite (the
        corrected values near the ends of the range may still be NaN).
    """

    z: NDArray[np.floating]
    shift_ppm: NDArray[np.floating]
    valid: NDArray[np.bool_]


def correct_b0(
    z: ArrayLike,
    offsets_ppm: ArrayLike,
    *,
    shift_ppm: ArrayLike | None = None,
    b0_hz: ArrayLike | None = None,
    field_t: float | None = None,
    window_ppm: float = 0.6,
    max_shift_ppm: float = 1.0,
) -> B0Result:
    """Correct the B0 shift of every voxel: ``Z_c(x) = Z(x + shift)``.

    The shift comes from ``shift_ppm`` (an external map in ppm), or ``b0_hz`` with
    ``field_t`` (an external map in Hz), or else from :func:`estimate_b0_shift`.

    Examples
    --------
    >>> x = np.linspace(-2, 2, 41)
    >>> z = 1 - 0.9 / (1 + ((x - 0.2) / 0.4) ** 2)
    >>> r = correct_b0(z, x)
    >>> round(float(r.shift_ppm), 3), int(np.nanargmin(r.z)) == 20
    (0.2, True)
    """
    zz = as_float(z, "z")
    off = _sorted_offsets(zz, offsets_ppm)
    if shift_ppm is not None and b0_hz is not None:
        raise ValueError("give shift_ppm or b0_hz, not both")
    if b0_hz is not None:
        if field_t is None:
            raise ValueError("b0_hz needs field_t (tesla) to convert to ppm")
        shift = hz_to_ppm(b0_hz, field_t)
    elif shift_ppm is not None:
        shift = np.asarray(shift_ppm, dtype=np.float64)
    else:
        shift = estimate_b0_shift(zz, off, window_ppm=window_ppm, max_shift_ppm=max_shift_ppm)
    if shift.shape != zz.shape[:-1]:
        raise ValueError(f"the B0 map has shape {shift.shape} but the spectra's voxels are {zz.shape[:-1]}")
    shift = shift.astype(zz.dtype, copy=False)
    zc = resample_shifted(zz, off, shift)
    valid = np.isfinite(shift) & np.all(np.isfinite(zz), axis=-1)
    return B0Result(z=zc, shift_ppm=shift, valid=valid)
