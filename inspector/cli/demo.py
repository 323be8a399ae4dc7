"""``inspector demo``: the invented Larkspur Parcel Co. depot, learnt and scanned end to end."""

from __future__ import annotations

import argparse
import csv
import shutil
import sys
from pathlib import Path

import numpy as np

from inspector.cli.common import report_scan, say
from inspector.cli.review import PORT
from inspector.errors import UsageError


def register(sub) -> None:
    p = sub.add_parser("demo", help="generate an invented depot (two quiet cameras and a busy "
                                    "one), learn, scan and report detection quality")
    p.add_argument("--out", type=Path, default=Path("inspector-demo"),
                   help="folder for the generated frames, store and results "
                        "(default: inspector-demo)")
    p.add_argument("--seed", type=int, default=0, help="random seed of the scenario (default 0)")
    p.set_defaults(func=cmd_demo)


def _program() -> str:
    """How to call inspector again: its name when that is on PATH, else the path run."""
    run = Path(sys.argv[0])
    on_path = shutil.which("inspector")
    if run.name != "inspector" or (on_path and Path(on_path).resolve() == run.resolve()):
        return "inspector"
    return str(run)


def cmd_demo(args: argparse.Namespace) -> int:
    from sklearn.metrics import roc_auc_score

    from inspector.config import load_config
    from inspector.demo.scenario import BUSY, CAMERAS, generate, load_truth
    from inspector.demo.traffic import busy_results
    from inspector.jobs.learn import learn_cameras
    from inspector.jobs.scan import run_scan
    from inspector.storage.frames import discover
    from inspector.storage.store import Store

    root = args.out
    if root.exists() and not root.is_dir():
        raise UsageError(f"--out {str(root)!r} is a file; the demo needs a folder")
    if args.seed < 0:
        raise UsageError("--seed must be 0 or more")
    say(f"generating the Larkspur Parcel Co. depot scenario in {root / 'frames'} ...")
    # The busy camera: 24 short bursts of normal frames (enough full persistence windows for
    # a 1 % threshold after the held-out split), 3 bursts to scan with one object left in each.
    scenario = generate(root / "frames", seed=args.seed, cameras=(*CAMERAS, BUSY),
                        busy_frames=(240, 90))
    config = load_config(None)
    store = Store(root / "store")
    files, _ = discover(scenario.normal)
    for report in learn_cameras(files, config, store):
        say(f"learnt {report.camera}: baseline {report.version} from {report.frames} normal frames, "
            f"threshold {report.threshold.value:.3f} ({report.seconds:.1f} s)")
    out = root / "results"
    all_scores = out / "all_scores.csv"
    summary = run_scan(scenario.new, config, store, out, all_scores)
    report_scan(summary, out, all_scores)
    scores = {}
    with open(all_scores, newline="", encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            scores[row["frame"]] = (float(row["score"]), float(row["threshold"]))
    truth = load_truth(scenario)
    say("detection against the scenario's own labels:")
    for camera in sorted({c for _, c, _ in truth}):
        if camera == BUSY:
            with open(out / "flagged.csv", newline="", encoding="utf-8") as fh:
                flagged = {row["frame"] for row in csv.DictReader(fh)}
            r = busy_results(truth, flagged, camera)
            delay = f", median delay {np.median(r['delays']):.0f} frames" if r["delays"] else ""
            say(f"  {camera} (busy): left objects flagged within 5 frames of appearing "
                f"{r['caught']}/{r['objects']}{delay}; false alarms {r['false']}/{r['quiet']} "
                f"frames with only people and pallet trucks passing")
            continue
        rows = [(scores[f], kind != "none") for f, c, kind in truth if c == camera and f in scores]
        y = np.array([r[1] for r in rows])
        s = np.array([r[0][0] for r in rows])
        flagged = np.array([r[0][0] > r[0][1] for r in rows])
        auroc = roc_auc_score(y, s) if 0 < y.sum() < len(y) else float("nan")
        say(f"  {camera}: AUROC {auroc:.3f}, incidents caught {flagged[y].sum()}/{y.sum()}, "
            f"false alarms {flagged[~y].sum()}/{(~y).sum()} normal frames")
    say(f"open the overlays in {out / 'overlays'} to see where each flag is")
    say("next, go through the flags and label them on the review page:")
    say(f"  {_program()} review --out {out}")
    say(f"  then open http://127.0.0.1:{PORT}/ in a browser on this machine")
    return 0
