"""Review labels: what a person decided about a flagged frame, kept in the store's SQLite file.

Table ``labels`` (owned here) in ``Store(root).database``: one row per labelled frame,
keyed by camera and the frame's absolute path, so that ``learn --add-false-alarms`` can
read the frames back. Labelling an event writes one row per flagged frame of the event.
The file is opened in WAL mode so the watcher can keep writing its ledger meanwhile.

Commands: ``inspector labels export FILE.csv`` and ``inspector labels summary``.
"""

from __future__ import annotations

import csv
import sqlite3
from collections.abc import Iterable, Sequence
from dataclasses import astuple, dataclass, fields
from datetime import datetime
from pathlib import Path
from typing import TextIO

from inspector.clock import now_iso as now  # noqa: F401 - the labels' timestamp
from inspector.storage.database import open_database, transaction

#: The labels a reviewer can give, in the order of the keys 1, 2, 3.
LABELS = ("incident", "false_alarm", "unsure")
#: How each label is written for people.
LABEL_TEXT = {"incident": "incident", "false_alarm": "false alarm", "unsure": "unsure"}

_SCHEMA = """
CREATE TABLE IF NOT EXISTS labels (
    camera       TEXT NOT NULL,
    path         TEXT NOT NULL,
    rel          TEXT NOT NULL DEFAULT '',
    event        TEXT NOT NULL DEFAULT '',
    label        TEXT NOT NULL CHECK (label IN ('incident', 'false_alarm', 'unsure')),
    note         TEXT NOT NULL DEFAULT '',
    score        REAL,
    threshold    REAL,
    version      TEXT NOT NULL DEFAULT '',
    capture_time TEXT NOT NULL DEFAULT '',
    labelled_at  TEXT NOT NULL,
    PRIMARY KEY (camera, path)
)
"""


@dataclass(frozen=True)
class Label:
    """One labelled frame (a row of table ``labels``, and of the exported CSV).

    ``path`` is the frame's absolute path, ``rel`` its path relative to the scanned
    folder, ``event`` the event id when it was labelled as part of an event.
    """

    camera: str
    path: str
    rel: str
    event: str
    label: str
    note: str
    score: float | None
    threshold: float | None
    version: str
    capture_time: str
    labelled_at: str


COLUMNS = tuple(f.name for f in fields(Label))
#: Columns of ``labels export``: named as in the results files (``frame`` relative to the
#: scanned folder, ``time`` the capture time, ``baseline`` the version that scored it).
EXPORT_NAMES = {"rel": "frame", "capture_time": "time", "version": "baseline"}
EXPORT_COLUMNS = tuple(EXPORT_NAMES.get(c, c) for c in COLUMNS)


def connect(database: Path | str) -> sqlite3.Connection:
    """Open the store's SQLite file (WAL mode) and make sure table ``labels`` exists."""
    conn = open_database(database)
    conn.execute(_SCHEMA)
    return conn


def put(conn: sqlite3.Connection, labels: Iterable[Label]) -> int:
    """Insert or replace labels (one transaction); returns how many rows were written."""
    rows = [astuple(lab) for lab in labels]
    for r in rows:
        if r[COLUMNS.index("label")] not in LABELS:
            raise ValueError(f"unknown label {r[COLUMNS.index('label')]!r}; one of {LABELS}")
    with transaction(conn):
        conn.executemany(f"INSERT OR REPLACE INTO labels ({', '.join(COLUMNS)}) "
                         f"VALUES ({', '.join('?' * len(COLUMNS))})", rows)
    return len(rows)


def remove(conn: sqlite3.Connection, camera: str, paths: Sequence[str]) -> int:
    """Forget the labels of these frames; returns how many existed."""
    with transaction(conn):
        cur = conn.executemany("DELETE FROM labels WHERE camera = ? AND path = ?",
                               [(camera, p) for p in paths])
    return cur.rowcount


def read(conn: sqlite3.Connection, camera: str | None = None,
         label: str | None = None) -> list[Label]:
    """Labels, optionally of one camera and/or one kind, in camera then capture-time order."""
    where, args = [], []
    if camera is not None:
        where.append("camera = ?")
        args.append(camera)
    if label is not None:
        where.append("label = ?")
        args.append(label)
    sql = f"SELECT {', '.join(COLUMNS)} FROM labels"
    if where:
        sql += " WHERE " + " AND ".join(where)
    sql += " ORDER BY camera, capture_time, path"
    return [Label(*row) for row in conn.execute(sql, args)]


def export_csv(labels: Sequence[Label], file: Path | TextIO) -> None:
    """Write labels as CSV with a header row (:data:`EXPORT_COLUMNS`, one per field of
    :class:`Label`, in its order) to a file path, or to an open text stream (left open)."""
    if not isinstance(file, (str, Path)):
        _write_labels(labels, file)
        return
    with open(file, "w", newline="", encoding="utf-8") as fh:
        _write_labels(labels, fh)


def _write_labels(labels: Sequence[Label], fh: TextIO) -> None:
    w = csv.writer(fh)
    w.writerow(EXPORT_COLUMNS)
    for lab in labels:
        w.writerow(["" if v is None else v for v in astuple(lab)])


@dataclass(frozen=True)
class CameraSummary:
    """What review found for one camera.

    ``days`` is the number of calendar days from the first to the last capture date of the
    reviewed frames (inclusive); ``precision`` = incidents / (incidents + false alarms),
    frames marked unsure left out; NaN when nothing was decided.
    """

    camera: str
    reviewed: int
    incidents: int
    false_alarms: int
    unsure: int
    days: int
    false_alarms_per_day: float
    precision: float


def summarize(labels: Sequence[Label]) -> list[CameraSummary]:
    """Per-camera counts, false alarms per day and precision of the flags (pure function)."""
    out = []
    for camera in sorted({lab.camera for lab in labels}):
        mine = [lab for lab in labels if lab.camera == camera]
        n = {k: sum(lab.label == k for lab in mine) for k in LABELS}
        dates = sorted(_date(lab.capture_time) for lab in mine if _date(lab.capture_time))
        days = (dates[-1] - dates[0]).days + 1 if dates else 1
        decided = n["incident"] + n["false_alarm"]
        out.append(CameraSummary(
            camera=camera, reviewed=len(mine), incidents=n["incident"],
            false_alarms=n["false_alarm"], unsure=n["unsure"], days=days,
            false_alarms_per_day=n["false_alarm"] / days,
            precision=n["incident"] / decided if decided else float("nan")))
    return out


def _date(text: str):
    try:
        return datetime.fromisoformat(text).date()
    except (TypeError, ValueError):
        return None
