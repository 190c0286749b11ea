"""Benchmark of the model-based fits: batched vs per-voxel scipy, and robustness at SNR 30/60/200.

Run: ``python -m tests.bench.bench_fits [--quick]``. Prints figures and ratios measured in the
same run (median of several runs for the batched fits; the per-voxel baseline on a sample of
voxels, its rate extrapolated per voxel).

1. Five-pool Lorentzian: 128 x 128 voxels x 61 offsets (phantom-like spectra from the model
   itself plus Gaussian noise at SNR 60), :func:`quant.lorentz.multi_lorentzian` vs per-voxel
   ``scipy.optimize.curve_fit`` (same model, same bounds, the same per-voxel start values,
   analytic Jacobian); the baseline is timed on a sample of voxels and its rate extrapolated.
2. Bloch-McConnell: 64 x 64 phantom voxels, :func:`quant.bmfit.aptr_star` vs per-voxel
   ``scipy.optimize.least_squares`` on the same fast-path model and bounds.
3. Robustness: the phantom at SNR 30, 60 and 200 (Rician noise), bias and spread of each
   method's map in the lesion and contralateral ROIs against the noise-free fit, with table
   start and with the neighbourhood start (the remedy), and the share of flagged voxels.
"""

from __future__ import annotations

import os

# single-threaded BLAS for both sides of every ratio (set before numpy is imported); the
# batched and the per-voxel fits then use one core each
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import sys  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from scipy.optimize import curve_fit, least_squares  # noqa: E402

from quant import bmfit  # noqa: E402
from quant.bmfit import aptr_star  # noqa: E402
from quant.lorentz import (  # noqa: E402
    POOLS_5,
    _model_and_jac,
    _param_layout,
    initial_params,
    lda,
    multi_lorentzian,
    z_model,
)
from quant.phantom import make_phantom  # noqa: E402
from quant.spectra import normalize  # noqa: E402

TRUE = np.array(
    [1.0, 0.8, 1.5, 0.1, 0.03, 0.8, 3.5, 0.01, 1.5, 2.0, 0.03, 3.0, -3.5, 0.1, 25.0, -2.5]
)


def _median_time(f, runs):
    times, out = [], None
    for _ in range(runs):
        t = time.perf_counter()
        out = f()
        times.append(time.perf_counter() - t)
    return float(np.median(times)), out, times


def _spread(times):
    return f"min {min(times):.2f} s, max {max(times):.2f} s"


def _time_split(f):
    """One more run of ``f`` with the model kernel and the batched solves timed: where the
    batched fit's time goes (the timers cost a few per cent; this run is not in the medians)."""
    from quant import _jit
    from quant import lorentz as lz

    spent = {"kernel": 0.0, "solve": 0.0}
    kernel, solve = lz._residual_normal, _jit.lm_trial

    def timed(name, g):
        def inner(*a, **k):
            t = time.perf_counter()
            try:
                return g(*a, **k)
            finally:
                spent[name] += time.perf_counter() - t
        return inner

    lz._residual_normal, _jit.lm_trial = timed("kernel", kernel), timed("solve", solve)
    try:
        t = time.perf_counter()
        f()
        total = time.perf_counter() - t
    finally:
        lz._residual_normal, _jit.lm_trial = kernel, solve
    rest = total - spent["kernel"] - spent["solve"]
    return (
        f"{total:.2f} s: model kernel (residuals + normal equations) {spent['kernel']:.2f} s "
        f"({spent['kernel'] / total:.0%}), trial steps (damped systems, bounds) {spent['solve']:.2f} s "
        f"({spent['solve'] / total:.0%}), solver bookkeeping and the rest {rest:.2f} s ({rest / total:.0%})"
    )


