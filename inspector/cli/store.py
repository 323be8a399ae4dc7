"""``inspector store check``: verify every baseline version and the SQLite files of a store."""

from __future__ import annotations

import argparse

from inspector.cli.common import add_common, counted, resolve, say
from inspector.errors import UsageError
from inspector.jobs.status import CHECK_COLUMNS, check_store, format_table


def register(sub) -> None:
    p = sub.add_parser("store", help="check the baseline store (e.g. after moving it to "
                                     "another machine)")
    ssub = p.add_subparsers(dest="store_command", metavar="ACTION", parser_class=type(p),
                            help="what to do with the store:")
    ssub.required = True
    c = ssub.add_parser("check", help="verify the files of every baseline version and the "
                                      "SQLite files; exit 1 when anything is damaged")
    add_common(c)
    c.set_defaults(func=cmd_check)


def cmd_check(args: argparse.Namespace) -> int:
    _, store = resolve(args)
    if not store.root.is_dir():
        raise UsageError(f"no store at {store.root}")
    rows = check_store(store)
    if not rows:
        say(f"{store.root}: no baselines and no SQLite file yet: nothing to check")
        return 0
    for line in format_table(rows, CHECK_COLUMNS):
        say(line)
    versions = [r for r in rows if r["version"] and r["state"] != "leftover"]
    damaged = [r for r in rows if r["state"] == "damaged"]
    unchecked = sum(r["state"] == "unchecked" for r in rows)
    files = sum(not r["version"] for r in rows)
    cameras = len({r["what"] for r in versions})
    say(f"{counted(len(versions), 'version')} of {counted(cameras, 'camera')}"
        f" and {counted(files, 'SQLite file')} checked: {len(damaged)} damaged"
        + (f", {unchecked} unchecked (saved before checksums were recorded)"
           if unchecked else ""))
    for r in damaged:
        if r["version"] and r["active"]:
            say(f"{r['what']}: the active version {r['version']} is damaged: "
                f"{store.advice(r['what'], r['version'])}")
    return 1 if damaged else 0
