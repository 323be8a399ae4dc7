"""``inspector status``: where each camera stands, from the store and the frame ledger.

One row per camera. Columns are a list of (title, function of the camera's facts), so a
new column is one more entry in :data:`COLUMNS`.
"""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

from inspector.ledger import Ledger
from inspector.store import Store


def camera_facts(store: Store) -> dict[str, dict[str, Any]]:
    """Per camera: active baseline version, ledger counts, last frame time and current lag.

    ``lag`` is None when no watcher is running (no heartbeat in the last 15 s), else the
    seconds the oldest complete frame of that camera has waited to be scored (0 when none)
    and ``queued`` the number of such frames.
    """
    facts: dict[str, dict[str, Any]] = {}
    counts: dict[str, dict[str, Any]] = {}
    watchers: list[dict[str, Any]] = []
    if store.database.is_file():
        with Ledger(store.database) as ledger:
            counts = ledger.camera_counts()
            watchers = ledger.watchers()
    for cam in sorted(set(store.cameras()) | {c for c in counts if c}):
        f = {"camera": cam, "baseline": store.active_version(cam) or "none",
             "scored": 0, "flagged": 0, "skipped": 0, "waiting": 0, "last": "",
             "lag": None, "queued": 0}
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


def _lag(f: dict[str, Any]) -> str:
    if f["lag"] is None:
        return "not watched"
    return f"{f['lag']:.1f} s" + (f" ({f['queued']} queued)" if f["queued"] else "")


#: (title, cell) per column of the status table.
COLUMNS: list[tuple[str, Callable[[dict[str, Any]], str]]] = [
    ("camera", lambda f: f["camera"]),
    ("baseline", lambda f: f["baseline"]),
    ("scored", lambda f: str(f["scored"])),
    ("flagged", lambda f: str(f["flagged"])),
    ("skipped", lambda f: str(f["skipped"])),
    ("waiting", lambda f: str(f["waiting"])),
    ("last frame", lambda f: f["last"] or "-"),
    ("lag", _lag),
]


def format_table(facts: dict[str, dict[str, Any]]) -> list[str]:
    """The status table as text lines, columns aligned."""
    table = [[t for t, _ in COLUMNS]] + [[cell(f) for _, cell in COLUMNS]
                                         for f in facts.values()]
    widths = [max(len(row[i]) for row in table) for i in range(len(COLUMNS))]
    return ["  ".join(v.ljust(w) for v, w in zip(row, widths)).rstrip() for row in table]


def add_command(sub) -> None:
    from inspector.cli import add_common

    p = sub.add_parser("status", help="per camera: active baseline, frames scored, flagged, "
                                      "skipped and waiting, last frame, current lag")
    add_common(p)
    p.set_defaults(func=cmd_status)


def cmd_status(args: argparse.Namespace) -> int:
    from inspector.cli import resolve, say

    _, store = resolve(args)
    facts = camera_facts(store)
    if not facts:
        say(f"no cameras yet in {store.root} (run 'inspector learn' or 'inspector scan')")
        return 0
    for line in format_table(facts):
        say(line)
    return 0
