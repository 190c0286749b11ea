"""The outbox: every derived object on disk and in the spool's index before it is sent, and its
send state per destination until the destination acknowledges it or the retry time runs out.

Flow of one batch (:meth:`Outbox.put`, then a send, then :meth:`Outbox.record`):

1. One transaction adds a row per object to ``outputs`` and a row per (object, destination)
   to ``sends`` in state ``pending``, and claims for sending (``sending``) every row of the
   batch not yet ``sent``. Objects already known (a rebuild after a crash) keep their send
   state: what a destination acknowledged is never sent to it again. Nothing is written to a
   file yet: the send goes from memory, so the outbox costs one transaction before it.
2. After the send, one transaction records each object's outcome: ``sent`` (success or warning
   status), ``failed`` (a status that would fail the same way again: PS3.7 0xA9xx, 0xCxxx, ...),
   or ``retrying`` with the time of the next attempt; each object that is not ``sent`` is then
   written to ``spool_dir/outbox/<series key>/<SOP Instance UID>.dcm`` (temporary file and
   ``os.replace``, so a file is whole or absent) for the retries.
3. An object whose row exists but whose file does not (the process was killed between 1 and 2,
   or a power cut lost the unsynced file) is rebuilt from the spooled instances, which are
   durable: the worker finds the file missing and the node processes the series again
   (:meth:`OutboxWorker.run_due`, ``on_missing``). Output UIDs are deterministic
   (:func:`node.service.output_series_uid`, :func:`node.derive.output_uid`), so the rebuilt
   object is the same object. The files are **not** fsync'd, for the same reason.

Send states: ``pending`` -> ``sending`` -> ``sent`` | ``retrying`` | ``failed``;
``retrying`` -> ``sending`` when due. On start (:meth:`Outbox.resume`) ``pending`` and
``sending`` rows, whose outcome a crash may have lost, become ``retrying``, due at once: a
destination may then receive an object twice, with the same SOP Instance UID (idempotent at
the archive, PS3.4 B.4.1: the same SOP Instance is the same object).

Back-off (:class:`RetryPolicy`): the n-th retry waits ``d = min(backoff_max_s, backoff_s * 2**(n-1))``
with "equal jitter", ``d/2 + U(0, d/2)`` (common practice for retry storms, from memory), until
``retry_for_s`` after the object's first attempt; then it is ``failed``, logged as an error and
listed by ``cest-node status``. Every attempt is logged with its count and the next wait.

:class:`OutboxWorker` is the thread that sends what is due. Logs name series by their
pseudonymous key and give counts only.
"""

from __future__ import annotations

import logging
import os
import random
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from pydicom import Dataset, dcmread

from node.send import FAILED, Destination, DestinationLike, Sender, SendReport, classify_status

if TYPE_CHECKING:
    from node.types import OutputBatch

__all__ = ["SEND_STATES", "Outbox", "OutboxWorker", "PendingSend", "RetryPolicy"]

log = logging.getLogger("cest_node.outbox")

SEND_STATES = ("pending", "sending", "sent", "retrying", "failed")
"""States of one object at one destination."""

OUTBOX_FOLDER = "outbox"


