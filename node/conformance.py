"""The DICOM Conformance Statement, generated from the node's own constants.

:func:`statement` writes a Markdown document in the structure of PS3.2 (DICOM Conformance,
Annex A "Conformance Statement Template"): overview, implementation model, AE specifications
(SOP classes as SCU and SCP, association policies, presentation context tables, SOP-specific
conformance), network interfaces, configuration, media interchange, character sets and security.

Nothing in it is typed by hand where the code holds the fact:

- the SCP presentation contexts are :data:`node.receive.STORAGE_CLASSES` and
  :data:`node.receive.TRANSFER_SYNTAXES`, plus Verification in the same transfer syntaxes (what
  :meth:`node.receive.Receiver.start` registers);
- the C-STORE statuses are the ``STATUS_*`` constants of :mod:`node.receive`;
- the SCU storage contexts are what :func:`node.send.build_contexts` proposes for the objects
  the derive builders (:data:`node.derive.BUILDERS`) actually make, built here from a tiny
  synthetic series;
- the query/retrieve contexts are those of :mod:`node.retro`;
- association limits and timeouts are pynetdicom's defaults as an ``AE`` reports them, the
  maximum PDU and the calling AE allowlist come from the config.

``cest-node conformance --out FILE`` writes it; ``deploy/conformance.md`` is the statement for
the embedded default config and a test checks the committed file equals a fresh generation.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pynetdicom
from pydicom.uid import UID
from pynetdicom import AE
from pynetdicom.sop_class import Verification  # type: ignore[attr-defined]

import node
from node import receive, retro
from node.config import OUTPUT_KINDS, NodeConfig, default_config

__all__ = ["ScpContext", "scp_contexts", "scu_storage_contexts", "statement"]


@dataclass(frozen=True)
class ScpContext:
    """One presentation context the node accepts: abstract syntax and one transfer syntax."""

    sop_class: UID
    transfer_syntax: UID


def scp_contexts() -> list[ScpContext]:
    """Every (SOP class, transfer syntax) pair the Storage SCP accepts, Verification included.

    The same lists :meth:`node.receive.Receiver.start` registers with pynetdicom.
    """
    classes = [UID(c) for c in receive.STORAGE_CLASSES] + [UID(Verification)]
    return [ScpContext(c, UID(ts)) for c in classes for ts in receive.TRANSFER_SYNTAXES]


def _sample_outputs() -> dict[str, list]:
    """One object of every output kind, built by the real builders from a tiny series."""
    from node.derive import BUILDERS, REPORT_BUILDERS, DerivedRequest, ReportRequest
    from node.synth import series_from_arrays

    offsets = np.array([-300.0, -3.5, 3.5])
    signal = np.full((1, 8, 8, 3), 500.0, dtype=np.float32)
    refs = series_from_arrays(signal, offsets, seed="conformance")
    ref = refs[0]
    for ds in refs:  # the M0 frame (-300 ppm) is the reference, as the assembler picks it
        if "-300" in str(ds.get("ImageComments", "")):
            ref = ds
    values = np.linspace(0, 1, 64, dtype=np.float32).reshape(1, 8, 8)
    out = {}
    for kind in OUTPUT_KINDS:
        if kind in REPORT_BUILDERS:
            mask = np.zeros((1, 8, 8), dtype=bool)
            mask[:, 1:7, 1:7] = True
            rep = ReportRequest(
                references=[ref], maps={"mtr_asym": ("MTRasym", "%", values)}, mask=mask,
                series_uid="2.25.1", series_number=1, m0=signal[..., 0],
            )
            out[kind] = REPORT_BUILDERS[kind](rep)
            continue
        req = DerivedRequest(
            references=[ref], values=values, method="mtr_asym", title="MTRasym",
            unit_ucum="%", series_uid="2.25.1", series_number=1,
            m0=signal[..., 0] if kind == "secondary_capture" else None,
        )
        out[kind] = BUILDERS[kind](req)
    return out


def scu_storage_contexts() -> list[tuple[str, UID, list[UID]]]:
    """``(output kind, SOP class, proposed transfer syntaxes)`` the C-STORE SCU proposes."""
    from node.send import build_contexts

    rows = []
    for kind, datasets in _sample_outputs().items():
        for cx in build_contexts(datasets):
            rows.append((kind, UID(str(cx.abstract_syntax)), [UID(t) for t in cx.transfer_syntax]))
    return rows


# --------------------------------------------------------------------------- formatting
def _uid(u: UID | str) -> str:
    u = UID(u)
    return f"{u.name} | `{u}`"


def _table(header: Sequence[str], rows: Iterable[Sequence[str]]) -> list[str]:
    out = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(r) + " |" for r in rows]
    return out + [""]


_STATUS_MEANING = {
    "STATUS_SUCCESS": ("Success", "the instance is on disk in the spool (or matches no "
                       "protocol and is acknowledged and ignored)"),
    "STATUS_OUT_OF_RESOURCES": ("Refused: out of resources",
                                "the spool could not write it, its file system has less than "
                                "`node.min_free_mb` free, or the instance exceeds the size "
                                "limits (`max_rows`, `max_cols`, `max_frames_per_series`)"),
    "STATUS_SOP_MISMATCH": ("Error: data set does not match SOP class",
                            "class differs from the C-STORE request, no pixel data, or matrix / "
                            "orientation differs from the rest of its series"),
    "STATUS_CANNOT_UNDERSTAND": ("Error: cannot understand", "unparsable data set"),
    "STATUS_BAD_HEADER": ("Error: cannot understand",
                          "a header the matched protocol needs is missing or wrong (e.g. no "
                          "saturation offset)"),
}


def _statuses() -> list[tuple[str, str, str]]:
    rows = []
    for name in sorted(n for n in dir(receive) if n.startswith("STATUS_")):
        code = int(getattr(receive, name))
        if name not in _STATUS_MEANING:
            raise ValueError(f"node.receive.{name} (0x{code:04X}) has no description in "
                             "node.conformance: describe it before regenerating the statement")
        meaning, why = _STATUS_MEANING[name]
        rows.append((f"0x{code:04X}", meaning, why))
    return sorted(rows)


def statement(config: NodeConfig | None = None) -> str:
    """The Conformance Statement for ``config`` (default: the embedded default) as Markdown.

    Raises
    ------
    ValueError
        When the code holds something the statement cannot describe yet (a new C-STORE
        status, a TLS setting), so that the statement never silently drifts from the code.
    """
    cfg = config if config is not None else default_config()
    ae = AE()
    scp = scp_contexts()
    scu = scu_storage_contexts()
    storage_scp = [UID(c) for c in receive.STORAGE_CLASSES]
    ts_scp = [UID(t) for t in receive.TRANSFER_SYNTAXES]
    version = node.__version__
    impl_uid = pynetdicom.PYNETDICOM_IMPLEMENTATION_UID
    impl_name = pynetdicom.PYNETDICOM_IMPLEMENTATION_VERSION
    allow = ", ".join(f"`{a}`" for a in cfg.allowed_calling_aets) or "any (the list is empty)"
    pdu = f"{cfg.max_pdu} bytes" if cfg.max_pdu else "unlimited (0)"
    L: list[str] = []
    add = L.append
    rows: list[tuple[str, ...]] = []

    add(f"# cest-node {version}: DICOM Conformance Statement")
    add("")
    add("> **Research use only.** cest-node is research software, not a medical device. Every "
        "object it creates is marked as research content (Content Qualification (0018,9004) "
        "RESEARCH, SeriesDescription starting `RESEARCH`).")
    add("")
    add("Generated by `cest-node conformance` from the code's own presentation contexts and "
        "settings (node/conformance.py); regenerate it rather than editing it. The structure "
        "follows DICOM PS3.2 (Conformance). Site-specific values below are those of the "
        "embedded default configuration; `cest-node conformance --config FILE` states a site's.")
    add("")

    # ------------------------------------------------------------------ 1 overview
    add("## 1 Overview")
    add("")
    add("cest-node receives the saturation (CEST/APT) series of an MR scanner by DICOM C-STORE, "
        "computes parametric maps, and sends the derived series to one or more archives by "
        "C-STORE. For retrospective reprocessing it queries an archive (C-FIND), retrieves "
        "series (C-GET) and stores the results back. It has no user interface of its own and "
        "does not interchange media.")
    add("")
    add("Network services:")
    add("")
    rows = []
    for c in storage_scp:
        rows.append(("Transfer", c.name, "No", "Yes"))
    for kind, cls, _ts in scu:
        rows.append(("Transfer", f"{UID(cls).name} (output `{kind}`)", "Yes", "No"))
    rows.append(("Query/Retrieve", UID(retro.FIND_MODEL).name, "Yes", "No"))
    rows.append(("Query/Retrieve", UID(retro.GET_MODEL).name, "Yes", "No"))
    rows.append(("Verification", UID(Verification).name, "Yes", "Yes"))
    L += _table(("Group", "SOP class", "User of service (SCU)", "Provider of service (SCP)"),
                _dedupe(rows))

    # ------------------------------------------------------------------ 2 introduction
    add("## 2 Introduction")
    add("")
    add("Audience: hospital IT, PACS administrators and MR physicists who connect the node to "
        "a scanner and an archive. Terms are those of PS3.2, PS3.4, PS3.7 and PS3.8. The "
        "derived objects are research results; they are not intended for diagnosis.")
    add("")

    # ------------------------------------------------------------------ 3 networking
    add("## 3 Networking")
    add("")
    add("### 3.1 Implementation model")
    add("")
    add("One application entity, the **CEST-NODE AE** (AE title from the config, default "
        f"`{cfg.ae_title}`), in one process (`cest-node serve`). Data flow:")
    add("")
    add("```")
    add("scanner --C-STORE--> [CEST-NODE AE: Storage SCP] -> spool (disk, fsync) -> assemble")
    add("                                                   -> compute maps -> derive objects")
    add("archive <--C-STORE-- [CEST-NODE AE: Storage SCU] <----------------------'")
    add("archive <--C-FIND / C-GET-- [CEST-NODE AE: Q/R SCU]   (cest-node process --query)")
    add("any peer <--C-ECHO--> [CEST-NODE AE: Verification SCU and SCP] (cest-node health/echo)")
    add("```")
    add("")
    add("Real-world activities:")
    add("")
    add("1. **Receive a series** (SCP): the scanner or an archive sends the instances of a "
        "saturation series. Each instance is written to the spool before the success status "
        "is returned. The instance's series is matched to a configured protocol (a regular "
        "expression on an attribute such as SeriesDescription); instances of no protocol are "
        "acknowledged and ignored.")
    add("2. **Process and send** (SCU): when a series is complete (expected count reached, "
        "or the idle timeout), the node computes the protocol's maps and sends every derived "
        "object to every configured destination, each output kind as soon as it is built, "
        "over one association per destination for the whole pass (one per batch for the "
        "deferred model-based pass), retrying what is not acknowledged.")
    add("3. **Reprocess from an archive** (SCU, `cest-node process --query`): C-FIND at "
        "STUDY and SERIES level for a date range, C-GET of the matching series, processing, "
        "C-STORE of the results back to the archive.")
    add("4. **Verify** (SCU and SCP): `cest-node health` and `cest-node echo` send C-ECHO; "
        "the node answers C-ECHO.")
    add("")

    add("### 3.2 AE specification: CEST-NODE AE")
    add("")
    add("#### 3.2.1 SOP classes")
    add("")
    rows = [(_uid(c), "No", "Yes") for c in storage_scp]
    rows += [(_uid(cls), "Yes", "No") for _k, cls, _t in scu]
    rows += [(_uid(retro.FIND_MODEL), "Yes", "No"), (_uid(retro.GET_MODEL), "Yes", "No")]
    rows += [(_uid(Verification), "Yes", "Yes")]
    L += _table(("SOP class name", "SOP class UID", "SCU", "SCP"),
                [(*r[0].split(" | "), r[1], r[2]) for r in _dedupe(rows)])

    add("#### 3.2.2 Association policies")
    add("")
    add("General:")
    add("")
    L += _table(("Item", "Value"), [
        ("Application context name", "DICOM Application Context `1.2.840.10008.3.1.1.1`"),
        ("Maximum PDU size received", f"{pdu} (config `node.max_pdu`)"),
        ("Maximum PDU size sent", "as the peer announces"),
        ("Presentation contexts per association (SCU)",
         "at most 128 (PS3.8 9.3.2.2); one per SOP class and transfer syntax in the batch"),
    ])
    add("Number of associations:")
    add("")
    L += _table(("Item", "Value"), [
        ("Simultaneous associations accepted (SCP)",
         f"{cfg.max_associations} (config `node.max_associations`)"),
        ("Simultaneous associations initiated (SCU)",
         "one per destination while sending a batch (destinations in parallel)"),
    ])
    add("Asynchronous nature: not supported; one operation at a time per association "
        "(no Asynchronous Operations Window negotiation).")
    add("")
    add("Implementation identifying information:")
    add("")
    L += _table(("Item", "Value"), [
        ("Implementation Class UID", f"`{impl_uid}` (the networking library's)"),
        ("Implementation Version Name", f"`{impl_name}`"),
        ("Software Versions (0018,1020) of created objects", f"cest-node {version}"),
    ])

    add("#### 3.2.3 Association acceptance policy (SCP)")
    add("")
    add(f"The node listens on `{cfg.host}:{cfg.port}` (config `node.host`, `node.port`). "
        "It accepts an association when:")
    add("")
    add(f"- the calling AE title is on the allowlist (config `node.allowed_calling_aets`; now "
        f"{allow}); otherwise A-ASSOCIATE-RJ, rejected-permanent, service user, reason 3 "
        "\"calling AE title not recognised\";")
    add("- the called AE title is not checked"
        + ("" if not ae.require_called_aet else " (it is checked)") + ";")
    nets = ", ".join(f"`{n}`" for n in cfg.allowed_peer_addresses) or "any (the list is empty)"
    add(f"- the peer's IP address is in an allowed network (config "
        f"`node.allowed_peer_addresses`; now {nets}); otherwise A-ASSOCIATE-RJ, "
        "rejected-permanent, no reason given;")
    add(f"- fewer than {cfg.max_associations} associations are open (otherwise rejected-"
        "transient, reason 2 \"local limit exceeded\");")
    add("- with TLS receiving configured, the TLS handshake succeeds (section 6).")
    add("")
    add("Accepted presentation contexts (each proposed context is judged on its own; of the "
        "transfer syntaxes proposed in one context, the node accepts the first of its own, in "
        "the order of the table below, that was proposed). "
        "Every other abstract syntax or transfer syntax is rejected (result 3, abstract syntax "
        "not supported, or 4, transfer syntaxes not supported): for example CT Image Storage, "
        "or MR Image Storage in JPEG Baseline.")
    add("")
    rows = [(UID(c.sop_class).name, f"`{c.sop_class}`", UID(c.transfer_syntax).name,
             f"`{c.transfer_syntax}`", "SCP", "None") for c in scp]
    L += _table(("Abstract syntax", "UID", "Transfer syntax", "UID", "Role",
                 "Extended negotiation"), rows)
    add("SOP-specific conformance, Storage SCP (PS3.4 Annex B): Storage level 0 (local): the "
        "node keeps the received instance unchanged in its spool until the series is "
        "processed; it is not an archive. No element is coerced. Digital signatures are not "
        "checked. Responses (PS3.7 Annex C); every failure carries an ErrorComment naming the "
        "problem, never a patient attribute:")
    add("")
    L += _table(("Status", "Meaning", "When"), _statuses())
    add("SOP-specific conformance, Verification SCP: answers C-ECHO with 0x0000.")
    add("")

    add("#### 3.2.4 Association initiation policy (SCU)")
    add("")
    add("**Send derived objects** (C-STORE). For the budget-bound pass of a series the node "
        "opens one association per destination and keeps it open between the pass's batches "
        "(released when the pass ends); it proposes one presentation context per SOP class "
        "and transfer syntax of the outputs below, with Implicit VR Little Endian added as a "
        "fallback to an uncompressed syntax. A batch the association cannot carry, a retry "
        "and each batch of the deferred pass (the outputs of one method) get an association "
        "of their own, proposing the SOP classes and transfer syntaxes present. The objects "
        "it creates:")
    add("")
    rows = [(f"`{kind}`", UID(cls).name, f"`{cls}`", ", ".join(UID(t).name for t in ts), "SCU",
             "None") for kind, cls, ts in scu]
    L += _table(("Output", "Abstract syntax", "UID", "Transfer syntaxes proposed", "Role",
                 "Extended negotiation"), rows)
    add("Status handling: 0x0000 stored; 0x0001 and 0xB000, 0xB006, 0xB007 stored with a "
        "warning (reported); 0xA7xx (out of resources) and other transient failures are resent "
        "on a new association with exponential back-off (retries from the send settings, "
        "default 3); other failures are reported and not resent. An object the archive "
        "acknowledged is never resent. Objects that are not stored are kept on disk in the "
        "spool (`unsent/`) and logged by count. TCP_NODELAY is set on every socket.")
    add("")
    add("**Reprocess from an archive** (`cest-node process --query`): one association "
        "with these contexts:")
    add("")
    qr_ts = ", ".join(UID(t).name for t in retro.QR_TRANSFER_SYNTAXES)
    rows = [(UID(m).name, f"`{m}`", qr_ts, "SCU", "None")
            for m in (retro.FIND_MODEL, retro.GET_MODEL)]
    rows += [(UID(c).name, f"`{c}`", ", ".join(UID(t).name for t in ts_scp),
              "SCP (SCP/SCU role selection, for the C-GET sub-operations)", "None")
             for c in retro.RETRIEVE_STORAGE_CLASSES]
    L += _table(("Abstract syntax", "UID", "Transfer syntaxes", "Role", "Extended negotiation"),
                rows)
    add("C-FIND (Study Root): at STUDY level with StudyDate as a range (`since-until`) and "
        "return keys StudyInstanceUID, StudyDate; then at SERIES level per study with "
        "return keys SeriesInstanceUID, SeriesDescription, Modality, NumberOfSeriesRelated"
        "Instances and the protocol's match attribute. The protocol's match rule (a regular "
        "expression) is applied by the node to the returned values (C-FIND has no regular "
        "expression matching). No relational or extended negotiation. C-GET at SERIES level; "
        "the C-STORE sub-operations are answered 0x0000 and the instances are held in memory "
        "for processing (not in the spool); a C-GET with failed sub-operations fails that "
        "study.")
    add("")
    echo_ts = ", ".join(UID(t).name for t in pynetdicom.DEFAULT_TRANSFER_SYNTAXES)
    add(f"**Verify** (C-ECHO): Verification, one context proposing {echo_ts}, to every "
        "destination (`cest-node health`) or to one peer (`cest-node echo`).")
    add("")

    # ------------------------------------------------------------------ network interfaces
    add("### 3.3 Network interfaces")
    add("")
    add("TCP/IP (PS3.8 DICOM Upper Layer over TCP/IP), IPv4 on the address of `node.host` "
        "(`0.0.0.0`: every interface; the default `127.0.0.1`: loopback only). The physical "
        "interface is the host's. No DHCP, DNS-SD or other additional protocol is used by the "
        "node itself; destination host names are resolved by the operating system.")
    add("")

    # ------------------------------------------------------------------ configuration
    add("### 3.4 Configuration")
    add("")
    add("One TOML file (`cest-node serve --config FILE`, checked by `cest-node check-config "
        "FILE`; every key is documented in `config/node.toml`). AE title to presentation "
        "address mapping:")
    add("")
    rows = [("Own AE title", "`node.ae_title`", f"`{cfg.ae_title}`"),
            ("Listening address and port", "`node.host`, `node.port`",
             f"`{cfg.host}`, `{cfg.port}`"),
            ("Calling AE titles accepted", "`node.allowed_calling_aets`", allow),
            ("Destinations (C-STORE SCPs)", "`[[destinations]]` ae_title, host, port",
             ", ".join(f"`{d}`" for d in cfg.destinations) or "none"),
            ("Maximum PDU received", "`node.max_pdu`", pdu)]
    L += _table(("Parameter", "Config key", "Value"), rows)
    add("Timeouts (pynetdicom defaults, not configurable in this version): "
        f"ACSE {ae.acse_timeout:g} s, DIMSE {ae.dimse_timeout:g} s, network "
        f"{ae.network_timeout:g} s on the SCP; the SCU's are in its send settings.")
    add("")

    # ------------------------------------------------------------------ media
    add("## 4 Media interchange")
    add("")
    add("Not supported (no DICOM File-set is read or written; `cest-node process PATH` "
        "reads PS3.10 files and writes PS3.10 files, outside the media profiles).")
    add("")

    # ------------------------------------------------------------------ character sets
    add("## 5 Support of character sets")
    add("")
    add("Received instances: any Specific Character Set (0008,0005) is accepted; the node "
        "reads only numbers, codes and UIDs from the headers (and a text attribute for the "
        "protocol match, decoded by pydicom). Created objects copy Specific Character Set and "
        "the patient and study attributes from the source series unchanged; the text the "
        "node writes itself is in the default repertoire (ISO-IR 6).")
    add("")

    # ------------------------------------------------------------------ security
    add("## 6 Security")
    add("")
    L += _security(cfg)

    # ------------------------------------------------------------------ annexes
    add("## 7 Annexes")
    add("")
    add("### 7.1 Created SOP instances")
    add("")
    add("Each output series is a new series in the source's study, linked to the source "
        "images (Source Image Sequence / Referenced Series), with Content Qualification "
        "RESEARCH, Manufacturer `cest-node`, and a SeriesDescription beginning `RESEARCH`. "
        "SOP Instance UIDs are derived from the source series, method and output kind, so a "
        "rebuild repeats them (an archive sees a resend, not a new object).")
    add("")
    add("### 7.2 Private attributes")
    add("")
    add("The node creates none. It can read the saturation offset from a private element "
        "named in the config by creator and element byte (the embedded default reads the "
        "synthetic phantom's `CESTNODE SIM 1` block, (0029,xx10), DS, ppm).")
    add("")
    return "\n".join(L).rstrip() + "\n"


def _security(cfg: NodeConfig) -> list[str]:
    """Section 6 from node.tls and the config's [tls] table."""
    from node import tls as tls_mod

    version = str(tls_mod.MINIMUM_VERSION.name).replace("TLSv", "TLS ").replace("_", ".")
    t = cfg.tls
    tls_dests = [str(d) for d in cfg.destinations if getattr(d, "tls", False)]
    out = [
        "Security profiles (PS3.15): the **BCP 195 TLS Secure Transport Connection Profile** "
        f"(PS3.15 Annex B), when configured in the `[tls]` table: {version} or later, the "
        "cipher suites of the Python ssl module's defaults (forward-secret AEAD suites "
        "first), X.509 certificates in PEM.",
        "",
    ]
    out += _table(("Direction", "Behaviour", "Config", "Now"), [
        ("Receiving (SCP)", "listens with TLS only; asks for a client certificate, and with "
         "`require_client_cert` refuses a peer without one that chains to `ca_file`",
         "`tls.receive`, `cert_file`, `key_file`, `ca_file`, `require_client_cert`",
         "TLS" if t is not None and t.receive else "plain TCP"),
        ("Sending (SCU)", "a destination with `tls = true` is reached over TLS; its "
         "certificate must chain to `ca_file` and, with `check_hostname`, name its host; "
         "the node's certificate is offered when set",
         "`[[destinations]] tls`, `tls.ca_file`, `tls.check_hostname`",
         ", ".join(f"`{d}`" for d in tls_dests) or "no destination over TLS"),
    ])
    out += [
        "Without TLS, install the node on a protected network segment. Association-level "
        "security: the calling AE title and peer address allowlists (3.2.3). "
        "Application-level: the process runs as a dedicated user (deploy/cest-node.service); "
        "the spool and log folders are created mode 0700; logs name series by a pseudonymous "
        "key (a hash of the study and series UIDs), never by a patient attribute. Audit trail "
        "messages (PS3.15 Annex A.5) are not sent. Query/retrieve (`process --query`) uses "
        "plain TCP in this version.",
        "",
    ]
    return out


def _dedupe(rows: Iterable[tuple[str, ...]]) -> list[tuple[str, ...]]:
    seen: dict[tuple[str, ...], None] = {}
    for r in rows:
        seen.setdefault(r, None)
    return list(seen)

