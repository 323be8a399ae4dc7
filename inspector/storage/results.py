"""Where results are written: flagged.csv, all scores, skipped.csv, health.csv, events.csv,
overlays, maps, and the frame ledger.

:class:`ResultWriter` is the one writer of results, shared by scan and watch (and read back
by review). One batch of frames goes through it in this order:

1. overlays and map files of the scored frames;
2. one ledger transaction with every frame's row, marked not yet ``written`` (with a
   ledger; see :mod:`inspector.storage.ledger`);
3. the CSV rows: each scored frame's in flagged.csv, the all-scores file and health.csv,
   then the frames not scored in skipped.csv;
4. the ledger rows marked ``written``.

A crash between 2 and 4 leaves rows not marked written; :meth:`ResultWriter.reconcile`
(run when a watch starts) appends the CSV rows that are missing, so no row is lost or
doubled. ``events.csv`` is regrouped by :func:`inspector.core.events.group_events` for the
cameras with new scored frames and rewritten atomically.
"""

from __future__ import annotations

import csv
import io
import json
import os
import threading
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING

import cv2
import numpy as np

from inspector.clock import iso_time, now, now_iso
from inspector.core.events import (
    EVENT_COLUMNS,
    Event,
    EventSettings,
    FramePoint,
    group_events,
)
from inspector.storage.frames import Skip
from inspector.storage.overlay import overlay_caption, render_overlay
from inspector.storage.store import write_atomic, write_json

if TYPE_CHECKING:
    from inspector.storage.ledger import Ledger

#: Columns of flagged.csv and of the all-scores file, in this order.
#: ``baseline`` is the baseline version that scored the frame (files written before it was
#: named so call the column ``model``; readers accept both, see :data:`OLD_COLUMNS`).
#: ``noise_amplified``: for a frame darker than every normal frame, its gain over the largest
#: gain of the normal frames, by which its noise was taken as amplified (it was judged less
#: sharply, outside the guaranteed false-alarm rate; see
#: :meth:`inspector.core.conditions.Conditions.noise_scale`); empty for the others. Files
#: written before it have no such column; a watch appending to one adds it.
COLUMNS = ("frame", "camera", "time", "score", "threshold", "p_value", "baseline", "overlay",
           "noise_amplified")
#: Former names of columns, for readers of results folders written before a rename.
OLD_COLUMNS = {"baseline": "model"}
#: Columns of skipped.csv.
SKIP_COLUMNS = ("frame", "camera", "reason")
#: Columns of health.csv: camera health conditions, kept apart from anomalies.
HEALTH_COLUMNS = ("frame", "camera", "time", "condition", "measure", "limit")


def format_row(frame: str, camera: str, time: str, score: float, threshold: float,
               p_value: float, baseline: str, overlay: str, noise: float | None = None
               ) -> tuple[str, ...]:
    """A row of flagged.csv / the all-scores file (``time`` already ISO 8601; ``noise``:
    the ``noise_amplified`` column, None for none)."""
    return (frame, camera, time, f"{score:.4f}", f"{threshold:.4f}", f"{p_value:.6g}", baseline,
            overlay, "" if noise is None else f"{noise:.4f}")


#: A frame whose gain is this many times the learnt one or more is counted apart in the
#: summary's note on amplified noise: its noise variance is then at least 2.25 times what
#: the model learnt (a reporting boundary that tells a few barely darker frames from many
#: much darker ones; it changes no score).
STRONGLY_AMPLIFIED = 1.5


@dataclass
class Amplified:
    """The frames of one camera judged with amplified noise in a run, as the summary names
    them: how many, the largest gain over the learnt one, how many at or above
    :data:`STRONGLY_AMPLIFIED` times it, and the learnt gain."""

    frames: int = 0
    largest: float = 0.0
    strongly: int = 0
    learnt: float = 0.0

    def add(self, amplified: tuple[float, float]) -> None:
        """Count one frame's (gain, learnt gain)."""
        ratio = amplified[0] / amplified[1]
        self.frames += 1
        self.largest = max(self.largest, ratio)
        self.strongly += ratio >= STRONGLY_AMPLIFIED
        self.learnt = amplified[1]


