"""Durable storage of received instances, and a small SQLite index of series and instances.

Each instance is written to ``spool_dir/<series_key>/<sop-hash>.dcm`` whole before it gets a
name there: into an unnamed file (``O_TMPFILE``) then linked in, or, where the file system has
no unnamed files, through a temporary file in the same folder and ``os.replace`` (atomic on
POSIX). With ``fsync`` the file's data are flushed (``fdatasync``) before it is named and the
folder (``fsync``) after, all BEFORE the receiver answers success. Folders are created 0700 and
files 0600: the spool holds patient data and is for the service user only.

Creating an inode is the dearest step of a write on the node's file systems (about 0.5 ms of
kernel time here, against 0.03 ms for the write and the link), so a background thread keeps a
few unnamed files open and ready (:class:`_FilePool`); the receiving thread only writes, links
and closes. An unnamed file never named (a killed process) is freed by the kernel.

The index (``spool_dir/index.sqlite``, standard-library :mod:`sqlite3`, WAL journal) records
every series (key, protocol, state, counts, times) and every instance (series key, hash, path,
time). Its schema version is ``PRAGMA user_version`` (:data:`SCHEMA_VERSION`); a later version
adds its migration to :data:`_MIGRATIONS`. No patient attribute is stored in the index: series
are named by their pseudonymous key, instances by a hash of the SOP Instance UID.

The instance FILE is the durable record. The first instance of a series commits its series row
(and its own) before :meth:`Spool.store` returns; later instances' rows are committed in
batches (group commit: every :data:`BATCH_ROWS` rows or :data:`BATCH_DELAY_S` after the first
pending one, by the background thread), and before any read of the index, any state change and
:meth:`Spool.close`. Rows a killed process had not committed yet are added again when a spool
is opened: the folders of series still ``receiving`` or ``held`` are compared with the index
(:meth:`Spool.reconcile`).
"""

from __future__ import annotations

import errno
import hashlib
import logging
import os
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path

__all__ = ["BATCH_DELAY_S", "BATCH_ROWS", "SCHEMA_VERSION", "SeriesRecord", "Spool",
           "SpoolError", "instance_hash"]

log = logging.getLogger("cest_node.spool")

BATCH_ROWS = 64
"""Instance rows committed together at most (group commit of the index)."""
BATCH_DELAY_S = 0.02
"""Longest time an instance row waits for its commit while the spool is busy."""
POOL_FILES = 64
"""Unnamed files kept open and ready to be written (:class:`_FilePool`)."""

SCHEMA_VERSION = 2
"""Version of the index schema (``PRAGMA user_version``)."""

# version -> SQL that brings a database from version-1 to version
_MIGRATIONS: dict[int, str] = {
    1: """
    CREATE TABLE IF NOT EXISTS series (
        key          TEXT PRIMARY KEY,
        protocol     TEXT NOT NULL,
        state        TEXT NOT NULL,
        n_instances  INTEGER NOT NULL DEFAULT 0,
        expected     INTEGER,
        first_at     REAL NOT NULL,
        last_at      REAL NOT NULL,
        updated_at   REAL NOT NULL,
        detail       TEXT NOT NULL DEFAULT ''
    );
    CREATE TABLE IF NOT EXISTS instances (
        series_key   TEXT NOT NULL,
        sop_hash     TEXT NOT NULL,
        path         TEXT NOT NULL,
        received_at  REAL NOT NULL,
        PRIMARY KEY (series_key, sop_hash)
    );
    CREATE INDEX IF NOT EXISTS series_state ON series(state);
    """,
    # 2: what became of each series after release, and the outbox (node.outbox): every derived
    # object built (its file under spool_dir/outbox) and its send state per destination
    2: """
    ALTER TABLE series ADD COLUMN deferred TEXT NOT NULL DEFAULT '';
    ALTER TABLE series ADD COLUMN error TEXT NOT NULL DEFAULT '';
    ALTER TABLE series ADD COLUMN processed_at REAL;
    CREATE TABLE IF NOT EXISTS outputs (
        sop_uid      TEXT PRIMARY KEY,
        series_key   TEXT NOT NULL,
        method       TEXT NOT NULL,
        sop_class    TEXT NOT NULL,
        series_uid   TEXT NOT NULL,
        path         TEXT NOT NULL,
        built_at     REAL NOT NULL
    );
    CREATE INDEX IF NOT EXISTS outputs_series ON outputs(series_key);
    CREATE TABLE IF NOT EXISTS sends (
        sop_uid      TEXT NOT NULL,
        destination  TEXT NOT NULL,
        state        TEXT NOT NULL,
        attempts     INTEGER NOT NULL DEFAULT 0,
        first_at     REAL NOT NULL,
        next_at      REAL,
        updated_at   REAL NOT NULL,
        status       INTEGER,
        detail       TEXT NOT NULL DEFAULT '',
        PRIMARY KEY (sop_uid, destination)
    );
    CREATE INDEX IF NOT EXISTS sends_state ON sends(state, next_at);
    """,
}

