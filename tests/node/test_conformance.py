"""The Conformance Statement matches the code, and the running node accepts exactly what it lists.

The statement's SCP table is read back from deploy/conformance.md (not from the code) and every
listed context is negotiated, one context per association, with a pynetdicom SCU and with DCMTK
(``storescu`` with a one-context configuration file, ``echoscu``). Unlisted contexts (CT Image
Storage, MR in JPEG Baseline or Explicit VR Big Endian, and every other storage class pynetdicom
knows) must be rejected. The structure is that of PS3.2; the negotiation rules are PS3.8 9.3.2.2
(one result per proposed presentation context: 0 acceptance, 3 abstract syntax not supported,
4 transfer syntaxes not supported).
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import pytest
from pydicom import dcmread
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import (
    UID,
    CTImageStorage,
    EnhancedMRImageStorage,
    ExplicitVRBigEndian,
    ExplicitVRLittleEndian,
    ImplicitVRLittleEndian,
    JPEGBaseline8Bit,
    MRImageStorage,
    generate_uid,
)
from pynetdicom import AE, StoragePresentationContexts
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

from node.cli import main
from node.config import default_config
from node.conformance import scp_contexts, statement
from node.receive import Receiver
from node.synth import phantom_series, write_series
from tests.peers import PEER_ENV, require

ROOT = Path(__file__).resolve().parents[2]
COMMITTED = ROOT / "deploy" / "conformance.md"


def listed_scp_contexts(text: str) -> set[tuple[str, str]]:
    """(abstract syntax UID, transfer syntax UID) of every row of the statement's SCP table."""
    rows = set()
    for line in text.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 6 and cells[4] == "SCP":
            uids = [c.strip("`") for c in (cells[1], cells[3])]
            rows.add((uids[0], uids[1]))
    return rows


