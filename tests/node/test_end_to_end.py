"""The node end to end with real peers on loopback.

DCMTK ``storescu`` plays the scanner; DCMTK ``storescp`` and Orthanc are the archives;
``dciodvfy`` (dicom3tools) checks the objects against PS3.3; ``dcmj2pnm`` renders what a viewer
would show. Nothing is mocked: real processes, real sockets, ports from the OS.
"""

from __future__ import annotations

import json
import subprocess
from pathlib import Path

import numpy as np
import pytest
from pydicom import dcmread

from node.config import default_config
from node.service import Node
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.node.harness import Collect
from tests.peers import Orthanc, StoreSCP, assert_dciodvfy_clean, require, storescu

pytestmark = pytest.mark.peers

SLICES, SIZE = 3, 48
PATIENT = {"patient_name": "ZZTEST^UNIQUENAME7731", "patient_id": "PID-UNIQUE-55821",
           "patient_birth_date": "19011231"}


@pytest.fixture(scope="module")
def phantom():
    return make_phantom(slices=SLICES, size=SIZE, seed=3)


@pytest.fixture(scope="module")
def series_files(phantom, tmp_path_factory):
    ds = series_from_arrays(phantom.signal, phantom.offsets_ppm, seed="e2e", **PATIENT)
    files = write_series(ds, tmp_path_factory.mktemp("scanner"))
    rng = np.random.default_rng(11)
    return [files[i] for i in rng.permutation(len(files))]  # scrambled arrival order


def _node(tmp_path: Path, dest: str, collect: Collect, **over) -> Node:
    cfg = default_config(base_dir=tmp_path).with_overrides(
        port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs",
        destinations=[dest], allowed_calling_aets=["SCANNER1"], fsync=False, **over)
    return Node(cfg, on_outcome=collect, keep_maps=True)


def _by_series(files: list[Path]) -> dict[str, list]:
    out: dict[str, list] = {}
    for f in files:
        ds = dcmread(f)
        out.setdefault(str(ds.SeriesInstanceUID), []).append(ds)
    return out


def _pm_volume(pm) -> np.ndarray:
    """Parametric Map frames put back in ascending slice position (PS3.3 C.7.6.16.2.3)."""
    arr = pm.pixel_array.astype(np.float32)
    z = [float(f.PlanePositionSequence[0].ImagePositionPatient[2])
         for f in pm.PerFrameFunctionalGroupsSequence]
    return arr[np.argsort(z)]


