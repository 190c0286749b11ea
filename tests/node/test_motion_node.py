"""Motion correction through the node: DICOM series -> assembler -> pipeline.prepare_series.

Some frames of the phantom are moved by a known sub-pixel translation (the exact band-limited
shift of quant.motion.apply_motion, i.e. a Fourier phase ramp, the shift theorem), written as
DICOM, assembled, and registered to the M0 by the node's prepare step. The known motion must
come back in Prepared.motion, and correcting it must bring the MTRasym map back towards the
map of the still series.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from node import pipeline
from node.assemble import Assembler
from node.config import default_config
from node.synth import series_from_arrays
from quant.motion import apply_motion
from quant.phantom import make_phantom

SLICES, SIZE, SEED = 2, 32, 21
SPACING_MM = 1.8  # series_from_arrays' default PixelSpacing
SHIFT_PX = (1.4, -2.3)  # (rows, columns)


@pytest.fixture(scope="module")
def phantom():
    return make_phantom(slices=SLICES, size=SIZE, seed=SEED)


def _assembled(signal, offsets, seed):
    done = []
    with Assembler(default_config(), done.append) as asm:
        for ds in series_from_arrays(signal, offsets, seed=seed, scale=10.0):
            asm.add(ds)
        asm.flush(timeout=30)
    return done[0]


@pytest.fixture(scope="module")
def moved(phantom):
    """The phantom with every fourth frame at |offset| >= 2 ppm moved by SHIFT_PX."""
    offs = phantom.offsets_ppm
    chosen = np.zeros(offs.size, bool)
    cand = np.flatnonzero((np.abs(offs) >= 2.0) & (np.abs(offs) < 20))
    chosen[cand[::4]] = True
    dy = np.where(chosen, SHIFT_PX[0], 0.0)[None, :].repeat(SLICES, 0)
    dx = np.where(chosen, SHIFT_PX[1], 0.0)[None, :].repeat(SLICES, 0)
    # apply_motion removes a displacement d; removing -d imposes +d
    signal = apply_motion(phantom.signal.astype(np.float64), -dy, -dx)
    return _assembled(np.clip(signal, 0, None), offs, "moved"), offs[chosen]


def test_known_shift_is_recovered_through_the_node(phantom, moved):
    series, moved_offsets = moved
    proto = replace(default_config().protocols[0], motion_correction=True)
    prep = pipeline.prepare_series(series, proto)
    m = prep.motion
    assert m is not None and "motion" in prep.seconds
    is_moved = np.isin(np.round(m.offsets_ppm, 4), np.round(moved_offsets, 4))
    assert is_moved.sum() == moved_offsets.size
    # tolerance ours: 0.1 pixel (0.18 mm) on the moved frames, 0.1 pixel on the still ones
    # (quant.motion states 0.014 px on a smooth image at SNR 50; here uint16 and SNR 100)
    tol_mm = 0.1 * SPACING_MM
    dy, dx = m.dy_mm[:, is_moved], m.dx_mm[:, is_moved]
    assert m.measured[:, is_moved].all()
    np.testing.assert_allclose(dy, SHIFT_PX[0] * SPACING_MM, atol=tol_mm)
    np.testing.assert_allclose(dx, SHIFT_PX[1] * SPACING_MM, atol=tol_mm)
    still = ~is_moved & m.measured[0]
    assert np.abs(m.dy_mm[:, still]).max() < tol_mm and np.abs(m.dx_mm[:, still]).max() < tol_mm
    assert m.max_displacement_mm == pytest.approx(np.hypot(*SHIFT_PX) * SPACING_MM, abs=tol_mm)


def test_correction_brings_the_map_back_to_the_still_one(phantom, moved):
    series, _ = moved
    still = _assembled(phantom.signal, phantom.offsets_ppm, "still")
    ref = pipeline.compute(pipeline.prepare(still.signal, still.offsets_ppm), "mtr_asym").values
    off = replace(default_config().protocols[0], motion_correction=False)
    on = replace(off, motion_correction=True)
    plain = pipeline.compute(pipeline.prepare_series(series, off), "mtr_asym").values
    fixed = pipeline.compute(pipeline.prepare_series(series, on), "mtr_asym").values
    inner = phantom.brain & np.isfinite(ref) & np.isfinite(plain) & np.isfinite(fixed)
    err_plain = np.sqrt(np.mean((plain - ref)[inner] ** 2))
    err_fixed = np.sqrt(np.mean((fixed - ref)[inner] ** 2))
    assert err_fixed < 0.5 * err_plain, (err_fixed, err_plain)


def test_motion_correction_off_by_default():
    assert default_config().protocols[0].motion_correction is False
