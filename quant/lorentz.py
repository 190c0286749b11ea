"""Lorentzian line-shape models of the Z-spectrum: Lorentzian difference and multi-Lorentzian fits.

A saturation pool ``i`` removes a Lorentzian from the Z-spectrum,

    L_i(dw) = A_i * (w_i / 2)^2 / ((w_i / 2)^2 + (dw - d_i)^2)

with amplitude ``A_i`` (fraction of M0), full width at half maximum ``w_i`` (ppm) and position
``d_i`` (ppm); the model spectrum is ``Z(dw) = c - sum_i L_i(dw)`` with a baseline ``c``
(the multi-Lorentzian description of the Z-spectrum: Zaiss et al., J Magn Reson 2011, 211:149,
and the five-pool form of Windschuh et al., NMR Biomed 2015, 28:529; both from memory).
Solute positions are fitted *relative to the water position*, ``d_i = d_water + delta_i``, so
a B0 shift moves all pools together and the water position is the fitted B0 shift.

Both fits run all voxels at once with :func:`quant.lsq.least_squares_batch` and analytic
Jacobians. Inputs follow the quant convention: ``z`` shaped ``(..., n_offsets)``, a 1-D
``offsets_ppm``; float32 in gives float32 maps out; voxels with a non-finite value are NaN in
every map with the flag :data:`FLAG_INVALID_INPUT`.

Quality flags (bit mask, ``result.flags``), so users can mask unreliable voxels:

* ``FLAG_INVALID_INPUT`` (1): the voxel's spectrum had a NaN or inf; not fitted.
* ``FLAG_NOT_CONVERGED`` (2): the solver hit its iteration limit.
* ``FLAG_AT_BOUND`` (4): a parameter of the reported map rests on a bound (the value is kept,
  never clipped further, but it is a constrained estimate, not a free optimum).
* ``FLAG_HIGH_RESIDUAL`` (8): the residual RMS exceeds the limit of :func:`residual_limit`
  (scaled with the noise: given as ``noise_sigma`` or estimated from the residuals of all
  voxels), or an explicit ``rms_limit``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, stats

from quant.lsq import least_squares_batch

__all__ = [
    "Pool",
    "POOLS_5",
    "lorentzian",
    "z_model",
    "lda",
    "multi_lorentzian",
    "LdaResult",
    "MultiLorentzianResult",
    "FLAG_INVALID_INPUT",
    "FLAG_NOT_CONVERGED",
    "FLAG_AT_BOUND",
    "FLAG_HIGH_RESIDUAL",
    "residual_limit",
    "initial_params",
]

FLAG_INVALID_INPUT = 1
FLAG_NOT_CONVERGED = 2
FLAG_AT_BOUND = 4
FLAG_HIGH_RESIDUAL = 8


@dataclass(frozen=True)
class Pool:
    """One Lorentzian pool: (start, lower, upper) for amplitude, FWHM (ppm) and position (ppm).

    For every pool but water the position is relative to the fitted water position.
    """

    name: str
    amplitude: tuple[float, float, float]
    width_ppm: tuple[float, float, float]
    position_ppm: tuple[float, float, float]

    def __post_init__(self) -> None:
        for what, (s, lo, hi) in (
            ("amplitude", self.amplitude),
            ("width_ppm", self.width_ppm),
            ("position_ppm", self.position_ppm),
        ):
            if not lo <= s <= hi or lo == hi:
                raise ValueError(
                    f"pool {self.name!r}: {what} start {s} must lie in [{lo}, {hi}] with lower < upper"
                )
        if self.width_ppm[1] <= 0:
            raise ValueError(f"pool {self.name!r}: the width's lower bound must be positive")


#: The five pools of the multi-Lorentzian fit: (start, lower, upper) per parameter.
#: Start values and bounds after the five-pool table of Windschuh et al., NMR Biomed 2015, 28:529
#: (from memory), with the amine placed at +2.0 ppm, the MT position range widened to
#: [-4, 0] ppm and the amide width range to [0.3, 3] ppm for 3 T line widths (our choice).
POOLS_5: tuple[Pool, ...] = (
    Pool("water", (0.9, 0.02, 1.0), (1.4, 0.3, 10.0), (0.0, -1.0, 1.0)),
    Pool("amide", (0.025, 0.0, 0.2), (0.5, 0.3, 3.0), (3.5, 3.0, 4.0)),
    Pool("amine", (0.01, 0.0, 0.2), (1.5, 0.5, 5.0), (2.0, 1.5, 2.5)),
    Pool("noe", (0.02, 0.0, 0.4), (3.0, 1.0, 5.0), (-3.5, -4.5, -2.0)),
    Pool("mt", (0.1, 0.0, 1.0), (25.0, 10.0, 100.0), (-2.0, -4.0, 0.0)),
)

#: Baseline c: (start, lower, upper); the upper bound is above 1 so that noise and an imperfect
#: M0 do not pin it (our choice; 1 in the table cited above, from memory).
BASELINE = (1.0, 0.5, 1.2)


def lorentzian(offsets_ppm, amplitude, width_ppm, position_ppm):
    """``A (w/2)^2 / ((w/2)^2 + (dw - d)^2)``, broadcast over the leading axes of the parameters.

    Parameters
    ----------
    offsets_ppm : array_like (n,)
    amplitude, width_ppm, position_ppm : array_like (...)

    Returns
    -------
    ndarray (..., n)
    """
    x = np.asarray(offsets_ppm)
    a, w, d = (np.asarray(v)[..., None] for v in (amplitude, width_ppm, position_ppm))
    h2 = (w / 2) ** 2
    return a * h2 / (h2 + (x - d) ** 2)


def _param_layout(pools):
    names = ["baseline"]
    start, lo, hi = [BASELINE[0]], [BASELINE[1]], [BASELINE[2]]
    for p in pools:
        for what, t in (("amplitude", p.amplitude), ("width", p.width_ppm), ("position", p.position_ppm)):
            names.append(f"{p.name}_{what}")
            start.append(t[0])
            lo.append(t[1])
            hi.append(t[2])
    return names, np.array(start), np.array(lo), np.array(hi)


#: Voxels per pass of the model kernel: its (chunk, K, N) temporaries stay in the CPU cache
#: (measured in tests/bench/bench_fits.py; 5 pools x 61 offsets x 128 voxels is 0.3 MB each).
_CHUNK = 128

def _model_and_jac(params, x, with_jac):
    """Model ``c - sum L_i`` for params (n, 1 + 3K); pool 0 is water, positions of the others relative.

    Returns the model (n, N) and, if asked, the Jacobian (n, N, P) as a transposed view of a
    contiguous (n, P, N) array (the layout the normal equations want). Evaluated in chunks of
    :data:`_CHUNK` voxels with shared subexpressions (``u = dw - d``, ``1 / (h^2 + u^2)``).
    """
    params = np.asarray(params, dtype=np.float64)
    n, n_par = params.shape
    model = np.empty((n, x.size))
    jac_t = np.empty((n, n_par, x.size)) if with_jac else None
    for s in range(0, n, _CHUNK):
        e = min(s + _CHUNK, n)
        _kernel(params[s:e], x, model[s:e], None if jac_t is None else jac_t[s:e])
    return model, (None if jac_t is None else np.swapaxes(jac_t, 1, 2))


def _kernel(params, x, model, jac_t):
    """Fill ``model`` (n, N) and, if given, ``jac_t`` (n, P, N) for one chunk of voxels.

    With ``h = w/2``, ``u = dw - d``, ``q = 1 / (h^2 + u^2)``: ``L = A h^2 q``,
    ``dL/dA = h^2 q``, ``dL/dw = 2 L u^2 q / w``, ``dL/dd = 2 L u q``; the model is
    ``c - sum L`` (so its derivatives are the negatives), and the water position moves every
    pool (its column is the sum of the position columns).
    """
    c = params[:, 0:1]
    a = params[:, 1::3]
    w = params[:, 2::3]
    d = params[:, 3::3].copy()
    d[:, 1:] += d[:, :1]  # absolute positions
    h2 = 0.25 * w * w  # (n, K)
    u = np.subtract(x[None, None, :], d[:, :, None])  # (n, K, N)
    q = np.multiply(u, u)
    if jac_t is not None:
        u2 = q.copy()
    q += h2[:, :, None]
    np.reciprocal(q, out=q)
    lor = q * (a * h2)[:, :, None]
    np.subtract(c, lor.sum(axis=1), out=model)
    if jac_t is None:
        return
    jac_t[:, 0, :] = 1.0
    np.multiply(q, -h2[:, :, None], out=jac_t[:, 1::3, :])  # d model / dA
    t = lor * q
    t *= -2.0  # -2 L q
    u2 *= t
    u2 /= w[:, :, None]
    jac_t[:, 2::3, :] = u2  # d model / dw = -2 L u^2 q / w
    np.multiply(t, u, out=jac_t[:, 3::3, :])  # d model / d(absolute position) = -2 L u q
    jac_t[:, 3, :] = jac_t[:, 3::3, :].sum(axis=1)  # the water position moves every pool


def _residual_normal(params, x, data, weights=None):
    """Residuals ``w (model - data)`` (n, N), ``J^T J`` (n, P, P) and ``J^T r`` (n, P).

    One compiled pass per voxel (:func:`quant._jit.lorentz_normal`, the formulas of
    :func:`_kernel`), in float64, with the weighted Jacobian held as rows of that voxel only:
    no ``(voxels, pools, offsets)`` temporaries, and a voxel's sums never depend on the other
    voxels of the call. 1.8 us per voxel and evaluation against 3.3-4.5 us for the fused
    numpy pass it replaces (5 pools, 61 offsets, one core; tests/bench/bench_fits.py).
    """
    params = np.ascontiguousarray(params, dtype=np.float64)
    data = np.ascontiguousarray(data, dtype=np.float64)
    x = np.ascontiguousarray(x, dtype=np.float64)
    n, n_par = params.shape
    r = np.empty((n, x.size))
    jtj = np.empty((n, n_par, n_par))
    g = np.empty((n, n_par))
    wt = np.ones(x.size) if weights is None else np.ascontiguousarray(weights, np.float64)
    from quant import _jit  # numba, imported on the first fit (about 1 s)

    _jit.lorentz_normal(params, x, data, wt, r, jtj, g)
    return r, jtj, g


def z_model(offsets_ppm, params, pools=POOLS_5):
    """Evaluate ``c - sum L_i`` for fitted parameters (..., 1 + 3 K) laid out as in the fits."""
    p = np.asarray(params, dtype=np.float64)
    if p.shape[-1] != 1 + 3 * len(pools):
        raise ValueError(
            f"params must have 1 + 3 * {len(pools)} = {1 + 3 * len(pools)} values per voxel, "
            f"got {p.shape[-1]}"
        )
    m, _ = _model_and_jac(p.reshape(-1, p.shape[-1]), np.asarray(offsets_ppm, np.float64), False)
    return m.reshape(p.shape[:-1] + (m.shape[-1],))


# ----------------------------------------------------------------------------------------------
# shared input handling


def _prepare(z, offsets_ppm, n_params, what):
    z = np.asarray(z)
    offs = np.asarray(offsets_ppm, dtype=np.float64)
    if offs.ndim != 1:
        raise ValueError(f"offsets_ppm must be 1-D, got shape {offs.shape}")
    if z.ndim < 1 or z.shape[-1] != offs.size:
        raise ValueError(
            f"z must be shaped (..., n_offsets) with n_offsets = {offs.size}, got shape {z.shape}"
        )
    if not np.all(np.isfinite(offs)):
        raise ValueError("offsets_ppm must be finite")
    if offs.size < n_params + 1:
        raise ValueError(
            f"too few offsets for the {what} fit: {offs.size} offsets for {n_params} parameters "
            f"(need at least {n_params + 1})"
        )
    out_dtype = z.dtype if z.dtype in (np.float32, np.float64) else np.dtype(np.float64)
    lead = z.shape[:-1]
    zf = z.reshape(-1, offs.size).astype(np.float64)
    return zf, offs, lead, out_dtype


def _check_cover(offs, pool, rel_to):
    """Offsets on both sides of the pool's start position, within its position range widened
    by half its start width (common practice: a line needs samples on both flanks)."""
    centre = rel_to + pool.position_ppm[0]
    lo = rel_to + pool.position_ppm[1] - pool.width_ppm[0] / 2
    hi = rel_to + pool.position_ppm[2] + pool.width_ppm[0] / 2
    n_lo = np.count_nonzero((offs >= lo) & (offs <= centre))
    n_hi = np.count_nonzero((offs >= centre) & (offs <= hi))
    if n_lo < 1 or n_hi < 1 or n_lo + n_hi < 3:
        raise ValueError(
            f"offsets do not cover the {pool.name} pool: need offsets on both sides of "
            f"{centre:+.2f} ppm within [{lo:.2f}, {hi:.2f}] ppm, found {n_lo} below and {n_hi} above"
        )


def _interp_rows(x_sorted_idx, offs, zf, at):
    """Linear interpolation of every row of zf at one offset ``at`` (offsets may be unsorted)."""
    xs = offs[x_sorted_idx]
    zs = zf[:, x_sorted_idx]
    if not xs[0] <= at <= xs[-1]:
        raise ValueError(f"offset {at} ppm lies outside the measured offsets [{xs[0]}, {xs[-1]}]")
    j = int(np.clip(np.searchsorted(xs, at), 1, xs.size - 1))
    # repeated offsets: average the values at equal offsets on each side
    x0, x1 = xs[j - 1], xs[j]
    z0 = zs[:, xs == x0].mean(axis=1)
    z1 = zs[:, xs == x1].mean(axis=1)
    if x1 == x0:
        return z0
    t = (at - x0) / (x1 - x0)
    return (1 - t) * z0 + t * z1


def _start_values(zf, offs, start, lo, hi):
    """Per-voxel start: water position at the spectrum's minimum within its bounds, water
    amplitude from the depth of that minimum (common practice); the rest from the table."""
    p0 = np.tile(start, (zf.shape[0], 1))
    near = (offs >= lo[3]) & (offs <= hi[3])
    if np.count_nonzero(near) >= 1:
        zn = np.where(np.isfinite(zf[:, near]), zf[:, near], np.inf)
        j = np.argmin(zn, axis=1)
        p0[:, 3] = offs[near][j]
        depth = start[0] - zn[np.arange(zf.shape[0]), j]
        p0[:, 1] = np.where(np.isfinite(depth), depth, start[1])
    return np.clip(p0, lo, hi)


#: Upper-tail probability of the residual gate (one false flag per thousand good voxels).
RESIDUAL_P = 1e-3

#: Least noise the estimate of :func:`residual_limit` assumes (Z units): below the quantisation
#: step 1/4096 of 12-bit magnitude images, so noise-free test spectra, whose residuals are
#: rounding only, are not gated on rounding (our choice).
SIGMA_FLOOR = 1e-4


def residual_limit(rms, n_res, n_par, *, noise_sigma=None, p_false=RESIDUAL_P):
    """RMS above which a fit's residual is more than noise: the chi-square gate of a fit.

    For a correct model with Gaussian noise of standard deviation ``sigma`` on ``M`` fitted
    values and ``P`` free parameters, ``M * rms^2 / sigma^2`` follows a chi-square law with
    ``M - P`` degrees of freedom (the goodness-of-fit test of a least-squares fit: Press et al.,
    Numerical Recipes, 3rd ed. 2007, section 15.1; from memory). The limit is its upper
    ``p_false`` quantile::

        rms_limit = sigma * sqrt(chi2.ppf(1 - p_false, M - P) / M)

    ``sigma`` is ``noise_sigma`` when given; otherwise it is estimated from the residuals of
    all fitted voxels, ``sigma^2 = median(M rms^2) / chi2.median(M - P)`` (a median, so badly
    fitting voxels do not inflate it: common practice), at least :data:`SIGMA_FLOOR`. The
    estimate needs many voxels that
    share one noise level; for a handful of voxels or images of mixed SNR pass ``noise_sigma``
    (e.g. the standard deviation of repeated M0 scans divided by M0).

    Parameters
    ----------
    rms : ndarray
        Residual RMS per voxel (NaN where not fitted).
    n_res, n_par : int
        Fitted values per voxel and free parameters.
    noise_sigma : float, optional
        Noise standard deviation in Z units.
    p_false : float
        Share of good fits that the gate flags.

    Returns
    -------
    float
        The limit (NaN when no voxel was fitted and no ``noise_sigma`` was given).
    """
    dof = n_res - n_par
    if dof < 1:
        raise ValueError(f"no degrees of freedom left: {n_res} values for {n_par} parameters")
    if not 0.0 < p_false < 1.0:
        raise ValueError(f"p_false must lie in (0, 1), got {p_false}")
    if noise_sigma is None:
        r = np.asarray(rms, dtype=np.float64)
        r = r[np.isfinite(r)]
        if r.size == 0:
            return float("nan")
        sigma = float(np.sqrt(np.median(n_res * r * r) / stats.chi2.median(dof)))
        sigma = max(sigma, SIGMA_FLOOR)
    else:
        sigma = float(noise_sigma)
        if not (np.isfinite(sigma) and sigma > 0):
            raise ValueError(f"noise_sigma must be positive and finite, got {noise_sigma!r}")
    return sigma * float(np.sqrt(stats.chi2.isf(p_false, dof) / n_res))


def _gate(rms, n_res, n_par, rms_limit, noise_sigma):
    """The residual limit: ``rms_limit`` if given, else :func:`residual_limit`."""
    if rms_limit is not None:
        if not (np.isfinite(rms_limit) and rms_limit > 0):
            raise ValueError(f"rms_limit must be positive and finite, got {rms_limit!r}")
        return float(rms_limit)
    return residual_limit(rms, n_res, n_par, noise_sigma=noise_sigma)


def _flags(status, at_bound_map, rms, rms_limit):
    flags = np.zeros(status.shape, dtype=np.uint8)
    flags[status < 0] |= FLAG_INVALID_INPUT
    flags[status == 0] |= FLAG_NOT_CONVERGED
    flags[at_bound_map] |= FLAG_AT_BOUND
    with np.errstate(invalid="ignore"):
        flags[rms > rms_limit] |= FLAG_HIGH_RESIDUAL
    return flags


def _smooth_spectra(zf, lead, size):
    """Mean of each spectrum over a ``size`` x ``size`` in-plane neighbourhood, NaN-aware."""
    if len(lead) < 2:
        raise ValueError(
            f"init='neighbourhood' needs at least two spatial axes before the offsets, got {lead}"
        )
    z = zf.reshape(lead + (zf.shape[-1],))
    good = np.all(np.isfinite(z), axis=-1, keepdims=True)
    filt = (1,) * (len(lead) - 2) + (size, size, 1)
    num = ndimage.uniform_filter(np.where(good, z, 0.0), size=filt, mode="nearest")
    den = ndimage.uniform_filter(good.astype(np.float64), size=filt, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        sm = num / den
    sm = np.where(good, sm, np.nan)  # an invalid voxel stays invalid
    return sm.reshape(zf.shape)


#: Tolerances of the Lorentzian fits (relative cost change and step); looser than the solver's
#: default 1e-8: on SNR-60 spectra the residual RMS moves by < 1e-6 relative (measured in
#: tests/bench/bench_fits.py) while a third fewer steps are needed.
FIT_TOL = 1e-6

#: Voxels per solver block (the solver's per-iteration overhead is paid per block, its
#: ``(block, P, P)`` arrays should stay near the cache; the model kernel works in cache-sized
#: chunks of its own). 2048 was 2-8% faster than 4096 on the 64 x 64 and 128 x 128 spectra of
#: tests/bench/bench_fits.py, 1024 slower.
BLOCK = 2048

#: Fraction of the way to a bound that a bound-crossing step moves a parameter (see
#: :func:`quant.lsq.least_squares_batch`); 1 sends it onto the bound. Chosen from the residuals
#: on the benchmark's SNR-60 spectra (tests/bench/bench_fits.py): fewer fits end on a bound in a
#: worse local minimum.
BOUND_APPROACH = 0.5


#: Damping update of the Lorentzian fits (see :func:`quant.lsq.least_squares_batch`): on the
#: benchmark's SNR-60 spectra (tests/bench/bench_fits.py) Marquardt's three zones took 29.3
#: instead of 30.6 steps per voxel on average, at a median residual equal to curve_fit's.
DAMPING = "marquardt"


#: Where the image-mean start (``init='mean'``) is kept away from a bound: this share of the
#: bound range (a start on a bound begins the fit frozen there; our choice).
MEAN_START_MARGIN = 0.02


def initial_params(zf, offs, weights, start, lo, hi, lead, init, neighbourhood=3, max_iter=100):
    """Per-voxel start values (V, P) of the Lorentzian fits, by the ``init`` policy.

    * ``'table'``: the pool table, water position and depth from the spectrum's minimum
      (:func:`_start_values`).
    * ``'mean'``: the same, but the table replaced by a fit of the mean spectrum of all valid
      voxels (a coarse pre-fit, one spectrum, started from the table), kept
      :data:`MEAN_START_MARGIN` of the bound range inside the box; water position and depth
      still per voxel. It starts every voxel in the regime of the image's own lines instead
      of the textbook table, which lands fewer voxels in a local minimum on a bound
      (measured in tests/bench/bench_fits.py).
    * ``'neighbourhood'``: each voxel from a fit of its in-plane neighbourhood mean.

    The benchmark gives the per-voxel scipy baseline these same start values.
    """
    if init == "neighbourhood":
        zs = _smooth_spectra(zf, lead, neighbourhood)
        pre = _run_fit(zs, offs, weights, start, lo, hi, lead, "table", neighbourhood, max_iter)
        p0 = _start_values(zf, offs, start, lo, hi)
        ok = np.all(np.isfinite(pre.params), axis=1)
        p0[ok] = pre.params[ok]
        return p0
    if init == "mean":
        good = np.all(np.isfinite(zf), axis=1)
        if not np.any(good):
            return _start_values(zf, offs, start, lo, hi)
        zm = zf[good].mean(axis=0)[None]
        pre = _run_fit(zm, offs, weights, start, lo, hi, (1,), "table", neighbourhood, max_iter)
        table = pre.params[0]
        if not np.all(np.isfinite(table)):
            table = start
        margin = MEAN_START_MARGIN * (hi - lo)
        return _start_values(zf, offs, np.clip(table, lo + margin, hi - margin), lo, hi)
    if init == "table":
        return _start_values(zf, offs, start, lo, hi)
    raise ValueError(f"init must be 'mean', 'table' or 'neighbourhood', got {init!r}")


def _run_fit(zf, offs, weights, start, lo, hi, lead, init, neighbourhood, max_iter, p0=None):
    unweighted = bool(np.all(weights == 1.0))

    w = None if unweighted else weights

    def fun(p, i):  # residuals and normal equations together, from one fused model pass
        return _residual_normal(p, offs, zf[i], w)

    if p0 is None:
        p0 = initial_params(zf, offs, weights, start, lo, hi, lead, init, neighbourhood, max_iter)
    return least_squares_batch(
        fun, p0, jac="normal", lower=lo, upper=hi, max_iter=max_iter, ftol=FIT_TOL, xtol=FIT_TOL,
        block_size=BLOCK, bound_approach=BOUND_APPROACH, damping=DAMPING,
    )


# ----------------------------------------------------------------------------------------------
# multi-Lorentzian


@dataclass(frozen=True)
class MultiLorentzianResult:
    """Outcome of :func:`multi_lorentzian`; every map is shaped like ``z`` without its last axis.

    Attributes
    ----------
    map : ndarray
        Fitted amide amplitude (fraction of M0): the APT result.
    water_shift_ppm : ndarray
        Fitted water position (the B0 shift in ppm).
    amplitude, width_ppm, position_ppm : dict of str -> ndarray
        Per pool; positions absolute (water position plus the relative position).
    params : ndarray (..., 1 + 3 K)
        Raw fitted parameters in the order of ``param_names``.
    rms : ndarray
        Residual RMS of the fit (Z units).
    converged : ndarray bool
    iterations : ndarray int
    at_bound : ndarray (..., 1 + 3 K) bool
    flags : ndarray uint8
        Quality bit mask (see the module docstring); 0 is a clean fit.
    rms_limit : float
        The residual limit applied for ``FLAG_HIGH_RESIDUAL``.
    """

    map: np.ndarray
    water_shift_ppm: np.ndarray
    amplitude: dict[str, np.ndarray]
    width_ppm: dict[str, np.ndarray]
    position_ppm: dict[str, np.ndarray]
    params: np.ndarray
    rms: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    at_bound: np.ndarray
    flags: np.ndarray
    param_names: tuple[str, ...] = field(default=())
    pools: tuple[Pool, ...] = field(default=())
    rms_limit: float = float("nan")


def multi_lorentzian(
    z,
    offsets_ppm,
    *,
    pools: tuple[Pool, ...] = POOLS_5,
    apt_pool: str = "amide",
    init: str = "table",
    neighbourhood: int = 3,
    max_iter: int = 100,
    rms_limit: float | None = None,
    noise_sigma: float | None = None,
) -> MultiLorentzianResult:
    """Fit ``Z(dw) = c - sum_i L_i(dw)`` with water, amide, amine, NOE and MT pools.

    Formula: ``L_i(dw) = A_i (w_i/2)^2 / ((w_i/2)^2 + (dw - d_i)^2)``, positions of the solute
    pools relative to water (Zaiss et al., J Magn Reson 2011, 211:149; Windschuh et al.,
    NMR Biomed 2015, 28:529; from memory). The APT result is the amide amplitude ``A_amide``.

    Parameters
    ----------
    z : array_like (..., n_offsets)
        Z-spectra (normalised by M0). B0 correction is not required: the water position is fitted.
    offsets_ppm : array_like (n_offsets,)
        Saturation offsets; unsorted or repeated is fine. They must cover every pool.
    pools : tuple of Pool
        Pool table; the first must be water. Default :data:`POOLS_5`.
    apt_pool : str
        Pool whose amplitude is ``.map``.
    init : {'table', 'mean', 'neighbourhood'}
        ``'table'`` (default): start from the pool table (water from the spectrum's minimum).
        ``'mean'``: start from a fit of the mean spectrum of the voxels passed (water from each
        spectrum's minimum; see :func:`initial_params`); fewer voxels end in a local minimum on
        a bound, but a voxel's start then depends on the others passed with it, so the node's
        chunked deferred pass keeps ``'table'``.
        ``'neighbourhood'``: first fit the spectra averaged over a ``neighbourhood`` x
        ``neighbourhood`` in-plane window, then start each voxel's own fit there (the remedy
        for noisy voxels; needs two spatial axes). Each voxel's result is still its own fit.
    max_iter : int
        Levenberg-Marquardt step limit per voxel.
    rms_limit : float, optional
        Residual RMS above which a voxel gets ``FLAG_HIGH_RESIDUAL``. By default the limit
        scales with the noise (:func:`residual_limit`: the chi-square gate at ``noise_sigma``,
        or at the noise estimated from the residuals of all voxels); it is ``result.rms_limit``.
    noise_sigma : float, optional
        Noise standard deviation in Z units, for the default residual gate.

    Returns
    -------
    MultiLorentzianResult

    Examples
    --------
    >>> import numpy as np
    >>> x = np.linspace(-6, 6, 61)
    >>> p = [1.0, 0.8, 1.5, 0.1, 0.03, 0.8, 3.5, 0.01, 1.5, 2.0, 0.03, 3.0, -3.5, 0.1, 25, -2.5]
    >>> res = multi_lorentzian(z_model(x, np.array(p))[None], x)
    >>> round(float(res.map[0]), 4)
    0.03
    """
    if not pools or pools[0].name != "water":
        raise ValueError("the first pool must be 'water'")
    names_pools = [p.name for p in pools]
    if apt_pool not in names_pools:
        raise ValueError(f"apt_pool {apt_pool!r} is not one of the pools {names_pools}")
    names, start, lo, hi = _param_layout(pools)
    zf, offs, lead, out_dtype = _prepare(z, offsets_ppm, len(names), "multi-Lorentzian")
    for p in pools[1:]:
        _check_cover(offs, p, 0.0)
    _check_cover(offs, pools[0], 0.0)
    weights = np.ones(offs.size)
    res = _run_fit(zf, offs, weights, start, lo, hi, lead, init, neighbourhood, max_iter)

    params = res.params
    k_apt = names_pools.index(apt_pool)
    amp = {p.name: params[:, 1 + 3 * k] for k, p in enumerate(pools)}
    wid = {p.name: params[:, 2 + 3 * k] for k, p in enumerate(pools)}
    pos = {p.name: params[:, 3 + 3 * k] + (params[:, 3] if k else 0.0) for k, p in enumerate(pools)}
    apt_bound = res.at_bound[:, 1 + 3 * k_apt]
    limit = _gate(res.residual_rms, offs.size, len(names), rms_limit, noise_sigma)
    flags = _flags(res.status, apt_bound, res.residual_rms, limit)

    def shape(a, dt=out_dtype):
        return np.asarray(a).reshape(lead + np.shape(a)[1:]).astype(dt)

    return MultiLorentzianResult(
        map=shape(amp[apt_pool]),
        water_shift_ppm=shape(pos["water"]),
        amplitude={k: shape(v) for k, v in amp.items()},
        width_ppm={k: shape(v) for k, v in wid.items()},
        position_ppm={k: shape(v) for k, v in pos.items()},
        params=shape(params),
        rms=shape(res.residual_rms),
        converged=shape(res.converged, bool),
        iterations=shape(res.iterations, np.int64),
        at_bound=shape(res.at_bound, bool),
        flags=shape(flags, np.uint8),
        param_names=tuple(names),
        pools=tuple(pools),
        rms_limit=limit,
    )


# ----------------------------------------------------------------------------------------------
# Lorentzian difference analysis


@dataclass(frozen=True)
class LdaResult:
    """Outcome of :func:`lda`; maps shaped like ``z`` without its last axis.

    Attributes
    ----------
    map : ndarray
        LD at ``at_ppm``: ``Z_ref(at) - Z_measured(at)``.
    z_ref : ndarray (..., n_offsets)
        The fitted reference (water + MT) spectrum at the measured offsets.
    water_shift_ppm, water_amplitude, water_width_ppm : ndarray
    mt_amplitude : ndarray or None
        None when the MT pool was not part of the reference.
    fit_mask : ndarray (n_offsets,) bool
        Offsets the reference was fitted on.
    rms, converged, iterations, flags : ndarray
        Fit quality as in :class:`MultiLorentzianResult`.
    rms_limit : float
        The residual limit applied for ``FLAG_HIGH_RESIDUAL``.
    """

    map: np.ndarray
    z_ref: np.ndarray
    water_shift_ppm: np.ndarray
    water_amplitude: np.ndarray
    water_width_ppm: np.ndarray
    mt_amplitude: np.ndarray | None
    fit_mask: np.ndarray
    rms: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    flags: np.ndarray
    rms_limit: float = float("nan")


def lda(
    z,
    offsets_ppm,
    *,
    exclude_ppm: tuple[float, float] = (1.0, 5.0),
    at_ppm: float = 3.5,
    mt: bool = True,
    init: str = "table",
    neighbourhood: int = 3,
    max_iter: int = 100,
    rms_limit: float | None = None,
    noise_sigma: float | None = None,
) -> LdaResult:
    """Lorentzian difference analysis: ``LD(at) = Z_ref(at) - Z(at)``.

    A reference ``Z_ref = c - L_water - L_MT`` is fitted on the offsets outside the solute bands,
    i.e. with ``exclude_ppm[0] <= |dw| <= exclude_ppm[1]`` left out on both sides (amide/amine
    downfield, NOE upfield), and the difference to the measured spectrum is read at ``at_ppm``
    (Jones et al., NeuroImage 2013, 77:114, from memory; the default band 1-5 ppm is common
    practice). ``Z(at)`` is linearly interpolated between the nearest measured offsets.

    Parameters
    ----------
    z : array_like (..., n_offsets)
        Z-spectra, B0-corrected (the band is taken in the given offset frame; the water position
        is still fitted within +-1 ppm).
    offsets_ppm : array_like (n_offsets,)
    exclude_ppm : (float, float)
        The excluded band ``[inner, outer]`` in ppm from water, applied on both sides.
    at_ppm : float
        Where LD is read (3.5 ppm, the amide).
    mt : bool
        Include the broad MT Lorentzian in the reference (needs offsets beyond the band).
    init, neighbourhood, max_iter, rms_limit, noise_sigma
        As in :func:`multi_lorentzian` (the residual gate counts the fitted offsets only), but
        ``init`` defaults to ``'table'``.

    Returns
    -------
    LdaResult
    """
    inner, outer = exclude_ppm
    if not 0 <= inner < outer:
        raise ValueError(f"exclude_ppm must be (inner, outer) with 0 <= inner < outer, got {exclude_ppm}")
    pools = POOLS_5[:1] + ((POOLS_5[4],) if mt else ())
    names, start, lo, hi = _param_layout(pools)
    # in the reference the MT position is relative to water as in the five-pool table
    offs_all = np.asarray(offsets_ppm, dtype=np.float64)
    if offs_all.ndim != 1:
        raise ValueError(f"offsets_ppm must be 1-D, got shape {offs_all.shape}")
    fit_mask = ~((np.abs(offs_all) >= inner) & (np.abs(offs_all) <= outer))
    if mt and np.count_nonzero(np.abs(offs_all) > outer) < 2:
        raise ValueError(
            f"offsets do not cover the MT pool: the reference with mt=True needs at least 2 "
            f"offsets beyond {outer} ppm (or pass mt=False)"
        )
    n_fit = int(np.count_nonzero(fit_mask))
    if n_fit < len(names) + 1:
        raise ValueError(
            f"too few offsets outside the excluded band {exclude_ppm} ppm for the LDA reference: "
            f"{n_fit} for {len(names)} parameters"
        )
    if np.count_nonzero(np.abs(offs_all) < inner) < 3:
        raise ValueError(f"offsets do not cover the water pool: need at least 3 within {inner} ppm")
    zf, offs, lead, out_dtype = _prepare(z, offs_all, len(names), "LDA")
    order = np.argsort(offs, kind="stable")
    z_at = _interp_rows(order, offs, zf, at_ppm)
    weights = fit_mask.astype(np.float64)
    res = _run_fit(zf, offs, weights, start, lo, hi, lead, init, neighbourhood, max_iter)
    z_ref = z_model(offs, res.params, pools)
    ref_at = z_model(np.array([at_ppm]), res.params, pools)[:, 0]
    ld = ref_at - z_at
    # residual RMS over the fitted offsets only
    rms = res.residual_rms * np.sqrt(offs.size / n_fit)
    # the reference is constrained where a water parameter rests on a bound
    limit = _gate(rms, n_fit, len(names), rms_limit, noise_sigma)
    flags = _flags(res.status, res.at_bound[:, 1:4].any(axis=1), rms, limit)

    def shape(a, dt=out_dtype):
        return np.asarray(a).reshape(lead + np.shape(a)[1:]).astype(dt)

    return LdaResult(
        map=shape(ld),
        z_ref=shape(z_ref),
        water_shift_ppm=shape(res.params[:, 3]),
        water_amplitude=shape(res.params[:, 1]),
        water_width_ppm=shape(res.params[:, 2]),
        mt_amplitude=shape(res.params[:, 4]) if mt else None,
        fit_mask=fit_mask,
        rms=shape(rms),
        converged=shape(res.converged, bool),
        iterations=shape(res.iterations, np.int64),
        flags=shape(flags, np.uint8),
        rms_limit=limit,
    )


# ----------------------------------------------------------------------------------------------
# registry entries (model-based: the scheduler defers them). Maps in % of M0 like the
# model-free measures; cost per voxel measured on tests/bench/bench_fits.py's spectra (SNR 60,
# 61 offsets, one core, quiet machine, compiled kernels: multi_lorentzian init='table' 2.36 s
# per 128 x 128, i.e. 1.4e-4 s per voxel; lda 0.41 s, 2.5e-5 s).


def _lda_percent(z, offsets_ppm, *, t1_s=None):
    return lda(z, offsets_ppm).map * 100


def _multi_lorentzian_percent(z, offsets_ppm, *, t1_s=None):
    return multi_lorentzian(z, offsets_ppm).map * 100


def _register() -> None:
    from quant.registry import METHODS, MethodInfo, register

    if "lda" not in METHODS:
        # needs_b0=False: the fit places the water line itself (within +-1 ppm), and the
        # B0-resampled spectra are NaN at the outermost offsets of shifted voxels, which the
        # MT part of the reference needs
        register(MethodInfo("lda", "Lorentzian difference 3.5 ppm", "%", False, False, 2.5e-5,
                            _lda_percent, needs_b0=False))
    if "multi_lorentzian" not in METHODS:
        register(
            MethodInfo(
                "multi_lorentzian", "Amide amplitude, 5-pool Lorentzian fit", "%", False, False,
                1.4e-4, _multi_lorentzian_percent, needs_b0=False,
            )
        )


_register()
