"""Real DICOM peers for the tests, started on loopback with ports the OS assigns.

DCMTK (Debian ``dcmtk``): ``storescu`` plays the scanner, ``storescp`` a simple archive.
Orthanc (Debian ``orthanc``): a real archive with a JSON config of the test's own.
dicom3tools (Debian ``dicom3tools``): ``dciodvfy`` checks objects against PS3.3 IODs.

Every peer is a context manager that stops its process on exit, even when the test fails.
DCMTK and Orthanc leave Nagle's algorithm on unless ``TCP_NODELAY=1`` is in their
environment (measured on this machine: 106 s instead of 1.4 s for 1,200 instances), so every
peer gets it.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import time
import urllib.request
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import pytest

PEER_ENV = {**os.environ, "TCP_NODELAY": "1"}


def require(tool: str) -> str:
    """Path of a peer tool; skip the test when absent, fail when CEST_REQUIRE_PEERS=1."""
    path = shutil.which(tool) or (f"/usr/sbin/{tool}" if Path(f"/usr/sbin/{tool}").exists() else None)
    if path is None:
        msg = f"{tool} is not installed (Debian packages dcmtk, dicom3tools, orthanc)"
        if os.environ.get("CEST_REQUIRE_PEERS") == "1":
            pytest.fail(msg)
        pytest.skip(msg)
    return path


def free_port() -> int:
    """A port the OS considers free on 127.0.0.1 (bind port 0, read it, release it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_port(port: int, *, timeout: float = 10.0, proc: subprocess.Popen | None = None) -> None:
    """Wait until something accepts TCP connections on 127.0.0.1:port."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            raise RuntimeError(f"peer exited with code {proc.returncode} before listening")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.02)
    raise TimeoutError(f"nothing listens on 127.0.0.1:{port} after {timeout} s")


def _stop(proc: subprocess.Popen, *, timeout: float = 10.0) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


# --------------------------------------------------------------------------- dciodvfy
def dciodvfy_errors(path: str | Path) -> list[str]:
    """The ``Error`` lines dciodvfy reports for one file (PS3.3 IOD check).

    dciodvfy writes its findings to stderr, one line each beginning ``Error - `` or
    ``Warning - `` (after an optional tag prefix), and exits 1 when there is an Error.
    """
    exe = require("dciodvfy")
    res = subprocess.run([exe, str(path)], capture_output=True, text=True, timeout=60)
    lines = (res.stderr + res.stdout).splitlines()
    return [ln for ln in lines if "Error - " in ln or ln.startswith("Error")]


def assert_dciodvfy_clean(paths: Iterable[str | Path]) -> None:
    failures = {}
    for p in paths:
        errs = dciodvfy_errors(p)
        if errs:
            failures[str(p)] = errs
    assert not failures, f"dciodvfy errors: {json.dumps(failures, indent=1)[:4000]}"


# --------------------------------------------------------------------------- DCMTK
def storescu(
    port: int,
    files: Sequence[str | Path],
    *,
    called_ae: str = "CESTNODE",
    calling_ae: str = "SCANNER1",
    extra: Sequence[str] = (),
    timeout: float = 300.0,
    check: bool = True,
) -> subprocess.CompletedProcess:
    """Send files with DCMTK ``storescu`` (``-R``: propose only the classes of the files)."""
    exe = require("storescu")
    args = [exe, "-aet", calling_ae, "-aec", called_ae, "-R", *extra, "127.0.0.1", str(port)]
    # long argument lists go through a scan directory would change order; pass files directly
    res = subprocess.run(
        [*args, *map(str, files)], capture_output=True, text=True, timeout=timeout, env=PEER_ENV
    )
    if check and res.returncode != 0:
        raise AssertionError(f"storescu failed ({res.returncode}): {res.stderr[-2000:]}")
    return res


def echoscu(port: int, *, called_ae: str = "CESTNODE", calling_ae: str = "SCANNER1") -> int:
    exe = require("echoscu")
    res = subprocess.run(
        [exe, "-aet", calling_ae, "-aec", called_ae, "127.0.0.1", str(port)],
        capture_output=True, text=True, timeout=30, env=PEER_ENV,
    )
    return res.returncode


class StoreSCP:
    """DCMTK ``storescp`` writing every received object into ``folder``."""

    def __init__(self, folder: str | Path, *, ae_title: str = "ARCHIVE", port: int | None = None,
                 extra: Sequence[str] = (), log: str | Path | None = None):
        self.folder = Path(folder)
        self.ae_title = ae_title
        self.port = port or free_port()
        self.extra = list(extra)
        self.log = Path(log) if log is not None else None
        """With ``log``: storescp's verbose log (``-v``) goes there (:meth:`associations`)."""
        self.proc: subprocess.Popen | None = None

    def __enter__(self) -> StoreSCP:
        exe = require("storescp")
        self.folder.mkdir(parents=True, exist_ok=True)
        out: Any = subprocess.DEVNULL
        verbose: list[str] = []
        if self.log is not None:
            out = open(self.log, "ab")  # noqa: SIM115 (closed with the process)
            verbose = ["-v"]
        self.proc = subprocess.Popen(
            [exe, "-aet", self.ae_title, "-od", str(self.folder), "+B", *verbose, *self.extra,
             str(self.port)],
            env=PEER_ENV, stdout=out, stderr=subprocess.STDOUT if self.log else out,
        )
        if self.log is not None:
            out.close()  # the child has its own copy
        wait_port(self.port, proc=self.proc)
        return self

    def __exit__(self, *exc: object) -> None:
        if self.proc is not None:
            _stop(self.proc)

    def files(self) -> list[Path]:
        return sorted(p for p in self.folder.iterdir() if p.is_file())

    def associations(self) -> int:
        """Associations storescp has accepted so far (from its verbose log; the port probe of
        :func:`wait_port` is received but never acknowledged)."""
        if self.log is None or not self.log.exists():
            raise RuntimeError("associations() needs StoreSCP(..., log=PATH)")
        return self.log.read_text(errors="replace").count("Association Acknowledged")

    def wait_for(self, count: int, *, timeout: float = 30.0) -> list[Path]:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            files = self.files()
            if len(files) >= count:
                return files
            time.sleep(0.05)
        raise TimeoutError(f"storescp holds {len(self.files())} objects, expected {count}")


# --------------------------------------------------------------------------- Orthanc
class Orthanc:
    """A real Orthanc archive with storage in ``folder`` and a JSON config of our own.

    Orthanc (Debian 1.10.1) starts in about 0.1 s, stops on SIGTERM in about 4 s, and
    accepts Parametric Map, SC, SEG and 3D SR by default (measured on this machine).
    """

    def __init__(self, folder: str | Path, *, ae_title: str = "ORTHANC",
                 dicom_port: int | None = None, http_port: int | None = None,
                 modalities: dict[str, list] | None = None):
        self.folder = Path(folder)
        self.ae_title = ae_title
        self.dicom_port = dicom_port or free_port()
        self.http_port = http_port or free_port()
        self.modalities = modalities or {}
        self.proc: subprocess.Popen | None = None

    def config(self) -> dict:
        return {
            "Name": "cest-node-test",
            "StorageDirectory": str(self.folder / "storage"),
            "IndexDirectory": str(self.folder / "index"),
            "DicomAet": self.ae_title,
            "DicomPort": self.dicom_port,
            "HttpPort": self.http_port,
            "RemoteAccessAllowed": False,
            "AuthenticationEnabled": False,
            "DicomAlwaysAllowStore": True,
            "DicomAlwaysAllowFind": True,
            "DicomAlwaysAllowGet": True,
            "DicomAlwaysAllowMove": True,
            "DicomCheckCalledAet": False,
            "DicomModalities": self.modalities,
            "StableAge": 1,
            "Plugins": [],
        }

    def start(self) -> Orthanc:
        exe = require("Orthanc")
        self.folder.mkdir(parents=True, exist_ok=True)
        cfg = self.folder / "orthanc.json"
        cfg.write_text(json.dumps(self.config()))
        self.log = open(self.folder / "orthanc.log", "ab")  # noqa: SIM115
        self.proc = subprocess.Popen([exe, str(cfg)], env=PEER_ENV, stdout=self.log,
                                     stderr=subprocess.STDOUT)
        wait_port(self.http_port, proc=self.proc, timeout=20)
        wait_port(self.dicom_port, proc=self.proc, timeout=20)
        return self

    def stop(self) -> None:
        if self.proc is not None:
            _stop(self.proc)
            self.proc = None
            self.log.close()

    def __enter__(self) -> Orthanc:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def get(self, path: str) -> object:
        url = f"http://127.0.0.1:{self.http_port}{path}"
        with urllib.request.urlopen(url, timeout=10) as r:  # noqa: S310 (loopback only)
            return json.loads(r.read())

    def get_bytes(self, path: str) -> bytes:
        url = f"http://127.0.0.1:{self.http_port}{path}"
        with urllib.request.urlopen(url, timeout=10) as r:  # noqa: S310 (loopback only)
            return r.read()

    def instance_count(self) -> int:
        stats = self.get("/statistics")
        assert isinstance(stats, dict)
        return int(stats["CountInstances"])

    def series(self) -> list[dict]:
        """Every series Orthanc holds, expanded (MainDicomTags, Instances)."""
        out = self.get("/series?expand")
        assert isinstance(out, list)
        return out

    def wait_for(self, count: int, *, timeout: float = 30.0) -> int:
        deadline = time.monotonic() + timeout
        n = 0
        while time.monotonic() < deadline:
            n = self.instance_count()
            if n >= count:
                return n
            time.sleep(0.1)
        raise TimeoutError(f"Orthanc holds {n} instances, expected {count}")
