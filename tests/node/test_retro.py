"""Retrospective reprocessing against a real Orthanc archive.

Two phantom studies are uploaded with DCMTK storescu, one dated inside the queried range and one
outside. ``run_query`` (and ``cest-node process --query``) must C-FIND (Study Root, range
matching on StudyDate, PS3.4 C.2.2.2.5), C-GET the matching series, process it and store the
derived series back; Orthanc's REST API tells what arrived. A second run skips the study whose
results are already there.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from node.cli import main
from node.config import default_config
from node.retro import PROCESSED, SKIPPED, Query, format_table, parse_date, run_query
from node.send import Destination
from node.synth import series_from_arrays, write_series
from node.types import series_key
from quant.phantom import make_phantom
from tests.peers import Orthanc, storescu

pytestmark = pytest.mark.peers

DATES = {"inside": "20240115", "outside": "20230301"}


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("retro")
    ph = make_phantom(slices=1, size=24, seed=5)
    files: list[Path] = []
    keys = {}
    for label, date in DATES.items():
        datasets = series_from_arrays(ph.signal, ph.offsets_ppm, seed=f"retro-{label}",
                                      patient_id=f"RETRO-{label.upper()}")
        for ds in datasets:
            ds.StudyDate = ds.SeriesDate = ds.AcquisitionDate = ds.ContentDate = date
        files += write_series(datasets, tmp_path / label)
        keys[label] = series_key(str(datasets[0].StudyInstanceUID), "")
    with Orthanc(tmp_path / "orthanc") as orthanc:
        storescu(orthanc.dicom_port, files, called_ae="ORTHANC")
        orthanc.wait_for(len(files))
        yield orthanc, keys


def _cfg(tmp_path):
    # LDA is the protocol's deferred method; keep the model-free ones and LDA (fast at 24 x 24)
    return default_config(base_dir=tmp_path).with_overrides(
        spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False)


def _derived(orthanc) -> dict[str, list[dict]]:
    """Derived (RESEARCH) series in Orthanc per StudyDate."""
    out: dict[str, list[dict]] = {}
    for s in orthanc.series():
        if s["MainDicomTags"].get("SeriesDescription", "").startswith("RESEARCH"):
            study = orthanc.get(f"/studies/{s['ParentStudy']}")
            assert isinstance(study, dict)
            out.setdefault(study["MainDicomTags"]["StudyDate"], []).append(s)
    return out


def test_query_processes_the_study_in_range_and_stores_back(archive, tmp_path):
    orthanc, keys = archive
    cfg = _cfg(tmp_path)
    query = Query(Destination("ORTHANC", "127.0.0.1", orthanc.dicom_port), cfg.protocols[0].name,
                  parse_date("20240101", key="since"), parse_date("20240131", key="until"))
    results = run_query(cfg, query, progress=False)
    assert [r.status for r in results] == [PROCESSED], format_table(results)
    assert results[0].series == 1 and results[0].objects > 0
    assert results[0].key == keys["inside"], "only the study inside the range is found"
    derived = _derived(orthanc)
    stored = sum(len(s["Instances"]) for s in derived[DATES["inside"]])
    assert stored == results[0].objects
    kinds = {s["MainDicomTags"].get("Modality") for s in derived[DATES["inside"]]}
    assert {"MR", "OT"} <= kinds  # derived MR, Secondary Capture (OT); Parametric Map too
    # the same query again: the results are in the archive, the study is skipped
    again = run_query(cfg, query, progress=False)
    assert [(r.status, r.reason) for r in again] == [(SKIPPED, "results already in the archive")]
    assert sum(len(s["Instances"]) for s in _derived(orthanc)[DATES["inside"]]) == stored


def test_cli_query_prints_the_table(archive, tmp_path, capsys):
    orthanc, _ = archive
    rc = main(["process", "--query", "--archive", f"ORTHANC@127.0.0.1:{orthanc.dicom_port}",
               "--since", "20230101", "--until", "20231231"])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "1 studies: 1 processed, 0 skipped, 0 failed" in out
    assert DATES["outside"] in _derived(orthanc)


def test_unreachable_archive_and_bad_dates(tmp_path, capsys):
    with pytest.raises(ValueError, match="--since: expected a date YYYYMMDD"):
        parse_date("2024-01-01", key="--since")
    with pytest.raises(ValueError, match="is not a calendar date"):
        parse_date("20240231", key="--until")
    with pytest.raises(ValueError, match="is after --until"):
        Query(Destination("A", "127.0.0.1", 104), "p", parse_date("20240201", key="s"),
              parse_date("20240101", key="u"))
    rc = main(["process", "--query", "--since", "20240101"])
    assert rc == 2 and "--query needs --archive" in capsys.readouterr().err
