"""The command line: a thin shell that wires the library to folders and a terminal.

Exit codes: 0 done (also when some frames were skipped), 2 usage or configuration error
(one line, no traceback), 1 failure. Every command is a module of this package with a
``register(subparsers)`` function; :data:`COMMANDS` lists them in the order of the work.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback

from inspector import __version__
from inspector.cli import baselines, demo, labels, learn, review, scan, status, store, watch
from inspector.errors import UsageError

#: The commands, in the order a user meets them (and ``--help`` lists them).
COMMANDS = (learn, scan, watch, review, labels, baselines, status, store, demo)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        raise UsageError(f"{message} (see '{self.prog} --help')")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="inspector", description="Flag camera frames that do not look "
                     "like the camera's normal scene.")
    parser.add_argument("--version", action="version", version=f"inspector {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser,
                                help="one of these, in the order of the work:")
    sub.required = True
    for command in COMMANDS:
        command.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    try:
        args = build_parser().parse_args(argv)
        return int(args.func(args) or 0)
    except UsageError as exc:
        print(f"inspector: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("inspector: interrupted", file=sys.stderr)
        return 130
    except SystemExit:
        raise
    except Exception as exc:  # a failure of ours, not the user's
        if os.environ.get("INSPECTOR_DEBUG"):
            traceback.print_exc()
        print(f"inspector: failed: {type(exc).__name__}: {exc} "
              "(set INSPECTOR_DEBUG=1 for details)", file=sys.stderr)
        return 1
