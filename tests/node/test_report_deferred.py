"""The deferred pass's report: a second SR and summary page covering every map of the series,
the model-based fits included, in a series of their own.

Sources outside the project: dciodvfy (dicom3tools) checks the objects against PS3.3
(Comprehensive 3D SR IOD A.35.13, Secondary Capture A.8.1); highdicom parses TID 1500 back;
the statistics are recomputed with numpy from the maps the node kept (sample SD, ddof=1, as
TID 1500 "Standard Deviation" is read, common practice); PS3.3 C.17.2 for the document flags.
Sent by DCMTK storescu to the running node, received by DCMTK storescp.
"""

from __future__ import annotations

from dataclasses import replace

import highdicom as hd
import numpy as np
import pytest
from pydicom import dcmread
from pydicom.sr.codedict import codes
from pydicom.uid import Comprehensive3DSRStorage, ParametricMapStorage

from node import pipeline
from node.config import default_config
from node.derive.sr import QC_GROUP_ID, VOXEL_COUNT
from node.service import DeferredJob, Node, Processor
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.node.harness import Collect, assembled
from tests.node.test_derive_reports import _measurements, numpy_hemispheres
from tests.peers import StoreSCP, assert_dciodvfy_clean, storescu

SLICES, SIZE, SEED = 2, 32, 13
FREE, FITS = ("mtr_asym", "apt_star"), ("lda",)


def _protocol(outputs=("parametric_map", "structured_report", "summary")):
    return replace(default_config().protocols[0], methods=FREE + FITS, model_based=True,
                   outputs=outputs, budget_s=600.0)


@pytest.fixture(scope="module")
def phantom():
    return make_phantom(slices=SLICES, size=SIZE, seed=SEED)


@pytest.fixture(scope="module")
def datasets(phantom):
    return series_from_arrays(phantom.signal, phantom.offsets_ppm, seed="report-deferred")


def _check_numbers(group, values, mask):
    """mean, SD and voxel count per hemisphere of one TID 1501 group against numpy."""
    # synth writes ImageOrientationPatient 1\0\0\0\1\0: columns grow towards patient left
    expect, _, _ = numpy_hemispheres(values, mask, left_is_high_column=True)
    got = _measurements(group)
    for side, lat in (("left", codes.SCT.Left.value), ("right", codes.SCT.Right.value)):
        mean, sd, n = expect[side]
        assert n > 10
        (mean_key,) = [k for k in got if k[1] == codes.SCT.Mean.value and k[2] == lat]
        (sd_key,) = [k for k in got if k[1] == codes.SCT.StandardDeviation.value and k[2] == lat]
        np.testing.assert_allclose(got[mean_key], mean, rtol=1e-9)
        np.testing.assert_allclose(got[sd_key], sd, rtol=1e-9)
        assert got[(VOXEL_COUNT.value, "", lat)] == n


