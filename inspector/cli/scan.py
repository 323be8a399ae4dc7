"""``inspector scan``: score every frame under a folder against its camera's baseline."""

from __future__ import annotations

import argparse
from pathlib import Path

from inspector.cli.common import (
    add_common,
    add_outputs,
    add_scheduler,
    check_source,
    cluster,
    report_scan,
    resolve,
    say,
)


def register(sub) -> None:
    p = sub.add_parser("scan", help="score every frame under a folder against its camera's "
                                    "baseline")
    p.add_argument("source", type=Path, metavar="SOURCE",
                   help="folder of frames, one subfolder per camera")
    p.add_argument("--rescore", action="store_true",
                   help="score again the frames the ledger has scored before (e.g. after "
                        "activating a new baseline); by default unchanged frames are left out")
    add_common(p)
    add_outputs(p)
    add_scheduler(p)
    p.set_defaults(func=cmd_scan)


def cmd_scan(args: argparse.Namespace) -> int:
    from inspector.jobs.scan import run_scan

    config, store = resolve(args)
    out = args.out or Path(config.paths.out)
    check_source(args.source, out, args.maps, files=(args.all_scores,))
    with cluster(args, config) as client:
        summary = run_scan(args.source, config, store, out, args.all_scores, args.maps,
                           rescore=args.rescore, client=client)
    report_scan(summary, out, args.all_scores)
    if not (summary.scored or summary.skipped or summary.unchanged):
        say(f"no frames found under {str(args.source)!r} (one subfolder per camera)")
    return 0
