"""C-STORE SCU: send a batch of derived objects to a destination archive.

One association per destination per batch, or one for several batches with a
:class:`SendSession` (the node's budget-bound pass sends every output kind as soon as it is
built, over one association). The presentation contexts are built from the SOP
classes and transfer syntaxes actually present in the batch (and the session's) (pynetdicom's
``StoragePresentationContexts`` omits Parametric Map Storage, so a fixed list is not used).
TCP_NODELAY is set on the SCU socket as soon as it connects (with Nagle's algorithm on, small
C-STORE messages wait for delayed ACKs: measured on this machine, 59 s instead of 8.6 s for
1,200 instances).

Every response status is checked (PS3.7 Annex C): success and warning statuses count as stored
(warnings are reported), failures are reported. Objects without an acknowledgement (lost
connection, DIMSE timeout, aborted association) and objects refused with a transient status are
resent on a new association, a bounded number of times with exponential back-off; an object is
never resent once the archive acknowledged it. Nothing is dropped silently: whatever is not stored
at the end is in the :class:`SendReport` and in one log line with the count of unsent objects.

pynetdicom 3.0.4 has a race between its association reactor thread and
``send_c_store``: the reactor's pause handshake (``_reactor_checkpoint`` / ``_is_paused``) can let
its non-blocking ``get_msg`` run after the sender believes it paused, and it then takes the
C-STORE response off the DIMSE queue ("Received unexpected C-STORE service message"); the sender
waits for the DIMSE timeout and aborts. Two defences:

* prevention: on connection the association's DIMSE message queue is replaced by
  :class:`ResponseQueue`, whose non-blocking ``get`` (the reactor's) never hands out a response or
  the end-of-association sentinel; only the blocking ``get`` of the waiting sender does. An SCU
  that only sends C-STORE and C-ECHO receives no request the reactor would need to serve.
* detection and recovery: a ledger of every C-STORE response decoded on the association (from
  ``EVT_DIMSE_RECV``, which fires before the queue), so an instance whose response was lost
  inside the library is still known to be stored and is not resent; what is unacknowledged is
  resent on a new association. The DIMSE timeout is short by default (a few seconds).

Logs name series by their pseudonymous key and give counts only: no patient attribute.
"""

from __future__ import annotations

import logging
import queue
import socket
import threading
import time
from collections.abc import Iterable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import partial
from typing import TYPE_CHECKING, Any, Protocol

from pydicom.uid import (
    UID,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
)
from pynetdicom import AE, evt
from pynetdicom.presentation import PresentationContext
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node import fastpath
from node.tls import TlsSettings, client_context

if TYPE_CHECKING:
    from pydicom import Dataset
    from pynetdicom.association import Association

    from node.types import OutputBatch

LOG = logging.getLogger("node.send")

#: PS3.7 C.4.2.1.4 / Annex C: C-STORE warning statuses (the instance is stored).
WARNING_STATUSES = {
    0x0001: "coercion of data elements (0x0001)",
    0xB000: "coercion of data elements",
    0xB006: "elements discarded",
    0xB007: "data set does not match SOP class",
}

#: At most 128 presentation contexts fit in one association (IDs are the odd numbers 1..255,
#: PS3.8 9.3.2.2).
MAX_CONTEXTS = 128

#: Transfer syntaxes pynetdicom can re-encode a data set into on the fly; a batch in one of them
#: is also offered in Implicit VR Little Endian, which every SCP must accept (PS3.5 10.1).
_UNCOMPRESSED = {ExplicitVRLittleEndian, ImplicitVRLittleEndian, UID("1.2.840.10008.1.2.2")}


class DestinationLike(Protocol):
    """Anything with the three fields of a DICOM destination (e.g. node.config's)."""

    @property
    def ae_title(self) -> str: ...

    @property
    def host(self) -> str: ...

    @property
    def port(self) -> int: ...


@dataclass(frozen=True)
class Destination:
    """A DICOM application entity to send to: ``AE@HOST:PORT`` (``tls``: over TLS)."""

    ae_title: str
    host: str
    port: int
    tls: bool = False

    def __post_init__(self) -> None:
        _check_ae_title(self.ae_title, "ae_title")
        if not self.host:
            raise ValueError("destination host is empty")
        if not isinstance(self.port, int) or not 0 < self.port < 65536:
            raise ValueError(f"destination port must be an integer in 1..65535, got {self.port!r}")

    @classmethod
    def parse(cls, text: str) -> Destination:
        """Parse ``AE@HOST:PORT`` (the form the command line uses)."""
        ae, sep, rest = text.partition("@")
        host, sep2, port = rest.rpartition(":")
        if not sep or not sep2 or not ae or not host or not port.isdigit():
            raise ValueError(f"destination {text!r} is not of the form AE@HOST:PORT")
        return cls(ae, host, int(port))

    @classmethod
    def coerce(cls, value: Destination | DestinationLike | tuple[str, str, int]) -> Destination:
        """Accept a Destination, a ``(ae_title, host, port)`` tuple or any object with the
        attributes ``ae_title``, ``host`` and ``port``."""
        if isinstance(value, Destination):
            return value
        if isinstance(value, tuple):
            if len(value) != 3:
                raise ValueError(
                    f"destination tuple must be (ae_title, host, port), got {len(value)} items"
                )
            return cls(str(value[0]), str(value[1]), value[2])
        try:
            return cls(value.ae_title, value.host, value.port,
                       bool(getattr(value, "tls", False)))
        except AttributeError as exc:
            raise ValueError(
                f"destination must be (ae_title, host, port) or have those attributes: {exc}"
            ) from None

    def __str__(self) -> str:
        return f"{self.ae_title}@{self.host}:{self.port}"