@dataclass(frozen=True)
class RetryPolicy:
    """How long and how often an unsent object is retried.

    Attributes
    ----------
    retry_for_s
        Time from the object's first attempt after which it is marked failed.
    backoff_s
        Wait before the first retry (before jitter).
    backoff_max_s
        Longest wait between two attempts (before jitter).
    """

    retry_for_s: float = 86400.0
    backoff_s: float = 5.0
    backoff_max_s: float = 600.0

    def __post_init__(self) -> None:
        if not self.retry_for_s >= 0:
            raise ValueError(f"retry_for_s must be >= 0 seconds, got {self.retry_for_s!r}")
        if not self.backoff_s > 0:
            raise ValueError(f"backoff_s must be > 0 seconds, got {self.backoff_s!r}")
        if not self.backoff_max_s >= self.backoff_s:
            raise ValueError(f"backoff_max_s must be >= backoff_s ({self.backoff_s!r}), got "
                             f"{self.backoff_max_s!r}")

    def delay(self, attempt: int, rng: random.Random) -> float:
        """Wait after the ``attempt``-th failed attempt (1-based): exponential, equal jitter.

        ``d = min(backoff_max_s, backoff_s * 2**(attempt - 1))``, returns ``d/2 + U(0, d/2)``.
        """
        if attempt < 1:
            raise ValueError(f"attempt must be >= 1, got {attempt}")
        d = min(self.backoff_max_s, self.backoff_s * 2.0 ** min(attempt - 1, 60))
        return d / 2.0 + rng.uniform(0.0, d / 2.0)


@dataclass(frozen=True)
class PendingSend:
    """One object due at one destination."""

    sop_uid: str
    series_key: str
    method: str
    path: Path
    destination: str
    attempts: int
    first_at: float


