"""Normalisation by M0, offset sorting, repeat averaging and the tissue mask."""

import numpy as np
import pytest

from quant.phantom import make_phantom
from quant.spectra import brain_mask, normalize, sort_offsets, spectra_from_frames


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_normalize_sorts_averages_and_divides(dtype):
    # Z = S / M0, the definition of the Z-spectrum (Zhou & van Zijl, Prog NMR Spectrosc 2006)
    rng = np.random.default_rng(0)
    offsets = np.array([-300.0, 2.0, -1.0, 2.0, 0.0, 300.0, -2.0])
    sig = rng.uniform(10, 100, size=(3, 4, offsets.size)).astype(dtype)
    sp = normalize(sig, offsets)
    assert sp.z.dtype == dtype and sp.m0.dtype == dtype
    np.testing.assert_array_equal(sp.offsets_ppm, [-2.0, -1.0, 0.0, 2.0])
    m0 = (sig[..., 0] + sig[..., 5]) / 2
    want = np.stack([sig[..., 6], sig[..., 2], sig[..., 4], (sig[..., 1] + sig[..., 3]) / 2], -1) / m0[..., None]
    np.testing.assert_allclose(sp.z, want, rtol=1e-6)
    np.testing.assert_allclose(sp.m0, m0, rtol=1e-6)


def test_normalize_with_separate_m0_and_integer_input():
    sig = np.array([[[40, 50, 60]]], dtype=np.uint16)
    sp = normalize(sig, [1.0, -1.0, -300.0], m0=np.array([[100.0]]))
    assert sp.z.dtype == np.float64
    np.testing.assert_allclose(sp.z, [[[0.5, 0.4]]])  # the M0 frame in the signal is dropped


def test_zero_m0_voxel_is_nan():
    sig = np.array([[0.0, 0.0, 0.0], [100.0, 50.0, 60.0]])
    sp = normalize(sig, [-300.0, -3.5, 3.5])
    assert np.all(np.isnan(sp.z[0]))
    np.testing.assert_allclose(sp.z[1], [0.5, 0.6])


def test_sort_offsets_repeats():
    s, o = sort_offsets(np.array([[1.0, 2.0, 3.0, 5.0]]), [0.5, -1.0, 0.5, 0.5 + 1e-9])
    np.testing.assert_array_equal(o, [-1.0, 0.5])
    np.testing.assert_allclose(s, [[2.0, 3.0]])


def test_brain_mask_on_phantom():
    ph = make_phantom(slices=2, size=48, snr=50.0)
    mask = brain_mask(ph.signal[..., 0])
    assert np.mean(mask == ph.brain) > 0.99


def test_bad_input_names_the_problem():
    sig = np.ones((2, 3))
    with pytest.raises(ValueError, match="offsets_ppm has 2 entries but signal has 3"):
        normalize(sig, [-300.0, 3.5])
    with pytest.raises(ValueError, match="M0 is zero"):
        normalize(np.zeros((2, 3)), [-300.0, -3.5, 3.5])
    bad = np.ones((2, 3))
    bad[0, 0] = np.nan
    with pytest.raises(ValueError, match="M0 contains NaN"):
        normalize(bad, [-300.0, -3.5, 3.5])
    with pytest.raises(ValueError, match="no M0"):
        normalize(sig, [-1.0, 0.0, 3.5])
    with pytest.raises(ValueError, match="m0 has shape"):
        normalize(sig, [-1.0, 0.0, 3.5], m0=np.ones(3))
    with pytest.raises(ValueError, match="no saturated frame"):
        normalize(sig, [-300.0, 300.0, 400.0])
    with pytest.raises(ValueError, match="must be a numeric array"):
        normalize(np.array([["a", "b"]]), [1.0, 2.0])
    with pytest.raises(ValueError, match="fraction must be in"):
        brain_mask(np.ones(4), fraction=1.5)


