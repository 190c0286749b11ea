"""The synthetic stroke phantom: geometry, truth, the B0 shift and the noise."""

import numpy as np
import pytest

from quant.bloch import cw_z
from quant.phantom import (
    DEFAULT_OFFSETS_PPM,
    LABEL_GM,
    LABEL_WM,
    _tissue_for,
    amide_exchange_rate,
    make_phantom,
)


def test_ph_to_exchange_rate():
    # Zhou et al., Nat Med 2003: k = 5.57 * 10^(pH - 6.4) s^-1; pH 7.1 -> about 28 s^-1
    assert float(amide_exchange_rate(7.1)) == pytest.approx(27.9, abs=0.1)
    assert float(amide_exchange_rate(6.4)) == pytest.approx(5.57)


def test_default_acquisition_order():
    o = DEFAULT_OFFSETS_PPM
    assert o.shape == (61,)
    assert o[0] == -300.0
    assert o[1] == pytest.approx(5.9) and o[2] == pytest.approx(-5.9)
    sat = np.sort(o[1:])
    np.testing.assert_allclose(np.diff(sat), 0.2, atol=1e-9)
    assert np.any(np.isclose(o, 3.5)) and np.any(np.isclose(o, -3.5))
    assert not np.all(np.diff(o) > 0)  # acquisition order is not offset order


def test_shapes_masks_and_truth():
    ph = make_phantom(slices=3, size=48)
    assert ph.signal.shape == (3, 48, 48, 61)
    assert ph.signal.dtype == np.float32 and ph.m0.dtype == np.float32
    assert ph.brain.dtype == np.bool_
    assert ph.lesion.any() and ph.contralateral.any()
    assert not np.any(ph.lesion & ph.contralateral)
    cols = np.nonzero(ph.lesion)[2]
    assert np.all(cols >= 24)  # one hemisphere
    np.testing.assert_array_equal(ph.contralateral, ph.lesion[..., ::-1])
    assert np.all(ph.ph[ph.lesion] < 7.0) and np.allclose(ph.ph[ph.contralateral], 7.1)
    np.testing.assert_allclose(ph.kex_hz[ph.brain & ~np.isnan(ph.ph)],
                               amide_exchange_rate(ph.ph[ph.brain & ~np.isnan(ph.ph)]), rtol=1e-5)
    assert np.all(np.isnan(ph.t1_s[~ph.brain])) and np.all(ph.t1_s[ph.brain] > 0)
    assert np.nanmax(np.abs(ph.b0_ppm)) == pytest.approx(0.3, rel=1e-5)
    assert np.all(ph.signal[~ph.brain] < 10 * ph.noise_sigma)  # background: noise only


def test_seeded_and_float64():
    a = make_phantom(slices=1, size=32, seed=3)
    b = make_phantom(slices=1, size=32, seed=3)
    c = make_phantom(slices=1, size=32, seed=4)
    np.testing.assert_array_equal(a.signal, b.signal)
    assert not np.array_equal(a.signal, c.signal)
    d = make_phantom(slices=1, size=32, dtype=np.float64)
    assert d.signal.dtype == np.float64


def test_voxel_spectrum_is_the_simulation_at_offset_minus_b0():
    # noise-free: signal / M0 equals the Bloch-McConnell Z evaluated at (offset - b0) of the
    # voxel, so the grid interpolation in B0 is accurate
    ph = make_phantom(slices=2, size=40, snr=np.inf)
    for label in (LABEL_GM, LABEL_WM):
        idx = np.argwhere((ph.labels == label) & ph.lesion)[0]
        s, r, c = idx
        b0 = float(ph.b0_ppm[s, r, c])
        tissue = _tissue_for([(label, float(ph.ph[s, r, c]))])
        want = cw_z(tissue, ph.offsets_ppm - b0, field_t=3.0, b1_ut=ph.b1_ut, tsat_s=ph.tsat_s)[0]
        got = ph.signal[s, r, c] / ph.m0[s, r, c]
        np.testing.assert_allclose(got, want, atol=2e-4)


def test_rician_noise_level():
    # the magnitude of complex Gaussian noise: in the background (signal 0) the mean is
    # sigma * sqrt(pi/2) (Rayleigh distribution; Gudbjartsson & Patz, Magn Reson Med 1995)
    ph = make_phantom(slices=2, size=48, snr=50.0)
    bg = ph.signal[~ph.brain]
    assert bg.mean() == pytest.approx(ph.noise_sigma * np.sqrt(np.pi / 2), rel=0.02)


def test_bad_phantom_arguments():
    with pytest.raises(ValueError, match="slices must be >= 1"):
        make_phantom(slices=0)
    with pytest.raises(ValueError, match="snr must be positive"):
        make_phantom(snr=0.0)
    with pytest.raises(ValueError, match="dtype must be a float dtype"):
        make_phantom(dtype=np.int16)
    with pytest.raises(ValueError, match="offsets_ppm must be a 1-D array"):
        make_phantom(offsets_ppm=[[1.0, 2.0]])
