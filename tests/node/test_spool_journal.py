"""node.spool's journal: with ``fsync``, an answered instance is durable through one flush of
the journal, and the instance files are made whole again from it after an unclean stop.

The stop is real: a child Python process stores instances and ends with ``os._exit`` (no
close, no checkpoint), as SIGKILL leaves a node. A power cut cannot be staged in a test; what it
would cost (instance files, or the removal of one, not yet on the disk) is staged instead by
deleting, cutting or restoring files between the child's end and the next opening, which is
exactly what the replay must repair (common practice: write-ahead logging, the record flushed
before the change it protects is relied on).
"""

from __future__ import annotations

import hashlib
import os
import struct
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from node import spool as spool_mod
from node.spool import Spool, instance_hash

KEY = "s-00112233445566ff"
ROOT_DIR = Path(__file__).resolve().parents[2]


def _instance(i: int, size: int = 3000) -> tuple[bytes, bytes]:
    """A stand-in instance in two parts (prefix, data set), the same bytes for the same i."""
    body = hashlib.sha256(str(i).encode()).digest() * (size // 32 + 1)
    return (b"\x00" * 128 + b"DICM" + i.to_bytes(4, "little"), body[:size])


_CHILD = textwrap.dedent("""
    import hashlib, os, sys
    from node import spool as m
    m.JOURNAL_IDLE_S = 3600.0  # no checkpoint but the ones a full journal forces
    root, n, key, size, discard = sys.argv[1], int(sys.argv[2]), sys.argv[3], int(sys.argv[4]), sys.argv[5]
    sp = m.Spool(root, fsync=True)
    for i in range(n):
        body = hashlib.sha256(str(i).encode()).digest() * (size // 32 + 1)
        sp.store(key, f"1.2.3.{i}", (b"\\x00" * 128 + b"DICM" + i.to_bytes(4, "little"),
                                     body[:size]), protocol="apt", expected=n)
    for i in [int(x) for x in discard.split(",") if x]:
        sp.discard(key, f"1.2.3.{i}")
    j = sp._journal
    print(j is not None, j.checkpoints if j else -1, flush=True)
    os._exit(0)  # like SIGKILL: no close, no checkpoint, no handler
""")


def _run_child(root: Path, n: int, *, size: int = 3000, discard: str = "",
               env: dict[str, str] | None = None) -> tuple[bool, int]:
    res = subprocess.run([sys.executable, "-c", _CHILD, str(root), str(n), KEY, str(size),
                          discard], capture_output=True, text=True, timeout=120,
                         cwd=ROOT_DIR, env={**os.environ, **(env or {})})
    assert res.returncode == 0, res.stderr
    journaled, checkpoints = res.stdout.split()
    return journaled == "True", int(checkpoints)


def _path(root: Path, i: int) -> Path:
    return root / KEY / f"{instance_hash(f'1.2.3.{i}')}.dcm"


def test_files_lost_after_an_unclean_stop_are_made_whole_from_the_journal(tmp_path):
    root = tmp_path / "spool"
    journaled, _ = _run_child(root, 7)
    assert journaled
    # what the file system had not written when the power went: one file gone, one cut short
    _path(root, 0).unlink()
    with open(_path(root, 1), "r+b") as f:
        f.truncate(100)
    sp = Spool(root, fsync=True)
    try:
        for i in range(7):
            assert _path(root, i).read_bytes() == b"".join(_instance(i)), i
        assert len(sp.instance_paths(KEY)) == 7  # and indexed (reconcile after the replay)
    finally:
        sp.close()


def test_a_torn_record_ends_the_replay(tmp_path):
    root = tmp_path / "spool"
    _run_child(root, 3)
    journal = (root / "journal.wal").read_bytes()
    starts = [pos for pos in range(4096, len(journal), 4096)
              if journal[pos:pos + 8] == b"CNSPJR01"]
    assert len(starts) == 3
    # the third record cut by the power cut (one byte of its data never written): its
    # instance was never answered, and neither it nor anything after it is replayed
    with open(root / "journal.wal", "r+b") as f:
        f.seek(starts[2] + 200)
        byte = f.read(1)
        f.seek(starts[2] + 200)
        f.write(bytes([byte[0] ^ 0xFF]))
    for i in (1, 2):
        _path(root, i).unlink()
    Spool(root, fsync=True).close()
    assert _path(root, 1).read_bytes() == b"".join(_instance(1))
    assert not _path(root, 2).exists()


def test_a_discarded_instance_is_not_brought_back(tmp_path):
    root = tmp_path / "spool"
    _run_child(root, 2, discard="1")
    assert not _path(root, 1).exists()
    # the removal had not reached the disk: the file is there again after the power cut
    _path(root, 1).write_bytes(b"".join(_instance(1)))
    Spool(root, fsync=True).close()
    assert not _path(root, 1).exists()
    assert _path(root, 0).read_bytes() == b"".join(_instance(0))


def test_a_full_journal_checkpoints_and_forgets_what_it_flushed(tmp_path):
    root = tmp_path / "spool"
    # a 1 MiB journal holds about 27 instances of 34 kB: 40 of them force a checkpoint
    journaled, checkpoints = _run_child(root, 40, size=34000,
                                        env={"CEST_NODE_SPOOL_JOURNAL_MB": "1"})
    assert journaled and checkpoints >= 1
    assert (root / "journal.wal").stat().st_size <= 1 << 20
    _path(root, 0).unlink()  # flushed by the checkpoint: deleted on purpose, stays deleted
    _path(root, 39).unlink()  # after the last checkpoint: the journal holds it
    Spool(root, fsync=True).close()
    assert not _path(root, 0).exists()
    assert _path(root, 39).read_bytes() == b"".join(_instance(39, 34000))


def test_a_clean_close_leaves_nothing_to_replay(tmp_path):
    root = tmp_path / "spool"
    sp = Spool(root, fsync=True)
    assert sp._journal is not None
    for i in range(3):
        sp.store(KEY, f"1.2.3.{i}", _instance(i), protocol="apt")
    sp.close()
    _path(root, 2).unlink()
    Spool(root, fsync=True).close()
    assert not _path(root, 2).exists()
    magic, generation, crc = struct.unpack("<8sQI", (root / "journal.wal").read_bytes()[:20])
    assert magic == b"CNSPJH01" and generation > 0


def test_idle_checkpoint(tmp_path, monkeypatch):
    monkeypatch.setattr(spool_mod, "JOURNAL_IDLE_S", 0.0)
    sp = Spool(tmp_path / "spool", fsync=True)
    try:
        sp.store(KEY, "1.2.3.4", _instance(4), protocol="apt")
        journal = sp._journal
        assert journal is not None
        for _ in range(100):  # the background thread checkpoints once the spool is idle
            if journal.checkpoints:
                break
            time.sleep(0.05)
        assert journal.checkpoints >= 1 and journal.pos == 4096
    finally:
        sp.close()


@pytest.mark.parametrize(("fsync", "env"), [(False, {}), (True, {"CEST_NODE_SPOOL_JOURNAL_MB": "0"})])
def test_no_journal_without_fsync_or_when_turned_off(tmp_path, monkeypatch, fsync, env):
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    sp = Spool(tmp_path / "spool", fsync=fsync)
    try:
        assert sp._journal is None
        sp.store(KEY, "1.2.3.4", _instance(4), protocol="apt")
        assert not (tmp_path / "spool" / "journal.wal").exists()
        assert _path(tmp_path / "spool", 4).read_bytes() == b"".join(_instance(4))
    finally:
        sp.close()


def test_a_journal_left_behind_is_replayed_even_without_fsync(tmp_path):
    root = tmp_path / "spool"
    _run_child(root, 2)
    _path(root, 1).unlink()
    sp = Spool(root, fsync=False)  # the earlier life's records count all the same
    try:
        assert sp._journal is None
        assert _path(root, 1).read_bytes() == b"".join(_instance(1))
    finally:
        sp.close()


_THREADS_CHILD = textwrap.dedent("""
    import hashlib, os, sys, threading
    from node import spool as m
    sp = m.Spool(sys.argv[1], fsync=True)
    def work(t):
        for i in range(50):
            n = t * 1000 + i
            body = hashlib.sha256(str(n).encode()).digest() * 1063
            sp.store(sys.argv[2], f"1.2.3.{n}", (b"\\x00" * 128 + b"DICM" + n.to_bytes(4, "little"),
                                                  body[:34000]), protocol="apt")
    threads = [threading.Thread(target=work, args=(t,)) for t in range(4)]
    for th in threads: th.start()
    for th in threads: th.join()
    print(sp._journal.checkpoints, flush=True)
    os._exit(0)
""")


def _journaled_stems(root: Path) -> list[str]:
    """The file stems of the current generation's records (the journal's own layout)."""
    raw = (root / "journal.wal").read_bytes()
    generation = struct.unpack_from("<8sQ", raw, 0)[1]
    stems, pos = [], 4096
    while pos + spool_mod._JREC.size <= len(raw):
        magic, gen, kind, klen, slen, dlen, _ = spool_mod._JREC.unpack_from(raw, pos)
        if magic != b"CNSPJR01" or gen != generation:
            break
        at = pos + spool_mod._JREC.size + klen
        stems.append(raw[at:at + slen].decode())
        pos += -(-(spool_mod._JREC.size + klen + slen + dlen) // 4096) * 4096
    return stems


def test_concurrent_stores_through_checkpoints(tmp_path):
    # four associations storing at once through a journal that fills up every ~27 instances:
    # every store waits for no other's flush longer than needed, the checkpoints wait for
    # the names of the records they forget, and every instance is whole afterwards
    root = tmp_path / "spool"
    res = subprocess.run([sys.executable, "-c", _THREADS_CHILD, str(root), KEY],
                         capture_output=True, text=True, timeout=120, cwd=ROOT_DIR,
                         env={**os.environ, "CEST_NODE_SPOOL_JOURNAL_MB": "1"})
    assert res.returncode == 0, res.stderr
    assert int(res.stdout) >= 3
    stems = _journaled_stems(root)  # the records after the last checkpoint
    assert stems
    for stem in stems:  # their files lost: the journal holds them
        (root / KEY / f"{stem}.dcm").unlink()
    Spool(root, fsync=True).close()
    for t in range(4):
        for i in range(50):
            n = t * 1000 + i
            assert _path(root, n).read_bytes() == b"".join(_instance(n, 34000)), n


def test_journal_grows_without_fallocate(tmp_path, monkeypatch):
    # a file system without fallocate (posix_fallocate(3): EOPNOTSUPP or EINVAL where the
    # C library does not emulate it): the journal grows by writing zeros instead
    def no_fallocate(fd, offset, length):
        raise OSError(95, "Operation not supported")

    monkeypatch.setattr(spool_mod.os, "posix_fallocate", no_fallocate)
    root = tmp_path / "spool"
    sp = Spool(root, fsync=True)
    try:
        assert sp._journal is not None
        for i in range(3):
            sp.store(KEY, f"1.2.3.{i}", _instance(i), protocol="apt")
        assert (root / "journal.wal").stat().st_size == 1 << 20
    finally:
        sp.close()
    assert _path(root, 2).read_bytes() == b"".join(_instance(2))