def since_text(r: "FrameResult") -> str:
    """ISO 8601 time since which a flagged frame's persistent region has stayed ('' if none)."""
    return iso_time(r.since) if r.since is not None and r.flagged else ""


@dataclass
class FrameResult:
    """One scored frame.

    Attributes
    ----------
    frame : str
        Path relative to the scanned folder, forward slashes.
    version : str
        The baseline version that scored the frame (column ``baseline``, the ledger's
        ``version``).
    image : ndarray, shape (H, W, 3), uint8
        The frame at working resolution (for the overlay).
    amap : ndarray, shape (h, w), float32
        Anomaly map.
    health : list of (condition, measure, limit)
        Camera health conditions of the frame (see :mod:`inspector.core.conditions`).
    mask : ndarray, shape (H, W), bool, or None
        Pixels the baseline ignores (shown hatched on the overlay).
    amplified : (float, float) or None
        (gain, largest gain of the normal frames) of a frame darker than every normal
        frame, judged with its noise amplified by their ratio
        (:meth:`inspector.core.conditions.Conditions.noise_scale`); None for the others.
    clipped : ndarray, shape (H, W), uint8, or None
        Pixels clipped white whose light the model saw as a prediction (nonzero, as
        aligned; shown hatched on the overlay).
    cells : ndarray, shape (h, w), float32, or None
        The frame's :meth:`~inspector.core.persistence.Persistence.cells`, for persistence
        applied later (a cluster's driver); None when not used.
    """

    frame: str
    camera: str
    time: datetime
    score: float
    threshold: float
    p_value: float
    version: str
    flagged: bool
    image: np.ndarray
    amap: np.ndarray
    health: list = field(default_factory=list)
    mask: np.ndarray | None = None
    #: Persistence (busy cameras): since when the flagged region has stayed, else None.
    since: datetime | None = None
    amplified: tuple[float, float] | None = None
    clipped: np.ndarray | None = None
    cells: np.ndarray | None = None

    @property
    def noise_amplified(self) -> float | None:
        """The ``noise_amplified`` column: gain over the largest normal one, or None."""
        return None if self.amplified is None else self.amplified[0] / self.amplified[1]


def overlay_picture(r: FrameResult) -> np.ndarray:
    """The overlay of a scored frame with its caption (:func:`result_caption`), BGR (ready
    for ``cv2.imwrite``): the one drawing of a result, for the writer and the review page
    alike."""
    share = clipped_share(r)
    return render_overlay(r.image, r.amap, r.threshold, result_caption(r, share), r.mask,
                          r.clipped if share else None)


def result_caption(r: FrameResult, share: float | None = None) -> str:
    """The caption of a scored frame's overlay (:func:`overlay_caption`); ``share`` is
    :func:`clipped_share` of ``r`` when the caller has it already."""
    return overlay_caption(r.camera, iso_time(r.time), r.score, r.threshold,
                           (r.time - r.since).total_seconds() if r.since else None,
                           r.amplified, clipped_share(r) if share is None else share,
                           tuple(c for c, _, _ in r.health))


def clipped_share(r: FrameResult) -> float:
    """Share of the view whose light the model saw as a prediction (clipped white)."""
    if r.clipped is None or not r.clipped.size:
        return 0.0
    return cv2.countNonZero(np.asarray(r.clipped, np.uint8)) / r.clipped.size


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