def _check_ae_title(value: str, what: str) -> None:
    # PS3.5 6.2: AE is at most 16 characters of the default repertoire, no backslash or control
    # characters, and not only spaces.
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"{what} must be a non-empty AE title, got {value!r}")
    if len(value) > 16:
        raise ValueError(f"{what} {value!r} is longer than 16 characters")
    if "\\" in value or any(ord(c) < 32 or ord(c) > 126 for c in value):
        raise ValueError(f"{what} {value!r} contains a backslash or a non-printable character")


@dataclass(frozen=True)
class SendSettings:
    """How the sender talks to a destination.

    Attributes
    ----------
    calling_ae
        Our AE title.
    max_pdu
        Largest PDU we accept (0: no limit). What we send is sized by the peer's maximum.
    retries
        Further attempts after the first one for what is still unacknowledged.
    backoff_s
        Wait before the first retry; doubled before each further one.
    connect_timeout_s, acse_timeout_s, dimse_timeout_s, network_timeout_s
        TCP connect, association negotiation, wait per C-STORE response, and idle network
        timeouts. The DIMSE timeout bounds the stall of a lost response (a few seconds, not
        pynetdicom's 30 s).
    guard_reactor_race
        Install :class:`ResponseQueue` on each association (default True; False only to
        measure the library's own behaviour).
    loop_delay_s
        How long pynetdicom's DUL thread sleeps when it finds nothing to do (the library's
        ``_run_loop_delay``, 1 ms by default, a latency added to each PDU in and out).
        0.2 ms: 41 objects to storescp in 205 ms instead of 259 (medians of 8 interleaved
        runs, loaded machine); the thread wakes 5,000 times a second only while an
        association is open. Applies where that loop runs: with ``direct_send`` (plain TCP)
        the DUL waits in ``select`` instead (:func:`node.fastpath.install_requestor`).
    direct_send
        Write each C-STORE request's PDUs on the socket in one call
        (:func:`node.fastpath.store_direct`) instead of through pynetdicom's DUL thread, one
        queue round trip per PDU, wherever that path applies (plain TCP, Little Endian
        contexts; TLS and anything else take the library's path); encode each next object
        while the archive stores the one before; and, on plain TCP, let the DUL thread wait
        for responses in ``select`` (:func:`node.fastpath.install_requestor`). Default True;
        False only to measure the library's own path.
    tls
        Certificates for destinations with ``tls`` set (:class:`~node.tls.TlsSettings`:
        ``ca_file`` checks the destination, ``cert_file``/``key_file`` are our client
        certificate). A TLS destination without them fails permanently.
    """

    calling_ae: str = "CESTNODE"
    max_pdu: int = 0
    retries: int = 3
    backoff_s: float = 0.5
    connect_timeout_s: float = 5.0
    acse_timeout_s: float = 10.0
    dimse_timeout_s: float = 3.0
    network_timeout_s: float = 30.0
    guard_reactor_race: bool = True
    loop_delay_s: float = 0.0002
    direct_send: bool = True
    tls: TlsSettings | None = None

    def __post_init__(self) -> None:
        _check_ae_title(self.calling_ae, "calling_ae")
        if not isinstance(self.max_pdu, int) or self.max_pdu < 0:
            raise ValueError(f"max_pdu must be 0 (no limit) or a positive integer, got {self.max_pdu!r}")
        if 0 < self.max_pdu < 4096:
            raise ValueError(f"max_pdu {self.max_pdu} is below 4096 bytes, too small to be useful")
        if not isinstance(self.retries, int) or self.retries < 0:
            raise ValueError(f"retries must be a non-negative integer, got {self.retries!r}")
        if self.backoff_s < 0:
            raise ValueError(f"backoff_s must be >= 0, got {self.backoff_s!r}")
        if not 0 <= self.loop_delay_s <= 0.1:
            raise ValueError(f"loop_delay_s must be between 0 and 0.1 s, got {self.loop_delay_s!r}")
        for name in ("connect_timeout_s", "acse_timeout_s", "dimse_timeout_s", "network_timeout_s"):
            if not getattr(self, name) > 0:
                raise ValueError(f"{name} must be > 0 seconds, got {getattr(self, name)!r}")


