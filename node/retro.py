"""Retrospective reprocessing: query an archive, retrieve the matching series, process, store back.

``cest-node process --query --archive AE@HOST:PORT [--protocol NAME] [--since YYYYMMDD]
[--until YYYYMMDD]``:

1. C-FIND, Study Root, STUDY level: the studies whose StudyDate lies in the range (DICOM range
   matching ``since-until``, PS3.4 C.2.2.2.5).
2. C-FIND, SERIES level, per study: every series with the protocol's match attribute; the match
   rule (a regular expression) is applied here, since C-FIND has no regular expressions.
3. C-GET, SERIES level, of each matching series; the C-STORE sub-operations come back on the same
   association (SCP/SCU role selection, PS3.7 D.3.3.4) and are kept in memory.
4. The series is assembled and processed by the node's own :class:`~node.service.Processor`
   (both passes), or by the distributed engine (:mod:`node.distributed`) with ``--dask``.
5. The derived objects are stored back with :class:`~node.send.Sender`.

A study whose derived series (the primary method's) is already in the archive is skipped,
unless ``force``. One :class:`StudyResult` per study: processed, skipped (with the reason) or
failed (with the reason). Studies and series are named by pseudonymous keys only.
"""

from __future__ import annotations

import datetime as _dt
import logging
import re
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

from pydicom import Dataset
from pydicom.uid import ExplicitVRLittleEndian, ImplicitVRLittleEndian
from pynetdicom import AE, build_role, evt
from pynetdicom.sop_class import (  # type: ignore[attr-defined]
    StudyRootQueryRetrieveInformationModelFind,
    StudyRootQueryRetrieveInformationModelGet,
)

from node.config import NodeConfig, Protocol
from node.receive import STORAGE_CLASSES, TRANSFER_SYNTAXES
from node.send import Destination, Sender, SendSettings, set_tcp_nodelay
from node.types import AssembledSeries, OutputBatch, series_key

__all__ = [
    "FIND_MODEL",
    "GET_MODEL",
    "QR_TRANSFER_SYNTAXES",
    "RETRIEVE_STORAGE_CLASSES",
    "ArchiveClient",
    "Query",
    "RetroError",
    "StudyResult",
    "format_table",
    "parse_date",
    "run_query",
]

log = logging.getLogger("cest_node.retro")

FIND_MODEL = StudyRootQueryRetrieveInformationModelFind
"""C-FIND information model (Study Root, PS3.4 C.6.2)."""
GET_MODEL = StudyRootQueryRetrieveInformationModelGet
"""C-GET information model (Study Root, PS3.4 C.6.2)."""
QR_TRANSFER_SYNTAXES = (ExplicitVRLittleEndian, ImplicitVRLittleEndian)
"""Transfer syntaxes proposed for the query/retrieve contexts."""
RETRIEVE_STORAGE_CLASSES = STORAGE_CLASSES
"""Storage classes accepted as C-GET sub-operations (as SCP): those the Storage SCP takes."""

PROCESSED, SKIPPED, FAILED = "processed", "skipped", "failed"


class RetroError(RuntimeError):
    """The archive could not be queried or a retrieve failed (the message says which step)."""


def parse_date(text: str | None, *, key: str) -> _dt.date | None:
    """``YYYYMMDD`` to a date (None stays None); ValueError naming ``key`` otherwise."""
    if text is None or text == "":
        return None
    if not re.fullmatch(r"\d{8}", text):
        raise ValueError(f"{key}: expected a date YYYYMMDD, got {text!r}")
    try:
        return _dt.datetime.strptime(text, "%Y%m%d").date()
    except ValueError:
        raise ValueError(f"{key}: {text!r} is not a calendar date") from None


@dataclass(frozen=True)
class Query:
    """What to reprocess: an archive, a protocol of the config, a StudyDate range."""

    archive: Destination
    protocol: str
    since: _dt.date | None = None
    until: _dt.date | None = None

    def __post_init__(self) -> None:
        if self.since and self.until and self.since > self.until:
            raise ValueError(f"--since {self.since:%Y%m%d} is after --until {self.until:%Y%m%d}")

    @property
    def date_range(self) -> str:
        """The StudyDate matching value: ``since-until``, open ends allowed, '' for any."""
        if not self.since and not self.until:
            return ""
        a = f"{self.since:%Y%m%d}" if self.since else ""
        b = f"{self.until:%Y%m%d}" if self.until else ""
        return f"{a}-{b}"


@dataclass
class StudyResult:
    """The outcome of one study in the archive."""

    key: str
    status: str
    reason: str = ""
    series: int = 0
    objects: int = 0
    series_keys: list[str] = field(default_factory=list)


