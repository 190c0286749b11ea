"""Compiled inner loops (numba): of the batched fits, the Lorentzian model with its normal
equations and the bounded Levenberg-Marquardt trial step of every voxel (its damped system
solved by Cholesky); of the B0 estimate, the weighted parabola fit around each voxel's
sampled minimum (:func:`b0_vertex`); of the normalisation, the gather of the brain voxels'
spectra sorted by offset and divided by M0 in one pass (:func:`gather_scaled`); of the
B0 band, a block's spline values written into their rows (:func:`spline_rows`); of the
frames' layout, the tiled transposition of a slice's frames into its spectra
(:func:`frames_to_rows`).

They replace numpy expressions whose cost was their temporaries and per-call overheads, not
their arithmetic (measured in tests/bench/bench_fits.py): the fused Lorentzian pass wrote
``(voxels, pools, offsets)`` arrays several times per evaluation, numpy's batched
``linalg.solve`` costs about 2 us per 16 x 16 system (Cholesky here: 0.7 us), and the bounded
trial step was some forty ``(voxels, parameters)`` array passes per iteration. Every voxel is computed on its own,
in float64, so a voxel's result never depends on the others of its batch. The functions are
compiled on first use and cached on disk (``cache=True``); nothing here touches files or
sockets itself.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["b0_vertex", "frames_to_rows", "gather_scaled", "lm_trial", "lorentz_normal",
           "predicted_reduction", "rows_finite", "spline_rows"]

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


@njit(cache=True, nogil=True, fastmath=_FAST)
def _solve_one(a, b, x, lo, y):  # pragma: no cover - compiled
    """``a x = b`` for one damped system (m, m): Cholesky (``lo``, ``y`` are work buffers);
    where it is not positive definite, Gaussian elimination with partial pivoting on a copy;
    a singular or non-finite system gives ``x = 0``. ``a`` is not changed."""
    m = a.shape[0]
    good = True
    for col in range(m):
        s = a[col, col]
        for k in range(col):
            s -= lo[col, k] * lo[col, k]
        if not (s > 0.0) or not np.isfinite(s):
            good = False
            break
        dd = np.sqrt(s)
        lo[col, col] = dd
        for row in range(col + 1, m):
            t = a[row, col]
            for k in range(col):
                t -= lo[row, k] * lo[col, k]
            lo[row, col] = t / dd
    if good:
        for row in range(m):
            t = b[row]
            for k in range(row):
                t -= lo[row, k] * y[k]
            y[row] = t / lo[row, row]
        for row in range(m - 1, -1, -1):
            t = y[row]
            for k in range(row + 1, m):
                t -= lo[k, row] * x[k]
            x[row] = t / lo[row, row]
    else:  # LU with partial pivoting, on lo (a copy) and y (b)
        for r in range(m):
            y[r] = b[r]
            for c in range(m):
                lo[r, c] = a[r, c]
        scale = 0.0
        for r in range(m):
            for c in range(m):
                scale = max(scale, abs(lo[r, c]))
        for col in range(m):
            piv = col
            for r in range(col + 1, m):
                if abs(lo[r, col]) > abs(lo[piv, col]):
                    piv = r
            if not (abs(lo[piv, col]) > 1e-14 * scale) or not np.isfinite(lo[piv, col]):
                for r in range(m):
                    x[r] = 0.0
                return
            if piv != col:
                for c in range(m):
                    lo[col, c], lo[piv, c] = lo[piv, c], lo[col, c]
                y[col], y[piv] = y[piv], y[col]
            for r in range(col + 1, m):
                f = lo[r, col] / lo[col, col]
                for c in range(col, m):
                    lo[r, c] -= f * lo[col, c]
                y[r] -= f * y[col]
        for row in range(m - 1, -1, -1):
            t = y[row]
            for k in range(row + 1, m):
                t -= lo[row, k] * x[k]
            x[row] = t / lo[row, row]
    for r in range(m):
        if not np.isfinite(x[r]):
            x[r] = 0.0


@njit(cache=True, nogil=True, fastmath=_FAST)
def lm_trial(jtj, grad, g_free, p, lam, dscale, side, frozen, lower, upper, approach,
             near_tol, hold_weight, p_new, delta, side_out):  # pragma: no cover - compiled
    """One Levenberg-Marquardt trial point per voxel with box bounds, as :mod:`quant.lsq`
    describes it: the damped step with the frozen and the predicted parameters held, the
    release of predicted holds whose multiplier no longer pulls to the bound, up to three
    passes that hold the parameters a step would carry across a bound (``approach`` of the
    way there) and solve again for the rest, then the projection onto the box. Writes the
    trial point ``p_new``, the step taken ``delta`` and the next prediction ``side_out``
    (the sign of the step of each parameter held off a bound, 0 elsewhere)."""
    n, m = p.shape
    a = np.empty((m, m))
    b = np.empty(m)
    step = np.empty(m)
    x = np.empty(m)
    work = np.empty((m, m))
    y = np.empty(m)
    d = np.empty(m)
    fixed = np.empty(m, dtype=np.bool_)
    held = np.empty(m)
    release = np.empty(m, dtype=np.bool_)
    crossing = np.empty(m, dtype=np.bool_)
    for v in range(n):
        top = 1.0
        for k in range(m):
            top = max(top, dscale[v, k])
        any_pred = False
        for k in range(m):
            d[k] = max(dscale[v, k], 1e-12 * top)
            pred = side[v, k] != 0 and not frozen[v, k]
            any_pred = any_pred or pred
            dist = (lower[k] - p[v, k]) if side[v, k] < 0 else (upper[k] - p[v, k])
            if approach < 1.0 and abs(dist) > near_tol[k]:
                dist = approach * dist
            fixed[k] = frozen[v, k] or pred
            held[k] = dist if pred else 0.0
        for passes in range(4):  # the first solve, then up to three crossing passes
            for r in range(m):
                for c in range(m):
                    a[r, c] = jtj[v, r, c]
            for k in range(m):
                dk = a[k, k] + lam[v] * d[k]
                if fixed[k]:
                    dk += hold_weight * (dk + d[k])
                    b[k] = dk * held[k]
                else:
                    b[k] = -g_free[v, k]
                a[k, k] = dk
            _solve_one(a, b, x, work, y)
            for k in range(m):
                step[k] = held[k] if fixed[k] else x[k]
            any_redo = False
            if passes == 0:
                for k in range(m):
                    release[k] = False
                if any_pred:
                    for k in range(m):
                        if side[v, k] != 0 and not frozen[v, k]:
                            mu = grad[v, k] + lam[v] * d[k] * step[k]
                            for c in range(m):
                                mu += jtj[v, k, c] * step[c]
                            release[k] = side[v, k] * mu >= 0.0
            if passes == 3:
                break
            for k in range(m):
                t = p[v, k] + step[k]
                crossing[k] = (t < lower[k] or t > upper[k]) and not fixed[k]
                if crossing[k] or release[k]:
                    any_redo = True
            if not any_redo:
                break
            for k in range(m):
                fz_old = fixed[k] and not release[k]
                h = step[k] if fz_old else 0.0
                if crossing[k]:
                    t = p[v, k] + step[k]
                    tb = min(max(t, lower[k]), upper[k]) - p[v, k]
                    if approach < 1.0 and abs(tb) > near_tol[k]:
                        tb = approach * tb
                    h += tb
                fixed[k] = fz_old or crossing[k]
                held[k] = h if fixed[k] else 0.0
                release[k] = False
        for k in range(m):
            t = p[v, k] + step[k]
            q = min(max(t, lower[k]), upper[k])
            if approach < 1.0:
                tb = q - p[v, k]
                if q != t and abs(tb) > near_tol[k]:
                    q = p[v, k] + approach * tb
            p_new[v, k] = q
            delta[v, k] = q - p[v, k]
            if fixed[k] and not frozen[v, k]:
                side_out[v, k] = 1 if step[k] > 0 else (-1 if step[k] < 0 else 0)
            else:
                side_out[v, k] = 0


@njit(cache=True, nogil=True)
def b0_vertex(z, cols, xc, window_ppm, out):  # pragma: no cover - compiled
    """Vertex of the weighted parabola ``y = Z / (1 - Z) = a u^2 + b u + c`` fitted around each
    row's sampled minimum (:func:`quant.b0.estimate_b0_shift` states the method), into ``out``.

    ``z`` is ``(n, N)``; only its columns ``cols`` (offsets ``xc``, ascending) are read. A row
    gets NaN where a read value is not finite, where fewer than 3 points lie within
    ``window_ppm`` of the minimum with Z < 0.95, where the parabola does not open upwards
    (``a det > 0`` fails, with the normal equations' determinant), or where the vertex lies
    outside the window. Weights ``(1 - Z)^4``. Sums in float64, row by row: the numpy form
    made some twenty ``(rows, offsets)`` temporaries per block (147 vs 20 ms for 353,000
    voxels here).
    """
    n = z.shape[0]
    k = cols.size
    lim = window_ppm + 1e-6
    for v in range(n):
        jmin = -1
        zmin = np.inf
        finite = True
        for j in range(k):
            val = z[v, cols[j]]
            if not np.isfinite(val):
                finite = False
                break
            if val < zmin:
                zmin = val
                jmin = j
        if not finite:  # else jmin is set: every value read is finite
            out[v] = np.nan
            continue
        xmin = xc[jmin]
        s0 = s1 = s2 = s3 = s4 = t0 = t1 = t2 = 0.0
        npts = 0
        for j in range(k):
            u = xc[j] - xmin
            val = np.float64(z[v, cols[j]])
            if abs(u) <= lim and val < 0.95:
                om = 1.0 - val
                w = om * om
                w *= w
                y = val / om
                wu = w * u
                wu2 = wu * u
                wu3 = wu2 * u
                s0 += w
                s1 += wu
                s2 += wu2
                s3 += wu3
                s4 += wu3 * u
                t0 += w * y
                t1 += wu * y
                t2 += wu2 * y
                npts += 1
        # normal equations [[s4 s3 s2] [s3 s2 s1] [s2 s1 s0]] [a b c] = [t2 t1 t0], Cramer
        c00 = s2 * s0 - s1 * s1
        det = s4 * c00 - s3 * (s3 * s0 - s1 * s2) + s2 * (s3 * s1 - s2 * s2)
        da = t2 * c00 - s3 * (t1 * s0 - s1 * t0) + s2 * (t1 * s1 - s2 * t0)
        db = s4 * (t1 * s0 - t0 * s1) - t2 * (s3 * s0 - s1 * s2) + s2 * (s3 * t0 - t1 * s2)
        if npts < 3 or not (da * det > 0.0):
            out[v] = np.nan
            continue
        vertex = -db / (2.0 * da)  # a = da/det, b = db/det: -b/(2a)
        out[v] = xmin + vertex if abs(vertex) <= window_ppm else np.nan


@njit(cache=True, nogil=True)
def rows_finite(z, out):  # pragma: no cover - compiled
    """``out[v]`` = every value of row ``v`` of ``z`` (n, N) is finite (no temporary array)."""
    for v in range(z.shape[0]):
        ok = True
        for j in range(z.shape[1]):
            if not np.isfinite(z[v, j]):
                ok = False
                break
        out[v] = ok


@njit(cache=True, nogil=True)
def gather_scaled(sig, rows, cols, inv, out):  # pragma: no cover - compiled
    """``out[i, j] = sig[rows[i], cols[j]] * inv[i]``: the rows ``rows`` of ``sig`` (V, N), their
    columns reordered, each scaled by its own factor, in one pass (no fastmath: each product
    is the IEEE product numpy's ``*`` gives in the same dtype)."""
    k = cols.size
    for i in range(rows.size):
        r = rows[i]
        s = inv[i]
        for j in range(k):
            out[i, j] = sig[r, cols[j]] * s


@njit(cache=True, nogil=True)
def spline_rows(yg, mg, rows, jy, jm, pos, a, b, ca, cb, out):  # pragma: no cover - compiled
    """``out[rows[i], pos[c]] = yg[i, jy[c]] a[i] + yg[i, jy[c] + 1] b[i] + mg[i, jm[c]] ca[i]
    + mg[i, jm[c] + 1] cb[i]``: a block of natural cubic spline values
    (:func:`quant.b0.resample_shifted` at some columns) from the block's samples ``yg`` and
    second derivatives ``mg``, written into the rows ``rows`` of ``out``. The products and
    sums are those of the numpy expression it replaces, in its order and dtype (no fastmath:
    nothing reassociated or fused), so the values are the same bit for bit."""
    for i in range(rows.size):
        r = rows[i]
        ai, bi, cai, cbi = a[i], b[i], ca[i], cb[i]
        for c in range(jy.size):
            j, k = jy[c], jm[c]
            out[r, pos[c]] = (yg[i, j] * ai + yg[i, j + 1] * bi + mg[i, k] * cai
                              + mg[i, k + 1] * cbi)


#: voxels per tile of :func:`frames_to_rows`: the tile's rows of every frame (61 x 256 B at
#: 64 float32) and its block of spectra stay in the L1/L2 caches while they are read and written
_TILE = 64


@njit(cache=True, nogil=True)
def frames_to_rows(src, order, dst):  # pragma: no cover - compiled
    """``dst[p, c] = src[order[c], p]``: the frames ``src`` (K, P), one per row, as spectra
    ``dst`` (P, n) with column ``c`` taken from frame ``order[c]``; a copy, value for value.

    Tile by tile of :data:`_TILE` voxels: numpy's transposed copy of (61, 16384) frames into
    (16384, 61) reads each frame with a 64 kB stride per output row and ran at about a third
    of this speed here (40 slices of 61 frames of 128 x 128: 142 vs 66 ms, medians of 7).
    """
    n = order.size
    p_all = src.shape[1]
    for p0 in range(0, p_all, _TILE):
        p1 = min(p0 + _TILE, p_all)
        for c in range(n):
            f = order[c]
            for p in range(p0, p1):
                dst[p, c] = src[f, p]


def warm_b0() -> None:
    """Compile (or load from the on-disk cache) the B0, normalisation and frame-layout loops for
    float32 and float64."""
    for dt in (np.float32, np.float64):
        z = np.linspace(0.1, 0.9, 5).astype(dt)[None, :]
        gather_scaled(z, np.zeros(1, np.intp), np.arange(5), np.ones(1, dt), np.empty((1, 5), dt))
        b0_vertex(z, np.arange(5), np.linspace(-1.0, 1.0, 5), 0.6, np.empty(1, dt))
        rows_finite(z, np.empty(1, np.bool_))
        frames_to_rows(z.reshape(5, 1), np.arange(5), np.empty((1, 5), dt))
        one, idx = np.ones(1, dt), np.zeros(1, np.intp)
        spline_rows(z, z, idx, idx, idx, idx, one, one, one, one, np.empty((1, 5), dt))


def warm() -> None:
    """Compile (or load from the on-disk cache) every function here on tiny inputs, so that
    the first fit does not pay it (a few seconds to compile in a fresh checkout; a fraction of
    a second to load afterwards)."""
    p = np.array([[1.0, 0.9, 1.0, 0.0]])
    x = np.linspace(-2.0, 2.0, 5)
    data = np.ones((1, 5))
    r, jtj, g = np.empty((1, 5)), np.empty((1, 4, 4)), np.empty((1, 4))
    lorentz_normal(p, x, data, np.ones(5), r, jtj, g)
    pred = np.empty(1)
    predicted_reduction(jtj, g, g, pred)
    lo, hi = np.full(4, -10.0), np.full(4, 10.0)
    side = np.zeros((1, 4), np.int8)
    lm_trial(jtj + np.eye(4), g, g, p, np.ones(1), np.ones((1, 4)), side,
             np.zeros((1, 4), np.bool_), lo, hi, 0.5, np.full(4, 1e-3), 1e12,
             np.empty((1, 4)), np.empty((1, 4)), np.empty((1, 4), np.int8))
