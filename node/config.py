"""The node's configuration: TOML parsed once into frozen, validated objects.

The rest of the node never sees raw dictionaries. Every error is a :class:`ConfigError` (a
``ValueError``) whose message starts with the dotted key and states the problem, e.g.
``protocols[0].offset.unit: expected 'ppm' or 'hz', got 'khz'``.

Public names
------------
- :func:`load_config` (a TOML file), :func:`parse_config` (a dict as TOML gives it),
  :func:`default_config` (the embedded default, the same text as ``config/node.toml``).
- :class:`NodeConfig`, :class:`Destination`, :class:`Protocol`, :class:`MatchRule`,
  :class:`OffsetRule`, :class:`ConfigError`.
- :data:`OUTPUT_KINDS`: the output names a protocol may list.
"""

from __future__ import annotations

import ipaddress
import math
import re
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from importlib import resources
from pathlib import Path
from typing import Any, Literal

from pydicom.datadict import tag_for_keyword

from node.tls import TlsSettings

__all__ = [
    "COMPANION_KINDS",
    "OUTPUT_KINDS",
    "CompanionRule",
    "ConfigError",
    "Destination",
    "MatchRule",
    "MetricsSettings",
    "NodeConfig",
    "OffsetRule",
    "Protocol",
    "QcSettings",
    "default_config",
    "load_config",
    "parse_config",
]

METHOD_OUTPUTS = ("parametric_map", "derived_mr", "secondary_capture")
"""Output kinds built once per method (node.derive.BUILDERS)."""
REPORT_OUTPUTS = ("structured_report", "segmentation", "summary")
"""Output kinds built once per series from every model-free map (node.derive.REPORT_BUILDERS)."""
OUTPUT_KINDS = METHOD_OUTPUTS + REPORT_OUTPUTS
"""Output kinds a protocol may ask for (builders in node/derive/)."""
DEFAULT_OUTPUTS = METHOD_OUTPUTS + ("structured_report", "summary")
"""What a protocol builds when it lists no outputs (the Segmentation is opt-in)."""

_DEFAULT_RESOURCE = "node.toml"  # package data: node/node.toml, a copy of config/node.toml


class ConfigError(ValueError):
    """A configuration value is missing, of the wrong type or out of range.

    The message begins with the dotted key (``protocols[1].match.regex``) and says what is
    wrong with it.
    """


# --------------------------------------------------------------------------- the objects
@dataclass(frozen=True)
class Destination:
    """A DICOM peer that receives every derived object (C-STORE SCP).

    ``tls`` sends to it over TLS with the node's ``[tls]`` certificates (:mod:`node.tls`).
    """

    ae_title: str
    host: str
    port: int
    tls: bool = False

    def __str__(self) -> str:
        return f"{self.ae_title}@{self.host}:{self.port}"


@dataclass(frozen=True)
class MatchRule:
    """Which series a protocol takes: ``re.search(regex, str(dataset.<attribute>))``.

    A dataset without the attribute does not match.
    """

    attribute: str
    regex: str

    @property
    def pattern(self) -> re.Pattern[str]:
        """The compiled regular expression (cached by :mod:`re`)."""
        return re.compile(self.regex)


@dataclass(frozen=True)
class OffsetRule:
    """How the saturation offset of one instance (frame) is read.

    Two kinds, told apart by :attr:`kind`:

    ``"attribute"``
        The offset is the value of one attribute, addressed by ``keyword`` or by ``tag``
        (a 32-bit tag; for a private element, ``tag`` holds the group in its upper 16 bits
        and the element byte in its lower 8, and ``private_creator`` names the block). A
        numeric value is used as is; a text value needs ``regex``, whose group named
        ``value`` (or else its first group) is the number. ``unit`` ``"hz"`` divides by the
        instance's ImagingFrequency (MHz) to give ppm.
    ``"list"``
        ``values_ppm`` lists the offsets in acquisition order; the instance's ``order_by``
        attribute (e.g. AcquisitionNumber) picks the entry: index = value - ``order_start``.
    """

    keyword: str | None = None
    tag: int | None = None
    private_creator: str | None = None
    regex: str | None = None
    unit: Literal["ppm", "hz"] = "ppm"
    values_ppm: tuple[float, ...] = ()
    order_by: str | None = None
    order_start: int = 1

    @property
    def kind(self) -> Literal["attribute", "list"]:
        """``"list"`` for an ordered list of offsets, else ``"attribute"``."""
        return "list" if self.values_ppm else "attribute"

    @property
    def is_private(self) -> bool:
        """True when the rule addresses a private element by creator and element byte."""
        return self.private_creator is not None

    @property
    def pattern(self) -> re.Pattern[str] | None:
        """The compiled text regex, or None for numeric values."""
        return re.compile(self.regex) if self.regex is not None else None

    def describe(self) -> str:
        """Short human text of where the offset comes from (for logs and errors)."""
        if self.kind == "list":
            return f"list of {len(self.values_ppm)} offsets by {self.order_by}"
        if self.tag is not None:
            g, e = self.tag >> 16, self.tag & 0xFFFF
            where = (f"({g:04X},xx{e:02X}) of {self.private_creator!r}" if self.is_private
                     else f"({g:04X},{e:04X})")
        else:
            where = str(self.keyword)
        return f"{where} in {self.unit}" + (" via regex" if self.regex else "")


