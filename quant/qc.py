"""Region statistics and quality figures for the Structured Report and the QC gates.

Pure numpy/scipy on maps shaped like the mask (any number of axes, usually
``(slices, rows, cols)``). NaN map values are invalid voxels: they are left out of every mean
and SD and counted by :func:`valid_fraction`.

Left and right
--------------
DICOM's patient coordinate system is LPS: +x points to the patient's **left**, +y posterior,
+z head (DICOM PS3.3 C.7.6.2.1.1). The caller says which array axis runs left-right and in
which direction its index grows towards the patient's left; :func:`left_axis_from_orientation`
reads that from ImageOrientationPatient (the column index grows along its first triplet, the
row index along its second). The midline is a plane at a (fractional) index along that axis,
given or taken as the centroid of the mask along the axis (common practice; assumes a head
roughly centred on itself and not rotated in-plane). A voxel whose extent
``[i - 0.5, i + 0.5]`` contains the midline strictly inside belongs to neither hemisphere.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

__all__ = [
    "RegionStats",
    "HemisphereStats",
    "SnrEstimate",
    "QcFigures",
    "QcThresholds",
    "QcReason",
    "RAYLEIGH_SD_FACTOR",
    "region_stats",
    "hemisphere_stats",
    "asymmetry_index",
    "left_axis_from_orientation",
    "snr_from_m0",
    "b0_range",
    "valid_fraction",
    "qc_gates",
    "candidate_region",
]

#: SD of Rayleigh-distributed background magnitude over the per-channel noise SD sigma:
#: ``sqrt(2 - pi / 2) = 0.6551`` (Henkelman, Med Phys 1985, 12:232, from memory)
RAYLEIGH_SD_FACTOR = float(np.sqrt(2.0 - np.pi / 2.0))
#: mean of the Rayleigh background over sigma: ``sqrt(pi / 2) = 1.2533`` (same source)
RAYLEIGH_MEAN_FACTOR = float(np.sqrt(np.pi / 2.0))


@dataclass(frozen=True)
class RegionStats:
    """Mean, sample SD (``ddof=1``) and count of the finite values in a region.

    ``mean`` is NaN for an empty region, ``sd`` NaN below two voxels.
    """

    mean: float
    sd: float
    n: int


@dataclass(frozen=True)
class HemisphereStats:
    """Per-hemisphere statistics of a map inside a mask.

    Attributes
    ----------
    left, right : RegionStats
        Patient left and right (see the module docstring).
    midline_index : float
        Index of the midline along ``midline_axis``.
    asymmetry_index : float
        ``2 (L - R) / (L + R)`` of the hemisphere means (see :func:`asymmetry_index`).
    difference : float
        ``L - R`` (map units), well defined where the means are near zero or of either sign.
    """

    left: RegionStats
    right: RegionStats
    midline_index: float
    asymmetry_index: float
    difference: float


def _mask(mask: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    m = np.asarray(mask)
    if m.dtype != bool:
        raise ValueError(f"mask must be a boolean array, got dtype {m.dtype}")
    if m.shape != shape:
        raise ValueError(f"mask shape {m.shape} must equal the values' shape {shape}")
    return m


def region_stats(values: np.ndarray, mask: np.ndarray) -> RegionStats:
    """Mean, sample SD and voxel count of the finite values of ``values`` inside ``mask``.

    ``mean = sum(v) / n``, ``sd = sqrt(sum((v - mean)^2) / (n - 1))`` (the sample standard
    deviation, numpy ``ddof=1``); NaN values are not counted.

    Examples
    --------
    >>> import numpy as np
    >>> region_stats(np.array([1.0, 2.0, np.nan, 6.0]), np.ones(4, bool))
    RegionStats(mean=3.0, sd=2.6457513110645907, n=3)
    """
    v = np.asarray(values, dtype=np.float64)
    sel = v[_mask(mask, v.shape) & np.isfinite(v)]
    n = int(sel.size)
    mean = float(sel.mean()) if n else float("nan")
    sd = float(sel.std(ddof=1)) if n >= 2 else float("nan")
    return RegionStats(mean=mean, sd=sd, n=n)


def asymmetry_index(left: float, right: float) -> float:
    """Hemispheric asymmetry index ``AI = 2 (L - R) / (L + R)``.

    The difference relative to the mean of both sides (common practice for paired-hemisphere
    measures; one of several conventions, chosen here because it treats both sides alike and
    needs no knowledge of the lesion side). NaN when ``L + R`` is zero or either is NaN.
    Positive when the left mean is the larger.

    Examples
    --------
    >>> asymmetry_index(3.0, 1.0)
    1.0
    """
    total = left + right
    if not np.isfinite(total) or total == 0.0:
        return float("nan")
    return float(2.0 * (left - right) / total)


def left_axis_from_orientation(image_orientation_patient) -> tuple[int, bool]:
    """Array axis and direction of patient left, from DICOM ImageOrientationPatient.

    For a stack ``(..., rows, cols)``: the column index grows along the first direction cosine
    triplet (row direction), the row index along the second (DICOM PS3.3 C.7.6.2.1.1). Patient
    left is +x in LPS. Returns ``(axis, left_is_increasing)`` with ``axis`` -1 (columns) or -2
    (rows), whichever direction has the larger x component.

    Examples
    --------
    >>> left_axis_from_orientation([1, 0, 0, 0, 1, 0])  # axial, the usual display
    (-1, True)
    """
    iop = np.asarray(image_orientation_patient, dtype=np.float64)
    if iop.shape != (6,) or not np.all(np.isfinite(iop)):
        raise ValueError(
            f"image_orientation_patient must be 6 finite direction cosines, got {iop.tolist()}"
        )
    row_x, col_x = iop[0], iop[3]
    if max(abs(row_x), abs(col_x)) < 1e-6:
        raise ValueError("the image plane contains no left-right direction (sagittal plane)")
    if abs(row_x) >= abs(col_x):
        return -1, bool(row_x > 0)
    return -2, bool(col_x > 0)


def hemisphere_stats(
    values: np.ndarray,
    mask: np.ndarray,
    *,
    midline_axis: int,
    left_is_increasing: bool,
    midline_index: float | None = None,
) -> HemisphereStats:
    """Mean, SD and voxel count per hemisphere inside ``mask``, and the asymmetry index.

    Parameters
    ----------
    values : ndarray
        The map (NaN where invalid).
    mask : ndarray bool
        The region (e.g. the brain mask), same shape.
    midline_axis : int
        The array axis that runs left-right.
    left_is_increasing : bool
        True when the index along ``midline_axis`` grows towards the patient's left (+x in
        DICOM LPS); see :func:`left_axis_from_orientation`.
    midline_index : float, optional
        Midline position along the axis; default the centroid of ``mask`` along it.

    Returns
    -------
    HemisphereStats
        With ``asymmetry_index = 2 (L - R) / (L + R)`` and ``difference = L - R``.

    Examples
    --------
    >>> import numpy as np
    >>> v = np.array([[1.0, 1.0, 9.0, 3.0, 3.0]])
    >>> s = hemisphere_stats(v, np.ones_like(v, bool), midline_axis=1, left_is_increasing=True)
    >>> s.midline_index, s.left.mean, s.right.mean, s.asymmetry_index
    (2.0, 3.0, 1.0, 1.0)
    """
    v = np.asarray(values, dtype=np.float64)
    m = _mask(mask, v.shape)
    if v.ndim == 0:
        raise ValueError("values must have at least one axis")
    if not -v.ndim <= midline_axis < v.ndim:
        raise ValueError(f"midline_axis {midline_axis} is out of range for {v.ndim} axes")
    axis = midline_axis % v.ndim
    shape = [1] * v.ndim
    shape[axis] = v.shape[axis]
    index = np.arange(v.shape[axis], dtype=np.float64).reshape(shape)
    if midline_index is None:
        if not m.any():
            raise ValueError("mask selects no voxels: the midline cannot be placed")
        mid = float(np.broadcast_to(index, v.shape)[m].mean())
    else:
        mid = float(midline_index)
        if not np.isfinite(mid):
            raise ValueError(f"midline_index must be finite, got {midline_index}")
    toward_left = (index - mid) if left_is_increasing else (mid - index)
    left = m & np.broadcast_to(toward_left >= 0.5, v.shape)
    right = m & np.broadcast_to(toward_left <= -0.5, v.shape)
    ls, rs = region_stats(v, left), region_stats(v, right)
    return HemisphereStats(
        left=ls,
        right=rs,
        midline_index=mid,
        asymmetry_index=asymmetry_index(ls.mean, rs.mean),
        difference=ls.mean - rs.mean,
    )


@dataclass(frozen=True)
class SnrEstimate:
    """Outcome of :func:`snr_from_m0`: ``snr = signal_mean / noise_sigma``."""

    snr: float
    signal_mean: float
    noise_sigma: float
    n_background: int


def snr_from_m0(
    m0: np.ndarray,
    mask: np.ndarray,
    *,
    background: np.ndarray | None = None,
    margin: int = 4,
    estimator: str = "sd",
    min_background: int = 100,
) -> SnrEstimate:
    """SNR of the M0 image: signal mean in the mask over the noise SD from the background.

    Background magnitude of single-channel complex Gaussian noise of SD ``sigma`` per channel
    is Rayleigh distributed, with SD ``sigma sqrt(2 - pi/2)`` (0.655 sigma) and mean
    ``sigma sqrt(pi/2)`` (1.253 sigma) (Henkelman, Med Phys 1985, 12:232, from memory), so

        sigma = SD(background) / 0.655     (estimator "sd")
        sigma = mean(background) / 1.253   (estimator "mean")
        SNR   = mean(m0 in mask) / sigma.

    Multi-channel sum-of-squares images have a non-central chi background for which these
    factors are only approximate. Exact zeros (scanner-masked background) are left out of the
    background.

    Parameters
    ----------
    m0 : ndarray
        Unsaturated magnitude image(s).
    mask : ndarray bool
        The tissue region (e.g. the brain mask).
    background : ndarray bool, optional
        Background voxels; default every voxel farther than ``margin`` voxels from the mask
        (dilation in the last two axes, the image plane).
    estimator : {"sd", "mean"}
        Which Rayleigh moment gives ``sigma``.
    min_background : int
        Fewer usable background voxels give ``snr`` NaN.

    Returns
    -------
    SnrEstimate
        ``snr`` NaN when the background is too small or carries no noise.
    """
    img = np.asarray(m0, dtype=np.float64)
    m = _mask(mask, img.shape)
    if estimator not in ("sd", "mean"):
        raise ValueError(f'estimator must be "sd" or "mean", got {estimator!r}')
    if not m.any():
        raise ValueError("mask selects no voxels: no signal to measure")
    if background is None:
        if margin < 0:
            raise ValueError(f"margin must be non-negative, got {margin}")
        if img.ndim >= 2 and margin > 0:
            struct = np.zeros((1,) * (img.ndim - 2) + (3, 3), dtype=bool)
            struct[..., :, :] = ndimage.generate_binary_structure(2, 1)
            near = ndimage.binary_dilation(m, structure=struct, iterations=margin)
        else:
            near = m
        bg = ~near
    else:
        bg = _mask(background, img.shape)
        if np.any(bg & m):
            raise ValueError("background and mask overlap")
    vals = img[bg & np.isfinite(img) & (img != 0.0)]
    sig_vals = img[m & np.isfinite(img)]
    signal = float(sig_vals.mean()) if sig_vals.size else float("nan")
    n_bg = int(vals.size)
    if n_bg < min_background:
        return SnrEstimate(float("nan"), signal, float("nan"), n_bg)
    if estimator == "sd":
        sigma = float(vals.std(ddof=1)) / RAYLEIGH_SD_FACTOR
    else:
        sigma = float(vals.mean()) / RAYLEIGH_MEAN_FACTOR
    snr = signal / sigma if sigma > 0 else float("nan")
    return SnrEstimate(snr=float(snr), signal_mean=signal, noise_sigma=sigma, n_background=n_bg)


def b0_range(
    shift_ppm: np.ndarray, mask: np.ndarray, *, percentiles: tuple[float, float] = (2.0, 98.0)
) -> tuple[float, float]:
    """Range of the water shift inside the mask: the given percentiles of its finite values.

    Percentiles rather than min / max so that a few voxels at an air-tissue border do not set
    the figure (common practice); ``(0, 100)`` gives the strict range. NaN, NaN when no finite
    value lies in the mask.
    """
    b = np.asarray(shift_ppm, dtype=np.float64)
    m = _mask(mask, b.shape)
    lo_p, hi_p = percentiles
    if not 0.0 <= lo_p <= hi_p <= 100.0:
        raise ValueError(f"percentiles must satisfy 0 <= low <= high <= 100, got {percentiles}")
    sel = b[m & np.isfinite(b)]
    if sel.size == 0:
        return float("nan"), float("nan")
    lo, hi = np.percentile(sel, [lo_p, hi_p])
    return float(lo), float(hi)


def valid_fraction(values: np.ndarray, mask: np.ndarray) -> float:
    """Fraction of the mask's voxels whose value is finite: ``n_finite / n_mask``."""
    v = np.asarray(values)
    m = _mask(mask, v.shape)
    n = int(m.sum())
    if n == 0:
        raise ValueError("mask selects no voxels: no fraction to compute")
    return float(np.count_nonzero(np.isfinite(v[m])) / n)


