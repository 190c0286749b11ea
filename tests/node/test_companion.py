"""Companion series of the same study: a separate M0, a WASSR series, a T1 map, a B1 map.

The phantom (quant.phantom) knows its truth: T1 per tissue and the water shift ``b0_ppm``. The
WASSR series is the same phantom simulated by quant.bloch at low saturation power (0.2 uT for
0.5 s), where the Z-spectrum near water is the direct-saturation line alone, centred on the
local shift (Kim et al., Magn Reson Med 2009, 61:1441, from memory).
"""

from __future__ import annotations

import threading
import time
from dataclasses import replace

import numpy as np
import pytest

from node import pipeline
from node.assemble import Assembler
from node.config import (
    CompanionRule,
    ConfigError,
    MatchRule,
    OffsetRule,
    default_config,
    parse_config,
)
from node.receive import Receiver
from node.synth import (
    M0_OFFSET_PPM,
    b1_map_series,
    m0_series,
    series_from_arrays,
    t1_map_series,
    wassr_series,
    write_series,
)
from quant.phantom import make_phantom
from tests.peers import storescu

SLICES, SIZE, SEED = 2, 32, 21
STUDY = "companion"  # the seed string that ties the series of one study together
WASSR_OFFSETS = np.round(np.linspace(-0.8, 0.8, 17), 4)
OFFSET = OffsetRule(tag=(0x0029 << 16) | 0x10, private_creator="CESTNODE SIM 1")


def _rule(kind: str, regex: str, **kw) -> CompanionRule:
    return CompanionRule(kind=kind, match=MatchRule("SeriesDescription", regex), **kw)


RULES = {
    "t1": _rule("t1", "^T1 map", unit="ms", timeout_s=5.0),
    "wassr": _rule("wassr", "^WASSR", offset=OFFSET, timeout_s=5.0),
    "m0": _rule("m0", "^CEST M0", timeout_s=5.0),
    "b1": _rule("b1", "^B1 map", unit="percent", timeout_s=5.0),
}


def _config(*kinds: str, **rules: CompanionRule):
    base = default_config()
    comps = tuple(rules.get(k, RULES[k]) for k in kinds)
    return base.with_overrides(protocols=(replace(base.protocols[0], companions=comps),),
                               release_grace_s=0.3)


@pytest.fixture(scope="module")
def phantom():
    return make_phantom(slices=SLICES, size=SIZE, seed=SEED)


@pytest.fixture(scope="module")
def saturation(phantom):
    return series_from_arrays(phantom.signal, phantom.offsets_ppm, seed=STUDY)


@pytest.fixture(scope="module")
def t1_datasets(phantom):
    return t1_map_series(phantom.t1_s, seed=STUDY)


class _Done:
    def __init__(self) -> None:
        self.cond = threading.Condition()
        self.series: list = []
        self.at: list[float] = []

    def __call__(self, s) -> None:
        with self.cond:
            self.series.append(s)
            self.at.append(time.monotonic())
            self.cond.notify_all()

    def wait(self, timeout: float = 30.0):
        with self.cond:
            assert self.cond.wait_for(lambda: self.series, timeout=timeout)
            return self.series[0]


def _run(cfg, *groups, gap_s: float = 0.0):
    """Add the groups of datasets in order (``gap_s`` between groups) to a live assembler."""
    done = _Done()
    with Assembler(cfg, done) as asm:
        for i, group in enumerate(groups):
            if i and gap_s:
                time.sleep(gap_s)
            for ds in group:
                asm.add(ds)
        series = done.wait()
    return series, done


# --------------------------------------------------------------------------- config
@pytest.mark.parametrize("comp, message", [
    ({"kind": "t2"}, r"companions\[0\]\.kind: expected one of m0, wassr, t1, b1"),
    ({"kind": "wassr"}, r"companions\[0\]\.offset: required for kind 'wassr'"),
    ({"kind": "t1", "unit": "us"}, r"companions\[0\]\.unit: expected 's' or 'ms'"),
    ({"kind": "m0", "unit": "s"}, r"companions\[0\]\.unit: only used with kind 't1' or 'b1'"),
    ({"kind": "t1", "timeout_s": -1}, r"companions\[0\]\.timeout_s: must be >= 0"),
])
def test_bad_companion_rules_are_named(comp, message):
    proto = {"name": "p", "match": {"attribute": "SeriesDescription", "regex": "x"},
             "offset": {"keyword": "ImageComments", "regex": "([-0-9.]+)"},
             "companions": [{"match": {"attribute": "SeriesDescription", "regex": "y"},
                             **comp}]}
    with pytest.raises(ConfigError, match=message):
        parse_config({"protocols": [proto]})


# --------------------------------------------------------------------------- T1
def _check_t1(series, phantom):
    t1 = series.companions["t1"]
    assert t1.unit == "s" and "Real World Value Mapping in ms" in t1.detail
    brain = phantom.brain
    # stored as whole milliseconds: at most 0.5 ms off the truth
    np.testing.assert_allclose(t1.values[brain], phantom.t1_s[brain], atol=5e-4 + 1e-6)
    assert np.isnan(t1.values[~brain]).all()  # stored 0 outside: unknown, never 0 s


def test_t1_companion_before_the_saturation_series(phantom, saturation, t1_datasets):
    series, _ = _run(_config("t1"), t1_datasets, saturation)
    assert series.companion_notes == []
    _check_t1(series, phantom)
    prep = pipeline.prepare_series(series, default_config().protocols[0])
    assert prep.t1_s is not None
    arex = pipeline.compute(prep, "arex")  # needs T1: takes prep.t1_s by default
    assert np.isfinite(arex.values[phantom.brain]).mean() > 0.9


