"""``inspector status``: where each camera stands, from the store and the frame ledger.

One row per camera. Columns are a list of (title, function of the camera's facts), so a
new column is one more entry in :data:`COLUMNS`.
"""

from __future__ import annotations

import csv
from collections.abc import Callable
from pathlib import Path
from typing import Any

from inspector.config import Config
from inspector.core.persistence import persistence_on
from inspector.storage.database import integrity_problems
from inspector.storage.ledger import Ledger
from inspector.storage.store import Store


def latest_health(path: Path) -> dict[str, tuple[str, str]]:
    """The latest camera health condition per camera in a ``health.csv``.

    Returns
    -------
    dict of camera to (time, conditions)
        Conditions of the same frame are joined with " + ".
    """
    latest: dict[str, tuple[str, str, str]] = {}
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            for row in csv.DictReader(fh):
                cam, t, frame = row.get("camera") or "", row.get("time") or "", row.get("frame")
                cond = row.get("condition") or ""
                if not cam or not cond:
                    continue
                old = latest.get(cam)
                if old and (old[0], old[1]) == (t, frame):
                    latest[cam] = (t, frame, f"{old[2]} + {cond}")
                elif old is None or t >= old[0]:
                    latest[cam] = (t, frame, cond)
    except (OSError, csv.Error, UnicodeDecodeError):
        return {}
    return {cam: (t, cond) for cam, (t, _, cond) in latest.items()}


def camera_facts(store: Store, health_csv: Path | None = None, config: Config | None = None
                 ) -> dict[str, dict[str, Any]]:
    """Per camera: active baseline version (with ``damage``, the problem when its files fail
    their checksums), ledger counts, last frame time and current lag, the latest camera
    health condition found in ``health_csv``, and whether the camera runs with persistence
    (``persistence``: "on"/"off" with the reason, "-" when its baseline has no persistence
    calibration).

    ``lag`` is None when no watcher is running (no heartbeat in the last 15 s), else the
    seconds the oldest complete frame of that camera has waited to be scored (0 when none)
    and ``queued`` the number of such frames.
    """
    health = latest_health(health_csv) if health_csv is not None else {}
    facts: dict[str, dict[str, Any]] = {}
    counts: dict[str, dict[str, Any]] = {}
    watchers: list[dict[str, Any]] = []
    if store.database.is_file():
        with Ledger(store.database) as ledger:
            counts = ledger.camera_counts()
            watchers = ledger.watchers()
    for cam in sorted(set(store.cameras()) | {c for c in counts if c}):
        active = store.active_version(cam)
        damage = ""
        if active is not None and active in store.versions(cam):
            check = store.check(cam, active)
            damage = check.problem if check.damaged else ""
        f = {"camera": cam, "baseline": active or "none", "damage": damage,
             "scored": 0, "flagged": 0, "skipped": 0, "waiting": 0, "last": "",
             "lag": None, "queued": 0, "health": health.get(cam),
             "persistence": _persistence(store, cam, config)}
        f.update(counts.get(cam, {}))
        if watchers:
            f["lag"] = 0.0
            for w in watchers:
                c = w["state"].get("cameras", {}).get(cam)
                if c:
                    f["lag"] = max(f["lag"], float(c["oldest"]))
                    f["queued"] += int(c["queued"])
        facts[cam] = f
    return facts


def _persistence(store: Store, camera: str, config: Config | None) -> str:
    version = store.active_version(camera)
    try:
        p = store.metadata(camera, version).get("persistence") if version else None
    except (OSError, ValueError):
        p = None
    if not p:
        return "-"
    mode = config.camera(camera).persistence.mode if config is not None else "auto"
    on = persistence_on(bool(p.get("busy")), mode)
    why = "config" if mode != "auto" else ("busy" if p.get("busy") else "quiet")
    return f"{'on' if on else 'off'} ({why}{', %d frames' % p['window'] if on else ''})"


def _lag(f: dict[str, Any]) -> str:
    if f["lag"] is None:
        return "not watched"
    return f"{f['lag']:.1f} s" + (f" ({f['queued']} queued)" if f["queued"] else "")


def _health(f: dict[str, Any]) -> str:
    if not f.get("health"):
        return "ok"
    t, cond = f["health"]
    return f"{cond} ({'last frame' if t and t == f['last'] else t})"


#: (title, cell) per column of the status table.
COLUMNS: list[tuple[str, Callable[[dict[str, Any]], str]]] = [
    ("camera", lambda f: f["camera"]),
    ("baseline", lambda f: f["baseline"] + (f" DAMAGED ({f['damage']})" if f.get("damage")
                                            else "")),
    ("scored", lambda f: str(f["scored"])),
    ("flagged", lambda f: str(f["flagged"])),
    ("skipped", lambda f: str(f["skipped"])),
    ("no baseline yet", lambda f: str(f["waiting"])),  # not the frames queued (see lag)
    ("last frame", lambda f: f["last"] or "-"),
    ("lag", _lag),
    ("camera health", _health),
    ("persistence", lambda f: f.get("persistence", "-")),
]


def format_table(facts: dict[str, dict[str, Any]] | list[dict[str, Any]],
                 columns: list[tuple[str, Callable[[dict[str, Any]], str]]] = COLUMNS
                 ) -> list[str]:
    """A table (the status table by default) as text lines, columns aligned."""
    rows = facts.values() if isinstance(facts, dict) else facts
    table = [[t for t, _ in columns]] + [[cell(f) for _, cell in columns] for f in rows]
    widths = [max(len(row[i]) for row in table) for i in range(len(columns))]
    return ["  ".join(v.ljust(w) for v, w in zip(row, widths)).rstrip() for row in table]


def check_store(store: Store) -> list[dict[str, Any]]:
    """Every version of every camera verified (:meth:`Store.verify`) and every SQLite file
    of the store checked (``PRAGMA integrity_check``), one row each: ``what`` (camera or
    file), ``version`` ('' for a file), ``active``, ``state`` (ok, unchecked, damaged) and
    ``problem``; also the leftovers of interrupted learns (state ``leftover``, not
    damage)."""
    rows: list[dict[str, Any]] = []
    for cam in store.cameras():
        active = store.active_version(cam)
        for v in store.versions(cam):
            c = store.verify(cam, v)
            rows.append({"what": cam, "version": v, "active": v == active, "state": c.state,
                         "problem": c.problem})
        for p in store.leftovers(cam):
            rows.append({"what": cam, "version": p.name, "active": False, "state": "leftover",
                         "problem": "unfinished version of an interrupted learn, never used "
                                    "(safe to delete)"})
    for db in sorted(store.root.glob("*.sqlite")) if store.root.is_dir() else []:
        problems = integrity_problems(db)
        rows.append({"what": db.name, "version": "", "active": False,
                     "state": "damaged" if problems else "ok",
                     "problem": "; ".join(problems[:3])})
    return rows


#: (title, cell) per column of the ``store check`` table.
CHECK_COLUMNS: list[tuple[str, Callable[[dict[str, Any]], str]]] = [
    ("camera / file", lambda r: r["what"]),
    ("version", lambda r: r["version"] or "-"),
    ("active", lambda r: "yes" if r["active"] else ""),
    ("state", lambda r: {"damaged": "DAMAGED", "unchecked": "unchecked (saved before "
                         "checksums were recorded)"}.get(r["state"], r["state"])),
    ("problem", lambda r: r["problem"]),
]
