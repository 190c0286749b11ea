"""Bloch-McConnell simulator against closed forms and an independent ODE integration."""

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp

from quant.bloch import (
    GAMMA_HZ_PER_T,
    Pool,
    PulseTrain,
    SemisolidPool,
    Tissue,
    b1_to_rad_s,
    cw_z,
    lineshape,
    ppm_to_hz,
    ppm_to_rad_s,
    pulsed_z,
    simulate_z,
    steady_state_z,
    system_matrices,
)

OFFSETS = np.linspace(-6.0, 6.0, 49)


def exact_bloch_ss(t1, t2, delta, w1):
    # textbook Bloch steady state: Mz/M0 = R1 (D^2 + R2^2) / (R1 (D^2 + R2^2) + R2 w1^2)
    r1, r2 = 1.0 / t1, 1.0 / t2
    return r1 * (delta**2 + r2**2) / (r1 * (delta**2 + r2**2) + r2 * w1**2)


def test_gamma_is_codata_and_3p5_ppm_at_3t_is_447_hz():
    # CODATA 2018: gamma_p/2pi = 42.577 478 518 MHz/T; 3.5e-6 * 42.577478e6 * 3 = 447.06 Hz
    assert GAMMA_HZ_PER_T == pytest.approx(42.577478518e6, rel=2e-8)
    assert float(ppm_to_hz(3.5, 3.0)) == pytest.approx(447.06, abs=0.01)
    assert float(ppm_to_rad_s(1.0, 1.0)) == pytest.approx(2 * np.pi * 42.577478, rel=1e-9)


@pytest.mark.parametrize("b1_ut", [0.3, 1.0, 3.0])
def test_single_pool_steady_state_equals_bloch_closed_form(b1_ut):
    # textbook Bloch equations, exact steady state, to 1e-9; T1 per voxel (vectorised)
    t1 = np.array([0.8, 1.3, 2.5])
    t2 = np.array([0.05, 0.08, 0.5])
    z = steady_state_z(Tissue(t1, t2), OFFSETS, field_t=3.0, b1_ut=b1_ut)
    assert z.shape == (3, OFFSETS.size)
    want = exact_bloch_ss(t1[:, None], t2[:, None], ppm_to_rad_s(OFFSETS, 3.0), b1_to_rad_s(b1_ut))
    np.testing.assert_allclose(z, want, rtol=0, atol=1e-9)


def test_r1rho_approximation_within_its_bound():
    # Zaiss & Bachert, Phys Med Biol 2013: Z_ss ~ R1 cos^2(theta) / R1rho,
    # R1rho = R1 cos^2(theta) + R2 sin^2(theta), theta = atan(w1 / D).
    # That is f(D^2) with f(x) = R1 x / (R1 x + R2 w1^2), while the exact Bloch form is
    # f(D^2 + R2^2). f is increasing and concave, so (mean-value theorem)
    # 0 <= Z_exact - Z_r1rho <= R2^2 f'(D^2) = R1 R2^3 w1^2 / (R1 D^2 + R2 w1^2)^2.
    t1, t2 = 1.3, 0.08
    r1, r2 = 1 / t1, 1 / t2
    d = ppm_to_rad_s(OFFSETS, 3.0)
    for b1 in (0.5, 1.0, 2.0):
        w1 = b1_to_rad_s(b1)
        theta = np.arctan2(w1, d)
        r1rho = r1 * np.cos(theta) ** 2 + r2 * np.sin(theta) ** 2
        approx = r1 * np.cos(theta) ** 2 / r1rho
        z = steady_state_z(Tissue(t1, t2), OFFSETS, field_t=3.0, b1_ut=b1)
        bound = r1 * r2**3 * w1**2 / (r1 * d**2 + r2 * w1**2) ** 2
        err = z - approx
        assert np.all(err >= -1e-12)
        assert np.all(err <= bound + 1e-12)
        far = np.abs(OFFSETS) >= 1.0
        assert np.max(bound[far]) < 1e-3  # the approximation is good away from water


