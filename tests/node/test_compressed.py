"""Lossless compressed input: JPEG Lossless SV1, JPEG-LS lossless, JPEG 2000 lossless, RLE.

Files are compressed by DCMTK (``dcmcjpeg``, ``dcmcjpls``, ``dcmcrle``); Debian's DCMTK has no
JPEG 2000 encoder, so the J2K files are written by GDCM's encoder (python-gdcm,
``gdcm.ImageChangeTransferSyntax``). DCMTK ``storescu`` sends them proposing the matching
syntax (``-xs``, ``-xt``, ``-xv``, ``-xr``), the node keeps the instance as received (the
spool holds the compressed syntax) and decodes it once; lossless means the assembled stack
equals the uncompressed one exactly (PS3.5 8.2: lossless processes reproduce the stored
values).
"""

from __future__ import annotations

import subprocess
import threading
from pathlib import Path

import numpy as np
import pytest
from pydicom import dcmread
from pydicom.uid import JPEG2000Lossless, JPEGLosslessSV1, JPEGLSLossless, RLELossless

from node.assemble import Assembler
from node.config import default_config
from node.receive import TRANSFER_SYNTAXES, Receiver
from node.synth import series_from_arrays, write_series
from quant.phantom import make_phantom
from tests.peers import PEER_ENV, require, storescu

pytestmark = pytest.mark.peers


@pytest.fixture(scope="module")
def plain_files(tmp_path_factory):
    ph = make_phantom(slices=2, size=32, seed=21)
    # the M0, +-3.5 ppm and 8 more offsets: enough frames to assemble, few to compress
    want = np.flatnonzero(np.isin(np.round(ph.offsets_ppm, 3), [-3.5, 3.5]))
    keep = np.unique(np.r_[0, want, 1:61:8])
    offs = ph.offsets_ppm[keep]
    assert {-3.5, 3.5} <= set(np.round(offs, 3))
    ds = series_from_arrays(ph.signal[..., keep], offs, seed="compressed")
    return write_series(ds, tmp_path_factory.mktemp("plain"))


def _dcmtk(tool: str, args: list[str], src: Path, dst: Path) -> None:
    res = subprocess.run([require(tool), *args, str(src), str(dst)], capture_output=True,
                         text=True, timeout=60)
    assert res.returncode == 0, res.stderr


def _gdcm_j2k(src: Path, dst: Path) -> None:
    import gdcm

    reader = gdcm.ImageReader()
    reader.SetFileName(str(src))
    assert reader.Read()
    change = gdcm.ImageChangeTransferSyntax()
    change.SetTransferSyntax(gdcm.TransferSyntax(gdcm.TransferSyntax.JPEG2000Lossless))
    change.SetInput(reader.GetImage())
    assert change.Change()
    writer = gdcm.ImageWriter()
    writer.SetFileName(str(dst))
    writer.SetFile(reader.GetFile())
    writer.SetImage(change.GetOutput())
    assert writer.Write()


# (transfer syntax, how the files are made, storescu option proposing it)
CASES = {
    "jpeg-lossless-sv1": (JPEGLosslessSV1, ("dcmcjpeg", ["+e1"]), "-xs"),
    "jpeg-ls-lossless": (JPEGLSLossless, ("dcmcjpls", ["+el"]), "-xt"),
    "jpeg2000-lossless": (JPEG2000Lossless, None, "-xv"),
    "rle-lossless": (RLELossless, ("dcmcrle", []), "-xr"),
}


def _assembled(files: list[Path]):
    done = []
    with Assembler(default_config(), done.append) as asm:
        for f in files:
            asm.add(dcmread(f))
        asm.flush(timeout=30)
    return done[0]


@pytest.fixture(scope="module")
def plain(plain_files):
    return _assembled(plain_files)


def test_receiver_lists_the_lossless_syntaxes():
    assert {JPEGLosslessSV1, JPEGLSLossless, JPEG2000Lossless, RLELossless} <= set(
        TRANSFER_SYNTAXES)


@pytest.mark.parametrize("case", sorted(CASES))
def test_compressed_series_sent_by_storescu_decodes_to_the_plain_stack(
        case, plain_files, plain, tmp_path):
    ts, tool, option = CASES[case]
    files = []
    for src in plain_files:
        dst = tmp_path / "in" / src.name
        dst.parent.mkdir(exist_ok=True)
        if tool is None:
            _gdcm_j2k(src, dst)
        else:
            _dcmtk(tool[0], tool[1], src, dst)
        files.append(dst)
    assert dcmread(files[0], stop_before_pixels=True).file_meta.TransferSyntaxUID == ts
    got, cond = [], threading.Condition()

    def on_complete(series):
        with cond:
            got.append(series)
            cond.notify_all()

    cfg = default_config(base_dir=tmp_path).with_overrides(
        port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False)
    with Receiver(cfg, on_complete) as rx:
        res = storescu(rx.port, files, extra=[option])
        with cond:
            assert cond.wait_for(lambda: got, timeout=30)
        stored = sorted(Path(rx.spool.root).rglob("*.dcm"))
    # DCMTK reports the negotiated syntax; the spool keeps what was sent
    assert res.returncode == 0
    assert stored and all(dcmread(p, stop_before_pixels=True).file_meta.TransferSyntaxUID == ts
                          for p in stored)
    series = got[0]
    assert series.complete
    np.testing.assert_array_equal(series.offsets_ppm, plain.offsets_ppm)
    np.testing.assert_array_equal(series.signal, plain.signal)  # lossless: bit-exact


def test_storescu_is_refused_a_lossy_only_proposal(plain_files, tmp_path):
    # JPEG Baseline (lossy) is not accepted (PS3.8 9.3.3.2, result 4 transfer syntaxes not
    # supported): only the uncompressed contexts storescu also proposes are, and storescu
    # cannot turn lossy data back into them, so nothing reaches the node
    lossy = tmp_path / "lossy.dcm"
    _dcmtk("dcmcjpeg", ["+eb"], plain_files[0], lossy)
    cfg = default_config(base_dir=tmp_path).with_overrides(
        port=0, spool_dir=tmp_path / "spool", log_dir=tmp_path / "logs", fsync=False)
    with Receiver(cfg, lambda s: None) as rx:
        res = subprocess.run([require("storescu"), "-aec", "CESTNODE", "-xy", "-R",
                              "127.0.0.1", str(rx.port), str(lossy)], capture_output=True,
                             text=True, timeout=60, env=PEER_ENV)
        stored = list(Path(rx.spool.root).rglob("*.dcm"))
    assert res.returncode != 0
    assert "unable to convert dataset from 'jpeg baseline'" in (res.stdout + res.stderr).lower()
    assert stored == []
