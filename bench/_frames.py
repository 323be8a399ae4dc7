"""What the speed benches share: a work folder, the invented depot's frames at a given size,
and baselines learnt from them (``throughput.py``, ``cluster.py``, ``learn_speed.py``).

The tool is imported only by the functions that use it, so that a script's child process
measuring peak memory (``learn_speed.py``) loads no more than it did on its own."""

from __future__ import annotations

import shutil
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from types import SimpleNamespace

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def add_options(ap, size: str, normal: int, frames: int = 200) -> None:
    """``--frames``, ``--normal``, ``--rounds``, ``--size`` and ``--keep`` of a bench that
    scans the depot's frames, with its default frame size ``"WxH"``, normal frames and
    frames to scan."""
    ap.add_argument("--frames", type=int, default=frames,
                    help=f"frames to scan (two cameras; default {frames})")
    ap.add_argument("--normal", type=int, default=normal,
                    help="normal frames per camera to learn from")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--size", default=size, type=frame_size,
                    help=f"exported frame size, WxH (default {size})")
    ap.add_argument("--keep", type=Path, help="work folder to keep (default: a temp folder)")


def frame_size(text: str) -> tuple[int, int]:
    """``"1920x1080"`` -> ``(1920, 1080)`` (width, height), for ``--size``."""
    w, h = (int(v) for v in text.lower().split("x"))
    return w, h


@contextmanager
def work_folder(keep: Path | None, prefix: str = "inspector-bench-") -> Iterator[Path]:
    """``keep`` (left in place, reused by the next run) or a temporary folder removed at the
    end."""
    work = keep or Path(tempfile.mkdtemp(prefix=prefix))
    try:
        yield work
    finally:
        if not keep:
            shutil.rmtree(work, ignore_errors=True)


def depot_frames(work: Path, n: int, normal: int, size: tuple[int, int]
                 ) -> tuple[SimpleNamespace, float]:
    """The depot's two cameras under ``work/frames``: ``normal`` frames each to learn from and
    ``n`` to scan in all, mostly normal (5 % incidents), as in a real stream; frames already
    there (a kept work folder) are reused when they are as many and as large as asked, else
    drawn again. Returns the folders (``.normal``, ``.new``) and the seconds it took."""
    from inspector.demo.scenario import CAMERAS, generate

    started = time.perf_counter()
    frames = work / "frames"
    per_camera = max(1, n // 2)
    if not _holds(frames, CAMERAS, normal, per_camera, size):
        generate(frames, seed=1, normal_per_camera=normal, new_per_camera=per_camera,
                 incident_fraction=0.05, size=size)
    return (SimpleNamespace(normal=frames / "normal", new=frames / "new"),
            time.perf_counter() - started)


def _holds(frames: Path, cameras, normal: int, new: int, size: tuple[int, int]) -> bool:
    """Whether a kept folder of the depot's frames has ``normal`` and ``new`` frames of
    ``size`` (width, height) for each camera."""
    from inspector.storage.frames import image_size

    for camera in cameras:
        for split, count in (("normal", normal), ("new", new)):
            files = sorted((frames / split / camera).glob("*.jpg"))
            if len(files) != count or image_size(files[0]) != size:
                return False
    return True


def learn_all(folder: Path, config, store) -> list:
    """Learn every camera under ``folder`` into ``store`` (an ``inspector.config.Config``
    and an ``inspector.storage.store.Store``), one line printed per camera."""
    from inspector.jobs.learn import learn_cameras
    from inspector.storage.frames import discover

    files, _ = discover(folder)
    reports = []
    for report in learn_cameras(files, config, store):
        print(f"learnt {report.camera} from {report.frames} frames in {report.seconds:.1f} s")
        reports.append(report)
    return reports
