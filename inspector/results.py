"""Where results are written: flagged.csv, all scores, skipped.csv, overlays and maps.

The one writer of results, shared by scan and watch (and read back by review).
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import cv2
import numpy as np

from inspector.overlay import render_overlay
from inspector.store import write_json

#: Columns of flagged.csv and of the all-scores file, in this order.
COLUMNS = ("frame", "camera", "time", "score", "threshold", "p_value", "model", "overlay")
#: Columns of skipped.csv.
SKIP_COLUMNS = ("frame", "camera", "reason")


def iso_time(t: datetime) -> str:
    """ISO 8601, to the second (milliseconds when the time has them)."""
    return t.isoformat(timespec="milliseconds" if t.microsecond else "seconds")


@dataclass
class FrameResult:
    """One scored frame.

    Attributes
    ----------
    frame : str
        Path relative to the scanned folder, forward slashes.
    image : ndarray, shape (H, W, 3), uint8
        The frame at working resolution (for the overlay).
    amap : ndarray, shape (h, w), float32
        Anomaly map.
    """

    frame: str
    camera: str
    time: datetime
    score: float
    threshold: float
    p_value: float
    model: str
    flagged: bool
    image: np.ndarray
    amap: np.ndarray


class _Csv:
    def __init__(self, path: Path, columns, append: bool):
        path.parent.mkdir(parents=True, exist_ok=True)
        fresh = not append or not path.exists() or path.stat().st_size == 0
        self.fh = open(path, "a" if append else "w", newline="", encoding="utf-8")
        self.writer = csv.writer(self.fh)
        if fresh:
            self.writer.writerow(columns)
            self.fh.flush()

    def row(self, values) -> None:
        self.writer.writerow(values)
        self.fh.flush()

    def close(self) -> None:
        self.fh.close()


class ResultWriter:
    """Writes every output of a run into ``out``.

    Parameters
    ----------
    out : Path
        ``flagged.csv``, ``skipped.csv`` and ``overlays/<camera>/<stem>.jpg`` go here.
    all_scores : Path, optional
        Also write a row (same columns) for every frame scored.
    maps : Path, optional
        Also write ``<camera>/<stem>.npy``: the float32 anomaly map of every frame scored.
    append : bool
        Add to existing files (watch) instead of starting them anew (scan).
    source, store : Path, optional
        Recorded in ``run.json`` so that review can find the frames and baselines again.
    """

    def __init__(self, out: Path, all_scores: Path | None = None, maps: Path | None = None,
                 append: bool = False, source: Path | None = None, store: Path | None = None):
        self.out = Path(out)
        self.out.mkdir(parents=True, exist_ok=True)
        if source is not None:
            write_json(self.out / "run.json", {
                "source": str(Path(source).resolve()),
                "store": str(Path(store).resolve()) if store else "",
                "started": iso_time(datetime.now().astimezone())})
        self.maps = Path(maps) if maps else None
        self.flagged = _Csv(self.out / "flagged.csv", COLUMNS, append)
        self.skipped = _Csv(self.out / "skipped.csv", SKIP_COLUMNS, append)
        self.all_scores = _Csv(Path(all_scores), COLUMNS, append) if all_scores else None
        self._names: set[tuple[str, str]] = set()
        self.counts = {"scored": 0, "flagged": 0, "skipped": 0}

    def _unique(self, kind: str, camera: str, frame: str) -> str:
        stem = Path(frame).stem
        name, k = stem, 1
        while (kind, f"{camera}/{name}") in self._names:
            k += 1
            name = f"{stem}-{k}"
        self._names.add((kind, f"{camera}/{name}"))
        return name

    def write(self, r: FrameResult) -> str:
        """Record one scored frame; returns the overlay path ('' when none was written)."""
        overlay = ""
        if r.flagged:
            name = self._unique("overlay", r.camera, r.frame)
            path = self.out / "overlays" / r.camera / f"{name}.jpg"
            path.parent.mkdir(parents=True, exist_ok=True)
            caption = (f"{r.camera}  {iso_time(r.time)}  score {r.score:.2f} > "
                       f"threshold {r.threshold:.2f}")
            cv2.imwrite(str(path), render_overlay(r.image, r.amap, r.threshold, caption),
                        [cv2.IMWRITE_JPEG_QUALITY, 90])
            overlay = path.as_posix()
        row = (r.frame, r.camera, iso_time(r.time), f"{r.score:.4f}", f"{r.threshold:.4f}",
               f"{r.p_value:.6g}", r.model, overlay)
        if r.flagged:
            self.flagged.row(row)
            self.counts["flagged"] += 1
        if self.all_scores:
            self.all_scores.row(row)
        if self.maps is not None:
            name = self._unique("map", r.camera, r.frame)
            path = self.maps / r.camera / f"{name}.npy"
            path.parent.mkdir(parents=True, exist_ok=True)
            np.save(path, np.asarray(r.amap, np.float32), allow_pickle=False)
        self.counts["scored"] += 1
        return overlay

    def skip(self, frame: str, camera: str, reason: str) -> None:
        """Record a frame that could not be scored, with the reason."""
        self.skipped.row((frame, camera, reason))
        self.counts["skipped"] += 1

    def close(self) -> None:
        for f in (self.flagged, self.skipped, self.all_scores):
            if f:
                f.close()

    def __enter__(self) -> "ResultWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
