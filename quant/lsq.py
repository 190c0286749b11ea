"""Batched Levenberg-Marquardt: many small, independent least-squares problems at once.

Every voxel is its own problem ``min_p 0.5 * ||r(p)||^2`` with the same number of parameters
``P`` and residuals ``M``. The solver keeps the parameters of all voxels in one array ``(V, P)``,
takes the normal equations of all voxels from the model in one call, and makes every voxel's
bounded trial step in one compiled pass over the batch (:func:`quant._jit.lm_trial`: the damped
system solved by Cholesky, by Gaussian elimination with partial pivoting where it is not
positive definite, a zero step where it is singular). Damping, step acceptance
and convergence are per voxel; a converged voxel leaves the active set and costs nothing
afterwards. There is no Python loop over voxels, only over iterations (and over blocks of
voxels, to bound memory).

Algorithm (Levenberg 1944, Marquardt 1963; the damping update and the gain ratio as in
Madsen, Nielsen & Tingleff, "Methods for non-linear least squares problems", 2nd ed., DTU 2004,
Algorithm 3.16, from memory; the scale-invariant damping by the running maximum of the
diagonal of ``J^T J`` as in MINPACK's ``lmder``, Moré 1978, from memory):

* step: ``(J^T J + lambda * D) delta = -J^T r`` with ``D = diag(max_k diag(J_k^T J_k))``;
* gain ratio ``rho = (F(p) - F(p + delta)) / (L(0) - L(delta))`` with the linear model ``L``;
  accepted when ``rho > 0``; then ``lambda *= max(1/3, 1 - (2 rho - 1)^3)`` (or, with
  ``damping='marquardt'``, ``/3`` where ``rho > 3/4`` and ``*2`` where ``rho < 1/4``),
  ``nu = 2``; else ``lambda *= nu``, ``nu *= 2``.

Bounds (box constraints) are handled by **projection with an active set**: a parameter sitting
on a bound whose gradient points out of the box is frozen for that iteration (its step is 0:
its diagonal in the damped normal equations gets ``1e12`` times its own weight, which holds it
to 1e-12 relative while the others see it through their coupling, the reduced system without
re-indexing; its step is then set to exactly 0). A parameter whose step would cross a bound is
held the same way at a prescribed step (onto the bound, or ``bound_approach`` of the way
there) and the others are solved for again, up to three passes; what still crosses is
projected onto the box. The parameters held off a bound in one trial are held from the start
in the next (the crossing set rarely changes between steps, so one solve usually suffices),
each released, and the system solved again without it, where its Lagrange multiplier (the
damped model's gradient there) no longer pulls it towards that bound (the active-set test of
quadratic programming: Nocedal & Wright, Numerical Optimization, 2nd ed. 2006, section 16.5,
from memory). The gain ratio uses the projected
step, so a projected step that does not reduce the cost is rejected like any other. This keeps
the parameters exactly inside the box (no transform, so no flattened Jacobian near a bound)
and lets a fit rest on a bound; ``at_bound`` in the result says where that happened, so the
caller can report it instead of clipping silently.

Convergence (per voxel, the tests of ``scipy.optimize.least_squares``, reference library):
``ftol``: the accepted cost reduction ``dF < ftol * F``; ``xtol``:
``||delta|| < xtol * (xtol + ||p||)``; ``gtol``: the projected gradient's max-norm below ``gtol``.
A voxel that reaches ``max_iter`` without meeting one of them is reported ``converged=False``.

Measured on the 5-pool Lorentzian fit of tests/bench/bench_fits.py and not kept: a batched
Cholesky in numpy (LAPACK factor with vectorised substitution, or a vectorised factorisation
with the voxels last) instead of ``numpy.linalg.solve`` (no faster once the layout changes are
paid; the compiled per-system Cholesky that replaced both is 0.7 against 1.7 us a system),
LAPACK's banded solver on the block-diagonal system (no faster), geodesic acceleration
(Transtrum & Sethna 2012, from memory: 6% fewer steps but a second solve and a second model
pass per step), re-fitting the linear amplitudes at each trial (fewer steps, worse minima),
landing on a bound at a repeated crossing (fewer steps, worse minima), a working set refilled
as voxels finish instead of blocks (1%, within the noise), residuals first and normal equations
only at accepted trials (2%, within the noise).
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
    damping: str = "nielsen",
) -> LsqResult:
    """Fit ``V`` independent least-squares problems at once by Levenberg-Marquardt.

    Parameters
    ----------
    fun : callable
        ``fun(params, index) -> residuals``: ``params`` is ``(n, P)`` float64 for the voxels
        ``index`` (``(n,)`` integers into ``0..V-1``); returns ``(n, M)``.
    p0 : array_like (V, P)
        Start values; projected onto the box first.
    jac : callable, True or 'normal', optional
        ``jac(params, index) -> (n, M, P)``, the Jacobian of the residuals, evaluated after
        each accepted step. ``True``: ``fun`` returns ``(residuals, jacobian)`` at every point
        it is called for (the convention of ``scipy.optimize.minimize(jac=True)``), so a model
        whose Jacobian shares subexpressions with its value is evaluated once per step; the
        Jacobian of a rejected trial point is discarded. ``'normal'``: ``fun`` returns
        ``(residuals (n, M), J^T J (n, P, P), J^T r (n, P))``, so a model can form the normal
        equations chunk by chunk while its Jacobian is in the cache (the solver needs no more);
        ``J^T J`` may be float32 (its products formed in float32), the solver keeps float64.
        Forward finite differences (:func:`finite_difference_jacobian`) when omitted.
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
    damping : {'nielsen', 'marquardt'}
        Update of ``lambda`` after an accepted step with gain ratio ``rho``: ``'nielsen'``
        multiplies it by ``max(1/3, 1 - (2 rho - 1)^3)`` (Madsen, Nielsen & Tingleff 2004,
        Alg. 3.16); ``'marquardt'`` divides it by 3 where ``rho > 3/4``, doubles it where
        ``rho < 1/4`` and keeps it between (the same text, section 3.2, after Marquardt 1963;
        from memory). Either way a rejected step multiplies it by ``nu`` (2, 4, 8, ...).

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
    if damping not in ("nielsen", "marquardt"):
        raise ValueError(f"damping must be 'nielsen' or 'marquardt', got {damping!r}")
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
            fun, jac, p0[idx], idx, lo, hi, max_iter, ftol, xtol, gtol, lambda0, bound_approach,
            damping == "marquardt",
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
    """Residuals and, when ``eager``, the Jacobian (``eager == 'jac'``) or the normal equations
    (``eager == 'normal'``) at ``p`` for the voxels ``index``."""
    if eager:
        out = fun(p, index)
        n_out = 3 if eager == "normal" else 2
        if not (isinstance(out, tuple) and len(out) == n_out):
            what = "(residuals, jtj, jtr)" if eager == "normal" else "(residuals, jacobian)"
            raise ValueError(f"with jac={jac!r}, fun must return a tuple {what}")
        r, extra = out[0], out[1:]
    else:
        r, extra = fun(p, index), None
    r = np.asarray(r, dtype=np.float64)
    if r.ndim != 2 or r.shape[0] != p.shape[0] or (n_res is not None and r.shape[1] != n_res):
        raise ValueError(f"fun must return residuals shaped (n, M), got shape {r.shape}")
    if eager == "jac":
        _check_jac(extra[0], p.shape[0], r.shape[1], n_par)
        extra = _normal_equations(np.asarray(extra[0], np.float64), r)
    elif eager == "normal":
        # J^T J may come in float32 (the solver copies it into float64 where it keeps it)
        jtj = np.asarray(extra[0])
        if jtj.dtype not in (np.float32, np.float64):
            jtj = jtj.astype(np.float64)
        g = np.asarray(extra[1], np.float64)
        if jtj.shape != (p.shape[0], n_par, n_par) or g.shape != (p.shape[0], n_par):
            raise ValueError(
                f"with jac='normal', fun must return jtj shaped {(p.shape[0], n_par, n_par)} and "
                f"jtr shaped {(p.shape[0], n_par)}, got {jtj.shape} and {g.shape}"
            )
        extra = (jtj, g)
    return r, extra


