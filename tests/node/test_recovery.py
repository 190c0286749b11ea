"""Crash recovery: a real ``cest-node serve`` process killed with SIGKILL, then started again.

(a) while receiving (after part of the series), (b) while computing (the deferred
multi-Lorentzian fit), (c) while its outputs wait to be sent (the archive, a real Orthanc, is
down), and a series released but never processed. After the restart Orthanc holds every
expected output exactly once (instances per series from its REST API), with the UIDs a
crash-free run gives, and the maps equal those of an offline run.

The helpers here (:class:`ServeProc`, :func:`write_config`, :func:`expected_series`,
:func:`orthanc_counts`) are shared by the other tests of the outbox.
"""

from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from pydicom import dcmread

from node.assemble import Assembler
from node.config import load_config
from node.service import OUTPUT_ORDER, Processor, output_series_uid
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.peers import Orthanc, free_port, storescu

pytestmark = pytest.mark.peers

SLICES, SIZE = 3, 40
REPO = Path(__file__).resolve().parents[2]


# --------------------------------------------------------------------------- helpers
def write_config(path: Path, *, dest_port: int, methods: list[str], model_based: bool = False,
                 outputs: tuple[str, ...] = OUTPUT_ORDER, dest_ae: str = "ORTHANC",
                 idle_timeout_s: float = 30.0, retry_for_s: float = 120.0,
                 backoff_s: float = 0.2, backoff_max_s: float = 1.0) -> Path:
    """A node config for the tests: port 0, spool and logs beside the file, one destination."""
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(f"""
[node]
ae_title = "CESTNODE"
port = 0
allowed_calling_aets = ["SCANNER1"]
spool_dir = "spool"
log_dir = "logs"
fsync = false
idle_timeout_s = {idle_timeout_s}
send_retry_for_s = {retry_for_s}
send_backoff_s = {backoff_s}
send_backoff_max_s = {backoff_max_s}

[metrics]
calibrate = false

[[destinations]]
ae_title = "{dest_ae}"
host = "127.0.0.1"
port = {dest_port}

[[protocols]]
name = "cest_apt_phantom"
methods = {json.dumps(methods)}
model_based = {str(model_based).lower()}
outputs = {json.dumps(list(outputs))}
budget_s = 10.0

[protocols.match]
attribute = "SeriesDescription"
regex = "^CEST APT phantom"

[protocols.offset]
tag = "(0029,xx10)"
private_creator = "CESTNODE SIM 1"
unit = "ppm"
""")
    return path


class ServeProc:
    """``python -m node.cli serve --config FILE`` as a child process; ``port`` from its stdout."""

    def __init__(self, config: Path):
        self.config = config
        self.log = config.parent / "serve.log"
        self.proc: subprocess.Popen | None = None
        self.port = 0

    def start(self, timeout: float = 30.0) -> ServeProc:
        err = open(self.log, "ab")  # noqa: SIM115 (closed when the process ends)
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "node.cli", "serve", "--config", str(self.config)],
            cwd=REPO, stdout=subprocess.PIPE, stderr=err, text=True,
            env={**os.environ, "PYTHONUNBUFFERED": "1"})
        err.close()
        found: list[int] = []

        def read() -> None:
            assert self.proc is not None and self.proc.stdout is not None
            for line in self.proc.stdout:
                if "listening as" in line and not found:
                    found.append(int(line.split(";")[0].rsplit(":", 1)[1]))
        reader = threading.Thread(target=read, daemon=True)
        reader.start()
        self._reader = reader
        deadline = time.monotonic() + timeout
        while not found:
            if self.proc.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"serve did not start: {self.log.read_text()[-2000:]}")
            time.sleep(0.05)
        self.port = found[0]
        return self

    def kill(self) -> None:
        """SIGKILL: no handler runs, nothing is flushed by the node."""
        if self.proc is not None:
            if self.proc.poll() is None:
                self.proc.send_signal(signal.SIGKILL)
            self._end()

    def terminate(self) -> int:
        assert self.proc is not None
        self.proc.send_signal(signal.SIGTERM)
        return self._end()

    def _end(self) -> int:
        assert self.proc is not None
        rc = self.proc.wait(timeout=30)
        self._reader.join(timeout=10)
        if self.proc.stdout is not None:
            self.proc.stdout.close()
        self.proc = None
        return rc

    def __enter__(self) -> ServeProc:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.kill()


def expected_series(source_uid: str, methods: list[str], slices: int,
                    outputs: tuple[str, ...] = OUTPUT_ORDER) -> dict[str, int]:
    """Derived SeriesInstanceUID -> instance count (one PM; one MR and one SC per slice)."""
    per_kind = {"parametric_map": 1, "derived_mr": slices, "secondary_capture": slices}
    return {output_series_uid(source_uid, m, k): per_kind[k] for m in methods for k in outputs}


