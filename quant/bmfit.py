"""Bloch-McConnell fit of the Z-spectrum and APTR*.

Fast path (the model fitted): the eigenvalue approximation of CW saturation transfer.
Under CW saturation the water magnetisation along the effective field relaxes with the
smallest eigenvalue ``R1rho`` of the Bloch-McConnell matrix, and (Zaiss & Bachert,
Phys Med Biol 2013;58:R221-R269, from memory)::

    Z(dw) = (cos^2(theta) - Z_ss) * exp(-R1rho * tsat) + Z_ss,
    Z_ss  = cos^2(theta) * R1w / R1rho,
    theta = atan(w1 / dw),                        dw: RF offset from water (rad/s)
    R1rho = R1w cos^2(theta) + R2w sin^2(theta) + sum_i Rex_i + cos^2(theta) Rex_mt,

with, for each exchanging pool ``i`` (fraction ``f_i``, exchange rate ``k_i``, ``R2_i``, at
``d_i`` from water), the large-shift Lorentzian form of the exchange term::

    Rex_i = f_i k_i * w1^2 / (w1^2 + k_i (k_i + R2_i)) * (G_i/2)^2 / ((G_i/2)^2 + (dw - d_i)^2),
    G_i   = 2 sqrt((k_i + R2_i) / k_i * w1^2 + (k_i + R2_i)^2),

and, for the semisolid pool (Henkelman et al., Magn Reson Med 1993;29:759, saturation rate
``R_rf = pi w1^2 G(dw - d_m)`` with the super-Lorentzian ``G`` of :func:`quant.bloch.lineshape`),
the exact steady state of the longitudinal water-semisolid pair: with ``D = R1_m + k_m + R_rf``,
``R1rho += cos^2(theta) f_m k_m (R1_m + R_rf) / D`` and ``R1w`` in ``Z_ss`` becomes
``R1w + f_m k_m R1_m / D`` (our reduction; at ``w1 = 0`` it gives ``Z = 1``).

Its error against the exact simulator (:func:`quant.bloch.cw_z`, matrix exponential) on the
phantom's tissues (3 T, 1 uT, 2 s, offsets +-5.9 ppm; measured by ``tests/bench/bench_fits.py``
and bounded in ``tests/quant/test_bmfit.py``) is stated in :data:`FAST_PATH_ERROR`.

What is fitted (per voxel): a scale ``s`` (M0 normalisation error), the water shift (ppm),
``R2w``, the products ``f k`` of amide, amine and NOE, the semisolid fraction ``f_m``, and
``R1w`` unless a T1 map is given. The exchange rates ``k_i`` and ``R2_i`` are held at nominal
values (:data:`NOMINAL`): **from one B1 level the amide fraction and exchange rate are not
separable** (they enter almost only as their product at low B1), so the amide result is
``f k`` in s^-1, not ``f`` and ``k`` apart. Several B1 levels would separate them; this
function takes one.

APTR* is the difference, at +3.5 ppm from water, between the model spectrum of water alone
(the fitted ``R1w``, ``R2w``) and that of water plus the fitted amide pool:
``APTR* = Z_water(3.5) - Z_water+amide(3.5)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from quant.bloch import GAMMA_HZ_PER_T, b1_to_rad_s, lineshape
from quant.lorentz import (
    FLAG_AT_BOUND,
    FLAG_HIGH_RESIDUAL,
    FLAG_INVALID_INPUT,
    FLAG_NOT_CONVERGED,
    _gate,
)
from quant.lsq import least_squares_batch

__all__ = ["NOMINAL", "FAST_PATH_ERROR", "AptrStarResult", "aptr_star", "fast_z", "PARAM_NAMES"]

#: Nominal pool constants held fixed in the fit: (offset ppm, k s^-1, R2 s^-1). Typical 3 T brain
#: figures (from memory): amide exchange ~30 s^-1 (Zhou et al., Nat Med 2003), fast amine
#: exchange ~1000 s^-1, slow relayed NOE ~15 s^-1 with a short T2; semisolid pool at -2.5 ppm,
#: k = 40 s^-1, T2 = 10 us, R1 = 1 s^-1.
NOMINAL = {
    "amide": (3.5, 30.0, 100.0),
    "amine": (2.0, 1000.0, 200.0),
    "noe": (-3.5, 15.0, 2000.0),
    "mt": (-2.5, 40.0, 1.0e5),
    "mt_r1": 1.0,
}

#: Largest |Z_fast - Z_exact| over the phantom's grey- and white-matter tissues at 3 T, 1 uT,
#: 2 s CW, offsets within +-5.9 ppm (the tested bound; the measured figure is printed by
#: tests/bench/bench_fits.py).
FAST_PATH_ERROR = 0.02

PARAM_NAMES = ("scale", "water_shift_ppm", "r2w", "fk_amide", "fk_amine", "fk_noe", "f_mt", "r1w")
_LOWER = np.array([0.5, -1.0, 2.0, 0.0, 0.0, 0.0, 0.0, 0.1])
_UPPER = np.array([1.5, 1.0, 100.0, 1.0, 5.0, 2.0, 0.5, 5.0])
_START = np.array([1.0, 0.0, 14.0, 0.03, 0.5, 0.15, 0.1, 0.8])

_G_CACHE: dict[float, tuple[np.ndarray, np.ndarray]] = {}


def _sl_table(t2_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Super-Lorentzian on a log grid of |delta| (rad/s), for fast interpolation."""
    if t2_s not in _G_CACHE:
        grid = np.concatenate([[0.0], np.geomspace(1.0, 1e7, 2000)])
        _G_CACHE[t2_s] = (grid, lineshape(grid, t2_s, "super_lorentzian"))
    return _G_CACHE[t2_s]


