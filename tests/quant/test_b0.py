"""B0: the shift estimate, the vectorised resampler, external maps."""

import numpy as np
import pytest
from scipy.interpolate import CubicSpline

from quant.b0 import correct_b0, estimate_b0_shift, hz_to_ppm, resample_shifted
from quant.bloch import cw_z
from quant.measures import apt_star, mtr_asym
from quant.phantom import LABEL_GM, LABEL_WM, _tissue_for, make_phantom
from quant.registry import band_columns
from quant.spectra import normalize

UNIFORM = np.round(np.linspace(-5.9, 5.9, 60), 10)


def _reference(z, x, s):
    # reference library: scipy.interpolate.CubicSpline, natural end conditions, voxel by voxel
    return np.array([CubicSpline(x, z[i], bc_type="natural", extrapolate=False)(x + s[i]) for i in range(len(z))])


@pytest.mark.parametrize("grid", ["uniform", "nonuniform"])
def test_resampler_matches_cubicspline_voxel_by_voxel(grid):
    rng = np.random.default_rng(7)
    if grid == "uniform":
        x = UNIFORM
    else:
        x = np.sort(np.r_[np.linspace(-6, 6, 25), [-3.7, -3.3, 3.3, 3.7, 0.1, -0.1]])
    z = rng.uniform(0.0, 1.0, (40, x.size))
    s = rng.uniform(-0.8, 0.8, 40)
    s[:3] = 0.0
    s[3] = x[1] - x[0]  # exactly one step: positions on the knots
    s[4] = np.nan
    got = resample_shifted(z, x, s)
    want = _reference(z, x, s)
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    np.testing.assert_allclose(got, want, atol=1e-10, equal_nan=True)
    np.testing.assert_array_equal(got[:3], z[:3])  # zero shift is the identity
    f32 = resample_shifted(z.astype(np.float32), x, s.astype(np.float32))
    assert f32.dtype == np.float32
    np.testing.assert_allclose(f32, want, atol=2e-4, equal_nan=True)


def _tissue_spectrum(x, shift=0.0):
    tis = _tissue_for([(LABEL_WM, 7.1)])
    return cw_z(tis, np.asarray(x) - shift, field_t=3.0, b1_ut=1.0, tsat_s=2.0)[0]


def test_known_shift_applied_and_removed_recovers_the_spectrum():
    # the shift applied by simulation (Z measured at x is the true Z at x - s) and corrected
    x = UNIFORM
    for s in (-0.37, 0.12, 0.5):
        measured = _tissue_spectrum(x, s)
        r = correct_b0(measured[None], x, shift_ppm=np.array([s]))
        truth = _tissue_spectrum(x)
        inner = np.isfinite(r.z[0])
        assert inner.sum() >= x.size - 4
        far = inner & (np.abs(x) >= 1.0)
        np.testing.assert_allclose(r.z[0][far], truth[far], atol=2e-3)
        np.testing.assert_allclose(r.z[0][inner], truth[inner], atol=3e-2)  # the sharp dip
        est = estimate_b0_shift(measured[None], x)
        assert float(est[0]) == pytest.approx(s, abs=0.01)


def test_shift_recovered_at_snr_100():
    # the phantom's truth B0; RMS error in grey and white matter below 0.02 ppm at SNR 100
    ph = make_phantom(slices=4, size=48, snr=100.0)
    sp = normalize(ph.signal, ph.offsets_ppm)
    est = estimate_b0_shift(sp.z, sp.offsets_ppm)
    tissue = (ph.labels == LABEL_GM) | (ph.labels == LABEL_WM)
    err = (est - ph.b0_ppm)[tissue]
    assert np.all(np.isfinite(err))
    assert np.sqrt(np.mean(err**2)) < 0.02
    r = correct_b0(sp.z, sp.offsets_ppm)
    assert r.valid[tissue].all()
    np.testing.assert_array_equal(r.shift_ppm, est)


