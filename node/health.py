"""``cest-node health``: is this node ready for a scan, and are its numbers right on this machine?

Checks, each a :class:`Check` (ok or not, a one-line detail, figures):

``spool_space``
    Free space of the spool's file system against ``node.min_free_mb``.
``spool_index``
    ``PRAGMA integrity_check`` of the spool's SQLite index (read-only), which must say ``ok``
    (SQLite documentation, "PRAGMA integrity_check").
``echo:AE@HOST:PORT``
    C-ECHO (PS3.4 Annex A) to every destination.
``latency``
    The last series' figures from the latency log (informational: never fails, except for an
    unreadable log).
``selftest:*``
    The numeric self-test (:func:`self_test`): the synthetic phantom through the node's own
    pipeline (:func:`node.pipeline.prepare`, :func:`node.pipeline.compute`), each measure
    compared with its value computed here by a separate route.

``serve`` runs :func:`self_test` before it listens and refuses to start when it fails.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from node.config import NodeConfig

__all__ = ["SELF_TEST_TOLERANCE", "Check", "format_report", "run_health", "self_test"]

#: Largest |node - expected| accepted per measure in grey and white matter, in the measure's
#: unit (%, %/s; ppm for the B0 shift). Measured on this machine (numpy 2, scipy 1.1x): 0.028 %,
#: 0.004 %, 0.052 %/s, 0.026 %/s and 0.0035 ppm; the tolerances are 2-4 times those, and 20 to
#: 30 times smaller than the phantom's lesion contrast (about 1 % MTRasym).
SELF_TEST_TOLERANCE = {
    "b0_shift": 0.01,
    "mtr_asym": 0.1,
    "apt_star": 0.02,
    "arex": 0.15,
    "mtr_asym_t1": 0.1,
}


@dataclass
class Check:
    """One health check: its name, whether it passed, a one-line detail and its figures."""

    name: str
    ok: bool
    detail: str
    figures: dict[str, Any] = field(default_factory=dict)


# --------------------------------------------------------------------------- self-test
def _expected(clean: Any) -> dict[str, np.ndarray]:
    """The measures of a noise-free phantom without B0 shift, read directly from its samples.

    ``Z(x) = S(x) / S(M0)`` at the sampled offsets (no interpolation, no B0 correction), then
    the published formulas written out here, not through quant.measures:
    MTRasym = 100 (Z(-3.5) - Z(+3.5)) (Zhou et al., Nat Med 2003;9:1085);
    APT* = 100 ((Z(2.7) + Z(4.3)) / 2 - Z(3.5)), the chord midway between 2.7 and 4.3 ppm
    (linear baseline, Jin et al., MRM 2013;69:760, from memory);
    AREX = 100 (1/Z(+3.5) - 1/Z(-3.5)) / T1 (Zaiss et al., NMR Biomed 2014;27:240);
    MTRasym/T1 = MTRasym / T1 (Zhou & van Zijl, Prog NMR Spectrosc 2006;48:109).
    """
    off = np.asarray(clean.offsets_ppm, dtype=np.float64)
    s = np.asarray(clean.signal, dtype=np.float64)
    m0 = s[..., int(np.argmin(off))]

    def z(x: float) -> np.ndarray:
        i = int(np.argmin(np.abs(off - x)))
        if abs(off[i] - x) > 1e-6:
            raise ValueError(f"self-test phantom does not sample {x:+.1f} ppm")
        with np.errstate(invalid="ignore", divide="ignore"):
            return s[..., i] / m0

    t1 = np.asarray(clean.t1_s, dtype=np.float64)
    asym = 100.0 * (z(-3.5) - z(3.5))
    with np.errstate(invalid="ignore", divide="ignore"):
        return {
            "mtr_asym": asym,
            "apt_star": 100.0 * ((z(2.7) + z(4.3)) / 2.0 - z(3.5)),
            "arex": 100.0 * (1.0 / z(3.5) - 1.0 / z(-3.5)) / t1,
            "mtr_asym_t1": asym / t1,
        }


def self_test(*, size: int = 32) -> list[Check]:
    """The phantom through the node's pipeline, each measure against its known value.

    The input is the noise-free phantom (``snr=inf``) with its smooth B0 field (up to 0.3 ppm),
    so that normalisation, the B0 estimate and resampling are exercised; the expected values
    come from the same phantom made without B0 shift, read directly at the sampled offsets
    (:func:`_expected`). Compared in grey and white matter (the tissue the measures are for;
    in CSF the water line is too narrow for the 0.2 ppm sampling), within
    :data:`SELF_TEST_TOLERANCE`. The shift estimate is compared with the phantom's truth.
    """
    from node import pipeline
    from quant.phantom import LABEL_GM, LABEL_WM, make_phantom

    t0 = time.perf_counter()
    try:
        shifted = make_phantom(slices=1, size=size, snr=np.inf, seed=0)
        clean = make_phantom(slices=1, size=size, snr=np.inf, b0_max_ppm=0.0, seed=0)
        prep = pipeline.prepare(shifted.signal, shifted.offsets_ppm)
        expected = _expected(clean)
    except Exception as exc:  # a broken numeric stack shows here
        return [Check("selftest:prepare", False, f"{type(exc).__name__}: {exc}")]
    tissue = (shifted.labels == LABEL_GM) | (shifted.labels == LABEL_WM)
    checks = []
    err = np.abs(prep.shift_ppm - shifted.b0_ppm)[tissue]
    tol = SELF_TEST_TOLERANCE["b0_shift"]
    worst = float(np.max(err)) if np.all(np.isfinite(err)) else float("nan")
    checks.append(Check("selftest:b0_shift", bool(worst <= tol),
                        f"max |estimate - truth| {worst:.4f} ppm (tolerance {tol} ppm)",
                        {"max_error": worst, "tolerance": tol}))
    for name, exp in expected.items():
        tol = SELF_TEST_TOLERANCE[name]
        try:
            got = pipeline.compute(prep, name, t1_s=shifted.t1_s).values
        except Exception as exc:
            checks.append(Check(f"selftest:{name}", False, f"{type(exc).__name__}: {exc}"))
            continue
        d = np.abs(got.astype(np.float64) - exp)[tissue]
        worst = float(np.max(d)) if np.all(np.isfinite(d)) else float("nan")
        mean_exp = float(np.mean(exp[tissue]))
        checks.append(Check(
            f"selftest:{name}", bool(worst <= tol),
            f"max |node - expected| {worst:.4f} over {d.size} voxels, expected mean "
            f"{mean_exp:.3f} (tolerance {tol})",
            {"max_error": worst, "tolerance": tol, "voxels": int(d.size),
             "expected_mean": mean_exp}))
    seconds = time.perf_counter() - t0
    for c in checks:
        c.figures["seconds"] = round(seconds, 3)
    return checks


# --------------------------------------------------------------------------- the others
def _spool_space(cfg: NodeConfig) -> Check:
    where = Path(cfg.spool_dir)
    probe = where
    while not probe.exists() and probe != probe.parent:
        probe = probe.parent
    free_mb = shutil.disk_usage(probe).free / 2**20
    need = float(getattr(cfg, "min_free_mb", 0.0))
    note = "" if where.exists() else " (spool not created yet)"
    return Check("spool_space", free_mb >= need,
                 f"{free_mb:,.0f} MiB free at {where}{note}, need {need:,.0f} MiB",
                 {"free_mb": round(free_mb, 1), "min_free_mb": need})


def _spool_index(cfg: NodeConfig) -> Check:
    path = Path(cfg.spool_dir) / "index.sqlite"
    if not path.exists():
        return Check("spool_index", True, f"no index yet at {path} (created on first start)")
    try:
        db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=5.0)
        try:
            rows = [r[0] for r in db.execute("PRAGMA integrity_check")]
        finally:
            db.close()
    except sqlite3.Error as exc:
        return Check("spool_index", False, f"{path}: {exc}")
    ok = rows == ["ok"]
    return Check("spool_index", ok, f"integrity_check: {'ok' if ok else '; '.join(rows[:3])}",
                 {"result": rows[:10]})


def _echo(cfg: NodeConfig, timeout_s: float) -> list[Check]:
    from node.send import echo

    if not cfg.destinations:
        return [Check("echo", True, "no destination configured")]
    out = []
    for d in cfg.destinations:
        res = echo(d.ae_title, d.host, d.port, calling_ae=cfg.ae_title, timeout_s=timeout_s)
        out.append(Check(f"echo:{d}", bool(res.ok), f"{res.detail} in {res.elapsed_ms:.0f} ms",
                         {"status": res.status, "elapsed_ms": round(res.elapsed_ms, 1)}))
    return out


def _tail_lines(path: Path, *, max_bytes: int = 256 * 1024) -> list[str]:
    with open(path, "rb") as f:
        f.seek(0, 2)
        size = f.tell()
        f.seek(max(0, size - max_bytes))
        data = f.read().decode("utf-8", errors="replace")
    lines = data.splitlines()
    return lines[1:] if size > max_bytes else lines


def _latency(cfg: NodeConfig) -> Check:
    from node.timing import LATENCY_FILE

    path = Path(cfg.log_dir) / LATENCY_FILE
    if not path.exists():
        return Check("latency", True, f"no latency log yet at {path}")
    try:
        records = [json.loads(ln) for ln in _tail_lines(path) if ln.strip().startswith("{")]
    except (OSError, ValueError) as exc:
        return Check("latency", False, f"{path}: unreadable ({exc})")
    timed = [r for r in records if r.get("pass") != "deferred" and r.get("total_ms") is not None]
    if not timed:
        return Check("latency", True, "no timed series in the latency log yet")
    last = timed[-1]
    recent = timed[-20:]
    missed = sum(1 for r in recent if r.get("budget_met") is False)
    figures = {k: last.get(k) for k in ("series", "logged_at", "primary_ms", "total_ms",
                                        "budget_s", "budget_met")}
    figures["budget_missed_of_last"] = [missed, len(recent)]
    return Check("latency", True,
                 f"last series {last.get('series')}: primary {last.get('primary_ms')} ms, total "
                 f"{last.get('total_ms')} ms (budget {last.get('budget_s')} s); budget missed "
                 f"{missed} of the last {len(recent)}", figures)


def run_health(config: NodeConfig, *, echo_timeout_s: float = 5.0,
               numeric: bool = True) -> list[Check]:
    """Every health check for ``config``; see the module docstring."""
    checks = [_spool_space(config), _spool_index(config)]
    checks += _echo(config, echo_timeout_s)
    checks.append(_latency(config))
    if numeric:
        checks += self_test()
    return checks


def format_report(checks: Sequence[Check]) -> str:
    """One line per check (``ok`` / ``FAIL``), then the verdict."""
    width = max((len(c.name) for c in checks), default=0)
    lines = [f"{'ok  ' if c.ok else 'FAIL'}  {c.name.ljust(width)}  {c.detail}" for c in checks]
    failed = sum(not c.ok for c in checks)
    lines.append("healthy" if not failed else f"UNHEALTHY: {failed} of {len(checks)} checks failed")
    return "\n".join(lines)