#: Outcomes of one object.
STORED = "stored"
WARNING = "warning"
FAILED = "failed"
UNSENT = "unsent"


@dataclass
class ItemResult:
    """What happened to one object of the batch."""

    index: int
    sop_class_uid: str
    sop_instance_uid: str
    outcome: str = UNSENT
    status: int | None = None
    attempts: int = 0
    detail: str = ""

    @property
    def stored(self) -> bool:
        """True when the archive acknowledged it (success or warning status)."""
        return self.outcome in (STORED, WARNING)


@dataclass
class AttemptReport:
    """One association opened (or tried) for the batch."""

    number: int
    elapsed_ms: float
    offered: int = 0
    acknowledged: int = 0
    established: bool = False
    tcp_nodelay: bool | None = None
    error: str = ""
    recovered_from_ledger: int = 0
    reused: bool = False
    """The association was a :class:`SendSession`'s, opened by an earlier batch."""
    direct: int = 0
    """Objects sent by the direct path (:attr:`SendSettings.direct_send`)."""
    fast_responses: int = 0
    """C-STORE responses the association decoded itself (:func:`node.fastpath.install_requestor`),
    counted over the association's life so far (a kept association carries its count)."""


@dataclass
class SendReport:
    """The outcome of sending one batch to one destination."""

    key: str
    destination: Destination
    items: list[ItemResult]
    attempts: list[AttemptReport] = field(default_factory=list)
    elapsed_ms: float = 0.0

    @property
    def sent(self) -> int:
        """Objects the archive acknowledged (success or warning)."""
        return sum(1 for i in self.items if i.stored)

    @property
    def warnings(self) -> int:
        """Objects stored with a warning status."""
        return sum(1 for i in self.items if i.outcome == WARNING)

    @property
    def failed(self) -> int:
        """Objects not stored: refused by a failure status or never acknowledged."""
        return len(self.items) - self.sent

    @property
    def ok(self) -> bool:
        """True when every object was acknowledged."""
        return self.failed == 0

    def summary(self) -> dict[str, Any]:
        """Counts and timings for the latency log (no patient attribute)."""
        return {
            "key": self.key,
            "destination": str(self.destination),
            "objects": len(self.items),
            "sent": self.sent,
            "warnings": self.warnings,
            "failed": self.failed,
            "attempts": [round(a.elapsed_ms, 1) for a in self.attempts],
            "elapsed_ms": round(self.elapsed_ms, 1),
        }


def classify_status(status: int) -> tuple[str, bool]:
    """Sort a C-STORE response status into an outcome.

    Returns ``(outcome, retry)``: the outcome is :data:`STORED`, :data:`WARNING` or
    :data:`FAILED`; ``retry`` is True for a failure worth resending later (out of resources,
    PS3.7 C.4.2.1.4 "Refused: Out of Resources" 0xA7xx, and the general "resource limitation"
    0x0213 of PS3.7 Annex C). Data-set or SOP-class errors (0xA9xx, 0xCxxx, 0x0122, ...) would
    fail the same way again and are not resent.
    """
    if status == 0x0000:
        return STORED, False
    if status in WARNING_STATUSES or (status & 0xF000) == 0xB000:
        return WARNING, False
    if (status & 0xFF00) == 0xA700 or status == 0x0213:
        return FAILED, True
    return FAILED, False


def _transfer_syntax(ds: Dataset, index: int) -> UID:
    meta = getattr(ds, "file_meta", None)
    ts = getattr(meta, "TransferSyntaxUID", None) if meta is not None else None
    if not ts:
        raise ValueError(
            f"dataset {index} has no file_meta.TransferSyntaxUID: its encoding is unknown"
        )
    return UID(ts)


def build_contexts(datasets: Sequence[Dataset]) -> list[PresentationContext]:
    """Presentation contexts for the SOP classes and transfer syntaxes present in a batch.

    One context per (SOP class, transfer syntax) found; an uncompressed transfer syntax also
    offers Implicit VR Little Endian as a fallback (the default transfer syntax every SCP
    accepts, PS3.5 10.1), which pynetdicom converts to when the peer prefers it.
    """
    pairs: dict[tuple[UID, UID], None] = {}
    for i, ds in enumerate(datasets):
        pairs[(UID(ds.SOPClassUID), _transfer_syntax(ds, i))] = None
    if len(pairs) > MAX_CONTEXTS:
        raise ValueError(
            f"the batch needs {len(pairs)} presentation contexts; one association holds at most "
            f"{MAX_CONTEXTS}"
        )
    contexts = []
    for sop_class, ts in pairs:
        cx = PresentationContext()
        cx.abstract_syntax = sop_class
        syntaxes: list[str | bytes | UID] = [ts]
        if ts in _UNCOMPRESSED and ts != ImplicitVRLittleEndian:
            syntaxes.append(ImplicitVRLittleEndian)
        cx.transfer_syntax = syntaxes
        contexts.append(cx)
    return contexts


