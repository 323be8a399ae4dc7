"""``inspector learn``: learn a new normal baseline for each camera from frames of normal scenes."""

from __future__ import annotations

import argparse
from dataclasses import replace
from pathlib import Path

from inspector.cli.common import add_common, add_scheduler, check_source, cluster, resolve, say
from inspector.core.models import MODEL_NAMES
from inspector.errors import UsageError
from inspector.storage.frames import discover
from inspector.storage.store import Store, check_camera_name


def register(sub) -> None:
    p = sub.add_parser("learn", help="learn a new normal baseline from frames of normal scenes")
    p.add_argument("source", type=Path, metavar="SOURCE",
                   help="folder of normal frames: one subfolder per camera, or one camera's "
                        "frames with --camera")
    p.add_argument("--camera", help="all frames under SOURCE belong to this camera")
    p.add_argument("--model", choices=MODEL_NAMES, help="density model (default from config: ppca)")
    p.add_argument("--add-false-alarms", action="store_true",
                   help="also learn from the frames labelled 'false alarm' in review")
    p.add_argument("--no-activate", action="store_true",
                   help="save the new baseline without making it the active one (switch later "
                        "with 'inspector baselines CAMERA --activate VERSION')")
    p.add_argument("--keep-active", action="store_true", dest="no_activate",
                   help=argparse.SUPPRESS)  # the old name, still accepted
    p.add_argument("--compare", type=int, default=200, metavar="N",
                   help="show how many flags the new version adds and removes on the camera's "
                        "last N scored frames (default 200; 0 skips)")
    add_common(p)
    add_scheduler(p)
    p.set_defaults(func=cmd_learn)


def cmd_learn(args: argparse.Namespace) -> int:
    from inspector.jobs.learn import check_camera, learn_camera

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
    tasks, previous = [], {}
    for camera, cam_files in cameras.items():
        cfg = config.camera(camera)
        if args.model:
            cfg = replace(cfg, model=replace(cfg.model, model=args.model))
        extra: dict = {}
        if args.add_false_alarms:
            cam_files, extra = _with_false_alarms(store, camera, cam_files)
        check_camera(cam_files, cfg)  # every camera's mistakes before any learning
        previous[camera] = store.active_version(camera)
        tasks.append({"files": cam_files, "cfg": cfg, "store": store,
                      "activate": not args.no_activate, "extra": extra})
    with cluster(args, config) as client:
        if client is None:
            reports = (learn_camera(**t) for t in tasks)
        else:
            from inspector.jobs.cluster import learn_on_cluster

            reports = learn_on_cluster(client, tasks)
        for report, task in zip(reports, tasks):
            _report(args, config, store, report, task["cfg"], skips, previous[report.camera])
    say(f"store: {store.root}")
    return 0


def _report(args, config, store, report, cfg, skips, previous: str | None) -> None:
    """What learn says about one camera's new baseline."""
    camera = report.camera
    skipped = [s for s in skips if s.camera == camera] + report.skipped
    say(f"{camera}: baseline {report.version} ({cfg.model.model}) from {report.frames} "
        f"frames, threshold {report.threshold.value:.3f} ({report.threshold.describe()}), "
        f"{len(skipped)} skipped, {report.seconds:.1f} s")
    for note in getattr(report, "notes", []):
        say(f"  {note}")
    for w in report.warnings:
        say(f"  warning: {w}")
    for s in skipped[:10]:
        say(f"  skipped {s.rel}: {s.reason}")
    if len(skipped) > 10:
        say(f"  ... and {len(skipped) - 10} more skipped")
    if args.compare and previous:
        from inspector.jobs.compare import compare_versions

        say("  " + compare_versions(store, config, camera, previous, report.version,
                                    args.compare).text())
    if args.no_activate and previous:
        say(f"  {previous} stays active; switch with 'inspector baselines {camera} "
            f"--activate {report.version}'")


def _with_false_alarms(store: Store, camera: str, files: list) -> tuple[list, dict]:
    """The camera's frames plus those labelled 'false alarm' in review (missing ones reported)."""
    from inspector.storage.frames import FrameFile
    from inspector.storage.labels import connect, read

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
