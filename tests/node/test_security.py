"""Who may talk to the node, over what, and what it leaves readable or logged.

- peer-address allowlist at association (A-ASSOCIATE-RJ, PS3.8 9.3.4);
- TLS both ways (PS3.15 Annex B secure transport, TLS 1.2 or later, certificates from a test
  CA made here with the ``openssl`` command line): DCMTK ``storescu +tls`` sends to the node,
  the node sends to DCMTK ``storescp +tls``; peers without a certificate from the CA, and plain
  TCP, are refused;
- spool and index readable by the service user only (folders 0700, files 0600);
- no patient name, ID, birth date or accession number in any log record (every logger at
  DEBUG, pynetdicom and pydicom included) nor in the latency log.
"""

from __future__ import annotations

import logging
import os
import re
import shutil
import socket
import stat
import subprocess
from pathlib import Path

import pytest
from pydicom.uid import ExplicitVRLittleEndian, MRImageStorage
from pynetdicom import AE

from node.receive import Receiver
from node.send import Destination, Sender, SendSettings, echo
from node.service import Node
from node.synth import write_series
from node.tls import TlsSettings, client_context, server_context
from tests.node.harness import (
    SCANNER,
    Collect,
    assert_node_alive,
    good_series,
    node_config,
    running_node,
    series_key_of,
)
from tests.peers import StoreSCP, echoscu, storescu

pytestmark = pytest.mark.peers

# unique strings: if one reaches a log line or the latency log, patient data leaked
PATIENT = {"patient_name": "QWXLEAK^NAMEZ8841", "patient_id": "QWXPID55127",
           "patient_birth_date": "19020304", "accession_number": "QWXACC90331"}


# ------------------------------------------------------------------ certificates
def _openssl(*args: str, cwd: Path) -> None:
    exe = shutil.which("openssl")
    if exe is None:
        pytest.skip("openssl is not installed")
    res = subprocess.run([exe, *args], cwd=cwd, capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr


def _ca(folder: Path, name: str) -> None:
    _openssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", f"{name}.key",
             "-out", f"{name}.pem", "-days", "2", "-subj", f"/CN={name}",
             "-addext", "basicConstraints=critical,CA:TRUE",
             "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=folder)


def _leaf(folder: Path, name: str, ca: str) -> None:
    ext = folder / f"{name}.ext"
    ext.write_text("basicConstraints=CA:FALSE\nsubjectAltName=IP:127.0.0.1,DNS:localhost\n"
                   "extendedKeyUsage=serverAuth,clientAuth\n")
    _openssl("req", "-newkey", "rsa:2048", "-nodes", "-keyout", f"{name}.key", "-out",
             f"{name}.csr", "-subj", f"/CN={name}", cwd=folder)
    _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", f"{ca}.pem", "-CAkey", f"{ca}.key",
             "-CAcreateserial", "-out", f"{name}.pem", "-days", "2", "-extfile", ext.name,
             cwd=folder)


@pytest.fixture(scope="module")
def pki(tmp_path_factory) -> Path:
    """A test CA with certificates for the node, a scanner and an archive, and a rogue CA
    with a scanner certificate of its own."""
    folder = tmp_path_factory.mktemp("pki")
    _ca(folder, "ca")
    for name in ("node", "scanner", "archive"):
        _leaf(folder, name, "ca")
    _ca(folder, "rogue-ca")
    _leaf(folder, "rogue", "rogue-ca")
    return folder


def _tls_table(pki: Path) -> dict:
    return {"receive": True, "cert_file": str(pki / "node.pem"),
            "key_file": str(pki / "node.key"), "ca_file": str(pki / "ca.pem"),
            "require_client_cert": True}


def _storescu_tls(port: int, files, pki: Path, who: str, *, check: bool = True):
    return storescu(port, files, calling_ae=SCANNER, check=check,
                    extra=["+tls", str(pki / f"{who}.key"), str(pki / f"{who}.pem"),
                           "+cf", str(pki / "ca.pem")])


class TlsStoreSCP(StoreSCP):
    """DCMTK storescp listening with TLS only, requiring a client certificate (-rc, default)."""

    def __init__(self, folder: Path, pki: Path, who: str = "archive"):
        super().__init__(folder, extra=["+tls", str(pki / f"{who}.key"),
                                        str(pki / f"{who}.pem"), "+cf", str(pki / "ca.pem")])


