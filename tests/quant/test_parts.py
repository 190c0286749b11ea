"""Row ranges of the compiled loops on several threads (quant.parts)."""

import threading

import numpy as np
import pytest

from quant import estimate_b0_shift, finite_rows, normalize, parts, spectra_from_frames
from quant.phantom import make_phantom


@pytest.fixture
def three_workers():
    parts.set_workers(3)
    yield
    parts.set_workers(None)


def test_the_parts_cover_the_batch_once_in_contiguous_ranges(three_workers):
    seen: list[tuple[int, int]] = []
    threads: set[int] = set()
    lock = threading.Lock()

    def part(lo, hi):
        with lock:
            seen.append((lo, hi))
            threads.add(threading.get_ident())

    parts.in_parts(10_000, part, min_rows=1000)
    seen.sort()
    assert len(seen) == 3 and seen[0][0] == 0 and seen[-1][1] == 10_000
    assert all(a[1] == b[0] for a, b in zip(seen, seen[1:], strict=False))  # no gap or overlap
    assert threading.get_ident() in threads and len(threads) >= 2
    seen.clear()
    parts.in_parts(1999, part, min_rows=1000)  # too small for more than one part
    assert seen == [(0, 1999)]
    seen.clear()
    parts.in_parts(0, part)
    assert seen == [(0, 0)]


def test_a_failing_part_raises_after_every_part_has_returned(three_workers):
    done = []

    def part(lo, hi):
        if lo > 0:
            raise RuntimeError(f"part {lo}")
        threading.Event().wait(0.05)
        done.append(lo)

    with pytest.raises(RuntimeError, match="part"):
        parts.in_parts(3, part, min_rows=1)
    assert done == [0]


def test_set_workers_checks_its_argument():
    for bad in (0, -1, 1.5, True, "2"):
        with pytest.raises(ValueError, match="positive integer"):
            parts.set_workers(bad)
    parts.set_workers(1)
    try:
        assert parts.workers() == 1
        seen = []
        parts.in_parts(100_000, lambda lo, hi: seen.append(threading.get_ident()))
        assert seen == [threading.get_ident()]
    finally:
        parts.set_workers(None)
    assert 1 <= parts.workers() <= parts.DEFAULT_MAX_WORKERS


def test_the_loops_give_the_same_values_bit_for_bit_on_any_number_of_threads():
    # every row is computed on its own (quant._jit): the serial run is the reference
    ph = make_phantom(slices=3, size=64, seed=2)
    sig, offs = ph.signal, ph.offsets_ppm
    vox = np.flatnonzero(np.ones(sig.shape[:-1], bool))
    frames = np.ascontiguousarray(np.moveaxis(sig[0], -1, 0))
    got = {}
    for w in (1, 3):
        parts.set_workers(w)
        try:
            sp = normalize(sig, offs, voxels=vox)
            got[w] = (sp.z, estimate_b0_shift(sp.z, sp.offsets_ppm),
                      spectra_from_frames(frames, np.arange(frames.shape[0])),
                      finite_rows(np.where(sp.z > 0.9, np.nan, sp.z)))
        finally:
            parts.set_workers(None)
    for a, b in zip(got[1], got[3], strict=True):
        np.testing.assert_array_equal(a, b)
