"""The command line: a thin shell that wires the library to folders and a terminal.

Exit codes: 0 done (also when some frames were skipped), 2 usage or configuration error
(one line, no traceback), 1 failure. Commands other than learn and scan live in their own
modules, each adding its subcommand through ``add_command(subparsers)``.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from dataclasses import replace
from importlib import import_module
from pathlib import Path

from inspector import __version__
from inspector.config import Config, load_config
from inspector.errors import UsageError
from inspector.frames import discover
from inspector.models import MODEL_NAMES
from inspector.store import Store, check_camera_name

#: Modules that add further subcommands (each defines ``add_command(subparsers)``).
COMMAND_MODULES = ("inspector.demo", "inspector.review", "inspector.labels",
                   "inspector.baselines", "inspector.watch")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, exit 2
        raise UsageError(f"{message} (see '{self.prog} --help')")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="inspector", description="Flag camera frames that do not look "
                     "like the camera's normal scene.")
    parser.add_argument("--version", action="version", version=f"inspector {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("learn", help="learn a new normal baseline from frames of normal scenes")
    p.add_argument("source", type=Path, metavar="SOURCE",
                   help="folder of normal frames: one subfolder per camera, or one camera's "
                        "frames with --camera")
    p.add_argument("--camera", help="all frames under SOURCE belong to this camera")
    p.add_argument("--model", choices=MODEL_NAMES, help="density model (default from config: ppca)")
    p.add_argument("--add-false-alarms", action="store_true",
                   help="also learn from the frames labelled 'false alarm' in review")
    p.add_argument("--keep-active", action="store_true",
                   help="save the new version without activating it (switch later with "
                        "'inspector baselines CAMERA --activate VERSION')")
    p.add_argument("--compare", type=int, default=200, metavar="N",
                   help="show how many flags the new version adds and removes on the camera's "
                        "last N scored frames (default 200; 0 skips)")
    add_common(p)
    p.set_defaults(func=cmd_learn)

    p = sub.add_parser("scan", help="score every frame under a folder against its camera's "
                                    "baseline")
    p.add_argument("source", type=Path, metavar="SOURCE",
                   help="folder of frames, one subfolder per camera")
    add_common(p)
    add_outputs(p)
    p.set_defaults(func=cmd_scan)

    for name in COMMAND_MODULES:
        import_module(name).add_command(sub)
    return parser


def add_common(p: argparse.ArgumentParser) -> None:
    """--store and --config, shared by every command."""
    p.add_argument("--store", type=Path, help="baseline store folder (default from config)")
    p.add_argument("--config", type=Path, help="TOML config file (default: config/inspector.toml "
                                               "if present)")


def add_outputs(p: argparse.ArgumentParser) -> None:
    """Output options shared by scan and watch."""
    p.add_argument("--out", type=Path, help="results folder (default from config)")
    p.add_argument("--all-scores", type=Path, metavar="FILE",
                   help="also write a CSV row for every frame scored")
    p.add_argument("--maps", type=Path, metavar="DIR",
                   help="also write each frame's anomaly map as DIR/<camera>/<stem>.npy")


def resolve(args: argparse.Namespace) -> tuple[Config, Store]:
    """Config and store of a command, with command-line options over the config file."""
    config = load_config(args.config)
    store = Store(args.store or Path(config.paths.store))
    return config, store


def check_source(source: Path, *outputs: Path | None) -> Path:
    """SOURCE must be a folder, and no output may land inside it."""
    if not source.is_dir():
        raise UsageError(f"SOURCE {str(source)!r} is not a folder")
    root = source.resolve()
    for out in outputs:
        if out is not None:
            o = out.resolve()
            if o == root or root in o.parents:
                raise UsageError(f"output {str(out)!r} is inside SOURCE; inspector never writes "
                                 "into the folder it reads")
    return root


def say(text: str = "") -> None:
    print(text, flush=True)


def cmd_learn(args: argparse.Namespace) -> int:
    from inspector.learn import learn_camera

    config, store = resolve(args)
    check_source(args.source, store.root)
    if args.camera is not None:
        check_camera_name(args.camera)
    files, skips = discover(args.source, camera=args.camera)
    if args.camera is None:
        for s in skips:
            if not s.camera:
                say(f"skipped {s.rel}: {s.reason}")
        skips = [s for s in skips if s.camera]
    cameras: dict[str, list] = {}
    for f in files:
        cameras.setdefault(f.camera, []).append(f)
    if not cameras:
        hint = "" if args.camera else " (one subfolder per camera, or name one with --camera)"
        raise UsageError(f"no frames found under {str(args.source)!r}{hint}")
    if args.compare < 0:
        raise UsageError("--compare must be 0 or more")
    for camera, cam_files in cameras.items():
        cfg = config.camera(camera)
        if args.model:
            cfg = replace(cfg, model=replace(cfg.model, model=args.model))
        extra: dict = {}
        if args.add_false_alarms:
            cam_files, extra = _with_false_alarms(store, camera, cam_files)
        previous = store.active_version(camera)
        report = learn_camera(cam_files, cfg, store, activate=not args.keep_active, extra=extra)
        skipped = [s for s in skips if s.camera == camera] + report.skipped
        say(f"{camera}: baseline {report.version} ({cfg.model.model}) from {report.frames} "
            f"frames, threshold {report.threshold:.3f} for a false-alarm rate of "
            f"{report.promised_alpha:.3g}, {len(skipped)} skipped, {report.seconds:.1f} s")
        for note in getattr(report, "notes", []):
            say(f"  {note}")
        for w in report.warnings:
            say(f"  warning: {w}")
        for s in skipped[:10]:
            say(f"  skipped {s.rel}: {s.reason}")
        if len(skipped) > 10:
            say(f"  ... and {len(skipped) - 10} more skipped")
        if args.compare and previous:
            from inspector.baselines import compare_versions

            say("  " + compare_versions(store, config, camera, previous, report.version,
                                        args.compare).text())
        if args.keep_active and previous:
            say(f"  {previous} stays active; switch with 'inspector baselines {camera} "
                f"--activate {report.version}'")
    say(f"store: {store.root}")
    return 0


def _with_false_alarms(store: Store, camera: str, files: list) -> tuple[list, dict]:
    """The camera's frames plus those labelled 'false alarm' in review (missing ones reported)."""
    from inspector.frames import FrameFile
    from inspector.labels import connect, read

    if not store.database.is_file():
        say(f"{camera}: no review labels in {store.root}; learning from SOURCE only")
        return files, {}
    conn = connect(store.database)
    try:
        labelled = read(conn, camera=camera, label="false_alarm")
    finally:
        conn.close()
    have = {str(f.path.resolve()) for f in files}
    added, missing = [], []
    for lab in labelled:
        path = Path(lab.path)
        if str(path) in have:
            continue
        if path.is_file():
            added.append(FrameFile(path, lab.rel or path.name, camera))
            have.add(str(path))
        else:
            missing.append(lab.path)
    say(f"{camera}: adding {len(added)} frames labelled 'false alarm'"
        + (f"; {len(missing)} of them no longer exist" if missing else ""))
    for p in missing[:10]:
        say(f"  missing {p}")
    if len(missing) > 10:
        say(f"  ... and {len(missing) - 10} more missing")
    return files + added, {"false_alarm_frames": len(added)}


def cmd_scan(args: argparse.Namespace) -> int:
    from inspector.scan import run_scan

    config, store = resolve(args)
    out = args.out or Path(config.paths.out)
    check_source(args.source, out, args.all_scores, args.maps)
    summary = run_scan(args.source, config, store, out, args.all_scores, args.maps)
    report_scan(summary, out, args.all_scores)
    return 0


def report_scan(summary, out: Path, all_scores: Path | None) -> None:
    """The closing summary of a scan or watch run."""
    for note, n in summary.notes.items():
        say(f"warning: {n} frames of {note}")
    say(f"scored {summary.scored} frames, flagged {summary.flagged}, skipped {summary.skipped} "
        f"in {summary.seconds:.1f} s ({summary.rate:.1f} frames/s)")
    events = f"  events: {out / 'events.csv'}" if (out / "events.csv").exists() else ""
    say(f"flagged frames: {out / 'flagged.csv'}{events}  overlays: {out / 'overlays'}  "
        f"skipped: {out / 'skipped.csv'}")
    if getattr(summary, "health", 0):
        say(f"camera health: {summary.health} conditions in {out / 'health.csv'}")
    if all_scores:
        say(f"all scores: {all_scores}")


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
