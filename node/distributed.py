"""The distributed engine for ``cest-node process --dask``: series and fit chunks on a Dask cluster.

Two levels of work are spread over a ``dask.distributed`` cluster:

1. **series**: the budget-bound (model-free) pass of every series runs on a worker, through the
   node's own :class:`~node.service.Processor` (normalise, B0, the model-free measures and the
   derived objects built there); the objects come back to this process, which stores them.
2. **voxel chunks** of the model-based fits (``lda``, ``multi_lorentzian``, ``aptr_star``):
   the deferred pass is cut into the same chunks of brain voxels as on one machine
   (:attr:`Processor.CHUNK_VOXELS`), and every chunk of every series is a task; each task runs
   :func:`node.pipeline.compute` on its chunk. The maps are put together here and the objects
   built by the processor as usual.

Because every task runs the same code on the same voxels, in the same chunks, the maps equal
those of the single-machine run bit for bit (the test compares them). ``serve`` never imports
this module, and this module is the only one that imports dask (an optional extra:
``pip install 'cest-node[dask]'``).

Workers must have cest-node installed at the same version (the tasks are functions of
:mod:`node.distributed`, pickled by reference).
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

import numpy as np

from node import pipeline
from node.config import NodeConfig
from node.service import DeferredJob, Processor, SeriesOutcome, parametric_map_of
from node.timing import SeriesClock
from node.types import AssembledSeries, OutputBatch

__all__ = ["DaskEngine", "connect"]

log = logging.getLogger("cest_node.distributed")


def connect(address: str, *, n_workers: int | None = None) -> Any:
    """A ``distributed.Client``: to the scheduler at ``address``, or a LocalCluster for 'local'.

    The local cluster has worker processes with one thread each (numpy releases the GIL only
    in parts of a fit, so processes scale better than threads), ``n_workers`` of them (default:
    the CPU count), and its HTTP endpoint on a port the OS picks (``":0"``: ``None`` still
    binds the default 8787, so two clusters on one machine would collide).
    """
    try:
        from distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - the optional extra is missing
        raise ValueError("--dask needs the optional dependency: pip install 'cest-node[dask]'") from None
    if address == "local":
        cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                               dashboard_address=":0")
        return Client(cluster)
    if "://" not in address and ":" not in address:
        raise ValueError(f"--dask: expected a scheduler address like tcp://HOST:8786 or 'local', "
                         f"got {address!r}")
    return Client(address, timeout="20s")


# --------------------------------------------------------------------------- worker tasks
def _encode(datasets: Sequence[Any]) -> list[bytes]:
    """PS3.10 bytes of each object (highdicom objects hold an SQLite handle that cannot travel)."""
    from io import BytesIO

    out = []
    for ds in datasets:
        buf = BytesIO()
        ds.save_as(buf, enforce_file_format=True)
        out.append(buf.getvalue())
    return out


def _decode(blobs: Sequence[bytes]) -> list[Any]:
    from io import BytesIO

    from pydicom import dcmread

    return [dcmread(BytesIO(b)) for b in blobs]


def _collect_pass(config: NodeConfig, series: AssembledSeries, keep_maps: bool
                  ) -> tuple[SeriesOutcome, list[tuple[str, str, list[bytes]]], DeferredJob | None]:
    """On a worker: the budget-bound pass of one series; its batches come back as bytes."""
    batches: list[tuple[str, str, list[bytes]]] = []

    def collect(batch: OutputBatch, clock: SeriesClock) -> bool:
        batches.append((batch.key, batch.label, _encode(batch.datasets)))
        return True

    outcome, job = Processor(config, collect, keep_maps=keep_maps).process(series)
    return outcome, batches, job


def _fit_chunk(name: str, z: np.ndarray, z_uncorrected: np.ndarray | None,
               offsets_ppm: np.ndarray, t1_s: np.ndarray | None,
               saturation: dict[str, float]) -> np.ndarray:
    """On a worker: one method on one chunk of voxels ``(n, n_offsets)``, via the pipeline."""
    chunk = pipeline.Prepared.of_voxels(z, offsets_ppm, z_uncorrected=z_uncorrected,
                                        saturation=saturation)
    return pipeline.compute(chunk, name, t1_s=t1_s).values


class DaskEngine:
    """Process assembled series on a Dask cluster; a drop-in for :func:`node.retro.local_engine`.

    Parameters
    ----------
    client
        A ``distributed.Client`` (see :func:`connect`).
    config
        The node config (protocols).
    keep_maps
        Keep every computed map in the outcomes (the tests compare them).
    chunk_voxels
        Voxels per fit task (default: the single-machine deferred pass's chunk).

    Calling it, ``engine(series, deliver) -> [SeriesOutcome]``, delivers every batch through
    ``deliver(batch) -> ok`` in this process.
    """

    def __init__(self, client: Any, config: NodeConfig, *, keep_maps: bool = False,
                 chunk_voxels: int | None = None):
        self.client = client
        self.config = config
        self.keep_maps = keep_maps
        self.chunk_voxels = int(chunk_voxels or Processor.CHUNK_VOXELS)
        if self.chunk_voxels < 1:
            raise ValueError(f"chunk_voxels must be positive, got {chunk_voxels}")

    def __call__(self, series: Sequence[AssembledSeries],
                 deliver: Callable[[OutputBatch], bool]) -> list[SeriesOutcome]:
        from distributed import as_completed

        # a series' clock marks are this machine's wall-clock times, which a worker's clock
        # need not agree with; offline work has no scanner waiting: the budget starts there
        sent = [replace(s, clock={}) for s in series]
        # the config is small: it travels with each task (a scattered copy shares one key
        # across runs, and a run's release of it can race the next run's use)
        futures = {self.client.submit(_collect_pass, self.config, s, self.keep_maps, pure=False): i
                   for i, s in enumerate(sent)}
        outcomes: list[SeriesOutcome | None] = [None] * len(sent)
        jobs: list[tuple[int, DeferredJob]] = []
        for fut in as_completed(list(futures)):
            i = futures[fut]
            outcome, batches, job = fut.result()
            for key, label, blobs in batches:
                batch = OutputBatch(key, _decode(blobs), label=label)
                if not deliver(batch):
                    outcome.ok = False
                    outcome.error = outcome.error or f"{batch.label}: not every object was stored"
            outcomes[i] = outcome
            if job is not None:
                jobs.append((i, job))
        self._deferred(jobs, outcomes, deliver)
        return [o for o in outcomes if o is not None]

    def _deferred(self, jobs: list[tuple[int, DeferredJob]], outcomes: list[SeriesOutcome | None],
                  deliver: Callable[[OutputBatch], bool]) -> None:
        """Every chunk of every model-based method of every series as one task each."""
        tasks: dict[Any, tuple[int, str, np.ndarray]] = {}
        for i, job in jobs:
            prep = job.prep
            idx = prep.index
            flat, flat_u = prep.zv, prep.zv_uncorrected
            for name in job.methods:
                for start in range(0, idx.size, self.chunk_voxels):
                    part = slice(start, start + self.chunk_voxels)
                    fut = self.client.submit(
                        _fit_chunk, name, flat[part], None if flat_u is None else flat_u[part],
                        prep.offsets_ppm, None, prep.saturation, pure=False)
                    tasks[fut] = (i, name, idx[part])
        results: dict[tuple[int, str], np.ndarray] = {}
        for i, job in jobs:
            for name in job.methods:
                results[(i, name)] = np.full(job.prep.mask.size, np.nan, dtype=np.float32)
        failed: dict[tuple[int, str], str] = {}
        for fut, (i, name, sel) in tasks.items():
            try:
                results[(i, name)][sel] = fut.result()
            except Exception as exc:
                failed[(i, name)] = f"{name}: {type(exc).__name__}: {exc}"
        for i, job in jobs:
            outcome = outcomes[i]
            assert outcome is not None
            processor = Processor(self.config, lambda batch, clock: deliver(batch),
                                  keep_maps=self.keep_maps)
            clock = SeriesClock(job.series.key)
            fitted: list[tuple[pipeline.MethodResult, Any]] = []
            for name in job.methods:
                if (i, name) in failed:
                    outcome.ok = False
                    outcome.error = outcome.error or failed[(i, name)]
                    continue
                from quant.registry import METHODS

                info = METHODS[name]
                res = pipeline.MethodResult(
                    name=name, title=info.title, unit_ucum=info.unit_ucum,
                    values=results[(i, name)].reshape(job.prep.mask.shape), seconds=0.0,
                    n_voxels=int(np.count_nonzero(job.prep.mask)))
                # the processor builds and delivers the objects exactly as in its own pass
                built = processor._emit(job.series, job.protocol, job.prep, res, clock, outcome)
                fitted.append((res, parametric_map_of(built)))
            if fitted:  # the deferred pass's own report, as Processor.run_deferred sends it
                figures, reasons = processor._qc(job.prep, job.protocol)
                processor._reports(job.series, job.protocol, job.prep, job.reported + fitted,
                                   figures, reasons, clock, outcome,
                                   deferred=[r.name for r, _ in fitted])
            outcome.ok = outcome.ok and not outcome.error
