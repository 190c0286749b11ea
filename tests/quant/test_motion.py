"""Rigid in-plane registration (quant.motion).

Known motions are applied by an independent implementation (scipy.ndimage.shift and
affine_transform, reference library) and must be recovered; the Fourier shift is checked
against scipy.ndimage.fourier_shift (reference library).
"""

import numpy as np
import pytest
from scipy import fft as sfft
from scipy import ndimage

from quant.motion import apply_motion, estimate_shift, register_frames

N = 96


def head(n=N, lesion_gain=1.0):
    """A smooth head-like image: ellipse, one bright and one dark blob (our own shapes)."""
    yy, xx = np.mgrid[:n, :n].astype(np.float64) * (128.0 / n)
    brain = ((yy - 64) / 50) ** 2 + ((xx - 62) / 42) ** 2 < 1
    bright = ((yy - 50) / 12) ** 2 + ((xx - 70) / 9) ** 2 < 1
    dark = (((yy - 80) / 8) ** 2 + ((xx - 45) / 15) ** 2 < 1) & brain
    img = brain * 1.0 + 0.3 * bright - 0.4 * lesion_gain * dark
    return ndimage.gaussian_filter(img, 1.0) * 100.0


def moved(img, dy, dx, angle_deg=0.0):
    """The frame of the convention: reference content of p at R(a)(p - c) + c + d."""
    if angle_deg == 0.0:
        return ndimage.shift(img, (dy, dx), order=3, mode="nearest")
    a = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    inv = rot.T  # output q samples the reference at R(a)^T (q - c - d) + c
    c = (np.array(img.shape) - 1) / 2.0
    off = c - inv @ (c + np.array([dy, dx]))
    return ndimage.affine_transform(img, inv, offset=off, order=3, mode="nearest")


def stack(shifts, *, sigma, rng, n_slices=1, dtype=np.float64, gain=None):
    """(slices, N, N, frames) frames with the given (dy, dx) per frame, plus the references."""
    img = head()
    gain = np.ones(len(shifts)) if gain is None else np.asarray(gain)
    frames = np.stack(
        [g * moved(img, dy, dx) for (dy, dx), g in zip(shifts, gain, strict=True)], -1
    )
    sig = np.broadcast_to(frames, (n_slices,) + frames.shape).copy()
    ref = np.broadcast_to(img, (n_slices,) + img.shape).copy()
    sig += rng.normal(0.0, sigma, sig.shape)
    ref += rng.normal(0.0, sigma, ref.shape)
    return sig.astype(dtype), ref.astype(dtype)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_subpixel_shift_recovered_at_snr_50(dtype):
    # SNR 50 (brain signal 100, noise SD 2); stated tolerance 0.05 pixel per axis
    rng = np.random.default_rng(7)
    shifts = rng.uniform(-3.0, 3.0, (6, 2))
    sig, ref = stack(shifts, sigma=2.0, rng=rng, n_slices=2, dtype=dtype)
    res = register_frames(sig, ref, spacing_mm=(0.9, 1.2))
    assert res.aligned.dtype == dtype
    assert res.aligned.shape == sig.shape
    np.testing.assert_allclose(res.dy_px, np.broadcast_to(shifts[:, 0], (2, 6)), atol=0.05)
    np.testing.assert_allclose(res.dx_px, np.broadcast_to(shifts[:, 1], (2, 6)), atol=0.05)
    # millimetres in DICOM PixelSpacing order (row spacing, column spacing)
    np.testing.assert_allclose(res.dy_mm, res.dy_px * 0.9)
    np.testing.assert_allclose(res.dx_mm, res.dx_px * 1.2)
    assert res.max_displacement_mm == pytest.approx(np.hypot(res.dy_mm, res.dx_mm).max())
    assert res.measured.all()
    # after alignment only the noise remains: the mean |difference| of two N(0, 2) images is
    # 2 sqrt(2) sqrt(2 / pi) = 2.26 (half-normal mean); before alignment it is far larger
    before = np.abs(sig - ref[..., None]).mean()
    after = np.abs(res.aligned[:, 8:-8, 8:-8] - ref[:, 8:-8, 8:-8, None]).mean()
    assert after < 1.1 * 2.257 < 0.5 * before


