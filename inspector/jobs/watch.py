"""``inspector watch``: follow a camera export folder live and score every frame exactly once.

How a frame goes through the watcher::

    file events (watchdog: inotify, or polling)      catch-up pass / periodic rescan
                 \\                                     /
                  pending: path -> (size, mtime, last change)      [event thread]
                  |  complete = size and mtime unchanged for ``settle`` seconds,
                  |  or renamed into place; temporary names are never pending
                  ready (unbounded; nothing is dropped)  ->  work queue (bounded)
                                                              |
                  workers: decode, score (one loaded baseline per camera), write overlay,
                  commit ledger rows, append CSV rows, mark the rows written

Exactly once: a frame is done when its ledger row holds status scored/skipped for the
file's current size and modification time; such files are never read again. The ledger row
is committed *before* the CSV rows are appended and marked ``written`` after; on start,
rows not marked written are compared with the CSV files and the missing CSV rows appended
(a crash between the two steps leaves no gap and no duplicate). A CSV line cut short by a
crash is trimmed first.

Frames of a camera without a baseline are recorded as ``waiting`` and scored as soon as
``learn`` activates a baseline for that camera (checked every few seconds) or on the next
start.
"""

from __future__ import annotations

import os
import queue
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from inspector.core.events import EventSettings, group_events, write_events
from inspector.errors import FrameError, UsageError
from inspector.jobs.scan import Baselines, ScanSummary, score_frames
from inspector.storage.frames import (
    FrameFile,
    Skip,
    discover,
    frame_file,
    is_ignored_name,
    read_frame,
)
from inspector.storage.ledger import Ledger, now_iso
from inspector.storage.results import ResultWriter, format_row, iso_time


@dataclass(frozen=True)
class WatchSettings:
    """The ``[watch]`` section of the config."""

    #: A file is complete once its size and modification time stay unchanged this long (s).
    settle: float = 1.0
    #: Poll the folder every this many seconds instead of using file events (0 = events).
    #: For network shares and mounts where no events arrive.
    poll: float = 0.0
    #: Complete frames handed to the scoring workers at most at a time (back-pressure).
    queue: int = 64
    #: Scoring threads.
    workers: int = 2
    #: Frames scored together by a worker.
    batch: int = 16
    #: Walk the whole folder again every this many seconds for anything missed (0 = never).
    rescan: float = 600.0
    #: Log the backlog when the oldest complete frame has waited longer than this (s).
    lag_warning: float = 5.0

    @staticmethod
    def check(s: "WatchSettings", where: str) -> None:
        for name, lo, hi in (("settle", 0.0, 3600.0), ("poll", 0.0, 3600.0),
                             ("rescan", 0.0, 86400.0), ("lag_warning", 0.0, 86400.0)):
            v = getattr(s, name)
            if not lo <= v <= hi:
                raise UsageError(f"{where} {name} = {v!r} is outside [{lo:g}, {hi:g}]")
        for name, lo, hi in (("queue", 1, 100_000), ("workers", 1, 64), ("batch", 1, 256)):
            v = getattr(s, name)
            if not lo <= v <= hi:
                raise UsageError(f"{where} {name} = {v!r} is outside [{lo}, {hi}]")


@dataclass
class Item:
    """A complete file handed to the workers."""

    path: str
    size: int | None
    mtime: float | None
    seen_at: str
    #: time.monotonic() when it was found complete (for the lag).
    ready: float
    file: FrameFile | None = None
    #: Set when the file cannot be a frame: recorded as skipped with this reason.
    skip: Skip | None = None


@dataclass
class _Pending:
    size: int
    mtime: float
    changed: float  # monotonic time of the last change seen


@dataclass
class WatchReport(ScanSummary):
    waiting: int = 0


def _same(row, size, mtime) -> bool:
    return row is not None and row["size"] == size and row["mtime"] == mtime