def rich_tissue(t1=1.3):
    return Tissue(
        t1_s=t1,
        t2_s=0.07,
        pools=(
            Pool(3.5, 0.0009, 30.0, t1_s=1.0, t2_s=0.01, name="amide"),
            Pool(2.0, 0.0005, 700.0, t1_s=1.0, t2_s=0.005, name="amine"),
            Pool(-3.5, 0.01, 20.0, t1_s=1.0, t2_s=0.0005, name="noe"),
        ),
        semisolid=SemisolidPool(0.1, 40.0, t1_s=1.0, t2_s=1e-5),
    )


def test_cw_converges_to_steady_state():
    # the exact CW solution M(t) = Mss + expm(A t)(M0 - Mss) tends to Mss as t -> infinity
    tis = rich_tissue(np.array([0.9, 1.4]))
    ss = steady_state_z(tis, OFFSETS, field_t=3.0, b1_ut=1.0)
    long = cw_z(tis, OFFSETS, field_t=3.0, b1_ut=1.0, tsat_s=40.0)
    np.testing.assert_allclose(long, ss, rtol=0, atol=1e-9)
    short = cw_z(tis, OFFSETS, field_t=3.0, b1_ut=1.0, tsat_s=0.5)
    assert np.max(np.abs(short - ss)) > 1e-3  # not yet at steady state


def test_b1_zero_relaxes_as_bloch_says():
    # Bloch equations without RF: Mz(t) = M0 + (Mz(0) - M0) exp(-t/T1)
    t1, t2 = 1.3, 0.08
    tis = Tissue(t1, t2)
    for m_init in (0.0, -1.0, 0.5):
        for t in (0.1, 1.0, 3.0):
            z = cw_z(tis, [0.0, 2.0], field_t=3.0, b1_ut=0.0, tsat_s=t, m_init=m_init)
            np.testing.assert_allclose(z, 1 + (m_init - 1) * np.exp(-t / t1), atol=1e-12)
    # transverse: |Mxy| decays as exp(-t/T2) and precesses at the offset frequency
    mats = system_matrices(tis, [0.0, 1.0], field_t=3.0)
    from scipy.linalg import expm

    t = 0.02
    m0 = np.zeros((2, 4))
    m0[:, 0] = 1.0  # Mx = 1
    m0[:, 3] = 1.0
    m = np.einsum("oij,oj->oi", expm(mats.at(0.0) * t), m0)
    mxy = m[:, 0] + 1j * m[:, 1]
    np.testing.assert_allclose(np.abs(mxy), np.exp(-t / t2), rtol=1e-12)
    phase = ppm_to_rad_s(1.0, 3.0) * t
    assert np.angle(mxy[1]) == pytest.approx(np.angle(np.exp(-1j * phase)), abs=1e-9)


def test_block_train_at_full_duty_equals_cw():
    # a train of constant pulses with no gaps is CW saturation for n * tp
    tis = rich_tissue()
    train = PulseTrain(pulse_s=0.1, gap_s=0.0, n_pulses=20, shape="block")
    assert train.duty_cycle == 1.0
    zp = pulsed_z(tis, OFFSETS, field_t=3.0, b1_ut=1.2, train=train)
    zc = cw_z(tis, OFFSETS, field_t=3.0, b1_ut=1.2, tsat_s=2.0)
    np.testing.assert_allclose(zp, zc, rtol=0, atol=1e-10)