COMPANION_KINDS = ("m0", "wassr", "t1", "b1")
"""Companion series kinds (:class:`CompanionRule`)."""


@dataclass(frozen=True)
class CompanionRule:
    """A companion series of the same study that a protocol awaits (``[[protocols.companions]]``).

    Attributes
    ----------
    kind
        ``"m0"`` (a separate unsaturated reference), ``"wassr"`` (a B0 series near water),
        ``"t1"`` (a T1 map) or ``"b1"`` (a B1 map), see :data:`COMPANION_KINDS`.
    match
        Which series of the study it is (:class:`MatchRule`).
    timeout_s
        Seconds the saturation series waits for it after completing (it may also have come
        before); then the series goes on without it.
    unit
        Pixel values after the Modality LUT times ``scale``: T1 ``"s"`` or ``"ms"``; B1
        ``"relative"`` (1 = nominal) or ``"percent"`` (100 = nominal). A Real World Value
        Mapping in the instances with a known unit wins over both.
    scale
        Factor applied to the pixel values before ``unit`` (T1 and B1).
    offset
        Where each WASSR frame's offset is (:class:`OffsetRule`), WASSR only.
    wassr_method
        ``"symmetry"`` or ``"lorentzian"`` (:func:`quant.wassr.wassr_shift`), WASSR only.
    b1_tolerance
        Voxels whose relative B1 differs from 1 by more than this are flagged (B1 only).
    slice_tolerance_mm
        A companion slice serves a saturation slice when their positions along the slice
        normal differ by at most this.
    """

    kind: Literal["m0", "wassr", "t1", "b1"]
    match: MatchRule
    timeout_s: float = 60.0
    unit: str = ""
    scale: float = 1.0
    offset: OffsetRule | None = None
    wassr_method: Literal["symmetry", "lorentzian"] = "symmetry"
    b1_tolerance: float = 0.2
    slice_tolerance_mm: float = 0.5


@dataclass(frozen=True)
class QcSettings:
    """Limits of a protocol's QC gates (:class:`quant.qc.QcThresholds`; defaults are ours).

    A map whose series fails a gate is still sent, but its SeriesDescription and the summary
    page say why it is unreliable.
    """

    min_snr: float = 20.0
    max_motion_mm: float = 2.0
    min_valid_fraction: float = 0.9
    max_abs_b0_ppm: float | None = None
    candidate_n_sd: float = 2.0


@dataclass(frozen=True)
class Protocol:
    """How one kind of saturation series is recognised, assembled and processed.

    Attributes
    ----------
    name
        Unique name, used in logs.
    match, offset
        The :class:`MatchRule` and :class:`OffsetRule`.
    expected_frames
        Instances per series, or ``"auto"`` (see :meth:`expected_count`).
    expected_offsets, expected_slices
        Optional counts for ``"auto"``.
    m0_threshold_ppm
        ``|offset| >= m0_threshold_ppm`` marks an unsaturated reference (M0) frame.
    required_offsets_ppm, required_tolerance_ppm
        Offsets a series released incomplete must still hold in every slice.
    methods
        Method names, the first is the primary.
    outputs
        Output kinds from :data:`OUTPUT_KINDS`.
    budget_s
        Seconds from the last instance received to the last output acknowledged.
    field_t, b1_ut, tsat_s
        Main field (T), saturation amplitude (uT), saturation duration (s).
    model_based
        Run the protocol's model-based methods in the deferred pass (False: skip them).
    companions
        :class:`CompanionRule` s: other series of the same study (M0, WASSR, T1 map, B1 map)
        awaited after the saturation series completes (:mod:`node.companion`).
    motion_correction
        Register every frame to the M0 (rigid, in-plane) before normalisation
        (:func:`quant.motion.register_frames`). Off by default: with a still subject the
        registration only adds interpolation, and it costs time inside the budget.
    motion_rotation
        Also estimate an in-plane rotation (slower; translation only when False).
    """

    name: str
    match: MatchRule
    offset: OffsetRule
    expected_frames: int | Literal["auto"] = "auto"
    expected_offsets: int | None = None
    expected_slices: int | None = None
    m0_threshold_ppm: float = 20.0
    required_offsets_ppm: tuple[float, ...] = (-3.5, 3.5)
    required_tolerance_ppm: float = 0.05
    methods: tuple[str, ...] = ("mtr_asym",)
    outputs: tuple[str, ...] = DEFAULT_OUTPUTS
    budget_s: float = 10.0
    field_t: float = 3.0
    b1_ut: float = 1.0
    tsat_s: float = 2.0
    model_based: bool = True
    companions: tuple[CompanionRule, ...] = ()
    motion_correction: bool = False
    motion_rotation: bool = False
    qc: QcSettings = field(default_factory=QcSettings)

    def companion(self, kind: str) -> CompanionRule | None:
        """The companion rule of this kind, or None when the protocol has none."""
        return next((c for c in self.companions if c.kind == kind), None)

    @property
    def primary_method(self) -> str:
        """The method that always runs and is sent first."""
        return self.methods[0]

    def expected_count(self, images_in_acquisition: int | None = None) -> int | None:
        """Expected instances per series, or None when unknown.

        An integer ``expected_frames`` is returned as is. For ``"auto"``: offsets per slice
        (``expected_offsets``, else the length of ``offset.values_ppm``) times
        ``expected_slices`` when both are known; else ``images_in_acquisition`` (the
        instances' ImagesInAcquisition) when given and positive; else None.
        """
        if isinstance(self.expected_frames, int):
            return self.expected_frames
        per_slice = self.expected_offsets or (len(self.offset.values_ppm) or None)
        if per_slice and self.expected_slices:
            return per_slice * self.expected_slices
        if images_in_acquisition is not None and images_in_acquisition > 0:
            return int(images_in_acquisition)
        return None