def add_columns(path: Path, columns: Sequence[str]) -> None:
    """Rewrite a results file whose header lacks some of ``columns`` (written before they
    existed) with them, empty in its rows, so that rows appended to it line up with its
    header; columns under a former name (:data:`OLD_COLUMNS`) keep their values. A file
    with a column ``columns`` does not know is left as it is."""
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            header = next(csv.reader(fh), None)
            if header is None or tuple(header) == tuple(columns):
                return
            if not set(header) <= set(columns) | set(OLD_COLUMNS.values()):
                return
            fh.seek(0)
            rows = list(csv.DictReader(fh))
    except FileNotFoundError:
        return
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(columns)
    for row in rows:
        w.writerow([row.get(c) or row.get(OLD_COLUMNS.get(c, c)) or "" for c in columns])
    write_atomic(path, buf.getvalue())


class _Csv:
    def __init__(self, path: Path, columns, append: bool):
        path.parent.mkdir(parents=True, exist_ok=True)
        if append:
            repair_tail(path)
            add_columns(path, columns)
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


@dataclass(frozen=True)
class Seen:
    """A frame file as found: its ledger row's path, size, modification time and when it
    was found complete (ISO 8601)."""

    path: str
    size: int | None
    mtime: float | None
    seen_at: str


def health_rows(frame: str, camera: str, time: str, health: Iterable) -> list[tuple]:
    """Rows of health.csv for one frame's ``(condition, measure, limit)`` conditions."""
    return [(frame, camera, time, condition, f"{float(measure):.4g}", f"{float(limit):.4g}")
            for condition, measure, limit in health]


