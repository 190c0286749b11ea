"""The batched Levenberg-Marquardt solver against scipy.optimize.least_squares (reference library)."""

import numpy as np
import pytest
from scipy.optimize import least_squares

from quant.lsq import (
    STATUS_INVALID,
    finite_difference_jacobian,
    least_squares_batch,
)

X = np.linspace(-5.0, 5.0, 41)
LO = np.array([0.0, 0.1, -1.0, 0.0])
HI = np.array([2.0, 5.0, 1.0, 0.15])


def lorentz_model(p):
    """offset + A (w/2)^2 / ((w/2)^2 + (x - x0)^2), params (A, w, x0, offset)."""
    a, w, x0, c = (p[:, k : k + 1] for k in range(4))
    return c + a * (w / 2) ** 2 / ((w / 2) ** 2 + (X - x0) ** 2)


def lorentz_jac(p):
    a, w, x0, _ = (p[:, k : k + 1] for k in range(4))
    h2 = (w / 2) ** 2
    den = h2 + (X - x0) ** 2
    lor = h2 / den
    d_a = lor
    d_w = a * (w / 2) * (X - x0) ** 2 / den**2
    d_x0 = a * lor * 2 * (X - x0) / den
    return np.stack([d_a, d_w, d_x0, np.ones_like(lor)], axis=-1)


@pytest.fixture
def problem():
    rng = np.random.default_rng(1234)
    n = 300
    true = np.column_stack(
        [
            rng.uniform(0.5, 1.0, n),
            rng.uniform(0.5, 2.0, n),
            rng.uniform(-0.5, 0.5, n),
            rng.uniform(0.0, 0.2, n),  # part of them beyond the upper bound 0.15: fit on the bound
        ]
    )
    y = lorentz_model(true) + rng.normal(0.0, 0.01, (n, X.size))
    p0 = np.tile([0.8, 1.0, 0.0, 0.1], (n, 1))
    return y, p0


def _ref_fit(y, p0, i):
    # reference library: scipy.optimize.least_squares, trust-region reflective, same bounds
    def f(q):
        return lorentz_model(q[None])[0] - y[i]

    def j(q):
        return lorentz_jac(q[None])[0]

    return least_squares(f, p0[i], jac=j, bounds=(LO, HI), ftol=1e-12, xtol=1e-12, gtol=1e-12)


def _normal(p, y):
    r = lorentz_model(p) - y
    j = lorentz_jac(p)
    return r, np.einsum("vmp,vmq->vpq", j, j), np.einsum("vmp,vm->vp", j, r)


@pytest.mark.parametrize(
    "mode, approach, damping",
    [
        ("analytic", 1.0, "nielsen"),
        ("finite", 1.0, "nielsen"),
        ("with_fun", 1.0, "nielsen"),
        ("with_fun", 0.5, "nielsen"),
        ("normal", 0.5, "nielsen"),
        ("normal", 0.5, "marquardt"),
    ],
)
def test_same_optimum_as_scipy_least_squares(problem, mode, approach, damping):
    y, p0 = problem
    if mode == "with_fun":  # jac=True: fun returns residuals and Jacobian together
        fun, jac = (lambda p, i: (lorentz_model(p) - y[i], lorentz_jac(p))), True
    elif mode == "normal":  # jac='normal': fun returns residuals and the normal equations
        fun, jac = (lambda p, i: _normal(p, y[i])), "normal"
    else:
        fun = lambda p, i: lorentz_model(p) - y[i]  # noqa: E731
        jac = (lambda p, i: lorentz_jac(p)) if mode == "analytic" else None
    res = least_squares_batch(
        fun, p0, jac=jac, lower=LO, upper=HI, bound_approach=approach, damping=damping
    )
    assert res.converged.all()
    sample = range(0, 300, 15)
    for i in sample:
        ref = _ref_fit(y, p0, i)
        # stated tolerance: cost within 1e-9 relative, parameters within 1e-4 absolute
        assert res.cost[i] <= ref.cost * (1 + 1e-9) + 1e-15
        np.testing.assert_allclose(res.params[i], ref.x, atol=1e-4)
    # some fits rest on the upper bound of the offset, and are reported there
    assert res.at_bound[:, 3].any()
    assert np.all(res.params >= LO) and np.all(res.params <= HI)


