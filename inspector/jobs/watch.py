"""``inspector watch``: follow a camera export folder live and score every frame exactly once.

How a frame goes through the watcher::

    complete files (see inspector.jobs.settle: file events, settling, polling, catch-up)
                  |                                                 [event thread]
                  ready (unbounded; nothing is dropped)  ->  work queue (bounded)
                                                              |
                  workers: take one camera's queued frames as a batch (see below);
                  decode, score (one loaded baseline per camera), then the
                  one writer (inspector.storage.results.ResultWriter): overlay, ledger
                  rows, CSV and health rows, rows marked written

One batch per camera at a time: a worker takes the queued frames (up to ``batch``) of the
camera whose frame has waited longest among the cameras no other worker is scoring; frames
of that camera queued meanwhile wait and join its next batch, which is scored in
capture-time order once the first is written. A camera's stream therefore goes forward in
time (persistence windows need that, see :class:`inspector.jobs.scan.Streams`), while other
cameras' batches run on the other workers.

Exactly once: a frame is done when its ledger row holds status scored/skipped for the
file's current size and modification time; such files are never read again. The writer
commits the ledger rows before it appends the CSV rows and marks them written after; on
start, :meth:`~inspector.storage.results.ResultWriter.reconcile` appends the CSV rows of
frames not marked written (a crash between the two steps leaves no gap and no duplicate).
A CSV line cut short by a crash is trimmed first.

Frames of a camera without a usable baseline (none yet, or a damaged active version) are
recorded as ``waiting`` and scored as soon as a good baseline is active for that camera
(checked every few seconds) or on the next start.
"""

from __future__ import annotations

import os
import threading
import time
from collections import Counter, deque
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

from inspector.clock import now_iso
from inspector.config import WatchSettings
from inspector.errors import FrameError, UsageError
from inspector.jobs.scan import (
    BaselineCache,
    ScanSummary,
    Streams,
    note_amplified,
    read_args,
    score_frames,
)
from inspector.jobs.settle import Arrival, Settler, is_done
from inspector.storage.frames import Skip, read_frame
from inspector.storage.ledger import Ledger
from inspector.storage.overlay import amplified_text
from inspector.storage.results import ResultWriter, Seen
from inspector.storage.store import DamagedBaseline, Store

#: Seconds between two checks of a damaged active version (its files may be put back from a
#: backup; a new version or an activation is noticed within seconds anyway).
RECHECK_DAMAGED = 15.0


@dataclass
class WatchReport(ScanSummary):
    #: Frames recorded as waiting for a usable baseline of their camera.
    waiting: int = 0


