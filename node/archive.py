"""A small embedded archive: a Storage SCP that the demo and the tests send results to.

It accepts every storage SOP class pynetdicom knows (``AllStoragePresentationContexts``, which,
unlike ``StoragePresentationContexts``, holds Parametric Map Storage) plus Verification, writes
each instance to a folder as a DICOM file (written to a temporary name, then renamed, so a file
that exists is complete), and counts what it got per series. A caller waits for N instances on a
``threading.Condition``; nothing polls.

It binds 127.0.0.1 on a port the OS assigns by default, and switches Nagle's algorithm off on
every accepted connection (TCP_NODELAY).

Files are laid out as ``<folder>/<series key>/<SOP Instance UID>.dcm``; the series key is the
pseudonymous :func:`node.types.series_key`, so no patient attribute appears in a path or a log.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from collections import Counter
from io import BytesIO
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pydicom import dcmread
from pydicom.errors import InvalidDicomError
from pynetdicom import AE, AllStoragePresentationContexts, evt
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node.send import set_tcp_nodelay, tcp_nodelay_of
from node.types import series_key

if TYPE_CHECKING:
    from pynetdicom.transport import ThreadedAssociationServer

LOG = logging.getLogger("node.archive")

#: PS3.7 C.4.2.1.4 / Annex C statuses the handler answers.
SUCCESS = 0x0000
OUT_OF_RESOURCES = 0xA700
CANNOT_UNDERSTAND = 0xC000

_KEY_TAGS = ["StudyInstanceUID", "SeriesInstanceUID", "SOPInstanceUID"]


class EmbeddedArchive:
    """A Storage SCP that files what it receives and counts it per series.

    Parameters
    ----------
    folder
        Where the received instances go (created if missing).
    ae_title
        Our AE title (the called AE title senders must use is not enforced).
    host, port
        Where to listen; port 0 lets the OS choose (read it from :attr:`port` after
        :meth:`start`).
    fsync
        Flush each file to the disk before answering success (slower; survives power loss).

    Examples
    --------
    >>> with EmbeddedArchive(tmp_path) as archive:          # doctest: +SKIP
    ...     send(datasets, archive.address)
    ...     archive.wait_for(len(datasets), timeout_s=10)
    """

    def __init__(
        self,
        folder: str | os.PathLike[str],
        *,
        ae_title: str = "CESTARCHIVE",
        host: str = "127.0.0.1",
        port: int = 0,
        fsync: bool = False,
    ) -> None:
        if not ae_title or len(ae_title) > 16:
            raise ValueError(f"ae_title must be 1 to 16 characters, got {ae_title!r}")
        if not isinstance(port, int) or not 0 <= port < 65536:
            raise ValueError(f"port must be an integer in 0..65535, got {port!r}")
        self.folder = Path(folder)
        self.ae_title = ae_title
        self.host = host
        self._requested_port = port
        self.fsync = fsync
        self._cond = threading.Condition()
        self._received = 0  # every C-STORE answered with success, resends included
        self._by_series: Counter[str] = Counter()  # distinct instances per series key
        self._files: dict[str, Path] = {}  # SOP Instance UID -> file
        self._failures = 0
        self._nodelay: list[bool | None] = []  # TCP_NODELAY read back on each connection
        self._server: ThreadedAssociationServer | None = None
        self._port = 0

    # -- lifecycle ------------------------------------------------------------------------
    def start(self) -> tuple[str, str, int]:
        """Start listening; returns ``(ae_title, host, port)`` to send to."""
        if self._server is not None:
            raise RuntimeError("the archive is already running")
        self.folder.mkdir(parents=True, exist_ok=True)
        ae = AE(ae_title=self.ae_title)
        ae.maximum_pdu_size = 0
        ae.network_timeout = 60
        ae.dimse_timeout = 30
        ae.supported_contexts = AllStoragePresentationContexts
        ae.add_supported_context(Verification)
        handlers: list[Any] = [
            (evt.EVT_CONN_OPEN, self._on_conn_open),
            (evt.EVT_C_STORE, self._on_store),
            (evt.EVT_C_ECHO, lambda event: SUCCESS),
        ]
        server = ae.start_server((self.host, self._requested_port), block=False, evt_handlers=handlers)
        assert server is not None
        self._server = server
        self._port = int(server.server_address[1])
        LOG.info("embedded archive %s listening on %s:%d", self.ae_title, self.host, self._port)
        return self.address

    def stop(self) -> None:
        """Stop listening and close open associations (idempotent)."""
        server, self._server = self._server, None
        if server is not None:
            server.shutdown()
            server.server_close()
            LOG.info("embedded archive %s stopped: %d instances", self.ae_title, self._received)

    def __enter__(self) -> EmbeddedArchive:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # -- what arrived ---------------------------------------------------------------------
    @property
    def port(self) -> int:
        """The port we listen on (0 before :meth:`start`)."""
        return self._port

    @property
    def address(self) -> tuple[str, str, int]:
        """``(ae_title, host, port)``: what a sender needs."""
        return (self.ae_title, self.host, self._port)

    @property
    def received(self) -> int:
        """C-STORE requests stored with success, a resent instance counted each time."""
        with self._cond:
            return self._received

    @property
    def failures(self) -> int:
        """C-STORE requests answered with a failure status."""
        with self._cond:
            return self._failures

    def counts(self) -> dict[str, int]:
        """Distinct instances per pseudonymous series key."""
        with self._cond:
            return dict(self._by_series)

    def files(self) -> dict[str, Path]:
        """The file of each distinct instance, by SOP Instance UID."""
        with self._cond:
            return dict(self._files)

    def wait_for(self, n: int, *, timeout_s: float, series: str | None = None) -> bool:
        """Block until ``n`` distinct instances arrived (in ``series`` if given).

        Returns True when they did, False when ``timeout_s`` ran out first.
        """
        if n < 0:
            raise ValueError(f"n must be >= 0, got {n}")
        if timeout_s < 0:
            raise ValueError(f"timeout_s must be >= 0, got {timeout_s}")

        def enough() -> bool:
            got = self._by_series.get(series, 0) if series is not None else len(self._files)
            return got >= n

        with self._cond:
            return self._cond.wait_for(enough, timeout=timeout_s)

    @property
    def connections_nodelay(self) -> list[bool | None]:
        """TCP_NODELAY as read back from each accepted connection's socket."""
        with self._cond:
            return list(self._nodelay)

    # -- handlers ---------------------------------------------------------------------------
    def _on_conn_open(self, event: evt.Event) -> None:
        set_tcp_nodelay(event)
        state = tcp_nodelay_of(event.assoc)
        with self._cond:
            self._nodelay.append(state)

    def _on_store(self, event: evt.Event) -> int:
        try:
            raw = event.encoded_dataset(include_meta=True)
            ds = dcmread(BytesIO(raw), specific_tags=_KEY_TAGS, stop_before_pixels=True)
            uid = str(ds.SOPInstanceUID)
            key = series_key(str(ds.StudyInstanceUID), str(ds.SeriesInstanceUID))
        except (InvalidDicomError, AttributeError, KeyError, ValueError) as exc:
            LOG.warning("embedded archive: cannot read the instance's UIDs (%s)", type(exc).__name__)
            with self._cond:
                self._failures += 1
            return CANNOT_UNDERSTAND
        target = self.folder / key / f"{uid}.dcm"
        try:
            _atomic_write(target, raw, fsync=self.fsync)
        except OSError as exc:
            LOG.error("embedded archive: cannot write an instance of %s (%s)", key, exc.strerror)
            with self._cond:
                self._failures += 1
            return OUT_OF_RESOURCES
        with self._cond:
            self._received += 1
            if uid not in self._files:
                self._files[uid] = target
                self._by_series[key] += 1
            self._cond.notify_all()
        return SUCCESS


def _atomic_write(target: Path, data: bytes, *, fsync: bool) -> None:
    """Write ``data`` to a temporary file beside ``target`` and rename it into place."""
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{threading.get_ident()}.{time.monotonic_ns()}.part")
    try:
        with open(tmp, "wb") as fh:
            fh.write(data)
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    if fsync:
        dir_fd = os.open(target.parent, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)

