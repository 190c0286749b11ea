"""Water shift (B0) from a WASSR series: direct water saturation sampled finely near 0 ppm.

A WASSR acquisition saturates weakly (low power, short) at offsets close to the water
resonance, so each voxel's spectrum is the narrow direct-saturation dip of water alone, centred
on the local water shift (Kim, Gillen, Landman, Zhou & van Zijl, Magn Reson Med 2009, 61:1441,
from memory). Two estimators, both vectorised over voxels (no Python loop over voxels):

``method="symmetry"`` (default; the maximum-symmetry idea of Kim et al.): the water line is
symmetric about its centre, so the shift ``c`` minimises the symmetry cost

    C(c) = (1 / J) sum_j [S(c + d_j) - S(c - d_j)]^2,   d_j = j h / J,  j = 1..J,

with ``S`` the voxel's spectrum (scaled by its baseline, see below) interpolated by a cubic spline
(``scipy.interpolate.CubicSpline``, not-a-knot, applied as a matrix of weights since it is linear
in the samples) and ``h`` the half-width of the compared
window. A window that misses the dip (on the flat tail) is trivially symmetric, so ``C`` is
divided by the dip energy in the same window,
``E(c) = (1 / 2J) sum_j [(1 - S(c + d_j))^2 + (1 - S(c - d_j))^2]`` (our normalisation, which
makes the cost scale-free: 0 for a perfectly symmetric dip, about 1 or more for a window off
the dip; a minimum of ``C / E`` at or above 1 is rejected). ``C / E`` is evaluated on a coarse grid of candidate shifts (step ``coarse_step_ppm``) over
the sampled range less ``h`` on each side, then on a fine grid (step ``coarse_step_ppm / 5``)
around the coarse minimum, and the minimum is refined by a parabola through the three lowest
fine-grid values (common practice). A minimum on the edge of the search range is not a minimum:
such voxels are NaN with ``valid`` False.

``method="lorentzian"``: least-squares fit of ``S(x) = c - a (w/2)^2 / ((w/2)^2 + (x - x0)^2)``
(the Lorentzian line of direct water saturation; common practice) with the batched
Levenberg-Marquardt of :mod:`quant.lsq`; the shift is ``x0``. Cheaper to state, sensitive to
the line shape departing from a Lorentzian (a pulsed WASSR line is not exactly one).

Input follows the quant convention: ``signal`` ``(..., n_offsets)`` with a 1-D ``offsets_ppm``
(unsorted and repeated offsets allowed: sorted, repeats averaged). Raw magnitudes or
M0-normalised values both work (each voxel is scaled by its baseline, the mean of its three
highest samples). A voxel with a
non-finite value, a maximum below ``min_signal`` (default: 0.1 of the 99th percentile of the
voxel maxima, i.e. background) or no dip (depth ``(max - min) / max`` below ``min_depth``)
is NaN. float32 in gives float32 out.

The result ``shift_ppm`` is the offset of the water line's centre on the series' own offset
axis: a Z-spectrum is B0-corrected by reading it at ``offsets_ppm + shift_ppm``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import CubicSpline

from quant.lsq import least_squares_batch

__all__ = ["WassrResult", "wassr_shift"]

_BLOCK = 8192  # voxels per block: bounds the memory of the (V, K) evaluation points


@dataclass(frozen=True)
class WassrResult:
    """Per-voxel outcome of :func:`wassr_shift`.

    Attributes
    ----------
    shift_ppm : ndarray (...)
        Water shift; NaN where not valid. Input float dtype.
    valid : ndarray (...) bool
        A shift was found (signal present, a dip, an interior minimum / a converged fit).
    residual : ndarray (...) float64
        ``symmetry``: ``sqrt(C / E)`` at the minimum (relative RMS asymmetry);
        ``lorentzian``: residual RMS of the fit (same unit). NaN where not valid.
    """

    shift_ppm: np.ndarray
    valid: np.ndarray
    residual: np.ndarray


def _sorted_unique(signal: np.ndarray, offsets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Offsets sorted ascending with repeats averaged; ``signal`` rows follow."""
    x, inv = np.unique(offsets, return_inverse=True)
    avg = np.zeros((offsets.size, x.size))
    avg[np.arange(offsets.size), inv] = 1.0
    avg /= avg.sum(axis=0, keepdims=True)
    return x, signal @ avg