def test_shaped_train_power_and_gaps():
    tis = rich_tissue()
    train = PulseTrain(pulse_s=0.05, gap_s=0.05, n_pulses=10, shape="gauss", spoil=True)
    assert train.duty_cycle == pytest.approx(0.5)
    assert train.duration_s == pytest.approx(0.95)
    amp = train.amplitudes() * train.peak_scale()
    # CW power equivalent: the RMS over the period (pulse and gap) is 1 per unit b1
    assert np.mean(amp**2) * train.duty_cycle == pytest.approx(1.0)
    z = pulsed_z(tis, OFFSETS, field_t=3.0, b1_ut=1.0, train=train)
    assert np.all((z > -0.2) & (z < 1.0))
    # with no RF, the train is pure relaxation from equilibrium: Z stays 1
    z0 = pulsed_z(tis, OFFSETS, field_t=3.0, b1_ut=0.0, train=train)
    np.testing.assert_allclose(z0, 1.0, atol=1e-12)


def test_ptr_formula_at_strong_saturation():
    # Zhou & van Zijl, Prog NMR Spectrosc 2006;48:109-136: the proton transfer ratio
    # PTR = k_sw x_s alpha / R1w (1 - exp(-R1w tsat)), labelling efficiency
    # alpha = w1^2 / (w1^2 + p q), p = R2s + k_sw, q = R1s + k_sw.
    # At 14.1 T, 2 uT, x_s = 3e-4 the MTRasym follows PTR within 8 %: the formula neglects the
    # direct saturation of water (1 - Z(-3.5 ppm) = 2.3 % here) and the back-exchange of
    # saturated water (k x_s / R1w = 1.4 %).
    k, f, t1w, t2s, ts, b1 = 30.0, 3e-4, 1.5, 0.02, 5.0, 2.0
    tis = Tissue(t1w, 0.1, pools=(Pool(3.5, f, k, t1_s=1.0, t2_s=t2s),))
    z = cw_z(tis, [-3.5, 3.5], field_t=14.1, b1_ut=b1, tsat_s=ts)
    w1 = b1_to_rad_s(b1)
    alpha = w1**2 / (w1**2 + (1 / t2s + k) * (1.0 + k))
    assert alpha > 0.99
    ptr = k * f * alpha * t1w * (1 - np.exp(-ts / t1w))
    assert (z[0] - z[1]) == pytest.approx(ptr, rel=0.08)


def _independent_rhs(tissue, d_ppm, field_t, b1_ut):
    # the same equations written component by component, independently of system_matrices
    w0 = 2 * np.pi * 42.577478e6 * field_t * 1e-6
    w1 = 2 * np.pi * 42.577478 * b1_ut
    pools = [(0.0, 1.0, 0.0, tissue.t1_s, tissue.t2_s)] + [
        (p.offset_ppm, p.fraction, p.k_hz, p.t1_s, p.t2_s) for p in tissue.pools
    ]
    ss = tissue.semisolid
    g = lineshape(w0 * (d_ppm - ss.offset_ppm), ss.t2_s, ss.lineshape)
    rrf = np.pi * w1**2 * g

    def rhs(_t, m):
        out = np.zeros_like(m)
        mw = m[0:3]
        for i, (dp, f, k, t1, t2) in enumerate(pools):
            mx, my, mz = m[3 * i : 3 * i + 3]
            om = w0 * (d_ppm - dp)
            out[3 * i] = -mx / t2 + om * my
            out[3 * i + 1] = -om * mx - my / t2 + w1 * mz
            out[3 * i + 2] = -w1 * my - (mz - f) / t1
            if i:
                out[3 * i : 3 * i + 3] += k * f * mw - k * m[3 * i : 3 * i + 3]
                out[0:3] += k * m[3 * i : 3 * i + 3] - k * f * mw
        j = 3 * len(pools)
        out[j] = -(m[j] - ss.fraction) / ss.t1_s - rrf * m[j] + ss.k_hz * ss.fraction * mw[2] - ss.k_hz * m[j]
        out[2] += ss.k_hz * m[j] - ss.k_hz * ss.fraction * mw[2]
        return out

    m0 = np.zeros(3 * len(pools) + 1)
    for i, (_dp, f, *_rest) in enumerate(pools):
        m0[3 * i + 2] = f
    m0[-1] = ss.fraction
    return rhs, m0


