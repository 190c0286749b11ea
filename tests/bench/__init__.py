"""Benchmarks: run each with ``.venv/bin/python -m tests.bench.NAME`` (not in the default test
run). Each prints medians of several runs beside its anchor, measured in the same run."""

from __future__ import annotations

import argparse
import os
import tempfile

#: Where ``--tmpfs`` puts a run's files: a memory file system on Linux
TMPFS = "/dev/shm"


def add_tmpfs_option(ap: argparse.ArgumentParser) -> None:
    """The ``--tmpfs`` switch of the benchmarks that write files (inputs, spool, archive)."""
    ap.add_argument(
        "--tmpfs", action="store_true",
        help=f"keep every file of the run in {TMPFS} (memory) instead of the temporary folder "
             "on disk: for comparing changes of the node's own work, with the disk's variation "
             "taken out (an fsync then costs next to nothing, for the node and the anchor alike)")


def use_tmpfs(args: argparse.Namespace) -> str:
    """Apply ``--tmpfs`` (the run's temporary folders go to :data:`TMPFS`); returns the line
    that says where the files are, for the report."""
    if not getattr(args, "tmpfs", False):
        return f"files on disk, in {tempfile.gettempdir()}"
    if not (os.path.isdir(TMPFS) and os.access(TMPFS, os.W_OK | os.X_OK)):
        raise SystemExit(f"--tmpfs: {TMPFS} is not a folder this process can write here")
    tempfile.tempdir = TMPFS
    return f"files in {TMPFS} (memory; --tmpfs): the disk is out of the comparison"
