"""Durable storage of received instances, and a small SQLite index of series and instances.

Each instance is written to ``spool_dir/<series_key>/<sop-hash>.dcm`` whole before it gets a
name there: into an unnamed file (``O_TMPFILE``) then linked in, or, where the file system has
no unnamed files, through a temporary file in the same folder and ``os.replace`` (atomic on
POSIX). With ``fsync`` the instance is durable BEFORE the receiver answers success: its bytes
are appended to the spool's journal and the journal flushed, before the file is named
(:class:`_Journal`; with the journal off, ``CEST_NODE_SPOOL_JOURNAL_MB=0``, the file's data are
flushed (``fdatasync``) before it is named and its folder (``fsync``) after). Folders are
created 0700 and files 0600: the spool holds patient data and is for the service user only.

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
import struct
import threading
import time
import zlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from node.memory import env_int, glibc

__all__ = ["BATCH_DELAY_S", "BATCH_ROWS", "JOURNAL_IDLE_S", "JOURNAL_MB", "SCHEMA_VERSION",
           "SeriesRecord", "Spool", "SpoolError", "instance_hash"]

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


# --------------------------------------------------------------------------- journal
JOURNAL_MB = 256
"""Largest size of the spool's journal (``CEST_NODE_SPOOL_JOURNAL_MB`` in the environment
changes it; 0 turns the journal off: every instance is then flushed with its folder)."""
JOURNAL_IDLE_S = 2.0
"""Seconds without a new instance after which the spool checkpoints its journal."""
_JOURNAL_GROW = 1 << 20  # the journal's file grows by this much at a time (posix_fallocate)
_PAGE = 4096  # records start on page boundaries: a torn write never touches an earlier one
_JHDR = struct.Struct("<8sQI")  # magic, generation, crc32 of the first two
_JREC = struct.Struct("<8sQBxxxHHQI")  # magic, generation, kind, key len, stem len, data len, crc
_JHDR_MAGIC, _JREC_MAGIC = b"CNSPJH01", b"CNSPJR01"
_FILE, _GONE = 1, 2  # record kinds: an instance file's bytes; an instance removed


def _syncfs(fd: int) -> None:
    """Flush the whole file system of ``fd`` (glibc's ``syncfs(2)``; ``sync`` elsewhere)."""
    libc = glibc()
    if libc is None or getattr(libc, "syncfs", None) is None or libc.syncfs(fd) != 0:
        os.sync()


class _Journal:
    """Write-ahead copies of the instances, one flush each (``spool_dir/journal.wal``).

    With ``fsync``, the spool's promise (an instance answered with success survives a power
    cut) costs two flushes the plain way: the file's data, then its folder's new name
    (``fdatasync`` 330-380 us and ``fsync`` 225-250 us per instance, measured here). With the
    journal, the instance's bytes are appended to this one file and flushed once before the
    answer; the instance file itself is written and named without a flush. The file system
    then writes the instance files back in its own time, and every so often (the spool idle,
    the journal full, the spool closed) a checkpoint flushes the whole file system
    (``syncfs``) and starts a new generation: the records before it are no longer needed.

    When the spool is opened, the records of the last generation are replayed first: every
    instance file they hold is made whole again if it is missing or differs (written
    atomically; one ``syncfs`` after the replay flushes them all), every instance removed since (a record of kind "gone") is removed
    again. A record is only taken whole: magic, generation and a CRC-32 of its header and
    bytes; the first one that is not ends the replay (a write cut short by the power cut,
    whose instance was never answered).

    Records start on page boundaries, so a write never rewrites the page of an earlier
    record. The file grows by :data:`_JOURNAL_GROW` (``posix_fallocate``) up to ``max_bytes``;
    an instance too large for it is flushed the plain way.
    """

    def __init__(self, root: Path, max_bytes: int):
        self.root = root
        self.path = root / "journal.wal"
        self.max_bytes = max_bytes
        self._lock = threading.Lock()  # appends, growth and checkpoints
        self._flush_lock = threading.Lock()
        # records written whose change is not made yet (the file named, or removed): a
        # checkpoint waits for them (its file-system flush must cover every change whose
        # record it forgets)
        self._unnamed = 0
        self._named = threading.Condition(threading.Lock())
        self.fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o600)
        self.generation = 0
        self.pos = _PAGE
        self.written = _PAGE  # end of the last record written (under _lock)
        self.synced = _PAGE  # end of the last record flushed (under _flush_lock)
        self.size = os.fstat(self.fd).st_size
        self.last_append = 0.0
        self.checkpoints = 0

    # ---------------------------------------------------------------- open and replay
    def replay(self) -> tuple[int, int]:
        """Apply the last generation's records; returns (files written, files removed)."""
        head = os.pread(self.fd, _JHDR.size, 0)
        generation = 0
        if len(head) == _JHDR.size:
            magic, gen, crc = _JHDR.unpack(head)
            if magic == _JHDR_MAGIC and crc == zlib.crc32(head[:16]):
                generation = gen
        written = removed = 0
        if generation:
            pos = _PAGE
            while True:
                rec = self._read_record(pos, generation)
                if rec is None:
                    break
                kind, key, stem, data, end = rec
                folder = self.root / key
                final = folder / f"{stem}.dcm"
                if kind == _FILE:
                    if not _same_file(final, data):
                        _mkdir_private(folder)
                        _write_replaced(final, data)  # flushed by the syncfs below
                        written += 1
                else:
                    try:
                        final.unlink()
                        removed += 1
                    except FileNotFoundError:
                        pass
                pos = end
        if written or removed:
            log.warning("spool: journal replayed after an unclean stop: %d instance files "
                        "restored, %d removed again", written, removed)
        self._start_generation(_next_generation(generation), sync_all=bool(written or removed))
        return written, removed

    def _read_record(self, pos: int, generation: int
                     ) -> tuple[int, str, str, bytes, int] | None:
        if pos + _JREC.size > self.size:
            return None
        head = os.pread(self.fd, _JREC.size, pos)
        if len(head) < _JREC.size:
            return None
        magic, gen, kind, klen, slen, dlen, crc = _JREC.unpack(head)
        if magic != _JREC_MAGIC or gen != generation or kind not in (_FILE, _GONE):
            return None
        end = pos + _JREC.size + klen + slen + dlen
        if end > self.size:
            return None
        body = os.pread(self.fd, klen + slen + dlen, pos + _JREC.size)
        if len(body) < klen + slen + dlen:
            return None
        if zlib.crc32(body, zlib.crc32(head[:-4])) != crc:
            return None
        try:
            key = body[:klen].decode("ascii")
            stem = body[klen:klen + slen].decode("ascii")
        except UnicodeDecodeError:
            return None
        if not _safe_name(key) or not _safe_name(stem):
            return None
        return kind, key, stem, body[klen + slen:], _align(end)

    def _start_generation(self, generation: int, *, sync_all: bool) -> None:
        """Everything before is durable (or is now made so): a new, empty generation."""
        if sync_all:
            _syncfs(self.fd)
        head = _JHDR.pack(_JHDR_MAGIC, generation, 0)[:16]
        os.pwrite(self.fd, head + struct.pack("<I", zlib.crc32(head)), 0)
        if self.size < _PAGE:
            self._grow(_PAGE)
        os.fsync(self.fd)
        if not self.generation:
            _fsync_dir(self.root)  # the journal's own name, once per opening
        self.generation = generation
        self.pos = self.written = self.synced = _PAGE

    def _grow(self, end: int) -> None:
        target = min(self.max_bytes, max(end, self.size + _JOURNAL_GROW))
        try:
            os.posix_fallocate(self.fd, self.size, target - self.size)
        except OSError as exc:
            if exc.errno not in (errno.EOPNOTSUPP, errno.EINVAL):
                raise  # out of space: the store that needed it fails (0xA700)
            zeros = bytes(min(_JOURNAL_GROW, target - self.size))  # no fallocate here
            at = self.size
            while at < target:
                at += os.pwrite(self.fd, zeros[:target - at], at)
        os.fsync(self.fd)  # the new size and extents, before records rely on them
        self.size = target

    # ---------------------------------------------------------------- appends
    def fits(self, n_bytes: int) -> bool:
        return _PAGE + _align(_JREC.size + 64 + 32 + n_bytes) <= self.max_bytes

    def append(self, kind: int, key: str, stem: str,
               parts: tuple[bytes | bytearray | memoryview, ...] = ()) -> None:
        """Write one record and flush it (group commit: a flush that already covers this
        record is not repeated)."""
        kb, sb = key.encode("ascii"), stem.encode("ascii")
        dlen = sum(len(p) for p in parts)
        with self._lock:
            need = _align(_JREC.size + len(kb) + len(sb) + dlen)
            if self.pos + need > self.max_bytes:
                self._checkpoint_locked()
            if self.pos + need > self.size:
                self._grow(self.pos + need)
            head = _JREC.pack(_JREC_MAGIC, self.generation, kind, len(kb), len(sb), dlen, 0)
            crc = zlib.crc32(sb, zlib.crc32(kb, zlib.crc32(head[:-4])))
            for p in parts:
                crc = zlib.crc32(p, crc)
            head = head[:-4] + struct.pack("<I", crc)
            chunks = (head, kb, sb, *parts)
            total = _JREC.size + len(kb) + len(sb) + dlen
            n = os.pwritev(self.fd, chunks, self.pos)
            if n < total:  # a short write: the rest piece by piece
                view = memoryview(b"".join(chunks))[n:]
                at = self.pos + n
                while view:
                    k = os.pwrite(self.fd, view, at)
                    view, at = view[k:], at + k
            self.pos += need
            self.written = end = self.pos
            self.last_append = time.monotonic()
            with self._named:
                self._unnamed += 1
        try:
            with self._flush_lock:
                if self.synced < end:
                    target = self.written
                    os.fdatasync(self.fd)
                    self.synced = max(self.synced, target)
        except BaseException:
            self.named()
            raise

    def named(self) -> None:
        """The change of a record :meth:`append` wrote is made now (the instance file named,
        or removed), or never will be (its store failed). Every successful append is
        followed by exactly one call."""
        with self._named:
            self._unnamed -= 1
            self._named.notify_all()

    # ---------------------------------------------------------------- checkpoints
    def _checkpoint_locked(self) -> None:
        """Flush the file system and start a new generation (caller holds ``_lock``: no
        record is added meanwhile). Every record's file must be named first."""
        with self._named:
            while self._unnamed > 0:
                self._named.wait()
        with self._flush_lock:
            _syncfs(self.fd)  # every instance file written so far, and its name
            self._start_generation(_next_generation(self.generation), sync_all=False)
            self.checkpoints += 1

    def checkpoint(self, *, idle_s: float = 0.0) -> bool:
        """Start a new generation if there is anything to forget and no append came in the
        last ``idle_s`` seconds; returns whether it did.

        The file system is flushed once without the lock first (stores go on meanwhile; this
        is the long part), then again under it (what came since: short)."""
        with self._lock:
            if self.pos <= _PAGE or time.monotonic() - self.last_append < idle_s:
                return False
        _syncfs(self.fd)
        with self._lock:
            if self.pos <= _PAGE or time.monotonic() - self.last_append < idle_s:
                return False
            self._checkpoint_locked()
            return True

    def close(self) -> None:
        try:
            self.checkpoint()
        finally:
            os.close(self.fd)