@dataclass(frozen=True)
class QcFigures:
    """Quality figures of one map (or series), read by :func:`qc_gates`.

    ``None`` means "not measured" (that gate is not applied).
    """

    b0_low_ppm: float | None = None
    b0_high_ppm: float | None = None
    sampled_low_ppm: float | None = None
    sampled_high_ppm: float | None = None
    snr: float | None = None
    max_motion_mm: float | None = None
    valid_fraction: float | None = None


@dataclass(frozen=True)
class QcThresholds:
    """Configurable limits of the QC gates (the defaults are ours, not from a source).

    Attributes
    ----------
    min_snr : float
        M0 SNR below this fails.
    max_motion_mm : float
        A frame displaced more than this (in-plane, mm) fails.
    min_valid_fraction : float
        Fewer finite voxels in the mask fail.
    max_abs_b0_ppm : float or None
        Optional limit on ``|B0|``.
    measure_offset_ppm : float or None
        The offset a measure reads (e.g. 3.5 for APT): B0 fails when ``offset + max |B0|``
        leaves the sampled range, since the shifted reading would then be extrapolated.
    """

    min_snr: float = 20.0
    max_motion_mm: float = 2.0
    min_valid_fraction: float = 0.9
    max_abs_b0_ppm: float | None = None
    measure_offset_ppm: float | None = None

    def __post_init__(self) -> None:
        for name in ("min_snr", "max_motion_mm", "min_valid_fraction"):
            val = getattr(self, name)
            if not np.isfinite(val) or val < 0:
                raise ValueError(f"{name} must be a non-negative number, got {val}")
        if self.min_valid_fraction > 1:
            raise ValueError(f"min_valid_fraction must be at most 1, got {self.min_valid_fraction}")
        for name in ("max_abs_b0_ppm", "measure_offset_ppm"):
            val = getattr(self, name)
            if val is not None and (not np.isfinite(val) or val < 0):
                raise ValueError(f"{name} must be a non-negative number or None, got {val}")