class Watcher:
    """Follows folder ``root`` and scores every complete frame file exactly once.

    Parameters
    ----------
    root : Path
        Resolved folder, one subfolder per camera.
    baselines : BaselineCache
    config : Config
        Per-camera frame settings.
    writer : ResultWriter
        In append mode, with the ledger and the event settings.
    settings : WatchSettings
    idle_exit : float, optional
        Stop after this many seconds with no new frame and nothing in hand.
    log : callable
        Receives one-line messages for the operator.
    """

    def __init__(self, root: Path, baselines: BaselineCache, config, writer: ResultWriter,
                 settings: WatchSettings, idle_exit: float | None = None,
                 log: Callable[[str], None] = print):
        if writer.ledger is None:
            raise ValueError("the watcher's writer needs the ledger")
        self.root = root
        self.baselines = baselines
        self.config = config
        self.writer = writer
        self.ledger: Ledger = writer.ledger
        self.settings = settings
        self.idle_exit = idle_exit
        self.log = log
        self.stop = threading.Event()
        self.report = WatchReport()
        self.files = Settler(root, self.ledger, settings.settle, settings.poll,
                             self._in_hand, log)
        self._lock = threading.Lock()  # inflight, work queue, report, waiting cameras
        #: Frames handed to the workers, oldest first (at most ``settings.queue``).
        self._work: deque[Arrival] = deque()
        #: Signalled when frames are queued or a camera's batch is done.
        self._turn = threading.Condition(self._lock)
        self._scoring: set[str] = set()  # cameras with a batch in a worker's hands
        self._inflight: dict[str, Arrival] = {}  # queued or being scored, by path
        #: Cameras whose frames wait, with the version that could not be used (None: none).
        self._failed: dict[str, str | None] = {}
        self._damaged: dict[str, str] = {}  # camera -> message (with advice), while damaged
        self._rechecked: dict[str, float] = {}  # camera -> monotonic time of the last load
        self._versions: dict[str, str | None] = {}
        self._started = now_iso()
        #: Persistence state of busy cameras, kept in the ledger across restarts.
        self.streams = Streams(config, self.ledger)

    @property
    def store(self) -> Store:
        return self.baselines.store

    def preload(self) -> tuple[int, float]:
        """Load the active baselines of the cameras that have a folder under ``root``
        (in ``settings.workers`` threads), so that the first frames of every camera do
        not queue behind the loading. A camera whose baseline cannot be loaded is left to
        the usual handling when its frames come. Returns how many were loaded and the
        seconds it took."""
        t0 = time.perf_counter()
        cameras = [c for c in self.store.cameras()
                   if (self.root / c).is_dir() and self.store.active_version(c) is not None]

        def load(camera: str) -> bool:
            with self._lock:
                self._versions.setdefault(camera, self.store.active_version(camera))
            try:
                self.baselines.get(camera)
            except LookupError:
                return False
            return True

        with ThreadPoolExecutor(max(1, self.settings.workers)) as pool:
            loaded = sum(pool.map(load, cameras))
        return loaded, time.perf_counter() - t0

    # --- the event thread ----------------------------------------------------------------

    def run(self) -> WatchReport:
        """Watch until :attr:`stop` is set (signal) or the idle time passes."""
        t0 = time.perf_counter()
        self.files.last_activity = time.monotonic()  # idle from now (not while loading)
        self._heartbeat(time.monotonic())
        frames, added = self.writer.reconcile()
        if frames:
            self.log(f"recovered {frames} frames committed before the last stop "
                     f"({added} CSV rows appended)")
        self.files.start()
        workers = [threading.Thread(target=self._worker, name=f"score-{i}", daemon=True)
                   for i in range(self.settings.workers)]
        for w in workers:
            w.start()
        try:
            self.files.catch_up()
            self._loop()
            if self.stop.is_set():
                self.log("stop requested: finishing the frames in hand")
        finally:
            self.stop.set()
            for w in workers:
                w.join()
            self.files.stop()
            self.writer.write_events()
            self.ledger.end_watch(str(self.root))
        self.report.seconds = time.perf_counter() - t0
        with self._lock:
            self.report.damaged = dict(self._damaged)
            self.streams.note(self.report.notes)
            note_amplified(self.writer, self.report.notes)
        return self.report

    def _loop(self) -> None:
        last_beat = last_events = last_check = last_lag = 0.0
        last_rescan = time.monotonic()
        while not self.stop.is_set():
            self.files.step()
            now = time.monotonic()
            self._feed()
            if now - last_beat >= 2.0:
                self._heartbeat(now)
                last_beat = now
            if now - last_check >= 2.0:
                self._check_baselines()
                last_check = now
            if self.writer.events_changed and now - last_events >= 2.0:
                self.writer.write_events()
                last_events = now
            if now - last_lag >= 5.0 and self._log_lag(now):
                last_lag = now
            if self.settings.rescan > 0 and now - last_rescan >= self.settings.rescan:
                self.files.catch_up()
                last_rescan = now
            if self.idle_exit is not None and self._idle(now):
                self.log(f"no new frame for {self.idle_exit:g} s: stopping")
                break

    def _in_hand(self, path: str, size, mtime) -> bool:
        with self._lock:
            held = self._inflight.get(path)
            return held is not None and (held.size, held.mtime) == (size, mtime)

    def _feed(self) -> None:
        ready = self.files.ready
        while ready:
            item = ready[0]
            with self._lock:
                held = self._inflight.get(item.path)
                if held is not None:
                    if (held.size, held.mtime) == (item.size, item.mtime):
                        ready.popleft()
                        continue
                    return  # an older version is in hand: keep order, try again later
                if len(self._work) >= self.settings.queue:
                    return
                self._work.append(item)
                self._inflight[item.path] = item
                self._turn.notify()
            ready.popleft()

    def _idle(self, now: float) -> bool:
        with self._lock:
            busy = bool(self._inflight)
        return (not busy and not self.files.pending and not self.files.ready
                and now - self.files.last_activity >= self.idle_exit)

    def _check_baselines(self) -> None:
        """Load a camera's baseline again after ``learn`` or an activation, or (every
        :data:`RECHECK_DAMAGED` seconds) a damaged one whose files may have been put
        back; score its waiting frames once a usable one is active."""
        now = time.monotonic()
        with self._lock:
            cameras = set(self._versions) | set(self._failed)
        for cam in cameras:
            try:
                version = self.store.active_version(cam)
            except UsageError:
                continue
            with self._lock:
                waiting = cam in self._failed
                failed = self._failed.get(cam)
                damaged = self._damaged.get(cam)
            changed = cam in self._versions and version != self._versions[cam]
            self._versions[cam] = version
            recheck = (damaged is not None and version == failed
                       and now - self._rechecked.get(cam, 0.0) >= RECHECK_DAMAGED)
            if not (changed or recheck
                    or (waiting and version is not None and version != failed)):
                continue
            self._rechecked[cam] = now
            self.baselines.forget(cam)
            if version is None:
                continue
            try:
                self.baselines.get(cam)
            except LookupError as exc:
                with self._lock:
                    if cam in self._failed:
                        self._failed[cam] = version
                    if isinstance(exc, DamagedBaseline):
                        self._damaged[cam] = exc.note
                if not (recheck and isinstance(exc, DamagedBaseline) and damaged == exc.note):
                    self.log(f"{cam}: {exc}; its frames keep waiting")
                continue
            self.log(f"{cam}: baseline {version} is now active")
            with self._lock:
                self._failed.pop(cam, None)
                self._damaged.pop(cam, None)
            if waiting:
                for r in self.ledger.rows(self.root, "status = 'waiting' AND camera = ?",
                                          (cam,)):
                    self.files.observe(r["path"])

    def _backlog(self, now: float) -> dict:
        cams: dict[str, dict] = {}
        with self._lock:
            items = list(self._inflight.values())
        items += list(self.files.ready)
        for it in items:
            c = cams.setdefault(it.camera, {"queued": 0, "oldest": 0.0})
            c["queued"] += 1
            c["oldest"] = max(c["oldest"], now - it.ready)
        return cams

    def _heartbeat(self, now: float) -> None:
        cams = self._backlog(now)
        with self._lock:
            damaged = dict(self._damaged)
        self.ledger.heartbeat(str(self.root), self._started, {
            "cameras": cams, "pending": self.files.pending, "damaged": damaged,
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

    # --- the workers --------------------------------------------------------------------

    def _take(self) -> list[Arrival]:
        """The next batch: the queued frames (up to ``settings.batch``, oldest first) of
        the camera whose frame has waited longest among those not being scored; empty if
        there is none. Marks that camera as being scored. Call with :attr:`_lock` held."""
        camera = next((it.camera for it in self._work if it.camera not in self._scoring),
                      None)
        if camera is None:
            return []
        batch: list[Arrival] = []
        rest: deque[Arrival] = deque()
        for it in self._work:
            (batch if it.camera == camera and len(batch) < self.settings.batch
             else rest).append(it)
        self._work = rest
        self._scoring.add(camera)
        return batch

    def _worker(self) -> None:
        while not self.stop.is_set():
            with self._turn:
                batch = self._take()
                if not batch:
                    self._turn.wait(timeout=0.2)  # woken by _feed or a finished batch
                    continue
                if self._work:
                    self._turn.notify()  # another camera's frames may be waiting
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
                    self._scoring.discard(batch[0].camera)
                    self._turn.notify_all()  # the camera's next batch may go
                self.files.last_activity = time.monotonic()

    def _process(self, batch: list[Arrival]) -> None:
        done = self.ledger.lookup([it.path for it in batch])
        todo = [it for it in batch if not is_done(done.get(it.path), it.size, it.mtime)]
        skipped: list[Skip] = []
        seen: dict[str, Seen] = {}
        by_camera: dict[str, list[Arrival]] = {}
        for it in todo:
            rel = it.skip.rel if it.skip is not None else it.file.rel
            seen[rel] = it  # (an Arrival is the Seen the ledger row takes)
            if it.skip is not None:
                skipped.append(it.skip)
            else:
                by_camera.setdefault(it.file.camera, []).append(it)
        newly_waiting: list[tuple[str, str]] = []
        results = []
        for camera, items in by_camera.items():
            with self._lock:
                self._versions.setdefault(camera, self.store.active_version(camera))
            try:
                baseline = self.baselines.get(camera)
            except LookupError as exc:
                damage = exc.note if isinstance(exc, DamagedBaseline) else ""
                skipped += [Skip(it.file.rel, camera, str(exc), waiting=True)
                            for it in items]
                with self._lock:
                    if camera not in self._failed:
                        newly_waiting.append((camera, damage))
                    self._failed[camera] = exc.check.version if damage else None
                    if damage:
                        self._damaged[camera] = damage
                continue
            frames = []
            for it in items:
                try:
                    frames.append(read_frame(it.file, **read_args(baseline, self.config)))
                except FrameError as exc:
                    skipped.append(Skip(it.file.rel, camera, str(exc)))
            frames.sort(key=lambda f: (f.time, f.file.rel))  # a stream goes forward in time
            notes: Counter[str] = Counter()
            results += score_frames(baseline, frames, streams=self.streams, notes=notes)
            with self._lock:
                self.report.notes.update(notes)
        self.writer.write(results, skipped, seen)
        with self._lock:
            for r in results:
                self.report.scored += 1
                self.report.flagged += r.flagged
                self.report.health += len(r.health)
            for s in skipped:
                if s.waiting:
                    self.report.waiting += 1
                else:
                    self.report.skipped += 1
        for r in results:
            if r.flagged:
                dark = "" if r.amplified is None else "  " + amplified_text(r.amplified)
                self.log(f"flagged {r.frame}  score {r.score:.2f} > {r.threshold:.2f}{dark}")
        for camera, damage in newly_waiting:
            self.log(f"{camera}: {damage}; its frames wait meanwhile" if damage else
                     f"{camera}: no baseline yet; its frames wait (run 'inspector learn')")
        for s in skipped:
            if not s.waiting:
                self.log(f"skipped {s.rel}: {s.reason}")


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
