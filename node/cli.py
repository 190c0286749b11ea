"""``cest-node``: the command line.

``serve``, ``process``, ``demo``, ``phantom``, ``echo`` and ``check-config``. Every command
exits 0 on success and non-zero with a one-line reason on failure. Research use only.
"""

from __future__ import annotations

import argparse
import logging
import signal
import sys
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from node import __version__

BANNER = "cest-node: research use only, not a medical device."


def _setup_logging(verbose: int, *, quiet: bool = False) -> None:
    level = logging.WARNING if quiet else (logging.DEBUG if verbose > 1 else logging.INFO)
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    # pynetdicom logs every PDU at INFO; its warnings and errors are enough for us
    logging.getLogger("pynetdicom").setLevel(logging.WARNING if verbose < 2 else logging.DEBUG)


def _load(path: str | None, **overrides: Any) -> Any:
    from node.config import default_config, load_config
    from quant.registry import METHODS

    cfg = load_config(path, known_methods=METHODS) if path else default_config()
    changes = {k: v for k, v in overrides.items() if v is not None}
    return cfg.with_overrides(**changes) if changes else cfg


# ------------------------------------------------------------------------------ serve
def cmd_serve(args: argparse.Namespace) -> int:
    from node.service import Node

    cfg = _load(args.config, port=args.port, ae_title=args.ae_title, spool_dir=args.spool,
                log_dir=args.log_dir, destinations=args.dest or None)
    if args.metrics_port is not None:  # --metrics-port turns the endpoint on
        from dataclasses import replace as _replace

        from node.config import ConfigError, _port
        try:
            port = _port(args.metrics_port, "--metrics-port", allow_zero=True)
        except ConfigError as exc:
            print(f"cest-node serve: {exc}", file=sys.stderr)
            return 2
        cfg = cfg.with_overrides(metrics=_replace(cfg.metrics, enabled=True, port=port))
    from node.health import format_report, self_test

    checks = self_test()  # the numbers must be right on this machine before a scan
    if not all(c.ok for c in checks):
        print(f"cest-node serve: the numeric self-test failed; not starting\n"
              f"{format_report(checks)}", file=sys.stderr)
        return 1
    stop = threading.Event()

    def on_signal(signum: int, frame: object) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    with Node(cfg) as node:
        print(f"{BANNER}\nlistening as {cfg.ae_title} on {cfg.host}:{node.port}; "
              f"latency log {cfg.log_dir}/latency.jsonl", flush=True)
        if node.metrics.port is not None:
            print(f"metrics on http://{cfg.metrics.host}:{node.metrics.port}/metrics", flush=True)
        stop.wait()
    return 0


# ------------------------------------------------------------------------------ process
def _read_paths(paths: Sequence[str]) -> list[Path]:
    files: list[Path] = []
    for p in map(Path, paths):
        if p.is_dir():
            files.extend(sorted(f for f in p.rglob("*") if f.is_file()))
        elif p.is_file():
            files.append(p)
        else:
            raise SystemExit(f"cest-node process: {p}: no such file or folder")
    return files


