"""node.config: TOML -> validated objects; every error names its key."""

from __future__ import annotations

import copy
from pathlib import Path

import pytest

from node import synth
from node.config import (
    ConfigError,
    Destination,
    NodeConfig,
    default_config,
    load_config,
    parse_config,
    parse_destination,
)

REPO = Path(__file__).resolve().parents[2]

BASE = {
    "node": {"ae_title": "NODE1", "port": 0},
    "destinations": [{"ae_title": "ARCHIVE", "host": "127.0.0.1", "port": 4242}],
    "protocols": [
        {
            "name": "p1",
            "match": {"attribute": "SeriesDescription", "regex": "CEST"},
            "offset": {"tag": "(0029,xx10)", "private_creator": "CESTNODE SIM 1"},
        }
    ],
}


def _with(path: str, value: object) -> dict:
    """BASE with one dotted key (``protocols.0.offset.unit``) set; value None deletes it."""
    data = copy.deepcopy(BASE)
    parts = path.split(".")
    node: object = data
    for p in parts[:-1]:
        node = node[int(p)] if isinstance(node, list) else node[p]  # type: ignore[index]
    last = parts[-1]
    if value is None:
        del node[last]  # type: ignore[union-attr, arg-type]
    else:
        node[last] = value  # type: ignore[index]
    return data


def test_shipped_default_is_config_node_toml():
    # the package carries a byte-identical copy so an installed wheel has the same default
    assert (REPO / "node" / "node.toml").read_bytes() == (REPO / "config" / "node.toml").read_bytes()


def test_default_config_matches_the_phantom_convention():
    cfg = default_config(base_dir="/srv/node")
    assert isinstance(cfg, NodeConfig)
    assert cfg.spool_dir == Path("/srv/node/spool")
    (proto,) = cfg.protocols
    # DEVELOPERS.md, node.synth convention: (0029,xx10) of "CESTNODE SIM 1", ppm, M0 = -300
    assert proto.offset.private_creator == synth.PRIVATE_CREATOR
    assert proto.offset.tag == (synth.PRIVATE_GROUP << 16) | synth.OFFSET_ELEMENT
    assert proto.offset.unit == "ppm"
    assert abs(synth.M0_OFFSET_PPM) >= proto.m0_threshold_ppm
    assert proto.match.pattern.search(synth.SERIES_DESCRIPTION)
    assert proto.primary_method == proto.methods[0]
    assert proto.budget_s == 10.0


def test_load_config_resolves_paths_against_the_file(tmp_path):
    f = tmp_path / "site.toml"
    f.write_text(
        '[node]\nae_title = "SITE"\nspool_dir = "sp"\nlog_dir = "/var/log/x"\n'
        'allowed_calling_aets = ["SCANNER1", "SCANNER2"]\n'
        '[[destinations]]\nae_title = "PACS"\nhost = "10.0.0.5"\nport = 104\n'
    )
    cfg = load_config(f)
    assert cfg.spool_dir == tmp_path / "sp"
    assert cfg.log_dir == Path("/var/log/x")
    assert cfg.allowed_calling_aets == ("SCANNER1", "SCANNER2")
    assert cfg.destinations == (Destination("PACS", "10.0.0.5", 104),)
    assert cfg.protocols == ()


def test_load_config_bad_toml_and_missing_file(tmp_path):
    f = tmp_path / "bad.toml"
    f.write_text("[node\nport = 1\n")
    with pytest.raises(ConfigError, match=r"bad\.toml: not valid TOML"):
        load_config(f)
    with pytest.raises(ConfigError, match=r"nope\.toml: cannot read"):
        load_config(tmp_path / "nope.toml")


def test_offset_rule_kinds():
    kw = parse_config(_with("protocols.0.offset", {
        "keyword": "ImageComments", "regex": r"sat offset (?P<value>[-+0-9.]+) ppm"}))
    r = kw.protocols[0].offset
    assert (r.kind, r.keyword, r.tag, r.is_private) == ("attribute", "ImageComments", None, False)
    hz = parse_config(_with("protocols.0.offset", {"tag": "(0018,9087)", "unit": "HZ"}))
    assert hz.protocols[0].offset.tag == 0x00189087
    assert hz.protocols[0].offset.unit == "hz"
    lst = parse_config(_with("protocols.0.offset", {
        "values_ppm": [-300, 3.5, -3.5], "order_by": "AcquisitionNumber"}))
    r = lst.protocols[0].offset
    assert (r.kind, r.values_ppm, r.order_by, r.order_start) == (
        "list", (-300.0, 3.5, -3.5), "AcquisitionNumber", 1)


def test_expected_count_rules():
    p = parse_config(_with("protocols.0.expected_frames", 122)).protocols[0]
    assert p.expected_count(images_in_acquisition=5) == 122
    auto = parse_config(BASE).protocols[0]
    assert auto.expected_count() is None
    assert auto.expected_count(images_in_acquisition=61) == 61
    data = _with("protocols.0.expected_offsets", 61)
    data["protocols"][0]["expected_slices"] = 20
    assert parse_config(data).protocols[0].expected_count(images_in_acquisition=7) == 1220
    data = _with("protocols.0.offset", {"values_ppm": [-300, 3.5, -3.5], "order_by": "AcquisitionNumber"})
    data["protocols"][0]["expected_slices"] = 4
    assert parse_config(data).protocols[0].expected_count() == 12


