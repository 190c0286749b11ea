"""Pure numerics of cest-node: Z-spectra, B0 correction, APT measures, fits, simulation.

Array convention (one rule for the whole package):

- Signals and Z-spectra are shaped ``(..., n_offsets)``: any leading voxel axes, the
  saturation offsets last, with a separate 1-D ``offsets_ppm`` of length ``n_offsets``.
  Functions say whether they need the offsets sorted (:func:`normalize` returns them
  ascending with repeats averaged).
- Data first, options keyword-only.
- float32 in gives float32 out, float64 gives float64 (other numeric input becomes float64).
- An invalid voxel is NaN, never a silent 0.
- No Python loop over voxels on a hot path.
- Bad input raises ``ValueError`` naming the problem.

Model-free measures come from :mod:`quant.measures`, the model-based fits (``lda``,
``multi_lorentzian``, ``aptr_star``) from :mod:`quant.lorentz` and :mod:`quant.bmfit`; every
method is listed with its needs and cost in :data:`METHODS` (:mod:`quant.registry`).

Only numpy and scipy are used: no DICOM, no files, no sockets.
"""

from quant.b0 import B0Result, correct_b0, estimate_b0_shift, resample_shifted
from quant.bmfit import aptr_star  # noqa: F401  (model-based; not registered: needs B1/tsat/field)
from quant.lorentz import lda, multi_lorentzian  # noqa: F401  (registers 'lda', 'multi_lorentzian')
from quant.measures import apt_star, arex, mtr_asym, mtr_asym_t1, z_at
from quant.registry import METHODS, PRIMARY_METHOD, MethodInfo, get_method, register
from quant.spectra import (
    Spectrum,
    brain_mask,
    finite_rows,
    m0_reference,
    normalize,
    sort_offsets,
    spectra_from_frames,
)

__all__ = [
    "B0Result",
    "METHODS",
    "MethodInfo",
    "PRIMARY_METHOD",
    "Spectrum",
    "apt_star",
    "aptr_star",
    "arex",
    "brain_mask",
    "correct_b0",
    "estimate_b0_shift",
    "finite_rows",
    "get_method",
    "lda",
    "m0_reference",
    "mtr_asym",
    "mtr_asym_t1",
    "multi_lorentzian",
    "normalize",
    "register",
    "resample_shifted",
    "sort_offsets",
    "spectra_from_frames",
    "warm_b0",
    "warm_fits",
    "z_at",
]


def warm_b0() -> None:
    """Load (or compile, once per checkout) the B0 estimate's compiled loop now (numba;
    :func:`quant._jit.b0_vertex`): the first series' prepare pays it otherwise (numba's
    import, about 1 s, and the load)."""
    from quant import _jit

    _jit.warm_b0()


def warm_fits() -> None:
    """Import and compile the fits' compiled loops now (numba; :mod:`quant._jit`): about 1 s to
    import, a few seconds to compile in a fresh checkout, a fraction of a second from the
    on-disk cache afterwards. The first fit pays it otherwise."""
    from quant import _jit

    _jit.warm()