def _validate(datasets: Sequence[Dataset]) -> None:
    seen: dict[str, int] = {}
    for i, ds in enumerate(datasets):
        for kw in ("SOPClassUID", "SOPInstanceUID"):
            if not getattr(ds, kw, None):
                raise ValueError(f"dataset {i} has no {kw}")
        uid = str(ds.SOPInstanceUID)
        if uid in seen:
            raise ValueError(
                f"datasets {seen[uid]} and {i} have the same SOPInstanceUID; a batch holds each "
                "instance once"
            )
        seen[uid] = i
        _transfer_syntax(ds, i)


class _Ledger:
    """C-STORE responses decoded on one association, by Message ID Being Responded To.

    Filled from ``EVT_DIMSE_RECV`` in the DUL thread, which sees every message the library
    decodes before it is queued, and from :meth:`record` for those the fast send path decodes
    (also in the DUL thread, before the queue), so a response the reactor thread took off
    the queue is still known here.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._status: dict[int, int] = {}

    def on_dimse_recv(self, event: evt.Event) -> None:
        msg = event.message
        if type(msg).__name__ != "C_STORE_RSP":
            return
        cs = msg.command_set
        msg_id = cs.get("MessageIDBeingRespondedTo")
        status = cs.get("Status")
        if msg_id is not None and status is not None:
            with self._lock:
                self._status[int(msg_id)] = int(status)

    def record(self, msg_id: int, status: int) -> None:
        """A response decoded by the fast send path (:func:`node.fastpath.on_store_response`),
        which does not trigger ``EVT_DIMSE_RECV``."""
        with self._lock:
            self._status[int(msg_id)] = int(status)

    def status(self, msg_id: int) -> int | None:
        with self._lock:
            return self._status.get(msg_id)


class ResponseQueue(queue.Queue[Any]):
    """DIMSE message queue whose non-blocking ``get`` leaves responses for the blocking one.

    Items are pynetdicom's ``(context_id, primitive)`` pairs, or ``(None, None)`` put by its
    state machine when the association ends. ``get(block=False)`` (the association reactor's
    poll for incoming requests) returns only a request at the head of the queue and raises
    ``queue.Empty`` otherwise; ``get(block=True)`` (``send_c_store`` waiting for its answer)
    behaves as usual. The check and the removal happen under the queue's own lock.
    """

    def get(self, block: bool = True, timeout: float | None = None) -> Any:
        if block:
            return super().get(block, timeout)
        with self.not_empty:
            if not self._qsize() or not _is_request(self.queue[0]):
                raise queue.Empty
            item = self._get()
            self.not_full.notify()
            return item


def _is_request(item: Any) -> bool:
    _, msg = item
    if msg is None:
        return False
    return getattr(msg, "MessageIDBeingRespondedTo", None) is None


def guard_reactor_race(event: evt.Event) -> None:
    """``EVT_CONN_OPEN`` handler: give the association a :class:`ResponseQueue`.

    Runs before the A-ASSOCIATE-RQ is sent, so the queue is still empty.
    """
    dimse = event.assoc.dimse
    old = dimse.msg_queue
    new = ResponseQueue()
    while True:  # nothing is expected here; keep anything already queued, in order
        try:
            new.put(old.get(block=False))
        except queue.Empty:
            break
    dimse.msg_queue = new


def set_tcp_nodelay(event: evt.Event) -> None:
    """``EVT_CONN_OPEN`` handler: switch Nagle's algorithm off on the association's socket.

    pynetdicom never sets TCP_NODELAY; this is the public hook where the connected socket
    (``event.assoc.dul.socket.socket``) is reachable, on both the requestor and the acceptor side.
    """
    assoc_socket = event.assoc.dul.socket
    sock = assoc_socket.socket if assoc_socket is not None else None
    if sock is not None:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def tcp_nodelay_of(assoc: Association) -> bool | None:
    """Whether TCP_NODELAY is on for an association's socket (None when it has none)."""
    assoc_socket = assoc.dul.socket
    sock = assoc_socket.socket if assoc_socket is not None else None
    if sock is None:
        return None
    try:
        return bool(sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY))
    except OSError:
        return None


