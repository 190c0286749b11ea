"""node.spool on its own: the write path (unnamed files from the pool, named temporary files
where there are none), the group commit of the index, and the index rebuilt from the series
folders after a killed process.

The kill is real: a child Python process stores instances and ends with ``os._exit`` (no
handler, no close, nothing flushed), the way SIGKILL leaves a node (common practice: test the
crash, not a simulation of it).
"""

from __future__ import annotations

import os
import sqlite3
import stat
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from node import spool as spool_mod
from node.spool import Spool, SpoolError, instance_hash

KEY = "s-0123456789abcdef"


def _file(i: int) -> tuple[bytes, bytes]:
    """A stand-in instance in two parts, as the receiver hands them (prefix, data set)."""
    return (b"\x00" * 128 + b"DICM" + i.to_bytes(4, "little"), os.urandom(3000))


def _rows(root: Path, key: str) -> int:
    db = sqlite3.connect(root / "index.sqlite")
    try:
        return int(db.execute("SELECT COUNT(*) FROM instances WHERE series_key = ?",
                              (key,)).fetchone()[0])
    finally:
        db.close()


def _wait_pool(sp: Spool, timeout: float = 10.0) -> None:
    end = time.monotonic() + timeout
    while sp._pool.wanted() > 0 and time.monotonic() < end:
        time.sleep(0.01)


@pytest.mark.parametrize("fsync", [False, True])
def test_store_writes_the_parts_private_and_indexed(tmp_path, fsync):
    sp = Spool(tmp_path / "spool", fsync=fsync)
    try:
        sp.warm()
        _wait_pool(sp)
        assert sp._pool.supported, "O_TMPFILE + linkat expected on Linux's ext4/tmpfs"
        parts = [_file(i) for i in range(5)]
        paths = [sp.store(KEY, f"1.2.3.{i}", p, protocol="apt", expected=5)
                 for i, p in enumerate(parts)]
        assert sp._pool.taken >= 4  # the first may come before the pool has filled
        for i, (path, p) in enumerate(zip(paths, parts, strict=True)):
            assert path.read_bytes() == b"".join(p)
            assert stat.S_IMODE(path.stat().st_mode) == 0o600
            assert path == sp.path_for(KEY, f"1.2.3.{i}")
            assert path.stem == instance_hash(f"1.2.3.{i}")
        # reads see every row (they commit what is pending first)
        assert sorted(sp.instance_paths(KEY)) == sorted(paths)
        rec = sp.series(KEY)
        assert rec is not None and rec.n_instances == 5 and rec.expected == 5
        assert rec.state == "receiving"
        # nothing but the five instances in the folder (no temporary or spare file)
        assert sorted(p.name for p in (tmp_path / "spool" / KEY).iterdir()) == sorted(
            p.name for p in paths)
    finally:
        sp.close()


def test_rows_are_group_committed_and_a_new_series_at_once(tmp_path, monkeypatch):
    monkeypatch.setattr(spool_mod, "BATCH_DELAY_S", 60.0)  # only size, reads or close commit
    monkeypatch.setattr(spool_mod, "BATCH_ROWS", 10)
    root = tmp_path / "spool"
    sp = Spool(root, fsync=False)
    try:
        sp.store(KEY, "1.2.3.0", _file(0), protocol="apt")
        assert _rows(root, KEY) == 1  # a new series' first row: committed before success
        for i in range(1, 5):
            sp.store(KEY, f"1.2.3.{i}", _file(i), protocol="apt")
        assert _rows(root, KEY) == 1  # the others wait for the group commit
        for i in range(5, 11):
            sp.store(KEY, f"1.2.3.{i}", _file(i), protocol="apt")
        end = time.monotonic() + 10  # ten pending rows: the background thread commits them
        while _rows(root, KEY) < 11 and time.monotonic() < end:
            time.sleep(0.01)
        assert _rows(root, KEY) == 11
        sp.store(KEY, "1.2.3.11", _file(11), protocol="apt")
        sp.set_state(KEY, "complete")  # a state change commits what is pending first
        assert _rows(root, KEY) == 12
        rec = sp.series(KEY)
        assert rec is not None and rec.n_instances == 12 and rec.state == "complete"
    finally:
        sp.close()


def test_default_delay_commits_without_a_read(tmp_path):
    root = tmp_path / "spool"
    sp = Spool(root, fsync=False)
    try:
        for i in range(3):
            sp.store(KEY, f"1.2.3.{i}", _file(i), protocol="apt")
        end = time.monotonic() + 10
        while _rows(root, KEY) < 3 and time.monotonic() < end:
            time.sleep(spool_mod.BATCH_DELAY_S)
        assert _rows(root, KEY) == 3
    finally:
        sp.close()


def test_resend_replaces_the_file_and_keeps_one_row(tmp_path):
    sp = Spool(tmp_path / "spool", fsync=False)
    try:
        sp.warm()
        _wait_pool(sp)
        first = sp.store(KEY, "1.2.3.9", _file(1), protocol="apt")
        again = _file(2)
        second = sp.store(KEY, "1.2.3.9", again, protocol="apt")  # the link target exists
        assert first == second and second.read_bytes() == b"".join(again)
        rec = sp.series(KEY)
        assert rec is not None and rec.n_instances == 1
        assert len(sp.instance_paths(KEY)) == 1
        assert [p.name for p in second.parent.iterdir()] == [second.name]
    finally:
        sp.close()