def test_no_motion_is_identity():
    img = head()
    sig = np.stack([img, 0.8 * img, 0.6 * img], -1)
    res = register_frames(sig, img)
    np.testing.assert_allclose(res.dy_px, 0.0, atol=1e-6)
    np.testing.assert_allclose(res.dx_px, 0.0, atol=1e-6)
    np.testing.assert_allclose(res.aligned, sig, atol=1e-9 * img.max())
    assert res.peak == pytest.approx(1.0, abs=1e-9)  # normalised cross-correlation of equals


def test_float32_preserved_and_float64_preserved():
    img = head().astype(np.float32)
    res32 = register_frames(img[..., None], img)
    res64 = register_frames(img[..., None].astype(np.float64), img.astype(np.float64))
    assert res32.aligned.dtype == np.float32
    assert res64.aligned.dtype == np.float64


def test_fourier_shift_matches_scipy_fourier_shift():
    # reference library: scipy.ndimage.fourier_shift shifts the content by +shift
    rng = np.random.default_rng(3)
    img = rng.normal(size=(40, 36))
    ours = apply_motion(img[..., None], 1.3, -2.7)[..., 0]  # removes a displacement (1.3, -2.7)
    ref = sfft.ifft2(ndimage.fourier_shift(sfft.fft2(img), (-1.3, 2.7))).real
    np.testing.assert_allclose(ours, ref, atol=1e-12)


def test_shift_applied_and_removed_is_identity():
    # exact for odd sizes (no Nyquist bin, whose sub-pixel ramp is not real); even sizes lose
    # only the Nyquist component, below 0.02 % of the maximum for a smooth image
    rng = np.random.default_rng(4)
    img = rng.normal(size=(45, 51))
    back = apply_motion(apply_motion(img[..., None], -0.37, 2.2), 0.37, -2.2)
    np.testing.assert_allclose(back[..., 0], img, atol=1e-9)
    smooth = head()
    back = apply_motion(apply_motion(smooth[..., None], -0.37, 2.2), 0.37, -2.2)
    np.testing.assert_allclose(back[..., 0], smooth, atol=2e-4 * smooth.max())


def test_estimate_shift_docstring_case_and_phase_option():
    rng = np.random.default_rng(5)
    img = head()
    mov = moved(img, 1.7, -0.6) + rng.normal(0, 2.0, img.shape)
    ref = img + rng.normal(0, 2.0, img.shape)
    for norm, tol in (("cross", 0.05), ("phase", 0.25)):  # phase correlation is noisier
        dy, dx, peak = estimate_shift(mov, ref, normalization=norm)
        assert abs(dy - 1.7) < tol and abs(dx + 0.6) < tol, norm
        assert 0.0 < peak <= 1.0


def test_low_signal_frame_interpolated_from_neighbours():
    # frame 2 is saturated to 3 % of the reference: its own peak is noise, so its motion is the
    # linear interpolation (in frame_times) of the measured frames 1 and 3
    rng = np.random.default_rng(11)
    shifts = [(0.0, 0.0), (1.0, -1.0), (2.5, 0.5), (2.0, 1.0), (1.0, 1.5)]
    sig, ref = stack(shifts, sigma=2.0, rng=rng, gain=[1.0, 0.9, 0.03, 0.9, 1.0])
    times = np.array([0.0, 1.0, 3.0, 4.0, 5.0])  # frame 2 acquired 2/3 of the way from 1 to 3
    res = register_frames(sig, ref, frame_times=times)
    assert res.measured[0].tolist() == [True, True, False, True, True]
    assert res.relative_signal[0, 2] < 0.1
    expect = res.dy_px[0, 1] + (res.dy_px[0, 3] - res.dy_px[0, 1]) * (2.0 / 3.0)
    assert res.dy_px[0, 2] == pytest.approx(expect, abs=1e-12)
    np.testing.assert_allclose(res.dy_px[0, [1, 3]], [1.0, 2.0], atol=0.05)