@pytest.mark.peers
def test_deferred_pass_sends_a_report_of_every_map(tmp_path, datasets):
    proto = _protocol()
    collect = Collect()
    paths = write_series(datasets, tmp_path / "scanner")
    with StoreSCP(tmp_path / "archive") as archive:
        cfg = default_config(base_dir=tmp_path).with_overrides(
            port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False,
            destinations=[f"{archive.ae_title}@127.0.0.1:{archive.port}"],
            protocols=(proto,), release_grace_s=0.5)
        with Node(cfg, on_outcome=collect, keep_maps=True) as node:
            storescu(node.port, paths)
            first, later = collect.wait(2)
            assert first.ok, first.error
            assert later.ok and later.record["pass"] == "deferred", later.error
            files = archive.wait_for(first.objects + later.objects)
    assert first.methods == list(FREE) and later.methods == list(FITS)
    # the first pass: PM, SR, summary; the deferred pass: the fit's PM, then SR and summary
    assert later.objects == len(FITS) + 2
    read = [dcmread(f) for f in files]
    srs = [d for d in read if d.SOPClassUID == Comprehensive3DSRStorage]
    assert len(srs) == 2
    (full,) = [d for d in srs if "incl. deferred" in d.SeriesDescription]
    (early,) = [d for d in srs if d is not full]
    assert full.SeriesInstanceUID != early.SeriesInstanceUID
    assert full.SOPInstanceUID != early.SOPInstanceUID
    (page,) = [d for d in read if d.Modality == "OT" and "summary" in d.SeriesDescription
               and "incl. deferred" in d.SeriesDescription]
    assert_dciodvfy_clean([f for f, d in zip(files, read, strict=True)
                           if d.SOPInstanceUID in (full.SOPInstanceUID, page.SOPInstanceUID)])
    for ds in (full, page):
        assert ds.SeriesDescription.startswith("RESEARCH") and len(ds.SeriesDescription) <= 64
        assert ds.ContentQualification == "RESEARCH"
    # SR Document General Module (PS3.3 C.17.2)
    assert (full.PreliminaryFlag, full.VerificationFlag) == ("PRELIMINARY", "UNVERIFIED")
    path = next(f for f, d in zip(files, read, strict=True)
                if d.SOPInstanceUID == full.SOPInstanceUID)
    sr = hd.sr.srread(path)
    groups = {str(g.tracking_identifier): g for g in sr.content.get_image_measurement_groups()}
    assert set(groups) == {*FREE, *FITS, QC_GROUP_ID}
    # the brain mask the node used: the same series prepared offline by the same pipeline
    prep = pipeline.prepare_series(assembled(datasets, cfg), proto)
    maps = {**first.maps, **later.maps}
    for name in (*FREE, *FITS):
        _check_numbers(groups[name], maps[name], prep.mask)
    # every group cites its method's Parametric Map, the fit's and those of the first pass
    pms = {d.ContentLabel: d.SOPInstanceUID for d in read if d.SOPClassUID == ParametricMapStorage}
    for name in (*FREE, *FITS):
        (src,) = groups[name].source_images
        assert src.referenced_sop_instance_uid == pms[name.upper()]
    # the model-free numbers are those of the first report
    early_groups = {str(g.tracking_identifier): g for g in
                    hd.sr.srread(next(f for f, d in zip(files, read, strict=True)
                                      if d.SOPInstanceUID == early.SOPInstanceUID))
                    .content.get_image_measurement_groups()}
    assert set(early_groups) == {*FREE, QC_GROUP_ID}
    for name in FREE:
        assert _measurements(early_groups[name]) == _measurements(groups[name])


def _run(cfg, series, **deferred):
    batches = []
    proc = Processor(cfg, lambda batch, clock: batches.append(batch) or True, keep_maps=True)
    outcome, job = proc.process(series)
    assert outcome.ok, outcome.error
    assert job is not None and job.methods == list(FITS)
    n = len(batches)
    later = proc.run_deferred(job, **deferred)
    return job, later, batches[n:], proc


def test_resumed_and_abandoned_deferred_passes(datasets):
    proto = _protocol(outputs=("parametric_map", "structured_report", "segmentation"))
    cfg = default_config().with_overrides(protocols=(proto,))
    series = assembled(datasets, cfg)
    job, later, batches, proc = _run(cfg, series)
    assert later.ok, later.error
    # the deferred report holds the SR only here: the Segmentation is not repeated
    (report,) = [b for b in batches if b.label == "report"]
    assert [d.Modality for d in report.datasets] == ["SR"]
    full = report.datasets[0]
    assert full.SeriesDescription == "RESEARCH CEST measurements SR incl. deferred"
    # the budget-bound pass's Parametric Maps travel with the job without their pixels
    assert [r.name for r, _ in job.reported] == list(FREE)
    assert all(pm is not None and "FloatPixelData" not in pm for _, pm in job.reported)
    # a job resumed after a restart has only the fits: its report says so, and it is another
    # series (its UID names the maps it covers), never a second content under one UID
    resumed = DeferredJob(job.series, job.protocol, job.prep, list(job.methods))
    batches2: list = []
    proc.deliver = lambda batch, clock: batches2.append(batch) or True
    again = proc.run_deferred(resumed)
    assert again.ok, again.error
    (report2,) = [b for b in batches2 if b.label == "report"]
    (sr2,) = report2.datasets
    assert sr2.SeriesDescription == "RESEARCH CEST measurements SR deferred maps"
    assert sr2.SeriesInstanceUID != full.SeriesInstanceUID
    groups = {str(g.tracking_identifier)
              for g in hd.sr.Comprehensive3DSR.from_dataset(sr2).content
              .get_image_measurement_groups()}
    assert groups == {*FITS, QC_GROUP_ID}
    # a pass stopped by a shutdown sends no report (it runs again at the next start)
    batches3: list = []
    proc.deliver = lambda batch, clock: batches3.append(batch) or True
    stopped = proc.run_deferred(job, between_chunks=lambda done, total: False)
    assert stopped.abandoned and not batches3
