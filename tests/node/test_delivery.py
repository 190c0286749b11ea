"""How the budget-bound pass delivers: each output kind as soon as it is built, over one
association per destination kept open for the whole pass (node.service.Node,
node.send.SendSession).

The archive is DCMTK storescp (a real peer, its verbose log counts the associations it
accepted, "Association Acknowledged"); every object must arrive exactly once, with its SOP
Instance UID (PS3.4 B.4.1: the same SOP Instance is the same object).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from pydicom import dcmread

from node.config import parse_config
from node.service import Node
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.node.harness import SCANNER, Collect
from tests.peers import StoreSCP, storescu

SLICES, SIZE = 4, 16
# M0 and -5..+5 ppm every 0.5 ppm: what MTRasym (+-3.5) and APT* (2.7, 3.5, 4.3) read
OFFSETS = [-300.0, *(x / 2 for x in range(-10, 11))]


def config(tmp_path: Path, port: int):
    return parse_config({
        "node": {"port": 0, "spool_dir": str(tmp_path / "spool"),
                 "log_dir": str(tmp_path / "logs"), "fsync": False, "idle_timeout_s": 3.0,
                 "release_grace_s": 0.2, "allowed_calling_aets": [SCANNER]},
        "destinations": [{"ae_title": "ARCHIVE", "host": "127.0.0.1", "port": port}],
        "protocols": [{
            "name": "apt_small",
            "match": {"attribute": "SeriesDescription", "regex": "^CEST APT phantom"},
            "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"},
            "expected_frames": "auto",
            "methods": ["mtr_asym", "apt_star"],
            "outputs": ["derived_mr", "secondary_capture", "parametric_map"],
            "model_based": False,
        }],
    }, base_dir=tmp_path)


@pytest.mark.peers
def test_a_pass_goes_over_one_association_and_every_object_arrives_once(tmp_path):
    ph = make_phantom(slices=SLICES, size=SIZE, offsets_ppm=OFFSETS, seed=7)
    files = write_series(series_from_arrays(ph.signal, OFFSETS, seed="one-association"),
                         tmp_path / "scanner")
    collect = Collect()
    with StoreSCP(tmp_path / "archive", log=tmp_path / "storescp.log") as archive:
        with Node(config(tmp_path, archive.port), on_outcome=collect) as nd:
            storescu(nd.port, files, calling_ae=SCANNER)
            (outcome,) = collect.wait(1)
            assert outcome.ok, outcome.error
            assert outcome.methods == ["mtr_asym", "apt_star"]
            got = archive.wait_for(outcome.objects)
        # two methods x (4 MR + 4 SC + 1 PM): every kind in a batch of its
        # own, sent as built, the whole pass over one association kept open
        assert outcome.objects == 2 * (SLICES + SLICES + 1)
        uids = [str(dcmread(f, stop_before_pixels=True).SOPInstanceUID) for f in got]
        assert len(uids) == len(set(uids)) == outcome.objects
        assert archive.associations() == 1
        rec = outcome.record
        assert rec["primary_ms"] <= rec["total_ms"]