@pytest.mark.parametrize("d_ppm", [-3.5, 0.3, 3.5])
def test_exact_solution_matches_solve_ivp(d_ppm):
    # reference library: scipy.integrate.solve_ivp (DOP853) of the same equations
    tis = rich_tissue()
    rhs, m0 = _independent_rhs(tis, d_ppm, 3.0, 1.0)
    sol = solve_ivp(rhs, (0.0, 0.5), m0, method="DOP853", rtol=1e-10, atol=1e-12)
    z = cw_z(tis, [d_ppm], field_t=3.0, b1_ut=1.0, tsat_s=0.5)
    assert z[0] == pytest.approx(sol.y[2, -1], abs=1e-7)


def test_lineshapes_against_quad():
    # normalisation int G d(delta) = 1 (Lorentzian, Gaussian), and the super-Lorentzian
    # integral of Morrison & Henkelman 1995 computed independently with scipy.integrate.quad
    t2 = 1e-5
    for kind in ("lorentzian", "gaussian"):
        # in the scaled variable x = delta * T2
        total, _ = quad(lambda x, k=kind: float(lineshape(x / t2, t2, k)) / t2, -np.inf, np.inf)
        assert total == pytest.approx(1.0, rel=1e-6)

    def sl(d):
        def integrand(u):
            a = abs(3 * u * u - 1)
            return np.sqrt(2 / np.pi) * t2 / a * np.exp(-2 * (d * t2 / a) ** 2)

        u0 = 1 / np.sqrt(3)
        return quad(integrand, 0, u0, limit=200)[0] + quad(integrand, u0, 1, limit=200)[0]

    for hz in (1000.0, 3000.0, 20000.0):
        d = 2 * np.pi * hz
        assert float(lineshape(d, t2, cutoff_hz=0.0)) == pytest.approx(sl(d), rel=1e-6)
    # held constant inside the cutoff
    assert float(lineshape(2 * np.pi * 100.0, t2)) == float(lineshape(2 * np.pi * 1000.0, t2))


def test_vectorised_over_voxels_and_per_voxel_offsets():
    tis = rich_tissue(np.array([1.0, 1.5]))
    shift = np.array([[0.0], [0.3]])
    z = simulate_z(tis, OFFSETS[None, :] - shift, field_t=3.0, b1_ut=1.0, tsat_s=2.0)
    assert z.shape == (2, OFFSETS.size)
    for i, t1 in enumerate([1.0, 1.5]):
        one = simulate_z(rich_tissue(t1), OFFSETS - shift[i], field_t=3.0, b1_ut=1.0, tsat_s=2.0)
        np.testing.assert_allclose(z[i], one, atol=1e-12)


def test_bad_input_names_the_problem():
    with pytest.raises(ValueError, match="water t1_s must be positive"):
        Tissue(t1_s=-1.0, t2_s=0.1)
    with pytest.raises(ValueError, match="amide fraction must be non-negative"):
        Pool(3.5, -0.1, 30.0, name="amide")
    with pytest.raises(ValueError, match="field_t must be a positive"):
        steady_state_z(Tissue(1.0, 0.1), OFFSETS, field_t=0.0, b1_ut=1.0)
    with pytest.raises(ValueError, match="n_pulses must be a positive integer"):
        PulseTrain(pulse_s=0.1, gap_s=0.0, n_pulses=0)
    with pytest.raises(ValueError, match="either tsat_s"):
        simulate_z(Tissue(1.0, 0.1), OFFSETS, field_t=3.0, b1_ut=1.0, tsat_s=1.0,
                   train=PulseTrain(0.1, 0.0, 2))
    with pytest.raises(ValueError, match="b1_ut must be non-negative"):
        steady_state_z(Tissue(1.0, 0.1), OFFSETS, field_t=3.0, b1_ut=-1.0)
