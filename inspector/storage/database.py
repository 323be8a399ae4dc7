"""The store's SQLite file, opened one way for every table that lives in it (the frame
ledger, review labels): WAL journal so readers in other processes never block a writer,
a busy timeout instead of "database is locked" errors, rows readable by column name."""

from __future__ import annotations

import sqlite3
from pathlib import Path

#: Seconds a connection waits for another process's write to finish before giving up.
TIMEOUT = 60.0


def open_database(path: Path | str, readonly: bool = False,
                  timeout: float = TIMEOUT) -> sqlite3.Connection:
    """Open the SQLite file ``path``.

    Parameters
    ----------
    path : Path or str
        Created (with its folder) when missing, unless ``readonly``.
    readonly : bool
        Open read-only (``mode=ro``): for readers in other processes (review page,
        comparisons, ``store check``). Raises ``sqlite3.Error`` when the file is missing.
    timeout : float
        Busy timeout in seconds.

    Returns
    -------
    sqlite3.Connection
        In autocommit mode (``isolation_level=None``; callers open transactions
        themselves), usable from several threads under the caller's lock, rows as
        :class:`sqlite3.Row`.
    """
    path = Path(path)
    if readonly:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True,
                               timeout=timeout, check_same_thread=False, isolation_level=None)
    else:
        path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(str(path), timeout=timeout, check_same_thread=False,
                               isolation_level=None)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=NORMAL")
    conn.row_factory = sqlite3.Row
    return conn


def integrity_problems(path: Path | str) -> list[str]:
    """What ``PRAGMA integrity_check`` finds wrong with the SQLite file (empty when sound).

    A file that is not a database at all gives one line saying so.
    """
    try:
        conn = open_database(path, readonly=True, timeout=5.0)
    except sqlite3.Error as exc:
        return [f"cannot be opened: {exc}"]
    try:
        found = [str(r[0]) for r in conn.execute("PRAGMA integrity_check")]
    except sqlite3.Error as exc:
        return [str(exc)]
    finally:
        conn.close()
    return [] if found == ["ok"] else found


class transaction:
    """``with transaction(conn):`` runs the block in one write transaction (``BEGIN
    IMMEDIATE``: the write lock is taken at once), committed on success, rolled back on an
    exception."""

    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn

    def __enter__(self) -> sqlite3.Connection:
        self.conn.execute("BEGIN IMMEDIATE")
        return self.conn

    def __exit__(self, kind, exc, tb) -> bool:
        self.conn.execute("COMMIT" if kind is None else "ROLLBACK")
        return False