@dataclass(frozen=True)
class QcReason:
    """Why a map is unreliable: a short ``code`` and a sentence with the numbers."""

    code: str
    message: str


def _known(x: float | None) -> float | None:
    """``x`` as a float when it is a finite number, else None."""
    return float(x) if x is not None and np.isfinite(x) else None


def qc_gates(figures: QcFigures, thresholds: QcThresholds | None = None) -> list[QcReason]:
    """Reasons why a map should be flagged unreliable; an empty list when every gate passes.

    Gates (codes): ``b0_range`` (the B0 range leaves the sampled offsets; ``|B0|`` above
    ``max_abs_b0_ppm``; or ``measure_offset_ppm + max |B0|`` beyond the sampled range),
    ``snr`` (below ``min_snr``), ``snr_unknown`` (measured but not finite, e.g. a zeroed
    background), ``motion`` (above ``max_motion_mm``), ``valid_fraction`` (below
    ``min_valid_fraction``). A figure left ``None`` is not gated.

    Examples
    --------
    >>> [r.code for r in qc_gates(QcFigures(snr=12.0, max_motion_mm=0.4))]
    ['snr']
    """
    t = QcThresholds() if thresholds is None else thresholds
    f = figures
    out: list[QcReason] = []
    lo, hi = _known(f.b0_low_ppm), _known(f.b0_high_ppm)
    s_lo, s_hi = _known(f.sampled_low_ppm), _known(f.sampled_high_ppm)
    if lo is not None and hi is not None:
        worst = max(abs(lo), abs(hi))
        rng = f"[{lo:.2f}, {hi:.2f}] ppm"
        if s_lo is not None and s_hi is not None:
            sampled = f"[{s_lo:.2f}, {s_hi:.2f}] ppm"
            if lo < s_lo or hi > s_hi:
                out.append(
                    QcReason(
                        "b0_range", f"B0 range {rng} lies beyond the sampled offsets {sampled}"
                    )
                )
            if t.measure_offset_ppm is not None:
                reach = t.measure_offset_ppm + worst
                if reach > min(-s_lo, s_hi):
                    out.append(
                        QcReason(
                            "b0_range",
                            f"B0 up to {worst:.2f} ppm moves the +-{t.measure_offset_ppm:g} ppm "
                            f"reading to {reach:.2f} ppm, beyond the sampled offsets {sampled}",
                        )
                    )
        if t.max_abs_b0_ppm is not None and worst > t.max_abs_b0_ppm:
            out.append(QcReason("b0_range", f"B0 range {rng} exceeds +-{t.max_abs_b0_ppm:g} ppm"))
    if f.snr is not None:
        if not np.isfinite(f.snr):
            out.append(QcReason("snr_unknown", "SNR of M0 could not be estimated"))
        elif f.snr < t.min_snr:
            out.append(QcReason("snr", f"SNR of M0 {f.snr:.1f} below {t.min_snr:g}"))
    motion = _known(f.max_motion_mm)
    if motion is not None and motion > t.max_motion_mm:
        out.append(
            QcReason("motion", f"motion up to {motion:.2f} mm exceeds {t.max_motion_mm:g} mm")
        )
    valid = _known(f.valid_fraction)
    if valid is not None and valid < t.min_valid_fraction:
        out.append(
            QcReason(
                "valid_fraction",
                f"only {100 * valid:.0f} % of brain voxels valid "
                f"(limit {100 * t.min_valid_fraction:.0f} %)",
            )
        )
    return out