def test_external_map_in_hz():
    x = UNIFORM
    z = np.stack([_tissue_spectrum(x, 0.2), _tissue_spectrum(x, -0.1)])
    hz = np.array([0.2, -0.1]) * 42.577478 * 3.0  # ppm * MHz
    a = correct_b0(z, x, b0_hz=hz, field_t=3.0)
    b = correct_b0(z, x, shift_ppm=np.array([0.2, -0.1]))
    np.testing.assert_allclose(a.z, b.z, atol=1e-12, equal_nan=True)
    assert float(hz_to_ppm(447.06, 3.0)) == pytest.approx(3.5, abs=1e-4)


def test_nan_voxel_is_invalid_and_dtype_kept():
    z = np.stack([_tissue_spectrum(UNIFORM), np.full(UNIFORM.size, np.nan)]).astype(np.float32)
    r = correct_b0(z, UNIFORM)
    assert r.z.dtype == np.float32 and r.shift_ppm.dtype == np.float32
    assert bool(r.valid[0]) and not bool(r.valid[1])
    assert np.all(np.isnan(r.z[1])) and np.isnan(r.shift_ppm[1])


def test_bad_input_names_the_problem():
    z = np.ones((2, 5))
    with pytest.raises(ValueError, match="ascending without repeats"):
        correct_b0(z, [0.0, 1.0, -1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="offsets_ppm has 4 entries but z has 5"):
        estimate_b0_shift(z, [0.0, 1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="b0_hz needs field_t"):
        correct_b0(z, [-2.0, -1.0, 0.0, 1.0, 2.0], b0_hz=np.zeros(2))
    with pytest.raises(ValueError, match="the B0 map has shape"):
        correct_b0(z, [-2.0, -1.0, 0.0, 1.0, 2.0], shift_ppm=np.zeros(3))
    with pytest.raises(ValueError, match="fewer than 3 points"):
        estimate_b0_shift(z, [-5.0, -4.0, 0.0, 4.0, 5.0])


@pytest.mark.parametrize("uniform", [True, False])
def test_resample_at_some_columns_is_those_columns_of_the_whole(uniform):
    """``columns=`` evaluates the same natural spline (of all samples) at fewer points: the
    values equal those columns of the whole resample to float32 rounding, NaN in the same
    places (the whole resample is checked against scipy's CubicSpline above).

    Not bit for bit: numpy's vector loops and the BLAS pick their kernels by shape and
    alignment, so the same sums over fewer columns may round differently in the last bits
    (common practice; seen on an AMD EPYC machine: 2.4e-7 on values up to 1, 2 ulps)."""
    rng = np.random.default_rng(5)
    off = (np.linspace(-6, 6, 61) if uniform
           else np.sort(np.concatenate([np.linspace(-6, 6, 40), rng.uniform(-5.9, 5.9, 11)])))
    z = rng.uniform(0.1, 1.0, (3000, off.size)).astype(np.float32)
    shift = rng.uniform(-0.9, 0.9, 3000).astype(np.float32)
    shift[::7] = np.nan
    shift[::11] = 0.0
    shift[::13] = 2 * (off[1] - off[0])  # on the knots
    cols = band_columns(off, (-3.5, 2.7, 3.5, 4.3))
    whole = resample_shifted(z, off, shift)
    part = resample_shifted(z, off, shift, columns=cols)
    assert part.shape == (3000, cols.size)
    ulps = dict(rtol=0, atol=8 * np.finfo(np.float32).eps)  # values in [0.1, 1]: 8 ulps of 1
    np.testing.assert_allclose(part, whole[:, cols], **ulps)  # NaN where NaN (equal_nan)
    # and the measures read the same values from the band as from the whole spectrum (in
    # percent of M0: the same rounding times 100)
    for f in (mtr_asym, apt_star):
        np.testing.assert_allclose(f(part, off[cols]), f(whole, off), rtol=0,
                                   atol=100 * ulps["atol"])
    with pytest.raises(ValueError, match="ascending"):
        resample_shifted(z, off, shift, columns=cols[::-1])


def test_shift_estimate_is_the_weighted_parabola_numpy_polyfit_gives():
    # reference library: numpy.polyfit with weights w (it minimises sum (w (y - p(u)))^2, so
    # w = (1 - Z)^2 gives the estimate's weights (1 - Z)^4), voxel by voxel, on noisy
    # Lorentzian dips; the vertex of a u^2 + b u + c is -b / (2a) (textbook algebra)
    rng = np.random.default_rng(3)
    x = np.round(np.linspace(-1.6, 1.6, 17), 10)
    n = 400
    centre = rng.uniform(-0.7, 0.7, n)
    width = rng.uniform(0.3, 1.2, n)
    depth = rng.uniform(0.5, 0.97, n)
    z = 1.0 - depth[:, None] / (1.0 + ((x[None] - centre[:, None]) / width[:, None]) ** 2)
    z += rng.normal(0.0, 0.01, z.shape)
    window, max_shift = 0.6, 1.0
    est = estimate_b0_shift(z, x, window_ppm=window, max_shift_ppm=max_shift)
    checked = 0
    for i in range(n):
        xmin = x[np.argmin(z[i])]
        u = x - xmin
        ok = (np.abs(u) <= window + 1e-6) & (z[i] < 0.95)
        if ok.sum() < 3:
            assert np.isnan(est[i])
            continue
        zi = z[i][ok]
        a, b, _ = np.polyfit(u[ok], zi / (1.0 - zi), 2, w=(1.0 - zi) ** 2)
        vertex = -b / (2.0 * a)
        if a <= 0 or abs(vertex) > window or abs(xmin + vertex) > max_shift:
            assert np.isnan(est[i]), i
            continue
        assert est[i] == pytest.approx(xmin + vertex, abs=1e-9), i
        checked += 1
    assert checked > 0.9 * n


def test_shift_estimate_gives_nan_for_a_voxel_with_a_non_finite_value_only():
    x = np.round(np.linspace(-2, 2, 21), 10)
    z = np.tile(1 - 0.9 / (1 + ((x - 0.2) / 0.4) ** 2), (3, 1)).astype(np.float32)
    z[1, 10] = np.nan
    z[2, 0] = np.inf  # outside the +-1.6 ppm the estimate reads: no effect
    est = estimate_b0_shift(z, x)
    assert est.dtype == np.float32
    assert np.isnan(est[1])
    assert est[0] == pytest.approx(0.2, abs=1e-3) and est[2] == est[0]


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_the_band_pass_is_the_numpy_expression_bit_for_bit(dtype):
    # reference: the numpy expression quant._jit.spline_rows replaced (same products, sums,
    # order and dtype), scattered into a NaN-filled output as that form did
    from quant import _jit

    rng = np.random.default_rng(9)
    yg = rng.uniform(0.1, 1.0, (300, 61)).astype(dtype)
    mg = rng.normal(0.0, 20.0, (300, 24)).astype(dtype)
    rows = rng.permutation(500)[:300]
    jy = np.r_[8:14, 39:53].astype(np.intp)
    jm = rng.integers(0, 23, jy.size).astype(np.intp)
    pos = np.arange(jy.size, dtype=np.intp)
    b = rng.uniform(0.0, 1.0, (300, 1)).astype(dtype)
    a = 1.0 - b
    h2 = 0.2 * 0.2 / 6.0
    ca, cb = (a * a * a - a) * h2, (b * b * b - b) * h2
    want = np.full((500, jy.size + 2), np.nan, dtype)
    want[rows[:, None], pos] = (yg[:, jy] * a + yg[:, jy + 1] * b + mg[:, jm] * ca
                                + mg[:, jm + 1] * cb)
    got = np.full_like(want, np.nan)
    _jit.spline_rows(yg, mg, rows, jy, jm, pos, a[:, 0], b[:, 0], ca[:, 0], cb[:, 0], got)
    assert np.array_equal(got, want, equal_nan=True)
