"""The synthetic stroke phantom: an invented brain-like slab for the demo and the tests.

Anatomy (our own scenario, not a real subject): an elliptical brain in every slice, cortex of
grey matter (GM) around white matter (WM), two deep grey nuclei and two ventricles of CSF.
One hemisphere (image columns right of the midline, ``x > 0``) holds an acidotic lesion, a
core at pH 6.5 inside a rim at pH 6.8; the rest of the brain is at pH 7.1. The amide exchange
rate follows the base-catalysed relation ``k = 5.57 * 10**(pH - 6.4) s^-1`` (Zhou et al., Nat
Med 2003;9:1085-1090). The contralateral mask is the lesion mirrored across the midline.

Every voxel's Z-spectrum comes from the Bloch-McConnell simulator (:mod:`quant.bloch`): CW
saturation of ``b1_ut`` for ``tsat_s`` from equilibrium, water + amide (+3.5 ppm) + amine
(+2.0 ppm) + relayed NOE (-3.5 ppm) + a super-Lorentzian semisolid pool. Tissue values are
typical 3 T brain figures recalled from the literature (from memory), rounded. Only the amide
exchange rate depends on pH; T1 is left unchanged in the lesion so that the contrast is the
pH effect alone.

Speed: the few unique tissue classes are simulated once on a grid of water shifts
(0.05 ppm apart) around every acquired offset, and each voxel takes a 4-point cubic Lagrange
interpolation in that grid at its own B0, so that the spectrum is evaluated at
``offset - b0`` without simulating every voxel. The images are ``M0 * Z`` with a smooth
receive-coil shading, plus Rician noise (magnitude of complex Gaussian noise, seeded).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, DTypeLike, NDArray

from quant.bloch import Pool, SemisolidPool, Tissue, cw_z

__all__ = [
    "DEFAULT_OFFSETS_PPM",
    "M0_OFFSET_PPM",
    "Phantom",
    "amide_exchange_rate",
    "default_offsets",
    "make_phantom",
]

M0_OFFSET_PPM = -300.0
"""Offset of the unsaturated reference frame (far off resonance)."""

PH_NORMAL, PH_RIM, PH_CORE = 7.1, 6.8, 6.5

LABEL_BACKGROUND, LABEL_CSF, LABEL_GM, LABEL_WM = 0, 1, 2, 3


def default_offsets() -> NDArray[np.float64]:
    """The default acquisition: M0 first, then 60 offsets from +-5.9 to +-0.1 ppm, 0.2 apart,
    alternating sign from the outside in (+5.9, -5.9, +5.7, -5.7, ..., +0.1, -0.1).

    61 frames in all; the sampled offsets include +-3.5 ppm.
    """
    mags = np.round(np.arange(5.9, 0.0, -0.2), 10)
    order = np.empty(2 * mags.size)
    order[0::2] = mags
    order[1::2] = -mags
    return np.concatenate([[M0_OFFSET_PPM], order])


DEFAULT_OFFSETS_PPM = default_offsets()


def amide_exchange_rate(ph: ArrayLike) -> NDArray[np.float64]:
    """Amide proton exchange rate from pH, ``k = 5.57 * 10**(pH - 6.4)`` s^-1.

    Base-catalysed exchange (Zhou et al., Nat Med 2003;9:1085-1090).

    Examples
    --------
    >>> round(float(amide_exchange_rate(7.1)), 1)
    27.9
    """
    return 5.57 * 10.0 ** (np.asarray(ph, dtype=np.float64) - 6.4)


@dataclass(frozen=True)
class Phantom:
    """A synthetic CEST acquisition with its truth.

    Attributes
    ----------
    signal : (slices, rows, cols, n_offsets) magnitude images, M0 frame(s) included,
        frames in acquisition order (the order of ``offsets_ppm``).
    offsets_ppm : (n_offsets,) saturation offset of each frame, acquisition order.
    m0 : (slices, rows, cols) noiseless unsaturated magnetisation (proton density times the
        coil shading).
    t1_s : water T1 in s, NaN outside the brain.
    brain, lesion, contralateral : bool masks.
    labels : 0 background, 1 CSF, 2 GM, 3 WM.
    ph, kex_hz : truth pH and amide exchange rate (NaN outside grey and white matter).
    b0_ppm : truth water shift in ppm (the water resonance sits at ``+b0_ppm``).
    field_t, b1_ut, tsat_s, noise_sigma : how it was made.
    """

    signal: NDArray[np.floating]
    offsets_ppm: NDArray[np.float64]
    m0: NDArray[np.floating]
    t1_s: NDArray[np.floating]
    brain: NDArray[np.bool_]
    lesion: NDArray[np.bool_]
    contralateral: NDArray[np.bool_]
    labels: NDArray[np.uint8]
    ph: NDArray[np.floating]
    kex_hz: NDArray[np.floating]
    b0_ppm: NDArray[np.floating]
    field_t: float
    b1_ut: float
    tsat_s: float
    noise_sigma: float

    @property
    def shape(self) -> tuple[int, int, int]:
        s = self.signal.shape
        return (s[0], s[1], s[2])


# (T1 s, T2 s, proton density, amide f, amine f, NOE f, semisolid f, semisolid T2 s)
_TISSUE = {
    LABEL_CSF: (4.0, 1.5, 1.0, 0.0, 0.0, 0.0, 0.0, 1e-5),
    LABEL_GM: (1.4, 0.09, 0.8, 0.0009, 0.0005, 0.008, 0.06, 1.0e-5),
    LABEL_WM: (0.9, 0.07, 0.7, 0.0009, 0.0004, 0.012, 0.13, 9.0e-6),
}


def _tissue_for(classes: list[tuple[int, float]]) -> Tissue:
    """One Tissue whose parameters are arrays over the classes (vectorised simulation)."""
    p = np.array([_TISSUE[label] for label, _ph in classes], dtype=np.float64)
    ph = np.array([ph for _label, ph in classes])
    return Tissue(
        t1_s=p[:, 0],
        t2_s=p[:, 1],
        pools=(
            Pool(3.5, p[:, 3], amide_exchange_rate(ph), t1_s=1.0, t2_s=0.01, name="amide"),
            Pool(2.0, p[:, 4], 1000.0, t1_s=1.0, t2_s=0.005, name="amine"),
            Pool(-3.5, p[:, 5], 15.0, t1_s=1.0, t2_s=0.0005, name="noe"),
        ),
        semisolid=SemisolidPool(p[:, 6], 40.0, t1_s=1.0, t2_s=p[:, 7], offset_ppm=-2.5),
    )


def _anatomy(slices: int, size: int) -> tuple[NDArray[np.uint8], NDArray[np.bool_], NDArray[np.bool_], NDArray[np.float64], tuple[NDArray[np.float64], ...]]:
    zc = np.linspace(-1.0, 1.0, slices) if slices > 1 else np.zeros(1)
    yc = np.linspace(-1.0, 1.0, size)
    xc = np.linspace(-1.0, 1.0, size)
    z, y, x = np.meshgrid(zc, yc, xc, indexing="ij")
    scale = np.sqrt(1.0 - 0.3 * z * z)  # the brain narrows toward the ends of the slab
    rho = np.sqrt((x / (0.82 * scale)) ** 2 + (y / (0.95 * scale)) ** 2)
    brain = rho <= 1.0
    labels = np.zeros(z.shape, dtype=np.uint8)
    labels[brain] = LABEL_WM
    labels[brain & (rho > 0.86)] = LABEL_GM  # cortex
    for sx in (-1.0, 1.0):
        deep = ((x - 0.22 * sx) / 0.11) ** 2 + ((y - 0.12) / 0.14) ** 2 <= scale**2
        labels[brain & deep] = LABEL_GM
        vent = ((x - 0.09 * sx) / 0.06) ** 2 + ((y + 0.18) / 0.2) ** 2 <= scale**2
        labels[brain & vent] = LABEL_CSF
    # acidotic lesion in the x > 0 hemisphere: ellipse, core inside a rim
    rl = np.sqrt(((x - 0.47) / 0.22) ** 2 + ((y + 0.05) / 0.3) ** 2) / np.sqrt(1.0 - 0.5 * z * z)
    tissue = (labels == LABEL_GM) | (labels == LABEL_WM)
    lesion = tissue & (rl <= 1.0)
    core = tissue & (rl <= 0.6)
    return labels, lesion, core, scale, (z, y, x)


_B0_STEP = 0.05
_TABLE_CACHE: dict[tuple, tuple[float, int, NDArray[np.float64]]] = {}


def _class_table(
    used: tuple[tuple[int, float], ...],
    uniq: tuple[float, ...],
    field_t: float,
    b1_ut: float,
    tsat_s: float,
    b0_max: float,
) -> tuple[float, int, NDArray[np.float64]]:
    """Z of every class at every (offset - b0) on a b0 grid; rows (class * nb + j, offset).

    Kept in a small cache: the same acquisition is simulated once per process.
    """
    key = (used, uniq, field_t, b1_ut, tsat_s, b0_max)
    if key not in _TABLE_CACHE:
        h = _B0_STEP
        g0 = -np.ceil(b0_max / h) * h - 2 * h
        nb = int(round(-2 * g0 / h)) + 1
        grid = g0 + h * np.arange(nb)
        sim_off = (np.asarray(uniq)[:, None] - grid[None, :]).ravel()
        table = cw_z(_tissue_for(list(used)), sim_off, field_t=field_t, b1_ut=b1_ut, tsat_s=tsat_s)
        table = table.reshape(len(used), len(uniq), nb).transpose(0, 2, 1)  # (C, nb, n_uniq)
        if len(_TABLE_CACHE) >= 8:
            _TABLE_CACHE.pop(next(iter(_TABLE_CACHE)))
        rows = np.ascontiguousarray(table.reshape(len(used) * nb, len(uniq)))
        rows.flags.writeable = False
        _TABLE_CACHE[key] = (float(g0), nb, rows)
    return _TABLE_CACHE[key]


def make_phantom(
    *,
    slices: int = 4,
    size: int = 64,
    offsets_ppm: ArrayLike | None = None,
    field_t: float = 3.0,
    b1_ut: float = 1.0,
    tsat_s: float = 2.0,
    snr: float = 100.0,
    b0_max_ppm: float = 0.3,
    seed: int = 0,
    dtype: DTypeLike = np.float32,
) -> Phantom:
    """Make the synthetic stroke phantom.

    Parameters
    ----------
    slices, size : slab of ``slices`` images of ``size x size`` voxels.
    offsets_ppm : acquisition offsets (M0 frames at |offset| >= 20 ppm included); default
        :data:`DEFAULT_OFFSETS_PPM` (M0 first, then 60 offsets alternating in sign).
    field_t, b1_ut, tsat_s : CW saturation: field in tesla, B1 in microtesla, duration in s.
    snr : mean brain M0 over the noise standard deviation (``inf`` for no noise).
    b0_max_ppm : largest |water shift| in the brain of the smooth B0 field.
    seed : seeds the noise generator.
    dtype : float dtype of the images and maps.

    Returns
    -------
    Phantom

    Examples
    --------
    >>> ph = make_phantom(slices=2, size=32)
    >>> ph.signal.shape, ph.offsets_ppm.shape
    ((2, 32, 32, 61), (61,))
    """
    if int(slices) != slices or slices < 1 or int(size) != size or size < 8:
        raise ValueError(f"slices must be >= 1 and size >= 8 integers, got {slices!r}, {size!r}")
    if not (np.isfinite(tsat_s) and tsat_s > 0):
        raise ValueError(f"tsat_s must be positive, got {tsat_s!r}")
    if not (snr > 0):
        raise ValueError(f"snr must be positive, got {snr!r}")
    if not (np.isfinite(b0_max_ppm) and 0 <= b0_max_ppm <= 2.0):
        raise ValueError(f"b0_max_ppm must be within [0, 2] ppm, got {b0_max_ppm!r}")
    dt = np.dtype(dtype)
    if dt.kind != "f":
        raise ValueError(f"dtype must be a float dtype, got {dt}")
    offsets = DEFAULT_OFFSETS_PPM.copy() if offsets_ppm is None else np.asarray(offsets_ppm, dtype=np.float64)
    if offsets.ndim != 1 or offsets.size < 2 or not np.all(np.isfinite(offsets)):
        raise ValueError("offsets_ppm must be a 1-D array of at least 2 finite offsets")

    labels, lesion, core, _scale, (z, y, x) = _anatomy(int(slices), int(size))
    brain = labels != LABEL_BACKGROUND
    ph = np.full(labels.shape, np.nan)
    tissue = (labels == LABEL_GM) | (labels == LABEL_WM)
    ph[tissue] = PH_NORMAL
    ph[lesion] = PH_RIM
    ph[core] = PH_CORE
    contralateral = np.zeros_like(lesion)
    contralateral[...] = lesion[..., ::-1] & tissue

    # smooth B0: a tilt and a curvature, scaled to +-b0_max in the brain
    b0 = 0.6 * x + 0.35 * y + 0.5 * (x * x + 0.5 * y * y) + 0.25 * z - 0.3
    b0 = b0 - np.mean(b0[brain])
    peak = np.max(np.abs(b0[brain]))
    b0 = b0 * (b0_max_ppm / peak) if peak > 0 else b0 * 0.0

    # unique tissue classes -> simulated table over (offset, b0 grid)
    keys = [(lab, p) for lab in (LABEL_CSF, LABEL_GM, LABEL_WM) for p in (PH_NORMAL, PH_RIM, PH_CORE)]
    key_index = np.full(labels.shape, -1, dtype=np.intp)
    used: list[tuple[int, float]] = []
    for lab, p in keys:
        sel = (labels == lab) & ((lab == LABEL_CSF) | (ph == p))
        if lab == LABEL_CSF and p != PH_NORMAL:
            continue
        if np.any(sel):
            key_index[sel] = len(used)
            used.append((lab, p))

    uniq, inverse = np.unique(offsets, return_inverse=True)
    bvals = b0[brain]
    g0, nb, rows = _class_table(tuple(used), tuple(uniq), float(field_t), float(b1_ut), float(tsat_s), float(b0_max_ppm))
    h = _B0_STEP

    # per-voxel 4-point cubic Lagrange interpolation in the b0 grid
    cls = key_index[brain]
    pos = (bvals - g0) / h
    j = np.floor(pos).astype(np.intp)
    t = pos - j
    w = (
        -t * (t - 1) * (t - 2) / 6.0,
        (t + 1) * (t - 1) * (t - 2) / 2.0,
        -(t + 1) * t * (t - 2) / 2.0,
        (t + 1) * t * (t - 1) / 6.0,
    )
    zvox = np.zeros((bvals.size, uniq.size))
    for k, wk in enumerate(w):
        zvox += wk[:, None] * rows[cls * nb + j - 1 + k]
    zvox = zvox[:, inverse]  # acquisition order

    pd = np.array([0.0] + [_TISSUE[lab][2] for lab in (LABEL_CSF, LABEL_GM, LABEL_WM)])[labels]
    shading = 1.0 + 0.12 * x - 0.08 * y + 0.05 * z  # smooth receive-coil sensitivity
    m0 = 1000.0 * pd * shading
    clean = np.zeros(labels.shape + (offsets.size,), dtype=dt)
    clean[brain] = m0[brain][:, None] * zvox
    sigma = 0.0 if np.isinf(snr) else float(np.mean(m0[brain]) / snr)
    if sigma > 0:
        rng = np.random.default_rng(seed)
        gdt = np.float32 if dt == np.float32 else np.float64
        n1 = rng.standard_normal(clean.shape, dtype=gdt)
        n2 = rng.standard_normal(clean.shape, dtype=gdt)
        n1 *= sigma
        n2 *= sigma
        n1 += clean
        signal = np.hypot(n1, n2)
    else:
        signal = clean

    t1 = np.full(labels.shape, np.nan)
    for lab in (LABEL_CSF, LABEL_GM, LABEL_WM):
        t1[labels == lab] = _TISSUE[lab][0]
    kex = amide_exchange_rate(ph)
    return Phantom(
        signal=signal.astype(dt),
        offsets_ppm=offsets,
        m0=m0.astype(dt),
        t1_s=t1.astype(dt),
        brain=brain,
        lesion=lesion,
        contralateral=contralateral,
        labels=labels,
        ph=ph.astype(dt),
        kex_hz=kex.astype(dt),
        b0_ppm=np.where(brain, b0, np.nan).astype(dt),
        field_t=float(field_t),
        b1_ut=float(b1_ut),
        tsat_s=float(tsat_s),
        noise_sigma=sigma,
    )