@dataclass(frozen=True)
class MetricsSettings:
    """The ``[metrics]`` table: an optional Prometheus endpoint, and the start-up calibration.

    Attributes
    ----------
    enabled
        Serve the metrics over HTTP (``/metrics``, Prometheus text format). Off by default.
    host, port
        Where the endpoint listens; loopback by default, port 0 lets the OS choose.
    calibrate
        Measure this machine's stage costs at start-up (a short warm-up on a small phantom)
        so that the time budget's predictions fit the machine (:mod:`node.calibrate`).
    """

    enabled: bool = False
    host: str = "127.0.0.1"
    port: int = 9464
    calibrate: bool = True


@dataclass(frozen=True)
class NodeConfig:
    """The whole node: who it is, who may talk to it, where it sends, what it processes.

    Attributes
    ----------
    ae_title, host, port
        The node's AE title and listening address (port 0: the OS picks one).
    allowed_calling_aets
        Calling AE titles accepted at association; empty accepts any.
    destinations
        Peers that receive every derived object.
    spool_dir, log_dir
        Absolute paths of the spool (instances, SQLite index) and of the latency log.
    fsync
        make each instance durable (the spool's journal flushed) before the success status.
    idle_timeout_s
        Quiet time after which an unfinished series is released.
    release_grace_s
        Quiet time after an association release for a series of unknown expected size.
    max_pdu
        Largest PDU accepted (bytes, 0 = unlimited).
    protocols
        Tried in order; the first match wins.
    allowed_peer_addresses
        IP networks (a single address is a /32 or /128) whose peers may associate; empty
        accepts any address. Others get A-ASSOCIATE-RJ.
    max_associations
        Simultaneous incoming associations; one more is rejected (transient, local limit
        exceeded).
    min_free_mb
        Free space (MiB) the spool's file system must keep; below it new instances get
        0xA700 and nothing is written.
    max_rows, max_cols, max_frames_per_series
        Size limits: an instance beyond them, or one that would take its series beyond
        ``max_frames_per_series`` frames, gets 0xA700. They bound the memory of one series
        (see the README).
    send_retry_for_s, send_backoff_s, send_backoff_max_s
        An object a destination did not acknowledge is retried (:mod:`node.outbox`) with
        exponential back-off from ``send_backoff_s`` up to ``send_backoff_max_s`` (with
        jitter), for ``send_retry_for_s`` seconds; then it is marked failed and reported.
    tls
        TLS certificates and policy (:class:`~node.tls.TlsSettings`), None without TLS.
    metrics
        The optional Prometheus endpoint and the start-up calibration (:class:`MetricsSettings`).
    """

    ae_title: str = "CESTNODE"
    host: str = "127.0.0.1"
    port: int = 11112
    allowed_calling_aets: tuple[str, ...] = ()
    destinations: tuple[Destination, ...] = ()
    spool_dir: Path = field(default_factory=lambda: Path("spool").absolute())
    log_dir: Path = field(default_factory=lambda: Path("logs").absolute())
    fsync: bool = True
    idle_timeout_s: float = 30.0
    release_grace_s: float = 2.0
    max_pdu: int = 262144
    protocols: tuple[Protocol, ...] = ()
    allowed_peer_addresses: tuple[ipaddress.IPv4Network | ipaddress.IPv6Network, ...] = ()
    max_associations: int = 8
    min_free_mb: float = 512.0
    max_rows: int = 1024
    max_cols: int = 1024
    max_frames_per_series: int = 4096
    send_retry_for_s: float = 86400.0
    send_backoff_s: float = 5.0
    send_backoff_max_s: float = 600.0
    tls: TlsSettings | None = None
    metrics: MetricsSettings = field(default_factory=lambda: MetricsSettings())

    def with_overrides(self, **changes: Any) -> NodeConfig:
        """A copy with some fields replaced (what ``serve --port`` and friends change).

        Values are validated like the TOML ones: ``port``, ``ae_title``, ``spool_dir``,
        ``log_dir``, ``destinations`` (Destination objects or ``"AE@HOST:PORT"`` strings) and
        the other top-level fields.
        """
        fixed: dict[str, Any] = {}
        for key, value in changes.items():
            if key == "destinations":
                fixed[key] = tuple(
                    v if isinstance(v, Destination) else parse_destination(str(v), key=key)
                    for v in value
                )
            elif key == "port":
                fixed[key] = _port(value, key, allow_zero=True)
            elif key == "ae_title":
                fixed[key] = _ae_title(value, key)
            elif key in ("spool_dir", "log_dir"):
                fixed[key] = Path(value).expanduser().absolute()
            elif key == "allowed_calling_aets":
                fixed[key] = tuple(_ae_title(v, f"{key}[{i}]") for i, v in enumerate(value))
            elif key == "allowed_peer_addresses":
                fixed[key] = tuple(_network(v, f"{key}[{i}]") for i, v in enumerate(value))
            elif key in self.__dataclass_fields__:
                fixed[key] = value
            else:
                raise ConfigError(f"{key}: not a node setting")
        return replace(self, **fixed)

    def protocol(self, name: str) -> Protocol:
        """The protocol called ``name``; ConfigError when there is none."""
        for p in self.protocols:
            if p.name == name:
                return p
        raise ConfigError(f"protocols: no protocol named {name!r}")