def _basis(x: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """Cubic-spline interpolation as a matrix: ``S(pts) = s @ _basis(x, pts)`` for rows ``s``.

    The not-a-knot cubic spline is linear in the samples, so interpolating the identity gives
    the weights once for all voxels (the points are shared), and every voxel is one BLAS row.
    """
    return CubicSpline(x, np.eye(x.size), axis=0)(pts.ravel()).T  # (n, n_pts)


def _cost_matrix(s: np.ndarray, wp: np.ndarray, wm: np.ndarray, k: int, j: int) -> np.ndarray:
    """``C / E`` for rows ``s (V, n)`` with the weights of the ``+d`` and ``-d`` points."""
    sp = (s @ wp).reshape(-1, k, j)
    sm = (s @ wm).reshape(-1, k, j)
    c = ((sp - sm) ** 2).mean(axis=2)
    e = 0.5 * ((1.0 - sp) ** 2 + (1.0 - sm) ** 2).mean(axis=2)
    return c / np.maximum(e, 1e-12)


def _parabola_min(cm: np.ndarray, c0: np.ndarray, cp: np.ndarray) -> np.ndarray:
    den = cm - 2.0 * c0 + cp
    with np.errstate(divide="ignore", invalid="ignore"):
        off = np.where(den > 0, 0.5 * (cm - cp) / den, 0.0)
    return np.clip(off, -0.5, 0.5)


_N_FINE = 5  # fine steps per coarse step, each side of the coarse minimum


def _symmetry_block(s: np.ndarray, x: np.ndarray, h: float, step: float, n_d: int):
    lo, hi = x[0] + h, x[-1] - h
    d = np.arange(1, n_d + 1) * (h / n_d)
    coarse = np.arange(lo, hi + 0.5 * step, step)
    coarse = coarse[coarse <= hi + 1e-12]
    wp = _basis(x, coarse[:, None] + d[None, :])
    wm = _basis(x, coarse[:, None] - d[None, :])
    cost = _cost_matrix(s, wp, wm, coarse.size, d.size)
    i = cost.argmin(axis=1)
    interior = (i > 0) & (i < coarse.size - 1)
    fstep = step / _N_FINE
    grid = np.arange(-_N_FINE, _N_FINE + 1) * fstep  # +-1 coarse step
    m = grid.size
    v = s.shape[0]
    fcost = np.empty((v, m))
    fine = np.empty((v, m))
    for ic in np.unique(i):  # loop over coarse candidates (at most a few dozen), not voxels
        sel = i == ic
        centres = np.clip(coarse[ic] + grid, lo, hi)
        fwp = _basis(x, centres[:, None] + d[None, :])
        fwm = _basis(x, centres[:, None] - d[None, :])
        fcost[sel] = _cost_matrix(s[sel], fwp, fwm, m, d.size)
        fine[sel] = centres
    j = fcost.argmin(axis=1)
    rows = np.arange(v)
    jm, jp = np.clip(j - 1, 0, m - 1), np.clip(j + 1, 0, m - 1)
    off = _parabola_min(fcost[rows, jm], fcost[rows, j], fcost[rows, jp])
    off = np.where((j > 0) & (j < m - 1), off, 0.0)
    shift = fine[rows, j] + off * fstep
    best = fcost[rows, j]
    return shift, interior & (best < 1.0), np.sqrt(np.maximum(best, 0.0))


def _lorentz_fit(s: np.ndarray, x: np.ndarray, max_iter: int):
    def model(p):
        c, a, w, x0 = (p[:, k : k + 1] for k in range(4))
        h2 = (w / 2) ** 2
        den = h2 + (x - x0) ** 2
        return c - a * h2 / den, h2, den

    def fun(p, idx):
        return model(p)[0] - s[idx]

    def jac(p, idx):
        _, a, w, x0 = (p[:, k : k + 1] for k in range(4))
        _, h2, den = model(p)
        lor = h2 / den
        d_c = np.ones_like(lor)
        d_a = -lor
        d_w = -a * (w / 2) * (x - x0) ** 2 / den**2
        d_x0 = -a * lor * 2 * (x - x0) / den
        return np.stack([d_c, d_a, d_w, d_x0], axis=-1)

    span = x[-1] - x[0]
    i0 = s.argmin(axis=1)
    p0 = np.column_stack(
        [
            s.max(axis=1),
            s.max(axis=1) - s.min(axis=1),
            np.full(s.shape[0], 0.25 * span),
            x[i0],
        ]
    )
    lower = np.array([0.0, 0.0, 1e-3 * span, x[0]])
    upper = np.array([2.0, 2.0, 10.0 * span, x[-1]])
    res = least_squares_batch(fun, p0, jac=jac, lower=lower, upper=upper, max_iter=max_iter)
    shift = res.params[:, 3]
    ok = res.converged & ~res.at_bound[:, 3]
    return shift, ok, res.residual_rms


def wassr_shift(
    signal: np.ndarray,
    offsets_ppm: np.ndarray,
    *,
    method: str = "symmetry",
    half_width_ppm: float | None = None,
    coarse_step_ppm: float | None = None,
    n_pairs: int = 12,
    min_signal: float | None = None,
    min_depth: float = 0.1,
    max_iter: int = 100,
) -> WassrResult:
    """Water shift of every voxel from its WASSR spectrum.

    ``symmetry``: the centre ``c`` minimising ``C(c) = (1/J) sum_j [S(c+d_j) - S(c-d_j)]^2``
    on the cubic-spline interpolated spectrum (maximum symmetry, Kim et al., Magn Reson Med
    2009, 61:1441, from memory); ``lorentzian``: ``x0`` of a fitted
    ``c - a (w/2)^2 / ((w/2)^2 + (x - x0)^2)``. See the module docstring.

    Parameters
    ----------
    signal : ndarray (..., n_offsets)
        WASSR magnitudes (raw or M0-normalised).
    offsets_ppm : ndarray (n_offsets,)
        Saturation offset of each column (any order, repeats averaged); at least 5 distinct.
    method : {"symmetry", "lorentzian"}
        Estimator.
    half_width_ppm : float, optional
        Half-width ``h`` of the window compared for symmetry; the search covers the sampled
        range less ``h`` on each side. Default 0.4 of the sampled half-range.
    coarse_step_ppm : float
        Step of the coarse candidate grid (the fine grid is five times finer); default half
        the smallest spacing of the sampled offsets, so that a line barely wider than the
        sampling is not stepped over.
    n_pairs : int
        Number ``J`` of mirrored pairs in the symmetry cost.
    min_signal : float, optional
        Voxels whose maximum is below it are NaN (default: 0.1 x the 99th percentile of the
        voxel maxima).
    min_depth : float
        Voxels whose dip ``(max - min) / max`` is shallower are NaN.
    max_iter : int
        Iteration limit of the Lorentzian fit.

    Returns
    -------
    WassrResult

    Examples
    --------
    >>> import numpy as np
    >>> x = np.linspace(-1, 1, 41)
    >>> s = 1 - 0.9 * 0.15**2 / (0.15**2 + (x - 0.123) ** 2)
    >>> round(float(wassr_shift(s, x).shift_ppm), 4)
    0.123
    """
    sig = np.asarray(signal)
    offs = np.asarray(offsets_ppm, dtype=np.float64)
    if sig.ndim < 1 or offs.ndim != 1 or sig.shape[-1] != offs.size:
        raise ValueError(
            f"signal (..., n_offsets) and offsets_ppm (n_offsets,) disagree: shapes {sig.shape} "
            f"and {offs.shape}"
        )
    if not np.all(np.isfinite(offs)):
        raise ValueError("offsets_ppm must be finite")
    if method not in ("symmetry", "lorentzian"):
        raise ValueError(f'method must be "symmetry" or "lorentzian", got {method!r}')
    out_dtype = sig.dtype if sig.dtype in (np.float32, np.float64) else np.dtype(np.float64)
    x, s = _sorted_unique(sig.reshape(-1, offs.size).astype(np.float64), offs)
    if x.size < 5:
        raise ValueError(f"a WASSR spectrum needs at least 5 distinct offsets, got {x.size}")
    half_range = 0.5 * (x[-1] - x[0])
    h = 0.4 * half_range if half_width_ppm is None else float(half_width_ppm)
    if not 0.0 < h < half_range:
        raise ValueError(
            f"half_width_ppm must lie in (0, {half_range:g}) (half the sampled range), got {h}"
        )
    if coarse_step_ppm is None:
        coarse_step_ppm = min(0.5 * float(np.diff(x).min()), half_range - h)
    if not 0.0 < coarse_step_ppm <= half_range - h:
        raise ValueError(
            f"coarse_step_ppm must lie in (0, {half_range - h:g}] (the search half-range), "
            f"got {coarse_step_ppm}"
        )
    if n_pairs < 2:
        raise ValueError(f"n_pairs must be at least 2, got {n_pairs}")

    finite = np.all(np.isfinite(s), axis=1)
    vmax = np.where(finite, s.max(axis=1, initial=-np.inf, where=np.isfinite(s)), np.nan)
    if min_signal is None:
        good_max = vmax[finite & (vmax > 0)]
        min_signal = 0.1 * float(np.percentile(good_max, 99)) if good_max.size else np.inf
    with np.errstate(invalid="ignore", divide="ignore"):
        depth = (vmax - np.where(finite, s.min(axis=1), np.nan)) / vmax
        use = finite & (vmax > 0) & (vmax >= min_signal) & (depth >= min_depth)
    n_vox = s.shape[0]
    shift = np.full(n_vox, np.nan)
    resid = np.full(n_vox, np.nan)
    valid = np.zeros(n_vox, dtype=bool)
    idx = np.flatnonzero(use)
    for start in range(0, idx.size, _BLOCK):  # blocks of voxels, to bound memory
        b = idx[start : start + _BLOCK]
        # scaled by the baseline: the mean of the three highest samples (robust to one noisy
        # maximum, so a flat noisy tail is not mistaken for a symmetric window)
        base = np.sort(s[b], axis=1)[:, -3:].mean(axis=1)
        sb = s[b] / base[:, None]
        if method == "symmetry":
            sh, ok, rr = _symmetry_block(sb, x, h, coarse_step_ppm, n_pairs)
        else:
            sh, ok, rr = _lorentz_fit(sb, x, max_iter)
        shift[b] = np.where(ok, sh, np.nan)
        resid[b] = np.where(ok, rr, np.nan)
        valid[b] = ok
    lead = sig.shape[:-1]
    return WassrResult(
        shift_ppm=shift.reshape(lead).astype(out_dtype),
        valid=valid.reshape(lead),
        residual=resid.reshape(lead),
    )