def test_known_methods_are_checked():
    data = _with("protocols.0.methods", ["mtr_asym", "nonsense"])
    with pytest.raises(ConfigError, match=r"protocols\[0\]\.methods\[1\]: unknown method 'nonsense'"):
        parse_config(data, known_methods=["mtr_asym", "apt_star"])
    assert parse_config(data).protocols[0].methods == ("mtr_asym", "nonsense")


@pytest.mark.parametrize(
    ("path", "value", "match"),
    [
        ("protocols.0.offset.unit", "khz", r"protocols\[0\]\.offset\.unit: expected 'ppm' or 'hz', got 'khz'"),
        ("node.port", 70000, r"node\.port: expected a TCP port 0-65535, got 70000"),
        ("node.port", "104", r"node\.port: expected an integer, got '104'"),
        ("node.ae_title", "A" * 17, r"node\.ae_title: an AE title has at most 16 characters"),
        ("node.ae_title", "  ", r"node\.ae_title: an AE title must not be empty"),
        ("node.idle_timeout_s", 0, r"node\.idle_timeout_s: must be > 0"),
        ("node.fsync", "yes", r"node\.fsync: expected true or false"),
        ("node.colour", 1, r"node\.colour: unknown key"),
        ("destinations.0.port", None, r"destinations\[0\]\.port: required"),
        ("destinations.0.host", 5, r"destinations\[0\]\.host: expected a string"),
        ("protocols.0.match.regex", "([", r"protocols\[0\]\.match\.regex: not a valid regular expression"),
        ("protocols.0.match.attribute", "SeriesDescriptio", r"protocols\[0\]\.match\.attribute: 'SeriesDescriptio' is not a DICOM attribute keyword"),
        ("protocols.0.offset.tag", "(0028,xx10)", r"protocols\[0\]\.offset\.tag: private tags have an odd group"),
        ("protocols.0.offset.tag", "0029-0010", r"protocols\[0\]\.offset\.tag: expected a tag like"),
        ("protocols.0.offset.private_creator", None, r"protocols\[0\]\.offset\.tag: a private tag '\(gggg,xxee\)' needs private_creator"),
        ("protocols.0.offset.regex", "[0-9.]+", r"protocols\[0\]\.offset\.regex: needs a group"),
        ("protocols.0.offset.order_by", "AcquisitionNumber", r"protocols\[0\]\.offset\.order_by: only used with values_ppm"),
        ("protocols.0.offset", {"values_ppm": [1.0]}, r"protocols\[0\]\.offset\.order_by: required with values_ppm"),
        ("protocols.0.offset", {"values_ppm": [], "order_by": "AcquisitionNumber"}, r"protocols\[0\]\.offset\.values_ppm: must list at least one"),
        ("protocols.0.offset", {"keyword": "ImageComments", "tag": "(0020,4000)"}, r"protocols\[0\]\.offset: give exactly one of keyword, tag or values_ppm"),
        ("protocols.0.expected_frames", "many", r"protocols\[0\]\.expected_frames: expected a positive integer or 'auto', got 'many'"),
        ("protocols.0.expected_frames", 0, r"protocols\[0\]\.expected_frames: must be >= 1"),
        ("protocols.0.methods", [], r"protocols\[0\]\.methods: must name at least one method"),
        ("protocols.0.outputs", ["parametric_map", "movie"], r"protocols\[0\]\.outputs\[1\]: unknown output 'movie'"),
        ("protocols.0.required_offsets_ppm", [3.5, 25.0], r"protocols\[0\]\.required_offsets_ppm\[1\]: 25 ppm would be an M0 frame"),
        ("protocols.0.budget_s", -1, r"protocols\[0\]\.budget_s: must be > 0, got -1"),
        ("protocols.0.name", None, r"protocols\[0\]\.name: required"),
        ("protocols", {"name": "x"}, r"protocols: expected an array"),
    ],
)
def test_errors_name_the_key(path, value, match):
    with pytest.raises(ConfigError, match=match):
        parse_config(_with(path, value))


def test_duplicate_protocol_names_rejected():
    data = copy.deepcopy(BASE)
    data["protocols"].append(copy.deepcopy(data["protocols"][0]))
    with pytest.raises(ConfigError, match=r"protocols\[1\]\.name: duplicate protocol name 'p1'"):
        parse_config(data)


def test_overrides_and_destination_strings(tmp_path):
    cfg = parse_config(BASE)
    new = cfg.with_overrides(port=4100, ae_title="OTHER", spool_dir=tmp_path,
                             destinations=["PACS@10.1.2.3:11112"])
    assert (new.port, new.ae_title, new.spool_dir) == (4100, "OTHER", tmp_path)
    assert new.destinations == (Destination("PACS", "10.1.2.3", 11112),)
    assert cfg.port == 0  # frozen original untouched
    with pytest.raises(ConfigError, match=r"destinations: expected AE@HOST:PORT, got 'PACS:104'"):
        cfg.with_overrides(destinations=["PACS:104"])
    with pytest.raises(ConfigError, match=r"colour: not a node setting"):
        cfg.with_overrides(colour="red")
    assert parse_destination("A@h:1") == Destination("A", "h", 1)
