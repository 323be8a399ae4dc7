"""``inspector status``: where each camera stands."""

from __future__ import annotations

import argparse
from pathlib import Path

from inspector.cli.common import add_common, resolve, say
from inspector.errors import UsageError
from inspector.jobs.status import camera_facts, format_table


def register(sub) -> None:
    p = sub.add_parser("status", help="per camera: active baseline, frames scored, flagged, "
                                      "skipped and held for lack of a baseline, last frame, "
                                      "current lag, latest camera health condition, "
                                      "persistence (busy cameras)")
    add_common(p)
    p.add_argument("--out", type=Path, help="results folder whose health.csv gives the latest "
                                            "camera health condition (default from config)")
    p.set_defaults(func=cmd_status)


def cmd_status(args: argparse.Namespace) -> int:
    config, store = resolve(args)
    if args.out is not None and not args.out.is_dir():
        raise UsageError(f"--out {str(args.out)!r} is not a folder (a results folder written "
                         "by 'inspector scan' or 'inspector watch')")
    out = args.out or Path(config.paths.out)
    facts = camera_facts(store, out / "health.csv", config)
    if not facts:
        say(f"no cameras yet in {store.root} (run 'inspector learn' or 'inspector scan')")
        return 0
    for line in format_table(facts):
        say(line)
    for cam, f in facts.items():
        if f.get("damage"):
            say(f"{cam}: baseline {f['baseline']} is damaged ({f['damage']}): "
                f"{store.advice(cam, f['baseline'])}")
    return 0
