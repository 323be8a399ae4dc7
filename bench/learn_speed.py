"""``learn`` (PPCA) against decoding alone, on full-HD JPEGs of one camera, side by side.

Writes synthetic 1920x1080 JPEG frames of one camera (a photograph bundled with
scikit-image, enlarged, with sensor noise, a small gain change per frame and a slow change
of light) to a temporary folder, then for each number of frames N runs, each in a fresh
process so that peak memory is its own:

* decode: the frames read as ``learn`` reads them (same reader, same reduced-scale decode,
  same working size), nothing else;
* learn: ``learn`` with the default settings (conditions, text mask, PPCA, calibration).

and prints both wall times, their ratio (target: <= 3), the ratio of their CPU seconds
(steadier than wall time on a shared machine), learn's peak resident memory (target:
<= 1 GB, not growing with N) and the load average.

On a shared machine wall time says little about the wall time on an idle one, and the CPU
ratio misses what the wall ratio is about: stretches where the run has less work ready
than there are cores. So each child also samples its own threads (Linux ``/proc``, every
20 ms): how many are running or ready to run, and the CPU time spent since the last sample.
A stretch in which ``k`` threads were ready would have run on ``min(k, cores)`` idle cores:
its CPU seconds over that count, summed, estimate the wall time on an idle machine
("idle s", and their ratio "idle ratio"); the part above CPU / cores is the time a core
would wait ("1-core s" of learn). It errs on the quick side: on a busy machine a thread
that wakes to wait for Python's lock is ready (waiting for a core) most of the time, while
on an idle one it would sleep, and memory bandwidth shared between the cores is not
modelled; so it finds stretches where work is missing, and does not replace a run on an
idle machine (at load 17, learn 2,000 frames: idle ratio 3.17 against the 3.45-3.86 wall
ratio measured on 0.8 at load 1-3). The sampler's own CPU is taken out of the CPU
figures.

    python bench/learn_speed.py [--frames 500,2000] [--size 1920x1080] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from datetime import datetime, timedelta
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))  # bench/, for the shared helper
from _frames import frame_size, work_folder  # noqa: E402


def write_frames(folder: Path, n: int, size: tuple[int, int]) -> None:
    """n JPEG frames (quality 90) of one camera, one a minute, named by capture time."""
    import cv2
    import numpy as np
    from skimage import data

    folder.mkdir(parents=True, exist_ok=True)
    have = len(list(folder.glob("*.jpg")))
    w, h = size
    base = cv2.resize(data.astronaut(), (w, h), interpolation=cv2.INTER_LINEAR)
    base = base[..., ::-1].astype(np.float32)  # BGR for imwrite
    ramp = np.linspace(-1, 1, w, dtype=np.float32)[None, :, None]
    rng = np.random.default_rng(have)
    noise = rng.normal(0, 3, (8, h, w, 3)).astype(np.float32)  # a few fields, reused
    t0 = datetime(2026, 11, 2, 6, 0)
    for i in range(have, n):
        light = (1 + 0.1 * (i / max(n, 1)) * ramp) * (1 + 0.02 * rng.standard_normal())
        img = np.clip(base * light + noise[i % len(noise)], 0, 255).astype(np.uint8)
        t = t0 + timedelta(minutes=i)
        cv2.imwrite(str(folder / f"cam_{t:%Y%m%d_%H%M%S}.jpg"), img,
                    [cv2.IMWRITE_JPEG_QUALITY, 90])


def _child(mode: str, folder: str, n: int) -> None:
    """Run in a fresh process: decode or learn the first n frames; print JSON."""
    from inspector.config import load_config
    from inspector.jobs.learn import FileSource, learn_camera
    from inspector.storage.frames import discover, read_settings, working_size
    from inspector.storage.store import Store

    config = load_config(None)
    files, _ = discover(Path(folder), camera="cam")
    files = sorted(files, key=lambda f: f.path.name)[:n]
    cfg = config.camera("cam")
    use = CoreUse()
    started, cpu = time.perf_counter(), time.process_time()
    if mode == "decode":
        import cv2

        h, w = cv2.imread(str(files[0].path), cv2.IMREAD_REDUCED_COLOR_2).shape[:2]
        size = working_size((2 * w, 2 * h), cfg.frames.long_side)
        source = FileSource(files, [0] * len(files), size, (2 * w, 2 * h),
                            read_settings(cfg.frames), "cam")
        count = sum(len(idx) for idx, _ in source.batches(range(len(files))))
    else:
        with tempfile.TemporaryDirectory() as store:
            report = learn_camera(files, cfg, Store(store))
            count = report.frames
    seconds, cpu = time.perf_counter() - started, time.process_time() - cpu
    idle, waiting, own = use.stop()
    peak = peak_mb()
    print(json.dumps({"frames": count, "seconds": seconds, "cpu": cpu - own, "peak_mb": peak,
                      "idle_s": idle, "one_core_s": waiting}))


class CoreUse:
    """Samples this process's threads in a thread of its own (see the module notes): the
    estimated wall time on ``cores`` idle cores, how much of it a core would wait, and the
    sampler's own CPU seconds (:meth:`stop`)."""

    def __init__(self, interval: float = 0.02, cores: int | None = None):
        self.cores = cores or os.cpu_count() or 1
        self.interval = interval
        self._halt = threading.Event()
        self._idle = self._waiting = self._own = 0.0
        self._thread = threading.Thread(target=self._run, name="core use", daemon=True)
        self._thread.start()

    def _ready(self, me: int) -> int:
        """Threads of this process running or ready to run, the sampler left out."""
        n = 0
        for tid in os.listdir("/proc/self/task"):
            if int(tid) == me:
                continue
            try:
                with open(f"/proc/self/task/{tid}/stat") as fh:
                    stat = fh.read()
            except OSError:  # (ended meanwhile)
                continue
            n += stat[stat.rfind(")") + 2] == "R"
        return n

    def _run(self) -> None:
        if not os.path.isdir("/proc/self/task"):  # (not Linux: no estimate)
            self._idle = self._waiting = float("nan")
            return
        me = threading.get_native_id()
        own = time.thread_time()
        last = time.process_time()
        while not self._halt.wait(self.interval):
            ready = self._ready(me)
            mine = time.thread_time()
            cpu = time.process_time()
            spent = cpu - last - (mine - own)  # the others' CPU since the last sample
            own, last = mine, cpu
            k = min(max(ready, 1), self.cores)
            self._idle += spent / k
            self._waiting += spent / k - spent / self.cores
        self._own = time.thread_time()

    def stop(self) -> tuple[float, float, float]:
        """(idle-machine wall s, of it s with a core waiting, sampler CPU s)."""
        self._halt.set()
        self._thread.join()
        return self._idle, self._waiting, self._own