def bench_lorentz(n_side=128, sample=100, runs=5):
    rng = np.random.default_rng(2024)
    x = np.linspace(-6.0, 6.0, 61)
    v = n_side * n_side
    p = np.tile(TRUE, (v, 1))
    p[:, 4] = rng.uniform(0.01, 0.05, v)
    p[:, 3] = rng.uniform(-0.3, 0.3, v)
    p[:, 1] = rng.uniform(0.7, 0.9, v)
    z = z_model(x, p) + rng.normal(0.0, 1 / 60, (v, x.size))
    zi = z.reshape(n_side, n_side, x.size)

    t_b, res, times_b = _median_time(lambda: multi_lorentzian(zi, x, init="mean"), runs)
    rms_b = res.rms.reshape(-1)

    _, start, lo, hi = _param_layout(POOLS_5)
    # the same start values for the baseline: the batched run's policy (init='mean': a fit of
    # the image-mean spectrum, water line per voxel), computed once; its time counts on the
    # batched side only
    p0 = initial_params(z, x, np.ones(x.size), start, lo, hi, (v,), "mean")

    def f(_x, *q):
        return _model_and_jac(np.array(q)[None], x, False)[0][0]

    def j(_x, *q):
        return np.ascontiguousarray(_model_and_jac(np.array(q)[None], x, True)[1][0])

    idx = rng.choice(v, sample, replace=False)
    rates_s, fails = [], 0
    fitted = np.full((sample, start.size), np.nan)
    nfev = np.full(sample, -1)
    n_rep = max(1, min(runs, 3))
    for _rep in range(n_rep):  # the per-voxel baseline: this loop is what the batched solver replaces
        t = time.perf_counter()
        fails = 0
        for k, i in enumerate(idx):
            try:
                fitted[k], _, info, _, _ = curve_fit(
                    f, x, z[i], p0=p0[i], bounds=(lo, hi), jac=j, full_output=True
                )
                nfev[k] = info["nfev"]
            except RuntimeError:  # its evaluation limit: counted, and its time counts too
                fitted[k] = np.nan
                fails += 1
        rates_s.append(sample / (time.perf_counter() - t))
    rms_s = np.sqrt(np.mean((z_model(x, fitted) - z[idx]) ** 2, axis=1))
    rate_b, rate_s = v / t_b, float(np.median(rates_s))
    rates_b = [v / t for t in times_b]
    ratios = [rb / rs for rb in rates_b for rs in rates_s]
    print(f"== 5-pool Lorentzian, {n_side} x {n_side} voxels x {x.size} offsets, SNR 60")
    print(f"  batched LM      : {rate_b:9.0f} voxels/s  ({t_b:.2f} s, median of {runs}; {_spread(times_b)})")
    print(
        f"  curve_fit/voxel : {rate_s:9.1f} voxels/s  (median of {n_rep} passes over a sample of "
        f"{sample} voxels, rate extrapolated per voxel; {fails} hit curve_fit's evaluation limit; "
        f"{min(rates_s):.1f}-{max(rates_s):.1f} voxels/s)"
    )
    print(f"  ratio           : {rate_b / rate_s:9.1f} x  (of the medians; {min(ratios):.1f}-{max(ratios):.1f} x over all pairs)")
    print(f"  batched time split, one more run: {_time_split(lambda: multi_lorentzian(zi, x, init='mean'))}")
    print("  start values    : both sides the same per voxel (init='mean'), same model, bounds, analytic Jacobian")
    ok = np.isfinite(rms_s)
    d = rms_b[idx][ok] - rms_s[ok]
    print(
        f"  median residual RMS on the sample: batched {np.median(rms_b[idx][ok]):.6f}, "
        f"curve_fit {np.median(rms_s[ok]):.6f} ({ok.sum()} voxels where curve_fit returned); "
        f"whole image batched {np.median(rms_b):.6f}"
    )
    print(
        f"  per voxel: batched lower by > 1e-5 in {np.sum(d < -1e-5)}, higher by > 1e-5 in "
        f"{np.sum(d > 1e-5)}, within 1e-5 in {np.sum(np.abs(d) <= 1e-5)}"
    )
    it_b = res.iterations.reshape(-1)
    print(
        f"  batched converged {res.converged.mean():.3f}; model evaluations per voxel (one per "
        f"LM step, each with its normal equations): median {np.median(it_b):.0f}, mean "
        f"{it_b.mean():.1f}, on the sample median {np.median(it_b[idx]):.0f}, mean {it_b[idx].mean():.1f}"
    )
    ev = nfev[nfev >= 0]
    print(
        f"  curve_fit ('trf', its default ftol/xtol/gtol 1e-8) on the sample: function evaluations "
        f"median {np.median(ev):.0f}, mean {ev.mean():.1f} (a Jacobian at each accepted one)"
    )
    # the slow tail, voxel by voxel: are the voxels that take the batched solver long also the
    # ones curve_fit takes long on (a hard problem), or the batched damping's own (common practice)
    got = nfev >= 0
    tail = (it_b[idx] > 40) & got
    rest = (it_b[idx] <= 40) & got
    if tail.any() and rest.any():
        print(
            f"  slow tail on the sample: {tail.sum()} voxels take the batched solver > 40 steps; "
            f"curve_fit's evaluations on them median {np.median(nfev[tail]):.0f}, mean "
            f"{nfev[tail].mean():.1f} (on the other {rest.sum()}: median {np.median(nfev[rest]):.0f}, "
            f"mean {nfev[rest].mean():.1f})"
        )
    print(
        f"  per-voxel residual RMS difference batched - curve_fit: median {np.median(d):+.2e}, "
        f"mean {d.mean():+.2e}"
    )


