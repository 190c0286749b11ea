"""The distributed engine on a real dask.distributed LocalCluster of two worker processes.

The maps must equal the single-machine run's exactly (same code on the same voxels, in the same
chunks), the work must reach both workers, and the scanner-side serve path must never import
dask.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from node.config import default_config
from node.retro import assemble
from node.service import Processor
from node.synth import series_from_arrays
from quant.phantom import make_phantom

distributed = pytest.importorskip("distributed")

METHODS = ("mtr_asym", "apt_star", "lda", "multi_lorentzian")


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       dashboard_address=":0")
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("dask")
    base = default_config(base_dir=tmp)
    proto = base.protocols[0]
    cfg = base.with_overrides(spool_dir=tmp / "spool", log_dir=tmp / "logs", fsync=False,
                              protocols=(type(proto)(**{**proto.__dict__, "methods": METHODS,
                                                        "budget_s": 600.0}),))
    datasets = []
    for seed in (1, 2):
        ph = make_phantom(slices=1, size=24, seed=seed)
        datasets += series_from_arrays(ph.signal, ph.offsets_ppm, seed=f"dask-{seed}")
    series = assemble(cfg, datasets)
    assert len(series) == 2
    return cfg, series


@pytest.fixture(scope="module")
def local(setup):
    """The single-machine run: both passes of the node's Processor, maps kept."""
    cfg, series = setup
    out = {}
    for s in series:
        p = Processor(cfg, lambda b, c: True, keep_maps=True)
        outcome, job = p.process(s)
        assert job is not None and job.methods == ["lda", "multi_lorentzian"]
        later = p.run_deferred(job)
        out[s.key] = {**outcome.maps, **later.maps}
    return out


@pytest.mark.parametrize("chunk_voxels", [None, 97])
def test_maps_equal_the_single_machine_run(client, setup, local, chunk_voxels):
    # chunk_voxels=None: the single-machine chunks; 97: smaller ones, which must not change a
    # voxel either (each voxel's fit is independent of the others in its chunk)
    from node.distributed import DaskEngine

    cfg, series = setup
    delivered = []
    with distributed.get_task_stream(client) as ts:
        outcomes = DaskEngine(client, cfg, keep_maps=True, chunk_voxels=chunk_voxels)(
            series, lambda batch: delivered.append(batch) or True)
    assert [o.key for o in outcomes] == [s.key for s in series]
    for o in outcomes:
        assert o.ok, o.error
        assert sorted(o.maps) == sorted(METHODS)
        for name in METHODS:
            assert np.array_equal(o.maps[name], local[o.key][name], equal_nan=True), name
            assert np.count_nonzero(np.isfinite(o.maps[name])) > 100
    # every method's objects came back and were delivered here (three kinds per method), and
    # each series' reports (SR, summary page)
    assert sorted({(b.key, b.label) for b in delivered}) == sorted(
        (s.key, m) for s in series for m in [*METHODS, "report"])
    # and each series' deferred report too (as Processor.run_deferred sends it): an SR
    # covering every map, the fits included, in a series of its own
    reports = [b for b in delivered if b.label == "report"]
    assert len(reports) == 2 * len(series)
    for s in series:
        srs = [d for b in reports if b.key == s.key for d in b.datasets
               if d.Modality == "SR"]
        assert len({d.SeriesInstanceUID for d in srs}) == 2
        assert any("incl. deferred" in d.SeriesDescription for d in srs)
    workers = {t["worker"] for t in ts.data}
    assert len(workers) == 2, "the work reached both worker processes"
    if chunk_voxels:
        fits = [t for t in ts.data if "_fit_chunk" in str(t["key"])]
        assert len(fits) >= 2 * 2 * 4  # 2 series x 2 fits x >= 4 chunks of 97 voxels


def test_serve_never_imports_dask():
    code = ("import sys; import node.cli, node.service, node.receive, node.health, node.retro; "
            "node.cli.build_parser(); "
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')); "
            "print(bad); sys.exit(1 if bad else 0)")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr


def test_bad_scheduler_address():
    from node.distributed import DaskEngine, connect

    with pytest.raises(ValueError, match="expected a scheduler address"):
        connect("nowhere")
    with pytest.raises(ValueError, match="chunk_voxels must be positive"):
        DaskEngine(None, default_config(), chunk_voxels=-1)