def peak_mb() -> float:
    """Peak resident memory of this process in MB: VmHWM of its own address space. Not
    ``getrusage``'s ru_maxrss: on Linux that survives exec, so a child started by a large
    parent reports at least the parent's size at the fork."""
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024  # kB -> MB
    import resource  # not Linux: the best there is

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def measure(mode: str, folder: Path, n: int) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", mode, str(folder), str(n)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", default="500,2000")
    ap.add_argument("--size", default="1920x1080", type=frame_size,
                    help="exported frame size, WxH")
    ap.add_argument("--keep", type=Path, help="frame folder to keep and reuse")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        _child(args.child[0], args.child[1], int(args.child[2]))
        return
    counts = [int(v) for v in args.frames.split(",")]
    size = args.size
    with work_folder(args.keep, prefix="inspector-learn-bench-") as work:
        t = time.perf_counter()
        write_frames(work / "cam", max(counts), size)
        print(f"{max(counts)} frames of {size[0]}x{size[1]} ready in "
              f"{time.perf_counter() - t:.0f} s")
        print(f"{'frames':>7}{'decode s':>10}{'learn s':>9}{'ratio':>7}{'CPU ratio':>10}"
              f"{'idle ratio':>11}{'1-core s':>9}"
              f"{'learn peak MB':>15}{'decode peak MB':>16}{'load':>6}")
        for n in counts:
            d = measure("decode", work / "cam", n)
            le = measure("learn", work / "cam", n)
            print(f"{n:>7}{d['seconds']:>10.1f}{le['seconds']:>9.1f}"
                  f"{le['seconds'] / d['seconds']:>7.2f}{le['cpu'] / d['cpu']:>10.2f}"
                  f"{le['idle_s'] / max(d['idle_s'], 1e-9):>11.2f}{le['one_core_s']:>9.2f}"
                  f"{le['peak_mb']:>15.0f}{d['peak_mb']:>16.0f}{os.getloadavg()[0]:>6.1f}",
                  flush=True)


if __name__ == "__main__":
    main()
