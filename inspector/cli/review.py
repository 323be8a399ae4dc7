"""``inspector review``: a local web page to go through flagged frames, label them and see
what each baseline version changes. See :mod:`inspector.review.server`."""

from __future__ import annotations

import argparse
import logging
import secrets
from pathlib import Path

from inspector.cli.common import add_common, resolve, say

#: Default port of the review page.
PORT = 8765


def register(sub) -> None:
    p = sub.add_parser("review", help="serve a local page to review and label flagged frames")
    add_common(p)
    p.add_argument("--out", type=Path, help="results folder written by scan or watch "
                                            "(default from config)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1: this machine only)")
    p.add_argument("--port", type=int, default=PORT, help=f"port (default {PORT}; 0 picks a "
                                                          "free one)")
    p.add_argument("--allow-host", action="append", default=[], metavar="NAME",
                   help="also answer requests addressed to NAME (a reverse proxy's or another "
                        "name of this machine; repeatable). The page always answers to "
                        "localhost, the --host address and this machine's host name")
    p.set_defaults(func=cmd_review)


def cmd_review(args: argparse.Namespace) -> int:
    from inspector.errors import UsageError
    from inspector.review.data import read_run
    from inspector.review.server import Hosts, create_app, is_loopback, make_server
    from inspector.storage.store import Store

    config, store = resolve(args)
    out = args.out or Path(config.paths.out)
    if not (out / "flagged.csv").is_file():
        raise UsageError(f"{str(out)!r} has no flagged.csv: point --out at a results folder "
                         "written by 'inspector scan' or 'inspector watch'")
    run = read_run(out)
    if args.store is None and run.get("store"):
        store = Store(run["store"])
    if not store.root.is_dir():
        raise UsageError(f"store {str(store.root)!r} is not a folder")
    if not run.get("source"):
        say(f"warning: {out / 'run.json'} does not name the scanned folder; frames are looked "
            f"for in {out}")
    if not 0 <= args.port <= 65535:
        raise UsageError("--port must be between 0 and 65535")
    token = secrets.token_urlsafe(24)
    app = create_app(out, store, config, token=token,
                     hosts=Hosts.for_bind(args.host, args.allow_host))
    logging.getLogger("werkzeug").setLevel(logging.WARNING)
    try:
        server = make_server(app, args.host, args.port)
    except OSError as exc:
        raise UsageError(f"cannot listen on {args.host}:{args.port}: "
                         f"{exc.strerror or exc}") from None
    if not is_loopback(args.host):
        say(f"warning: listening on {args.host}: other machines that reach this address can "
            "see frames and, with the page's token, write labels")
    host = f"[{args.host}]" if ":" in args.host else args.host
    say(f"review page: http://{host}:{server.server_port}/  (results {out}, store {store.root}; "
        "Ctrl-C stops)")
    try:
        server.serve_forever()
    except KeyboardInterrupt:
        pass
    finally:
        server.server_close()
    say("review page stopped")
    return 0