def _next_generation(generation: int) -> int:
    """A generation above ``generation`` and above any an earlier life of the file could have
    written (the clock's nanoseconds): old records beyond the new ones never match it, even
    after a header that could not be read."""
    return max(generation + 1, time.time_ns())


def _align(n: int) -> int:
    return (n + _PAGE - 1) // _PAGE * _PAGE


def _safe_name(name: str) -> bool:
    """A series key or file stem as the spool makes them (no separator, no dot first)."""
    return bool(name) and "/" not in name and "\\" not in name and not name.startswith(".")


def _same_file(path: Path, data: bytes) -> bool:
    try:
        with open(path, "rb") as f:
            return os.fstat(f.fileno()).st_size == len(data) and f.read() == data
    except OSError:
        return False


def _write_replaced(final: Path, data: bytes) -> None:
    """Write ``final`` atomically (a temporary name, then a rename); the replay's closing
    ``syncfs`` makes it durable before the records it came from are forgotten."""
    tmp = final.with_name(f".{final.stem}.replay.tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view):]
    finally:
        os.close(fd)
    os.replace(tmp, final)


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
        self._journal: _Journal | None = None
        mb = max(0, env_int("CEST_NODE_SPOOL_JOURNAL_MB", JOURNAL_MB)) if fsync else 0
        if mb or (self.root / "journal.wal").exists():  # an earlier life's records first
            journal = None
            try:
                journal = _Journal(self.root, (mb or JOURNAL_MB) << 20)
                journal.replay()
            except OSError as exc:
                log.warning("spool: journal unusable (%s); every instance is flushed with its "
                            "folder", exc.strerror or exc)
                mb = 0
            if journal is not None and not mb:
                os.close(journal.fd)  # replayed: not used by this spool (no fsync, or off)
                journal = None
            self._journal = journal
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
            journal = self._journal
            if journal is not None and not journal.fits(sum(len(p) for p in parts)):
                journal = None  # too large for the journal: flushed the plain way
            # with the journal, the bytes are flushed there once, before the file is named
            journaled: list[_Journal] = []  # the journal, once this instance's record is in

            def note() -> None:
                assert journal is not None
                if not journaled:  # one record per instance (a second write path reuses it)
                    journal.append(_FILE, series_key, stem, parts)
                    journaled.append(journal)

            fd, low = self._pool.take()
            if low:
                self._nudge()
            try:
                if fd is None or not self._write_unnamed(
                        fd, parts, folder, stem, None if journal is None else note):
                    self._write_named(parts, folder, stem, None if journal is None else note)
            finally:
                for j in journaled:
                    j.named()
            if self.fsync and journal is None:
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

    def _write_all(self, fd: int, parts: tuple[bytes | bytearray | memoryview, ...],
                   note: Callable[[], None] | None = None) -> None:
        """Write the parts; then flush them (``fsync``), or have ``note`` journal them."""
        total = sum(len(p) for p in parts)
        n = os.writev(fd, parts)
        if n < total:  # a short write: finish it piece by piece
            view = memoryview(b"".join(parts))[n:]
            while view:
                view = view[os.write(fd, view):]
        if note is not None:
            note()
        elif self.fsync:
            os.fdatasync(fd)

    def _write_unnamed(self, fd: int, parts: tuple[bytes | bytearray | memoryview, ...],
                       folder: str, stem: str, note: Callable[[], None] | None = None) -> bool:
        """Write into a pool file and link it in as ``folder/stem.dcm``; False: could not
        link (the caller writes a named file instead). The descriptor is closed either way."""
        final = f"{folder}/{stem}.dcm"
        try:
            if self._proc_fd is None:
                return False
            self._write_all(fd, parts, note)
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
                     stem: str, note: Callable[[], None] | None = None) -> None:
        tmp = f"{folder}/.{stem}.{threading.get_ident()}.tmp"
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                self._write_all(fd, parts, note)
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
            if due is None and self._journal is not None:
                try:  # idle: the instance files flushed, the journal's records forgotten
                    self._journal.checkpoint(idle_s=JOURNAL_IDLE_S)
                except OSError as exc:
                    log.warning("spool: journal checkpoint failed (%s)", exc.strerror or exc)
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
        journal = self._journal
        if journal is not None:  # so that a replay does not bring it back
            journal.append(_GONE, series_key, path.stem)
        try:
            path.unlink(missing_ok=True)
        finally:
            if journal is not None:
                journal.named()
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
                if self._journal is not None:
                    try:  # a clean stop: everything flushed, nothing left to replay
                        self._journal.close()
                    except OSError as exc:
                        log.warning("spool: journal checkpoint at close failed (%s); it is "
                                    "replayed at the next start", exc.strerror or exc)
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
