"""Scan throughput against the floor set by decoding alone, measured side by side.

Generates N full-HD (1920x1080) JPEG frames of the invented depot scene, learns a baseline,
then alternates, ROUNDS times each, between

* decode: the frame loader alone (same files, same reduced-scale JPEG decode, same thread
  pool, same working resolution), and
* scan: the whole scan as the command runs it (decode, score, CSV rows, overlays of
  flagged frames, ledger rows and events.csv),

and prints frames/s of both and their ratio (target: >= 0.6 on 2 cores). Alternating
rounds in one run keeps the ratio fair on a shared, noisy machine.

    python bench/throughput.py [--frames 200] [--rounds 3]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from inspector.config import load_config  # noqa: E402
from inspector.demo.scenario import generate  # noqa: E402
from inspector.jobs.learn import learn_cameras  # noqa: E402
from inspector.jobs.scan import BaselineCache, read_args, run_scan  # noqa: E402
from inspector.storage.frames import discover, iter_frames  # noqa: E402
from inspector.storage.store import Store  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=200, help="full-HD frames to scan")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--keep", type=Path, help="work folder to keep (default: a temp folder)")
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="inspector-bench-"))
    try:
        run(work, args.frames, args.rounds)
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


def run(work: Path, n: int, rounds: int) -> None:
    t = time.perf_counter()
    # Mostly normal frames, as in a real stream (overlays are drawn for flagged frames only).
    scenario = generate(work / "frames", seed=1, normal_per_camera=120, new_per_camera=n // 2,
                        incident_fraction=0.05, size=(1920, 1080))
    print(f"generated {n} + 240 full-HD frames in {time.perf_counter() - t:.1f} s")
    config = load_config(None)
    store = Store(work / "store")
    normal, _ = discover(scenario.normal)
    for report in learn_cameras(normal, config, store):
        print(f"learnt {report.camera} from {report.frames} full-HD frames in "
              f"{report.seconds:.1f} s")
    files, _ = discover(scenario.new)
    baselines = BaselineCache(store)
    decode_rates, scan_rates, decode_cpu, scan_cpu = [], [], [], []
    for r in range(rounds):
        t, c = time.perf_counter(), time.process_time()
        count = 0
        for cam in sorted({f.camera for f in files}):
            cam_files = [f for f in files if f.camera == cam]
            for _, frame in iter_frames(cam_files, **read_args(baselines.get(cam), config)):
                count += 1
        decode_rates.append(count / (time.perf_counter() - t))
        decode_cpu.append(count / (time.process_time() - c))
        out = work / f"out{r}"
        t, c = time.perf_counter(), time.process_time()
        summary = run_scan(scenario.new, config, store, out, out / "all.csv")
        scan_rates.append(summary.scored / (time.perf_counter() - t))
        scan_cpu.append(summary.scored / (time.process_time() - c))
        print(f"round {r + 1}: decode {decode_rates[-1]:.1f} frames/s, "
              f"scan {scan_rates[-1]:.1f} frames/s ({summary.flagged} flagged); per CPU "
              f"second: decode {decode_cpu[-1]:.1f}, scan {scan_cpu[-1]:.1f} frames")
    med = statistics.median
    d, s = med(decode_rates), med(scan_rates)
    print(f"median over {rounds} rounds of {len(files)} frames 1920x1080: decode {d:.1f} "
          f"frames/s, scan {s:.1f} frames/s, ratio scan/decode {s / d:.2f} (target >= 0.6)")
    # Wall-clock rates swing with whatever else the machine runs; frames per CPU second of
    # this process are steadier, so both ratios are printed.
    print(f"per CPU second: decode {med(decode_cpu):.1f}, scan {med(scan_cpu):.1f} frames, "
          f"ratio {med(scan_cpu) / med(decode_cpu):.2f}; load average {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
