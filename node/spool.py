"""Durable storage of received instances, and a small SQLite index of series and instances.

Each instance is written to ``spool_dir/<series_key>/<sop-hash>.dcm`` through a temporary file
in the same folder and ``os.replace`` (atomic on POSIX), fsync'd (file and folder) when the
config asks for it, BEFORE the receiver answers success. Folders are created 0700 and files
0600: the spool holds patient data and is for the service user only.

The index (``spool_dir/index.sqlite``, standard-library :mod:`sqlite3`, WAL journal) records
every series (key, protocol, state, counts, times) and every instance (series key, hash, path,
time). Its schema version is ``PRAGMA user_version`` (:data:`SCHEMA_VERSION`); a later version
adds its migration to :data:`_MIGRATIONS`. No patient attribute is stored in the index: series
are named by their pseudonymous key, instances by a hash of the SOP Instance UID.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path

__all__ = ["SCHEMA_VERSION", "SeriesRecord", "Spool", "SpoolError", "instance_hash"]

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


class Spool:
    """Instances on disk and the series index.

    Thread-safe: the receiver calls :meth:`store` from several association threads.

    Parameters
    ----------
    root
        The spool folder (created 0700 when missing).
    fsync
        fsync each file and its folder before :meth:`store` returns (survives power loss;
        without it a write survives a killed process only).
    """

    def __init__(self, root: str | Path, *, fsync: bool = True):
        self.root = Path(root)
        self.fsync = fsync
        _mkdir_private(self.root)
        self._lock = threading.Lock()
        self._known_dirs: set[str] = set()
        self._db = sqlite3.connect(self.root / "index.sqlite", check_same_thread=False,
                                   isolation_level=None)
        os.chmod(self.root / "index.sqlite", 0o600)
        self._db.execute("PRAGMA journal_mode=WAL")
        # WAL + NORMAL: a committed row survives a killed process; the instance file itself
        # carries the durability promise (its own fsync).
        self._db.execute("PRAGMA synchronous=NORMAL")
        self._migrate()

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

    # ------------------------------------------------------------------ instances
    def path_for(self, series_key: str, sop_instance_uid: str) -> Path:
        """Where an instance is (or would be) stored."""
        return self.root / series_key / f"{instance_hash(sop_instance_uid)}.dcm"

    def store(self, series_key: str, sop_instance_uid: str,
              data: bytes | bytearray | memoryview | tuple[bytes, ...],
              *, protocol: str, expected: int | None = None) -> Path:
        """Write one instance atomically and index it; returns its path.

        ``data`` is the whole DICOM file (PS3.10, with preamble and file meta), or a tuple of
        its consecutive parts (written in one ``writev``, no joined copy). When this
        returns, the file is in place (and fsync'd if configured): success may be answered.
        Storing the same SOP Instance UID again replaces the file (idempotent re-send).

        Raises
        ------
        SpoolError
            The file could not be written; nothing partial is left behind.
        """
        folder = self.root / series_key
        final = folder / f"{instance_hash(sop_instance_uid)}.dcm"
        tmp = folder / f".{final.stem}.{threading.get_ident()}.tmp"
        try:
            if series_key not in self._known_dirs:
                _mkdir_private(folder)
                if self.fsync:
                    _fsync_dir(self.root)
                self._known_dirs.add(series_key)
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            try:
                parts = data if isinstance(data, tuple) else (data,)
                total = sum(len(p) for p in parts)
                n = os.writev(fd, parts)
                if n < total:  # a short write: finish it piece by piece
                    view = memoryview(b"".join(parts))[n:]
                    while view:
                        view = view[os.write(fd, view):]
                if self.fsync:
                    os.fsync(fd)
            finally:
                os.close(fd)
            os.replace(tmp, final)
            if self.fsync:
                _fsync_dir(folder)
        except OSError as exc:
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass
            raise SpoolError(f"cannot store instance of series {series_key}: "
                             f"{exc.strerror or exc}") from exc
        now = time.time()
        with self._lock:
            self._db.execute("BEGIN")
            cur = self._db.execute(
                "INSERT OR IGNORE INTO instances(series_key, sop_hash, path, received_at) "
                "VALUES (?, ?, ?, ?)", (series_key, final.stem, str(final), now))
            added = cur.rowcount
            if not added:
                self._db.execute("UPDATE instances SET received_at = ? WHERE series_key = ? "
                                 "AND sop_hash = ?", (now, series_key, final.stem))
            self._db.execute(
                "INSERT INTO series(key, protocol, state, n_instances, expected, first_at, "
                "last_at, updated_at) VALUES (?, ?, 'receiving', 1, ?, ?, ?, ?) "
                "ON CONFLICT(key) DO UPDATE SET n_instances = series.n_instances + ?,"
                " last_at = excluded.last_at, updated_at = excluded.updated_at,"
                " expected = COALESCE(excluded.expected, series.expected)",
                (series_key, protocol, expected, now, now, now, added))
            self._db.execute("COMMIT")
        return final

    def discard(self, series_key: str, sop_instance_uid: str) -> None:
        """Remove an instance stored by :meth:`store` that the assembler then refused."""
        path = self.path_for(series_key, sop_instance_uid)
        path.unlink(missing_ok=True)
        with self._lock:
            self._db.execute("BEGIN")
            cur = self._db.execute("DELETE FROM instances WHERE series_key = ? AND sop_hash = ?",
                                   (series_key, path.stem))
            self._db.execute("UPDATE series SET n_instances = n_instances - ?, updated_at = ? "
                             "WHERE key = ?", (cur.rowcount, time.time(), series_key))
            self._db.execute("COMMIT")

    def instance_paths(self, series_key: str) -> list[Path]:
        """Paths of the indexed instances of a series (in no particular order)."""
        with self._lock:
            rows = self._db.execute("SELECT path FROM instances WHERE series_key = ?",
                                    (series_key,)).fetchall()
        return [Path(r[0]) for r in rows]

    # ------------------------------------------------------------------ series
    def set_state(self, series_key: str, state: str, *, detail: str = "") -> None:
        """Record a series' new state (``complete``, ``incomplete``, ``held``, ...)."""
        with self._lock:
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
            self._db.execute("UPDATE series SET state = ?, deferred = ?, error = ?, "
                             "processed_at = ?, updated_at = ? WHERE key = ?",
                             (state, ",".join(deferred), error[:500], now, now, series_key))

    def deferred_methods(self, series_key: str) -> tuple[str, ...]:
        """The model-based methods a ``deferring`` series still has to run."""
        with self._lock:
            row = self._db.execute("SELECT deferred FROM series WHERE key = ?",
                                   (series_key,)).fetchone()
        return tuple(m for m in (row[0] if row else "").split(",") if m)

    def series(self, series_key: str) -> SeriesRecord | None:
        """The index row of one series, or None."""
        with self._lock:
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
            rows = self._db.execute(sql + " ORDER BY first_at", args).fetchall()
        return [SeriesRecord(*r) for r in rows]

    def close(self) -> None:
        """Close the index (files stay)."""
        with self._lock:
            self._db.close()


def _mkdir_private(path: Path) -> None:
    path.mkdir(mode=0o700, parents=True, exist_ok=True)
    os.chmod(path, 0o700)


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
