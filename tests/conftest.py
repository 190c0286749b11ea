"""Shared fixtures. Peers are real processes on loopback (see tests/peers.py)."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.peers import Orthanc, StoreSCP


@pytest.fixture
def storescp(tmp_path: Path) -> Iterator[StoreSCP]:
    """DCMTK storescp writing into tmp_path/storescp, stopped after the test."""
    with StoreSCP(tmp_path / "storescp") as scp:
        yield scp


@pytest.fixture
def orthanc(tmp_path: Path) -> Iterator[Orthanc]:
    """A real Orthanc with storage in tmp_path/orthanc, stopped after the test."""
    with Orthanc(tmp_path / "orthanc") as o:
        yield o
