"""Scan throughput on a Dask cluster with 1 and 2 local workers, and the speed-up.

Generates N frames of the invented depot scene (two cameras), learns their baselines on
this machine, then scans the same frames, ROUNDS times each, alternating between

* in-process: the scan as it runs without ``--scheduler`` (for reference),
* 1 worker: a ``distributed.LocalCluster`` with one single-threaded worker process,
* 2 workers: the same cluster scaled to two,

every scan the whole command's work (decode and score in the workers, CSV rows, overlays,
ledger rows and events.csv by the one writer here), and prints the median frames/s of each
and the speed-up of 2 workers over 1. Then it times the one writer alone (the scored
results replayed into a fresh results folder and ledger): the most frames per second one
driver can take in, however many workers score. The workers' first baseline loads are in the first
round; the median leaves them out. On a machine with fewer free cores than workers the
speed-up says so.

    python bench/cluster.py [--frames 200] [--rounds 3] [--size 960x540]
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
from inspector.jobs.cluster import partitions, score_part  # noqa: E402
from inspector.jobs.scan import run_scan  # noqa: E402
from inspector.storage.frames import discover  # noqa: E402
from inspector.storage.ledger import Ledger  # noqa: E402
from inspector.storage.results import ResultWriter  # noqa: E402
from inspector.storage.store import Store  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    add_options(ap, size="960x540", normal=60)
    ap.add_argument("--config", type=Path, help="TOML config (default: built-in settings)")
    args = ap.parse_args()
    with work_folder(args.keep) as work:
        run(work, args.frames, args.rounds, args.size, args.normal, args.config)


def run(work: Path, n: int, rounds: int, size: tuple[int, int], normal: int = 60,
        config_path: Path | None = None) -> None:
    from distributed import Client, LocalCluster

    scenario, seconds = depot_frames(work, n, normal, size)
    print(f"generated {n} + {2 * normal} frames {size[0]}x{size[1]} in {seconds:.1f} s")
    config = load_config(config_path)
    store = Store(work / "store")
    learn_all(scenario.normal, config, store)
    rates: dict[str, list[float]] = {"in-process": [], "1 worker": [], "2 workers": []}
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                      dashboard_address=None, silence_logs=40) as cluster, \
            Client(cluster) as client:
        for r in range(rounds):
            for name, workers in (("in-process", 0), ("1 worker", 1), ("2 workers", 2)):
                if workers:
                    cluster.scale(workers)
                    client.wait_for_workers(workers)
                    while len(client.scheduler_info()["workers"]) > workers:
                        time.sleep(0.1)
                out = work / f"out-{r}-{workers}"
                t = time.perf_counter()
                summary = run_scan(scenario.new, config, store, out, out / "all.csv",
                                   client=client if workers else None)
                rates[name].append(summary.scored / (time.perf_counter() - t))
            print(f"round {r + 1}: " + ", ".join(f"{k} {v[-1]:.1f}" for k, v in rates.items())
                  + " frames/s")
    # The driver's share alone: every partition's results, scored here beforehand, replayed
    # into the one writer (CSV rows, overlays, maps of nothing, ledger rows, events.csv).
    files, _ = discover(scenario.new)
    root = str(store.root.resolve())
    records = [score_part(p, root, config, 8)[0] for p in partitions(files, store, 64)]
    out = work / "out-writer"
    t = time.perf_counter()
    with Ledger(work / "writer.sqlite") as ledger, \
            ResultWriter(out, out / "all.csv", source=scenario.new, store=store.root,
                         ledger=ledger, events=config.events) as writer:
        for record in records:
            record.replay(writer)
    writer_rate = writer.counts["scored"] / (time.perf_counter() - t)
    sent = [r.amap.nbytes + r.image.nbytes for rec in records for results, _, _ in rec.calls
            for r in results]
    med = {k: statistics.median(v) for k, v in rates.items()}
    print(f"median over {rounds} rounds of {summary.scored} frames: "
          + ", ".join(f"{k} {v:.1f} frames/s" for k, v in med.items()))
    print(f"the one writer alone (results replayed, {writer.counts['flagged']} flagged): "
          f"{writer_rate:.0f} frames/s, the most one driver takes in; arrays sent back "
          f"{statistics.mean(sent) / 1024:.1f} KiB a frame on average")
    print(f"speed-up of 2 workers over 1: {med['2 workers'] / med['1 worker']:.2f} "
          f"(cores {os.cpu_count()}, load average {os.getloadavg()[0]:.1f})")


if __name__ == "__main__":
    main()