SERIES_STATES = ("receiving", "complete", "incomplete", "held", "ignored", "deferring",
                 "processed", "failed")
"""Series states: ``receiving`` until the assembler releases it (``complete`` or
``incomplete``) or holds it (``held``); then ``deferring`` (budget-bound outputs built, the
model-based methods in ``deferred`` still to run), ``processed`` (every output built; their
sends are in the outbox) or ``failed`` (processing raised; ``error`` says why)."""


class SpoolError(OSError):
    """The spool could not store an instance (disk full, permissions): answer 0xA700."""


def instance_hash(sop_instance_uid: str) -> str:
    """File-name hash of a SOP Instance UID (SHA-256, 32 hex digits; reveals nothing)."""
    return hashlib.sha256(sop_instance_uid.encode()).hexdigest()[:32]


@dataclass(frozen=True)
class SeriesRecord:
    """One row of the series index."""

    key: str
    protocol: str
    state: str
    n_instances: int
    expected: int | None
    first_at: float
    last_at: float
    updated_at: float
    detail: str


class _FilePool:
    """Unnamed files (``O_TMPFILE``) in one folder, created ahead by a background thread.

    :meth:`take` hands out an open, empty, writable descriptor (or None when the pool is dry
    or the file system has no unnamed files: the caller then creates a named one itself).
    """

    def __init__(self, folder: Path, size: int):
        self.folder = folder
        self.size = size
        self._ready: list[int] = []
        self._lock = threading.Lock()
        self.supported = hasattr(os, "O_TMPFILE")
        self.taken = 0
        self.dry = 0

    def take(self) -> tuple[int | None, bool]:
        """(descriptor or None, whether the pool is below half and wants refilling)."""
        with self._lock:
            fd = self._ready.pop() if self._ready else None
            low = self.supported and len(self._ready) < self.size // 2
        if fd is not None:
            self.taken += 1
        elif self.supported:
            self.dry += 1
        return fd, low

    def wanted(self) -> int:
        with self._lock:
            return self.size - len(self._ready) if self.supported else 0

    def fill(self, stop: threading.Event) -> bool:
        """Create files until the pool is full (from the background thread); False when a
        file could not be created (logged; the caller waits before trying again)."""
        while self.supported and not stop.is_set() and self.wanted() > 0:
            try:
                fd = os.open(self.folder, os.O_TMPFILE | os.O_WRONLY, 0o600)
            except OSError as exc:
                if exc.errno in (errno.EOPNOTSUPP, errno.EISDIR, errno.EINVAL):
                    self.supported = False  # no unnamed files here: named ones, as before
                    return True
                log.warning("spool: cannot create a spare file (%s)", exc.strerror or exc)
                return False
            with self._lock:
                self._ready.append(fd)
        return True

    def close(self) -> None:
        with self._lock:
            fds, self._ready = self._ready, []
        for fd in fds:
            os.close(fd)  # never named: the kernel frees them