class ArchiveClient:
    """C-FIND and C-GET SCU to one archive (one association per call).

    Parameters
    ----------
    archive
        The archive's AE title, host and port.
    calling_ae
        Our AE title.
    timeout_s
        Connection, ACSE and DIMSE timeout.
    """

    def __init__(self, archive: Destination, *, calling_ae: str = "CESTNODE",
                 timeout_s: float = 30.0):
        self.archive = archive
        self.calling_ae = calling_ae
        self.timeout_s = timeout_s

    def _ae(self) -> AE:
        ae = AE(ae_title=self.calling_ae)
        for attr in ("connection_timeout", "acse_timeout", "dimse_timeout", "network_timeout"):
            setattr(ae, attr, self.timeout_s)
        ae.add_requested_context(FIND_MODEL, list(QR_TRANSFER_SYNTAXES))
        ae.add_requested_context(GET_MODEL, list(QR_TRANSFER_SYNTAXES))
        for cls in RETRIEVE_STORAGE_CLASSES:
            ae.add_requested_context(cls, list(TRANSFER_SYNTAXES))
        return ae

    def _associate(self, handlers: list[Any] | None = None) -> Any:
        ae = self._ae()
        roles: list[Any] = [build_role(cls, scp_role=True) for cls in RETRIEVE_STORAGE_CLASSES]
        a = self.archive
        assoc = ae.associate(a.host, a.port, ae_title=a.ae_title, ext_neg=roles,
                             evt_handlers=[(evt.EVT_CONN_OPEN, set_tcp_nodelay),
                                           *(handlers or [])])
        if not assoc.is_established:
            why = "rejected" if assoc.is_rejected else "aborted" if assoc.is_aborted else \
                "no connection"
            raise RetroError(f"cannot associate with the archive {a}: {why}")
        return assoc

    def find(self, identifier: Dataset) -> list[Dataset]:
        """One C-FIND (Study Root); the matches, or RetroError on a failure status."""
        assoc = self._associate()
        out: list[Dataset] = []
        try:
            for status, ident in assoc.send_c_find(identifier, FIND_MODEL):
                code = int(status.Status) if status is not None and "Status" in status else None
                if code is None:
                    raise RetroError(f"C-FIND at {identifier.QueryRetrieveLevel} level: no "
                                     f"response from {self.archive}")
                if code in (0xFF00, 0xFF01) and ident is not None:
                    out.append(ident)
                elif code != 0x0000:
                    raise RetroError(f"C-FIND at {identifier.QueryRetrieveLevel} level: status "
                                     f"0x{code:04X} from {self.archive}")
        finally:
            if assoc.is_established:
                assoc.release()
        return out

    def studies(self, date_range: str) -> list[Dataset]:
        """Studies with StudyDate in ``date_range`` ('' matches any)."""
        q = Dataset()
        q.QueryRetrieveLevel = "STUDY"
        q.StudyInstanceUID = ""
        q.StudyDate = date_range
        return self.find(q)

    def series(self, study_uid: str, attribute: str) -> list[Dataset]:
        """Every series of a study, with ``attribute`` (the match rule's) among the return keys."""
        q = Dataset()
        q.QueryRetrieveLevel = "SERIES"
        q.StudyInstanceUID = study_uid
        q.SeriesInstanceUID = ""
        q.Modality = ""
        q.SeriesDescription = ""
        q.NumberOfSeriesRelatedInstances = ""
        if attribute not in q:
            setattr(q, attribute, "")
        return self.find(q)

    def get_series(self, study_uid: str, series_uid: str) -> list[Dataset]:
        """C-GET one series; its instances. RetroError when the retrieve fails or is partial."""
        received: list[Dataset] = []
        lock = threading.Lock()

        def on_store(event: Any) -> int:
            ds = event.dataset
            ds.file_meta = event.file_meta
            with lock:
                received.append(ds)
            return 0x0000

        assoc = self._associate([(evt.EVT_C_STORE, on_store)])
        q = Dataset()
        q.QueryRetrieveLevel = "SERIES"
        q.StudyInstanceUID = study_uid
        q.SeriesInstanceUID = series_uid
        final: Dataset | None = None
        try:
            for status, _ident in assoc.send_c_get(q, GET_MODEL):
                if status is not None and "Status" in status:
                    final = status
        finally:
            if assoc.is_established:
                assoc.release()
        if final is None:
            raise RetroError(f"C-GET: no response from {self.archive}")
        code = int(final.Status)
        failed = int(final.get("NumberOfFailedSuboperations", 0) or 0)
        if code not in (0x0000, 0xB000) or failed:
            raise RetroError(f"C-GET: status 0x{code:04X}, {failed} sub-operations failed, "
                             f"{len(received)} instances received")
        return received