def bench_bm(n_side=64, sample=60, runs=3):
    ph = make_phantom(slices=1, size=n_side, snr=60, dtype=np.float64, seed=3)
    sp = normalize(ph.signal, ph.offsets_ppm)
    x = sp.offsets_ppm
    z = sp.z[0]
    brain = ph.brain[0]
    zb = np.where(brain[..., None], z, np.nan)  # background voxels are NaN (not fitted)
    prot = dict(b1_ut=ph.b1_ut, tsat_s=ph.tsat_s, field_t=ph.field_t)
    t_b, res, times_b = _median_time(lambda: aptr_star(zb, x, **prot), runs)
    n_fit = int(brain.sum())

    zs = z[brain]
    rng = np.random.default_rng(5)
    idx = rng.choice(zs.shape[0], sample, replace=False)
    w_per_ppm = 2 * np.pi * bmfit.GAMMA_HZ_PER_T * ph.field_t * 1e-6
    offs_rad = x * w_per_ppm
    w1 = float(bmfit.b1_to_rad_s(ph.b1_ut))
    lo, hi, st = bmfit._LOWER, bmfit._UPPER, bmfit._START
    near = np.abs(x) <= 1.0
    fitted = []
    t = time.perf_counter()
    for i in idx:  # per-voxel least_squares on the same model, bounds and start rule
        p0 = st.copy()
        p0[1] = x[near][np.argmin(zs[i, near])]

        def fun(q, i=i):
            return bmfit._fast_z_core(q[None], offs_rad, w1, ph.tsat_s, None, w_per_ppm)[0] - zs[i]

        fitted.append(least_squares(fun, p0, bounds=(lo, hi)).x)
    t_s = time.perf_counter() - t
    model = bmfit._fast_z_core(np.array(fitted), offs_rad, w1, ph.tsat_s, None, w_per_ppm)
    rms_s = np.sqrt(np.mean((model - zs[idx]) ** 2, axis=1))
    rms_b = res.rms[brain]
    rate_b, rate_s = n_fit / t_b, sample / t_s
    print(f"== Bloch-McConnell (fast path), {n_side} x {n_side} phantom slice, {n_fit} brain voxels, SNR 60")
    print(f"  batched LM            : {rate_b:9.0f} voxels/s  ({t_b:.2f} s, median of {runs}; {_spread(times_b)})")
    print(f"  least_squares/voxel   : {rate_s:9.1f} voxels/s  ({sample} voxels)")
    print(f"  ratio                 : {rate_b / rate_s:9.1f} x")
    print(
        f"  median residual RMS on the sample: batched {np.median(rms_b[idx]):.6f}, "
        f"least_squares {np.median(rms_s):.6f}"
    )
    print(f"  batched converged {res.converged[brain].mean():.3f}")


