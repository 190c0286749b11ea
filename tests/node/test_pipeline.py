"""node.pipeline: the prepared spectra the model-free methods read."""

import numpy as np
import pytest

from node import pipeline
from quant.phantom import make_phantom
from quant.registry import METHODS, band_columns


@pytest.mark.parametrize("grid", ["phantom", "nonuniform"])
def test_every_model_free_method_reads_the_shared_band_as_its_own_columns(grid):
    """Prepared.band returns the one band all model-free methods share: each measure gives,
    bit for bit, what it gives on just the columns it needs (quant.registry.band_columns,
    the band's definition), since it reads the samples nearest its offsets (quant.measures
    z_at: the sample itself, or the Lagrange cubic through the four nearest)."""
    ph = make_phantom(slices=2, size=48, seed=4)
    sig, offs = ph.signal, ph.offsets_ppm
    if grid == "nonuniform":  # drop some saturated offsets: a non-uniform grid
        keep = np.ones(offs.size, bool)
        keep[[5, 17, 30, 41, 50]] = False
        keep[np.abs(offs) >= 20] = True  # the M0
        sig, offs = sig[..., keep], offs[keep]
    t1 = np.full(sig.shape[:-1], 1.2, np.float32)
    prep = pipeline.prepare(sig, offs, t1_s=t1)
    names = [n for n, info in METHODS.items() if info.model_free and info.reads_ppm]
    assert {"mtr_asym", "apt_star", "arex", "mtr_asym_t1"} <= set(names)
    for name in names:
        info = METHODS[name]
        band, band_offs = prep.band(info.reads_ppm)
        own = band_columns(prep.offsets_ppm, info.reads_ppm)
        assert band.shape[1] >= own.size
        at = np.searchsorted(band_offs, prep.offsets_ppm[own])
        np.testing.assert_array_equal(band_offs[at], prep.offsets_ppm[own])
        t1_v = t1.reshape(-1)[prep.index]
        want = pipeline._call(info, band[:, at], prep.offsets_ppm[own], t1_v, prep.saturation)
        got = pipeline.compute(prep, name).values.reshape(-1)[prep.index]
        np.testing.assert_array_equal(got, want)
        assert np.isfinite(got).mean() > 0.9