def _fast_z_core(p, offs_rad, w1, tsat, r1w_fixed, w_per_ppm, amide_only=False, water_only=False):
    """Model for params p (n, 8) (column 7 = R1w, replaced by r1w_fixed where given)."""
    s = p[:, 0:1]
    dw = offs_rad[None, :] - (p[:, 1:2] * w_per_ppm)  # RF offset from water, rad/s
    r2w = p[:, 2:3]
    r1w = p[:, 7:8] if r1w_fixed is None else r1w_fixed[:, None]
    w1sq = w1 * w1
    den = dw * dw + w1sq
    cos2 = dw * dw / den
    sin2 = w1sq / den
    r1rho = r1w * cos2 + r2w * sin2
    r1num = r1w  # the rate of return to equilibrium (the semisolid pool adds its own)
    if not water_only:
        pools = ("amide",) if amide_only else ("amide", "amine", "noe")
        col = {"amide": 3, "amine": 4, "noe": 5}
        for name in pools:
            d_ppm, k, r2 = NOMINAL[name]
            fk = p[:, col[name] : col[name] + 1]
            kr = k + r2
            g2 = ((kr / k) * w1sq + kr * kr)  # (Gamma/2)^2
            dd = dw - d_ppm * w_per_ppm
            r1rho = r1rho + fk * (w1sq / (w1sq + k * kr)) * g2 / (g2 + dd * dd)
        if not amide_only:
            d_ppm, k, r2 = NOMINAL["mt"]
            r1m = NOMINAL["mt_r1"]
            grid, gval = _sl_table(1.0 / r2)
            g = np.interp(np.abs(dw - d_ppm * w_per_ppm), grid, gval)
            rrf = np.pi * w1sq * g
            fmk = p[:, 6:7] * k
            dm = r1m + k + rrf
            r1rho = r1rho + cos2 * fmk * (r1m + rrf) / dm
            r1num = r1w + fmk * r1m / dm
    zss = cos2 * r1num / r1rho
    return s * ((cos2 - zss) * np.exp(-r1rho * tsat) + zss)


def fast_z(
    offsets_ppm, params, *, b1_ut: float, tsat_s: float, field_t: float, t1_s=None
) -> np.ndarray:
    """Evaluate the fast-path model for parameters ``(..., 8)`` ordered as :data:`PARAM_NAMES`.

    Returns
    -------
    ndarray (..., n_offsets)
    """
    p = np.asarray(params, dtype=np.float64)
    lead = p.shape[:-1]
    p2 = p.reshape(-1, p.shape[-1])
    w_per_ppm = 2 * np.pi * GAMMA_HZ_PER_T * field_t * 1e-6
    offs = np.asarray(offsets_ppm, np.float64) * w_per_ppm
    r1 = None if t1_s is None else (1.0 / np.broadcast_to(np.asarray(t1_s, np.float64), lead)).ravel()
    z = _fast_z_core(p2, offs, float(b1_to_rad_s(b1_ut)), tsat_s, r1, w_per_ppm)
    return z.reshape(lead + (offs.size,))


