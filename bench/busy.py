"""Benchmark: a busy camera scanned with persistence on and off, side by side, in one run.

The camera is the depot's ``gate`` (:data:`inspector.demo.scenario.BUSY_CAMERAS`), or with
``--camera yard`` a gravel yard whose ground is a photograph bundled with scikit-image: views
the demo never shows, with people and pallet trucks passing in about half of the frames, normal
and new alike, and in the frames to scan one object per burst (a parcel or a spill) left on
the floor for 15 frames. The baseline is learnt once with default settings; the frames to
scan are then scored with ``[persistence] mode`` "on" and "off". Each seed draws another
scene (the dock's layout, its light over four days, the traffic and the objects left), so
several seeds are several unseen busy scenes; the figures are given per scene and pooled.

Printed per mode: the false-alarm rate on traffic-only frames (no object in view) with its
95 % Clopper-Pearson interval (``scipy.stats.binomtest(...).proportion_ci(method="exact")``),
and the share of left objects flagged within 5 frames of appearing, with the median delay
(frames after the first one the object is in; 0 = flagged when it appears). Objects not
flagged because every one of those frames was held back with a camera condition (reported in
health.csv, never flagged as an anomaly: with persistence off any condition, an underexposed
evening say; with it on, any but those a step is measured in, see
:func:`inspector.core.persistence.held_back`) are counted apart, as "held"; an object in
frames reported but not held back (underexposed, persistence on) and not flagged is missed.
With ``--detail``, the traffic-only frames flagged with persistence on are also sorted by
kind, per scene: "start" (the first full window of a burst: no frame before it to measure a
change from), "after" (within a window of an object taken away: the window still holds it)
and "other", with their positions in the camera's frames to scan.

    python bench/busy.py [--normal 300] [--new 240] [--seeds 1,2,3] [--size 960x540]
                         [--camera gate] [--detail]
"""

from __future__ import annotations

import argparse
import csv
import dataclasses
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from inspector.config import PersistenceSettings, load_config  # noqa: E402
from inspector.core.calibration import rate_interval  # noqa: E402
from inspector.core.persistence import held_back  # noqa: E402
from inspector.demo.scenario import BUSY_CAMERAS, generate, load_truth  # noqa: E402
from inspector.demo.traffic import busy_results, left_objects  # noqa: E402
from inspector.jobs.learn import learn_cameras  # noqa: E402
from inspector.jobs.scan import run_scan  # noqa: E402
from inspector.storage.frames import discover  # noqa: E402
from inspector.storage.store import Store  # noqa: E402

CAMERA = "gate"
#: A left object counts as caught when flagged within this many frames of appearing.
WITHIN = 5
#: Seconds between frames that start a new burst (--detail): the demo's bursts are frames
#: 2 s apart, hours from each other.
GAP = 60.0


def evaluate(truth: list[tuple[str, str, str]], flagged: set[str], camera: str,
             reported: set[str] = frozenset()) -> dict:
    """:func:`inspector.demo.traffic.busy_results` with the false-alarm interval and the
    median delay."""
    r = busy_results(truth, flagged, camera, WITHIN, reported)
    r["interval"] = rate_interval(r["false"], r["quiet"])
    r["median_delay"] = float(np.median(r["delays"])) if r["delays"] else float("nan")
    return r


def false_kinds(truth: list[tuple[str, str, str]], flagged: set[str], camera: str,
                window: int, gap: float) -> dict[str, list[int]]:
    """Positions (in the camera's frames to scan, time order) of the traffic-only frames
    flagged, by kind: "start" within the first ``window`` frames of a burst (frames more
    than ``gap`` seconds apart start one; capture times from the demo's file names),
    "after" within ``window - 1`` frames after an object's last frame, "other"."""
    mine = [r for r in truth if r[1] == camera]
    times = [datetime.strptime("_".join(Path(f).stem.split("_")[-2:]), "%Y%m%d_%H%M%S")
             for f, _, _ in mine]
    after = {last + k for _, last in left_objects(truth, camera) for k in range(1, window)}
    out: dict[str, list[int]] = {"start": [], "after": [], "other": []}
    first = 0
    for i, (frame, _, kind) in enumerate(mine):
        if i and (times[i] - times[i - 1]).total_seconds() > gap:
            first = i
        if kind != "none" or frame not in flagged:
            continue
        out["start" if i - first < window else "after" if i in after else "other"].append(i)
    return out


