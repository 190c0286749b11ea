"""The embedded default: `cest-node demo` runs the whole chain on loopback and exits 0."""

from __future__ import annotations

from pathlib import Path

from node.cli import main


def test_demo_runs_end_to_end(tmp_path: Path, capsys):
    rc = main(["demo", "--out", str(tmp_path / "out"), "--slices", "2", "--size", "40"])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "research use only" in out
    assert "primary outputs acknowledged" in out
    assert "deferred pass (lda): done" in out
    pngs = list((tmp_path / "out" / "previews").glob("*.png"))
    # the T1 map sent first enables AREX and MTRasym/T1 beside MTRasym and APT*; LDA deferred
    assert "methods run: mtr_asym, apt_star, arex, mtr_asym_t1" in out
    # one Secondary Capture per slice for each of the five methods, and the summary pages of
    # both passes (the deferred one covers LDA too)
    assert len(pngs) == 2 * 5 + 2
    # per method: PM + 2 MR + 2 SC; per pass: SR + summary page
    assert len(list((tmp_path / "out").rglob("*.dcm"))) == 5 * (1 + 2 * 2) + 4