def cmd_process(args: argparse.Namespace) -> int:
    if args.query or args.dask:  # archive query and/or the distributed engine (node.retro)
        from node.retro import cli_process

        return cli_process(args, _load(args.config), _read_paths)
    if not args.paths:
        print("cest-node process: give PATH... or --query --archive AE@HOST:PORT",
              file=sys.stderr)
        return 2
    from pydicom import dcmread
    from pydicom.errors import InvalidDicomError

    from node.assemble import Assembler, AssemblyError, Placed
    from node.service import Processor, write_datasets
    from node.timing import LatencyLog
    from node.types import AssembledSeries, OutputBatch

    if not args.out:
        print("cest-node process: --out is required with PATH", file=sys.stderr)
        return 2
    out = Path(args.out)
    cfg = _load(args.config, log_dir=str(out / "logs"), spool_dir=str(out / "spool"))
    written: dict[str, int] = {}

    def deliver(batch: OutputBatch, clock: Any) -> bool:
        with clock.stage(f"write:{batch.label}"):
            write_datasets(batch.datasets, out / batch.key / batch.label)
        written[batch.key] = written.get(batch.key, 0) + len(batch.datasets)
        return True

    processor = Processor(cfg, deliver)
    latency = LatencyLog(cfg.log_dir)
    outcomes = []

    def on_complete(series: AssembledSeries) -> None:
        outcome, job = processor.process(series)
        latency.write(outcome.record)
        if job is not None:  # offline there is no scanner waiting: run the deferred pass now
            later = processor.run_deferred(job)
            latency.write(later.record)
            outcome.methods += later.methods
            outcome.ok &= later.ok
            outcome.error = outcome.error or later.error
        outcomes.append(outcome)

    files = _read_paths(args.paths)
    ignored = bad = 0
    with Assembler(cfg, on_complete) as asm:
        for f in files:
            try:
                ds = dcmread(f)
            except (InvalidDicomError, OSError, ValueError) as exc:
                bad += 1
                print(f"skipped {f}: not a readable DICOM file ({type(exc).__name__})",
                      file=sys.stderr)
                continue
            try:
                placed = asm.add(ds)
            except AssemblyError as exc:
                bad += 1
                print(f"skipped {f}: {exc}", file=sys.stderr)
                continue
            if placed is Placed.UNMATCHED:
                ignored += 1
        asm.flush()
    print(f"{BANNER}\nread {len(files)} files ({ignored} matched no protocol, {bad} refused)")
    ok = True
    for o in outcomes:
        ok &= o.ok
        print(f"series {o.key}: {'ok' if o.ok else 'FAILED ' + o.error}; methods "
              f"{', '.join(o.methods) or '-'}; {written.get(o.key, 0)} objects in {out / o.key}")
        for name, why in o.skipped.items():
            print(f"  skipped {name}: {why}")
    if not outcomes:
        print("no series was complete enough to process", file=sys.stderr)
        return 1
    return 0 if ok else 1


# ------------------------------------------------------------------------------ demo
def cmd_demo(args: argparse.Namespace) -> int:
    from node.demo import run_demo

    return run_demo(out=args.out, slices=args.slices, size=args.size, seed=args.seed)


# ------------------------------------------------------------------------------ phantom
def cmd_phantom(args: argparse.Namespace) -> int:
    from node.synth import phantom_series, write_series

    t0 = time.perf_counter()
    datasets = phantom_series(slices=args.slices, size=args.size, seed=args.seed)
    paths = write_series(datasets, args.out)
    print(f"wrote {len(paths)} phantom instances ({args.slices} slices of {args.size} x "
          f"{args.size}) to {args.out} in {time.perf_counter() - t0:.1f} s")
    return 0


# ------------------------------------------------------------------------------ echo
def cmd_echo(args: argparse.Namespace) -> int:
    from node.config import ConfigError, parse_destination
    from node.send import echo

    try:
        dest = parse_destination(args.peer, key="peer")
    except ConfigError as exc:
        print(f"cest-node echo: {exc}", file=sys.stderr)
        return 2
    res = echo(dest.ae_title, dest.host, dest.port, calling_ae=args.calling_ae)
    print(f"C-ECHO {dest.ae_title}@{dest.host}:{dest.port}: "
          f"{'ok' if res.ok else 'FAILED'} ({res.detail}, {res.elapsed_ms:.0f} ms)")
    return 0 if res.ok else 1


# ------------------------------------------------------------------------------ status
def cmd_status(args: argparse.Namespace) -> int:
    from node.config import ConfigError
    from node.status import format_status, read_status

    try:
        report = read_status(_load(args.config), recent=args.recent)
    except (ConfigError, ValueError) as exc:
        print(f"cest-node status: {exc}", file=sys.stderr)
        return 1
    print(report.to_json() if args.json else format_status(report))
    return 0


