"""The method registry: names, units, needs, and the compute contract."""

import numpy as np
import pytest

from quant import METHODS, PRIMARY_METHOD, MethodInfo, get_method, mtr_asym, register

X = np.round(np.linspace(-5.9, 5.9, 60), 10)


def test_model_free_methods_are_registered():
    for name in ("mtr_asym", "mtr_asym_t1", "apt_star", "arex"):
        info = METHODS[name]
        assert info.name == name and info.model_free and info.cost_s_per_voxel > 0
    assert PRIMARY_METHOD == "mtr_asym" and next(iter(METHODS)) == "mtr_asym"
    assert METHODS["mtr_asym"].unit_ucum == "%" and not METHODS["mtr_asym"].needs_t1
    assert METHODS["arex"].needs_t1 and METHODS["mtr_asym_t1"].needs_t1
    assert METHODS["arex"].unit_ucum == "%/s"


def test_compute_contract():
    rng = np.random.default_rng(0)
    z = rng.uniform(0.4, 0.9, (2, 3, X.size)).astype(np.float32)
    t1 = np.full((2, 3), 1.2, dtype=np.float32)
    for info in METHODS.values():
        if not info.model_free:
            continue
        m = info.compute(z, X, t1_s=t1 if info.needs_t1 else None)
        assert m.shape == (2, 3) and m.dtype == np.float32
    np.testing.assert_array_equal(METHODS["mtr_asym"].compute(z, X), mtr_asym(z, X))
    with pytest.raises(ValueError, match="needs a T1 map"):
        METHODS["mtr_asym_t1"].compute(z, X)


def test_register_and_lookup():
    info = MethodInfo("test_only_method", "Test", "%", False, True, 1e-8, lambda z, o, *, t1_s=None: z[..., 0])
    try:
        register(info)
        assert get_method("test_only_method") is info
        with pytest.raises(ValueError, match="already registered"):
            register(MethodInfo("test_only_method", "Other", "%", False, True, 1e-8, info.compute))
        register(MethodInfo("test_only_method", "Other", "%", False, True, 1e-8, info.compute), replace=True)
        assert get_method("test_only_method").title == "Other"
    finally:
        METHODS.pop("test_only_method", None)
    with pytest.raises(ValueError, match="unknown method 'nope'; known: mtr_asym"):
        get_method("nope")
    with pytest.raises(ValueError, match="cost_s_per_voxel of x must be positive"):
        MethodInfo("x", "X", "%", False, True, 0.0, info.compute)