# ------------------------------------------------------------------ TLS
def test_tls_both_ways_with_dcmtk(tmp_path, pki):
    """storescu --TLS--> node --TLS--> storescp, certificates checked on every hop."""
    collect = Collect()
    with TlsStoreSCP(tmp_path / "archive", pki) as archive:
        cfg = node_config(tmp_path, (archive.ae_title, archive.port), tls=_tls_table(pki),
                          dest_tls=True)
        with Node(cfg, on_outcome=collect) as nd:
            assert nd.port is not None
            dss = good_series("tls", **PATIENT)
            files = write_series(dss, tmp_path / "scanner")
            _storescu_tls(nd.port, files, pki, "scanner")
            key = series_key_of(dss[0])
            (out,) = collect.wait_for(lambda os: len(os) >= 1)
            assert out.key == key and out.ok, out.error
            (pm,) = archive.wait_for(1)
            # our own client speaks TLS to the node as well
            tls = TlsSettings(cert_file=pki / "scanner.pem", key_file=pki / "scanner.key",
                              ca_file=pki / "ca.pem")
            assert echo("CESTNODE", "127.0.0.1", nd.port, calling_ae=SCANNER, tls=tls).ok
            # plain TCP to a TLS port (DCMTK echoscu): no association
            assert echoscu(nd.port, calling_ae=SCANNER) != 0
    assert pm.stat().st_size > 1000


def test_tls_refuses_peers_without_a_certificate_from_the_ca(tmp_path, pki):
    collect = Collect()
    with StoreSCP(tmp_path / "archive") as archive:
        cfg = node_config(tmp_path, (archive.ae_title, archive.port), tls=_tls_table(pki))
        with Node(cfg, on_outcome=collect) as nd:
            assert nd.port is not None
            files = write_series(good_series("tls-refused"), tmp_path / "scanner")
            refused = 0
            # 1. plain TCP storescu
            res = storescu(nd.port, files[:1], calling_ae=SCANNER, check=False)
            refused += res.returncode != 0
            # 2. a certificate from another CA (the node checks the chain)
            res = storescu(nd.port, files[:1], calling_ae=SCANNER, check=False,
                           extra=["+tls", str(pki / "rogue.key"), str(pki / "rogue.pem"),
                                  "+cf", str(pki / "ca.pem")])
            refused += res.returncode != 0
            # 3. TLS without a client certificate (require_client_cert)
            ae = AE(ae_title=SCANNER)
            ae.add_requested_context(MRImageStorage, ExplicitVRLittleEndian)
            no_cert = TlsSettings(ca_file=pki / "ca.pem")
            assoc = ae.associate("127.0.0.1", nd.port, ae_title="CESTNODE",
                                 tls_args=(client_context(no_cert), "127.0.0.1"))
            refused += not assoc.is_established
            if assoc.is_established:
                assoc.release()
            assert refused == 3
            assert nd.receiver.spool.all_series() == []
            # then a scanner with a good certificate gets through and its series is processed
            _storescu_tls(nd.port, files, pki, "scanner")
            (out,) = collect.wait_for(lambda os: len(os) >= 1)
            assert out.ok, out.error
            archive.wait_for(1)


def test_a_silent_client_does_not_block_tls_handshakes(tmp_path, pki):
    """One peer that connects and says nothing must not stop the others (handshakes run in
    each association's own thread)."""
    cfg = node_config(tmp_path, tls=_tls_table(pki))
    with Receiver(cfg, lambda s: None) as rx:
        assert rx.port is not None
        with socket.create_connection(("127.0.0.1", rx.port)):
            tls = TlsSettings(cert_file=pki / "scanner.pem", key_file=pki / "scanner.key",
                              ca_file=pki / "ca.pem")
            assert echo("CESTNODE", "127.0.0.1", rx.port, calling_ae=SCANNER, tls=tls,
                        timeout_s=5).ok


def test_sender_refuses_a_destination_with_a_foreign_certificate(tmp_path, pki):
    with TlsStoreSCP(tmp_path / "archive", pki, who="rogue") as archive:
        tls = TlsSettings(cert_file=pki / "node.pem", key_file=pki / "node.key",
                          ca_file=pki / "ca.pem")
        sender = Sender(SendSettings(calling_ae="CESTNODE", retries=0, tls=tls))
        report = sender.send(good_series("foreign")[:1],
                             Destination(archive.ae_title, "127.0.0.1", archive.port, tls=True))
        assert not report.ok and report.sent == 0
        assert "TLS" in report.attempts[0].error
        assert archive.files() == []
        # a TLS destination without certificates configured fails at once, naming the key
        plain = Sender(SendSettings(calling_ae="CESTNODE", retries=3))
        report = plain.send(good_series("foreign")[:1],
                            Destination(archive.ae_title, "127.0.0.1", archive.port, tls=True))
        assert not report.ok and len(report.attempts) == 1
        assert "no [tls] certificates" in report.attempts[0].error