def run(root: Path, normal: int, new: int, seed: int, size: tuple[int, int],
        camera: str = CAMERA) -> dict[str, dict]:
    scenario = generate(root / "frames", seed=seed, normal_per_camera=normal,
                        new_per_camera=new, size=size, cameras=(camera,))
    config = load_config(None)
    store = Store(root / "store")
    files, _ = discover(scenario.normal)
    for report in learn_cameras(files, config, store):
        print(f"learnt {report.camera} from {report.frames} frames in {report.seconds:.0f} s; "
              + "; ".join(n for n in report.notes if "camera:" in n))
    truth = load_truth(scenario)
    out: dict[str, dict] = {}
    for mode in ("on", "off"):
        cfg = dataclasses.replace(config, persistence=PersistenceSettings(mode=mode))
        results = root / f"results-{mode}"
        run_scan(scenario.new, cfg, store, results)
        with open(results / "flagged.csv", newline="", encoding="utf-8") as fh:
            flagged = {r["frame"] for r in csv.DictReader(fh)}
        with open(results / "health.csv", newline="", encoding="utf-8") as fh:
            reported = {r["frame"] for r in csv.DictReader(fh)
                        if mode == "off" or held_back([(r["condition"],)])}
        out[mode] = evaluate(truth, flagged, camera, reported)
        out[mode]["kinds"] = false_kinds(truth, flagged, camera, cfg.persistence.window,
                                         GAP)
    return out


def pooled(rows: list[dict]) -> dict:
    """Figures of several scenes added up (counts summed, delays joined)."""
    out = {k: sum(r[k] for r in rows) for k in ("false", "quiet", "caught", "objects", "held")}
    out["delays"] = [d for r in rows for d in r["delays"]]
    out["interval"] = rate_interval(out["false"], out["quiet"])
    out["median_delay"] = float(np.median(out["delays"])) if out["delays"] else float("nan")
    return out


def line(label: str, r: dict) -> str:
    lo, hi = r["interval"]
    rate = r["false"] / r["quiet"] if r["quiet"] else float("nan")
    fa = f"{r['false']}/{r['quiet']} = {rate:.1%} [{lo:.1%}, {hi:.1%}]"
    caught = f"{r['caught']}/{r['objects']}" + (f" ({r['held']} held)" if r["held"] else "")
    return f"{label:<16} {fa:<36} {caught:<36} {r['median_delay']:.0f} frames"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--normal", type=int, default=300)
    ap.add_argument("--new", type=int, default=240)
    ap.add_argument("--seeds", default="1,2,3", help="one scene per seed, comma-separated")
    ap.add_argument("--size", default="960x540")
    ap.add_argument("--camera", default=CAMERA, choices=sorted(BUSY_CAMERAS),
                    help="which busy camera of the depot (walkway is the demo's own)")
    ap.add_argument("--detail", action="store_true",
                    help="sort the false alarms with persistence on by kind, per scene")
    args = ap.parse_args(argv)
    size = tuple(int(v) for v in args.size.split("x"))
    seeds = [int(v) for v in args.seeds.split(",")]
    started = time.perf_counter()
    found: dict[int, dict[str, dict]] = {}
    for seed in seeds:
        with tempfile.TemporaryDirectory(prefix="inspector-busy-") as tmp:
            found[seed] = run(Path(tmp), args.normal, args.new, seed, size, args.camera)
    print(f"\nbusy camera {args.camera!r}, {len(seeds)} scene(s) (seeds {args.seeds}), {args.normal} "
          f"normal and {args.new} new frames each, default settings, alpha as configured:")
    print(f"{'persistence':<16} {'traffic-only frames flagged':<36} "
          f"{'left objects flagged within ' + str(WITHIN) + ' frames':<36} median delay")
    for mode in ("on", "off"):
        for seed in seeds:
            print(line(f"{mode} seed {seed}", found[seed][mode]))
        if len(seeds) > 1:
            print(line(f"{mode} all", pooled([found[s][mode] for s in seeds])))
    if args.detail:
        print("\ntraffic-only frames flagged with persistence on, by kind (positions):")
        total = {k: 0 for k in ("start", "after", "other")}
        for seed in seeds:
            kinds = found[seed]["on"]["kinds"]
            print(f"seed {seed:<4} " + "; ".join(f"{k} {len(v)} {v}" for k, v in kinds.items()))
            for k, v in kinds.items():
                total[k] += len(v)
        print("all       " + "; ".join(f"{k} {v}" for k, v in total.items()))
    print(f"({time.perf_counter() - started:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