def test_finite_rows_is_numpy_all_isfinite():
    # reference: numpy's np.all(np.isfinite(z), axis=-1), for NaN, +-inf, float32/64, ints
    from quant.spectra import finite_rows

    rng = np.random.default_rng(5)
    for dt in (np.float32, np.float64):
        z = rng.normal(size=(6, 7, 9)).astype(dt)
        z[0, 1, 3] = np.nan
        z[2, 2, 0] = np.inf
        z[5, 6, 8] = -np.inf
        np.testing.assert_array_equal(finite_rows(z), np.all(np.isfinite(z), axis=-1))
        np.testing.assert_array_equal(finite_rows(z[:, ::2, 1:]),
                                      np.all(np.isfinite(z[:, ::2, 1:]), axis=-1))
    assert finite_rows(np.arange(6).reshape(2, 3)).all()
    with pytest.raises(ValueError, match="offset axis"):
        finite_rows(np.float32(1.0))


@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.uint16])
def test_normalize_of_chosen_voxels_is_the_whole_arrays_rows(dtype):
    # reference: normalize of the whole array (Z = S / M0 by numpy's own gather, sort and
    # multiply) at the same voxels, to the bit; with and without repeated offsets (the
    # compiled pass and the fallback), with M0 from the series and given, with a zero M0
    rng = np.random.default_rng(11)
    for offsets in ([-300.0, 3.5, -3.5, 0.0, 1.0, -1.0, 300.0],
                    [-300.0, 3.5, -3.5, 3.5, 0.0, -300.0]):
        sig = rng.uniform(5, 900, size=(3, 5, 4, len(offsets))).astype(dtype)
        sig[1, 2, 3] = 0
        voxels = np.array([0, 7, 33, 59, 31, 7])  # any order, a voxel twice
        for m0 in (None, rng.uniform(50, 900, size=(3, 5, 4))):
            whole = normalize(sig, offsets, m0=m0)
            part = normalize(sig, offsets, m0=m0, voxels=voxels)
            want = whole.z.reshape(-1, whole.z.shape[-1])[voxels]
            assert part.z.dtype == want.dtype and part.z.shape == want.shape
            np.testing.assert_array_equal(part.z.view(np.uint8), want.view(np.uint8))
            np.testing.assert_array_equal(part.offsets_ppm, whole.offsets_ppm)
            np.testing.assert_array_equal(part.m0, whole.m0.reshape(-1)[voxels])
    assert np.isnan(normalize(sig, offsets, voxels=np.array([31])).z).all()  # voxel (1, 2, 3)
    empty = normalize(sig, offsets, voxels=np.array([], dtype=np.intp))
    assert empty.z.shape == (0, 3)
    with pytest.raises(ValueError, match="outside 0..59"):
        normalize(sig, offsets, voxels=np.array([60]))
    with pytest.raises(ValueError, match="integer flat indices"):
        normalize(sig, offsets, voxels=np.array([0.0]))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("shape", [(7, 5, 3), (61, 128, 128), (4, 1, 130)])
def test_spectra_from_frames_is_numpys_gather_and_transpose(dtype, shape):
    # reference: numpy's fancy index and transposed copy, the expression it replaces (a copy:
    # equal value for value, NaN included); tiles of 64 voxels with a partial last tile
    rng = np.random.default_rng(3)
    frames = rng.normal(size=(shape[0] + 2, *shape[1:])).astype(dtype)
    frames[1, 0, 0] = np.nan
    order = rng.permutation(shape[0] + 2)[: shape[0]]  # not every frame, in any order
    order[-1] = order[0]  # a frame in two columns
    want = frames[order].transpose(1, 2, 0)
    got = spectra_from_frames(frames, order)
    assert got.dtype == dtype and got.flags.c_contiguous
    np.testing.assert_array_equal(got, want)
    out = np.full(want.shape, 7.0, dtype)
    assert spectra_from_frames(frames, order, out) is out
    np.testing.assert_array_equal(out, want)


def test_spectra_from_frames_names_what_is_wrong():
    frames = np.zeros((3, 2, 2), np.float32)
    with pytest.raises(ValueError, match="order must be 1-D indices into the 3 frames"):
        spectra_from_frames(frames, [0, 3])
    with pytest.raises(ValueError, match="C-contiguous float"):
        spectra_from_frames(frames.astype(np.int16), [0])
    with pytest.raises(ValueError, match="C-contiguous float"):
        spectra_from_frames(frames[:, :, ::-1], [0])
    with pytest.raises(ValueError, match=r"out must be a C-contiguous float32 array of shape \(2, 2, 2\)"):
        spectra_from_frames(frames, [0, 1], np.zeros((2, 2, 3), np.float32))