# --------------------------------------------------------------------------- entry points
def load_config(
    path: str | Path, *, known_methods: Iterable[str] | None = None
) -> NodeConfig:
    """Read and validate a TOML config file.

    Relative paths in it are resolved against the file's folder.

    Parameters
    ----------
    path
        The TOML file.
    known_methods
        When given, every protocol's methods must be among these names.

    Raises
    ------
    ConfigError
        The file is missing, is not TOML, or a value is wrong (the message names the key).
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{p}: cannot read the config file ({exc.strerror or exc})") from exc
    return _parse_text(text, source=str(p), base_dir=p.absolute().parent,
                       known_methods=known_methods)


def parse_config(
    data: Mapping[str, Any],
    *,
    base_dir: str | Path | None = None,
    known_methods: Iterable[str] | None = None,
) -> NodeConfig:
    """Validate a config given as a dict (the structure of ``config/node.toml``).

    Parameters
    ----------
    data
        ``{"node": {...}, "destinations": [...], "protocols": [...]}``.
    base_dir
        Folder that relative paths are resolved against (default: the working directory).
    known_methods
        When given, every protocol's methods must be among these names.
    """
    if not isinstance(data, Mapping):
        raise ConfigError(f"config: expected a table, got {type(data).__name__}")
    base = Path(base_dir) if base_dir is not None else Path.cwd()
    known = tuple(known_methods) if known_methods is not None else None
    _only(data, {"node", "destinations", "protocols", "tls", "metrics"}, "")
    node = _table(data.get("node", {}), "node")
    _only(node, {"ae_title", "host", "port", "allowed_calling_aets", "spool_dir", "log_dir",
                 "fsync", "idle_timeout_s", "release_grace_s", "max_pdu",
                 "allowed_peer_addresses", "max_associations", "min_free_mb", "max_rows",
                 "max_cols", "max_frames_per_series", "send_retry_for_s", "send_backoff_s",
                 "send_backoff_max_s"}, "node")
    backoff = _number(node.get("send_backoff_s", 5.0), "node.send_backoff_s", gt=0)
    backoff_max = _number(node.get("send_backoff_max_s", 600.0), "node.send_backoff_max_s", gt=0)
    if backoff_max < backoff:
        raise ConfigError(f"node.send_backoff_max_s: must be >= send_backoff_s ({backoff:g}), "
                          f"got {backoff_max:g}")
    peers = _array(node.get("allowed_peer_addresses", []), "node.allowed_peer_addresses")
    tls = _tls(data["tls"], "tls", base) if "tls" in data else None
    dests_raw = _array(data.get("destinations", []), "destinations")
    destinations = tuple(_destination(d, f"destinations[{i}]") for i, d in enumerate(dests_raw))
    protos_raw = _array(data.get("protocols", []), "protocols")
    protocols = tuple(_protocol(p, f"protocols[{i}]", known) for i, p in enumerate(protos_raw))
    seen: set[str] = set()
    for i, proto in enumerate(protocols):
        if proto.name in seen:
            raise ConfigError(f"protocols[{i}].name: duplicate protocol name {proto.name!r}")
        seen.add(proto.name)
    allowed = _array(node.get("allowed_calling_aets", []), "node.allowed_calling_aets")
    return NodeConfig(
        ae_title=_ae_title(node.get("ae_title", "CESTNODE"), "node.ae_title"),
        host=_str(node.get("host", "127.0.0.1"), "node.host", nonempty=True),
        port=_port(node.get("port", 11112), "node.port", allow_zero=True),
        allowed_calling_aets=tuple(
            _ae_title(a, f"node.allowed_calling_aets[{i}]") for i, a in enumerate(allowed)
        ),
        destinations=destinations,
        spool_dir=_path(node.get("spool_dir", "spool"), "node.spool_dir", base),
        log_dir=_path(node.get("log_dir", "logs"), "node.log_dir", base),
        fsync=_bool(node.get("fsync", True), "node.fsync"),
        idle_timeout_s=_number(node.get("idle_timeout_s", 30.0), "node.idle_timeout_s", gt=0),
        release_grace_s=_number(node.get("release_grace_s", 2.0), "node.release_grace_s", ge=0),
        max_pdu=_int(node.get("max_pdu", 262144), "node.max_pdu", ge=0),
        protocols=protocols,
        allowed_peer_addresses=tuple(
            _network(a, f"node.allowed_peer_addresses[{i}]") for i, a in enumerate(peers)
        ),
        max_associations=_int(node.get("max_associations", 8), "node.max_associations", ge=1),
        min_free_mb=_number(node.get("min_free_mb", 512.0), "node.min_free_mb", ge=0),
        max_rows=_int(node.get("max_rows", 1024), "node.max_rows", ge=1),
        max_cols=_int(node.get("max_cols", 1024), "node.max_cols", ge=1),
        max_frames_per_series=_int(node.get("max_frames_per_series", 4096),
                                   "node.max_frames_per_series", ge=1),
        send_retry_for_s=_number(node.get("send_retry_for_s", 86400.0), "node.send_retry_for_s",
                                 ge=0),
        send_backoff_s=backoff,
        send_backoff_max_s=backoff_max,
        tls=tls,
        metrics=_metrics(data.get("metrics", {}), "metrics"),
    )


def default_config(*, base_dir: str | Path | None = None) -> NodeConfig:
    """The embedded default config (the text of ``config/node.toml``, shipped in the package).

    Relative paths are resolved against ``base_dir`` (default: the working directory).
    """
    text = resources.files("node").joinpath(_DEFAULT_RESOURCE).read_text(encoding="utf-8")
    return _parse_text(text, source="embedded default", base_dir=base_dir, known_methods=None)


def parse_destination(text: str, *, key: str = "destination") -> Destination:
    """Parse ``AE@HOST:PORT`` (the command-line form of a destination)."""
    m = re.fullmatch(r"([^@]+)@(.+):(\d+)", text.strip())
    if m is None:
        raise ConfigError(f"{key}: expected AE@HOST:PORT, got {text!r}")
    return Destination(_ae_title(m.group(1), key), m.group(2), _port(int(m.group(3)), key))


# --------------------------------------------------------------------------- validation
def _parse_text(text: str, *, source: str, base_dir: str | Path | None,
                known_methods: Iterable[str] | None) -> NodeConfig:
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{source}: not valid TOML ({exc})") from exc
    return parse_config(data, base_dir=base_dir, known_methods=known_methods)


def _only(table: Mapping[str, Any], allowed: set[str], key: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        where = f"{key}." if key else ""
        raise ConfigError(
            f"{where}{unknown[0]}: unknown key (allowed: {', '.join(sorted(allowed))})"
        )


def _table(value: Any, key: str) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise ConfigError(f"{key}: expected a table, got {_show(value)}")
    return value


def _array(value: Any, key: str) -> list[Any]:
    if not isinstance(value, list | tuple):
        raise ConfigError(f"{key}: expected an array, got {_show(value)}")
    return list(value)


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _str(value: Any, key: str, *, nonempty: bool = False) -> str:
    if not isinstance(value, str):
        raise ConfigError(f"{key}: expected a string, got {_show(value)}")
    if nonempty and not value.strip():
        raise ConfigError(f"{key}: must not be empty")
    return value


def _bool(value: Any, key: str) -> bool:
    if not isinstance(value, bool):
        raise ConfigError(f"{key}: expected true or false, got {_show(value)}")
    return value


def _int(value: Any, key: str, *, ge: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ConfigError(f"{key}: expected an integer, got {_show(value)}")
    if ge is not None and value < ge:
        raise ConfigError(f"{key}: must be >= {ge}, got {value}")
    return value


def _number(value: Any, key: str, *, gt: float | None = None, ge: float | None = None) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ConfigError(f"{key}: expected a number, got {_show(value)}")
    x = float(value)
    if not math.isfinite(x):
        raise ConfigError(f"{key}: must be finite, got {value}")
    if gt is not None and not x > gt:
        raise ConfigError(f"{key}: must be > {gt:g}, got {value}")
    if ge is not None and not x >= ge:
        raise ConfigError(f"{key}: must be >= {ge:g}, got {value}")
    return x


def _port(value: Any, key: str, *, allow_zero: bool = False) -> int:
    port = _int(value, key)
    low = 0 if allow_zero else 1
    if not low <= port <= 65535:
        raise ConfigError(f"{key}: expected a TCP port {low}-65535, got {port}")
    return port


def _ae_title(value: Any, key: str) -> str:
    # PS3.5 6.2: AE is at most 16 characters of the default repertoire, no backslash or
    # control characters; leading/trailing spaces are not significant.
    text = _str(value, key).strip()
    if not text:
        raise ConfigError(f"{key}: an AE title must not be empty or all spaces")
    if len(text) > 16:
        raise ConfigError(f"{key}: an AE title has at most 16 characters, got {len(text)}")
    if "\\" in text or any(ord(c) < 0x20 or ord(c) > 0x7E for c in text):
        raise ConfigError(f"{key}: an AE title must be printable ASCII without backslash, "
                          f"got {text!r}")
    return text


def _path(value: Any, key: str, base: Path) -> Path:
    p = Path(_str(value, key, nonempty=True)).expanduser()
    return p if p.is_absolute() else (base / p).absolute()


def _keyword(value: Any, key: str) -> str:
    kw = _str(value, key, nonempty=True)
    if tag_for_keyword(kw) is None:
        raise ConfigError(f"{key}: {kw!r} is not a DICOM attribute keyword")
    return kw


def _regex(value: Any, key: str) -> str:
    text = _str(value, key, nonempty=True)
    try:
        re.compile(text)
    except re.error as exc:
        raise ConfigError(f"{key}: not a valid regular expression ({exc})") from exc
    return text


def _destination(value: Any, key: str) -> Destination:
    t = _table(value, key)
    _only(t, {"ae_title", "host", "port", "tls"}, key)
    for k in ("ae_title", "host", "port"):
        if k not in t:
            raise ConfigError(f"{key}.{k}: required")
    return Destination(
        ae_title=_ae_title(t["ae_title"], f"{key}.ae_title"),
        host=_str(t["host"], f"{key}.host", nonempty=True),
        port=_port(t["port"], f"{key}.port"),
        tls=_bool(t.get("tls", False), f"{key}.tls"),
    )


def _network(value: Any, key: str) -> ipaddress.IPv4Network | ipaddress.IPv6Network:
    text = _str(value, key, nonempty=True)
    try:
        return ipaddress.ip_network(text.strip(), strict=False)
    except ValueError:
        raise ConfigError(f"{key}: expected an IP address or network like '10.1.2.0/24', "
                          f"got {text!r}") from None


def _metrics(value: Any, key: str) -> MetricsSettings:
    t = _table(value, key)
    _only(t, {"enabled", "host", "port", "calibrate"}, key)
    return MetricsSettings(
        enabled=_bool(t.get("enabled", False), f"{key}.enabled"),
        host=_str(t.get("host", "127.0.0.1"), f"{key}.host", nonempty=True),
        port=_port(t.get("port", 9464), f"{key}.port", allow_zero=True),
        calibrate=_bool(t.get("calibrate", True), f"{key}.calibrate"),
    )


def _tls(value: Any, key: str, base: Path) -> TlsSettings:
    t = _table(value, key)
    _only(t, {"receive", "cert_file", "key_file", "ca_file", "require_client_cert",
              "check_hostname"}, key)
    def file(k: str) -> Path | None:
        return _path(t[k], f"{key}.{k}", base) if k in t else None

    try:
        return TlsSettings(
            receive=_bool(t.get("receive", False), f"{key}.receive"),
            cert_file=file("cert_file"),
            key_file=file("key_file"),
            ca_file=file("ca_file"),
            require_client_cert=_bool(t.get("require_client_cert", True),
                                      f"{key}.require_client_cert"),
            check_hostname=_bool(t.get("check_hostname", True), f"{key}.check_hostname"),
        )
    except ValueError as exc:
        raise ConfigError(str(exc)) from None


_TAG_RE = re.compile(r"\(?\s*([0-9A-Fa-f]{4})\s*,\s*([0-9A-Fa-fxX]{4})\s*\)?")


def _tag(value: Any, key: str, creator: str | None) -> int:
    text = _str(value, key, nonempty=True)
    m = _TAG_RE.fullmatch(text.strip())
    if m is None:
        raise ConfigError(f"{key}: expected a tag like '(0018,9087)' or '(0029,xx10)', "
                          f"got {text!r}")
    group = int(m.group(1), 16)
    elem = m.group(2)
    if elem[:2].lower() == "xx":
        if creator is None:
            raise ConfigError(f"{key}: a private tag '(gggg,xxee)' needs private_creator")
        if group % 2 == 0:
            raise ConfigError(f"{key}: private tags have an odd group, got {group:04X}")
        try:
            byte = int(elem[2:], 16)
        except ValueError as exc:
            raise ConfigError(f"{key}: bad element byte in {text!r}") from exc
        return (group << 16) | byte
    if "x" in elem.lower():
        raise ConfigError(f"{key}: 'xx' may only stand for the first two element digits, "
                          f"got {text!r}")
    if creator is not None:
        raise ConfigError(f"{key}: with private_creator the tag must be '(gggg,xxee)', "
                          f"got {text!r}")
    return (group << 16) | int(elem, 16)


def _offset_rule(value: Any, key: str) -> OffsetRule:
    t = _table(value, key)
    _only(t, {"keyword", "tag", "private_creator", "regex", "unit", "values_ppm", "order_by",
              "order_start"}, key)
    if "values_ppm" in t:
        extra = sorted(set(t) & {"keyword", "tag", "private_creator", "regex", "unit"})
        if extra:
            raise ConfigError(f"{key}.{extra[0]}: not allowed with values_ppm (an ordered "
                              "list takes order_by and order_start only)")
        raw = _array(t["values_ppm"], f"{key}.values_ppm")
        if not raw:
            raise ConfigError(f"{key}.values_ppm: must list at least one offset")
        values = tuple(_number(v, f"{key}.values_ppm[{i}]") for i, v in enumerate(raw))
        if "order_by" not in t:
            raise ConfigError(f"{key}.order_by: required with values_ppm "
                              "(e.g. 'AcquisitionNumber')")
        return OffsetRule(
            values_ppm=values,
            order_by=_keyword(t["order_by"], f"{key}.order_by"),
            order_start=_int(t.get("order_start", 1), f"{key}.order_start"),
        )
    for k in ("order_by", "order_start"):
        if k in t:
            raise ConfigError(f"{key}.{k}: only used with values_ppm")
    has_kw, has_tag = "keyword" in t, "tag" in t
    if has_kw == has_tag:
        raise ConfigError(f"{key}: give exactly one of keyword, tag or values_ppm")
    creator = None
    if "private_creator" in t:
        if has_kw:
            raise ConfigError(f"{key}.private_creator: only used with tag '(gggg,xxee)'")
        creator = _str(t["private_creator"], f"{key}.private_creator", nonempty=True)
    unit = t.get("unit", "ppm")
    if not isinstance(unit, str) or unit.lower() not in ("ppm", "hz"):
        raise ConfigError(f"{key}.unit: expected 'ppm' or 'hz', got {_show(unit)}")
    regex = None
    if "regex" in t:
        regex = _regex(t["regex"], f"{key}.regex")
        if re.compile(regex).groups < 1:
            raise ConfigError(f"{key}.regex: needs a group around the number, e.g. "
                              r"'offset ([-+0-9.]+) ppm'")
    return OffsetRule(
        keyword=_keyword(t["keyword"], f"{key}.keyword") if has_kw else None,
        tag=_tag(t["tag"], f"{key}.tag", creator) if has_tag else None,
        private_creator=creator,
        regex=regex,
        unit="hz" if unit.lower() == "hz" else "ppm",
    )


def _protocol(value: Any, key: str, known_methods: tuple[str, ...] | None) -> Protocol:
    t = _table(value, key)
    _only(t, {"name", "match", "offset", "expected_frames", "expected_offsets",
              "expected_slices", "m0_threshold_ppm", "required_offsets_ppm",
              "required_tolerance_ppm", "methods", "outputs", "budget_s", "field_t", "b1_ut",
              "tsat_s", "model_based", "companions", "motion_correction",
              "motion_rotation", "qc"}, key)
    for k in ("name", "match", "offset"):
        if k not in t:
            raise ConfigError(f"{key}.{k}: required")
    match_t = _table(t["match"], f"{key}.match")
    _only(match_t, {"attribute", "regex"}, f"{key}.match")
    for k in ("attribute", "regex"):
        if k not in match_t:
            raise ConfigError(f"{key}.match.{k}: required")
    match = MatchRule(_keyword(match_t["attribute"], f"{key}.match.attribute"),
                      _regex(match_t["regex"], f"{key}.match.regex"))
    offset = _offset_rule(t["offset"], f"{key}.offset")

    ef = t.get("expected_frames", "auto")
    if isinstance(ef, str):
        if ef != "auto":
            raise ConfigError(f"{key}.expected_frames: expected a positive integer or 'auto', "
                              f"got {ef!r}")
        expected: int | Literal["auto"] = "auto"
    else:
        expected = _int(ef, f"{key}.expected_frames", ge=1)
    exp_off = (_int(t["expected_offsets"], f"{key}.expected_offsets", ge=1)
               if "expected_offsets" in t else None)
    if exp_off is not None and offset.values_ppm and exp_off != len(offset.values_ppm):
        raise ConfigError(f"{key}.expected_offsets: {exp_off} disagrees with the "
                          f"{len(offset.values_ppm)} entries of offset.values_ppm")
    exp_sl = (_int(t["expected_slices"], f"{key}.expected_slices", ge=1)
              if "expected_slices" in t else None)

    methods_raw = _array(t.get("methods", ["mtr_asym"]), f"{key}.methods")
    if not methods_raw:
        raise ConfigError(f"{key}.methods: must name at least one method (the first is primary)")
    methods = tuple(_str(m, f"{key}.methods[{i}]", nonempty=True)
                    for i, m in enumerate(methods_raw))
    if known_methods is not None:
        for i, m in enumerate(methods):
            if m not in known_methods:
                raise ConfigError(f"{key}.methods[{i}]: unknown method {m!r} "
                                  f"(known: {', '.join(sorted(known_methods))})")
    if len(set(methods)) != len(methods):
        raise ConfigError(f"{key}.methods: a method is listed twice")
    outputs_raw = _array(t.get("outputs", list(DEFAULT_OUTPUTS)), f"{key}.outputs")
    outputs = tuple(_str(o, f"{key}.outputs[{i}]") for i, o in enumerate(outputs_raw))
    for i, o in enumerate(outputs):
        if o not in OUTPUT_KINDS:
            raise ConfigError(f"{key}.outputs[{i}]: unknown output {o!r} "
                              f"(known: {', '.join(OUTPUT_KINDS)})")
    if len(set(outputs)) != len(outputs):
        raise ConfigError(f"{key}.outputs: an output is listed twice")
    req_raw = _array(t.get("required_offsets_ppm", [-3.5, 3.5]), f"{key}.required_offsets_ppm")
    required = tuple(_number(v, f"{key}.required_offsets_ppm[{i}]")
                     for i, v in enumerate(req_raw))
    m0_thr = _number(t.get("m0_threshold_ppm", 20.0), f"{key}.m0_threshold_ppm", gt=0)
    for i, v in enumerate(required):
        if abs(v) >= m0_thr:
            raise ConfigError(f"{key}.required_offsets_ppm[{i}]: {v:g} ppm would be an M0 frame "
                              f"(|offset| >= m0_threshold_ppm {m0_thr:g})")
    return Protocol(
        name=_str(t["name"], f"{key}.name", nonempty=True),
        match=match,
        offset=offset,
        expected_frames=expected,
        expected_offsets=exp_off,
        expected_slices=exp_sl,
        m0_threshold_ppm=m0_thr,
        required_offsets_ppm=required,
        required_tolerance_ppm=_number(t.get("required_tolerance_ppm", 0.05),
                                       f"{key}.required_tolerance_ppm", gt=0),
        methods=methods,
        outputs=outputs,
        budget_s=_number(t.get("budget_s", 10.0), f"{key}.budget_s", gt=0),
        field_t=_number(t.get("field_t", 3.0), f"{key}.field_t", gt=0),
        b1_ut=_number(t.get("b1_ut", 1.0), f"{key}.b1_ut", gt=0),
        tsat_s=_number(t.get("tsat_s", 2.0), f"{key}.tsat_s", gt=0),
        model_based=_bool(t.get("model_based", True), f"{key}.model_based"),
        companions=_companions(t.get("companions", []), f"{key}.companions"),
        motion_correction=_bool(t.get("motion_correction", False), f"{key}.motion_correction"),
        motion_rotation=_bool(t.get("motion_rotation", False), f"{key}.motion_rotation"),
        qc=_qc(t.get("qc", {}), f"{key}.qc"),
    )


def _qc(value: Any, key: str) -> QcSettings:
    t = _table(value, key)
    _only(t, {"min_snr", "max_motion_mm", "min_valid_fraction", "max_abs_b0_ppm",
              "candidate_n_sd"}, key)
    frac = _number(t.get("min_valid_fraction", 0.9), f"{key}.min_valid_fraction", ge=0)
    if frac > 1:
        raise ConfigError(f"{key}.min_valid_fraction: must be at most 1, got {frac:g}")
    b0 = t.get("max_abs_b0_ppm")
    return QcSettings(
        min_snr=_number(t.get("min_snr", 20.0), f"{key}.min_snr", ge=0),
        max_motion_mm=_number(t.get("max_motion_mm", 2.0), f"{key}.max_motion_mm", ge=0),
        min_valid_fraction=frac,
        max_abs_b0_ppm=None if b0 is None else _number(b0, f"{key}.max_abs_b0_ppm", gt=0),
        candidate_n_sd=_number(t.get("candidate_n_sd", 2.0), f"{key}.candidate_n_sd", gt=0),
    )


_COMPANION_UNITS = {"t1": ("s", "ms"), "b1": ("relative", "percent")}


def _match(value: Any, key: str) -> MatchRule:
    t = _table(value, key)
    _only(t, {"attribute", "regex"}, key)
    for k in ("attribute", "regex"):
        if k not in t:
            raise ConfigError(f"{key}.{k}: required")
    return MatchRule(_keyword(t["attribute"], f"{key}.attribute"),
                     _regex(t["regex"], f"{key}.regex"))


def _companions(value: Any, key: str) -> tuple[CompanionRule, ...]:
    out: list[CompanionRule] = []
    for i, raw in enumerate(_array(value, key)):
        k = f"{key}[{i}]"
        t = _table(raw, k)
        _only(t, {"kind", "match", "timeout_s", "unit", "scale", "offset", "wassr_method",
                  "b1_tolerance", "slice_tolerance_mm"}, k)
        for req in ("kind", "match"):
            if req not in t:
                raise ConfigError(f"{k}.{req}: required")
        kind = _str(t["kind"], f"{k}.kind")
        if kind not in COMPANION_KINDS:
            raise ConfigError(f"{k}.kind: expected one of {', '.join(COMPANION_KINDS)}, "
                              f"got {kind!r}")
        if any(c.kind == kind for c in out):
            raise ConfigError(f"{k}.kind: a second {kind!r} companion (one per kind)")
        units = _COMPANION_UNITS.get(kind)
        if units is None:
            for extra in ("unit", "scale"):
                if extra in t:
                    raise ConfigError(f"{k}.{extra}: only used with kind 't1' or 'b1'")
            unit = ""
        else:
            unit = _str(t.get("unit", units[0]), f"{k}.unit")
            if unit not in units:
                raise ConfigError(f"{k}.unit: expected {' or '.join(map(repr, units))} for "
                                  f"kind {kind!r}, got {unit!r}")
        if kind == "wassr":
            if "offset" not in t:
                raise ConfigError(f"{k}.offset: required for kind 'wassr' (where each "
                                  "frame's offset is)")
            offset: OffsetRule | None = _offset_rule(t["offset"], f"{k}.offset")
            method = _str(t.get("wassr_method", "symmetry"), f"{k}.wassr_method")
            if method not in ("symmetry", "lorentzian"):
                raise ConfigError(f"{k}.wassr_method: expected 'symmetry' or 'lorentzian', "
                                  f"got {method!r}")
        else:
            for extra in ("offset", "wassr_method"):
                if extra in t:
                    raise ConfigError(f"{k}.{extra}: only used with kind 'wassr'")
            offset, method = None, "symmetry"
        if "b1_tolerance" in t and kind != "b1":
            raise ConfigError(f"{k}.b1_tolerance: only used with kind 'b1'")
        out.append(CompanionRule(
            kind=kind,  # type: ignore[arg-type]
            match=_match(t["match"], f"{k}.match"),
            timeout_s=_number(t.get("timeout_s", 60.0), f"{k}.timeout_s", ge=0),
            unit=unit,
            scale=_number(t.get("scale", 1.0), f"{k}.scale", gt=0),
            offset=offset,
            wassr_method=method,  # type: ignore[arg-type]
            b1_tolerance=_number(t.get("b1_tolerance", 0.2), f"{k}.b1_tolerance", gt=0),
            slice_tolerance_mm=_number(t.get("slice_tolerance_mm", 0.5),
                                       f"{k}.slice_tolerance_mm", gt=0),
        ))
    return tuple(out)