@dataclass(frozen=True)
class AptrStarResult:
    """Outcome of :func:`aptr_star`; maps shaped like ``z`` without its last axis.

    Attributes
    ----------
    map : ndarray
        APTR* (Z units): ``Z_water(3.5) - Z_water+amide(3.5)`` from the fitted parameters.
    fk_amide : ndarray
        Amide fraction x exchange rate, s^-1 (the separable quantity at one B1 level).
    params : ndarray (..., 8)
        Fitted parameters in the order of :data:`PARAM_NAMES` (``r1w`` is the given ``1/T1``
        where a T1 map was passed).
    rms, converged, iterations, flags : ndarray
        Fit quality; ``flags`` as in :mod:`quant.lorentz` (FLAG_AT_BOUND: the amide ``f k``
        rests on a bound).
    """

    map: np.ndarray
    fk_amide: np.ndarray
    water_shift_ppm: np.ndarray
    params: np.ndarray
    rms: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray
    flags: np.ndarray


def aptr_star(
    z,
    offsets_ppm,
    *,
    b1_ut: float,
    tsat_s: float,
    field_t: float,
    t1_s=None,
    init: str = "table",
    neighbourhood: int = 3,
    max_iter: int = 100,
    rms_limit: float | None = None,
    noise_sigma: float | None = None,
) -> AptrStarResult:
    """Fit the fast-path Bloch-McConnell model and return APTR* (see the module docstring).

    Parameters
    ----------
    z : array_like (..., n_offsets)
        Z-spectra (normalised by M0); the water shift is fitted.
    offsets_ppm : array_like (n_offsets,)
    b1_ut : float
        CW saturation amplitude in microtesla (for a pulse train, its CW power equivalent).
    tsat_s : float
        Saturation duration in s.
    field_t : float
        Main field in tesla.
    t1_s : array_like (...), optional
        Water T1 map in s; where given (finite), ``R1w = 1/T1`` is held fixed, else fitted.
    init : {'table', 'neighbourhood'}
        As in :func:`quant.lorentz.multi_lorentzian`.
    max_iter : int
        Solver step limit.
    rms_limit, noise_sigma : float, optional
        The residual gate as in :func:`quant.lorentz.multi_lorentzian`: by default the
        chi-square limit of :func:`quant.lorentz.residual_limit` at ``noise_sigma`` or at the
        noise estimated from all voxels' residuals.

    Returns
    -------
    AptrStarResult
    """
    for name, v in (("b1_ut", b1_ut), ("tsat_s", tsat_s), ("field_t", field_t)):
        if not (np.isfinite(v) and v > 0):
            raise ValueError(f"{name} must be positive and finite, got {v!r}")
    z = np.asarray(z)
    offs = np.asarray(offsets_ppm, dtype=np.float64)
    if offs.ndim != 1:
        raise ValueError(f"offsets_ppm must be 1-D, got shape {offs.shape}")
    if z.ndim < 1 or z.shape[-1] != offs.size:
        raise ValueError(
            f"z must be shaped (..., n_offsets) with n_offsets = {offs.size}, got shape {z.shape}"
        )
    n_par = len(PARAM_NAMES) - (0 if t1_s is None else 1)
    if offs.size < n_par + 1:
        raise ValueError(
            f"too few offsets for the Bloch-McConnell fit: {offs.size} offsets for {n_par} parameters"
        )
    if not (np.any((offs > 3.0) & (offs < 4.0)) and np.any(np.abs(offs) < 1.0)):
        raise ValueError("offsets do not cover the amide pool (3-4 ppm) and water (within 1 ppm)")
    out_dtype = z.dtype if z.dtype in (np.float32, np.float64) else np.dtype(np.float64)
    lead = z.shape[:-1]
    zf = z.reshape(-1, offs.size).astype(np.float64)
    if t1_s is not None:
        t1 = np.broadcast_to(np.asarray(t1_s, dtype=np.float64), lead).ravel()
        with np.errstate(divide="ignore"):
            r1_fixed = np.where(np.isfinite(t1) & (t1 > 0), 1.0 / t1, np.nan)
        # voxels without a usable T1 become invalid (NaN residual), never a silent default
        zf = np.where(np.isfinite(r1_fixed)[:, None], zf, np.nan)
    else:
        r1_fixed = None

    w_per_ppm = 2 * np.pi * GAMMA_HZ_PER_T * field_t * 1e-6
    offs_rad = offs * w_per_ppm
    w1 = float(b1_to_rad_s(b1_ut))
    free = np.arange(len(PARAM_NAMES)) if r1_fixed is None else np.arange(len(PARAM_NAMES) - 1)

    def full(p, i):
        if r1_fixed is None:
            return p, None
        pf = np.empty((p.shape[0], len(PARAM_NAMES)))
        pf[:, :-1] = p
        pf[:, -1] = r1_fixed[i]
        return pf, r1_fixed[i]

    def fit(data, p0):
        def fun(p, i):
            pf, r1 = full(p, i)
            return _fast_z_core(pf, offs_rad, w1, tsat_s, r1, w_per_ppm) - data[i]

        return least_squares_batch(
            fun, p0, lower=_LOWER[free], upper=_UPPER[free], max_iter=max_iter, ftol=1e-6, xtol=1e-6
        )

    p0 = np.tile(_START[free], (zf.shape[0], 1))
    near = np.abs(offs) <= 1.0
    zn = np.where(np.isfinite(zf[:, near]), zf[:, near], np.inf)
    p0[:, 1] = offs[near][np.argmin(zn, axis=1)]  # water at the minimum (common practice)
    if init == "neighbourhood":
        if len(lead) < 2:
            raise ValueError(
                f"init='neighbourhood' needs at least two spatial axes before the offsets, got {lead}"
            )
        zz = zf.reshape(lead + (offs.size,))
        good = np.all(np.isfinite(zz), axis=-1, keepdims=True)
        filt = (1,) * (len(lead) - 2) + (neighbourhood, neighbourhood, 1)
        num = ndimage.uniform_filter(np.where(good, zz, 0.0), size=filt, mode="nearest")
        den = ndimage.uniform_filter(good.astype(np.float64), size=filt, mode="nearest")
        with np.errstate(invalid="ignore", divide="ignore"):
            zs = np.where(good, num / den, np.nan).reshape(zf.shape)
        pre = fit(zs, p0)
        ok = np.all(np.isfinite(pre.params), axis=1)
        p0[ok] = pre.params[ok]
    elif init != "table":
        raise ValueError(f"init must be 'table' or 'neighbourhood', got {init!r}")
    res = fit(zf, p0)

    pf, r1 = full(res.params, np.arange(zf.shape[0]))
    # both spectra at +3.5 ppm from the fitted water: water shift 0, unit scale
    unit = pf.copy()
    unit[:, 0] = 1.0
    unit[:, 1] = 0.0
    at35 = np.array([3.5 * w_per_ppm])
    zw = _fast_z_core(unit, at35, w1, tsat_s, r1, w_per_ppm, water_only=True)[:, 0]
    zwa = _fast_z_core(unit, at35, w1, tsat_s, r1, w_per_ppm, amide_only=True)[:, 0]
    aptr = zw - zwa
    flags = np.zeros(zf.shape[0], dtype=np.uint8)
    flags[res.status < 0] |= FLAG_INVALID_INPUT
    flags[res.status == 0] |= FLAG_NOT_CONVERGED
    flags[res.at_bound[:, 3]] |= FLAG_AT_BOUND
    limit = _gate(res.residual_rms, offs.size, free.size, rms_limit, noise_sigma)
    with np.errstate(invalid="ignore"):
        flags[res.residual_rms > limit] |= FLAG_HIGH_RESIDUAL

    def shape(a, dt=out_dtype):
        return np.asarray(a).reshape(lead + np.shape(a)[1:]).astype(dt)

    return AptrStarResult(
        map=shape(aptr),
        fk_amide=shape(pf[:, 3]),
        water_shift_ppm=shape(pf[:, 1]),
        params=shape(pf),
        rms=shape(res.residual_rms),
        converged=shape(res.converged, bool),
        iterations=shape(res.iterations, np.int64),
        flags=shape(flags, np.uint8),
    )


def _aptr_star_percent(z, offsets_ppm, *, t1_s=None, b1_ut, tsat_s, field_t):
    return aptr_star(z, offsets_ppm, b1_ut=b1_ut, tsat_s=tsat_s, field_t=field_t, t1_s=t1_s).map * 100


def _register() -> None:
    from quant.registry import METHODS, MethodInfo, register

    if "aptr_star" not in METHODS:
        # cost: 1,342 voxels/s measured by tests/bench/bench_fits.py (64 x 64), rounded up
        register(
            MethodInfo(
                "aptr_star", "APTR* Bloch-McConnell fit 3.5 ppm", "%", False, False, 8e-4,
                _aptr_star_percent, needs_b0=False, needs_saturation=True,
            )
        )


_register()