class ResultWriter:
    """Writes every output of a run into ``out``, and the frame ledger.

    Parameters
    ----------
    out : Path
        ``flagged.csv``, ``skipped.csv``, ``health.csv``, ``events.csv`` and
        ``overlays/<camera>/<stem>.jpg`` go here.
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
        Group flagged frames into events and write ``events.csv`` (on :meth:`write_events`
        and on close). In append mode with a ledger the events cover every frame of
        ``source`` in the ledger, else the frames of this run.

    Thread-safe: several scoring threads may write through one writer.
    """

    def __init__(self, out: Path, all_scores: Path | None = None, maps: Path | None = None,
                 append: bool = False, source: Path | None = None, store: Path | None = None,
                 ledger: "Ledger | None" = None, events: EventSettings | None = None):
        self.out = Path(out)
        self.source = Path(source).resolve() if source is not None else None
        self.append = append
        self.ledger = ledger
        self.events = events
        self._lock = threading.RLock()
        self._points: dict[str, list[FramePoint]] = {}
        self._events: dict[str, list[Event]] = {}
        self._dirty: set[str] | None = None  # cameras whose events changed; None = all
        self.out.mkdir(parents=True, exist_ok=True)
        if source is not None:
            write_json(self.out / "run.json", {
                "source": str(Path(source).resolve()),
                "store": str(Path(store).resolve()) if store else "",
                "started": iso_time(now())})
        self.maps = Path(maps) if maps else None
        self.flagged = _Csv(self.out / "flagged.csv", COLUMNS, append)
        self.skipped = _Csv(self.out / "skipped.csv", SKIP_COLUMNS, append)
        self.health_rows = _Csv(self.out / "health.csv", HEALTH_COLUMNS, append)
        self.all_scores = _Csv(Path(all_scores), COLUMNS, append) if all_scores else None
        self._names: set[tuple[str, str]] = set()
        self.counts = {"scored": 0, "flagged": 0, "skipped": 0, "waiting": 0, "health": 0}
        #: Frames recorded as waiting for a usable baseline, per camera.
        self.waiting: Counter = Counter()
        #: Frames judged with amplified noise, per camera (:class:`Amplified`).
        self.amplified: dict[str, Amplified] = {}

    # --- writing ---------------------------------------------------------------------------

    def write(self, results: Sequence[FrameResult] = (), skipped: Sequence[Skip] = (),
              seen: Mapping[str, Seen] | None = None) -> list[str]:
        """Record a batch: scored frames (with their health conditions) and frames not
        scored, in the order described in the module docstring.

        ``seen`` gives the file facts of the ledger rows by frame (relative path); frames
        missing from it are looked up under ``source``. Returns the overlay paths of
        ``results`` ('' where none was written).
        """
        with self._lock:
            overlays = [self._save_files(r) for r in results]
            times = [iso_time(r.time) for r in results]
            if self.ledger is not None:
                stamp = now_iso()  # one clock reading a batch (each takes a timezone lookup)
                entries = [dict(self._file(r.frame, seen, stamp), camera=r.camera,
                                status="scored", score=r.score, threshold=r.threshold,
                                p_value=r.p_value,
                                flagged=int(r.flagged), version=r.version, capture_time=t,
                                overlay=overlay, written=0,
                                health=json.dumps(r.health) if r.health else None,
                                since=since_text(r), noise_amplified=r.noise_amplified)
                           for r, t, overlay in zip(results, times, overlays)]
                entries += [dict(self._file(s.rel, seen, stamp), camera=s.camera,
                                 reason=s.reason, status="waiting" if s.waiting else "skipped",
                                 written=0 if self._csv_skip(s) else 1)
                            for s in skipped]
                self.ledger.record(entries)  # committed: from here on the frames are done
            for r, t, overlay in zip(results, times, overlays):
                self._scored_rows(format_row(r.frame, r.camera, t, r.score, r.threshold,
                                             r.p_value, r.version, overlay, r.noise_amplified),
                                  r.flagged)
                for row in health_rows(r.frame, r.camera, t, r.health):
                    self.health_rows.row(row)
                    self.counts["health"] += 1
                if r.amplified is not None:
                    self.amplified.setdefault(r.camera, Amplified()).add(r.amplified)
                self._points.setdefault(r.camera, []).append(
                    FramePoint(r.camera, t, r.frame, r.score, r.flagged, since_text(r)))
                if self._dirty is not None:
                    self._dirty.add(r.camera)
            for s in skipped:
                if self._csv_skip(s):
                    self.skipped.row((s.rel, s.camera, s.reason))
                self.counts["waiting" if s.waiting else "skipped"] += 1
                if s.waiting:
                    self.waiting[s.camera] += 1
            if self.ledger is not None:
                self.ledger.mark_written(e["path"] for e in entries if e["written"] == 0)
        return overlays

    def _csv_skip(self, s: Skip) -> bool:
        return not (s.waiting and self.append)

    def _save_files(self, r: FrameResult) -> str:
        """Write the overlay (flagged frames) and the map file of one scored frame; returns
        the overlay path ('' when none)."""
        overlay = ""
        if r.flagged:
            name = self._unique("overlay", r.camera, r.frame)
            path = self.out / "overlays" / r.camera / f"{name}.jpg"
            path.parent.mkdir(parents=True, exist_ok=True)
            cv2.imwrite(str(path), overlay_picture(r), [cv2.IMWRITE_JPEG_QUALITY, 90])
            overlay = path.as_posix()
        if self.maps is not None:
            name = self._unique("map", r.camera, r.frame)
            path = self.maps / r.camera / f"{name}.npy"
            path.parent.mkdir(parents=True, exist_ok=True)
            np.save(path, np.asarray(r.amap, np.float32), allow_pickle=False)
        return overlay

    def _unique(self, kind: str, camera: str, frame: str) -> str:
        """A file name (no suffix) for the ``kind`` ("overlay", "map") of a camera's frame:
        the frame's stem, or ``<stem>-2``, ``-3``, ... when another frame of the run took it
        (two frames of a camera may share a stem: in other subfolders, or other formats)."""
        stem = Path(frame).stem
        name, k = stem, 1
        while (kind, f"{camera}/{name}") in self._names:
            k += 1
            name = f"{stem}-{k}"
        self._names.add((kind, f"{camera}/{name}"))
        return name

    def _scored_rows(self, row: tuple[str, ...], flagged: bool) -> None:
        if flagged:
            self.flagged.row(row)
            self.counts["flagged"] += 1
        if self.all_scores:
            self.all_scores.row(row)
        self.counts["scored"] += 1

    def _file(self, rel: str, seen: Mapping[str, Seen] | None, stamp: str) -> dict:
        """A frame's ledger columns: its file facts (from ``seen``, else looked up under
        ``source``, found at ``stamp``) and ``scored_at`` = ``stamp`` (the time of the
        batch, ISO 8601)."""
        found = seen.get(rel) if seen else None
        if found is None:
            path = (self.source / rel) if self.source is not None else Path(rel).resolve()
            try:
                st = os.stat(path)
                size, mtime = st.st_size, st.st_mtime
            except OSError:
                size = mtime = None
            found = Seen(str(path), size, mtime, stamp)
        return {"path": found.path, "rel": rel, "size": found.size, "mtime": found.mtime,
                "seen_at": found.seen_at, "scored_at": stamp}

    # --- after a crash ---------------------------------------------------------------------

    def reconcile(self) -> tuple[int, int]:
        """Append the CSV rows of frames under ``source`` committed in the ledger but not
        marked written (a crash between the two steps); returns (frames, rows appended).

        Rows already in the files are not written again, so nothing is doubled.
        """
        if self.ledger is None or self.source is None:
            return 0, 0
        with self._lock:
            rows = self.ledger.rows(self.source, "written = 0")
            if not rows:
                return 0, 0
            files = {"flagged": self.flagged, "skipped": self.skipped,
                     "health": self.health_rows, "all": self.all_scores}
            present = {k: _csv_rows(Path(f.fh.name)) for k, f in files.items() if f}
            added = 0

            def put(kind: str, row: tuple) -> None:
                nonlocal added
                if kind in present and row not in present[kind]:
                    files[kind].row(row)
                    added += 1

            for r in rows:
                if r["status"] == "scored":
                    row = format_row(r["rel"], r["camera"], r["capture_time"], r["score"],
                                     r["threshold"], r["p_value"], r["version"],
                                     r["overlay"] or "", r["noise_amplified"])
                    if r["flagged"]:
                        put("flagged", row)
                    put("all", row)
                    for h in health_rows(r["rel"], r["camera"], r["capture_time"],
                                         json.loads(r["health"] or "[]")):
                        put("health", h)
                elif r["status"] == "skipped":
                    put("skipped", (r["rel"], r["camera"], r["reason"] or ""))
            self.ledger.mark_written([r["path"] for r in rows])
        return len(rows), added

    # --- events ----------------------------------------------------------------------------

    @property
    def events_changed(self) -> bool:
        """Frames were scored since events.csv was last written."""
        return self.events is not None and (self._dirty is None or bool(self._dirty))

    def write_events(self) -> None:
        """Regroup the cameras with new scored frames (all on the first call) with
        :func:`inspector.core.events.group_events` and rewrite events.csv atomically."""
        if self.events is None:
            return
        with self._lock:
            dirty, self._dirty = self._dirty, set()
            from_ledger = self.append and self.ledger is not None and self.source is not None
            if dirty is None:
                cameras = set(self._points)
                if from_ledger:
                    cameras |= {c for c in self.ledger.cameras(self.source)}
                self._events = {}
            else:
                cameras = dirty
            for cam in cameras:
                points = (self.ledger.points(self.source, cam) if from_ledger
                          else self._points.get(cam, []))
                self._events[cam] = group_events(points, self.events)
            if from_ledger:
                self._points.clear()  # the ledger holds them
            buf = io.StringIO()
            w = csv.writer(buf)
            w.writerow(EVENT_COLUMNS)
            for cam in sorted(self._events):
                for e in self._events[cam]:
                    w.writerow(e.row())
            write_atomic(self.out / "events.csv", buf.getvalue())

    def close(self) -> None:
        if self.events is not None:
            self._dirty = None
            self.write_events()
        for f in (self.flagged, self.skipped, self.health_rows, self.all_scores):
            if f:
                f.close()

    def __enter__(self) -> "ResultWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _csv_rows(path: Path) -> set[tuple]:
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            return {tuple(r) for r in csv.reader(fh)}
    except FileNotFoundError:
        return set()
