"""Where results are written: flagged.csv, all scores, skipped.csv, health.csv, overlays, maps.

The one writer of results, shared by scan and watch (and read back by review). When given
a ledger, every frame scored or skipped is also recorded there (see :mod:`inspector.storage.ledger`);
when given event settings, ``events.csv`` is written on close (see :mod:`inspector.core.events`).
"""

from __future__ import annotations

import csv
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING

import cv2
import numpy as np

from inspector.core.events import EventSettings, FramePoint, group_events, write_events
from inspector.storage.overlay import overlay_caption, render_overlay
from inspector.storage.store import write_json

if TYPE_CHECKING:
    from inspector.storage.ledger import Ledger

#: Columns of flagged.csv and of the all-scores file, in this order.
COLUMNS = ("frame", "camera", "time", "score", "threshold", "p_value", "model", "overlay")
#: Columns of skipped.csv.
SKIP_COLUMNS = ("frame", "camera", "reason")
#: Columns of health.csv: camera health conditions, kept apart from anomalies.
HEALTH_COLUMNS = ("frame", "camera", "time", "condition", "measure", "limit")


def iso_time(t: datetime) -> str:
    """ISO 8601, to the second (milliseconds when the time has them)."""
    return t.isoformat(timespec="milliseconds" if t.microsecond else "seconds")


def format_row(frame: str, camera: str, time: str, score: float, threshold: float,
               p_value: float, model: str, overlay: str) -> tuple[str, ...]:
    """A row of flagged.csv / the all-scores file (``time`` already ISO 8601)."""
    return (frame, camera, time, f"{score:.4f}", f"{threshold:.4f}", f"{p_value:.6g}", model,
            overlay)


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
    health : list of (condition, measure, limit)
        Camera health conditions of the frame (see :mod:`inspector.core.conditions`).
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
    health: list = field(default_factory=list)


def repair_tail(path: Path) -> None:
    """Cut a CSV file back to its last complete line (after a crash mid-write)."""
    try:
        with open(path, "rb+") as fh:
            size = fh.seek(0, os.SEEK_END)
            if size == 0:
                return
            fh.seek(size - 1)
            if fh.read(1) == b"\n":
                return
            keep, step = 0, 4096
            pos = size
            while pos > 0:
                start = max(0, pos - step)
                fh.seek(start)
                chunk = fh.read(pos - start)
                i = chunk.rfind(b"\n")
                if i >= 0:
                    keep = start + i + 1
                    break
                pos = start
            fh.truncate(keep)
    except FileNotFoundError:
        pass