def candidate_region(
    values: np.ndarray,
    mask: np.ndarray,
    *,
    contralateral_mean: float,
    contralateral_sd: float,
    n_sd: float = 2.0,
    min_voxels: int = 1,
) -> np.ndarray:
    """Research candidate region: voxels whose value lies more than ``n_sd`` SDs below the
    contralateral mean.

    ``region = mask & (v < mean_contra - n_sd * sd_contra)`` over finite values, then connected
    components (face connectivity) smaller than ``min_voxels`` removed (common practice for
    thresholded parametric maps). This marks where a measure departs from the other hemisphere
    for research review; it is **not** a lesion segmentation and not a diagnosis.

    Examples
    --------
    >>> import numpy as np
    >>> v = np.array([1.0, 0.2, 0.9, np.nan])
    >>> candidate_region(v, np.ones(4, bool), contralateral_mean=1.0, contralateral_sd=0.1).tolist()
    [False, True, False, False]
    """
    v = np.asarray(values, dtype=np.float64)
    m = _mask(mask, v.shape)
    for name, val in (
        ("contralateral_mean", contralateral_mean),
        ("contralateral_sd", contralateral_sd),
    ):
        if not np.isfinite(val):
            raise ValueError(f"{name} must be finite, got {val}")
    if contralateral_sd < 0:
        raise ValueError(f"contralateral_sd must be non-negative, got {contralateral_sd}")
    if not np.isfinite(n_sd) or n_sd < 0:
        raise ValueError(f"n_sd must be a non-negative number, got {n_sd}")
    if min_voxels < 1:
        raise ValueError(f"min_voxels must be at least 1, got {min_voxels}")
    with np.errstate(invalid="ignore"):
        region = m & np.isfinite(v) & (v < contralateral_mean - n_sd * contralateral_sd)
    if min_voxels > 1 and region.any():
        labels, n = ndimage.label(region)
        sizes = np.bincount(labels.ravel(), minlength=n + 1)
        keep = sizes >= min_voxels
        keep[0] = False
        region = keep[labels]
    return region