def test_noise_free_recovery_and_rms():
    true = np.array([[0.9, 1.2, 0.3, 0.05], [0.6, 0.7, -0.4, 0.1]])
    y = lorentz_model(true)
    res = least_squares_batch(
        lambda p, i: lorentz_model(p) - y[i],
        np.tile([0.8, 1.0, 0.0, 0.08], (2, 1)),
        jac=lambda p, i: lorentz_jac(p),
        lower=LO,
        upper=HI,
    )
    np.testing.assert_allclose(res.params, true, atol=1e-7)
    assert np.all(res.residual_rms < 1e-8)
    assert not res.at_bound.any()


def test_invalid_voxels_are_nan_with_status_and_others_fit(problem):
    y, p0 = problem
    y = y[:10].copy()
    y[3, 5] = np.nan
    res = least_squares_batch(
        lambda p, i: lorentz_model(p) - y[i], p0[:10], jac=lambda p, i: lorentz_jac(p),
        lower=LO, upper=HI,
    )
    assert res.status[3] == STATUS_INVALID and not res.converged[3]
    assert np.isnan(res.params[3]).all() and np.isnan(res.residual_rms[3])
    ok = np.arange(10) != 3
    assert res.converged[ok].all() and np.isfinite(res.params[ok]).all()


def test_iteration_limit_is_reported_not_converged(problem):
    y, p0 = problem
    res = least_squares_batch(
        lambda p, i: lorentz_model(p) - y[i], p0, lower=LO, upper=HI, max_iter=1
    )
    assert not res.converged.any()
    assert np.all(res.iterations == 1)


def test_blocks_give_the_same_answer(problem):
    y, p0 = problem
    kw = dict(jac=lambda p, i: lorentz_jac(p), lower=LO, upper=HI)
    a = least_squares_batch(lambda p, i: lorentz_model(p) - y[i], p0, **kw)
    b = least_squares_batch(lambda p, i: lorentz_model(p) - y[i], p0, block_size=7, **kw)
    np.testing.assert_allclose(a.params, b.params, rtol=0, atol=1e-12)


def test_finite_difference_jacobian_matches_analytic():
    rng = np.random.default_rng(7)
    p = np.column_stack([rng.uniform(0.5, 1, 5), rng.uniform(0.5, 2, 5), rng.uniform(-0.5, 0.5, 5),
                         np.full(5, 0.15)])  # last parameter on its upper bound: backward step
    fd = finite_difference_jacobian(
        lambda q, i: lorentz_model(q), p, np.arange(5), lower=LO, upper=HI
    )
    np.testing.assert_allclose(fd, lorentz_jac(p), atol=1e-6)


def test_bad_arguments_name_the_problem():
    f = lambda p, i: lorentz_model(p)  # noqa: E731
    with pytest.raises(ValueError, match=r"p0 must be shaped \(V, P\)"):
        least_squares_batch(f, np.ones(4))
    with pytest.raises(ValueError, match="lower bound must be below upper bound"):
        least_squares_batch(f, np.ones((2, 4)), lower=[0, 0, 2, 0], upper=[1, 1, 1, 1])
    with pytest.raises(ValueError, match="bounds must not be NaN"):
        least_squares_batch(f, np.ones((2, 4)), lower=[0, np.nan, 0, 0])
    with pytest.raises(ValueError, match="max_iter must be at least 1"):
        least_squares_batch(f, np.ones((2, 4)), max_iter=0)
    with pytest.raises(ValueError, match=r"jac must return shape"):
        least_squares_batch(f, np.ones((2, 4)), jac=lambda p, i: np.zeros((2, 3)))
    with pytest.raises(ValueError, match=r"bound_approach must lie in \(0, 1\]"):
        least_squares_batch(f, np.ones((2, 4)), bound_approach=0.0)
    with pytest.raises(ValueError, match="damping must be 'nielsen' or 'marquardt'"):
        least_squares_batch(f, np.ones((2, 4)), damping="fast")
    with pytest.raises(ValueError, match=r"with jac=True, fun must return a tuple"):
        least_squares_batch(f, np.ones((2, 4)), jac=True)
    with pytest.raises(ValueError, match=r"with jac='normal', fun must return a tuple"):
        least_squares_batch(lambda p, i: (lorentz_model(p), 0), np.ones((2, 4)), jac="normal")
    with pytest.raises(ValueError, match=r"with jac='normal', fun must return jtj shaped"):
        least_squares_batch(
            lambda p, i: (lorentz_model(p), np.zeros((2, 3, 3)), np.zeros((2, 3))),
            np.ones((2, 4)), jac="normal",
        )
    with pytest.raises(ValueError, match=r"fun must return residuals shaped \(n, M\)"):
        least_squares_batch(lambda p, i: np.zeros(2), np.ones((2, 4)))