@pytest.fixture(scope="module")
def node_port(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("conformance")
    cfg = default_config(base_dir=tmp).with_overrides(
        port=0, spool_dir=tmp / "spool", log_dir=tmp / "logs", fsync=False)
    with Receiver(cfg, on_complete=lambda s: None) as rx:
        yield rx.port


def test_committed_statement_is_the_generated_one(tmp_path):
    # a drifted file fails here: regenerate with `cest-node conformance --out deploy/conformance.md`
    fresh = statement()
    assert COMMITTED.read_text(encoding="utf-8") == fresh
    out = tmp_path / "cs.md"
    assert main(["conformance", "--out", str(out)]) == 0
    assert out.read_text(encoding="utf-8") == fresh


def test_statement_has_the_ps32_sections():
    # PS3.2 Annex A (conformance statement template): networking, media, character sets, security
    text = COMMITTED.read_text(encoding="utf-8")
    for heading in ("Implementation model", "AE specification", "Association policies",
                    "Association acceptance policy", "Association initiation policy",
                    "Network interfaces", "Configuration", "Media interchange",
                    "Support of character sets", "Security"):
        assert re.search(rf"^#+ [\d.]+ {heading}", text, re.M), heading
    assert "Research use only" in text


def test_statement_lists_the_receivers_contexts():
    listed = listed_scp_contexts(COMMITTED.read_text(encoding="utf-8"))
    code = {(str(c.sop_class), str(c.transfer_syntax)) for c in scp_contexts()}
    assert listed == code
    assert (MRImageStorage, ExplicitVRLittleEndian) in listed


def _negotiate(port: int, sop_class: str, ts: str) -> tuple[bool, str | None]:
    """Propose one presentation context; (accepted, accepted transfer syntax)."""
    ae = AE(ae_title="CONFTEST")
    ae.add_requested_context(sop_class, [ts])
    assoc = ae.associate("127.0.0.1", port, ae_title="CESTNODE")
    try:
        assert assoc.is_established, "the node refused the association itself"
        acc = assoc.accepted_contexts
        return bool(acc), (str(acc[0].transfer_syntax[0]) if acc else None)
    finally:
        if assoc.is_established:
            assoc.release()


def test_pynetdicom_negotiates_every_listed_context_one_at_a_time(node_port):
    listed = sorted(listed_scp_contexts(COMMITTED.read_text(encoding="utf-8")))
    assert len(listed) >= 6
    for sop_class, ts in listed:
        ok, got = _negotiate(node_port, sop_class, ts)
        assert ok and got == ts, f"{UID(sop_class).name} in {UID(ts).name} not accepted"


@pytest.mark.parametrize("sop_class, ts, result", [
    (CTImageStorage, ExplicitVRLittleEndian, 3),     # a class not listed
    (MRImageStorage, JPEGBaseline8Bit, 4),           # a listed class in an unlisted syntax
    (MRImageStorage, ExplicitVRBigEndian, 4),        # retired, not listed
])
def test_pynetdicom_unlisted_context_is_rejected(node_port, sop_class, ts, result):
    # Verification rides along so that the association itself is established and the one
    # context's result can be read (pynetdicom aborts an association with no context accepted)
    ae = AE(ae_title="CONFTEST")
    ae.add_requested_context(sop_class, [ts])
    ae.add_requested_context(Verification, [ImplicitVRLittleEndian])
    assoc = ae.associate("127.0.0.1", node_port, ae_title="CESTNODE")
    try:
        assert assoc.is_established
        rejected = {str(cx.abstract_syntax): cx.result for cx in assoc.rejected_contexts}
        accepted = [str(cx.abstract_syntax) for cx in assoc.accepted_contexts]
    finally:
        assoc.release()
    assert accepted == [Verification]
    # PS3.8 Table 9-18: 3 abstract syntax not supported, 4 transfer syntaxes not supported
    assert rejected == {sop_class: result}


def test_every_other_storage_class_is_rejected(node_port):
    listed = {c for c, _ in listed_scp_contexts(COMMITTED.read_text(encoding="utf-8"))}
    others = [cx.abstract_syntax for cx in StoragePresentationContexts
              if cx.abstract_syntax not in listed][:127]  # 128 contexts at most (PS3.8)
    ae = AE(ae_title="CONFTEST")
    for cls in others:
        ae.add_requested_context(cls, [ExplicitVRLittleEndian, ImplicitVRLittleEndian])
    ae.add_requested_context(MRImageStorage, [ExplicitVRLittleEndian])
    assoc = ae.associate("127.0.0.1", node_port, ae_title="CESTNODE")
    try:
        assert assoc.is_established
        accepted = {str(cx.abstract_syntax) for cx in assoc.accepted_contexts}
        rejected = {str(cx.abstract_syntax) for cx in assoc.rejected_contexts}
    finally:
        assoc.release()
    assert accepted == {MRImageStorage}
    assert rejected == {str(c) for c in others}


# --------------------------------------------------------------------------- DCMTK
DCMTK_NAME = {ExplicitVRLittleEndian: "LittleEndianExplicit",
              ImplicitVRLittleEndian: "LittleEndianImplicit"}


@pytest.fixture(scope="module")
def sample_files(tmp_path_factory):
    """One file per storage class: a phantom MR instance, a small Enhanced MR, a CT copy."""
    tmp = tmp_path_factory.mktemp("files")
    mr = write_series(phantom_series(slices=1, size=16, seed=0)[:1], tmp / "mr")[0]
    files = {MRImageStorage: mr}
    ds = dcmread(mr)
    for cls, name in ((EnhancedMRImageStorage, "emr.dcm"), (CTImageStorage, "ct.dcm")):
        other = Dataset()
        other.update(ds)
        other.SOPClassUID = cls
        other.SOPInstanceUID = generate_uid()
        other.file_meta = FileMetaDataset()
        other.file_meta.MediaStorageSOPClassUID = cls
        other.file_meta.MediaStorageSOPInstanceUID = other.SOPInstanceUID
        other.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
        other.save_as(tmp / name, enforce_file_format=True)
        files[cls] = tmp / name
    return files


def _storescu_one(port: int, tmp: Path, sop_class: str, ts: str, file: Path) -> str:
    """DCMTK storescu proposing exactly one context (a configuration file, option -xf)."""
    exe = require("storescu")
    cfg = tmp / f"{sop_class}-{ts}.cfg"
    cfg.write_text(
        "[[TransferSyntaxes]]\n[TS]\nTransferSyntax1 = " + ts + "\n"
        "[[PresentationContexts]]\n[PC]\nPresentationContext1 = " + sop_class + "\\TS\n"
        "[[Profiles]]\n[ONE]\nPresentationContexts = PC\n")
    res = subprocess.run([exe, "-d", "-xf", str(cfg), "ONE", "-aet", "CONFTEST", "-aec",
                          "CESTNODE", "127.0.0.1", str(port), str(file)],
                         capture_output=True, text=True, timeout=60, env=PEER_ENV)
    return res.stdout + res.stderr


@pytest.mark.peers
def test_storescu_negotiates_every_listed_storage_context(node_port, sample_files, tmp_path):
    listed = listed_scp_contexts(COMMITTED.read_text(encoding="utf-8"))
    storage = sorted((c, t) for c, t in listed if c != Verification)
    assert storage
    for sop_class, ts in storage:
        out = _storescu_one(node_port, tmp_path, sop_class, ts, sample_files[sop_class])
        # one context with one transfer syntax was proposed: accepted means in that syntax
        assert re.search(r"Context ID:\s+1 \(Accepted\)", out), (sop_class, ts, out[-1500:])
        assert "Accepted Transfer Syntax: " in out, out[-1500:]


@pytest.mark.peers
@pytest.mark.parametrize("sop_class, ts", [(CTImageStorage, ExplicitVRLittleEndian),
                                           (MRImageStorage, JPEGBaseline8Bit)])
def test_storescu_unlisted_context_is_rejected(node_port, sample_files, tmp_path, sop_class, ts):
    out = _storescu_one(node_port, tmp_path, sop_class, ts, sample_files[sop_class])
    assert "No Acceptable Presentation Contexts" in out, out[-1500:]


@pytest.mark.peers
@pytest.mark.parametrize("pts, expected", [(1, ImplicitVRLittleEndian),
                                           (2, ExplicitVRLittleEndian)])
def test_echoscu_verification(node_port, pts, expected):
    # echoscu proposes one Verification context with its first `pts` transfer syntaxes
    # (Implicit, then Explicit VR Little Endian); the node takes the first of its own list
    exe = require("echoscu")
    res = subprocess.run([exe, "-d", "-pts", str(pts), "-aet", "CONFTEST", "-aec", "CESTNODE",
                          "127.0.0.1", str(node_port)], capture_output=True, text=True,
                         timeout=30, env=PEER_ENV)
    out = res.stdout + res.stderr
    assert res.returncode == 0, out[-1500:]
    assert (Verification, expected) in listed_scp_contexts(COMMITTED.read_text("utf-8"))
    assert f"Accepted Transfer Syntax: ={DCMTK_NAME[expected]}" in out
