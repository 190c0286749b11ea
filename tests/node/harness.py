"""A small real node for the robustness tests: a Node with a DCMTK storescp destination.

Shared by tests/node/test_bad_input.py, test_fuzz.py, test_resources.py and test_security.py.
The protocol is cut to one model-free method and one output, so that a good series is
processed in well under a second; everything else (sockets, peers, spool) is the real thing.
"""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from pydicom import Dataset

from node.assemble import Assembler
from node.config import NodeConfig, default_config, parse_config
from node.send import echo
from node.service import Node, SeriesOutcome
from node.synth import series_from_arrays, write_series
from node.types import AssembledSeries, series_key
from quant.phantom import make_phantom
from tests.peers import StoreSCP, storescu

# 12 offsets with the M0 and the +-3.5 ppm pair the primary method needs (ppm)
OFFSETS = [-300.0, -4.0, -3.5, -3.0, -2.0, -1.0, 0.0, 1.0, 2.0, 3.0, 3.5, 4.0]
SLICES, SIZE = 1, 16
FRAMES = SLICES * len(OFFSETS)
SCANNER = "SCANNER1"


def node_config(tmp_path: Path, dest: tuple[str, int] | None = None, *, tls: dict | None = None,
                dest_tls: bool = False, **node: Any) -> NodeConfig:
    """Config of the test node (port 0, spool and logs in tmp_path, fast protocol)."""
    data: dict[str, Any] = {
        "node": {"port": 0, "spool_dir": str(tmp_path / "spool"),
                 "log_dir": str(tmp_path / "logs"), "fsync": False, "idle_timeout_s": 3.0,
                 "release_grace_s": 0.2, "allowed_calling_aets": [SCANNER], **node},
        "protocols": [{
            "name": "apt_small",
            "match": {"attribute": "SeriesDescription", "regex": "^CEST APT phantom"},
            "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"},
            "expected_frames": "auto",
            "methods": ["mtr_asym"], "outputs": ["parametric_map"], "model_based": False,
        }],
    }
    if dest is not None:
        data["destinations"] = [{"ae_title": dest[0], "host": "127.0.0.1", "port": dest[1],
                                 "tls": dest_tls}]
    if tls is not None:
        data["tls"] = tls
    return parse_config(data, base_dir=tmp_path)


def assembled(datasets: list[Dataset], cfg: NodeConfig | None = None) -> AssembledSeries:
    """The one series the datasets make, through a real Assembler (``default_config()``
    unless ``cfg``), without a network: for tests of what comes after assembly."""
    done: list[AssembledSeries] = []
    with Assembler(cfg or default_config(), done.append) as asm:
        for ds in datasets:
            asm.add(ds)
        asm.flush(timeout=30)
    assert len(done) == 1
    return done[0]


def good_series(seed: str, **patient: str) -> list[Dataset]:
    """A processable phantom series (its own study and series UIDs from ``seed``)."""
    ph = make_phantom(slices=SLICES, size=SIZE, offsets_ppm=OFFSETS, seed=7)
    return series_from_arrays(ph.signal, OFFSETS, seed=seed, **patient)


class Collect:
    """on_outcome callback that lets a test wait for n outcomes."""

    def __init__(self) -> None:
        self.cond = threading.Condition()
        self.outcomes: list[SeriesOutcome] = []

    def __call__(self, o: SeriesOutcome) -> None:
        with self.cond:
            self.outcomes.append(o)
            self.cond.notify_all()

    def wait_for(self, predicate: Any, timeout: float = 30.0) -> list[SeriesOutcome]:
        with self.cond:
            assert self.cond.wait_for(lambda: predicate(self.outcomes), timeout=timeout), (
                f"timed out with {len(self.outcomes)} outcomes")
            return list(self.outcomes)

    def wait(self, n: int = 1, timeout: float = 60.0) -> list[SeriesOutcome]:
        """The outcomes once there are at least ``n`` (fails after ``timeout`` seconds)."""
        return self.wait_for(lambda got: len(got) >= n, timeout=timeout)


@contextlib.contextmanager
def running_node(tmp_path: Path, **node: Any) -> Iterator[tuple[Node, StoreSCP, Collect]]:
    """A started Node sending to a started storescp; both stopped on exit."""
    collect = Collect()
    with StoreSCP(tmp_path / "archive") as archive:
        cfg = node_config(tmp_path, (archive.ae_title, archive.port), **node)
        with Node(cfg, on_outcome=collect) as nd:
            yield nd, archive, collect


def assert_node_alive(nd: Node, archive: StoreSCP, collect: Collect, tmp_path: Path,
                      seed: str) -> None:
    """The node answers C-ECHO and processes a good series sent by storescu afterwards."""
    assert nd.port is not None
    res = echo(nd.config.ae_title, "127.0.0.1", nd.port, calling_ae=SCANNER)
    assert res.ok, res.detail
    before = len(archive.files())
    dss = good_series(seed)
    files = write_series(dss, tmp_path / f"good-{seed}")
    storescu(nd.port, files, calling_ae=SCANNER)
    key = series_key_of(dss[0])
    (out,) = [o for o in collect.wait_for(lambda os: any(o.key == key for o in os))
              if o.key == key]
    assert out.ok, out.error
    assert out.objects == 1  # one Parametric Map
    archive.wait_for(before + 1)


def series_key_of(ds: Dataset) -> str:
    """The node's pseudonymous key of the series ``ds`` belongs to."""
    return series_key(str(ds.StudyInstanceUID), str(ds.SeriesInstanceUID))