def orthanc_counts(orthanc: Orthanc) -> dict[str, int]:
    """SeriesInstanceUID -> instances Orthanc holds (its REST API)."""
    return {s["MainDicomTags"]["SeriesInstanceUID"]: len(s["Instances"])
            for s in orthanc.series()}


def wait_counts(orthanc: Orthanc, expected: dict[str, int], *, timeout: float = 40.0,
                proc: ServeProc | None = None) -> dict[str, int]:
    """Wait until Orthanc holds at least the expected instances of these series."""
    deadline = time.monotonic() + timeout
    got: dict[str, int] = {}
    while time.monotonic() < deadline:
        got = {k: v for k, v in orthanc_counts(orthanc).items() if k in expected}
        if all(got.get(k, 0) >= n for k, n in expected.items()):
            return got
        if proc is not None and proc.proc is not None and proc.proc.poll() is not None:
            break
        time.sleep(0.1)
    log = proc.log.read_text()[-3000:] if proc is not None else ""
    raise AssertionError(f"Orthanc holds {got}, expected {expected}\n{log}")


def wait_state(spool: Path, key: str, state: str, *, timeout: float = 20.0) -> str:
    """Wait until the spool's index gives the series this state; returns the last state."""
    deadline = time.monotonic() + timeout
    got = series_state(spool, key)
    while got != state and time.monotonic() < deadline:
        time.sleep(0.05)
        got = series_state(spool, key)
    return got


def series_state(spool: Path, key: str) -> str:
    with sqlite3.connect(f"file:{spool / 'index.sqlite'}?mode=ro", uri=True) as db:
        row = db.execute("SELECT state FROM series WHERE key = ?", (key,)).fetchone()
    return row[0] if row else ""


def make_series(tmp: Path, seed: str, *, slices: int = SLICES, size: int = SIZE,
                phantom_seed: int = 5) -> tuple[list[Path], str, str]:
    """Phantom series files (scrambled), their SeriesInstanceUID and series key."""
    from node.types import series_key

    ph = make_phantom(slices=slices, size=size, seed=phantom_seed)
    ds = series_from_arrays(ph.signal, ph.offsets_ppm, seed=seed)
    files = write_series(ds, tmp / f"scanner-{seed}")
    order = np.random.default_rng(len(seed)).permutation(len(files))
    uid = str(ds[0].SeriesInstanceUID)
    return [files[i] for i in order], uid, series_key(str(ds[0].StudyInstanceUID), uid)


def offline_maps(config: Path, files: list[Path]) -> dict[str, np.ndarray]:
    """The maps of a crash-free offline run of the same files (Assembler + Processor)."""
    cfg = load_config(config)
    proc = Processor(cfg, lambda batch, clock: True, keep_maps=True)
    maps: dict[str, np.ndarray] = {}

    def on_complete(series) -> None:  # type: ignore[no-untyped-def]
        outcome, job = proc.process(series)
        maps.update(outcome.maps)
        if job is not None:
            maps.update(proc.run_deferred(job).maps)

    with Assembler(cfg, on_complete) as asm:
        for f in files:
            asm.add(dcmread(f))
        asm.flush(timeout=60)
    return maps


def pm_volume(orthanc: Orthanc, series_uid: str) -> np.ndarray:
    """The Parametric Map of one derived series, fetched from Orthanc, frames by position."""
    from io import BytesIO

    sid = next(s["ID"] for s in orthanc.series()
               if s["MainDicomTags"]["SeriesInstanceUID"] == series_uid)
    inst = orthanc.get(f"/series/{sid}/instances")
    assert isinstance(inst, list) and len(inst) == 1
    pm = dcmread(BytesIO(orthanc.get_bytes(f"/instances/{inst[0]['ID']}/file")))
    z = [float(f.PlanePositionSequence[0].ImagePositionPatient[2])
         for f in pm.PerFrameFunctionalGroupsSequence]
    return pm.pixel_array.astype(np.float32)[np.argsort(z)]


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    with Orthanc(tmp_path_factory.mktemp("orthanc")) as o:
        yield o


# --------------------------------------------------------------------------- the kills
def test_killed_while_receiving(tmp_path, archive):
    """(a) SIGKILL after half of the series was acknowledged; the rest arrives after the
    restart; the maps equal a run that never crashed."""
    files, uid, key = make_series(tmp_path, "kill-receiving")
    cfg = write_config(tmp_path / "node" / "node.toml", dest_port=archive.dicom_port,
                       methods=["mtr_asym", "apt_star"])
    half = len(files) // 2
    node = ServeProc(cfg).start()
    try:
        storescu(node.port, files[:half])
        assert series_state(tmp_path / "node" / "spool", key) == "receiving"
        node.kill()
        node.start()
        storescu(node.port, files[half:])
        expected = expected_series(uid, ["mtr_asym", "apt_star"], SLICES)
        assert wait_counts(archive, expected, proc=node) == expected
        assert wait_state(tmp_path / "node" / "spool", key, "processed") == "processed"
    finally:
        node.kill()
    truth = offline_maps(cfg, files)
    for method in ("mtr_asym", "apt_star"):
        got = pm_volume(archive, output_series_uid(uid, method, "parametric_map"))
        np.testing.assert_array_equal(got, truth[method])
    assert "reloaded" in (tmp_path / "node" / "serve.log").read_text()


