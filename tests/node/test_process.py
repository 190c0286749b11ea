"""The offline pipeline (``cest-node process``): same code as the node, files in and out."""

from __future__ import annotations

import numpy as np
import pytest
from pydicom import dcmread

from node.assemble import Assembler
from node.cli import main
from node.config import default_config
from node.service import Processor
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom


@pytest.fixture(scope="module")
def datasets():
    ph = make_phantom(slices=2, size=40, seed=5)
    return ph, series_from_arrays(ph.signal, ph.offsets_ppm, seed="process")


def _maps(cfg, dsets):
    outcomes = []
    proc = Processor(cfg, lambda batch, clock: True, keep_maps=True)
    with Assembler(cfg, lambda s: outcomes.append(proc.process(s)[0])) as asm:
        for ds in dsets:
            asm.add(ds)
        asm.flush()
    assert len(outcomes) == 1 and outcomes[0].ok, outcomes[0].error if outcomes else "none"
    return outcomes[0].maps


def test_scrambled_arrival_gives_identical_maps(tmp_path, datasets):
    # brief: frames are ordered by the offset read from their headers, never by arrival
    _, dsets = datasets
    cfg = default_config(base_dir=tmp_path)
    ref = _maps(cfg, dsets)
    for seed in (1, 2):
        order = np.random.default_rng(seed).permutation(len(dsets))
        got = _maps(cfg, [dsets[i] for i in order])
        assert got.keys() == ref.keys()
        for name in ref:
            np.testing.assert_array_equal(got[name], ref[name])


def test_process_command_writes_outputs(tmp_path, datasets, capsys):
    _, dsets = datasets
    src = tmp_path / "src"
    write_series(dsets, src)
    (src / "junk.dcm").write_bytes(b"not dicom at all")
    rc = main(["process", str(src), "--out", str(tmp_path / "out")])
    out = capsys.readouterr()
    assert rc == 0, out.err
    assert "1 refused" in out.out
    written = sorted((tmp_path / "out").rglob("*.dcm"))
    kinds = {dcmread(f, stop_before_pixels=True).SOPClassUID.name for f in written}
    assert kinds == {"Parametric Map Storage", "MR Image Storage",
                     "Secondary Capture Image Storage", "Comprehensive 3D SR Storage"}
    assert (tmp_path / "out" / "logs" / "latency.jsonl").exists()


def test_check_config_names_the_bad_key(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('[node]\nport = "eleven"\n')
    assert main(["check-config", str(bad)]) == 1
    assert "node.port" in capsys.readouterr().err
