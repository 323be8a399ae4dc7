"""False alarms and detection under camera nuisances, with and without the condition handling.

For each nuisance the demo generator can add, a scenario is rendered, a baseline learnt on
its normal frames and its frames to scan scored, once with the handling off (no
registration, no photometric normalisation, no text mask, no health checks, one regime),
once per lighting mode, and once with "global" but without regimes. Printed per row: the false-alarm rate on normal frames to scan (incident-
and fault-free) with its 95 % binomial interval (Clopper-Pearson, :func:`inspector.core.calibration.rate_interval`), the
rate asked for, the AUROC of incident frames against those normal frames
(sklearn.metrics.roc_auc_score), and how many of the frames with a camera fault were
reported in health.csv with the right condition.

    python bench/conditions.py [--normal 160] [--new 100] [--long-side 160]
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sklearn.metrics import roc_auc_score  # noqa: E402

from inspector.config import load_config  # noqa: E402
from inspector.core.calibration import rate_interval  # noqa: E402
from inspector.demo.scenario import HEALTH_TRUTH, generate  # noqa: E402
from inspector.jobs.learn import learn_cameras  # noqa: E402
from inspector.jobs.scan import run_scan  # noqa: E402
from inspector.storage.frames import discover  # noqa: E402
from inspector.storage.store import Store  # noqa: E402

CASES = {
    "none": {},
    "exposure steps 15%": {"exposure_step": 0.15},
    "exposure steps 30%": {"exposure_step": 0.3},
    "jitter 1.5 px": {"jitter_px": 1.5},
    "camera moved 24 px": {"moved_px": 24},
    "covered/defocus/frozen": {"covered": 0.1, "defocus": 0.1, "frozen": 0.1},
    "IR greyscale at night": {"ir_night": 1},
}
HANDLING = {
    "off": 'lighting = "off"\nregister = false\nauto_text_mask = false\nhealth = false\n',
    "global": 'lighting = "global"\n',
    "local (default)": 'lighting = "local"\n',
    "local + regimes": 'lighting = "local"\n',
    "local, exposure_range 0": 'lighting = "local"\nexposure_range = 0.0\n',
}
#: Calibration keys of a handling (regimes live in [calibration]).
REGIMES = {"off": "regimes = false\n", "local + regimes": "regimes = true\n"}


def run(root: Path, work: Path, handling: str, long_side: int, alpha: float):
    cfg_path = work / "inspector.toml"
    cfg_path.write_text(f"[frames]\nlong_side = {long_side}\n[calibration]\nalpha = {alpha}\n"
                        f"{REGIMES.get(handling, '')}[conditions]\n{HANDLING[handling]}", encoding="utf-8")
    config = load_config(cfg_path)
    store = Store(work / "store")
    files, _ = discover(root / "normal")
    list(learn_cameras(files, config, store))
    out = work / "out"
    run_scan(root / "new", config, store, out, out / "all.csv")
    truth = {r["frame"]: r["incident"] for r in csv.DictReader(open(root / "truth.csv"))}
    faults = {}
    if (root / HEALTH_TRUTH).exists():
        faults = {r["frame"]: r["condition"] for r in csv.DictReader(open(root / HEALTH_TRUTH))}
    rows = list(csv.DictReader(open(out / "all.csv")))
    normal = [r for r in rows if truth[r["frame"]] == "none" and r["frame"] not in faults]
    flagged = {r["frame"] for r in csv.DictReader(open(out / "flagged.csv"))}
    k = sum(r["frame"] in flagged for r in normal)
    y = [truth[r["frame"]] != "none" for r in rows if r["frame"] not in faults]
    s = [float(r["score"]) for r in rows if r["frame"] not in faults]
    auc = roc_auc_score(y, s)
    reported = {(r["frame"], r["condition"]) for r in csv.DictReader(open(out / "health.csv"))}
    found = sum((f, c) in reported for f, c in faults.items())
    flagged_faults = sum(f in flagged for f in faults)
    return k, len(normal), auc, found, len(faults), flagged_faults


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--normal", type=int, default=160)
    ap.add_argument("--new", type=int, default=100)
    ap.add_argument("--long-side", type=int, default=160)
    ap.add_argument("--alpha", type=float, default=0.02)
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--cases", nargs="*", default=list(CASES), choices=list(CASES),
                    help="nuisances to run (all by default)")
    ap.add_argument("--handling", nargs="*", default=list(HANDLING), choices=list(HANDLING),
                    help="handlings to compare (all by default)")
    args = ap.parse_args(argv)
    print(f"{args.normal} normal frames and {args.new} to scan per camera (dock, aisle), "
          f"320x180, long side {args.long_side}, alpha {args.alpha}")
    print("| nuisance | handling | false alarms on normal | 95 % interval | AUROC | "
          "faults reported | faults flagged as anomalies |")
    print("|---|---|---|---|---|---|---|")
    for name in args.cases:
        nuisance = CASES[name]
        with tempfile.TemporaryDirectory() as tmp:
            root = Path(tmp) / "scenario"
            generate(root, seed=args.seed, normal_per_camera=args.normal,
                     new_per_camera=args.new, incident_fraction=0.3, size=(320, 180),
                     nuisance=nuisance)
            for handling in args.handling:
                work = Path(tmp) / handling
                work.mkdir()
                k, n, auc, found, faults, ff = run(root, work, handling, args.long_side,
                                                   args.alpha)
                lo, hi = rate_interval(k, n)
                fault_txt = f"{found}/{faults}" if faults else "-"
                ff_txt = f"{ff}/{faults}" if faults else "-"
                print(f"| {name} | {handling} | {k}/{n} = {k / n:.3f} | [{lo:.3f}, {hi:.3f}] | "
                      f"{auc:.3f} | {fault_txt} | {ff_txt} |", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
