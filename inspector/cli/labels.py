"""``inspector labels``: export or summarise review labels."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from inspector.cli.common import add_common, resolve, say
from inspector.errors import UsageError
from inspector.storage.labels import Label, connect, export_csv, read, summarize


def register(sub) -> None:
    p = sub.add_parser("labels", help="export or summarise review labels")
    lsub = p.add_subparsers(dest="labels_command", metavar="ACTION", parser_class=type(p),
                            help="what to do with the labels:")
    lsub.required = True
    e = lsub.add_parser("export", help="write every label to a CSV file")
    e.add_argument("file", type=Path, metavar="FILE.csv",
                   help="the CSV file to write; '-' writes to standard output")
    e.add_argument("--camera", help="only this camera's labels")
    add_common(e)
    e.set_defaults(func=cmd_export)
    s = lsub.add_parser("summary", help="per camera: flags reviewed, incidents, false alarms "
                                        "per day, precision of the flags")
    add_common(s)
    s.set_defaults(func=cmd_summary)


def _labels_of(args: argparse.Namespace, camera: str | None = None) -> list[Label]:
    _, store = resolve(args)
    if not store.database.is_file():
        return []
    conn = connect(store.database)
    try:
        return read(conn, camera=camera)
    finally:
        conn.close()


def cmd_export(args: argparse.Namespace) -> int:
    to_stdout = str(args.file) == "-"  # common practice, no source: "-" is standard output
    if not to_stdout and (args.file.is_dir() or not args.file.parent.is_dir()):
        raise UsageError(f"cannot write {str(args.file)!r}: not a file in an existing folder")
    labels = _labels_of(args, args.camera)
    if to_stdout:
        export_csv(labels, sys.stdout)
        sys.stdout.flush()
        # the count goes to standard error so that standard output is only the CSV
        print(f"wrote {len(labels)} labels to standard output", file=sys.stderr, flush=True)
        return 0
    export_csv(labels, args.file)
    say(f"wrote {len(labels)} labels to {args.file}")
    return 0


def cmd_summary(args: argparse.Namespace) -> int:
    rows = summarize(_labels_of(args))
    if not rows:
        say("no labels yet (label flagged frames with 'inspector review')")
        return 0
    say(f"{'camera':<16}{'reviewed':>9}{'incidents':>10}{'false alarms':>13}{'unsure':>7}"
        f"{'days':>5}{'false alarms/day':>17}{'precision':>10}")
    for r in rows:
        prec = "-" if r.precision != r.precision else f"{r.precision:.2f}"
        say(f"{r.camera:<16}{r.reviewed:>9}{r.incidents:>10}{r.false_alarms:>13}{r.unsure:>7}"
            f"{r.days:>5}{r.false_alarms_per_day:>17.2f}{prec:>10}")
    return 0
