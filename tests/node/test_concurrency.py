"""Concurrency: four DCMTK storescu processes send four different series at once while a fifth
sends two series interleaved (files of both in one call, alternating). Every series is
processed, holds exactly its own instances, and its maps equal those of the series processed
alone offline (so no frame landed in another series). Each series is a phantom of its own
seed, so a stray frame would change a map."""

from __future__ import annotations

import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from node.config import load_config
from node.service import Node, SeriesOutcome
from tests.node.test_recovery import make_series, offline_maps, write_config
from tests.peers import StoreSCP, storescu

pytestmark = pytest.mark.peers

SLICES, SIZE = 2, 32


def test_five_scanners_at_once(tmp_path):
    series = [make_series(tmp_path, f"conc-{i}", slices=SLICES, size=SIZE, phantom_seed=10 + i)
              for i in range(6)]
    a, b = series[4][0], series[5][0]
    interleaved = [f for pair in zip(a, b, strict=True) for f in pair]
    calls = [s[0] for s in series[:4]] + [interleaved]
    cond = threading.Condition()
    outcomes: dict[str, SeriesOutcome] = {}

    def on_outcome(o: SeriesOutcome) -> None:
        with cond:
            outcomes[o.key] = o
            cond.notify_all()

    with StoreSCP(tmp_path / "archive") as scp:
        cfg_path = write_config(tmp_path / "node" / "node.toml", dest_port=scp.port,
                                dest_ae=scp.ae_title, methods=["mtr_asym", "apt_star"],
                                outputs=("parametric_map",))
        cfg = load_config(cfg_path)
        with Node(cfg, on_outcome=on_outcome, keep_maps=True) as node, \
                ThreadPoolExecutor(max_workers=len(calls)) as pool:
            for res in pool.map(lambda files: storescu(node.port, files), calls):
                assert res.returncode == 0
            with cond:
                assert cond.wait_for(lambda: len(outcomes) == len(series), timeout=60), (
                    f"{len(outcomes)} of {len(series)} series processed")
        # one Parametric Map per method and series reached the archive
        assert len(scp.wait_for(2 * len(series))) == 2 * len(series)
    for files, _uid, key in series:
        o = outcomes[key]
        assert o.ok, o.error
        assert o.record["instances"] == len(files) and o.record["complete"]
        truth = offline_maps(cfg_path, files)
        for method in ("mtr_asym", "apt_star"):
            np.testing.assert_array_equal(o.maps[method], truth[method])
    # the six series differ (their phantoms do), so equality above is not trivial
    maps = [outcomes[k].maps["mtr_asym"] for _f, _u, k in series]
    assert all(not np.array_equal(maps[0], m, equal_nan=True) for m in maps[1:])
