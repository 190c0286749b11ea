"""Bloch-McConnell simulation of saturation-transfer Z-spectra.

The model: one water pool, any number of exchanging solute pools (amide, amine, relayed
NOE, ...) with their own transverse and longitudinal magnetisation, and optionally one
semisolid magnetisation-transfer pool that keeps only a longitudinal magnetisation and is
saturated at the rate ``R_rf = pi * omega1**2 * G(delta)`` of its line shape ``G``
(Henkelman et al., Magn Reson Med 1993;29:759-766). The default semisolid line shape is the
super-Lorentzian of Morrison & Henkelman (J Magn Reson B 1995;108:103-113); it diverges on
resonance, so it is held at its value at ``|delta| = 1 kHz`` inside that band (common
practice).

Equations (rotating frame of the RF, RF along x, pool ``p`` at chemical shift ``d_p`` from
water, RF at offset ``D`` from water, ``W_p = 2*pi*f0*(D - d_p)`` in rad/s)::

    dMx_p/dt = -R2_p Mx_p + W_p My_p                           + exchange
    dMy_p/dt = -W_p Mx_p - R2_p My_p + w1 Mz_p                 + exchange
    dMz_p/dt = -w1 My_p - R1_p (Mz_p - M0_p)                   + exchange
    dMz_m/dt = -R1_m (Mz_m - M0_m) - R_rf Mz_m                 + exchange   (semisolid)

Exchange between water ``w`` and pool ``s`` (fraction ``f_s = M0_s / M0_w``, rate ``k_s``
from the pool to water) follows McConnell (J Chem Phys 1958;28:430-431): water loses to the
pool at ``k_s * f_s``, the pool returns at ``k_s``, the same for every component (the
semisolid pool only in z). Water ``M0_w = 1``, so the water ``Mz`` is the Z value.

The affine system ``dM/dt = A M + b`` is written in homogeneous form, a matrix ``[[A, b],
[0, 0]]`` acting on ``[M, 1]``, so that one matrix exponential gives the exact solution of
continuous-wave (CW) saturation; the steady state solves ``A M = -b``. Everything is
vectorised: tissue parameters may be arrays of a voxel shape, offsets ``(n_off,)`` or
``(..., n_off)``; results are ``broadcast(voxel shape) + (n_off,)``, float64.

Field in tesla; gamma/2pi = 42.577478 MHz/T (CODATA 2018: 42.577 478 518 MHz/T).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "GAMMA_HZ_PER_T",
    "Pool",
    "SemisolidPool",
    "Tissue",
    "PulseTrain",
    "BlochMatrices",
    "ppm_to_hz",
    "ppm_to_rad_s",
    "b1_to_rad_s",
    "lineshape",
    "system_matrices",
    "steady_state_z",
    "cw_z",
    "pulsed_z",
    "simulate_z",
]

GAMMA_HZ_PER_T = 42.577478e6
"""Proton gyromagnetic ratio over 2 pi in Hz/T (CODATA 2018, 42.577 478 518 MHz/T)."""

SUPER_LORENTZIAN_CUTOFF_HZ = 1000.0
"""Inside this distance from its centre the super-Lorentzian is held constant (common practice)."""

_GL_NODES = 160


def ppm_to_hz(ppm: ArrayLike, field_t: float) -> NDArray[np.float64]:
    """Convert a chemical-shift offset in ppm to Hz at ``field_t`` tesla.

    ``f = ppm * 1e-6 * gamma/2pi * B0`` with gamma/2pi = 42.577478 MHz/T (CODATA 2018).

    Examples
    --------
    >>> round(float(ppm_to_hz(3.5, 3.0)), 1)
    447.1
    """
    _check_field(field_t)
    return np.asarray(ppm, dtype=np.float64) * 1e-6 * GAMMA_HZ_PER_T * field_t


def ppm_to_rad_s(ppm: ArrayLike, field_t: float) -> NDArray[np.float64]:
    """Convert ppm to angular frequency in rad/s at ``field_t`` tesla (``2 pi`` times :func:`ppm_to_hz`)."""
    return 2.0 * np.pi * ppm_to_hz(ppm, field_t)


def b1_to_rad_s(b1_ut: ArrayLike) -> NDArray[np.float64]:
    """RF amplitude ``omega1 = gamma * B1`` in rad/s for ``B1`` in microtesla."""
    return 2.0 * np.pi * GAMMA_HZ_PER_T * 1e-6 * np.asarray(b1_ut, dtype=np.float64)


def _check_field(field_t: float) -> None:
    if not np.isfinite(field_t) or field_t <= 0:
        raise ValueError(f"field_t must be a positive field strength in tesla, got {field_t!r}")


def _positive(name: str, value: ArrayLike) -> None:
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0):
        raise ValueError(f"{name} must be positive and finite")


def _non_negative(name: str, value: ArrayLike) -> None:
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be non-negative and finite")


@dataclass(frozen=True)
class Pool:
    """An exchanging solute pool with transverse and longitudinal magnetisation.

    Parameters
    ----------
    offset_ppm : chemical shift from water (amide +3.5, amine +2.0, relayed NOE -3.5).
    fraction : equilibrium magnetisation relative to water, ``M0_s / M0_w``.
    k_hz : exchange rate from this pool to water, s^-1.
    t1_s, t2_s : relaxation times of the pool, s.
    name : a label for humans.

    Every numeric field may be an array of a voxel shape.
    """

    offset_ppm: ArrayLike
    fraction: ArrayLike
    k_hz: ArrayLike
    t1_s: ArrayLike = 1.0
    t2_s: ArrayLike = 0.01
    name: str = ""

    def __post_init__(self) -> None:
        label = self.name or "pool"
        _non_negative(f"{label} fraction", self.fraction)
        _non_negative(f"{label} k_hz", self.k_hz)
        _positive(f"{label} t1_s", self.t1_s)
        _positive(f"{label} t2_s", self.t2_s)


@dataclass(frozen=True)
class SemisolidPool:
    """The semisolid (macromolecular) magnetisation-transfer pool: longitudinal only.

    ``lineshape`` is ``'super_lorentzian'`` (default), ``'lorentzian'`` or ``'gaussian'``;
    ``t2_s`` is its (very short) transverse relaxation time, about 10 microseconds in
    brain (from memory); ``offset_ppm`` its centre, slightly upfield of water (-2.5 ppm is a
    common choice).
    """

    fraction: ArrayLike
    k_hz: ArrayLike
    t1_s: ArrayLike = 1.0
    t2_s: ArrayLike = 1.0e-5
    offset_ppm: ArrayLike = -2.5
    lineshape: Literal["super_lorentzian", "lorentzian", "gaussian"] = "super_lorentzian"

    def __post_init__(self) -> None:
        _non_negative("semisolid fraction", self.fraction)
        _non_negative("semisolid k_hz", self.k_hz)
        _positive("semisolid t1_s", self.t1_s)
        _positive("semisolid t2_s", self.t2_s)
        if self.lineshape not in ("super_lorentzian", "lorentzian", "gaussian"):
            raise ValueError(f"unknown semisolid lineshape {self.lineshape!r}")


@dataclass(frozen=True)
class Tissue:
    """Water relaxation plus its exchanging pools.

    Parameters
    ----------
    t1_s, t2_s : water relaxation times in s (arrays of a voxel shape allowed).
    pools : solute pools.
    semisolid : the semisolid MT pool, or None.
    """

    t1_s: ArrayLike
    t2_s: ArrayLike
    pools: tuple[Pool, ...] = field(default_factory=tuple)
    semisolid: SemisolidPool | None = None

    def __post_init__(self) -> None:
        _positive("water t1_s", self.t1_s)
        _positive("water t2_s", self.t2_s)
        object.__setattr__(self, "pools", tuple(self.pools))
        for pool in self.pools:
            if not isinstance(pool, Pool):
                raise ValueError("Tissue.pools must hold Pool objects")

    @property
    def size(self) -> int:
        """Length of the homogeneous state vector."""
        return 3 * (1 + len(self.pools)) + (1 if self.semisolid is not None else 0) + 1


def lineshape(
    delta_rad_s: ArrayLike,
    t2_s: ArrayLike,
    kind: str = "super_lorentzian",
    *,
    cutoff_hz: float = SUPER_LORENTZIAN_CUTOFF_HZ,
) -> NDArray[np.float64]:
    """Absorption line shape ``G(delta)`` in s/rad, normalised so that ``int G d(delta) = 1``.

    - Lorentzian: ``G = (T2/pi) / (1 + (delta T2)^2)``.
    - Gaussian: ``G = T2/sqrt(2 pi) exp(-(delta T2)^2 / 2)``.
    - Super-Lorentzian (Morrison & Henkelman, J Magn Reson B 1995;108:103-113):
      ``G = int_0^1 sqrt(2/pi) T2/|3u^2-1| exp(-2 (delta T2/(3u^2-1))^2) du``, evaluated by
      Gauss-Legendre quadrature split at the magic angle ``u = 1/sqrt(3)``, and held at its
      value at ``|delta| = 2 pi cutoff_hz`` inside that band (it diverges on resonance;
      common practice). ``cutoff_hz=0`` disables the hold.
    """
    delta = np.abs(np.asarray(delta_rad_s, dtype=np.float64))
    t2 = np.asarray(t2_s, dtype=np.float64)
    if kind == "lorentzian":
        return (t2 / np.pi) / (1.0 + (delta * t2) ** 2)
    if kind == "gaussian":
        return t2 / np.sqrt(2.0 * np.pi) * np.exp(-0.5 * (delta * t2) ** 2)
    if kind != "super_lorentzian":
        raise ValueError(f"unknown lineshape {kind!r}")
    if cutoff_hz > 0:
        delta = np.maximum(delta, 2.0 * np.pi * cutoff_hz)
    nodes, weights = _sl_quadrature()
    a = np.abs(3.0 * nodes**2 - 1.0)  # (K,)
    x = (delta * t2)[..., None] / a
    vals = np.sqrt(2.0 / np.pi) / a * np.exp(-2.0 * x * x)
    return t2 * (vals @ weights)


_SL_CACHE: dict[int, tuple[NDArray[np.float64], NDArray[np.float64]]] = {}


def _sl_quadrature() -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    if _GL_NODES not in _SL_CACHE:
        x, w = np.polynomial.legendre.leggauss(_GL_NODES)
        u0 = 1.0 / np.sqrt(3.0)
        # two panels, [0, u0] and [u0, 1]; the nodes crowd toward the magic angle
        n1 = 0.5 * u0 * (x + 1.0)
        w1 = 0.5 * u0 * w
        n2 = u0 + 0.5 * (1.0 - u0) * (x + 1.0)
        w2 = 0.5 * (1.0 - u0) * w
        _SL_CACHE[_GL_NODES] = (np.concatenate([n1, n2]), np.concatenate([w1, w2]))
    return _SL_CACHE[_GL_NODES]


@dataclass(frozen=True)
class BlochMatrices:
    """Homogeneous Bloch-McConnell matrices ``A(w1) = a0 + w1 a1 + w1^2 a2``.

    ``a0, a1, a2`` have shape ``batch + (n, n)`` with ``batch = voxel shape + (n_off,)``;
    ``m_eq`` is the homogeneous equilibrium state ``(n,)`` broadcast to ``batch + (n,)``.
    Index 2 of the state is the water ``Mz`` (the Z value, water ``M0 = 1``); the last index
    is the constant 1.
    """

    a0: NDArray[np.float64]
    a1: NDArray[np.float64]
    a2: NDArray[np.float64]
    m_eq: NDArray[np.float64]
    transverse: NDArray[np.intp]

    def at(self, omega1_rad_s: ArrayLike) -> NDArray[np.float64]:
        """The matrix for an RF amplitude ``omega1`` (rad/s, scalar or voxel-shaped)."""
        w1 = np.asarray(omega1_rad_s, dtype=np.float64)
        # voxel-shaped: add the offset axis and the two matrix axes
        w1 = w1.reshape(w1.shape + (1, 1, 1)) if w1.ndim else w1
        return self.a0 + w1 * self.a1 + w1 * w1 * self.a2

    @property
    def water_z(self) -> int:
        return 2


def system_matrices(
    tissue: Tissue,
    offsets_ppm: ArrayLike,
    *,
    field_t: float,
) -> BlochMatrices:
    """Build the Bloch-McConnell matrices of ``tissue`` at the saturation offsets.

    Parameters
    ----------
    tissue : the pools.
    offsets_ppm : RF offsets from water, ``(n_off,)`` or ``(..., n_off)`` (per-voxel offsets,
        for example shifted by a B0 map).
    field_t : main field in tesla.

    Returns
    -------
    BlochMatrices
        With batch shape ``broadcast(voxel shape, offsets.shape[:-1]) + (n_off,)``.
    """
    _check_field(field_t)
    offsets = np.asarray(offsets_ppm, dtype=np.float64)
    if offsets.ndim == 0:
        offsets = offsets[None]
    if not np.all(np.isfinite(offsets)):
        raise ValueError("offsets_ppm must be finite")
    params = [tissue.t1_s, tissue.t2_s]
    for pool in tissue.pools:
        params += [pool.offset_ppm, pool.fraction, pool.k_hz, pool.t1_s, pool.t2_s]
    ss = tissue.semisolid
    if ss is not None:
        params += [ss.offset_ppm, ss.fraction, ss.k_hz, ss.t1_s, ss.t2_s]
    vshape = np.broadcast_shapes(*(np.shape(p) for p in params), offsets.shape[:-1])
    batch = vshape + offsets.shape[-1:]
    n = tissue.size
    c = n - 1
    a0 = np.zeros(batch + (n, n))
    a1 = np.zeros(batch + (n, n))
    a2 = np.zeros(batch + (n, n))

    def vox(value: ArrayLike) -> NDArray[np.float64]:
        # a voxel parameter, broadcast over the offset axis
        return np.asarray(value, dtype=np.float64)[..., None]

    w_per_ppm = 2.0 * np.pi * GAMMA_HZ_PER_T * field_t * 1e-6
    pools = [(0.0, 1.0, 0.0, tissue.t1_s, tissue.t2_s)] + [
        (p.offset_ppm, p.fraction, p.k_hz, p.t1_s, p.t2_s) for p in tissue.pools
    ]
    m_eq = np.zeros(vshape + (1, n))
    for i, (d_ppm, frac, k, t1, t2) in enumerate(pools):
        x, y, z = 3 * i, 3 * i + 1, 3 * i + 2
        r1, r2 = 1.0 / vox(t1), 1.0 / vox(t2)
        omega = (offsets - vox(d_ppm)) * w_per_ppm
        a0[..., x, x] -= r2
        a0[..., y, y] -= r2
        a0[..., z, z] -= r1
        a0[..., z, c] += r1 * vox(frac)
        a0[..., x, y] += omega
        a0[..., y, x] -= omega
        a1[..., y, z] += 1.0
        a1[..., z, y] -= 1.0
        m_eq[..., z] = vox(frac)
        if i > 0:
            kb = vox(k)
            ka = kb * vox(frac)
            for comp in range(3):
                w, s = comp, 3 * i + comp
                a0[..., w, w] -= ka
                a0[..., s, w] += ka
                a0[..., s, s] -= kb
                a0[..., w, s] += kb
    if ss is not None:
        m = 3 * len(pools)
        r1 = 1.0 / vox(ss.t1_s)
        kb = vox(ss.k_hz)
        ka = kb * vox(ss.fraction)
        a0[..., m, m] -= r1 + kb
        a0[..., m, c] += r1 * vox(ss.fraction)
        a0[..., m, 2] += ka
        a0[..., 2, 2] -= ka
        a0[..., 2, m] += kb
        omega_m = (offsets - vox(ss.offset_ppm)) * w_per_ppm
        a2[..., m, m] -= np.pi * lineshape(omega_m, vox(ss.t2_s), ss.lineshape)
        m_eq[..., m] = vox(ss.fraction)
    m_eq[..., c] = 1.0
    transverse = np.array([3 * i + j for i in range(len(pools)) for j in (0, 1)], dtype=np.intp)
    return BlochMatrices(a0, a1, a2, np.broadcast_to(m_eq, batch + (n,)).copy(), transverse)


def _omega1(b1_ut: ArrayLike) -> NDArray[np.float64]:
    b1 = np.asarray(b1_ut, dtype=np.float64)
    _non_negative("b1_ut", b1)
    w1 = b1_to_rad_s(b1)
    # voxel-shaped B1: add the offset axis and the two matrix axes
    return w1.reshape(w1.shape + (1, 1, 1)) if w1.ndim else w1


def _matrix_at(mats: BlochMatrices, w1: NDArray[np.float64]) -> NDArray[np.float64]:
    return mats.a0 + w1 * mats.a1 + (w1 * w1) * mats.a2


def _initial(mats: BlochMatrices, m_init: float) -> NDArray[np.float64]:
    if not np.isfinite(m_init) or abs(m_init) > 1.0:
        raise ValueError(f"m_init must be a fraction of M0 in [-1, 1], got {m_init!r}")
    m = mats.m_eq.copy()
    m[..., :-1] *= m_init
    return m


def steady_state_z(
    tissue: Tissue, offsets_ppm: ArrayLike, *, field_t: float, b1_ut: ArrayLike
) -> NDArray[np.float64]:
    """Steady-state Z of CW saturation: solve ``A M = -b`` for every voxel and offset.

    For a single water pool this is the textbook Bloch steady state
    ``Z = R1 (D^2 + R2^2) / (R1 (D^2 + R2^2) + R2 w1^2)``.
    """
    mats = system_matrices(tissue, offsets_ppm, field_t=field_t)
    a = _matrix_at(mats, _omega1(b1_ut))
    m = np.linalg.solve(a[..., :-1, :-1], -a[..., :-1, -1:])
    return m[..., 2, 0]


def cw_z(
    tissue: Tissue,
    offsets_ppm: ArrayLike,
    *,
    field_t: float,
    b1_ut: ArrayLike,
    tsat_s: float,
    m_init: float = 1.0,
) -> NDArray[np.float64]:
    """Z after continuous-wave saturation for ``tsat_s`` seconds, exactly (matrix exponential).

    ``M(t) = expm(A_h t) M(0)`` with the homogeneous matrix ``A_h``; ``M(0)`` is the
    equilibrium with every ``Mz`` scaled by ``m_init`` (1: fully relaxed; 0: saturated).
    """
    if not np.isfinite(tsat_s) or tsat_s < 0:
        raise ValueError(f"tsat_s must be a non-negative duration in s, got {tsat_s!r}")
    mats = system_matrices(tissue, offsets_ppm, field_t=field_t)
    a = _matrix_at(mats, _omega1(b1_ut))
    prop = scipy.linalg.expm(a * tsat_s)
    m = np.einsum("...ij,...j->...i", prop, _initial(mats, m_init))
    return m[..., 2]


@dataclass(frozen=True)
class PulseTrain:
    """A train of identical shaped saturation pulses separated by gaps.

    Parameters
    ----------
    pulse_s : duration of one pulse, s.
    gap_s : interpulse delay, s (no RF); duty cycle ``pulse_s / (pulse_s + gap_s)``.
    n_pulses : number of pulses; the train is pulse, gap, pulse, ..., pulse.
    shape : ``'block'``, ``'gauss'`` (Gaussian truncated at +-2.5 sigma), ``'sinc'``
        (three-lobe sinc with a Gaussian apodisation), or an array of relative amplitudes.
    n_samples : piecewise-constant samples per pulse for shaped pulses.
    b1_mode : what ``b1_ut`` means: ``'cwpe'`` (default) the RMS over the whole train,
        pulses and gaps, i.e. the CW power equivalent; ``'pulse_rms'`` the RMS over a pulse;
        ``'peak'`` the peak amplitude.
    spoil : zero all transverse magnetisation after each pulse (an ideal crusher).
    """

    pulse_s: float
    gap_s: float
    n_pulses: int
    shape: str | NDArray[np.float64] = "gauss"
    n_samples: int = 64
    b1_mode: Literal["cwpe", "pulse_rms", "peak"] = "cwpe"
    spoil: bool = False

    def __post_init__(self) -> None:
        if not (np.isfinite(self.pulse_s) and self.pulse_s > 0):
            raise ValueError("pulse_s must be positive")
        if not (np.isfinite(self.gap_s) and self.gap_s >= 0):
            raise ValueError("gap_s must be non-negative")
        if int(self.n_pulses) != self.n_pulses or self.n_pulses < 1:
            raise ValueError("n_pulses must be a positive integer")
        if self.b1_mode not in ("cwpe", "pulse_rms", "peak"):
            raise ValueError(f"unknown b1_mode {self.b1_mode!r}")
        amp = self.amplitudes()
        if amp.ndim != 1 or amp.size < 1 or not np.all(np.isfinite(amp)) or np.max(np.abs(amp)) == 0:
            raise ValueError("pulse shape must be a non-zero 1-D array of finite amplitudes")

    @property
    def duty_cycle(self) -> float:
        return self.pulse_s / (self.pulse_s + self.gap_s)

    @property
    def duration_s(self) -> float:
        return self.n_pulses * self.pulse_s + (self.n_pulses - 1) * self.gap_s

    def amplitudes(self) -> NDArray[np.float64]:
        """Relative amplitude of each sample, peak 1."""
        if isinstance(self.shape, str):
            if self.shape == "block":
                amp = np.ones(1)
            else:
                t = (np.arange(self.n_samples) + 0.5) / self.n_samples - 0.5  # -0.5..0.5
                if self.shape == "gauss":
                    amp = np.exp(-0.5 * (t * 5.0) ** 2)
                elif self.shape == "sinc":
                    amp = np.sinc(t * 4.0) * np.exp(-0.5 * (t * 3.0) ** 2)
                else:
                    raise ValueError(f"unknown pulse shape {self.shape!r}")
        else:
            amp = np.asarray(self.shape, dtype=np.float64)
        peak = np.max(np.abs(amp)) if amp.size else 0.0
        return amp / peak if peak > 0 else amp

    def peak_scale(self) -> float:
        """Peak amplitude per unit of ``b1_ut``."""
        amp = self.amplitudes()
        if self.b1_mode == "peak":
            return 1.0
        rms = float(np.sqrt(np.mean(amp * amp)))
        if self.b1_mode == "pulse_rms":
            return 1.0 / rms
        return 1.0 / (rms * np.sqrt(self.duty_cycle))


def pulsed_z(
    tissue: Tissue,
    offsets_ppm: ArrayLike,
    *,
    field_t: float,
    b1_ut: ArrayLike,
    train: PulseTrain,
    m_init: float = 1.0,
) -> NDArray[np.float64]:
    """Z after a pulsed saturation train, exactly for the piecewise-constant pulse.

    Each pulse is ``n_samples`` constant segments; its propagator is the ordered product of
    the segments' matrix exponentials. One period is gap x (spoil) x pulse; the train is
    ``pulse x period^(n-1)`` (fast matrix power). With ``shape='block'``, ``gap_s=0`` and
    ``spoil=False`` it equals :func:`cw_z` for ``tsat_s = n_pulses * pulse_s``.
    """
    mats = system_matrices(tissue, offsets_ppm, field_t=field_t)
    w1_unit = _omega1(b1_ut) * train.peak_scale()
    amp = train.amplitudes()
    dt = train.pulse_s / amp.size
    n = mats.a0.shape[-1]
    pulse = np.broadcast_to(np.eye(n), mats.a0.shape).copy()
    cache: dict[float, NDArray[np.float64]] = {}
    for a_k in amp:
        key = float(a_k)
        if key not in cache:
            cache[key] = scipy.linalg.expm(_matrix_at(mats, w1_unit * a_k) * dt)
        pulse = cache[key] @ pulse
    period = pulse
    if train.spoil:
        spoil = np.eye(n)
        spoil[mats.transverse, mats.transverse] = 0.0
        period = spoil @ period
    if train.gap_s > 0:
        period = scipy.linalg.expm(mats.a0 * train.gap_s) @ period
    total = pulse
    if train.n_pulses > 1:
        total = pulse @ np.linalg.matrix_power(period, train.n_pulses - 1)
    m = np.einsum("...ij,...j->...i", total, _initial(mats, m_init))
    return m[..., 2]


def simulate_z(
    tissue: Tissue,
    offsets_ppm: ArrayLike,
    *,
    field_t: float,
    b1_ut: ArrayLike,
    tsat_s: float | None = None,
    train: PulseTrain | None = None,
    m_init: float = 1.0,
) -> NDArray[np.float64]:
    """Simulate a Z-spectrum: pulsed if ``train`` is given, CW for ``tsat_s``, else steady state.

    Examples
    --------
    >>> water = Tissue(t1_s=1.3, t2_s=0.08)
    >>> z = simulate_z(water, [-3.5, 0.0, 3.5], field_t=3.0, b1_ut=1.0)
    >>> bool(z[1] < 0.01 and abs(z[0] - z[2]) < 1e-12)
    True
    """
    if train is not None:
        if tsat_s is not None:
            raise ValueError("give either tsat_s (CW) or train (pulsed), not both")
        return pulsed_z(tissue, offsets_ppm, field_t=field_t, b1_ut=b1_ut, train=train, m_init=m_init)
    if tsat_s is None:
        return steady_state_z(tissue, offsets_ppm, field_t=field_t, b1_ut=b1_ut)
    return cw_z(tissue, offsets_ppm, field_t=field_t, b1_ut=b1_ut, tsat_s=tsat_s, m_init=m_init)
