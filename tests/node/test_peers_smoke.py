"""The peers themselves work on this machine (a failing peer would make every other test lie)."""

from __future__ import annotations

import numpy as np
import pytest

from node.synth import series_from_arrays, write_series
from tests.peers import assert_dciodvfy_clean, echoscu, storescu

pytestmark = pytest.mark.peers


def _files(tmp_path):
    sig = np.random.default_rng(1).random((2, 8, 8, 3)).astype(np.float32)
    return write_series(series_from_arrays(sig, [-300.0, 3.5, -3.5]), tmp_path / "src")


def test_synth_series_is_a_valid_mr_image(tmp_path):
    # PS3.3 A.4 MR Image IOD, checked by dciodvfy (dicom3tools)
    assert_dciodvfy_clean(_files(tmp_path))


def test_storescu_to_storescp_and_orthanc(tmp_path, storescp, orthanc):
    files = _files(tmp_path)
    assert echoscu(storescp.port, called_ae=storescp.ae_title) == 0
    storescu(storescp.port, files, called_ae=storescp.ae_title)
    assert len(storescp.wait_for(len(files))) == len(files)
    storescu(orthanc.dicom_port, files, called_ae=orthanc.ae_title)
    assert orthanc.wait_for(len(files)) == len(files)
    assert len(orthanc.series()) == 1
