"""Compiled inner loops of the batched fits (numba): the Lorentzian model with its normal
equations, and the batched solve of small symmetric positive definite systems.

Both replace numpy expressions whose cost was their temporaries and per-call overheads, not
their arithmetic (measured in tests/bench/bench_fits.py): the fused Lorentzian pass wrote
``(voxels, pools, offsets)`` arrays several times per evaluation, and numpy's batched
``linalg.solve`` costs about 2 us per 16 x 16 system. Every voxel is computed on its own,
in float64, so a voxel's result never depends on the others of its batch. The functions are
compiled on first use and cached on disk (``cache=True``); nothing here touches files or
sockets itself.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["cholesky_solve", "damped_solve", "lorentz_normal", "predicted_reduction"]

#: LLVM may reassociate and contract (fused multiply-add) sums, so that it vectorises the dot
#: products; no assumption that values are finite (NaN and infinity checks stay exact)
_FAST = {"reassoc", "contract", "arcp", "nsz"}


@njit(cache=True, nogil=True, fastmath=_FAST)
def lorentz_normal(p, x, data, wt, r, jtj, g):  # pragma: no cover - compiled
    """Weighted residuals ``wt (model - data)``, ``J^T J`` and ``J^T r`` of the Lorentzian
    model ``c - sum_k A_k h_k^2 / (h_k^2 + (x - d_k)^2)`` (``h = w / 2``; positions of the
    pools after the first relative to the first), written into ``r`` (n, N), ``jtj``
    (n, P, P) and ``g`` (n, P).

    Derivatives (``u = x - d``, ``q = 1 / (h^2 + u^2)``, ``L = A h^2 q``): ``-h^2 q`` for A,
    ``-2 L u^2 q / w`` for w, ``-2 L u q`` for the absolute position; the first pool's position
    moves every pool, so its column is the sum of all position columns. The weighted Jacobian
    of one voxel is kept as rows (P, N), and ``J^T J`` is their dot products (contiguous,
    so the compiler vectorises them).
    """
    n, n_par = p.shape
    k_pools = (n_par - 1) // 3
    n_off = x.size
    rows = np.empty((n_par + 1, n_off))  # weighted Jacobian rows, then the residual
    for v in range(n):
        c = p[v, 0]
        for j in range(n_off):
            rows[0, j] = wt[j]
            rows[3, j] = 0.0
        res_row = rows[n_par]
        for j in range(n_off):
            res_row[j] = c - data[v, j]
        for k in range(k_pools):
            amp = p[v, 1 + 3 * k]
            w = p[v, 2 + 3 * k]
            h2 = 0.25 * w * w
            winv = 1.0 / w
            d = p[v, 3 + 3 * k] + (p[v, 3] if k > 0 else 0.0)
            ra = rows[1 + 3 * k]
            rw = rows[2 + 3 * k]
            rd = rows[3 + 3 * k]
            water = rows[3]
            for j in range(n_off):
                u = x[j] - d
                q = 1.0 / (h2 + u * u)
                lor = amp * h2 * q
                res_row[j] -= lor
                t = -2.0 * lor * q * wt[j]
                ra[j] = -h2 * q * wt[j]
                rw[j] = t * u * u * winv
                tu = t * u
                if k > 0:
                    rd[j] = tu
                water[j] += tu  # the first pool's position moves every pool
        for j in range(n_off):
            res_row[j] *= wt[j]
            r[v, j] = res_row[j]
        for a in range(n_par):
            ra = rows[a]
            s = 0.0
            for j in range(n_off):
                s += ra[j] * res_row[j]
            g[v, a] = s
            for b in range(a, n_par):
                rb = rows[b]
                s = 0.0
                for j in range(n_off):
                    s += ra[j] * rb[j]
                jtj[v, a, b] = s
                jtj[v, b, a] = s


@njit(cache=True, nogil=True, fastmath=_FAST)
def cholesky_solve(a, b, x, ok):  # pragma: no cover - compiled
    """Solve ``a[i] x[i] = b[i]`` for each symmetric positive definite ``a[i]`` (n, P, P) by
    Cholesky factorisation (``a = L L^T``, then two triangular solves; Golub & Van Loan,
    Matrix Computations, 4th ed., alg. 4.2.1, from memory). ``ok[i]`` is False where a pivot
    is not positive and finite (the caller solves those another way); ``a`` is not changed.
    """
    n, m, _ = a.shape
    lo = np.empty((m, m))
    y = np.empty(m)
    for i in range(n):
        good = True
        for col in range(m):
            s = a[i, col, col]
            for k in range(col):
                s -= lo[col, k] * lo[col, k]
            if not (s > 0.0) or not np.isfinite(s):
                good = False
                break
            d = np.sqrt(s)
            lo[col, col] = d
            for row in range(col + 1, m):
                t = a[i, row, col]
                for k in range(col):
                    t -= lo[row, k] * lo[col, k]
                lo[row, col] = t / d
        ok[i] = good
        if not good:
            continue
        for row in range(m):  # L y = b
            t = b[i, row]
            for k in range(row):
                t -= lo[row, k] * y[k]
            y[row] = t / lo[row, row]
        for row in range(m - 1, -1, -1):  # L^T x = y
            t = y[row]
            for k in range(row + 1, m):
                t -= lo[k, row] * x[i, k]
            x[i, row] = t / lo[row, row]


@njit(cache=True, nogil=True, fastmath=_FAST)
def damped_solve(jtj, idx, lam, dsc, g_free, fixed, held, hold_weight, out, ok):  # pragma: no cover
    """The Levenberg-Marquardt step of the voxels ``idx``: for each, the system
    ``(J^T J + lam D) s = -g`` with the parameters in ``fixed`` held at ``held`` (their
    diagonal gets ``hold_weight`` times its damped value plus ``D``, their right-hand side that
    diagonal times ``held``: see :mod:`quant.lsq`), solved by Cholesky into ``out`` (the held
    values written as they are). ``jtj``, ``lam``, ``dsc`` (``D``) and ``g_free`` are indexed
    by ``idx``; ``fixed``, ``held``, ``out`` and ``ok`` have one row per entry of ``idx``.
    ``ok[i]`` is False where the system is not positive definite (``out[i]`` untouched).
    """
    m = jtj.shape[1]
    a = np.empty((1, m, m))
    b = np.empty((1, m))
    x = np.empty((1, m))
    flag = np.empty(1, dtype=np.bool_)
    for i in range(idx.size):
        v = idx[i]
        for r in range(m):
            for c in range(m):
                a[0, r, c] = jtj[v, r, c]
        for k in range(m):
            dk = a[0, k, k] + lam[v] * dsc[v, k]
            if fixed[i, k]:
                dk += hold_weight * (dk + dsc[v, k])
                b[0, k] = dk * held[i, k]
            else:
                b[0, k] = -g_free[v, k]
            a[0, k, k] = dk
        cholesky_solve(a, b, x, flag)
        ok[i] = flag[0]
        if flag[0]:
            for k in range(m):
                out[i, k] = held[i, k] if fixed[i, k] else x[0, k]


@njit(cache=True, nogil=True, fastmath=_FAST)
def predicted_reduction(jtj, grad, delta, out):  # pragma: no cover - compiled
    """``out[i] = -(g_i . d_i + 0.5 d_i^T (J^T J)_i d_i)``: the cost reduction the linear model
    predicts for the step ``d`` (the denominator of the gain ratio)."""
    n, m = grad.shape
    for i in range(n):
        quad = 0.0
        lin = 0.0
        for r in range(m):
            s = 0.0
            for c in range(m):
                s += jtj[i, r, c] * delta[i, c]
            quad += delta[i, r] * s
            lin += grad[i, r] * delta[i, r]
        out[i] = -(lin + 0.5 * quad)