class SendSession:
    """An association kept open between the batches sent to one destination.

    Made by :meth:`Sender.session`; pass it to :meth:`Sender.send` (``session=``). The first
    send opens an association that proposes ``contexts`` (every SOP class and transfer syntax
    the caller will send, :func:`contexts_for`) besides the batch's own, and leaves it open;
    the next sends to the same destination reuse it while it is established and has accepted
    every (SOP class, transfer syntax) the batch needs. A retry, a lost association or a batch
    it cannot carry opens a new one as :meth:`Sender.send` always does. Message IDs run on
    across batches, so a response known from the ledger is never taken for another's. Close
    it (or use it as a context manager) to release the association. One thread at a time.
    """

    def __init__(self, contexts: Sequence[tuple[str, str]] = ()) -> None:
        self.contexts = [(UID(c), UID(t)) for c, t in contexts]
        self.assoc: Association | None = None
        self.destination: Destination | None = None
        self.ledger: _Ledger | None = None
        self.accepted: set[tuple[UID, UID]] = set()
        self.msg_id = 0
        self.associations = 0
        """Associations this session opened (for the benchmarks and tests)."""

    def usable(self, dest: Destination, pairs: Iterable[tuple[UID, UID]]) -> bool:
        return (self.assoc is not None and self.assoc.is_established and self.destination == dest
                and all(p in self.accepted for p in pairs))

    def keep(self, assoc: Association, dest: Destination, ledger: _Ledger,
             accepted: set[tuple[UID, UID]], msg_id: int) -> None:
        if self.assoc is not None and self.assoc is not assoc:
            self.close()
        self.assoc, self.destination, self.ledger = assoc, dest, ledger
        self.accepted, self.msg_id = accepted, msg_id

    def close(self) -> None:
        assoc, self.assoc = self.assoc, None
        if assoc is not None and assoc.is_established:
            assoc.release()

    def __enter__(self) -> SendSession:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def contexts_for(datasets: Sequence[Dataset]) -> list[tuple[str, str]]:
    """The (SOP class, transfer syntax) pairs of some data sets, for :class:`SendSession`."""
    return list(dict.fromkeys((str(d.SOPClassUID), str(_transfer_syntax(d, i)))
                              for i, d in enumerate(datasets)))