class Spool:
    """Instances on disk and the series index.

    Thread-safe: the receiver calls :meth:`store` from several association threads.

    Parameters
    ----------
    root
        The spool folder (created 0700 when missing).
    fsync
        Flush each file's data (``fdatasync``) and its folder (``fsync``) before
        :meth:`store` returns (survives power loss; without it a write survives a killed
        process only).
    """

    def __init__(self, root: str | Path, *, fsync: bool = True):
        self.root = Path(root)
        self._root_text = str(self.root)
        self.fsync = fsync
        _mkdir_private(self.root)
        self._lock = threading.Lock()
        self._known_dirs: set[str] = set()
        self._db = sqlite3.connect(self.root / "index.sqlite", check_same_thread=False,
                                   isolation_level=None)
        os.chmod(self.root / "index.sqlite", 0o600)
        self._db.execute("PRAGMA journal_mode=WAL")
        # WAL + NORMAL: a committed row survives a killed process; the instance file itself
        # carries the durability promise (its own fsync), and reconcile() rebuilds rows from it.
        self._db.execute("PRAGMA synchronous=NORMAL")
        self._migrate()
        # index rows not committed yet: (series key, sop hash, path, time, protocol, expected)
        self._pending: list[tuple[str, str, str, float, str, int | None]] = []
        self._pending_since = 0.0
        self._pending_lock = threading.Lock()
        self._indexed: set[str] = set()  # series whose row this spool has committed
        self._stems: dict[str, set[str]] = {}  # series key -> instance files it holds
        self._pool = _FilePool(self.root, POOL_FILES)
        self._proc_fd: int | None = None
        if self._pool.supported:
            try:  # unnamed files are named through their /proc/self/fd link (linkat)
                self._proc_fd = os.open("/proc/self/fd", os.O_RDONLY | os.O_DIRECTORY)
            except OSError:
                self._pool.supported = False
        self._wake = threading.Condition(threading.Lock())
        self._bg_idle = False
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._closed = False
        self.reconcile()

    # ------------------------------------------------------------------ schema
    def _migrate(self) -> None:
        with self._lock:
            version = int(self._db.execute("PRAGMA user_version").fetchone()[0])
            if version > SCHEMA_VERSION:
                raise SpoolError(f"{self.root}: index schema version {version} is newer than "
                                 f"this node's {SCHEMA_VERSION}")
            for v in range(version + 1, SCHEMA_VERSION + 1):
                self._db.executescript(f"BEGIN; {_MIGRATIONS[v]} PRAGMA user_version = {v}; COMMIT;")
            for suffix in ("-wal", "-shm"):
                p = self.root / f"index.sqlite{suffix}"
                if p.exists():
                    os.chmod(p, 0o600)

    @property
    def schema_version(self) -> int:
        """The index's ``PRAGMA user_version``."""
        with self._lock:
            return int(self._db.execute("PRAGMA user_version").fetchone()[0])

    def reconcile(self) -> int:
        """Index the instance files of open (``receiving``, ``held``) series that have no row.

        A killed process may have answered success for instances whose rows were still
        waiting for their group commit: their files are in the series folder, and are the
        record. Returns how many rows were added. Run when the spool is opened.
        """
        added = 0
        with self._lock:
            self._flush_locked()
            rows = self._db.execute("SELECT key FROM series WHERE state IN ('receiving', "
                                    "'held')").fetchall()
            for (key,) in rows:
                folder = self.root / key
                try:
                    names = [e.name for e in os.scandir(folder) if e.is_file()]
                except OSError:
                    continue
                for name in names:  # a temporary file of a write cut short: never answered
                    if name.startswith(".") and name.endswith(".tmp"):
                        (folder / name).unlink(missing_ok=True)
                on_disk = {n[:-4] for n in names if n.endswith(".dcm") and not n.startswith(".")}
                known = {r[0] for r in self._db.execute(
                    "SELECT sop_hash FROM instances WHERE series_key = ?", (key,))}
                missing = sorted(on_disk - known)
                if not missing:
                    continue
                self._db.execute("BEGIN")
                for stem in missing:
                    path = folder / f"{stem}.dcm"
                    try:
                        at = path.stat().st_mtime
                    except OSError:
                        continue
                    self._db.execute(
                        "INSERT OR IGNORE INTO instances(series_key, sop_hash, path, "
                        "received_at) VALUES (?, ?, ?, ?)", (key, stem, str(path), at))
                    self._db.execute("UPDATE series SET n_instances = n_instances + 1, "
                                     "last_at = MAX(last_at, ?) WHERE key = ?", (at, key))
                    added += 1
                self._db.execute("COMMIT")
                log.info("series %s: %d spooled instances indexed again from the folder",
                         key, len(missing))
        return added

    # ------------------------------------------------------------------ instances
    def path_for(self, series_key: str, sop_instance_uid: str) -> Path:
        """Where an instance is (or would be) stored."""
        return self.root / series_key / f"{instance_hash(sop_instance_uid)}.dcm"

    def contains(self, series_key: str, sop_instance_uid: str) -> bool:
        """Whether the spool holds a file for this instance (from memory: the series' folder
        is listed once per process, then every store and discard is followed)."""
        stem = instance_hash(sop_instance_uid)
        with self._pending_lock:
            stems = self._stems.get(series_key)
        if stems is None:
            try:
                listed = {e.name[:-4] for e in os.scandir(self.root / series_key)
                          if e.name.endswith(".dcm") and not e.name.startswith(".")}
            except OSError:
                listed = set()
            with self._pending_lock:
                stems = self._stems.setdefault(series_key, listed)
        return stem in stems

    def store(self, series_key: str, sop_instance_uid: str,
              data: bytes | bytearray | memoryview | tuple[bytes, ...],
              *, protocol: str, expected: int | None = None) -> Path:
        """Write one instance atomically and index it; returns its path.

        ``data`` is the whole DICOM file (PS3.10, with preamble and file meta), or a tuple of
        its consecutive parts (written in one ``writev``, no joined copy). When this
        returns, the file is in place under its name (and flushed to the disk, with its
        folder, if configured): success may be answered. Its index row is committed now for
        the first instance of a series, else with the next group commit (see the module
        docstring). Storing the same SOP Instance UID again replaces the file (idempotent
        re-send).

        Raises
        ------
        SpoolError
            The file could not be written; nothing partial is left behind.
        """
        if self._closed:
            raise SpoolError(f"cannot store instance of series {series_key}: spool closed")
        stem = instance_hash(sop_instance_uid)
        folder = f"{self._root_text}/{series_key}"  # text paths: pathlib is dear per call
        final = f"{folder}/{stem}.dcm"
        parts = data if isinstance(data, tuple) else (data,)
        try:
            if series_key not in self._known_dirs:
                _mkdir_private(Path(folder))
                if self.fsync:
                    _fsync_dir(self.root)
                self._known_dirs.add(series_key)
            if self._thread is None:
                self.warm()
            fd, low = self._pool.take()
            if low:
                self._nudge()
            if fd is None or not self._write_unnamed(fd, parts, folder, stem):
                self._write_named(parts, folder, stem)
            if self.fsync:
                _fsync_dir(folder)
        except OSError as exc:
            raise SpoolError(f"cannot store instance of series {series_key}: "
                             f"{exc.strerror or exc}") from exc
        row = (series_key, stem, final, time.time(), protocol, expected)
        if series_key in self._indexed:
            with self._pending_lock:
                stems = self._stems.get(series_key)
                if stems is not None:
                    stems.add(stem)
                first = not self._pending
                if first:
                    self._pending_since = time.monotonic()
                self._pending.append(row)
                full = len(self._pending) >= BATCH_ROWS
            if first or full:  # the background thread commits it within BATCH_DELAY_S
                self._nudge(full)
        else:  # the series' first row: committed before success, so recovery knows it
            with self._lock:
                with self._pending_lock:
                    stems = self._stems.get(series_key)
                    if stems is not None:
                        stems.add(stem)
                    self._pending.append(row)
                self._flush_locked()
        return Path(final)

    def _write_all(self, fd: int, parts: tuple[bytes | bytearray | memoryview, ...]) -> None:
        total = sum(len(p) for p in parts)
        n = os.writev(fd, parts)
        if n < total:  # a short write: finish it piece by piece
            view = memoryview(b"".join(parts))[n:]
            while view:
                view = view[os.write(fd, view):]
        if self.fsync:
            os.fdatasync(fd)

    def _write_unnamed(self, fd: int, parts: tuple[bytes | bytearray | memoryview, ...],
                       folder: str, stem: str) -> bool:
        """Write into a pool file and link it in as ``folder/stem.dcm``; False: could not
        link (the caller writes a named file instead). The descriptor is closed either way."""
        final = f"{folder}/{stem}.dcm"
        try:
            self._write_all(fd, parts)
            if self._proc_fd is None:
                return False
            try:
                os.link(str(fd), final, src_dir_fd=self._proc_fd, follow_symlinks=True)
            except FileExistsError:  # a re-sent instance: replace the first copy atomically
                tmp = f"{folder}/.{stem}.{threading.get_ident()}.tmp"
                try:
                    os.unlink(tmp)
                except FileNotFoundError:
                    pass
                os.link(str(fd), tmp, src_dir_fd=self._proc_fd, follow_symlinks=True)
                os.replace(tmp, final)
            return True
        except OSError as exc:
            if exc.errno in (errno.EXDEV, errno.ENOENT, errno.EPERM, errno.EACCES,
                             errno.ENOTDIR, errno.EOPNOTSUPP):
                self._pool.supported = False  # linking unnamed files does not work here
                log.info("spool: unnamed files cannot be linked here (%s); named temporary "
                         "files from now on", exc.strerror or exc)
                return False
            raise
        finally:
            os.close(fd)

    def _write_named(self, parts: tuple[bytes | bytearray | memoryview, ...], folder: str,
                     stem: str) -> None:
        tmp = f"{folder}/.{stem}.{threading.get_ident()}.tmp"
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                self._write_all(fd, parts)
            finally:
                os.close(fd)
            os.replace(tmp, f"{folder}/{stem}.dcm")
        except OSError:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise

    # ------------------------------------------------------------------ group commit
    def _flush_locked(self) -> None:
        """Commit every pending instance row (caller holds ``_lock``)."""
        with self._pending_lock:
            rows, self._pending = self._pending, []
        if not rows or self._closed:
            return
        self._db.execute("BEGIN")
        try:
            added: dict[str, int] = {}
            last: dict[str, tuple[float, str, int | None]] = {}
            for key, stem, path, at, protocol, expected in rows:
                cur = self._db.execute(
                    "INSERT OR IGNORE INTO instances(series_key, sop_hash, path, received_at) "
                    "VALUES (?, ?, ?, ?)", (key, stem, path, at))
                if not cur.rowcount:
                    self._db.execute("UPDATE instances SET received_at = ? WHERE series_key = ? "
                                     "AND sop_hash = ?", (at, key, stem))
                added[key] = added.get(key, 0) + cur.rowcount
                first = last.get(key)
                last[key] = (at, protocol, expected if expected is not None
                             else (first[2] if first is not None else None))
            for key, (at, protocol, expected) in last.items():
                self._db.execute(
                    "INSERT INTO series(key, protocol, state, n_instances, expected, first_at, "
                    "last_at, updated_at) VALUES (?, ?, 'receiving', ?, ?, ?, ?, ?) "
                    "ON CONFLICT(key) DO UPDATE SET n_instances = series.n_instances + ?,"
                    " last_at = excluded.last_at, updated_at = excluded.updated_at,"
                    " expected = COALESCE(excluded.expected, series.expected)",
                    (key, protocol, added[key], expected, at, at, at, added[key]))
            self._db.execute("COMMIT")
        except BaseException:
            self._db.execute("ROLLBACK")
            with self._pending_lock:  # keep them for the next try
                self._pending[:0] = rows
            raise
        self._indexed.update(last)

    def flush(self) -> None:
        """Commit the pending instance rows now."""
        with self._lock:
            self._flush_locked()

    def warm(self) -> None:
        """Start the background thread (spare files, group commits); :meth:`store` does it
        on first use, the receiver when it starts listening."""
        if self._thread is None:
            with self._wake:
                if self._thread is None and not self._stop.is_set():
                    self._thread = threading.Thread(target=self._background, daemon=True,
                                                    name="cest-spool")
                    self._thread.start()

    def _nudge(self, always: bool = False) -> None:
        """Wake the background thread if it is in its long (idle) wait, or ``always``. The
        receiving thread wakes it rarely: every wake-up is a thread switch on its time."""
        with self._wake:
            if always or self._bg_idle:
                self._wake.notify()

    def _background(self) -> None:
        """Keep the pool of unnamed files full; group-commit pending rows."""
        retry_at = 0.0
        while not self._stop.is_set():
            if time.monotonic() >= retry_at and not self._pool.fill(self._stop):
                retry_at = time.monotonic() + 1.0
            with self._pending_lock:
                due = (self._pending_since + BATCH_DELAY_S - time.monotonic()
                       if self._pending else None)
                full = len(self._pending) >= BATCH_ROWS
            if due is not None and (due <= 0 or full):
                try:
                    with self._lock:
                        self._flush_locked()
                except Exception:  # the next store, read or close tries again
                    log.exception("spool: group commit of the index failed")
                    self._stop.wait(BATCH_DELAY_S)
                continue
            with self._wake:
                if self._stop.is_set():
                    break
                # while rows are pending it comes back by itself within BATCH_DELAY_S (and
                # refills the pool then); idle, it waits long and is nudged
                self._bg_idle = due is None
                self._wake.wait(due if due is not None else 0.5)
                self._bg_idle = False

    def discard(self, series_key: str, sop_instance_uid: str) -> None:
        """Remove an instance stored by :meth:`store` that the assembler then refused."""
        path = self.path_for(series_key, sop_instance_uid)
        path.unlink(missing_ok=True)
        with self._pending_lock:
            self._stems.get(series_key, set()).discard(path.stem)
        with self._lock:
            self._flush_locked()
            self._db.execute("BEGIN")
            cur = self._db.execute("DELETE FROM instances WHERE series_key = ? AND sop_hash = ?",
                                   (series_key, path.stem))
            self._db.execute("UPDATE series SET n_instances = n_instances - ?, updated_at = ? "
                             "WHERE key = ?", (cur.rowcount, time.time(), series_key))
            self._db.execute("COMMIT")

    def instance_paths(self, series_key: str) -> list[Path]:
        """Paths of the indexed instances of a series (in no particular order)."""
        with self._lock:
            self._flush_locked()
            rows = self._db.execute("SELECT path FROM instances WHERE series_key = ?",
                                    (series_key,)).fetchall()
        return [Path(r[0]) for r in rows]

    # ------------------------------------------------------------------ series
    def set_state(self, series_key: str, state: str, *, detail: str = "") -> None:
        """Record a series' new state (``complete``, ``incomplete``, ``held``, ...)."""
        with self._lock:
            self._flush_locked()
            self._db.execute("UPDATE series SET state = ?, detail = ?, updated_at = ? "
                             "WHERE key = ?", (state, detail, time.time(), series_key))

    def mark_processed(self, series_key: str, state: str, *, deferred: tuple[str, ...] = (),
                       error: str = "") -> None:
        """Record the end of a processing pass: ``deferring`` (with the model-based methods
        still to run), ``processed`` or ``failed`` (with the error); one atomic update that
        keeps the receiver's ``detail``."""
        if state not in ("deferring", "processed", "failed"):
            raise ValueError(f"state: expected deferring, processed or failed, got {state!r}")
        now = time.time()
        with self._lock:
            self._flush_locked()
            self._db.execute("UPDATE series SET state = ?, deferred = ?, error = ?, "
                             "processed_at = ?, updated_at = ? WHERE key = ?",
                             (state, ",".join(deferred), error[:500], now, now, series_key))

    def deferred_methods(self, series_key: str) -> tuple[str, ...]:
        """The model-based methods a ``deferring`` series still has to run."""
        with self._lock:
            self._flush_locked()
            row = self._db.execute("SELECT deferred FROM series WHERE key = ?",
                                   (series_key,)).fetchone()
        return tuple(m for m in (row[0] if row else "").split(",") if m)

    def series(self, series_key: str) -> SeriesRecord | None:
        """The index row of one series, or None."""
        with self._lock:
            self._flush_locked()
            row = self._db.execute(
                "SELECT key, protocol, state, n_instances, expected, first_at, last_at, "
                "updated_at, detail FROM series WHERE key = ?", (series_key,)).fetchone()
        return SeriesRecord(*row) if row else None

    def all_series(self, *, state: str | None = None) -> list[SeriesRecord]:
        """Every indexed series (optionally only one state), oldest first."""
        sql = ("SELECT key, protocol, state, n_instances, expected, first_at, last_at, "
               "updated_at, detail FROM series")
        args: tuple[str, ...] = ()
        if state is not None:
            sql += " WHERE state = ?"
            args = (state,)
        with self._lock:
            self._flush_locked()
            rows = self._db.execute(sql + " ORDER BY first_at", args).fetchall()
        return [SeriesRecord(*r) for r in rows]

    def close(self) -> None:
        """Commit what is pending, stop the background thread, close the index (files
        stay)."""
        self._stop.set()
        with self._wake:
            self._wake.notify()
        thread = self._thread
        if thread is not None and thread is not threading.current_thread():
            thread.join(10.0)
        with self._lock:
            if self._closed:
                return
            try:
                self._flush_locked()
            finally:
                self._closed = True
                self._db.close()
                self._pool.close()
                if self._proc_fd is not None:
                    os.close(self._proc_fd)
                    self._proc_fd = None


def _mkdir_private(path: Path) -> None:
    path.mkdir(mode=0o700, parents=True, exist_ok=True)
    os.chmod(path, 0o700)


def _fsync_dir(path: str | Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