def bench_fast_path_error():
    from quant.bloch import cw_z
    from quant.phantom import _TISSUE, _tissue_for, amide_exchange_rate

    x = np.linspace(-5.9, 5.9, 60)
    classes = [(2, 7.1), (3, 7.1), (2, 6.5), (3, 6.5)]
    rows = []
    for label, ph in classes:
        t1, t2, _pd, fa, fam, fn, fm, _t2m = _TISSUE[label]
        rows.append([1.0, 0.0, 1 / t2, fa * amide_exchange_rate(ph), fam * 1000.0, fn * 15.0, fm, 1 / t1])
    exact = cw_z(_tissue_for(classes), x, field_t=3.0, b1_ut=1.0, tsat_s=2.0)
    fast = bmfit.fast_z(x, np.array(rows), field_t=3.0, b1_ut=1.0, tsat_s=2.0)
    err = np.abs(fast - exact)
    print("== fast path vs exact simulator (GM/WM at pH 7.1 and 6.5; 3 T, 1 uT, 2 s CW)")
    print(f"  max |dZ| = {err.max():.4f}, mean |dZ| = {err.mean():.4f}, stated bound {bmfit.FAST_PATH_ERROR}")


def bench_robustness(size=48, snrs=(30, 60, 200)):
    print(f"== robustness on the phantom ({size} x {size}, 1 slice, Rician noise)")
    print("  method            init           SNR  lesion bias  lesion sd  contra bias  contra sd  flagged  contrast")
    ref = {}
    clean = make_phantom(slices=1, size=size, snr=np.inf, dtype=np.float64)
    tissue = (clean.labels == 2) | (clean.labels == 3)
    prot = dict(b1_ut=clean.b1_ut, tsat_s=clean.tsat_s, field_t=clean.field_t)
    methods = {
        "multi_lorentzian": lambda z, x, init: multi_lorentzian(z, x, init=init),
        "lda": lambda z, x, init: lda(z, x, init=init),
        "aptr_star": lambda z, x, init: aptr_star(z, x, init=init, **prot),
    }

    def run(ph, name, init):
        sp = normalize(ph.signal, ph.offsets_ppm)
        z = np.where(tissue[..., None], sp.z, np.nan)
        r = methods[name](z[0], sp.offsets_ppm, init)
        return r.map, r.flags

    for name in methods:
        ref[name], _ = run(clean, name, "table")
    for name in methods:
        for init in ("table", "neighbourhood"):
            for snr in snrs:
                ph = make_phantom(slices=1, size=size, snr=snr, dtype=np.float64, seed=int(snr))
                m, flags = run(ph, name, init)
                row = []
                for roi in (ph.lesion[0], ph.contralateral[0]):
                    d = m[roi] - ref[name][roi]
                    row += [np.nanmean(d), np.nanstd(d)]
                flagged = np.mean(flags[tissue[0]] != 0)
                contrast = np.nanmean(m[ph.contralateral[0]]) - np.nanmean(m[ph.lesion[0]])
                print(
                    f"  {name:17s} {init:13s} {snr:4d}  {row[0]:+11.4f}  {row[1]:9.4f}  "
                    f"{row[2]:+11.4f}  {row[3]:9.4f}  {flagged:7.3f}  {contrast:+.4f}"
                )
    for name in methods:
        c = np.nanmean(ref[name][clean.contralateral[0]]) - np.nanmean(ref[name][clean.lesion[0]])
        print(f"  noise-free contrast (contra - lesion) {name}: {c:+.4f}")


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    quick = "--quick" in argv
    bench_fast_path_error()
    bench_lorentz(n_side=32 if quick else 128, sample=10 if quick else 100, runs=1 if quick else 5)
    bench_bm(n_side=32 if quick else 64, sample=10 if quick else 60, runs=1 if quick else 5)
    bench_robustness(size=24 if quick else 48)


if __name__ == "__main__":
    main()