class Sender:
    """C-STORE SCU for output batches.

    Parameters
    ----------
    settings
        Timeouts, retries and our AE title (:class:`SendSettings`).
    stop
        Optional event: when set, back-off waits end at once and no further attempt starts
        (used on shutdown); what is unsent is reported as such.

    Examples
    --------
    >>> sender = Sender(SendSettings(calling_ae="CESTNODE"))        # doctest: +SKIP
    >>> report = sender.send(datasets, ("ARCHIVE", "127.0.0.1", 104))  # doctest: +SKIP
    >>> report.ok, report.sent, report.failed                       # doctest: +SKIP
    """

    def __init__(
        self, settings: SendSettings | None = None, *, stop: threading.Event | None = None
    ) -> None:
        self.settings = settings or SendSettings()
        self._stop = stop or threading.Event()

    # -- public -------------------------------------------------------------------------
    def send(
        self,
        datasets: Sequence[Dataset],
        destination: Destination | DestinationLike | tuple[str, str, int],
        *,
        key: str = "",
        session: SendSession | None = None,
    ) -> SendReport:
        """Send ``datasets`` to ``destination`` over one association (more only to retry).

        With ``session`` the first attempt reuses the session's open association when it can
        carry the batch, and the association stays open afterwards (:class:`SendSession`).

        Parameters
        ----------
        datasets
            pydicom Datasets with SOPClassUID, SOPInstanceUID and file_meta.TransferSyntaxUID.
        destination
            ``(ae_title, host, port)``, a :class:`Destination` or an object with those fields.
        key
            Pseudonymous series key for the logs.

        Returns
        -------
        SendReport
            Per-object outcome and status, counts, and one :class:`AttemptReport` per
            association tried. It never raises for network trouble: that is in the report.

        Raises
        ------
        ValueError
            When a dataset lacks a UID or transfer syntax, or two have the same SOPInstanceUID.
        """
        dest = Destination.coerce(destination)
        datasets = list(datasets)
        _validate(datasets)
        items = [
            ItemResult(i, str(ds.SOPClassUID), str(ds.SOPInstanceUID))
            for i, ds in enumerate(datasets)
        ]
        report = SendReport(key=key, destination=dest, items=items)
        t0 = time.perf_counter()
        pending = list(range(len(datasets)))
        max_attempts = 1 + self.settings.retries
        for number in range(1, max_attempts + 1):
            if not pending:
                break
            if number > 1:
                wait = self.settings.backoff_s * 2 ** (number - 2)
                if self._stop.wait(wait):
                    break
            elif self._stop.is_set():
                break
            attempt, retry, permanent = self._attempt(number, datasets, pending, items, dest,
                                                      session)
            report.attempts.append(attempt)
            pending = retry
            if permanent:
                break
        report.elapsed_ms = (time.perf_counter() - t0) * 1000.0
        for i in pending:
            if items[i].status is not None:
                items[i].outcome = FAILED  # refused with a transient status every time
            elif not items[i].detail:
                items[i].detail = "not acknowledged"
        self._log(report)
        return report

    def send_batch(
        self, batch: OutputBatch, destinations: Iterable[Destination | DestinationLike | tuple[str, str, int]]
    ) -> list[SendReport]:
        """Send an :class:`~node.types.OutputBatch` to every destination, in parallel
        (one association per destination); reports in the order of ``destinations``."""
        dests = [Destination.coerce(d) for d in destinations]
        if not dests:
            raise ValueError("no destination to send to")
        if len(dests) == 1:
            return [self.send(batch.datasets, dests[0], key=batch.key)]
        with ThreadPoolExecutor(max_workers=len(dests), thread_name_prefix="send") as pool:
            futures = [pool.submit(self.send, batch.datasets, d, key=batch.key) for d in dests]
            return [f.result() for f in futures]

    # -- one association ------------------------------------------------------------------
    def session(self, contexts: Sequence[tuple[str, str]] = ()) -> SendSession:
        """A :class:`SendSession` proposing ``contexts`` on the associations it opens."""
        return SendSession(contexts)

    def _make_ae(self) -> AE:
        s = self.settings
        ae = _FastWaitAE(ae_title=s.calling_ae) if s.direct_send else AE(ae_title=s.calling_ae)
        ae.maximum_pdu_size = s.max_pdu
        ae.connection_timeout = s.connect_timeout_s
        ae.acse_timeout = s.acse_timeout_s
        ae.dimse_timeout = s.dimse_timeout_s
        ae.network_timeout = s.network_timeout_s
        return ae

    def _attempt(
        self,
        number: int,
        datasets: list[Dataset],
        pending: list[int],
        items: list[ItemResult],
        dest: Destination,
        session: SendSession | None = None,
    ) -> tuple[AttemptReport, list[int], bool]:
        """Open one association (or reuse the session's) and send what is pending.

        Returns the attempt's report, the indices still to resend, and whether the failure is
        permanent (no point retrying: association rejected permanently).
        """
        t0 = time.perf_counter()
        attempt = AttemptReport(number=number, elapsed_ms=0.0, offered=len(pending))
        subset = [datasets[i] for i in pending]
        needed = {(UID(ds.SOPClassUID), _transfer_syntax(ds, 0)) for ds in subset}
        permanent = False
        if session is not None and session.usable(dest, needed):
            assert session.assoc is not None and session.ledger is not None
            attempt.reused = True
            return self._run(attempt, session.assoc, session.ledger, session.accepted,
                             datasets, pending, items, dest, session, t0)
        ae = self._make_ae()
        contexts = build_contexts(subset)
        if session is not None:
            have = {(UID(str(cx.abstract_syntax)), UID(str(cx.transfer_syntax[0])))
                    for cx in contexts}
            for sop_class, ts in session.contexts:
                if (sop_class, ts) in have or len(contexts) >= MAX_CONTEXTS:
                    continue
                cx = PresentationContext()
                cx.abstract_syntax = sop_class
                cx.transfer_syntax = ([ts, ImplicitVRLittleEndian]
                                      if ts in _UNCOMPRESSED and ts != ImplicitVRLittleEndian
                                      else [ts])
                contexts.append(cx)
        ae.requested_contexts = contexts
        ledger = _Ledger()
        rejection: dict[str, int] = {}

        def on_acse_recv(event: evt.Event) -> None:
            prim = getattr(event, "primitive", None)
            result = getattr(prim, "result", None)
            if type(prim).__name__ == "A_ASSOCIATE" and result in (1, 2):
                rejection["result"] = int(result)
                rejection["source"] = int(getattr(prim, "result_source", 0) or 0)
                rejection["reason"] = int(getattr(prim, "diagnostic", 0) or 0)

        connected = threading.Event()

        def on_conn_open(event: evt.Event) -> None:
            connected.set()
            set_tcp_nodelay(event)
            if hasattr(event.assoc.dul, "_run_loop_delay"):  # pynetdicom 2.x-3.x
                event.assoc.dul._run_loop_delay = self.settings.loop_delay_s
            if self.settings.guard_reactor_race:
                guard_reactor_race(event)
            fastpath.on_store_response(event.assoc, ledger.record)  # where it decodes them

        handlers: list[Any] = [
            (evt.EVT_CONN_OPEN, on_conn_open),
            (evt.EVT_DIMSE_RECV, ledger.on_dimse_recv),
            (evt.EVT_ACSE_RECV, on_acse_recv),
        ]
        tls_args = None
        if dest.tls:
            try:
                if self.settings.tls is None:
                    raise ValueError("tls: the destination asks for TLS and no [tls] "
                                     "certificates are configured")
                tls_args = (client_context(self.settings.tls), dest.host)
            except ValueError as exc:
                attempt.error = str(exc)
                for i in pending:
                    items[i].detail = attempt.error
                attempt.elapsed_ms = (time.perf_counter() - t0) * 1000.0
                LOG.error("send to %s: %s", dest, exc)
                return attempt, list(pending), True
        if session is not None:
            session.close()  # a new association replaces the one it could not use
            session.associations += 1
        assoc = ae.associate(
            dest.host, dest.port, ae_title=dest.ae_title, max_pdu=self.settings.max_pdu,
            evt_handlers=handlers, tls_args=tls_args,
        )
        attempt.tcp_nodelay = tcp_nodelay_of(assoc)
        if not assoc.is_established:
            if assoc.is_rejected:
                kind = "permanently" if rejection.get("result") == 1 else "transiently"
                attempt.error = (
                    f"association rejected {kind} by {dest.ae_title} (source "
                    f"{rejection.get('source')}, reason {rejection.get('reason')})"
                )
                permanent = rejection.get("result") == 1
            elif not connected.is_set():
                attempt.error = f"cannot connect to {dest}" + (
                    " (TCP or TLS handshake failed)" if dest.tls else "")
            elif assoc.is_aborted:
                attempt.error = f"association aborted by {dest}"
            else:
                attempt.error = f"no association with {dest} (ACSE timeout)"
            for i in pending:
                items[i].detail = attempt.error
            self._end(attempt, number, dest, t0, still=True)
            return attempt, list(pending), permanent
        accepted = {
            (UID(str(cx.abstract_syntax)), UID(ts))
            for cx in assoc.accepted_contexts
            for ts in cx.transfer_syntax
        }
        return self._run(attempt, assoc, ledger, accepted, datasets, pending, items, dest,
                         session, t0)

    def _run(self, attempt: AttemptReport, assoc: Association, ledger: _Ledger,
             accepted: set[tuple[UID, UID]], datasets: list[Dataset], pending: list[int],
             items: list[ItemResult], dest: Destination, session: SendSession | None,
             t0: float) -> tuple[AttemptReport, list[int], bool]:
        """Send ``pending`` on an established association; keep it in ``session`` or release."""
        attempt.established = True
        accepted_classes = {c for c, _ in accepted}
        still: list[int] = []
        permanent = False
        msg_id = session.msg_id if session is not None and session.assoc is assoc else 0
        ahead: dict[int, bytes] = {}  # the next object, encoded while the archive stores one
        try:
            for pos, i in enumerate(pending):
                ds = datasets[i]
                item = items[i]
                sop_class = UID(ds.SOPClassUID)
                if sop_class not in accepted_classes:
                    item.outcome = FAILED
                    item.detail = f"SOP class {sop_class.name} not accepted by {dest.ae_title}"
                    continue
                if not assoc.is_established:
                    still.extend(pending[pos:])
                    break
                msg_id = msg_id % 65535 + 1
                item.attempts += 1
                try:
                    rsp = None
                    if self.settings.direct_send and self.settings.guard_reactor_race:
                        then = None
                        if pos + 1 < len(pending):
                            after = pending[pos + 1]
                            then = partial(_encode_ahead, ahead, after, datasets[after])
                        rsp = fastpath.store_direct(assoc, ds, msg_id,
                                                    data=ahead.pop(i, None), then=then)
                        attempt.direct += rsp is not None
                    if rsp is None:  # the direct path does not apply: the library's
                        rsp = assoc.send_c_store(ds, msg_id=msg_id)
                except (RuntimeError, OSError, ValueError, AttributeError) as exc:
                    # RuntimeError: association gone; ValueError: no usable context or an
                    # encoding failure; AttributeError: pynetdicom cannot tell the encoding.
                    if not assoc.is_established:
                        item.detail = f"association lost: {type(exc).__name__}"
                        still.extend(pending[pos:])
                        break
                    item.outcome = FAILED
                    item.detail = f"cannot send: {exc}"
                    continue
                status = rsp.get("Status") if rsp is not None else None
                if status is None:
                    status = ledger.status(msg_id)
                    if status is not None:
                        attempt.recovered_from_ledger += 1
                        LOG.warning(
                            "send %s to %s: response to message %d was taken by the library's "
                            "reactor; status 0x%04X taken from the ledger",
                            f"object {item.index}", dest, msg_id, status,
                        )
                if status is None:
                    item.detail = "no response (DIMSE timeout or association lost)"
                    still.append(i)
                    if not assoc.is_established:
                        still.extend(pending[pos + 1:])
                        break
                    continue
                item.status = int(status)
                outcome, retry = classify_status(int(status))
                item.outcome = outcome
                if outcome == WARNING:
                    item.detail = WARNING_STATUSES.get(int(status), "warning status")
                    attempt.acknowledged += 1
                elif outcome == STORED:
                    item.detail = ""
                    attempt.acknowledged += 1
                else:
                    item.detail = f"refused with status 0x{int(status):04X}"
                    if retry:
                        item.outcome = UNSENT
                        still.append(i)
            return attempt, still, permanent
        finally:
            attempt.fast_responses = int(getattr(getattr(assoc, "_cest_fast", None),
                                                 "fast_count", 0))
            keep = (session is not None and assoc.is_established and not still
                    and not attempt.error)
            if keep:
                assert session is not None
                session.keep(assoc, dest, ledger, accepted, msg_id)
            else:
                if session is not None and session.assoc is assoc:
                    session.assoc = None
                if assoc.is_established:
                    assoc.release()
            self._end(attempt, attempt.number, dest, t0, still=bool(still))

    @staticmethod
    def _end(attempt: AttemptReport, number: int, dest: Destination, t0: float, *,
             still: bool) -> None:
        attempt.elapsed_ms = (time.perf_counter() - t0) * 1000.0
        if attempt.error or still:
            LOG.warning(
                "send to %s, attempt %d: %d of %d acknowledged in %.0f ms%s",
                dest, number, attempt.acknowledged, attempt.offered, attempt.elapsed_ms,
                f" ({attempt.error})" if attempt.error else "",
            )

    @staticmethod
    def _log(report: SendReport) -> None:
        key = report.key or "(no key)"
        if report.ok:
            LOG.info(
                "series %s: %d objects stored at %s (%d with warnings) in %.0f ms, %d association(s)",
                key, report.sent, report.destination, report.warnings, report.elapsed_ms,
                len(report.attempts),
            )
            return
        LOG.error(
            "series %s: %d of %d objects NOT stored at %s after %d attempt(s); %d stored",
            key, report.failed, len(report.items), report.destination, len(report.attempts),
            report.sent,
        )


