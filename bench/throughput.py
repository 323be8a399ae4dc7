"""Scan throughput against the floor set by decoding alone, measured side by side.

Generates N full-HD (1920x1080) JPEG frames of the invented depot scene, learns a baseline,
then alternates, ROUNDS times each, between

* decode: the frame loader alone (same files, same reduced-scale JPEG decode, the same
  batched iterator with the same number of decoding threads and batch size, same working
  resolution), and
* scan: the whole scan as the command runs it (decode, preparation, health, score, CSV
  rows, overlays of flagged frames, ledger rows and events.csv), default settings
  (condition handling on),

and prints frames/s of both and their ratio (target: >= 0.8 on 2 cores), by wall clock
and per CPU second of this process. Alternating rounds in one run keeps the ratio fair on
a shared, noisy machine.

    python bench/throughput.py [--frames 200] [--rounds 3]
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))  # bench/, for the shared helper
from _frames import add_options, depot_frames, learn_all, work_folder  # noqa: E402

from inspector.config import load_config  # noqa: E402
from inspector.jobs.scan import BATCH, BaselineCache, read_args, run_scan  # noqa: E402
from inspector.storage.frames import discover, iter_batches  # noqa: E402
from inspector.storage.store import Store  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_options(ap, size="1920x1080", normal=120)
    ap.add_argument("--long-side", type=int, default=0,
                    help="working long side (default: the tool's default)")
    args = ap.parse_args(argv)
    with work_folder(args.keep) as work:
        run(work, args.frames, args.rounds, args.normal, args.size, args.long_side)
    return 0


def run(work: Path, n: int, rounds: int, normal: int = 120,
        size: tuple[int, int] = (1920, 1080), long_side: int = 0) -> None:
    # Mostly normal frames, as in a real stream (overlays are drawn for flagged frames only).
    scenario, seconds = depot_frames(work, n, normal, size)
    print(f"{n} + {2 * normal} frames of {size[0]}x{size[1]} ready in {seconds:.1f} s")
    cfg = work / "inspector.toml"
    cfg.write_text(f"[frames]\nlong_side = {long_side}\n" if long_side else "", encoding="utf-8")
    config = load_config(cfg)
    store = Store(work / "store")
    learn_all(scenario.normal, config, store)
    files, _ = discover(scenario.new)
    baselines = BaselineCache(store)
    decode_rates, scan_rates, decode_cpu, scan_cpu = [], [], [], []
    for r in range(rounds):
        t, c = time.perf_counter(), time.process_time()
        count = 0
        for cam in sorted({f.camera for f in files}):
            cam_files = [f for f in files if f.camera == cam]
            for batch in iter_batches(cam_files, BATCH,
                                      **read_args(baselines.get(cam), config)):
                count += len(batch.frames)
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
    print(f"median over {rounds} rounds of {len(files)} frames {size[0]}x{size[1]}: decode "
          f"{d:.1f} frames/s, scan {s:.1f} frames/s, ratio scan/decode {s / d:.2f} "
          f"(target >= 0.8)")
    # Wall-clock rates swing with whatever else the machine runs; frames per CPU second of
    # this process are steadier, so both ratios are printed.
    print(f"per CPU second: decode {med(decode_cpu):.1f}, scan {med(scan_cpu):.1f} frames, "
          f"ratio {med(scan_cpu) / med(decode_cpu):.2f}; load average {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    sys.exit(main())