Engine = Callable[[list[AssembledSeries], Callable[[OutputBatch], bool]], list[Any]]
"""``engine(series, deliver) -> outcomes``: processes assembled series (both passes)."""


def local_engine(config: NodeConfig) -> Engine:
    """The single-machine engine: :class:`~node.service.Processor`, both passes in turn."""
    from node.service import Processor

    def run(series: list[AssembledSeries], deliver: Callable[[OutputBatch], bool]) -> list[Any]:
        processor = Processor(config, lambda batch, clock: deliver(batch))
        outcomes = []
        for s in series:
            outcome, job = processor.process(s)
            if job is not None:
                later = processor.run_deferred(job)
                outcome.methods += later.methods
                outcome.objects += later.objects
                outcome.ok &= later.ok
                outcome.error = outcome.error or later.error
            outcomes.append(outcome)
        return outcomes

    return run


def assemble(config: NodeConfig, datasets: Sequence[Dataset]) -> list[AssembledSeries]:
    """Assemble retrieved instances into series with the node's own assembler."""
    from node.assemble import Assembler

    done: list[AssembledSeries] = []
    with Assembler(config, done.append) as asm:
        for ds in datasets:
            asm.add(ds)
        asm.flush()
    return done


def run_query(
    config: NodeConfig,
    query: Query,
    *,
    store_to: Destination | None = None,
    engine: Engine | None = None,
    force: bool = False,
    calling_ae: str | None = None,
    progress: bool | None = None,
) -> list[StudyResult]:
    """Reprocess the archive's studies that match ``query``; one result per study.

    Parameters
    ----------
    config
        The node config; ``query.protocol`` must be one of its protocols (the others are
        dropped so that only that protocol's series are assembled).
    query
        Archive, protocol and date range.
    store_to
        Where the derived objects go (default: the archive itself).
    engine
        How series are processed (default: :func:`local_engine`).
    force
        Reprocess studies whose derived series is already in the archive.
    calling_ae
        Our AE title (default: the config's).
    progress
        tqdm progress bar over studies on stderr (None: only on a terminal).

    Raises
    ------
    ValueError
        The protocol is not in the config.
    RetroError
        The study query failed (a failure of one study is in its result instead).
    """
    from tqdm import tqdm

    from node.service import OUTPUT_ORDER, output_series_uid

    protocol = config.protocol(query.protocol)
    cfg = config.with_overrides(protocols=(protocol,))
    ae_title = calling_ae or cfg.ae_title
    client = ArchiveClient(query.archive, calling_ae=ae_title)
    sender = Sender(SendSettings(calling_ae=ae_title))
    dest = store_to or query.archive
    run = engine or local_engine(cfg)
    studies = client.studies(query.date_range)
    results: list[StudyResult] = []
    bar = tqdm(studies, desc="studies", unit="study", disable=None if progress is None
               else not progress, leave=False)
    for st in bar:
        study_uid = str(st.StudyInstanceUID)
        res = StudyResult(key=series_key(study_uid, ""), status=SKIPPED)
        results.append(res)
        try:
            _one_study(cfg, protocol, client, sender, dest, run, study_uid, res, force,
                       OUTPUT_ORDER, output_series_uid)
        except RetroError as exc:
            res.status, res.reason = FAILED, str(exc)
        except Exception as exc:  # one study never ends the run
            log.exception("study %s: failed", res.key)
            res.status, res.reason = FAILED, f"{type(exc).__name__}: {exc}"
        log.info("study %s: %s %s", res.key, res.status, res.reason)
    bar.close()
    return results


def _one_study(cfg: NodeConfig, protocol: Protocol, client: ArchiveClient, sender: Sender,
               dest: Destination, run: Engine, study_uid: str, res: StudyResult, force: bool,
               output_order: Sequence[str], output_series_uid: Callable[..., str]) -> None:
    rule = protocol.match
    all_series = client.series(study_uid, rule.attribute)
    present = {str(s.SeriesInstanceUID) for s in all_series}
    matching = [s for s in all_series
                if rule.attribute in s and rule.pattern.search(str(s.get(rule.attribute, "")))]
    if not matching:
        res.reason = f"no series matches protocol {protocol.name}"
        return
    todo = []
    for s in matching:
        uid = str(s.SeriesInstanceUID)
        kinds = [k for k in output_order if k in protocol.outputs]
        done = kinds and output_series_uid(uid, protocol.primary_method, kinds[0]) in present
        if done and not force:
            continue
        todo.append(uid)
    if not todo:
        res.reason = "results already in the archive"
        return
    datasets: list[Dataset] = []
    for uid in todo:
        datasets += client.get_series(study_uid, uid)
    series = assemble(cfg, datasets)
    res.series = len(series)
    res.series_keys = [s.key for s in series]
    if not series:
        res.status, res.reason = FAILED, "no series could be assembled (see the log)"
        return
    unstored: list[str] = []

    def deliver(batch: OutputBatch) -> bool:
        report = sender.send(batch.datasets, dest, key=batch.key)
        res.objects += report.sent
        if not report.ok:
            unstored.append(f"{report.failed} objects of {batch.label} not stored")
        return report.ok

    outcomes = run(series, deliver)
    errors = [o.error for o in outcomes if not o.ok]
    if errors or unstored:
        res.status, res.reason = FAILED, "; ".join(errors + unstored)
        return
    res.status = PROCESSED
    skipped = sorted({f"{k}: {v}" for o in outcomes for k, v in o.skipped.items()})
    res.reason = ("methods skipped: " + "; ".join(skipped)) if skipped else ""


