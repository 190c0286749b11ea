"""``cest-node demo``: the whole chain on loopback with the embedded default.

An embedded archive and the node start on free loopback ports; a scanner of ours sends the
synthetic stroke phantom over DICOM in scrambled order; the demo waits for the node's results
at the archive, prints the latency summary, what the archive received, region means in the
phantom's acidotic and contralateral regions, and where the objects and PNG previews are.
No config, no system package, no network beyond 127.0.0.1.
"""

from __future__ import annotations

import shutil
import tempfile
import threading
from dataclasses import replace
from pathlib import Path

import numpy as np
from pydicom import dcmread

from node.archive import EmbeddedArchive
from node.config import CompanionRule, MatchRule, default_config
from node.send import Sender, SendSettings
from node.service import Node, SeriesOutcome
from node.synth import series_from_arrays, t1_map_series

SCANNER_AE = "PHANTOMSCAN"


def run_demo(*, out: str | None = None, slices: int = 8, size: int = 96, seed: int = 0,
             timeout_s: float = 120.0) -> int:
    from quant.phantom import make_phantom

    work = Path(tempfile.mkdtemp(prefix="cest-node-demo-"))
    out_dir = Path(out).absolute() if out else work / "archive"
    print("cest-node demo — research use only, not a medical device")
    print(f"phantom: {slices} slices of {size} x {size}, seed {seed} (synthetic, invented)")
    ph = make_phantom(slices=slices, size=size, seed=seed)
    study_seed = f"demo-{seed}-{slices}-{size}"
    datasets = series_from_arrays(ph.signal, ph.offsets_ppm, seed=study_seed,
                                  field_t=getattr(ph, "field_t", 3.0))
    # the scanner's T1 map of the same study, sent first: it enables AREX and MTRasym/T1
    t1_map = t1_map_series(ph.t1_s, seed=study_seed)
    order = np.random.default_rng(seed).permutation(len(datasets))
    scrambled = [datasets[i] for i in order]

    outcomes: list[SeriesOutcome] = []
    done = threading.Condition()

    def on_outcome(o: SeriesOutcome) -> None:
        with done:
            outcomes.append(o)
            done.notify_all()

    try:
        with EmbeddedArchive(out_dir, ae_title="DEMOARCHIVE") as archive:
            cfg = default_config(base_dir=work).with_overrides(
                port=0, spool_dir=work / "spool", log_dir=work / "logs",
                destinations=[f"{archive.ae_title}@127.0.0.1:{archive.port}"],
                allowed_calling_aets=[SCANNER_AE],
            )
            t1_rule = CompanionRule(kind="t1", match=MatchRule("SeriesDescription", "^T1 map"),
                                    timeout_s=10.0, unit="ms")
            cfg = replace(cfg, protocols=tuple(replace(p, companions=(t1_rule,))
                                               for p in cfg.protocols))
            with Node(cfg, on_outcome=on_outcome, keep_maps=True) as node:
                assert node.port is not None
                print(f"node {cfg.ae_title} on 127.0.0.1:{node.port}; archive "
                      f"{archive.ae_title} on 127.0.0.1:{archive.port}")
                scanner = Sender(SendSettings(calling_ae=SCANNER_AE, retries=1))
                rep = scanner.send(t1_map, (cfg.ae_title, "127.0.0.1", node.port))
                print(f"scanner sent the T1 map ({rep.sent} instances)")
                rep = scanner.send(scrambled, (cfg.ae_title, "127.0.0.1", node.port))
                print(f"scanner sent {rep.sent}/{len(scrambled)} instances in scrambled order "
                      f"in {rep.elapsed_ms / 1000:.2f} s")
                if not rep.ok:
                    print("the scanner could not send every instance", flush=True)
                    return 1
                with done:
                    if not done.wait_for(lambda: bool(outcomes), timeout=timeout_s):
                        print(f"no result within {timeout_s:.0f} s")
                        return 1
                outcome = outcomes[0]
                print(f"model-free outputs acknowledged {outcome.record.get('total_ms')} ms "
                      "after the last instance", flush=True)
                later = None
                if outcome.deferred:
                    print(f"deferred pass running: {', '.join(outcome.deferred)} ...", flush=True)
                    with done:
                        if done.wait_for(lambda: len(outcomes) > 1, timeout=timeout_s):
                            later = outcomes[1]
                expected = outcome.objects + (later.objects if later else 0)
                if not archive.wait_for(expected, timeout_s=30):
                    print("the archive did not receive every object")
                    return 1
            _report(outcome, later, archive, ph, out_dir)
            return 0 if outcome.ok and (later is None or later.ok) else 1
    finally:
        shutil.rmtree(work / "spool", ignore_errors=True)


def _report(outcome: SeriesOutcome, later: SeriesOutcome | None, archive: EmbeddedArchive,
            ph: object, out_dir: Path) -> None:
    rec = outcome.record
    print(f"\nseries {outcome.key}: {'done' if outcome.ok else 'FAILED ' + outcome.error}")
    print(f"  methods run: {', '.join(outcome.methods)}")
    for name, why in outcome.skipped.items():
        print(f"  skipped {name}: {why}")
    print("  latency (from the last instance received):")
    print(f"    primary outputs acknowledged  {rec.get('primary_ms')} ms")
    print(f"    all outputs acknowledged      {rec.get('total_ms')} ms   "
          f"(budget {rec.get('budget_s')} s, met: {rec.get('budget_met')})")
    print("  stages (ms): " + ", ".join(f"{k} {v:.0f}" for k, v in rec["stages_ms"].items()))
    maps = dict(outcome.maps)
    if later is not None:
        print(f"  deferred pass ({', '.join(later.methods) or 'nothing'}): "
              f"{'done' if later.ok else 'FAILED ' + later.error} in "
              f"{later.record.get('deferred_ms')} ms")
        maps.update(later.maps)
    lesion = getattr(ph, "lesion", None)
    contra = getattr(ph, "contralateral", None)
    if lesion is not None and contra is not None:
        print("  region means (phantom truth masks):    acidotic   contralateral")
        for name, values in maps.items():
            a = float(np.nanmean(values[lesion]))
            c = float(np.nanmean(values[contra]))
            print(f"    {name:<34} {a:8.2f}   {c:8.2f}")
    counts = archive.counts()
    print(f"\narchive received {sum(counts.values())} objects in {len(counts)} series under "
          f"{out_dir}")
    previews = out_dir / "previews"
    n = write_previews(archive.files().values(), previews)
    print(f"PNG previews of the Secondary Captures: {previews} ({n} files)")


def write_previews(files: object, folder: Path) -> int:
    """Write each received RGB Secondary Capture as a PNG (what a viewer would show)."""
    from PIL import Image

    folder.mkdir(parents=True, exist_ok=True)
    n = 0
    for f in sorted(files):  # type: ignore[call-overload]
        ds = dcmread(f)
        if ds.get("PhotometricInterpretation") != "RGB":
            continue
        name = f"{ds.get('SeriesNumber', 0)}_{int(ds.get('InstanceNumber', 0)):03d}.png"
        Image.fromarray(ds.pixel_array).save(folder / name)
        n += 1
    return n