def _encode_ahead(ahead: dict[int, bytes], index: int, ds: Dataset) -> None:
    """Encode object ``index`` for the direct path now (the archive is storing the one
    before); whatever goes wrong is left for its own turn, where it is reported as its own."""
    try:
        data = fastpath.encode_direct(ds)
    except Exception:  # noqa: BLE001 - raised again, and reported, when its turn comes
        return
    if data is not None:
        ahead[index] = data


class _FastWaitAE(AE):
    """An AE whose requestor associations wait for responses in ``select``
    (:func:`node.fastpath.install_requestor`) instead of pynetdicom's polling loop; TLS
    associations keep the library's loop (an SSL socket can hold decrypted bytes that
    ``select`` does not see)."""

    def _create_socket(self, assoc: Any, address: Any, tls_args: Any) -> Any:
        sock = super()._create_socket(assoc, address, tls_args)
        if tls_args is None:
            fastpath.install_requestor(assoc, sock)
        return sock


def send_batch(
    datasets: Sequence[Dataset],
    destination: Destination | DestinationLike | tuple[str, str, int],
    *,
    calling_ae: str = "CESTNODE",
    max_pdu: int = 0,
    timeout_s: float = 3.0,
    retries: int = 3,
    backoff_s: float = 0.5,
    key: str = "",
) -> SendReport:
    """Send datasets to one destination over one association; see :meth:`Sender.send`.

    ``timeout_s`` is the DIMSE timeout (the wait for each response); connection and
    association timeouts are the :class:`SendSettings` defaults.
    """
    settings = SendSettings(
        calling_ae=calling_ae, max_pdu=max_pdu, retries=retries, backoff_s=backoff_s,
        dimse_timeout_s=timeout_s,
    )
    return Sender(settings).send(datasets, destination, key=key)