class Watcher:
    """Follows folder ``root`` and scores every complete frame file exactly once.

    Parameters
    ----------
    root : Path
        Resolved folder, one subfolder per camera.
    baselines : Baselines
    writer : ResultWriter
        In append mode, without a ledger (the watcher records the ledger itself).
    ledger : Ledger
    settings : WatchSettings
    events : EventSettings
    idle_exit : float, optional
        Stop after this many seconds with no new frame and nothing in hand.
    log : callable
        Receives one-line messages for the operator.
    """

    def __init__(self, root: Path, baselines: Baselines, writer: ResultWriter, ledger: Ledger,
                 settings: WatchSettings, events: EventSettings, idle_exit: float | None = None,
                 log: Callable[[str], None] = print):
        self.root = root
        self.baselines = baselines
        self.writer = writer
        self.ledger = ledger
        self.settings = settings
        self.event_settings = events
        self.idle_exit = idle_exit
        self.log = log
        self.stop = threading.Event()
        self.report = WatchReport()
        self._events: queue.Queue = queue.Queue()  # from the observer thread, unbounded
        self._pending: dict[str, _Pending] = {}
        self._ready: deque[Item] = deque()
        self._work: queue.Queue[Item] = queue.Queue(maxsize=settings.queue)
        self._inflight: dict[str, Item] = {}  # queued or being scored, by path
        self._lock = threading.Lock()  # inflight, report, waiting cameras, dirty flag
        self._write_lock = threading.Lock()  # the ResultWriter
        self._waiting: set[str] = set()
        self._versions: dict[str, str | None] = {}
        self._dirty: set[str] | None = None  # cameras whose events changed; None = all
        self._events_by_camera: dict[str, list] = {}
        self._last_activity = time.monotonic()
        self._started = now_iso()
        self._tick = max(0.02, min(0.1, settings.settle / 4))

    # --- the event thread ----------------------------------------------------------------

    def run(self) -> WatchReport:
        """Watch until :attr:`stop` is set (signal) or the idle time passes."""
        t0 = time.perf_counter()
        self._heartbeat(time.monotonic())
        self.reconcile()
        observer = self._observer()
        try:
            observer.start()
        except OSError as exc:  # e.g. the system's limit of inotify watches is reached
            poll = max(1.0, self.settings.settle)
            self.log(f"file events unavailable ({exc}); polling every {poll:g} s instead")
            observer = self._observer(poll)
            observer.start()
        workers = [threading.Thread(target=self._worker, name=f"score-{i}", daemon=True)
                   for i in range(self.settings.workers)]
        for w in workers:
            w.start()
        try:
            self.catch_up()
            self._loop()
            if self.stop.is_set():
                self.log("stop requested: finishing the frames in hand")
        finally:
            self.stop.set()
            observer.stop()
            for w in workers:
                w.join()
            observer.join(timeout=5)
            self._write_events()
            self.ledger.end_watch(str(self.root))
        self.report.seconds = time.perf_counter() - t0
        return self.report

    def _observer(self, poll: float | None = None):
        from watchdog.events import FileSystemEventHandler
        from watchdog.observers import Observer
        from watchdog.observers.polling import PollingObserver

        sink = self._events

        class Handler(FileSystemEventHandler):
            def on_any_event(self, event):  # noqa: D401 - never block the observer
                sink.put(event)

        poll = poll or self.settings.poll
        if poll > 0:
            observer = PollingObserver(timeout=poll)
        else:
            observer = Observer()
        observer.schedule(Handler(), str(self.root), recursive=True)
        return observer

    def _loop(self) -> None:
        last_beat = last_events = last_check = last_lag = 0.0
        last_rescan = time.monotonic()
        while not self.stop.is_set():
            self._drain_events()
            now = time.monotonic()
            self._settle(now)
            self._feed()
            if now - last_beat >= 2.0:
                self._heartbeat(now)
                last_beat = now
            if now - last_check >= 2.0:
                self._check_baselines()
                last_check = now
            if (self._dirty is None or self._dirty) and now - last_events >= 2.0:
                self._write_events()
                last_events = now
            if now - last_lag >= 5.0 and self._log_lag(now):
                last_lag = now
            if self.settings.rescan > 0 and now - last_rescan >= self.settings.rescan:
                self.catch_up()
                last_rescan = now
            if self.idle_exit is not None and self._idle(now):
                self.log(f"no new frame for {self.idle_exit:g} s: stopping")
                break

    def _drain_events(self) -> None:
        try:
            event = self._events.get(timeout=self._tick)
        except queue.Empty:
            return
        while True:
            self._handle(event)
            try:
                event = self._events.get_nowait()
            except queue.Empty:
                return

    def _handle(self, event) -> None:
        kind = event.event_type
        src = os.fsdecode(event.src_path)
        if event.is_directory:
            if kind == "created":
                self._walk(src)
            elif kind == "moved":
                self._walk(os.fsdecode(event.dest_path))
            return
        if kind in ("created", "modified", "closed"):
            self._observe(src)
        elif kind == "moved":
            self._pending.pop(src, None)
            self._observe(os.fsdecode(event.dest_path), renamed=True)
        elif kind == "deleted":
            p = self._pending.pop(src, None)
            if p is not None:  # seen, never complete: record why it was not scored
                self._complete(src, p.size, p.mtime,
                               gone="deleted before it could be read")

    def _under_root(self, path: str) -> bool:
        return path.startswith(str(self.root) + os.sep)

    def _observe(self, path: str, renamed: bool = False) -> None:
        """A file may have changed: (re)start its settle clock, or complete it if renamed."""
        if not self._under_root(path):
            return
        rel = path[len(str(self.root)) + 1:]
        if any(is_ignored_name(part) for part in rel.split(os.sep)):
            return
        try:
            st = os.stat(path)
        except OSError:
            self._pending.pop(path, None)
            return
        if not os.path.isfile(path):
            return
        self._last_activity = time.monotonic()
        if renamed:  # renamed into place: the writer is done with it
            self._pending.pop(path, None)
            self._complete(path, st.st_size, st.st_mtime)
            return
        p = self._pending.get(path)
        if p is None or (p.size, p.mtime) != (st.st_size, st.st_mtime):
            self._pending[path] = _Pending(st.st_size, st.st_mtime, time.monotonic())

    def _walk(self, folder: str) -> None:
        for dirpath, dirnames, filenames in os.walk(folder):
            dirnames[:] = [d for d in dirnames if not is_ignored_name(d)]
            for name in filenames:
                self._observe(os.path.join(dirpath, name))

    def _settle(self, now: float) -> None:
        settle = self.settings.settle
        due = [path for path, p in self._pending.items() if now - p.changed >= settle]
        for path in due:
            p = self._pending[path]
            try:
                st = os.stat(path)
            except OSError:
                del self._pending[path]
                self._complete(path, p.size, p.mtime, gone="deleted before it could be read")
                continue
            if (st.st_size, st.st_mtime) != (p.size, p.mtime):
                self._pending[path] = _Pending(st.st_size, st.st_mtime, now)
                continue
            del self._pending[path]
            self._complete(path, st.st_size, st.st_mtime)

    def _complete(self, path: str, size, mtime, gone: str = "") -> None:
        """The file is complete (or gone): hand it on unless it is already in hand."""
        with self._lock:
            held = self._inflight.get(path)
            if held is not None and (held.size, held.mtime) == (size, mtime):
                return
        item = Item(path, size, mtime, now_iso(), time.monotonic())
        if gone:
            rel = Path(path).relative_to(self.root).as_posix()
            cam = rel.split("/")[0] if "/" in rel else ""
            item.skip = Skip(rel, cam, gone)
        else:
            found = frame_file(Path(path), self.root)
            if found is None:
                return
            if isinstance(found, Skip):
                item.skip = found
            else:
                item.file = found
        self._ready.append(item)

    def _feed(self) -> None:
        while self._ready:
            item = self._ready[0]
            with self._lock:
                held = self._inflight.get(item.path)
                if held is not None:
                    if (held.size, held.mtime) == (item.size, item.mtime):
                        self._ready.popleft()
                        continue
                    return  # an older version is in hand: keep order, try again later
            try:
                self._work.put_nowait(item)
            except queue.Full:
                return
            with self._lock:
                self._inflight[item.path] = item
            self._ready.popleft()

    def catch_up(self) -> None:
        """Find every frame not yet done (arrived while the tool was down, or missed)."""
        files, skips = discover(self.root)
        paths = [str(f.path) for f in files] + [str(self.root / s.rel) for s in skips]
        rows = self.ledger.lookup(paths)
        for path in paths:
            if path in self._pending:
                continue
            try:
                st = os.stat(path)
            except OSError:
                continue
            row = rows.get(path)
            if row is not None and row["status"] != "waiting" and _same(row, st.st_size,
                                                                          st.st_mtime):
                continue
            self._pending[path] = _Pending(st.st_size, st.st_mtime, time.monotonic())

    def reconcile(self) -> None:
        """Append the CSV rows of frames committed in the ledger but not yet written."""
        rows = self.ledger.rows(self.root, "written = 0")
        if not rows:
            return
        files = {"flagged": self.writer.out / "flagged.csv",
                 "skipped": self.writer.out / "skipped.csv"}
        if self.writer.all_scores:
            files["all"] = Path(self.writer.all_scores.fh.name)
        present = {k: _csv_rows(p) for k, p in files.items()}
        added = 0
        with self._write_lock:
            for r in rows:
                if r["status"] == "scored":
                    row = format_row(r["rel"], r["camera"], r["capture_time"], r["score"],
                                     r["threshold"], r["p_value"], r["version"],
                                     r["overlay"] or "")
                    if r["flagged"] and row not in present["flagged"]:
                        self.writer.flagged.row(row)
                        added += 1
                    if "all" in present and row not in present["all"]:
                        self.writer.all_scores.row(row)
                        added += 1
                elif r["status"] == "skipped":
                    row = (r["rel"], r["camera"], r["reason"] or "")
                    if row not in present["skipped"]:
                        self.writer.skipped.row(row)
                        added += 1
        self.ledger.mark_written([r["path"] for r in rows])
        self.log(f"recovered {len(rows)} frames committed before the last stop "
                 f"({added} CSV rows appended)")

    def _idle(self, now: float) -> bool:
        with self._lock:
            busy = bool(self._inflight)
        return (not busy and not self._pending and not self._ready
                and now - self._last_activity >= self.idle_exit)

    def _check_baselines(self) -> None:
        """Reload a camera's baseline after ``learn``; score its waiting frames."""
        with self._lock:
            cameras = set(self._versions) | self._waiting
        for cam in cameras:
            try:
                version = self.baselines.store.active_version(cam)
            except UsageError:
                continue
            with self._lock:
                retry = cam in self._waiting and version is not None
            if version == self._versions.get(cam) and not retry:
                continue
            known = cam in self._versions
            self._versions[cam] = version
            if not known and not retry:
                continue
            self.baselines.forget(cam)
            if version is not None:
                self.log(f"{cam}: baseline {version} is now active")
                with self._lock:
                    waiting = cam in self._waiting
                    self._waiting.discard(cam)
                if waiting:
                    for r in self.ledger.rows(self.root, "status = 'waiting' AND camera = ?",
                                              (cam,)):
                        self._observe(r["path"])

    def _backlog(self, now: float) -> dict:
        cams: dict[str, dict] = {}
        with self._lock:
            items = list(self._inflight.values())
        items += list(self._ready)
        for it in items:
            cam = (it.file.camera if it.file else it.skip.camera) or ""
            c = cams.setdefault(cam, {"queued": 0, "oldest": 0.0})
            c["queued"] += 1
            c["oldest"] = max(c["oldest"], now - it.ready)
        return cams

    def _heartbeat(self, now: float) -> None:
        cams = self._backlog(now)
        self.ledger.heartbeat(str(self.root), self._started, {
            "cameras": cams, "pending": len(self._pending),
            "queued": sum(c["queued"] for c in cams.values())})

    def _log_lag(self, now: float) -> bool:
        cams = self._backlog(now)
        if not cams:
            return False
        oldest = max(c["oldest"] for c in cams.values())
        if oldest < self.settings.lag_warning:
            return False
        n = sum(c["queued"] for c in cams.values())
        self.log(f"lag: {n} frames waiting to be scored, oldest found {oldest:.1f} s ago "
                 f"(frames arrive faster than they are scored; none is dropped)")
        return True

    def _write_events(self) -> None:
        """Regroup the cameras with new scored frames (all on the first call) and rewrite
        events.csv."""
        with self._lock:
            dirty, self._dirty = self._dirty, set()
        if dirty is None:
            self._events_by_camera = {}
            for e in group_events(self.ledger.points(self.root), self.event_settings):
                self._events_by_camera.setdefault(e.camera, []).append(e)
        else:
            for cam in dirty:
                self._events_by_camera[cam] = group_events(
                    self.ledger.points(self.root, cam), self.event_settings)
        write_events(self.writer.out / "events.csv",
                     [e for cam in sorted(self._events_by_camera)
                      for e in self._events_by_camera[cam]])

    # --- the workers --------------------------------------------------------------------

    def _worker(self) -> None:
        while not self.stop.is_set():
            try:
                batch = [self._work.get(timeout=0.2)]
            except queue.Empty:
                continue
            while len(batch) < self.settings.batch:
                try:
                    batch.append(self._work.get_nowait())
                except queue.Empty:
                    break
            try:
                self._process(batch)
            except Exception as exc:  # noqa: BLE001 - a failure must not stop the watch
                self.log(f"error while scoring {len(batch)} frames: {type(exc).__name__}: "
                         f"{exc}; they will be retried on the next start")
            finally:
                with self._lock:
                    for it in batch:
                        if self._inflight.get(it.path) is it:
                            del self._inflight[it.path]
                self._last_activity = time.monotonic()

    def _process(self, batch: list[Item]) -> None:
        done = self.ledger.lookup([it.path for it in batch])
        todo = [it for it in batch if not (
            (row := done.get(it.path)) is not None and row["status"] != "waiting"
            and _same(row, it.size, it.mtime))]
        entries: list[dict] = []
        rows: list[tuple[str, tuple, bool]] = []  # (kind, csv row, flagged)
        by_camera: dict[str, list[Item]] = {}
        for it in todo:
            if it.skip is not None:
                entries.append(self._entry(it, it.skip.rel, it.skip.camera, status="skipped",
                                           reason=it.skip.reason, written=0))
                rows.append(("skipped", (it.skip.rel, it.skip.camera, it.skip.reason), False))
            else:
                by_camera.setdefault(it.file.camera, []).append(it)
        waiting: list[str] = []
        flagged_lines: list[str] = []
        for camera, items in by_camera.items():
            with self._lock:
                self._versions.setdefault(camera, self.baselines.store.active_version(camera))
            try:
                baseline = self.baselines.get(camera)
                args = self.baselines.read_args(camera)
            except LookupError as exc:
                for it in items:
                    entries.append(self._entry(it, it.file.rel, camera, status="waiting",
                                               reason=f"{exc} yet"))
                with self._lock:
                    if camera not in self._waiting:
                        waiting.append(camera)
                    self._waiting.add(camera)
                continue
            frames, by_path = [], {}
            for it in items:
                by_path[str(it.file.path)] = it
                try:
                    frames.append(read_frame(it.file, **args))
                except FrameError as exc:
                    entries.append(self._entry(it, it.file.rel, camera, status="skipped",
                                               reason=str(exc), written=0))
                    rows.append(("skipped", (it.file.rel, camera, str(exc)), False))
            results = score_frames(baseline, frames)
            for frame, r in zip(frames, results):
                it = by_path[str(frame.file.path)]
                with self._lock:
                    self.report.notes.update(f"{camera}: {n}" for n in frame.notes)
                with self._write_lock:
                    overlay = self.writer.save_files(r)
                t = iso_time(r.time)
                entries.append(self._entry(
                    it, r.frame, camera, status="scored", score=r.score,
                    threshold=r.threshold, p_value=r.p_value, flagged=int(r.flagged),
                    version=r.model, capture_time=t, overlay=overlay, written=0))
                rows.append(("scored", format_row(r.frame, camera, t, r.score, r.threshold,
                                                  r.p_value, r.model, overlay), r.flagged))
                if r.flagged:
                    flagged_lines.append(
                        f"flagged {r.frame}  score {r.score:.2f} > {r.threshold:.2f}")
        self.ledger.record(entries)  # committed: from here on the frames are done
        with self._write_lock:
            for kind, row, flagged in rows:
                if kind == "scored":
                    self.writer.add_rows(row, flagged)
                else:
                    self.writer.skipped.row(row)
        self.ledger.mark_written(e["path"] for e in entries if e.get("written") == 0)
        with self._lock:
            for e in entries:
                if e["status"] == "scored":
                    self.report.scored += 1
                    self.report.flagged += e["flagged"]
                    if self._dirty is not None:
                        self._dirty.add(e["camera"])
                elif e["status"] == "skipped":
                    self.report.skipped += 1
                else:
                    self.report.waiting += 1
        for line in flagged_lines:
            self.log(line)
        for camera in waiting:
            self.log(f"{camera}: no baseline yet; its frames wait (run 'inspector learn')")
        for kind, row, _ in rows:
            if kind == "skipped":
                self.log(f"skipped {row[0]}: {row[2]}")

    def _entry(self, it: Item, rel: str, camera: str, **values) -> dict:
        return dict(path=it.path, rel=rel, camera=camera, size=it.size, mtime=it.mtime,
                    seen_at=it.seen_at, scored_at=now_iso(), **values)


def refuse_second_watcher(ledger: Ledger, root: Path) -> None:
    """One watcher per folder: two would score its frames twice."""
    for w in ledger.watchers():
        if w["source"] == str(root) and w["pid"] != os.getpid() and _alive(w["pid"]):
            raise UsageError(f"{root} is already being watched (process {w['pid']}); "
                             "two watchers would score its frames twice")


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def _csv_rows(path: Path) -> set[tuple]:
    import csv

    try:
        with open(path, newline="", encoding="utf-8") as fh:
            return {tuple(r) for r in csv.reader(fh)}
    except FileNotFoundError:
        return set()