# ------------------------------------------------------------------------------ check-config
def cmd_check_config(args: argparse.Namespace) -> int:
    from node.config import ConfigError

    try:
        cfg = _load(args.file)
    except ConfigError as exc:
        print(f"cest-node check-config: {exc}", file=sys.stderr)
        return 1
    print(f"{args.file}: valid")
    print(f"  node {cfg.ae_title} on {cfg.host}:{cfg.port}; allowed callers: "
          f"{', '.join(cfg.allowed_calling_aets) or 'any'}")
    print(f"  spool {cfg.spool_dir}; logs {cfg.log_dir}; fsync {cfg.fsync}")
    dests = ", ".join(f"{d.ae_title}@{d.host}:{d.port}" for d in cfg.destinations) or "none"
    print(f"  destinations: {dests}")
    for p in cfg.protocols:
        print(f"  protocol {p.name}: {p.match.attribute} ~ /{p.match.regex}/; offset "
              f"{p.offset.describe()}; methods {', '.join(p.methods)}; outputs "
              f"{', '.join(p.outputs)}; budget {p.budget_s:g} s")
    return 0


# ------------------------------------------------------------------------------ conformance
def cmd_conformance(args: argparse.Namespace) -> int:
    from node.config import ConfigError
    from node.conformance import statement

    try:
        cfg = _load(args.config) if args.config else None
    except ConfigError as exc:
        print(f"cest-node conformance: {exc}", file=sys.stderr)
        return 1
    text = statement(cfg)
    if args.out in (None, "-"):
        sys.stdout.write(text)
    else:
        Path(args.out).write_text(text, encoding="utf-8")
        print(f"wrote the DICOM Conformance Statement to {args.out}")
    return 0


# ------------------------------------------------------------------------------ health
def cmd_health(args: argparse.Namespace) -> int:
    from node.config import ConfigError
    from node.health import format_report, run_health

    try:
        cfg = _load(args.config)
    except ConfigError as exc:
        print(f"cest-node health: {exc}", file=sys.stderr)
        return 2
    checks = run_health(cfg, numeric=not args.no_self_test)
    print(format_report(checks))
    return 0 if all(c.ok for c in checks) else 1


