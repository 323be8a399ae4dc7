"""What every command shares: the --store/--config options, output options, reading the
config and store, checking SOURCE, and printing to the terminal."""

from __future__ import annotations

import argparse
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

from inspector.config import Config, load_config
from inspector.errors import UsageError
from inspector.storage.store import Store

if TYPE_CHECKING:  # (the jobs are imported when a command runs, not at start-up)
    from inspector.jobs.scan import ScanSummary


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


def add_scheduler(p: argparse.ArgumentParser) -> None:
    """--scheduler, shared by learn and scan."""
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask cluster: a scheduler address (tcp://host:8786), or "
                        "local:N for N worker processes on this machine (default from config: "
                        "none, everything runs here)")


@contextmanager
def cluster(args: argparse.Namespace, config: Config):
    """The Dask client of ``--scheduler`` or ``[cluster] scheduler`` (None when neither is
    set); says where the Dask dashboard is."""
    from inspector.jobs.cluster import cluster_settings, connect, dashboard

    settings = cluster_settings(config, getattr(args, "scheduler", None))
    with connect(settings) as client:
        if client is not None:
            workers = len(client.scheduler_info().get("workers", {}))
            link = dashboard(client)
            say(f"Dask scheduler {client.scheduler.address}: {workers} workers"
                + (f", dashboard {link}" if link else ""))
        yield client


def resolve(args: argparse.Namespace) -> tuple[Config, Store]:
    """Config and store of a command, with command-line options over the config file."""
    config = load_config(args.config)
    root = Path(args.store or config.paths.store)
    if root.exists() and not root.is_dir():
        raise UsageError(f"store {str(root)!r} is not a folder")
    return config, Store(root)


def check_source(source: Path, *outputs: Path | None, files: tuple[Path | None, ...] = ()
                 ) -> Path:
    """SOURCE must be a folder, and no output may land inside it; each output folder
    (``outputs``) must be a folder or not exist yet, each output file (``files``) must not be
    a folder."""
    if not source.is_dir():
        raise UsageError(f"SOURCE {str(source)!r} is not a folder")
    root = source.resolve()
    for out, folder in [(o, True) for o in outputs] + [(f, False) for f in files]:
        if out is None:
            continue
        o = out.resolve()
        if o == root or root in o.parents:
            raise UsageError(f"output {str(out)!r} is inside SOURCE; inspector never writes "
                             "into the folder it reads")
        if out.exists() and out.is_dir() != folder:
            raise UsageError(f"output {str(out)!r} is a {'file' if folder else 'folder'}; "
                             f"a {'folder' if folder else 'file'} is expected there")
    return root


def say(text: str = "") -> None:
    print(text, flush=True)


def counted(count: int, word: str) -> str:
    """``count`` and ``word``, plural unless one ("1 frame", "3 frames")."""
    return f"{count} {word}{'' if count == 1 else 's'}"


def report_scan(summary: ScanSummary, out: Path, all_scores: Path | None) -> None:
    """The closing summary of a scan or watch run (a watch's report is a ScanSummary)."""
    for note, n in summary.notes.items():
        say(f"warning: {counted(n, 'frame')} of {note}")
    say(f"scored {summary.scored} frames, flagged {summary.flagged}, skipped {summary.skipped} "
        f"in {summary.seconds:.1f} s ({summary.rate:.1f} frames/s)")
    if summary.unchanged:
        older = (f", {summary.unchanged_older} of them against an older baseline than the "
                 "active one" if summary.unchanged_older else "")
        say(f"not scored again: {summary.unchanged} frames scored before and unchanged since "
            f"(see the ledger{older}); --rescore scores them again")
    events = f"  events: {out / 'events.csv'}" if (out / "events.csv").exists() else ""
    say(f"flagged frames: {out / 'flagged.csv'}{events}  overlays: {out / 'overlays'}  "
        f"skipped: {out / 'skipped.csv'}")
    if summary.health:
        say(f"camera health: {counted(summary.health, 'condition')} in {out / 'health.csv'}")
    if all_scores:
        say(f"all scores: {all_scores}")
    if summary.damaged:
        say("damaged baselines (no frame of these cameras is scored until this is fixed): "
            + "; ".join(summary.damaged[c] for c in sorted(summary.damaged)))
    waiting = summary.no_baseline
    missing = sorted(set(waiting) - set(summary.damaged))
    if missing:
        say(f"no baseline for {', '.join(missing)} ({sum(waiting[c] for c in missing)} frames "
            "not scored, in skipped.csv): learn first ('inspector learn'), or name the store "
            "that has the baselines with --store")
    if summary.loose:
        say(f"outside any camera folder: {summary.loose} files directly in SOURCE (frames go "
            "in SOURCE/<camera>/...; if SOURCE is one camera's folder, scan the folder above it)")