def test_t1_companion_after_the_saturation_series_is_awaited(phantom, saturation, t1_datasets):
    t0 = time.monotonic()
    series, done = _run(_config("t1"), saturation, t1_datasets, gap_s=1.0)
    # the complete saturation series waited for the T1 map that came a second later
    assert done.at[0] - t0 >= 1.0
    _check_t1(series, phantom)


def test_t1_in_seconds_without_mapping_uses_the_rule_unit(phantom, saturation):
    no_map = t1_map_series(phantom.t1_s, seed=STUDY, rwvm=False)  # stored ms, unit unnamed
    rule = _rule("t1", "^T1 map", unit="s", scale=0.001, timeout_s=5.0)
    series, _ = _run(_config("t1", t1=rule), no_map, saturation)
    t1 = series.companions["t1"]
    assert "rule unit s" in t1.detail
    np.testing.assert_allclose(t1.values[phantom.brain], phantom.t1_s[phantom.brain],
                               atol=5e-4 + 1e-6)


def test_missing_companion_times_out_with_a_note(saturation):
    rule = _rule("t1", "^T1 map", timeout_s=0.5)
    t0 = time.monotonic()
    series, done = _run(_config("t1", t1=rule), saturation)
    assert 0.5 <= done.at[0] - t0 < 5.0
    assert series.companions == {}
    assert series.companion_notes == ["t1 companion: none arrived within 0.5 s"]


def test_companion_of_another_matrix_is_left_out_with_the_reason(saturation, phantom):
    small = t1_map_series(phantom.t1_s[:, ::2, ::2], seed=STUDY)
    series, _ = _run(_config("t1"), small, saturation)
    assert "t1" not in series.companions
    assert series.companion_notes == [
        "t1 companion: matrix 16 x 16 differs from the series' 32 x 32 (no resampling)"]


# --------------------------------------------------------------------------- WASSR
@pytest.fixture(scope="module")
def wassr(phantom):
    offs = np.r_[M0_OFFSET_PPM, WASSR_OFFSETS]
    low = make_phantom(slices=SLICES, size=SIZE, seed=SEED + 1, offsets_ppm=offs, b1_ut=0.2,
                       tsat_s=0.5)
    np.testing.assert_array_equal(low.b0_ppm, phantom.b0_ppm)  # same B0 field
    return wassr_series(low.signal, offs, seed=STUDY)


def test_wassr_shift_matches_the_phantom_truth(phantom, saturation, wassr):
    series, _ = _run(_config("wassr"), wassr, saturation)
    w = series.companions["wassr"]
    np.testing.assert_array_equal(w.offsets_ppm, WASSR_OFFSETS)  # M0 frame dropped
    prep = pipeline.prepare_series(series, _config("wassr").protocols[0])
    assert prep.b0_source == "wassr"
    brain = phantom.brain & prep.mask
    err = prep.shift_ppm[brain] - phantom.b0_ppm[brain]
    assert np.isfinite(err).mean() > 0.99
    # tolerance ours: 0.02 ppm (0.1 of the 0.2 ppm sampling step; measured max 0.004 ppm)
    assert np.nanmax(np.abs(err)) < 0.02
    internal = pipeline.prepare(series.signal, series.offsets_ppm)
    assert internal.b0_source == "internal"


# --------------------------------------------------------------------------- M0 and B1
def test_separate_m0_series_replaces_the_series_own(phantom):
    sat = np.abs(phantom.offsets_ppm) < 20
    scale = 30000.0 / float(phantom.signal.max())
    without_m0 = series_from_arrays(phantom.signal[..., sat], phantom.offsets_ppm[sat],
                                    seed=STUDY, scale=scale)
    m0 = m0_series(phantom.signal[..., ~sat][..., 0], seed=STUDY, scale=scale)
    series, _ = _run(_config("m0"), without_m0, m0)
    assert not (np.abs(series.offsets_ppm) >= 20).any()
    prep = pipeline.prepare_series(series, _config("m0").protocols[0])
    assert prep.m0_source == "companion"
    full, _ = _run(default_config().with_overrides(release_grace_s=0.3),
                   series_from_arrays(phantom.signal, phantom.offsets_ppm, seed="m0-ref",
                                      scale=scale))
    ref = pipeline.prepare(full.signal, full.offsets_ppm)
    np.testing.assert_array_equal(prep.mask, ref.mask)
    np.testing.assert_allclose(prep.z_uncorrected, ref.z_uncorrected, equal_nan=True)


def test_b1_map_flags_voxels_off_nominal(phantom, saturation):
    b1 = np.ones(phantom.m0.shape)
    b1[:, :, : SIZE // 2] = 0.7  # the left half 30 % low
    series, _ = _run(_config("b1"), b1_map_series(b1, seed=STUDY), saturation)
    np.testing.assert_allclose(series.companions["b1"].values, b1, atol=5e-4)
    prep = pipeline.prepare_series(series, _config("b1").protocols[0])
    np.testing.assert_array_equal(prep.b1_outside, prep.mask & (b1 < 0.8))


# --------------------------------------------------------------------------- real peers
@pytest.mark.peers
def test_storescu_sends_the_t1_map_first_then_the_series(tmp_path, phantom, saturation,
                                                         t1_datasets):
    done = _Done()
    cfg = _config("t1").with_overrides(port=0, spool_dir=tmp_path / "spool",
                                       log_dir=tmp_path / "logs", fsync=False)
    t1_files = write_series(t1_datasets, tmp_path / "t1")
    sat_files = write_series(saturation, tmp_path / "sat")
    with Receiver(cfg, done) as rx:
        storescu(rx.port, t1_files)
        storescu(rx.port, sat_files)
        series = done.wait()
    _check_t1(series, phantom)
