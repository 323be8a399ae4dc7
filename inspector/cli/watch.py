"""``inspector watch``: follow a folder that cameras export into and score each new frame."""

from __future__ import annotations

import argparse
import signal
from dataclasses import replace
from pathlib import Path

from inspector.cli.common import (
    add_common,
    add_outputs,
    check_source,
    report_scan,
    resolve,
    say,
)
from inspector.clock import now
from inspector.config import WatchSettings
from inspector.errors import UsageError
from inspector.jobs.scan import BaselineCache
from inspector.jobs.watch import Watcher, WatchReport, refuse_second_watcher
from inspector.storage.ledger import Ledger
from inspector.storage.results import ResultWriter


def register(sub) -> None:
    p = sub.add_parser("watch", help="follow a folder that cameras export into and score "
                                     "every new frame as it arrives")
    p.add_argument("source", type=Path, metavar="SOURCE",
                   help="folder of frames, one subfolder per camera")
    add_common(p)
    add_outputs(p)
    p.add_argument("--poll", type=float, metavar="SECONDS",
                   help="look for new files every SECONDS instead of using file events "
                        "(network shares, mounts)")
    p.add_argument("--idle-exit", type=float, metavar="SECONDS",
                   help="stop after SECONDS with no new frame (default: run until "
                        "interrupted)")
    p.set_defaults(func=cmd_watch)



def cmd_watch(args: argparse.Namespace) -> int:
    config, store = resolve(args)
    settings = config.watch
    if args.poll is not None:
        if not 0 < args.poll <= 3600:
            raise UsageError(f"--poll {args.poll:g}: choose seconds in (0, 3600]")
        settings = replace(settings, poll=args.poll)
    if args.idle_exit is not None and args.idle_exit < 0:
        raise UsageError(f"--idle-exit {args.idle_exit:g}: seconds must not be negative")
    out = args.out or Path(config.paths.out)
    root = check_source(args.source, out, args.maps, store.root, files=(args.all_scores,))

    def log(text: str) -> None:
        say(f"{now().strftime('%H:%M:%S')} {text}")

    with Ledger(store.database) as ledger:
        refuse_second_watcher(ledger, root)
        with ResultWriter(out, args.all_scores, args.maps, append=True, source=root,
                          store=store.root, ledger=ledger, events=config.events) as writer:
            report = _run(Watcher(root, BaselineCache(store), config, writer, settings,
                                  idle_exit=args.idle_exit, log=log), settings, log)
    if report.waiting:
        say(f"{report.waiting} frames wait for a baseline of their camera")
    report_scan(report, out, args.all_scores)
    return 0


def _run(watcher: Watcher, settings: WatchSettings, log) -> WatchReport:
    """Run until stopped, SIGINT and SIGTERM asking for a clean stop."""

    def stop(*_):  # finish the frames in hand, then exit 0
        watcher.stop.set()

    old = {s: signal.signal(s, stop) for s in (signal.SIGINT, signal.SIGTERM)}
    try:
        mode = f"polling every {settings.poll:g} s" if settings.poll else "file events"
        loaded, seconds = watcher.preload()
        log(f"watching {watcher.root} ({mode}, settle {settings.settle:g} s; {loaded} "
            f"baseline{'s' if loaded != 1 else ''} loaded in {seconds:.1f} s); "
            "stop with Ctrl-C")
        return watcher.run()
    finally:
        for s, h in old.items():
            signal.signal(s, h)