@dataclass
class EchoResult:
    """Outcome of a C-ECHO."""

    ok: bool
    status: int | None
    detail: str
    elapsed_ms: float

    def __bool__(self) -> bool:
        return self.ok


def echo(
    ae_title: str,
    host: str,
    port: int,
    *,
    calling_ae: str = "CESTNODE",
    timeout_s: float = 5.0,
    tls: TlsSettings | None = None,
) -> EchoResult:
    """C-ECHO (Verification, PS3.4 Annex A) to ``ae_title@host:port``.

    With ``tls`` the association runs over TLS (:func:`node.tls.client_context`). Returns an
    :class:`EchoResult` that is truthy when the peer answered 0x0000.
    """
    dest = Destination(ae_title, host, port)
    _check_ae_title(calling_ae, "calling_ae")
    ae = AE(ae_title=calling_ae)
    ae.connection_timeout = timeout_s
    ae.acse_timeout = timeout_s
    ae.dimse_timeout = timeout_s
    ae.network_timeout = timeout_s
    ae.add_requested_context(Verification)
    t0 = time.perf_counter()
    handlers: list[Any] = [(evt.EVT_CONN_OPEN, set_tcp_nodelay), (evt.EVT_CONN_OPEN, guard_reactor_race)]
    tls_args = (client_context(tls), dest.host) if tls is not None else None
    assoc = ae.associate(dest.host, dest.port, ae_title=dest.ae_title, evt_handlers=handlers,
                         tls_args=tls_args)
    try:
        if not assoc.is_established:
            why = "rejected" if assoc.is_rejected else "aborted" if assoc.is_aborted else "no connection"
            return EchoResult(False, None, f"association {why}", (time.perf_counter() - t0) * 1e3)
        rsp = assoc.send_c_echo()
        status = rsp.get("Status") if rsp is not None else None
        if status is None:
            return EchoResult(False, None, "no response", (time.perf_counter() - t0) * 1e3)
        return EchoResult(
            int(status) == 0, int(status), f"status 0x{int(status):04X}",
            (time.perf_counter() - t0) * 1e3,
        )
    finally:
        if assoc.is_established:
            assoc.release()
