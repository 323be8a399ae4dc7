"""The frame ledger: one SQLite row per frame file seen, in the store's database.

The ledger is what makes watching exactly-once: a frame is done when its row is committed
with status ``scored`` or ``skipped`` for the file's current size and modification time.
``scan`` records every frame it scores or skips here too, so ``status`` and baseline
comparisons work after a plain scan.

Table ``frames`` (one row per absolute path; a file replaced under the same path updates
its row):

======== ================================================================================
column   meaning
======== ================================================================================
path     absolute path (unique)
rel      path relative to the watched or scanned folder, forward slashes
camera   camera name
size     file size in bytes when read
mtime    file modification time (seconds since the epoch) when read
status   ``scored``, ``skipped`` or ``waiting`` (camera has no baseline yet)
reason   why a frame was skipped or is waiting
score, threshold, p_value, flagged, version
         the result (version = baseline version scored against)
capture_time  ISO 8601 capture time of the frame
overlay  overlay image written for a flagged frame ('' when none)
seen_at  when the file was found complete (ISO 8601, local time with offset)
scored_at when the row was committed
written  1 once the frame's CSV rows are in the results folder (see
         :mod:`inspector.storage.results`)
health   the frame's camera health conditions, JSON ``[[condition, measure, limit], ...]``
         (NULL when none), so that its health.csv rows can be written again after a crash
since    persistence (busy cameras): since when a flagged frame's region has stayed
noise_amplified
         a frame darker than every normal frame: its gain over the largest normal one,
         by which its noise was taken as amplified (NULL for the others; see
         :data:`inspector.storage.results.COLUMNS`)
======== ================================================================================

Table ``streams``: each camera's rolling persistence state (the last frames' anomaly maps,
see :mod:`inspector.core.persistence`) as ``.npz`` bytes, so a restarted watcher goes on
where it stopped.

Table ``watchers``: one heartbeat row per running watcher (queue lengths and lag), read by
``status``. Other parts of the tool add their own tables to the same file; this module
never drops or rewrites tables it does not own.
"""

from __future__ import annotations

import io
import json
import os
import sqlite3
import threading
import time
from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from inspector.clock import now_iso
from inspector.core.events import FramePoint
from inspector.storage.database import TIMEOUT, open_database, transaction

