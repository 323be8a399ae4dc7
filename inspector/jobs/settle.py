"""Finding complete frame files in a folder that cameras write into: file events, settling,
polling and catch-up. Used by ``watch`` (see :mod:`inspector.jobs.watch`).

How a file becomes an :class:`Arrival`::

    file events (watchdog: inotify, or polling)      catch-up pass / periodic rescan
                 \\                                     /
                  pending: path -> (size, mtime, last change)
                  |  complete = size and mtime unchanged for ``settle`` seconds,
                  |  or renamed into place; temporary names are never pending
                  ready (unbounded; nothing is dropped)

All of it runs on the watcher's event thread; the observer thread only queues events.
"""

from __future__ import annotations

import os
import queue
import stat
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from inspector.clock import now_iso
from inspector.names import is_ignored_name
from inspector.storage.frames import FrameFile, Skip, discover, frame_file
from inspector.storage.ledger import Ledger
from inspector.storage.results import Seen


@dataclass(frozen=True)
class Arrival(Seen):
    """A complete file (or one gone before it could be read), to be scored or recorded: the
    file as found (its ledger row's facts, :class:`~inspector.storage.results.Seen`) and
    what it is."""

    #: time.monotonic() when it was found complete (for the lag).
    ready: float
    file: FrameFile | None = None
    #: Set when the file cannot be a frame: recorded as skipped with this reason.
    skip: Skip | None = None

    @property
    def camera(self) -> str:
        return (self.file.camera if self.file else self.skip.camera) or ""


@dataclass
class _Pending:
    size: int
    mtime: float
    changed: float  # monotonic time of the last change seen


def file_stat(path: str) -> os.stat_result:
    """``os.stat(path)``; for a symbolic link that points to nothing, the link's own
    ``os.lstat``, so that it is collected like any file and recorded as skipped with the
    reason :func:`~inspector.storage.frames.frame_file` gives (as ``scan`` does), never
    dropped. Raises OSError when there is nothing at ``path``."""
    try:
        return os.stat(path)
    except FileNotFoundError:
        st = os.lstat(path)
        if not stat.S_ISLNK(st.st_mode):
            raise
        return st


def is_done(row, size, mtime) -> bool:
    """A ledger row says the file with this size and modification time is done."""
    return (row is not None and row["status"] != "waiting" and row["size"] == size
            and row["mtime"] == mtime)


class Settler:
    """Watches folder ``root`` and collects complete files in :attr:`ready`.

    Parameters
    ----------
    root : Path
        Resolved folder, one subfolder per camera.
    ledger : Ledger
        Files already done (see :func:`is_done`) are not collected again by catch-up.
    settle : float
        Seconds a file's size and modification time must stay unchanged.
    poll : float
        Poll every this many seconds instead of using file events (0 = events).
    in_hand : callable
        ``in_hand(path, size, mtime)`` is true when that very file is already being
        scored: it is not collected again.
    log : callable
    """

    def __init__(self, root: Path, ledger: Ledger, settle: float, poll: float,
                 in_hand: Callable[[str, int | None, float | None], bool],
                 log: Callable[[str], None] = print):
        self.root = root
        self.ledger = ledger
        self.settle = settle
        self.poll = poll
        self.in_hand = in_hand
        self.log = log
        self.ready: deque[Arrival] = deque()
        self.last_activity = time.monotonic()
        self._events: queue.Queue = queue.Queue()  # from the observer thread, unbounded
        self._pending: dict[str, _Pending] = {}
        self._tick = max(0.02, min(0.1, settle / 4))
        self._observer = None

    @property
    def pending(self) -> int:
        """Files seen but not complete yet."""
        return len(self._pending)

    # --- the observer ---------------------------------------------------------------------

    def start(self) -> None:
        """Start receiving file events (polling when events are unavailable)."""
        self._observer = self._make_observer()
        try:
            self._observer.start()
        except OSError as exc:  # e.g. the system's limit of inotify watches is reached
            poll = max(1.0, self.settle)
            self.log(f"file events unavailable ({exc}); polling every {poll:g} s instead")
            self._observer = self._make_observer(poll)
            self._observer.start()

    def stop(self) -> None:
        if self._observer is not None:
            self._observer.stop()
            self._observer.join(timeout=5)

    def _make_observer(self, poll: float | None = None):
        from watchdog.events import FileSystemEventHandler
        from watchdog.observers import Observer
        from watchdog.observers.polling import PollingObserver

        sink = self._events

        class Handler(FileSystemEventHandler):
            def on_any_event(self, event):  # noqa: D401 - never block the observer
                sink.put(event)

        poll = poll or self.poll
        observer = PollingObserver(timeout=poll) if poll > 0 else Observer()
        observer.schedule(Handler(), str(self.root), recursive=True)
        return observer

    # --- one step of the event thread ------------------------------------------------------

    def step(self) -> None:
        """Take the file events that arrived (waiting a tick for one), then complete the
        files that have settled."""
        try:
            event = self._events.get(timeout=self._tick)
        except queue.Empty:
            event = None
        while event is not None:
            self._handle(event)
            try:
                event = self._events.get_nowait()
            except queue.Empty:
                event = None
        self._settle(time.monotonic())

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
            self.observe(src)
        elif kind == "moved":
            self._pending.pop(src, None)
            self.observe(os.fsdecode(event.dest_path), renamed=True)
        elif kind == "deleted":
            p = self._pending.pop(src, None)
            if p is not None:  # seen, never complete: record why it was not scored
                self._complete(src, p.size, p.mtime, gone="deleted before it could be read")

    def observe(self, path: str, renamed: bool = False) -> None:
        """A file may have changed: (re)start its settle clock, or complete it if renamed."""
        if not path.startswith(str(self.root) + os.sep):
            return
        rel = path[len(str(self.root)) + 1:]
        if any(is_ignored_name(part) for part in rel.split(os.sep)):
            return
        try:
            st = file_stat(path)
        except OSError:
            self._pending.pop(path, None)
            return
        if not (stat.S_ISREG(st.st_mode) or stat.S_ISLNK(st.st_mode)):
            return
        self.last_activity = time.monotonic()
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
                self.observe(os.path.join(dirpath, name))

    def _settle(self, now: float) -> None:
        due = [path for path, p in self._pending.items() if now - p.changed >= self.settle]
        for path in due:
            p = self._pending[path]
            try:
                st = file_stat(path)
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
        """The file is complete (or gone): make it ready unless it is already in hand."""
        if self.in_hand(path, size, mtime):
            return
        seen_at, ready = now_iso(), time.monotonic()
        if gone:
            rel = Path(path).relative_to(self.root).as_posix()
            found = Skip(rel, rel.split("/")[0] if "/" in rel else "", gone)
        else:
            found = frame_file(Path(path), self.root)
            if found is None:
                return
        file, skip = (None, found) if isinstance(found, Skip) else (found, None)
        self.ready.append(Arrival(path, size, mtime, seen_at, ready, file, skip))

    def catch_up(self) -> None:
        """Find every frame not yet done (arrived while the tool was down, or missed)."""
        files, skips = discover(self.root)
        paths = [str(f.path) for f in files] + [str(self.root / s.rel) for s in skips]
        rows = self.ledger.lookup(paths)
        for path in paths:
            if path in self._pending:
                continue
            try:
                st = file_stat(path)
            except OSError:
                continue
            if is_done(rows.get(path), st.st_size, st.st_mtime):
                continue
            self._pending[path] = _Pending(st.st_size, st.st_mtime, time.monotonic())
