"""``inspector baselines CAMERA``: list a camera's baseline versions, or switch to one."""

from __future__ import annotations

import argparse

from inspector.cli.common import add_common, resolve, say
from inspector.errors import UsageError
from inspector.jobs.compare import COMPARE_FRAMES, compare_versions, version_rows
from inspector.storage.store import check_camera_name


def register(sub) -> None:
    p = sub.add_parser("baselines", help="list a camera's baseline versions, or switch to one "
                                         "(rollback included)")
    p.add_argument("camera", metavar="CAMERA", help="the camera whose baselines to list or switch")
    p.add_argument("--activate", metavar="VERSION",
                   help="make baseline VERSION (v1, v2, ...) the active one")
    p.add_argument("--compare", type=int, default=COMPARE_FRAMES, metavar="N",
                   help=f"before switching, compare flags on the camera's last N scored frames "
                        f"(default {COMPARE_FRAMES}; 0 skips)")
    add_common(p)
    p.set_defaults(func=cmd_baselines)


def cmd_baselines(args: argparse.Namespace) -> int:
    config, store = resolve(args)
    camera = check_camera_name(args.camera)
    rows = version_rows(store, camera)
    if not rows:
        known = ", ".join(store.cameras()) or "none"
        raise UsageError(f"camera {camera!r} has no baselines in {store.root} "
                         f"(cameras: {known})")
    if args.activate:
        if args.compare < 0:
            raise UsageError("--compare must be 0 or more")
        old = store.active_version(camera)
        store.check_activatable(camera, args.activate)  # a one-line error if not
        if args.compare:
            say(compare_versions(store, config, camera, old, args.activate, args.compare).text())
        store.activate(camera, args.activate)
        say(f"{camera}: {args.activate} is now active (was {old or 'none'})")
        return 0
    say(f"{'baseline':<9}{'active':<8}{'model':<6}{'frames':>7}  {'first frame':<20}"
        f"{'last frame':<20}{'threshold':>10}{'guaranteed rate':>17}{'extrapolated':>14}"
        f"{'false alarms added':>20}{'masked':>8}  files")
    for r in rows:
        target = r["extrapolated_target"]
        say(f"{r['version']:<9}{'yes' if r['active'] else '':<8}{r['model']:<6}{r['frames']:>7}  "
            f"{r['first'][:19]:<20}{r['last'][:19]:<20}{r['threshold']:>10.3f}"
            f"{r['false_alarm_rate']:>17.4g}{'-' if target is None else f'{target:.4g}':>14}"
            f"{r['false_alarms_added']:>20}{r['masked']:>8.1%}  {_files(r['check'])}")
    if any(r["extrapolated_target"] is not None for r in rows):
        conf = max(r.get("extrapolated_confidence", 0.0) for r in rows)
        say("extrapolated: the rate a generalized Pareto tail fit aims at, beyond what the "
            "calibration frames guarantee"
            + (f" (the threshold is the fit's upper {conf:.0%} confidence bound: under the "
               "fitted tail, the rate stays at or below the target with that confidence)"
               if conf else ""))
    for r in rows:
        if r["active"] and r["text_boxes"]:
            say(f"{r['version']} masks text boxes (x0, y0, x1, y1 in frame pixels): "
                + ", ".join(str(tuple(b)) for b in r["text_boxes"]))
    damaged = [r for r in rows if r["check"].damaged and r["active"]]
    if damaged:
        say(f"the active version is damaged: {store.advice(camera, damaged[0]['version'])}")
    return 0


def _files(check) -> str:
    """The files column: ok, unchecked (saved before checksums) or DAMAGED with the problem."""
    if check.state == "unchecked":
        return "unchecked (saved before checksums were recorded)"
    if check.damaged:
        return f"DAMAGED: {check.problem}"
    return "ok"