class Outbox:
    """Derived objects on disk and their send states in the spool's index.

    Parameters
    ----------
    spool_root
        The spool folder; its ``index.sqlite`` must already be at schema 2 or later
        (a :class:`~node.spool.Spool` opened on it migrates it).
    policy
        The retry policy.
    rng
        Random generator of the jitter (seed it for reproducible waits).

    Thread-safe: its own connection to the index, under a lock.
    """

    def __init__(self, spool_root: str | Path, *, policy: RetryPolicy | None = None,
                 rng: random.Random | None = None):
        self.root = Path(spool_root)
        self.folder = self.root / OUTBOX_FOLDER
        self.folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        self.policy = policy or RetryPolicy()
        self.rng = rng or random.Random()
        db_path = self.root / "index.sqlite"
        if not db_path.exists():
            raise ValueError(f"outbox: {db_path} does not exist (open the Spool first)")
        self._db = sqlite3.connect(db_path, check_same_thread=False, isolation_level=None,
                                   timeout=30.0)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=NORMAL")
        version = int(self._db.execute("PRAGMA user_version").fetchone()[0])
        if version < 2:
            self._db.close()
            raise ValueError(f"outbox: index schema {version} has no outbox tables (needs 2)")
        self._lock = threading.Lock()
        self._known_dirs: set[str] = set()
        self.changed = threading.Condition()
        """Notified when rows become due (a failed send recorded, :meth:`resume`)."""

    def close(self) -> None:
        with self._lock:
            self._db.close()

    # ------------------------------------------------------------------ files
    def path_for(self, series_key: str, sop_uid: str) -> Path:
        return self.folder / series_key / f"{sop_uid}.dcm"

    def _write(self, series_key: str, ds: Dataset) -> Path:
        folder = self.folder / series_key
        if series_key not in self._known_dirs:
            folder.mkdir(mode=0o700, parents=True, exist_ok=True)
            self._known_dirs.add(series_key)
        path = folder / f"{ds.SOPInstanceUID}.dcm"
        tmp = folder / f".{ds.SOPInstanceUID}.{threading.get_ident()}.tmp"
        ds.save_as(tmp, enforce_file_format=True)
        os.replace(tmp, path)
        return path

    # ------------------------------------------------------------------ the batch path
    def put(self, batch: OutputBatch, destinations: Sequence[str]) -> dict[str, list[int]]:
        """Record the batch's objects; claim what each destination lacks.

        Returns ``destination -> indices into batch.datasets`` to send now (claimed: state
        ``sending``). Objects already ``sent`` to a destination, or being sent by the worker,
        are not in its list. No file is written here: :meth:`record` writes the objects that
        were not stored.
        """
        paths = [self.path_for(batch.key, str(ds.SOPInstanceUID)) for ds in batch.datasets]
        now = time.time()
        uids = [str(ds.SOPInstanceUID) for ds in batch.datasets]
        claim: dict[str, list[int]] = {d: [] for d in destinations}
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                self._db.executemany(
                    "INSERT INTO outputs(sop_uid, series_key, method, sop_class, series_uid, "
                    "path, built_at) VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT(sop_uid) DO UPDATE "
                    "SET path = excluded.path, built_at = excluded.built_at",
                    [(u, batch.key, batch.label, str(ds.SOPClassUID), str(ds.SeriesInstanceUID),
                      str(p), now) for u, ds, p in zip(uids, batch.datasets, paths, strict=True)])
                self._db.executemany(
                    "INSERT OR IGNORE INTO sends(sop_uid, destination, state, first_at, "
                    "updated_at) VALUES (?, ?, 'pending', ?, ?)",
                    [(u, d, now, now) for u in uids for d in destinations])
                for d in destinations:
                    rows = self._db.execute(
                        f"SELECT sop_uid FROM sends WHERE destination = ? AND state IN "
                        f"('pending', 'retrying', 'failed') AND sop_uid IN "
                        f"({','.join('?' * len(uids))})", (d, *uids)).fetchall()
                    wanted = {r[0] for r in rows}
                    self._db.executemany(
                        "UPDATE sends SET state = 'sending', updated_at = ? WHERE sop_uid = ? "
                        "AND destination = ?", [(now, u, d) for u in wanted])
                    claim[d] = [i for i, u in enumerate(uids) if u in wanted]
                self._db.execute("COMMIT")
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
        return claim

    def record(self, report: SendReport, sop_uids: Sequence[str], *, series_key: str,
               datasets: Sequence[Dataset] | None = None) -> int:
        """Record the outcome of one send to one destination; returns the objects not stored.

        ``sop_uids[i]`` is the object of ``report.items[i]``; ``datasets[i]``, when given (a
        send from memory), is written to its outbox file unless it was stored.
        """
        if datasets is not None:  # the files first: a row that says "retry" has its file
            for ds, item in zip(datasets, report.items, strict=True):
                if not item.stored:
                    self._write(series_key, ds)
        dest = str(report.destination)
        now = time.time()
        wait: float | None = None  # one wait for the whole batch: it is retried together
        retry_at: list[float] = []
        failed_now: list[tuple[str, str]] = []
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                for uid, item in zip(sop_uids, report.items, strict=True):
                    row = self._db.execute(
                        "SELECT attempts, first_at FROM sends WHERE sop_uid = ? AND "
                        "destination = ?", (uid, dest)).fetchone()
                    attempts = (row[0] if row else 0) + 1
                    first_at = row[1] if row else now
                    if item.stored:
                        state, next_at = "sent", None
                    else:
                        permanent = (item.outcome == FAILED and item.status is not None
                                     and not classify_status(item.status)[1])
                        if item.outcome == FAILED and item.status is None:
                            permanent = True  # e.g. SOP class not accepted: would fail again
                        if permanent or now - first_at >= self.policy.retry_for_s:
                            state, next_at = "failed", None
                            failed_now.append((uid, item.detail or "not stored"))
                        else:
                            state = "retrying"
                            if wait is None:
                                wait = self.policy.delay(attempts, self.rng)
                            next_at = now + wait
                            retry_at.append(next_at)
                    self._db.execute(
                        "UPDATE sends SET state = ?, attempts = ?, next_at = ?, updated_at = ?, "
                        "status = ?, detail = ? WHERE sop_uid = ? AND destination = ?",
                        (state, attempts, next_at, now, item.status, item.detail[:300], uid,
                         dest))
                self._db.execute("COMMIT")
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
        unsent = len(retry_at) + len(failed_now)
        if retry_at:
            log.warning("series %s: %d of %d objects not stored at %s; retry in %.1f s "
                        "(retrying for up to %g s)", series_key, len(retry_at),
                        len(report.items), dest, min(retry_at) - now, self.policy.retry_for_s)
            with self.changed:
                self.changed.notify_all()
        if failed_now:
            log.error("series %s: %d objects FAILED at %s, not retried further: %s",
                      series_key, len(failed_now), dest, failed_now[0][1])
        self._drop_sent_files([u for u, i in zip(sop_uids, report.items, strict=True)
                               if i.stored])
        return unsent

    def _drop_sent_files(self, uids: Iterable[str]) -> None:
        """Delete the files of objects every destination has acknowledged."""
        uids = list(uids)
        if not uids:
            return
        with self._lock:
            rows = self._db.execute(
                f"SELECT o.sop_uid, o.path FROM outputs o WHERE o.sop_uid IN "
                f"({','.join('?' * len(uids))}) AND NOT EXISTS (SELECT 1 FROM sends s WHERE "
                f"s.sop_uid = o.sop_uid AND s.state != 'sent')", uids).fetchall()
        for _, path in rows:
            Path(path).unlink(missing_ok=True)

    # ------------------------------------------------------------------ retries
    def resume(self) -> int:
        """On start: sends whose outcome a crash may have lost become due now; returns how many."""
        now = time.time()
        with self._lock:
            cur = self._db.execute(
                "UPDATE sends SET state = 'retrying', next_at = ?, updated_at = ? "
                "WHERE state IN ('pending', 'sending')", (now, now))
            n = cur.rowcount
            total = self._db.execute("SELECT COUNT(*) FROM sends WHERE state = 'retrying'"
                                     ).fetchone()[0]
        if total:
            log.info("outbox: %d unsent objects to resume (%d interrupted by the last stop)",
                     total, n)
            with self.changed:
                self.changed.notify_all()
        return int(total)

    def next_due(self, destinations: Sequence[str]) -> float | None:
        """Time of the earliest retry among ``destinations`` (None when nothing waits)."""
        if not destinations:
            return None
        with self._lock:
            row = self._db.execute(
                f"SELECT MIN(next_at) FROM sends WHERE state = 'retrying' AND destination IN "
                f"({','.join('?' * len(destinations))})", tuple(destinations)).fetchone()
        return None if row[0] is None else float(row[0])

    def claim_due(self, destinations: Sequence[str], *, now: float | None = None,
                  limit: int = 500) -> list[PendingSend]:
        """Claim (``sending``) the objects due at ``destinations`` now, oldest first."""
        if not destinations:
            return []
        now = time.time() if now is None else now
        with self._lock:
            self._db.execute("BEGIN IMMEDIATE")
            try:
                rows = self._db.execute(
                    f"SELECT s.sop_uid, o.series_key, o.method, o.path, s.destination, "
                    f"s.attempts, s.first_at FROM sends s JOIN outputs o ON o.sop_uid = s.sop_uid "
                    f"WHERE s.state = 'retrying' AND s.next_at <= ? AND s.destination IN "
                    f"({','.join('?' * len(destinations))}) ORDER BY s.first_at, o.path LIMIT ?",
                    (now, *destinations, limit)).fetchall()
                self._db.executemany(
                    "UPDATE sends SET state = 'sending', updated_at = ? WHERE sop_uid = ? AND "
                    "destination = ?", [(now, r[0], r[4]) for r in rows])
                self._db.execute("COMMIT")
            except BaseException:
                self._db.execute("ROLLBACK")
                raise
        return [PendingSend(r[0], r[1], r[2], Path(r[3]), r[4], int(r[5]), float(r[6]))
                for r in rows]

    def release(self, items: Iterable[PendingSend], *, detail: str) -> None:
        """Give claimed objects back unsent (their file is missing: the series is rebuilt)."""
        now = time.time()
        with self._lock:
            self._db.executemany(
                "UPDATE sends SET state = 'retrying', next_at = ?, updated_at = ?, detail = ? "
                "WHERE sop_uid = ? AND destination = ? AND state = 'sending'",
                [(now + self.policy.backoff_s, now, detail, i.sop_uid, i.destination)
                 for i in items])

    # ------------------------------------------------------------------ reading
    def counts(self) -> dict[str, int]:
        """Objects per send state (one per object and destination)."""
        with self._lock:
            rows = self._db.execute("SELECT state, COUNT(*) FROM sends GROUP BY state").fetchall()
        return {s: 0 for s in SEND_STATES} | {r[0]: int(r[1]) for r in rows}

    def states(self, series_key: str) -> dict[str, int]:
        """Send states of one series' objects."""
        with self._lock:
            rows = self._db.execute(
                "SELECT s.state, COUNT(*) FROM sends s JOIN outputs o ON o.sop_uid = s.sop_uid "
                "WHERE o.series_key = ? GROUP BY s.state", (series_key,)).fetchall()
        return {r[0]: int(r[1]) for r in rows}