def test_killed_while_computing(tmp_path, archive):
    """(b) SIGKILL during the deferred multi-Lorentzian fit; after the restart the fit runs
    again from the spool and its outputs arrive; the primary outputs are not sent again."""
    files, uid, key = make_series(tmp_path, "kill-computing")
    methods = ["mtr_asym", "multi_lorentzian"]
    cfg = write_config(tmp_path / "node" / "node.toml", dest_port=archive.dicom_port,
                       methods=methods, model_based=True)
    spool = tmp_path / "node" / "spool"
    primary = expected_series(uid, ["mtr_asym"], SLICES)
    node = ServeProc(cfg).start()
    try:
        storescu(node.port, files)
        wait_counts(archive, primary, proc=node)
        assert wait_state(spool, key, "deferring") == "deferring"
        time.sleep(0.3)  # inside the fit (about 2 s here)
        node.kill()
        assert series_state(spool, key) == "deferring"
        with sqlite3.connect(spool / "index.sqlite") as db:
            sent_before = db.execute("SELECT COUNT(*) FROM sends WHERE state = 'sent'"
                                     ).fetchone()[0]
        assert sent_before == sum(primary.values())
        node.start()
        expected = expected_series(uid, methods, SLICES)
        assert wait_counts(archive, expected, proc=node) == expected
        assert wait_state(spool, key, "processed") == "processed"
    finally:
        node.kill()
    with sqlite3.connect(spool / "index.sqlite") as db:
        rows = db.execute("SELECT state, attempts FROM sends").fetchall()
    # every object acknowledged once, none sent twice (PS3.4 B.2: one C-STORE per instance)
    assert sorted(rows) == [("sent", 1)] * sum(expected.values())


def test_killed_while_sending(tmp_path):
    """(c) The archive is down; the outputs wait in the outbox, retrying; SIGKILL; the archive
    comes up on the same ports; after the restart every output arrives exactly once."""
    files, uid, key = make_series(tmp_path, "kill-sending")
    orthanc = Orthanc(tmp_path / "orthanc", dicom_port=free_port(), http_port=free_port())
    methods = ["mtr_asym", "apt_star"]
    cfg = write_config(tmp_path / "node" / "node.toml", dest_port=orthanc.dicom_port,
                       methods=methods)
    spool = tmp_path / "node" / "spool"
    node = ServeProc(cfg).start()
    try:
        storescu(node.port, files)
        assert wait_state(spool, key, "processed") == "processed"
        time.sleep(0.5)  # at least one retry (backoff 0.2 s)
        node.kill()
        with sqlite3.connect(spool / "index.sqlite") as db:
            states = dict(db.execute("SELECT state, COUNT(*) FROM sends GROUP BY state"))
            attempts = db.execute("SELECT MIN(attempts) FROM sends").fetchone()[0]
        n = sum(expected_series(uid, methods, SLICES).values())
        assert sum(states.values()) == n and not states.get("sent"), states
        assert attempts >= 1
        with orthanc:
            node.start()
            expected = expected_series(uid, methods, SLICES)
            assert wait_counts(orthanc, expected, proc=node) == expected
            time.sleep(0.5)
            assert {k: v for k, v in orthanc_counts(orthanc).items()} == expected
            assert orthanc.instance_count() == n
    finally:
        node.kill()
    with sqlite3.connect(spool / "index.sqlite") as db:
        assert dict(db.execute("SELECT state, COUNT(*) FROM sends GROUP BY state")) == {"sent": n}
    # the files of acknowledged objects are removed from the outbox
    assert not list((spool / "outbox").rglob("*.dcm"))


def test_released_but_unprocessed_series_is_processed_at_start(tmp_path, archive):
    """A series the spool marks complete, whose processing never ran (the node stopped between
    the release and the pass), is reassembled from the spool and processed at start."""
    from node.receive import Receiver

    files, uid, key = make_series(tmp_path, "unprocessed")
    cfg_path = write_config(tmp_path / "node" / "node.toml", dest_port=archive.dicom_port,
                            methods=["mtr_asym"])
    cfg = load_config(cfg_path)
    released = threading.Event()
    with Receiver(cfg, lambda series: released.set()) as rx:  # receives, never processes
        storescu(rx.port, files)
        assert released.wait(20)
    assert series_state(cfg.spool_dir, key) == "complete"
    with ServeProc(cfg_path) as node:
        expected = expected_series(uid, ["mtr_asym"], SLICES)
        assert wait_counts(archive, expected, proc=node) == expected
    assert "processing it now" in (tmp_path / "node" / "serve.log").read_text()