def _check_jac(j, n, n_res, n_par):
    if j.shape != (n, n_res, n_par):
        raise ValueError(f"jac must return shape (n, M, P) = {(n, n_res, n_par)}, got {j.shape}")


def _normal_equations(j, r):
    """``J^T J`` (n, P, P) and ``J^T r`` (n, P) for a block of Jacobians (n, M, P)."""
    jt = np.swapaxes(j, 1, 2)
    return jt @ j, (jt @ r[:, :, None])[:, :, 0]


def _solve_block(
    fun, jac, p0, index, lo, hi, max_iter, ftol, xtol, gtol, lambda0, approach, marquardt
):
    """One block of voxels. The working arrays hold the active voxels only: a voxel that
    finishes is written out and dropped (compaction), so late iterations cost what the few
    remaining voxels cost, without fancy indexing of the whole block at every step."""
    from quant import _jit  # numba, imported on the first fit (about 1 s)

    n, n_par = p0.shape
    eager = "normal" if jac == "normal" else ("jac" if jac is True else None)
    p_out = np.clip(p0, lo, hi)
    p_out[~np.isfinite(p0)] = np.nan
    r, ne0 = _evaluate(fun, jac, p_out, index, lo, hi, None, n_par, eager)
    n_res = r.shape[1]
    valid = np.all(np.isfinite(r), axis=1) & np.all(np.isfinite(p_out), axis=1)
    cost_out = 0.5 * np.einsum("vm,vm->v", r, r)
    status = np.where(valid, STATUS_MAXITER, STATUS_INVALID)
    iters = np.zeros(n, dtype=np.int64)
    span = np.where(np.isfinite(hi - lo), hi - lo, 1.0)
    near_tol = 1e-3 * span  # closer than this to a bound, a crossing step lands on the bound
    stride = n_par + 1  # the diagonal of a C-contiguous (m, P, P) stack seen as (m, P * P)

    # the active set, compacted: position in the block and its state (the residuals are kept
    # only where the Jacobian is formed apart from them)
    pos = np.flatnonzero(valid)
    p = p_out[pos]
    r = None if eager else r[pos]
    cost = cost_out[pos]
    lam = np.full(pos.size, lambda0)
    nu = np.full(pos.size, 2.0)
    if eager:
        # kept in the precision it comes in (float32 halves the memory traffic of the
        # (n, P, P) passes); the systems are solved in float64
        jtj, grad = np.ascontiguousarray(ne0[0][pos]), ne0[1][pos]
    else:
        jtj, grad = _jacobian_normal(fun, jac, p, index[pos], r, lo, hi, n_res, n_par)
        jtj = np.ascontiguousarray(jtj)
    del ne0
    dscale = _diag(jtj, stride).astype(np.float64)
    side = np.zeros(p.shape, np.int8)
    n_it = 0
    while pos.size and n_it < max_iter:
        n_it += 1
        # active set: on a bound with the gradient pointing out of the box
        frozen = ((p <= lo) & (grad > 0)) | ((p >= hi) & (grad < 0))
        g_free = np.where(frozen, 0.0, grad)
        done_g = np.max(np.abs(g_free), axis=1) < gtol
        if done_g.any():
            status[pos[done_g]] = STATUS_GTOL
            keep = ~done_g
            pos, p, r, cost, lam, nu, jtj, grad, dscale, side, frozen, g_free = _finish(
                keep, pos, p_out, cost_out, p, r, cost, lam, nu, jtj, grad, dscale, side,
                frozen, g_free,
            )
            if pos.size == 0:
                break
        # the trial point of every voxel in one compiled pass (quant._jit.lm_trial): the
        # damped step, with each held parameter given a diagonal ``_HOLD`` times its own (its
        # step is then the prescribed value to 1e-12 relative and the others see it through
        # their coupling, the reduced system without re-indexing). Held are the frozen ones
        # (step 0) and, as a prediction, those that crossed a bound in the previous trial
        # (step ``approach`` of the way to that bound): the crossing set rarely changes from
        # one step to the next, so the first solve is usually the final one. A predicted hold
        # is kept while the model still pulls the parameter towards its bound (the sign of its
        # Lagrange multiplier, the gradient of the damped model there). A step that crosses a
        # bound holds those parameters (on the bound, or ``approach`` of the way there) and is
        # solved again for the others (up to three passes), instead of clipping a correlated
        # step; what still crosses is projected (``approach`` of the way to the bound). The
        # next prediction is the set of parameters held off a bound in this trial.
        p_new = np.empty_like(p)
        delta = np.empty_like(p)
        side_new = np.empty_like(side)
        _jit.lm_trial(jtj, grad, g_free, p, lam, dscale, side, frozen, lo, hi, approach,
                      near_tol, _HOLD, p_new, delta, side_new)
        side = side_new
        r_new, ne_new = _evaluate(fun, jac, p_new, index[pos], lo, hi, n_res, n_par, eager)
        cost_new = 0.5 * np.einsum("vm,vm->v", r_new, r_new)
        cost_new[~np.isfinite(cost_new)] = np.inf
        # predicted reduction of the linear model: -(g.d + 0.5 d^T JtJ d)
        pred = np.empty(pos.size)
        _jit.predicted_reduction(jtj, grad, delta, pred)
        actual = cost - cost_new
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(pred > 0, actual / pred, -1.0)
        accept = (rho > 0) & (actual > 0)
        iters[pos] += 1

        # damping update; a rejected step: lambda *= nu, nu *= 2
        if marquardt:  # three zones of the gain ratio (Madsen et al. 2004, section 3.2)
            zone = np.where(rho > 0.75, 1.0 / 3.0, np.where(rho < 0.25, 2.0, 1.0))
            lam = np.where(accept, lam * zone, lam * nu)
        else:  # Madsen et al. 2004, Alg. 3.16
            lam = np.where(accept, lam * np.maximum(1.0 / 3.0, 1.0 - (2.0 * rho - 1.0) ** 3), lam * nu)
        nu = np.where(accept, 2.0, 2.0 * nu)

        pnorm = np.linalg.norm(p, axis=1)
        done_x = np.linalg.norm(delta, axis=1) < xtol * (xtol + pnorm)
        done_f = accept & (actual < ftol * cost) & ~done_x
        np.copyto(p, p_new, where=accept[:, None])
        if r is not None:
            np.copyto(r, r_new, where=accept[:, None])
        cost = np.where(accept, cost_new, cost)
        # hopeless damping: nothing more can be gained at this precision
        stuck = ~done_x & ~done_f & (lam > 1e16)
        going = ~(done_x | done_f | stuck)
        status[pos[done_x | stuck]] = STATUS_XTOL
        status[pos[done_f]] = STATUS_FTOL
        # normal equations at the accepted points that go on
        k = accept & going
        if k.any():
            if eager:  # computed with the trial residuals: copied in place, no gather
                np.copyto(jtj, ne_new[0], where=k[:, None, None])
                np.copyto(grad, ne_new[1], where=k[:, None])
                np.maximum(dscale, _diag(jtj, stride), out=dscale, where=k[:, None])
            else:
                kk = np.flatnonzero(k)
                jtj_k, grad_k = _jacobian_normal(fun, jac, p[kk], index[pos[kk]], r[kk], lo, hi,
                                                 n_res, n_par)
                jtj[kk], grad[kk] = jtj_k, grad_k
                dscale[kk] = np.maximum(dscale[kk], _diag(np.ascontiguousarray(jtj_k), stride))
        del ne_new, r_new
        if not going.all():  # finished voxels: write out, drop from the working arrays
            pos, p, r, cost, lam, nu, jtj, grad, dscale, side = _finish(
                going, pos, p_out, cost_out, p, r, cost, lam, nu, jtj, grad, dscale, side
            )
    p_out[pos] = p  # the iteration limit reached by the rest
    cost_out[pos] = cost
    p_out[~valid] = np.nan
    cost_out[~valid] = np.nan
    rms = np.sqrt(2.0 * cost_out / n_res)
    return p_out, cost_out, rms, iters, status


def _diag(a, stride):
    """The diagonals of a C-contiguous stack ``(m, P, P)`` as a writable view ``(m, P)``."""
    return a.reshape(a.shape[0], a.shape[1] * a.shape[2])[:, ::stride]


def _finish(keep, pos, p_out, cost_out, p, r, cost, *rest):
    """Write out the voxels that are done (``~keep``) and compact the working arrays."""
    done = ~keep
    p_out[pos[done]] = p[done]
    cost_out[pos[done]] = cost[done]
    return (pos[keep], p[keep], None if r is None else r[keep], cost[keep]) + tuple(
        x[keep] for x in rest
    )


#: Diagonal weight that holds a parameter at a prescribed step (relative to its damped diagonal)
_HOLD = 1e12


def _jacobian_normal(fun, jac, p, index, r, lo, hi, n_res, n_par):
    """Normal equations from a separate Jacobian call (finite differences when ``jac`` is None)."""
    if jac is None:
        j = finite_difference_jacobian(fun, p, index, lower=lo, upper=hi, r0=r)
    else:
        j = np.asarray(jac(p, index), dtype=np.float64)
    _check_jac(j, p.shape[0], n_res, n_par)
    return _normal_equations(j, r)