def test_storescu_to_node_to_storescp(tmp_path, phantom, series_files):
    collect = Collect()
    with StoreSCP(tmp_path / "archive") as archive, \
            _node(tmp_path, f"{archive.ae_title}@127.0.0.1:{archive.port}", collect) as node:
        storescu(node.port, series_files, called_ae="CESTNODE", calling_ae="SCANNER1")
        outcome, later = collect.wait(2)  # the budget-bound pass, then the deferred pass
        assert outcome.ok, outcome.error
        assert later.ok and later.record["pass"] == "deferred", later.error
        files = archive.wait_for(outcome.objects + later.objects)
    series = _by_series(files)
    methods = outcome.methods + later.methods
    assert "mtr_asym" == methods[0]
    # APT* runs in the budget; AREX and MTRasym/T1 need a T1 map the series does not have
    assert outcome.methods == ["mtr_asym", "apt_star"]
    assert set(outcome.skipped) == {"arex", "mtr_asym_t1"}
    assert later.methods == ["lda"]
    # one Parametric Map, SLICES derived MR and SLICES Secondary Captures per method, plus
    # one Structured Report and one summary page per series, and a second pair from the
    # deferred pass covering every map (tests/node/test_report_deferred.py)
    assert len(series) == 3 * len(methods) + 4
    assert len(files) == len(methods) * (1 + 2 * SLICES) + 4
    for dsets in series.values():
        for ds in dsets:
            # DICOM PS3.3 C.12.1: Content Qualification RESEARCH marks research content
            assert ds.ContentQualification == "RESEARCH"
            assert ds.SeriesDescription.startswith("RESEARCH")
            assert ds.Manufacturer == "cest-node"
    # every kind checked against its IOD by dciodvfy (dicom3tools)
    one_of_each = {}
    for f in files:
        one_of_each.setdefault(str(dcmread(f, stop_before_pixels=True).SOPClassUID), f)
    assert len(one_of_each) == 4  # PM, MR, SC, Comprehensive 3D SR
    assert_dciodvfy_clean(one_of_each.values())
    # the SR is preliminary and unverified research content (its numbers are checked against
    # numpy in test_derive_reports.py)
    sr = next(d for dsets in series.values() for d in dsets
              if d.SOPClassUID.name == "Comprehensive 3D SR Storage")
    assert sr.PreliminaryFlag == "PRELIMINARY" and sr.VerificationFlag == "UNVERIFIED"
    # the Parametric Map holds the map, and the acidotic region has the lower MTRasym
    # (direction reported for ischemic tissue: Zhou et al., Nat Med 2003)
    pm = next(d for dsets in series.values() for d in dsets
              if d.SOPClassUID.name == "Parametric Map Storage"
              and "MTRasym" in d.SeriesDescription and "T1" not in d.SeriesDescription)
    vol = _pm_volume(pm)
    np.testing.assert_array_equal(np.isnan(vol), np.isnan(outcome.maps["mtr_asym"]))
    np.testing.assert_allclose(vol, outcome.maps["mtr_asym"], equal_nan=True)
    assert np.nanmean(vol[phantom.lesion]) < np.nanmean(vol[phantom.contralateral])
    # the Secondary Capture renders with DCMTK, as a viewer would show it
    sc = next(f for f in files if dcmread(f, stop_before_pixels=True).SOPClassUID.name
              == "Secondary Capture Image Storage")
    png = tmp_path / "sc.png"
    exe = require("dcmj2pnm")
    res = subprocess.run([exe, "+on", str(sc), str(png)], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
    assert png.stat().st_size > 10_000
    # the latency log: one line per pass, the series key, no patient data anywhere
    lines = (tmp_path / "logs" / "latency.jsonl").read_text().splitlines()
    assert len(lines) == 2
    rec = json.loads(lines[0])
    assert rec["series"] == outcome.key and rec["instances"] == len(series_files)
    assert rec["total_ms"] is not None and rec["primary_ms"] <= rec["total_ms"]
    assert "T1" in rec["skipped"]["arex"]
    assert json.loads(lines[1])["pass"] == "deferred"
    for value in PATIENT.values():
        assert value not in "".join(lines)


def test_orthanc_receives_every_output(tmp_path, series_files):
    collect = Collect()
    with Orthanc(tmp_path / "orthanc") as orthanc, \
            _node(tmp_path, f"{orthanc.ae_title}@127.0.0.1:{orthanc.dicom_port}", collect) as node:
        storescu(node.port, series_files, called_ae="CESTNODE", calling_ae="SCANNER1")
        outcome, later = collect.wait(2)
        assert outcome.ok and later.ok, outcome.error or later.error
        total = outcome.objects + later.objects
        assert orthanc.wait_for(total) == total
        series = orthanc.series()
    assert len(series) == 3 * (len(outcome.methods) + len(later.methods)) + 4
    descriptions = sorted(s["MainDicomTags"]["SeriesDescription"] for s in series)
    assert all(d.startswith("RESEARCH") for d in descriptions)


def test_unknown_calling_ae_is_rejected_and_unmatched_series_ignored(tmp_path, phantom):
    collect = Collect()
    other = series_from_arrays(phantom.signal[:1, :, :, :2], phantom.offsets_ppm[:2],
                               seed="other", series_description="T2 axial")
    files = write_series(other, tmp_path / "other")
    with StoreSCP(tmp_path / "archive") as archive, \
            _node(tmp_path, f"{archive.ae_title}@127.0.0.1:{archive.port}", collect) as node:
        # an AE title not on the allowlist is rejected at association (A-ASSOCIATE-RJ)
        res = storescu(node.port, files, calling_ae="INTRUDER", check=False)
        assert res.returncode != 0
        assert "reject" in (res.stderr + res.stdout).lower()
        # a series that matches no protocol is acknowledged (0x0000) and not processed
        storescu(node.port, files, calling_ae="SCANNER1")
        node.receiver.assembler.flush(timeout=10)
        assert collect.outcomes == []
        assert archive.files() == []