#: Columns of ``frames`` written by :meth:`Ledger.record` (all but ``id``).
FRAME_COLUMNS = ("path", "rel", "camera", "size", "mtime", "status", "reason", "score",
                 "threshold", "p_value", "flagged", "version", "capture_time", "overlay",
                 "seen_at", "scored_at", "written", "health", "since", "noise_amplified")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS frames (
    id INTEGER PRIMARY KEY,
    path TEXT UNIQUE NOT NULL,
    rel TEXT,
    camera TEXT,
    size INTEGER,
    mtime REAL,
    status TEXT NOT NULL CHECK (status IN ('waiting', 'scored', 'skipped')),
    reason TEXT,
    score REAL,
    threshold REAL,
    p_value REAL,
    flagged INTEGER,
    version TEXT,
    capture_time TEXT,
    overlay TEXT,
    seen_at TEXT,
    scored_at TEXT,
    written INTEGER NOT NULL DEFAULT 1,
    health TEXT,
    since TEXT,
    noise_amplified REAL
);
CREATE INDEX IF NOT EXISTS frames_camera ON frames (camera, status, capture_time);
CREATE TABLE IF NOT EXISTS streams (
    camera TEXT PRIMARY KEY,
    version TEXT,
    updated TEXT,
    state BLOB
);
CREATE TABLE IF NOT EXISTS watchers (
    source TEXT PRIMARY KEY,
    pid INTEGER,
    started TEXT,
    updated TEXT,
    updated_unix REAL,
    state TEXT
);
"""


def source_range(root: Path | str) -> tuple[str, str]:
    """Bounds (lo, hi) such that ``lo <= path < hi`` selects the paths under ``root``."""
    base = str(root).rstrip("/")
    return base + "/", base + "0"  # '0' is the character after '/'


def read_scored(database: Path | str, camera: str | None = None, limit: int | None = None
                ) -> list[sqlite3.Row]:
    """Scored frames from the ledger, newest first, through a read-only connection.

    For readers in other processes (review page, baseline comparison); a missing database
    or table (nothing scanned yet) gives an empty list.
    """
    if limit is not None and limit <= 0 or not Path(database).is_file():
        return []
    sql = "SELECT * FROM frames WHERE status = 'scored'"
    params: tuple = ()
    if camera is not None:
        sql += " AND camera = ?"
        params += (camera,)
    sql += " ORDER BY scored_at DESC, id DESC"
    if limit is not None:
        sql += " LIMIT ?"
        params += (limit,)
    try:
        conn = open_database(database, readonly=True, timeout=10.0)
    except sqlite3.Error:
        return []
    try:
        return conn.execute(sql, params).fetchall()
    except sqlite3.Error:  # no ledger table (yet)
        return []
    finally:
        conn.close()


class Ledger:
    """The frame ledger in SQLite file ``path`` (created with its tables if missing).

    One connection, shared by the threads of a process under a lock; WAL mode lets other
    processes (status, the review page, a scan) read while a watcher writes.
    """

    def __init__(self, path: Path | str, timeout: float = TIMEOUT):
        self.path = Path(path)
        self.lock = threading.RLock()
        self.conn = open_database(self.path, timeout=timeout)
        self.conn.executescript(_SCHEMA)
        with self.lock, self._transaction():  # ledgers made before a column existed
            have = {r[1] for r in self.conn.execute("PRAGMA table_info(frames)")}
            for name, kind in (("health", "TEXT"), ("since", "TEXT"),
                               ("noise_amplified", "REAL")):
                if name not in have:
                    self.conn.execute(f"ALTER TABLE frames ADD COLUMN {name} {kind}")

    # --- writing -----------------------------------------------------------------------

    def record(self, entries: Sequence[dict[str, Any]]) -> None:
        """Insert or update rows (by path) in one transaction. Missing keys become NULL
        (``written`` defaults to 1)."""
        if not entries:
            return
        cols = ", ".join(FRAME_COLUMNS)
        marks = ", ".join("?" for _ in FRAME_COLUMNS)
        update = ", ".join(f"{c} = excluded.{c}" for c in FRAME_COLUMNS if c != "path")
        sql = (f"INSERT INTO frames ({cols}) VALUES ({marks}) "
               f"ON CONFLICT(path) DO UPDATE SET {update}")
        rows = [tuple(e.get(c, 1 if c == "written" else None) for c in FRAME_COLUMNS)
                for e in entries]
        with self.lock, self._transaction():
            self.conn.executemany(sql, rows)

    def mark_written(self, paths: Iterable[str]) -> None:
        """Note that these frames' CSV rows are in the results folder."""
        paths = list(paths)
        if not paths:
            return
        with self.lock, self._transaction():
            self.conn.executemany("UPDATE frames SET written = 1 WHERE path = ?",
                                  [(p,) for p in paths])

    def heartbeat(self, source: str, started: str, state: dict[str, Any]) -> None:
        """Record a running watcher's queue state (read by ``status``)."""
        with self.lock, self._transaction():
            self.conn.execute(
                "INSERT INTO watchers (source, pid, started, updated, updated_unix, state) "
                "VALUES (?, ?, ?, ?, ?, ?) ON CONFLICT(source) DO UPDATE SET "
                "pid = excluded.pid, started = excluded.started, updated = excluded.updated, "
                "updated_unix = excluded.updated_unix, state = excluded.state",
                (source, os.getpid(), started, now_iso(), time.time(), json.dumps(state)))

    def keep_stream(self, camera: str, version: str, arrays: dict[str, Any]) -> None:
        """Store a camera's rolling persistence state (arrays as ``.npz`` bytes, no pickle)."""
        buf = io.BytesIO()
        np.savez(buf, **arrays)
        with self.lock, self._transaction():
            self.conn.execute(
                "INSERT INTO streams (camera, version, updated, state) VALUES (?, ?, ?, ?) "
                "ON CONFLICT(camera) DO UPDATE SET version = excluded.version, "
                "updated = excluded.updated, state = excluded.state",
                (camera, version, now_iso(), buf.getvalue()))

    def stream(self, camera: str):
        """A camera's stored persistence state: (version, StreamState), or None."""
        from inspector.core.persistence import StreamState

        with self.lock:
            row = self.conn.execute("SELECT version, state FROM streams WHERE camera = ?",
                                    (camera,)).fetchone()
        if row is None:
            return None
        with np.load(io.BytesIO(row[1]), allow_pickle=False) as z:
            return row[0], StreamState.from_arrays({k: z[k] for k in z.files})

    def end_watch(self, source: str) -> None:
        with self.lock, self._transaction():
            self.conn.execute("DELETE FROM watchers WHERE source = ?", (source,))

    # --- reading -----------------------------------------------------------------------

    def lookup(self, paths: Sequence[str]) -> dict[str, sqlite3.Row]:
        """Rows of these paths (missing paths are absent from the result)."""
        found: dict[str, sqlite3.Row] = {}
        with self.lock:
            for i in range(0, len(paths), 500):
                chunk = list(paths[i:i + 500])
                marks = ", ".join("?" for _ in chunk)
                for row in self.conn.execute(
                        f"SELECT * FROM frames WHERE path IN ({marks})", chunk):
                    found[row["path"]] = row
        return found

    def unchanged_scored(self, paths: Sequence[Path | str]) -> dict[str, sqlite3.Row]:
        """Rows of the frames among ``paths`` scored before, with their CSV rows written,
        whose file still has the size and modification time recorded then (scoring them
        again gives what the row holds, unless the baseline changed: compare ``version``)."""
        found = {}
        for path, row in self.lookup([str(p) for p in paths]).items():
            if row["status"] != "scored" or not row["written"]:
                continue
            try:
                st = os.stat(path)
            except OSError:
                continue
            if row["size"] == st.st_size and row["mtime"] == st.st_mtime:
                found[path] = row
        return found

    def rows(self, root: Path | str, where: str = "1", params: Sequence = ()
             ) -> list[sqlite3.Row]:
        """Rows under folder ``root`` matching an SQL condition, in id order."""
        lo, hi = source_range(root)
        with self.lock:
            return list(self.conn.execute(
                f"SELECT * FROM frames WHERE path >= ? AND path < ? AND ({where}) ORDER BY id",
                (lo, hi, *params)))

    def points(self, root: Path | str, camera: str | None = None) -> Iterator[FramePoint]:
        """Scored frames under ``root`` (of one camera, if given) as the event grouping
        sees them."""
        lo, hi = source_range(root)
        sql = ("SELECT camera, capture_time, rel, score, flagged, since FROM frames "
               "WHERE path >= ? AND path < ? AND status = 'scored'")
        params: tuple = (lo, hi)
        if camera is not None:
            sql += " AND camera = ?"
            params += (camera,)
        with self.lock:
            found = self.conn.execute(sql, params).fetchall()
        for r in found:
            yield FramePoint(r[0], r[1] or "", r[2], float(r[3]), bool(r[4]), r[5] or "")

    def cameras(self, root: Path | str) -> list[str]:
        """Cameras with scored frames under ``root``."""
        lo, hi = source_range(root)
        with self.lock:
            return [r[0] for r in self.conn.execute(
                "SELECT DISTINCT camera FROM frames WHERE path >= ? AND path < ? "
                "AND status = 'scored'", (lo, hi))]

    def camera_counts(self) -> dict[str, dict[str, Any]]:
        """Per camera: scored, flagged, skipped, waiting counts and the last capture time."""
        out: dict[str, dict[str, Any]] = {}
        with self.lock:
            cur = self.conn.execute(
                "SELECT camera, COUNT(*) FILTER (WHERE status = 'scored'), "
                "COUNT(*) FILTER (WHERE status = 'scored' AND flagged = 1), "
                "COUNT(*) FILTER (WHERE status = 'skipped'), "
                "COUNT(*) FILTER (WHERE status = 'waiting'), "
                "MAX(capture_time) FILTER (WHERE status = 'scored') "
                "FROM frames GROUP BY camera")
            for cam, scored, flagged, skipped, waiting, last in cur:
                out[cam or ""] = {"scored": scored, "flagged": flagged, "skipped": skipped,
                                  "waiting": waiting, "last": last or ""}
        return out

    def watchers(self, fresh_seconds: float = 15.0) -> list[dict[str, Any]]:
        """Heartbeats of watchers that reported within ``fresh_seconds``."""
        with self.lock:
            rows = list(self.conn.execute("SELECT * FROM watchers WHERE updated_unix >= ?",
                                          (time.time() - fresh_seconds,)))
        return [{"source": r["source"], "pid": r["pid"], "updated": r["updated"],
                 "state": json.loads(r["state"] or "{}")} for r in rows]

    # --- plumbing ----------------------------------------------------------------------

    def _transaction(self) -> transaction:
        return transaction(self.conn)

    def close(self) -> None:
        with self.lock:
            self.conn.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc) -> None:
        self.close()
