"""Batched Levenberg-Marquardt: many small, independent least-squares problems at once.

Every voxel is its own problem ``min_p 0.5 * ||r(p)||^2`` with the same number of parameters
``P`` and residuals ``M``. The solver keeps the parameters of all voxels in one array ``(V, P)``,
forms the normal equations of all voxels with one batched matrix product and solves them with
one batched ``numpy.linalg.solve``. Damping, step acceptance and convergence are per voxel; a
converged voxel leaves the active set and costs nothing afterwards. There is no Python loop over
voxels, only over iterations (and over blocks of voxels, to bound memory).

Algorithm (Levenberg 1944, Marquardt 1963; the damping update and the gain ratio as in
Madsen, Nielsen & Tingleff, "Methods for non-linear least squares problems", 2nd ed., DTU 2004,
Algorithm 3.16, from memory; the scale-invariant damping by the running maximum of the
diagonal of ``J^T J`` as in MINPACK's ``lmder``, Moré 1978, from memory):

* step: ``(J^T J + lambda * D) delta = -J^T r`` with ``D = diag(max_k diag(J_k^T J_k))``;
* gain ratio ``rho = (F(p) - F(p + delta)) / (L(0) - L(delta))`` with the linear model ``L``;
  accepted when ``rho > 0``; then ``lambda *= max(1/3, 1 - (2 rho - 1)^3)``, ``nu = 2``; else
  ``lambda *= nu``, ``nu *= 2``.

Bounds (box constraints) are handled by **projection with an active set**: a parameter sitting
on a bound whose gradient points out of the box is frozen for that iteration (its row and column
of the normal equations are replaced by the identity, its step is 0), the others take the
damped step, and the trial point is projected onto the box. The gain ratio uses the projected
step, so a projected step that does not reduce the cost is rejected like any other. This keeps
the parameters exactly inside the box (no transform, so no flattened Jacobian near a bound)
and lets a fit rest on a bound; ``at_bound`` in the result says where that happened, so the
caller can report it instead of clipping silently.

Convergence (per voxel, the tests of ``scipy.optimize.least_squares``, reference library):
``ftol``: the accepted cost reduction ``dF < ftol * F``; ``xtol``:
``||delta|| < xtol * (xtol + ||p||)``; ``gtol``: the projected gradient's max-norm below ``gtol``.
A voxel that reaches ``max_iter`` without meeting one of them is reported ``converged=False``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["LsqResult", "least_squares_batch", "finite_difference_jacobian"]

#: ``fun(params (n, P), index (n,)) -> residuals (n, M)``; ``index`` picks the voxels
ResidualFn = Callable[[np.ndarray, np.ndarray], np.ndarray]
#: ``jac(params (n, P), index (n,)) -> Jacobian (n, M, P)`` of the residuals
JacobianFn = Callable[[np.ndarray, np.ndarray], np.ndarray]

# status codes (per voxel)
STATUS_INVALID = -1  # non-finite residual at the start point: not fitted, parameters NaN
STATUS_MAXITER = 0  # iteration limit reached without meeting a tolerance
STATUS_GTOL = 1
STATUS_FTOL = 2
STATUS_XTOL = 3


@dataclass(frozen=True)
class LsqResult:
    """Per-voxel outcome of :func:`least_squares_batch`.

    Attributes
    ----------
    params : ndarray (V, P)
        Fitted parameters; NaN rows for voxels that could not be fitted (``status == -1``).
    residual_rms : ndarray (V,)
        ``sqrt(mean(r**2))`` at the solution (NaN where not fitted).
    cost : ndarray (V,)
        ``0.5 * sum(r**2)`` at the solution.
    iterations : ndarray (V,) int
        Accepted plus rejected LM steps taken.
    converged : ndarray (V,) bool
        A tolerance (gtol, ftol or xtol) was met.
    status : ndarray (V,) int
        -1 invalid start, 0 iteration limit, 1 gtol, 2 ftol, 3 xtol.
    at_bound : ndarray (V, P) bool
        The parameter ended on (within 1e-10 relative of) its lower or upper bound.
    """

    params: np.ndarray
    residual_rms: np.ndarray
    cost: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    status: np.ndarray
    at_bound: np.ndarray


def finite_difference_jacobian(
    fun: ResidualFn,
    params: np.ndarray,
    index: np.ndarray,
    *,
    lower: np.ndarray,
    upper: np.ndarray,
    r0: np.ndarray | None = None,
) -> np.ndarray:
    """Forward-difference Jacobian of ``fun`` for a block of voxels, one column per call.

    The step is ``h = sqrt(eps) * max(|p|, 1)`` (common practice); it is taken backwards where
    the forward point would leave the box, so ``fun`` is never evaluated outside the bounds.

    Returns
    -------
    ndarray (n, M, P)
    """
    p = np.asarray(params, dtype=np.float64)
    if r0 is None:
        r0 = fun(p, index)
    n, n_par = p.shape
    jac = np.empty((n, r0.shape[1], n_par), dtype=np.float64)
    h_base = np.sqrt(np.finfo(np.float64).eps) * np.maximum(np.abs(p), 1.0)
    for j in range(n_par):  # loop over parameters, not voxels
        h = h_base[:, j].copy()
        backwards = p[:, j] + h > upper[j]
        h[backwards] = -h[backwards]
        pj = p.copy()
        pj[:, j] += h
        jac[:, :, j] = (fun(pj, index) - r0) / h[:, None]
    return jac


def _check_bounds(p0: np.ndarray, lower, upper) -> tuple[np.ndarray, np.ndarray]:
    n_par = p0.shape[1]
    lo = np.broadcast_to(np.asarray(-np.inf if lower is None else lower, np.float64), (n_par,))
    hi = np.broadcast_to(np.asarray(np.inf if upper is None else upper, np.float64), (n_par,))
    if np.any(np.isnan(lo)) or np.any(np.isnan(hi)):
        raise ValueError("bounds must not be NaN")
    if np.any(lo >= hi):
        bad = np.flatnonzero(lo >= hi).tolist()
        raise ValueError(f"lower bound must be below upper bound for parameters {bad}")
    return lo.copy(), hi.copy()


def least_squares_batch(
    fun: ResidualFn,
    p0: np.ndarray,
    *,
    jac: JacobianFn | None = None,
    lower: np.ndarray | float | None = None,
    upper: np.ndarray | float | None = None,
    max_iter: int = 100,
    ftol: float = 1e-8,
    xtol: float = 1e-8,
    gtol: float = 1e-8,
    lambda0: float = 1e-3,
    block_size: int = 1024,
    bound_approach: float = 1.0,
) -> LsqResult:
    """Fit ``V`` independent least-squares problems at once by Levenberg-Marquardt.

    Parameters
    ----------
    fun : callable
        ``fun(params, index) -> residuals``: ``params`` is ``(n, P)`` float64 for the voxels
        ``index`` (``(n,)`` integers into ``0..V-1``); returns ``(n, M)``.
    p0 : array_like (V, P)
        Start values; projected onto the box first.
    jac : callable or True, optional
        ``jac(params, index) -> (n, M, P)``, the Jacobian of the residuals, evaluated after
        each accepted step. ``True``: ``fun`` returns ``(residuals, jacobian)`` at every point
        it is called for (the convention of ``scipy.optimize.minimize(jac=True)``), so a model
        whose Jacobian shares subexpressions with its value is evaluated once per step; the
        Jacobian of a rejected trial point is discarded. Forward finite differences
        (:func:`finite_difference_jacobian`) when omitted.
    lower, upper : array_like (P,) or float, optional
        Box bounds (``-inf`` / ``inf`` by default).
    max_iter : int
        Limit on LM steps (accepted or rejected) per voxel.
    ftol, xtol, gtol : float
        Tolerances as in ``scipy.optimize.least_squares`` (see the module docstring).
    lambda0 : float
        Initial damping, relative to the scaled diagonal.
    block_size : int
        Voxels solved together (bounds the memory of the ``(n, M, P)`` Jacobian).
    bound_approach : float in (0, 1]
        A step component that would cross a bound moves that parameter this fraction of its
        distance to the bound (1: onto the bound), unless it is already within 1e-3 of the
        bound range from it, when it lands on the bound. Values below 1 keep poorly determined
        parameters from being pushed onto a bound by an early, long Gauss-Newton step (the
        step-back of trust-region-reflective methods, Branch, Coleman & Li, SIAM J Sci Comput
        1999, 21:1, serves the same end; from memory).

    Returns
    -------
    LsqResult

    Examples
    --------
    >>> import numpy as np
    >>> x = np.linspace(0, 1, 20)
    >>> y = np.stack([2 * np.exp(-3 * x), 1 * np.exp(-1 * x)])
    >>> res = least_squares_batch(
    ...     lambda p, i: p[:, :1] * np.exp(-p[:, 1:] * x) - y[i], np.ones((2, 2)))
    >>> np.round(res.params, 6).tolist()
    [[2.0, 3.0], [1.0, 1.0]]
    """
    p0 = np.asarray(p0, dtype=np.float64)
    if p0.ndim != 2:
        raise ValueError(f"p0 must be shaped (V, P), got shape {p0.shape}")
    if max_iter < 1:
        raise ValueError(f"max_iter must be at least 1, got {max_iter}")
    if block_size < 1:
        raise ValueError(f"block_size must be at least 1, got {block_size}")
    if not 0.0 < bound_approach <= 1.0:
        raise ValueError(f"bound_approach must lie in (0, 1], got {bound_approach}")
    lo, hi = _check_bounds(p0, lower, upper)
    n_vox, n_par = p0.shape
    params = np.full((n_vox, n_par), np.nan)
    cost = np.full(n_vox, np.nan)
    rms = np.full(n_vox, np.nan)
    iters = np.zeros(n_vox, dtype=np.int64)
    status = np.full(n_vox, STATUS_INVALID, dtype=np.int64)
    for start in range(0, n_vox, block_size):  # blocks of voxels, to bound memory
        idx = np.arange(start, min(start + block_size, n_vox))
        out = _solve_block(
            fun, jac, p0[idx], idx, lo, hi, max_iter, ftol, xtol, gtol, lambda0, bound_approach
        )
        params[idx], cost[idx], rms[idx], iters[idx], status[idx] = out
    finite = np.isfinite(params)
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    tol = 1e-10 * np.maximum(span, 1.0)
    at_bound = finite & ((params - lo <= tol) | (hi - params <= tol))
    return LsqResult(
        params=params,
        residual_rms=rms,
        cost=cost,
        iterations=iters,
        converged=status > 0,
        status=status,
        at_bound=at_bound,
    )


def _evaluate(fun, jac, p, index, lo, hi, n_res, n_par, eager):
    """Residuals (and, when ``eager``, the Jacobian) at ``p`` for the voxels ``index``."""
    if eager:
        out = fun(p, index)
        if not (isinstance(out, tuple) and len(out) == 2):
            raise ValueError("with jac=True, fun must return a tuple (residuals, jacobian)")
        r, j = out
    else:
        r, j = fun(p, index), None
    r = np.asarray(r, dtype=np.float64)
    if r.ndim != 2 or r.shape[0] != p.shape[0] or (n_res is not None and r.shape[1] != n_res):
        raise ValueError(f"fun must return residuals shaped (n, M), got shape {r.shape}")
    if j is not None:
        _check_jac(j, p.shape[0], r.shape[1], n_par)
    return r, j


def _check_jac(j, n, n_res, n_par):
    if j.shape != (n, n_res, n_par):
        raise ValueError(f"jac must return shape (n, M, P) = {(n, n_res, n_par)}, got {j.shape}")


def _normal_equations(j, r):
    """``J^T J`` (n, P, P) and ``J^T r`` (n, P) for a block of Jacobians (n, M, P)."""
    jt = np.swapaxes(j, 1, 2)
    return jt @ j, (jt @ r[:, :, None])[:, :, 0]


def _solve_block(fun, jac, p0, index, lo, hi, max_iter, ftol, xtol, gtol, lambda0, approach):
    n, n_par = p0.shape
    eager = jac is True
    p = np.clip(p0, lo, hi)
    p[~np.isfinite(p0)] = np.nan
    r, j0 = _evaluate(fun, jac, p, index, lo, hi, None, n_par, eager)
    n_res = r.shape[1]
    valid = np.all(np.isfinite(r), axis=1) & np.all(np.isfinite(p), axis=1)
    cost = 0.5 * np.einsum("vm,vm->v", r, r)
    status = np.where(valid, STATUS_MAXITER, STATUS_INVALID)
    iters = np.zeros(n, dtype=np.int64)
    lam = np.full(n, lambda0)
    nu = np.full(n, 2.0)
    dscale = np.zeros((n, n_par))
    eye = np.eye(n_par)
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    near_tol = 1e-3 * span  # closer than this to a bound, a crossing step lands on the bound

    act = np.flatnonzero(valid)  # active voxels (positions in this block)
    jtj = np.zeros((n, n_par, n_par))
    grad = np.zeros((n, n_par))
    need_jac = np.zeros(n, dtype=bool)
    if eager:
        if act.size:
            jtj[act], grad[act] = _normal_equations(np.asarray(j0, np.float64)[act], r[act])
    else:
        need_jac[act] = True
    del j0
    for _ in range(max_iter):
        if act.size == 0:
            break
        # --- Jacobian and normal equations where the point moved (lazy mode only)
        upd = act[need_jac[act]]
        if upd.size:
            if jac is None:
                j_upd = finite_difference_jacobian(
                    fun, p[upd], index[upd], lower=lo, upper=hi, r0=r[upd]
                )
            else:
                j_upd = np.asarray(jac(p[upd], index[upd]), dtype=np.float64)
            _check_jac(j_upd, upd.size, n_res, n_par)
            jtj[upd], grad[upd] = _normal_equations(j_upd, r[upd])
            need_jac[upd] = False
        dscale[act] = np.maximum(dscale[act], np.einsum("vpp->vp", jtj[act]))

        pa, ga = p[act], grad[act]
        # active set: on a bound with the gradient pointing out of the box
        frozen = ((pa <= lo) & (ga > 0)) | ((pa >= hi) & (ga < 0))
        g_free = np.where(frozen, 0.0, ga)
        done_g = np.max(np.abs(g_free), axis=1) < gtol
        if np.any(done_g):
            status[act[done_g]] = STATUS_GTOL
            keep_g = ~done_g
            act, pa, ga, frozen, g_free = act[keep_g], pa[keep_g], ga[keep_g], frozen[keep_g], g_free[keep_g]
            if act.size == 0:
                break

        n_act = act.size
        ds = dscale[act]
        d = np.maximum(ds, 1e-12 * np.maximum(ds.max(axis=1, keepdims=True), 1.0))
        jtj_a = jtj[act]  # a copy (fancy indexing), kept for the predicted reduction
        a_damped = jtj_a.copy()
        a_damped.reshape(n_act, -1)[:, :: n_par + 1] += lam[act, None] * d
        a = a_damped
        if frozen.any():  # frozen parameters: identity rows and columns, zero step
            keep = (~frozen).astype(np.float64)
            a = a_damped * (keep[:, :, None] * keep[:, None, :])
            a.reshape(n_act, -1)[:, :: n_par + 1] += frozen
        step = _solve(a, -g_free)
        # a step that crosses a bound: hold those parameters (on the bound, or ``approach`` of
        # the way there) and re-solve for the others (a few passes), instead of clipping a
        # correlated step
        fixed = frozen.copy()
        for _pass in range(3):
            trial = pa + step
            crossing = ((trial < lo) | (trial > hi)) & ~fixed
            cz = np.flatnonzero(crossing.any(axis=1))
            if cz.size == 0:
                break
            to_bound = np.clip(trial[cz], lo, hi) - pa[cz]
            if approach < 1.0:
                to_bound = np.where(np.abs(to_bound) > near_tol, approach * to_bound, to_bound)
            dc = np.where(crossing[cz], to_bound, 0.0)
            held = np.where(fixed[cz], step[cz], 0.0) + dc  # steps of all held parameters
            a_c = a_damped[cz]
            rhs = -g_free[cz] - (a_c @ held[:, :, None])[:, :, 0]
            fixed[cz] |= crossing[cz]
            keep = (~fixed[cz]).astype(np.float64)
            a_c *= keep[:, :, None] * keep[:, None, :]
            a_c += fixed[cz][:, :, None] * eye
            rhs = np.where(fixed[cz], held, rhs)
            step[cz] = _solve(a_c, rhs)
        # what still crosses a bound is projected (``approach`` of the way to the bound)
        p_new = np.clip(pa + step, lo, hi)
        if approach < 1.0:
            to_bound = p_new - pa
            cut = (p_new != pa + step) & (np.abs(to_bound) > near_tol)
            p_new = np.where(cut, pa + approach * to_bound, p_new)
        delta = p_new - pa
        r_new, j_new = _evaluate(fun, jac, p_new, index[act], lo, hi, n_res, n_par, eager)
        cost_new = 0.5 * np.einsum("vm,vm->v", r_new, r_new)
        cost_new[~np.isfinite(cost_new)] = np.inf
        # predicted reduction of the linear model: -(g.d + 0.5 d^T JtJ d)
        jd = (jtj_a @ delta[:, :, None])[:, :, 0]
        pred = -(np.einsum("vp,vp->v", ga, delta) + 0.5 * np.einsum("vp,vp->v", delta, jd))
        actual = cost[act] - cost_new
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(pred > 0, actual / pred, -1.0)
        accept = (rho > 0) & (actual > 0)
        iters[act] += 1

        # damping update (Madsen, Nielsen & Tingleff 2004, Alg. 3.16)
        acc, rej = act[accept], act[~accept]
        lam[acc] *= np.maximum(1.0 / 3.0, 1.0 - (2.0 * rho[accept] - 1.0) ** 3)
        nu[acc] = 2.0
        lam[rej] *= nu[rej]
        nu[rej] *= 2.0

        pnorm = np.linalg.norm(pa, axis=1)
        small_step = np.linalg.norm(delta, axis=1) < xtol * (xtol + pnorm)
        small_dcost = accept & (actual < ftol * cost[act])
        p[acc] = p_new[accept]
        r[acc] = r_new[accept]
        cost[acc] = cost_new[accept]
        done_x = small_step
        done_f = small_dcost & ~done_x
        # hopeless damping: nothing more can be gained at this precision
        stuck = ~done_x & ~done_f & (lam[act] > 1e16)
        going = ~(done_x | done_f | stuck)
        if eager:  # normal equations at the accepted points that go on, from the cached Jacobian
            k = accept & going
            if np.any(k):
                jtj[act[k]], grad[act[k]] = _normal_equations(
                    np.asarray(j_new, np.float64)[k], r_new[k]
                )
        else:
            need_jac[acc] = True
        status[act[done_x]] = STATUS_XTOL
        status[act[done_f]] = STATUS_FTOL
        status[act[stuck]] = STATUS_XTOL
        act = act[going]

    p[~valid] = np.nan
    cost[~valid] = np.nan
    rms = np.sqrt(2.0 * cost / n_res)
    return p, cost, rms, iters, status


def _solve(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Batched solve of ``a x = b`` (a: (n, P, P), b: (n, P)); a non-finite step becomes 0."""
    try:
        x = np.linalg.solve(a, b[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        x = _solve_safe(a, b)
    x[~np.isfinite(x)] = 0.0
    return x


def _solve_safe(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Least-squares solve of a batch where some systems are singular (gives a 0-norm-safe step)."""
    out = np.zeros_like(b)
    ok = np.linalg.cond(a) < 1e14
    if np.any(ok):
        out[ok] = np.linalg.solve(a[ok], b[ok][:, :, None])[:, :, 0]
    return out