# ------------------------------------------------------------------------------ stats
def cmd_stats(args: argparse.Namespace) -> int:
    from node import stats

    try:
        since = stats.parse_time(args.since, what="--since") if args.since else None
        until = stats.parse_time(args.until, what="--until") if args.until else None
        log_dir = Path(args.log_dir) if args.log_dir else _load(args.config).log_dir
        records = stats.read_records(log_dir, since=since, until=until)
        summary = stats.summarize(records)
        print(stats.format_summary(summary, since=since, until=until))
        if args.plot:
            out = stats.plot(records, args.plot)
            print(f"plot written to {out}")
    except ValueError as exc:  # ConfigError is a ValueError too
        print(f"cest-node stats: {exc}", file=sys.stderr)
        return 1
    return 0


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="cest-node", description=f"{BANNER} APT/CEST maps from "
                                 "the saturation series, back to the archive.")
    ap.add_argument("--version", action="version", version=f"cest-node {__version__}")
    ap.add_argument("-v", "--verbose", action="count", default=0, help="more log output")
    sub = ap.add_subparsers(dest="command", required=True)

    s = sub.add_parser("serve", help="run the DICOM listener")
    s.add_argument("--config", help="TOML config (default: the embedded default)")
    s.add_argument("--port", type=int)
    s.add_argument("--ae-title")
    s.add_argument("--spool", help="spool folder")
    s.add_argument("--log-dir", help="latency log folder")
    s.add_argument("--dest", action="append", metavar="AE@HOST:PORT",
                   help="destination (repeatable; replaces the config's destinations)")
    s.add_argument("--metrics-port", type=int, metavar="PORT",
                   help="serve Prometheus metrics on this port (0: any free one); the host "
                        "is the config's [metrics] host, loopback by default")
    s.set_defaults(func=cmd_serve)

    s = sub.add_parser("stats", help="latency figures of a period from the latency log")
    where = s.add_mutually_exclusive_group()
    where.add_argument("--log-dir", help="folder holding latency.jsonl")
    where.add_argument("--config", help="take the log folder from this config (default: the "
                       "embedded default)")
    s.add_argument("--since", metavar="ISO", help="first time (ISO 8601, UTC unless stated)")
    s.add_argument("--until", metavar="ISO", help="end time, exclusive (ISO 8601)")
    s.add_argument("--plot", metavar="FILE.png",
                   help="also draw end-to-end latency per series against the budget")
    s.set_defaults(func=cmd_stats)

    s = sub.add_parser("process", help="process DICOM files offline, or studies from an archive")
    s.add_argument("paths", nargs="*", metavar="PATH")
    s.add_argument("--out", help="folder for the derived objects (required with PATH)")
    s.add_argument("--config")
    s.add_argument("--query", action="store_true",
                   help="query --archive for studies instead of reading files")
    s.add_argument("--archive", metavar="AE@HOST:PORT", help="archive to C-FIND and C-GET")
    s.add_argument("--protocol", help="protocol of the config (default: the first)")
    s.add_argument("--since", metavar="YYYYMMDD", help="first StudyDate (inclusive)")
    s.add_argument("--until", metavar="YYYYMMDD", help="last StudyDate (inclusive)")
    s.add_argument("--store-to", metavar="AE@HOST:PORT",
                   help="where results go (default: the archive)")
    s.add_argument("--force", action="store_true",
                   help="reprocess studies whose results are already in the archive")
    s.add_argument("--dask", metavar="SCHEDULER",
                   help="spread series and fit chunks over a Dask cluster: a scheduler "
                        "address (tcp://HOST:8786) or 'local'")
    s.set_defaults(func=cmd_process)

    s = sub.add_parser("demo", help="node + embedded archive + phantom scanner on loopback")
    s.add_argument("--out", help="keep the archive's received objects and previews here")
    s.add_argument("--slices", type=int, default=8)
    s.add_argument("--size", type=int, default=96)
    s.add_argument("--seed", type=int, default=0)
    s.set_defaults(func=cmd_demo)

    s = sub.add_parser("phantom", help="write the phantom saturation series as DICOM files")
    s.add_argument("--out", required=True)
    s.add_argument("--slices", type=int, default=8)
    s.add_argument("--size", type=int, default=96)
    s.add_argument("--seed", type=int, default=0)
    s.set_defaults(func=cmd_phantom)

    s = sub.add_parser("echo", help="C-ECHO a DICOM peer")
    s.add_argument("peer", metavar="AE@HOST:PORT")
    s.add_argument("--calling-ae", default="CESTNODE")
    s.set_defaults(func=cmd_echo)

    s = sub.add_parser("status", help="series in flight, recent series, the outbox")
    s.add_argument("--config", help="TOML config (default: the embedded default)")
    s.add_argument("--recent", type=int, default=10, help="recent series to list")
    s.add_argument("--json", action="store_true", help="print JSON instead of text")
    s.set_defaults(func=cmd_status)

    s = sub.add_parser("check-config", help="validate a config file")
    s.add_argument("file")
    s.set_defaults(func=cmd_check_config)

    s = sub.add_parser("conformance", help="write the DICOM Conformance Statement (Markdown)")
    s.add_argument("--out", help="file to write (default: standard output)")
    s.add_argument("--config", help="state this config's values (default: the embedded default)")
    s.set_defaults(func=cmd_conformance)

    s = sub.add_parser("health", help="spool, index, destinations, latency and numeric self-test")
    s.add_argument("--config", help="TOML config (default: the embedded default)")
    s.add_argument("--no-self-test", action="store_true", help="skip the numeric self-test")
    s.set_defaults(func=cmd_health)
    return ap


def main(argv: Sequence[str] | None = None) -> int:
    from node.memory import limit_blas_threads, tune_allocator

    tune_allocator()  # before any thread takes an arena (node.memory)
    limit_blas_threads()  # every command, the offline ones too (node.memory)
    args = build_parser().parse_args(argv)
    _setup_logging(args.verbose, quiet=args.command in ("demo", "process", "phantom", "echo",
                                                        "check-config", "conformance", "health",
                                                        "status", "stats")
                   and args.verbose == 0)
    try:
        return int(args.func(args))
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