class _Csv:
    def __init__(self, path: Path, columns, append: bool):
        path.parent.mkdir(parents=True, exist_ok=True)
        if append:
            repair_tail(path)
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
    ledger : Ledger, optional
        Also record every frame written (scored, skipped or waiting) in the ledger, by its
        path under ``source``.
    events : EventSettings, optional
        Group the flagged frames of this run into events and write ``events.csv`` on close.
    """

    def __init__(self, out: Path, all_scores: Path | None = None, maps: Path | None = None,
                 append: bool = False, source: Path | None = None, store: Path | None = None,
                 ledger: "Ledger | None" = None, events: EventSettings | None = None):
        self.out = Path(out)
        self.source = Path(source).resolve() if source is not None else None
        self.ledger = ledger
        self.events = events
        self._points: list[FramePoint] = []
        self.out.mkdir(parents=True, exist_ok=True)
        if source is not None:
            write_json(self.out / "run.json", {
                "source": str(Path(source).resolve()),
                "store": str(Path(store).resolve()) if store else "",
                "started": iso_time(datetime.now().astimezone())})
        self.maps = Path(maps) if maps else None
        self.flagged = _Csv(self.out / "flagged.csv", COLUMNS, append)
        self.skipped = _Csv(self.out / "skipped.csv", SKIP_COLUMNS, append)
        self.health_rows = _Csv(self.out / "health.csv", HEALTH_COLUMNS, append)
        self.all_scores = _Csv(Path(all_scores), COLUMNS, append) if all_scores else None
        self._names: set[tuple[str, str]] = set()
        self.counts = {"scored": 0, "flagged": 0, "skipped": 0, "health": 0}

    def _unique(self, kind: str, camera: str, frame: str) -> str:
        stem = Path(frame).stem
        name, k = stem, 1
        while (kind, f"{camera}/{name}") in self._names:
            k += 1
            name = f"{stem}-{k}"
        self._names.add((kind, f"{camera}/{name}"))
        return name

    def write(self, results: Sequence[FrameResult]) -> list[str]:
        """Record scored frames (one ledger transaction for all) and their camera health
        conditions (health.csv); returns their overlay paths ('' where none was written)."""
        overlays = []
        for r in results:
            for condition, measure, limit in r.health:
                self.health(r.frame, r.camera, r.time, condition, measure, limit)
            overlay = self.save_files(r)
            overlays.append(overlay)
            self.add_rows(format_row(r.frame, r.camera, iso_time(r.time), r.score, r.threshold,
                                     r.p_value, r.model, overlay), r.flagged)
            if self.events is not None:
                self._points.append(FramePoint(r.camera, iso_time(r.time), r.frame, r.score,
                                               r.flagged))
        if self.ledger is not None:
            self.ledger.record([dict(self._ledger_file(r.frame), camera=r.camera,
                                     status="scored", score=r.score, threshold=r.threshold,
                                     p_value=r.p_value, flagged=int(r.flagged),
                                     version=r.model, capture_time=iso_time(r.time),
                                     overlay=overlay)
                                for r, overlay in zip(results, overlays)])
        return overlays

    def save_files(self, r: FrameResult) -> str:
        """Write the overlay (flagged frames) and the map file of one scored frame; returns
        the overlay path ('' when none). No CSV row is written."""
        overlay = ""
        if r.flagged:
            name = self._unique("overlay", r.camera, r.frame)
            path = self.out / "overlays" / r.camera / f"{name}.jpg"
            path.parent.mkdir(parents=True, exist_ok=True)
            caption = overlay_caption(r.camera, iso_time(r.time), r.score, r.threshold)
            cv2.imwrite(str(path), render_overlay(r.image, r.amap, r.threshold, caption),
                        [cv2.IMWRITE_JPEG_QUALITY, 90])
            overlay = path.as_posix()
        if self.maps is not None:
            name = self._unique("map", r.camera, r.frame)
            path = self.maps / r.camera / f"{name}.npy"
            path.parent.mkdir(parents=True, exist_ok=True)
            np.save(path, np.asarray(r.amap, np.float32), allow_pickle=False)
        return overlay

    def add_rows(self, row: tuple[str, ...], flagged: bool) -> None:
        """Append a scored frame's row (see :func:`format_row`) to the CSV files."""
        if flagged:
            self.flagged.row(row)
            self.counts["flagged"] += 1
        if self.all_scores:
            self.all_scores.row(row)
        self.counts["scored"] += 1

    def skip(self, frame: str, camera: str, reason: str, waiting: bool = False) -> None:
        """Record a frame that could not be scored, with the reason. ``waiting``: the camera
        has no baseline yet (the ledger keeps the frame for a later watch to score)."""
        self.skipped.row((frame, camera, reason))
        self.counts["skipped"] += 1
        if self.ledger is not None:
            self.ledger.record([dict(self._ledger_file(frame), camera=camera, reason=reason,
                                     status="waiting" if waiting else "skipped")])

    def _ledger_file(self, rel: str) -> dict:
        from inspector.storage.ledger import now_iso

        path = (self.source / rel) if self.source is not None else Path(rel).resolve()
        try:
            st = os.stat(path)
            size, mtime = st.st_size, st.st_mtime
        except OSError:
            size = mtime = None
        now = now_iso()
        return {"path": str(path), "rel": rel, "size": size, "mtime": mtime, "seen_at": now,
                "scored_at": now, "written": 1}

    def health(self, frame: str, camera: str, time: datetime, condition: str,
               measure: float, limit: float) -> None:
        """Record a camera health condition of a frame in health.csv."""
        self.health_rows.row((frame, camera, iso_time(time), condition, f"{measure:.4g}",
                              f"{limit:.4g}"))
        self.counts["health"] += 1

    def close(self) -> None:
        if self.events is not None:
            write_events(self.out / "events.csv", group_events(self._points, self.events))
        for f in (self.flagged, self.skipped, self.health_rows, self.all_scores):
            if f:
                f.close()

    def __enter__(self) -> "ResultWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
