"""Watch latency under a sustained stream: 20 frames/s over 4 cameras for 60 s (defaults).

Run from the repository root: ``python bench/watch_latency.py [--rate 20] [--seconds 60]``.

Baselines of the two committed sample cameras (``sample_frames/normal``) are learnt once
and copied to two more cameras, so four cameras stream at once. A watcher runs as its own
process (``python -m inspector watch``); this script writes the committed ``new`` frames
into the watched folder round-robin over the cameras at a steady rate, each file written
in place (so the watcher must wait for it to settle), and notes the wall-clock time each
file was complete (closed). Latency is that time to the ledger row's ``scored_at``.

Prints p50 / p95 / max latency, the ratio of p95 to the target (settle + 0.5 s; at most 1
meets it), and whether the backlog grew: the number of frames written but not yet in the
ledger, sampled every second, compared between the second and the last quarter of the run.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from inspector.cli import main as cli  # noqa: E402

SAMPLES = ROOT / "sample_frames"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rate", type=float, default=20.0, help="frames per second, all cameras")
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--cameras", type=int, default=4)
    ap.add_argument("--settle", type=float, default=1.0)
    ap.add_argument("--long-side", type=int, default=0,
                    help="working long side (default: the tool's default)")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args(argv)

    tmp = Path(tempfile.mkdtemp(prefix="watch-bench-"))
    try:
        run(args, tmp)
    finally:
        if args.keep:
            print(f"kept {tmp}")
        else:
            shutil.rmtree(tmp, ignore_errors=True)
    return 0


def peak_rss(pid: int) -> int:
    """Peak resident memory of a running process in bytes (Linux ``VmHWM``), 0 if unknown."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    return 0


def run(args, tmp: Path) -> None:
    cfg = tmp / "inspector.toml"
    lines = [f"[watch]\nsettle = {args.settle}\n"]
    if args.long_side:
        lines.append(f"[frames]\nlong_side = {args.long_side}\n")
    cfg.write_text("".join(lines), encoding="utf-8")
    store = tmp / "store"
    t0 = time.perf_counter()
    rc = cli.main(["learn", str(SAMPLES / "normal"), "--store", str(store), "--config",
                   str(cfg)])
    assert rc == 0
    print(f"learnt 2 baselines in {time.perf_counter() - t0:.0f} s")
    base_cams = ["dock", "aisle"]
    cams = [f"{base_cams[i % 2]}{'' if i < 2 else i // 2 + 1}" for i in range(args.cameras)]
    for cam in cams[2:]:  # the same baseline under another camera's name
        shutil.copytree(store / base_cams[cams.index(cam) % 2], store / cam)
    pool = {cam: [p.read_bytes() for p in sorted((SAMPLES / "new" / base_cams[i % 2]).iterdir())]
            for i, cam in enumerate(cams)}

    src, out = tmp / "src", tmp / "out"
    for cam in cams:
        (src / cam).mkdir(parents=True)
    proc = subprocess.Popen([sys.executable, "-m", "inspector", "watch", str(src), "--store",
                             str(store), "--config", str(cfg), "--out", str(out),
                             "--idle-exit", "5"], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)
    first = proc.stdout.readline()
    assert "watching" in first, first
    log: list[str] = []
    reader = threading.Thread(target=lambda: log.extend(proc.stdout), daemon=True)
    reader.start()
    time.sleep(1.0)

    complete: dict[str, float] = {}
    backlog: list[tuple[float, int]] = []
    db = store / "inspector.sqlite"
    total = int(args.rate * args.seconds)
    start = time.time()
    clock = datetime(2026, 12, 1, 8, 0, 0)
    next_sample = start
    peak = 0
    for k in range(total):
        due = start + k / args.rate
        while True:
            now = time.time()
            if now >= next_sample:
                backlog.append((now - start, len(complete) - count(db)))
                peak = max(peak, peak_rss(proc.pid))
                next_sample += 1.0
            if now >= due:
                break
            time.sleep(min(0.01, due - now))
        cam = cams[k % len(cams)]
        data = pool[cam][(k // len(cams)) % len(pool[cam])]
        stamp = clock + timedelta(seconds=k / args.rate)
        rel = f"{cam}/{cam}_{stamp:%Y%m%d_%H%M%S}_{k:06d}.jpg"
        with open(src / rel, "wb") as fh:
            fh.write(data)
        complete[rel] = time.time()
    wrote = time.time() - start
    while proc.poll() is None:  # the watcher's peak memory until it leaves
        peak = max(peak, peak_rss(proc.pid))
        time.sleep(0.2)
    proc.wait(timeout=600)
    reader.join(timeout=5)

    con = sqlite3.connect(db)
    rows = con.execute("SELECT rel, status, scored_at FROM frames").fetchall()
    con.close()
    lat = []
    for rel, status, scored_at in rows:
        if rel in complete and status == "scored":
            done = datetime.fromisoformat(scored_at).timestamp()
            lat.append(done - complete[rel])
    lat = np.array(lat)
    missing = len(complete) - len(lat)
    target = args.settle + 0.5
    p50, p95, mx = np.percentile(lat, 50), np.percentile(lat, 95), lat.max()
    q = len(backlog) // 4
    early = np.mean([b for _, b in backlog[q:2 * q]]) if q else 0.0
    late = np.mean([b for _, b in backlog[3 * q:]]) if q else 0.0
    grew = late > early + args.rate  # more than a second's worth of frames
    print(json.dumps({"frames": len(complete), "cameras": len(cams), "rate": args.rate,
                      "written_in_s": round(wrote, 1), "not_scored": missing,
                      "settle_s": args.settle, "long_side": args.long_side or "default"}))
    print(f"latency file complete -> ledger row: p50 {p50:.2f} s  p95 {p95:.2f} s  "
          f"max {mx:.2f} s")
    print(f"p95 / target (settle + 0.5 s = {target:.1f} s): {p95 / target:.2f} "
          f"({'meets' if p95 <= target else 'misses'} the target)")
    print(f"backlog (frames written, not yet scored): mean {early:.1f} in the 2nd quarter, "
          f"{late:.1f} in the last quarter; backlog grew: {'yes' if grew else 'no'}")
    print(f"watcher peak resident memory: {peak / 2**20:.0f} MiB; peak / 1 GiB = "
          f"{peak / 2**30:.2f} ({'meets' if peak <= 2**30 else 'misses'} the 1 GB target)")
    lag_lines = [ln.strip() for ln in log if "lag:" in ln]
    if lag_lines:
        print(f"watcher logged lag {len(lag_lines)} times, last: {lag_lines[-1]}")


def count(db: Path) -> int:
    if not db.exists():
        return 0
    try:
        con = sqlite3.connect(db, timeout=5)
        try:
            return con.execute("SELECT COUNT(*) FROM frames").fetchone()[0]
        finally:
            con.close()
    except sqlite3.OperationalError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