def test_tls_settings_name_what_is_missing(tmp_path, pki):
    with pytest.raises(ValueError, match="tls.receive: needs cert_file"):
        TlsSettings(receive=True)
    with pytest.raises(ValueError, match="tls.require_client_cert: needs ca_file"):
        TlsSettings(receive=True, cert_file=pki / "node.pem", key_file=pki / "node.key")
    with pytest.raises(ValueError, match="cert_file and key_file go together"):
        TlsSettings(cert_file=pki / "node.pem")
    with pytest.raises(ValueError, match="tls.cert_file: .* is not a readable file"):
        server_context(TlsSettings(receive=True, cert_file=tmp_path / "none.pem",
                                   key_file=pki / "node.key", ca_file=pki / "ca.pem"))
    with pytest.raises(ValueError, match="tls.cert_file/key_file: cannot load"):
        server_context(TlsSettings(receive=True, cert_file=pki / "node.pem",
                                   key_file=pki / "scanner.key", ca_file=pki / "ca.pem"))


# ------------------------------------------------------------------ address allowlist
def test_peer_address_allowlist(tmp_path, caplog):
    caplog.set_level(logging.WARNING, logger="cest_node.receive")
    files = write_series(good_series("addr"), tmp_path / "scanner")
    with running_node(tmp_path / "a", allowed_peer_addresses=["10.9.8.0/24", "192.0.2.7"]) as (
            nd, _, _):
        ae = AE(ae_title=SCANNER)
        ae.add_requested_context(MRImageStorage, ExplicitVRLittleEndian)
        assoc = ae.associate("127.0.0.1", nd.port, ae_title="CESTNODE")
        assert assoc.is_rejected  # A-ASSOCIATE-RJ, not an accepted-then-aborted association
        res = storescu(nd.port, files[:1], calling_ae=SCANNER, check=False)
        assert res.returncode != 0 and "reject" in (res.stdout + res.stderr).lower()
        assert nd.receiver.spool.all_series() == []
    assert "127.0.0.1 rejected: address not on the allowlist" in caplog.text
    with running_node(tmp_path / "b", allowed_peer_addresses=["127.0.0.0/8"]) as (
            nd, archive, collect):
        assert_node_alive(nd, archive, collect, tmp_path / "b", seed="addr-ok")


# ------------------------------------------------------------------ files and logs
def _modes(root: Path) -> dict[str, int]:
    return {str(p.relative_to(root)): stat.S_IMODE(p.stat().st_mode)
            for p in [root, *root.rglob("*")]}


def test_spool_and_index_are_private_and_logs_hold_no_patient_data(tmp_path, caplog):
    for name in (None, "pynetdicom", "pydicom", "cest_node", "node"):
        caplog.set_level(logging.DEBUG, logger=name)
    old_umask = os.umask(0o022)  # a usual umask: the node must not rely on a strict one
    try:
        with running_node(tmp_path) as (nd, archive, collect):
            dss = good_series("private", **PATIENT)
            files = write_series(dss, tmp_path / "scanner")
            storescu(nd.port, files, calling_ae=SCANNER)
            (out,) = collect.wait_for(lambda os: len(os) >= 1)
            assert out.ok, out.error
            archive.wait_for(1)
            spool = nd.receiver.spool.root
            modes = _modes(spool)
    finally:
        os.umask(old_umask)
    assert any(k.endswith(".dcm") for k in modes) and "index.sqlite" in modes
    for rel, mode in modes.items():
        path = spool / rel if rel != "." else spool
        want = 0o700 if path.is_dir() else 0o600
        assert mode == want, f"{rel}: mode {mode:o}, expected {want:o}"
    # the series is in the logs by its key only
    key = series_key_of(dss[0])
    assert key in caplog.text
    assert any(r.name.startswith("pynetdicom") for r in caplog.records)
    texts = [caplog.text, *(r.getMessage() for r in caplog.records),
             *(repr(r.args) for r in caplog.records)]
    logs = tmp_path / "logs"
    written = [p.read_text(errors="replace") for p in logs.rglob("*") if p.is_file()]
    assert written, "no latency log written"
    everything = "\n".join(texts + written)
    for what, value in PATIENT.items():
        assert value not in everything, f"{what} appears in a log"
        # nor its parts (a family name alone identifies too)
        for part in re.split(r"\^", value):
            assert part not in everything, f"part of {what} appears in a log"
    # the outputs do carry the patient, as they must (DICOM PS3.3 Patient Module)
    assert PATIENT["patient_id"].encode() in (archive.files()[0]).read_bytes()