def test_shared_across_slices_one_motion_per_frame():
    rng = np.random.default_rng(12)
    shifts = [(0.4, -1.6), (-2.2, 0.9)]
    sig, ref = stack(shifts, sigma=4.0, rng=rng, n_slices=3)
    res = register_frames(sig, ref, shared_across_slices=True)
    assert res.dy_px.shape == (3, 2)
    np.testing.assert_array_equal(res.dy_px[0], res.dy_px[2])
    np.testing.assert_allclose(res.dy_px[0], [0.4, -2.2], atol=0.05)
    np.testing.assert_allclose(res.dx_px[0], [-1.6, 0.9], atol=0.05)


def test_gradient_prefilter_with_changed_contrast():
    # the dark region loses its contrast in the frame (a different saturation contrast)
    rng = np.random.default_rng(13)
    ref = head() + rng.normal(0, 1.0, (N, N))
    frame = 0.7 * moved(head(lesion_gain=0.0), -1.4, 0.8) + rng.normal(0, 1.0, (N, N))
    res = register_frames(frame[..., None], ref, prefilter="gradient")
    assert res.dy_px[0] == pytest.approx(-1.4, abs=0.1)
    assert res.dx_px[0] == pytest.approx(0.8, abs=0.1)


def test_rotation_recovered():
    # 2 degrees and a sub-pixel shift at SNR 50; stated tolerance 0.15 degree and 0.1 pixel
    rng = np.random.default_rng(14)
    img = head()
    frames = [moved(img, 0.5, -1.2, 2.0), 0.7 * moved(img, -0.3, 0.4, -1.5)]
    sig = np.stack(frames, -1) + rng.normal(0, 2.0, (N, N, 2))
    ref = img + rng.normal(0, 2.0, (N, N))
    res = register_frames(sig, ref, rotation=True)
    np.testing.assert_allclose(res.angle_deg, [2.0, -1.5], atol=0.15)
    np.testing.assert_allclose(res.dy_px, [0.5, -0.3], atol=0.1)
    np.testing.assert_allclose(res.dx_px, [-1.2, 0.4], atol=0.1)
    inner = (slice(10, -10), slice(10, -10))
    err = np.abs(res.aligned[inner][..., 0] - ref[inner]).mean()
    assert err < 1.1 * 2.257 < 0.5 * np.abs(sig[inner][..., 0] - ref[inner]).mean()


def test_bad_input_is_named():
    img = head()
    with pytest.raises(ValueError, match="must be shaped"):
        register_frames(img, img)
    with pytest.raises(ValueError, match="reference shape"):
        register_frames(img[..., None], img[:-1])
    bad = img.copy()
    bad[3, 3] = np.nan
    with pytest.raises(ValueError, match="finite"):
        register_frames(bad[..., None], img)
    with pytest.raises(ValueError, match="spacing_mm"):
        register_frames(img[..., None], img, spacing_mm=(0.0, 1.0))
    with pytest.raises(ValueError, match="prefilter"):
        register_frames(img[..., None], img, prefilter="edges")
    with pytest.raises(ValueError, match="normalization"):
        register_frames(img[..., None], img, normalization="full")
    with pytest.raises(ValueError, match="rotation needs"):
        register_frames(img[..., None], img, rotation=True, interpolation="fourier")
    with pytest.raises(ValueError, match="frame_times"):
        register_frames(img[..., None], img, frame_times=[0.0, 1.0])
    with pytest.raises(ValueError, match="upsample"):
        estimate_shift(img, img, upsample=1)
