"""Model-free measures: invariants, hand-computed values, the phantom's stroke contrast."""

import numpy as np
import pytest

import quant
from quant.measures import apt_star, arex, mtr_asym, mtr_asym_t1, z_at
from quant.phantom import make_phantom

X = np.round(np.linspace(-5.9, 5.9, 60), 10)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_symmetric_spectrum_has_zero_asymmetry(dtype):
    # MTRasym(dw) = Z(-dw) - Z(+dw) vanishes for Z(x) = Z(-x) (Zhou et al., Nat Med 2003);
    # so does AREX with the mirror reference (Zaiss et al., NMR Biomed 2014)
    rng = np.random.default_rng(2)
    half = rng.uniform(0.3, 0.9, (3, 5, 30))
    z = np.concatenate([half[..., ::-1], half], axis=-1).astype(dtype)
    m = mtr_asym(z, X)
    assert m.dtype == dtype and m.shape == (3, 5)
    np.testing.assert_array_equal(m, 0)
    np.testing.assert_array_equal(arex(z, X, np.ones((3, 5))), 0)
    # a band average sums the two sides in mirrored order: zero up to rounding
    tol = 1e-4 if dtype == np.float32 else 1e-12
    np.testing.assert_allclose(mtr_asym(z, X, offset_ppm=2.1, band_ppm=1.0), 0, atol=tol)


def test_hand_computed_values():
    x = np.array([-3.5, 0.0, 2.7, 3.5, 4.3])
    z = np.array([[0.80, 0.05, 0.74, 0.70, 0.78]])
    t1 = np.array([1.25])
    assert float(mtr_asym(z, x)[0]) == pytest.approx(10.0)
    assert float(mtr_asym_t1(z, x, t1)[0]) == pytest.approx(8.0)
    assert float(mtr_asym_t1(z, x, t1, tsat_s=2.0)[0]) == pytest.approx(8.0 / (1 - np.exp(-2.0 / 1.25)))
    # linear reference at 3.5 between 2.7 (0.74) and 4.3 (0.78): 0.76 -> APT* = 6 %
    assert float(apt_star(z, x)[0]) == pytest.approx(6.0)
    assert float(arex(z, x, t1)[0]) == pytest.approx((1 / 0.70 - 1 / 0.80) / 1.25 * 100)
    assert float(arex(z, x, t1, reference="linear")[0]) == pytest.approx((1 / 0.70 - 1 / 0.76) / 1.25 * 100)
    assert float(apt_star(z, x)[0]) == pytest.approx(6.0)


def test_between_samples_uses_the_local_cubic():
    # four-point Lagrange interpolation reproduces any cubic exactly
    x = np.array([-4.0, -3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0, 4.0])
    poly = np.poly1d([0.01, -0.02, 0.03, 0.5])
    z = poly(x)[None]
    assert float(z_at(z, x, 3.5)[0]) == pytest.approx(poly(3.5))
    assert float(z_at(z, x, -3.5)[0]) == pytest.approx(poly(-3.5))
    assert float(mtr_asym(z, x)[0]) == pytest.approx(100 * (poly(-3.5) - poly(3.5)))
    # a NaN far from the offsets used does not spread
    z2 = z.copy()
    z2[0, 4] = np.nan
    assert np.isfinite(mtr_asym(z2, x)[0])


def test_unsorted_offsets_and_nan_voxels():
    rng = np.random.default_rng(3)
    z = rng.uniform(0.3, 0.9, (4, X.size))
    z[1] = np.nan
    perm = rng.permutation(X.size)
    np.testing.assert_allclose(mtr_asym(z[:, perm], X[perm]), mtr_asym(z, X), equal_nan=True)
    assert np.isnan(mtr_asym(z, X)[1]) and np.isnan(apt_star(z, X)[1])
    zneg = z.copy()
    zneg[0, :] = -0.1
    assert np.isnan(arex(zneg, X, 1.0)[0])


def test_phantom_acidosis_lowers_every_measure():
    # ischaemic tissue acidosis lowers the amide exchange rate and the APT contrast
    # (Zhou et al., Nat Med 2003; Sun et al., J Cereb Blood Flow Metab 2007): the whole chain
    # with the B0 estimated from the data, at SNR 100
    ph = make_phantom(slices=4, size=64, snr=100.0)
    sp = quant.normalize(ph.signal, ph.offsets_ppm)
    r = quant.correct_b0(sp.z, sp.offsets_ppm)
    maps = {
        "mtr_asym": quant.mtr_asym(r.z, sp.offsets_ppm),
        "mtr_asym_t1": quant.mtr_asym_t1(r.z, sp.offsets_ppm, ph.t1_s),
        "apt_star": quant.apt_star(r.z, sp.offsets_ppm),
        "arex": quant.arex(r.z, sp.offsets_ppm, ph.t1_s),
    }
    for name, m in maps.items():
        les = m[ph.lesion]
        con = m[ph.contralateral]
        assert np.all(np.isfinite(les)) and np.all(np.isfinite(con)), name
        # lower on average, by more than three standard errors of the difference
        se = np.sqrt(les.var() / les.size + con.var() / con.size)
        assert les.mean() < con.mean() - 3 * se, name


def test_bad_input_names_the_problem():
    z = np.full((2, X.size), 0.5)
    with pytest.raises(ValueError, match="do not cover"):
        mtr_asym(z, X, offset_ppm=7.0)
    with pytest.raises(ValueError, match="do not cover"):
        mtr_asym(z[:, 30:], X[30:])
    with pytest.raises(ValueError, match="needs a T1 map"):
        mtr_asym_t1(z, X, None)
    with pytest.raises(ValueError, match="needs a T1 map"):
        arex(z, X, None)
    with pytest.raises(ValueError, match="t1_s must be positive: 1 voxels"):
        mtr_asym_t1(z, X, np.array([1.0, 0.0]))
    with pytest.raises(ValueError, match="t1_s must be positive"):
        arex(z, X, np.array([-1.0, 1.0]))
    with pytest.raises(ValueError, match="t1_s has shape"):
        arex(z, X, np.ones(3))
    with pytest.raises(ValueError, match="offsets_ppm has 59 entries but z has 60"):
        mtr_asym(z, X[:-1])
    with pytest.raises(ValueError, match="repeated offsets"):
        mtr_asym(z[:, :3], [1.0, 1.0, 2.0])
    with pytest.raises(ValueError, match="must bracket the offset"):
        apt_star(z, X, lower_ppm=3.6, upper_ppm=4.3)
    with pytest.raises(ValueError, match="reference must be 'mirror' or 'linear'"):
        arex(z, X, 1.0, reference="other")
    with pytest.raises(ValueError, match="band_ppm must be >= 0"):
        mtr_asym(z, X, band_ppm=-1.0)