def format_table(results: Sequence[StudyResult]) -> str:
    """The end-of-run table: one row per study, then the counts."""
    rows = [("study", "status", "series", "objects", "reason")]
    rows += [(r.key, r.status, str(r.series), str(r.objects), r.reason or "-") for r in results]
    widths = [max(len(r[i]) for r in rows) for i in range(4)]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r[:4], widths, strict=True)) + "  " + r[4]
             for r in rows]
    counts = {s: sum(r.status == s for r in results) for s in (PROCESSED, SKIPPED, FAILED)}
    lines.append(f"{len(results)} studies: {counts[PROCESSED]} processed, {counts[SKIPPED]} "
                 f"skipped, {counts[FAILED]} failed")
    return "\n".join(lines)


def cli_process(args: Any, config: NodeConfig,
                read_paths: Callable[[Sequence[str]], list[Any]]) -> int:
    """``cest-node process`` with ``--query`` and/or ``--dask`` (called by node.cli)."""
    import sys

    from node.config import ConfigError

    client = None
    try:
        if args.dask:
            from node.distributed import DaskEngine, connect

            client = connect(args.dask)
        if args.query:
            if not args.archive:
                raise ValueError("--query needs --archive AE@HOST:PORT")
            if args.paths:
                raise ValueError("give either PATH... or --query, not both")
            name = args.protocol or (config.protocols[0].name if config.protocols else "")
            query = Query(Destination.parse(args.archive), name,
                          parse_date(args.since, key="--since"),
                          parse_date(args.until, key="--until"))
            cfg = config.with_overrides(protocols=(config.protocol(name),))
            engine = DaskEngine(client, cfg) if client is not None else None
            results = run_query(cfg, query, engine=engine, force=args.force,
                                store_to=Destination.parse(args.store_to) if args.store_to
                                else None)
            print(format_table(results))
            return 0 if all(r.status != FAILED for r in results) else 1
        return _process_files(args, config, read_paths, client)
    except (ValueError, ConfigError, RetroError) as exc:
        print(f"cest-node process: {exc}", file=sys.stderr)
        return 2
    finally:
        if client is not None:
            cluster = getattr(client, "cluster", None)
            client.close()
            if cluster is not None:
                cluster.close()


def _process_files(args: Any, config: NodeConfig, read_paths: Callable[[Sequence[str]], list[Any]],
                   client: Any) -> int:
    """Files through the distributed engine, written under ``--out`` like the local run."""
    from pathlib import Path

    from pydicom import dcmread
    from pydicom.errors import InvalidDicomError

    from node.distributed import DaskEngine
    from node.service import write_datasets

    if not args.paths or not args.out:
        raise ValueError("give PATH... and --out (or --query --archive AE@HOST:PORT)")
    out = Path(args.out)
    datasets = []
    for f in read_paths(args.paths):
        try:
            datasets.append(dcmread(f))
        except (InvalidDicomError, OSError, ValueError) as exc:
            log.warning("skipped a file: not a readable DICOM file (%s)", type(exc).__name__)
    series = assemble(config, datasets)
    written: dict[str, int] = {}

    def deliver(batch: OutputBatch) -> bool:
        write_datasets(batch.datasets, out / batch.key / batch.label)
        written[batch.key] = written.get(batch.key, 0) + len(batch.datasets)
        return True

    outcomes = DaskEngine(client, config)(series, deliver)
    for o in outcomes:
        print(f"series {o.key}: {'ok' if o.ok else 'FAILED ' + o.error}; methods "
              f"{', '.join(o.methods) or '-'}; {written.get(o.key, 0)} objects in {out / o.key}")
    if not outcomes:
        print("no series was complete enough to process")
        return 1
    return 0 if all(o.ok for o in outcomes) else 1
