"""Water shift from WASSR spectra (quant.wassr).

Spectra are Lorentzian direct-saturation lines (common practice for WASSR, Kim et al., Magn
Reson Med 2009, from memory) of known centre; the symmetry estimate is also checked against
scipy (CubicSpline + minimize_scalar on the same cost, reference library).
"""

import numpy as np
import pytest
from scipy.interpolate import CubicSpline
from scipy.optimize import minimize_scalar

from quant.wassr import wassr_shift

X = np.linspace(-1.0, 1.0, 41)  # 0.05 ppm steps, a common WASSR sampling


def line(centre, width=0.3, depth=0.9, x=X):
    centre = np.asarray(centre, dtype=np.float64)[..., None]
    width = np.asarray(width, dtype=np.float64)[..., None]
    h2 = (width / 2) ** 2
    return 1.0 - depth * h2 / (h2 + (x - centre) ** 2)


@pytest.mark.parametrize("method", ["symmetry", "lorentzian"])
def test_known_shift_noise_free(method):
    rng = np.random.default_rng(21)
    true = rng.uniform(-0.5, 0.5, 500)
    s = line(true, rng.uniform(0.2, 0.5, 500))
    res = wassr_shift(s, X, method=method)
    assert res.valid.all()
    np.testing.assert_allclose(res.shift_ppm, true, atol=0.01)  # stated: 0.01 ppm noise-free
    assert np.abs(res.shift_ppm - true).max() < 1e-3  # achieved: well below it


@pytest.mark.parametrize("method", ["symmetry", "lorentzian"])
def test_known_shift_at_snr_100(method):
    # SNR 100: noise SD 0.01 of the unsaturated signal; stated tolerance: RMS error below
    # 0.005 ppm and largest error below 0.02 ppm over 2000 voxels
    rng = np.random.default_rng(22)
    true = rng.uniform(-0.4, 0.4, 2000)
    s = line(true, rng.uniform(0.2, 0.5, 2000)) + rng.normal(0, 0.01, (2000, X.size))
    res = wassr_shift(s, X, method=method)
    err = res.shift_ppm - true
    assert res.valid.all()
    assert np.sqrt(np.mean(err**2)) < 0.005
    assert np.abs(err).max() < 0.02


def test_symmetry_matches_scipy_minimisation_of_the_same_cost():
    # an asymmetric line (a small second dip): the symmetry centre differs from the minimum
    x = X
    s = line(0.17, 0.35) - 0.05 * (0.2**2) / (0.2**2 + (x - 0.6) ** 2)
    res = wassr_shift(s, x, half_width_ppm=0.4)
    cs = CubicSpline(x, s / s.max())
    d = np.arange(1, 13) * (0.4 / 12)

    def cost(c):
        sp, sm = cs(c + d), cs(c - d)
        return np.mean((sp - sm) ** 2) / (0.5 * np.mean((1 - sp) ** 2 + (1 - sm) ** 2))

    ref = minimize_scalar(cost, bounds=(-0.6, 0.6), method="bounded", options={"xatol": 1e-7})
    assert float(res.shift_ppm) == pytest.approx(ref.x, abs=5e-4)


def test_unsorted_repeated_offsets_and_raw_scale():
    rng = np.random.default_rng(23)
    order = rng.permutation(X.size)
    x = np.concatenate([X[order], X[:3]])
    s = 850.0 * line(np.array([-0.21, 0.33]), x=x)  # raw magnitudes
    res = wassr_shift(s, x)
    np.testing.assert_allclose(res.shift_ppm, [-0.21, 0.33], atol=1e-3)


def test_no_signal_is_nan():
    rng = np.random.default_rng(24)
    s = 1000.0 * line(np.full(6, 0.1))
    s[1] = rng.rayleigh(5.0, X.size)  # background: noise only, far below the tissue signal
    s[2] = 0.0  # no signal at all
    s[3, 5] = np.nan  # a corrupt value
    s[4] = 1000.0  # flat: no dip
    res = wassr_shift(s, X)
    assert res.valid.tolist() == [True, False, False, False, False, True]
    assert np.isnan(res.shift_ppm[1:5]).all()
    assert np.isfinite(res.shift_ppm[[0, 5]]).all()
    assert np.isnan(res.residual[1:5]).all()


def test_shift_beyond_the_search_range_is_nan():
    # the search covers +-(1 - 0.4) ppm; a line at 0.85 ppm has no interior minimum there
    res = wassr_shift(line(np.array([0.0, 0.85])), X)
    assert res.valid.tolist() == [True, False]
    assert np.isnan(res.shift_ppm[1])


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_dtype_and_shape(dtype):
    s = line(np.zeros((2, 3))).astype(dtype)
    res = wassr_shift(s, X)
    assert res.shift_ppm.dtype == dtype
    assert res.shift_ppm.shape == (2, 3)
    np.testing.assert_allclose(res.shift_ppm, 0.0, atol=1e-4)


def test_bad_input_is_named():
    s = line(0.0)
    with pytest.raises(ValueError, match="disagree"):
        wassr_shift(s, X[:-1])
    with pytest.raises(ValueError, match="method"):
        wassr_shift(s, X, method="fit")
    with pytest.raises(ValueError, match="at least 5 distinct"):
        wassr_shift(s[:4], X[:4])
    with pytest.raises(ValueError, match="half_width_ppm"):
        wassr_shift(s, X, half_width_ppm=1.5)
    with pytest.raises(ValueError, match="coarse_step_ppm"):
        wassr_shift(s, X, coarse_step_ppm=0.0)
    with pytest.raises(ValueError, match="offsets_ppm must be finite"):
        wassr_shift(s, np.where(X > 0.9, np.nan, X))


@pytest.mark.slow
def test_phantom_wassr_shift_matches_truth():
    # the synthetic stroke phantom (quant.phantom: Bloch-McConnell spectra at each voxel's
    # own B0) acquired as a WASSR series: weak (0.1 uT), short (0.2 s) saturation at 41
    # offsets over +-1 ppm, SNR 200; stated tolerance: RMS 0.005 ppm, largest 0.02 ppm
    from quant.phantom import make_phantom

    offs = np.concatenate([[-300.0], X])  # the M0 frame first, as the phantom scanner sends
    ph = make_phantom(slices=1, size=24, offsets_ppm=offs, b1_ut=0.1, tsat_s=0.2, snr=200, seed=3)
    for method in ("symmetry", "lorentzian"):
        res = wassr_shift(ph.signal[..., 1:], X, method=method)
        err = (res.shift_ppm - ph.b0_ppm)[ph.brain]
        assert res.valid[ph.brain].all(), method
        assert np.sqrt(np.mean(err**2)) < 0.005, method
        assert np.abs(err).max() < 0.02, method
        assert np.isnan(res.shift_ppm[~ph.brain]).all(), method  # background: noise only