class OutboxWorker:
    """The thread that sends what the outbox holds as due, one (series, destination) at a time.

    Parameters
    ----------
    outbox, sender
        Where the due objects are, and the C-STORE SCU.
    destinations
        The configured destinations (objects for others wait in the outbox, listed by status).
    stop
        Set on shutdown.
    on_missing
        ``f(series_key)`` when an object's file is missing or unreadable (rebuild the series).
    """

    def __init__(self, outbox: Outbox, sender: Sender,
                 destinations: Sequence[Destination | DestinationLike], stop: threading.Event, *,
                 on_missing: Callable[[str], None] | None = None):
        self.outbox = outbox
        self.sender = sender
        self.destinations = {str(d): Destination.coerce(d) for d in destinations}
        self.stop = stop
        self.on_missing = on_missing
        self._thread: threading.Thread | None = None

    def start(self) -> OutboxWorker:
        self._thread = threading.Thread(target=self._loop, name="cest-outbox", daemon=True)
        self._thread.start()
        return self

    def join(self, timeout: float = 30.0) -> None:
        with self.outbox.changed:
            self.outbox.changed.notify_all()
        if self._thread is not None:
            self._thread.join(timeout)
            self._thread = None

    def _loop(self) -> None:
        names = list(self.destinations)
        while not self.stop.is_set():
            try:
                self.run_due()
                due = self.outbox.next_due(names)
            except Exception:  # never let a database or file error end the thread
                log.exception("outbox: retry pass failed")
                due = time.time() + 5.0
            wait = None if due is None else max(0.0, due - time.time())
            if wait == 0.0:
                continue
            with self.outbox.changed:
                if not self.stop.is_set():
                    self.outbox.changed.wait(wait if wait is not None else 60.0)

    def run_due(self) -> int:
        """Send every due object now (grouped by series and destination); returns how many."""
        items = self.outbox.claim_due(list(self.destinations))
        groups: dict[tuple[str, str], list[PendingSend]] = {}
        for it in items:
            groups.setdefault((it.series_key, it.destination), []).append(it)
        for (key, dest), group in groups.items():
            if self.stop.is_set():
                self.outbox.release(group, detail="node stopping")
                continue
            datasets: list[Dataset] = []
            sent: list[PendingSend] = []
            missing: list[PendingSend] = []
            for it in group:
                try:
                    datasets.append(dcmread(it.path))
                    sent.append(it)
                except Exception:
                    missing.append(it)
            if missing:
                log.error("series %s: %d outbox files missing or unreadable; the series is "
                          "rebuilt from the spool", key, len(missing))
                self.outbox.release(missing, detail="outbox file missing; rebuilding")
                if self.on_missing is not None:
                    self.on_missing(key)
            if not datasets:
                continue
            log.info("series %s: retrying %d objects to %s (attempt %d)", key, len(datasets),
                     dest, max(i.attempts for i in sent) + 1)
            report = self.sender.send(datasets, self.destinations[dest], key=key)
            self.outbox.record(report, [i.sop_uid for i in sent], series_key=key)
        return len(items)