def test_named_files_where_there_are_no_unnamed_ones(tmp_path):
    sp = Spool(tmp_path / "spool", fsync=True)
    try:
        sp._pool.supported = False  # as on a file system without O_TMPFILE
        parts = _file(3)
        path = sp.store(KEY, "1.2.3.3", parts, protocol="apt")
        assert path.read_bytes() == b"".join(parts)
        assert [p.name for p in path.parent.iterdir()] == [path.name]  # no temporary left
        assert sp._pool.taken == 0
    finally:
        sp.close()


def test_discard_of_a_pending_row(tmp_path, monkeypatch):
    monkeypatch.setattr(spool_mod, "BATCH_DELAY_S", 60.0)
    sp = Spool(tmp_path / "spool", fsync=False)
    try:
        sp.store(KEY, "1.2.3.1", _file(1), protocol="apt")
        path = sp.store(KEY, "1.2.3.2", _file(2), protocol="apt")  # its row is pending
        sp.discard(KEY, "1.2.3.2")
        assert not path.exists()
        assert sp.contains(KEY, "1.2.3.1") and not sp.contains(KEY, "1.2.3.2")
        rec = sp.series(KEY)
        assert rec is not None and rec.n_instances == 1
        assert len(sp.instance_paths(KEY)) == 1
    finally:
        sp.close()


def test_contains_follows_stores_and_lists_a_folder_once(tmp_path):
    root = tmp_path / "spool"
    sp = Spool(root, fsync=False)
    try:
        assert not sp.contains(KEY, "1.2.3.1")  # no folder yet
        sp.store(KEY, "1.2.3.1", _file(1), protocol="apt")
        assert sp.contains(KEY, "1.2.3.1") and not sp.contains(KEY, "1.2.3.2")
    finally:
        sp.close()
    again = Spool(root, fsync=False)  # another process: the folder is what it knows
    try:
        assert again.contains(KEY, "1.2.3.1") and not again.contains("s-other", "1.2.3.1")
    finally:
        again.close()


def test_close_commits_and_a_closed_spool_refuses(tmp_path, monkeypatch):
    monkeypatch.setattr(spool_mod, "BATCH_DELAY_S", 60.0)
    root = tmp_path / "spool"
    sp = Spool(root, fsync=False)
    for i in range(4):
        sp.store(KEY, f"1.2.3.{i}", _file(i), protocol="apt")
    sp.close()
    assert _rows(root, KEY) == 4
    with pytest.raises(SpoolError, match="spool closed"):
        sp.store(KEY, "1.2.3.9", _file(9), protocol="apt")
    sp.close()  # twice is harmless


_CHILD = textwrap.dedent("""
    import os, sys
    from node import spool as m
    m.BATCH_DELAY_S = 3600.0   # no group commit before the kill
    m.BATCH_ROWS = 10**6
    sp = m.Spool(sys.argv[1], fsync=True)
    for i in range(int(sys.argv[2])):
        sp.store(sys.argv[3], f"1.2.3.{i}", (b"DICM", os.urandom(2000)), protocol="apt",
                 expected=9)
    # a half-written temporary file of the named path, as a kill mid-write leaves it
    open(os.path.join(sys.argv[1], sys.argv[3], ".cut.123.tmp"), "wb").write(b"partial")
    sys.stdout.write("stored\\n")
    sys.stdout.flush()
    os._exit(0)   # like SIGKILL: no close, nothing committed, no handler
""")


def test_rows_lost_to_a_kill_are_rebuilt_from_the_folder(tmp_path):
    root = tmp_path / "spool"
    res = subprocess.run([sys.executable, "-c", _CHILD, str(root), "7", KEY],
                         capture_output=True, text=True, timeout=60,
                         cwd=Path(__file__).resolve().parents[2])
    assert res.returncode == 0 and res.stdout == "stored\n", res.stderr
    # the kill left one committed row (the series' first) and six files without a row
    assert _rows(root, KEY) == 1
    assert len(list((root / KEY).glob("*.dcm"))) == 7
    sp = Spool(root, fsync=False)  # opening reconciles the open series with its folder
    try:
        assert len(sp.instance_paths(KEY)) == 7
        rec = sp.series(KEY)
        assert rec is not None and rec.n_instances == 7 and rec.state == "receiving"
        assert rec.expected == 9
        assert not list((root / KEY).glob("*.tmp"))  # the cut temporary file is gone
        assert sp.reconcile() == 0  # nothing more to add
    finally:
        sp.close()


def test_reconcile_leaves_released_series_alone(tmp_path):
    root = tmp_path / "spool"
    sp = Spool(root, fsync=False)
    sp.store(KEY, "1.2.3.1", _file(1), protocol="apt")
    sp.set_state(KEY, "complete")
    sp.close()
    # a stray file in a released series' folder is not an instance of it
    (root / KEY / f"{'f' * 32}.dcm").write_bytes(b"DICM")
    sp = Spool(root, fsync=False)
    try:
        rec = sp.series(KEY)
        assert rec is not None and rec.n_instances == 1
    finally:
        sp.close()
