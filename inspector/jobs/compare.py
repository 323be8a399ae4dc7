"""Baseline versions of a camera: listing, switching (rollback included), and what a switch
would change on the camera's recent frames.

``inspector baselines CAMERA`` lists the versions; ``--activate VERSION`` switches after
showing how many flags the switch adds and removes on the camera's last N scored frames
(from the frame ledger, table ``frames`` of the store's SQLite file, read only).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from inspector.config import Config
from inspector.storage.frames import FrameFile, iter_batches
from inspector.storage.ledger import read_scored
from inspector.storage.store import DamagedBaseline, Store

#: Recent scored frames a comparison runs on, unless told otherwise.
COMPARE_FRAMES = 200


@dataclass(frozen=True)
class FlagChange:
    """How flags change from one baseline to another on the same frames.

    Attributes
    ----------
    frames : int
        Frames compared.
    old_flags, new_flags : int
        Frames flagged by each baseline.
    added : int
        Flagged by the new baseline only.
    removed : int
        Flagged by the old baseline only.
    """

    frames: int
    old_flags: int
    new_flags: int
    added: int
    removed: int


def compare_flags(old_scores: np.ndarray, old_threshold: float, new_scores: np.ndarray,
                  new_threshold: float) -> FlagChange:
    """Flags added and removed when ``new`` replaces ``old``, on the same frames.

    Parameters
    ----------
    old_scores, new_scores : ndarray, shape (n,)
        Frame scores of the same n frames under each baseline.
    old_threshold, new_threshold : float
        A frame is flagged iff its score is above its baseline's threshold.
    """
    old = np.asarray(old_scores, float) > old_threshold
    new = np.asarray(new_scores, float) > new_threshold
    if old.shape != new.shape:
        raise ValueError(f"scores of different frames: {old.shape} vs {new.shape}")
    return FlagChange(frames=int(old.size), old_flags=int(old.sum()), new_flags=int(new.sum()),
                      added=int((new & ~old).sum()), removed=int((old & ~new).sum()))


def last_scored(database: Path, camera: str, n: int) -> list[str]:
    """Absolute paths of the camera's last ``n`` scored frames in the ledger, newest first
    (empty when nothing was scored yet)."""
    return [r["path"] for r in read_scored(database, camera, n)]


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare_versions`: the flag change, or why there is none."""

    camera: str
    old: str
    new: str
    change: FlagChange | None
    unreadable: int = 0
    reason: str = ""
    #: Ledger frames not read because they lie outside the folder the caller allows.
    outside: int = 0

    def text(self) -> str:
        if self.change is None:
            return f"{self.camera}: {self.reason}"
        c = self.change
        extra = f", {self.unreadable} could not be read" if self.unreadable else ""
        if self.outside:
            extra += f", {self.outside} outside the folder left out"
        return (f"{self.camera}: {self.new} instead of {self.old} on the last {c.frames} "
                f"scored frames{extra}: {c.old_flags} -> {c.new_flags} flags, "
                f"{c.added} added, {c.removed} removed")


def compare_versions(store: Store, config: Config, camera: str, old: str | None, new: str,
                     n: int = COMPARE_FRAMES,
                     within: Callable[[str], Path | None] | None = None) -> Comparison:
    """Score the camera's last ``n`` ledger frames with both versions and compare the flags.

    ``within`` maps a ledger path to the file that may be read, or None for a frame that
    must not be (the review page passes its folder boundary check); such frames are left
    out and counted in ``outside``. Without it every ledger path is read (the command line).
    """
    from inspector.jobs.scan import read_args

    if old is None:
        return Comparison(camera, "-", new, None, reason="no active version to compare with")
    if old == new:
        return Comparison(camera, old, new, None, reason=f"{new} is already the active version")
    paths = last_scored(store.database, camera, n)
    if not paths:
        return Comparison(camera, old, new, None,
                          reason="nothing to compare against: no scored frames of this camera "
                                 "in the store's frame ledger")
    scores, unreadable = [], set()
    try:
        baselines = [store.load(camera, old), store.load(camera, new)]
    except DamagedBaseline as exc:
        return Comparison(camera, old, new, None, reason=f"nothing compared: {exc}")
    allowed = [Path(p) if within is None else within(p) for p in paths]
    outside = sum(p is None for p in allowed)
    files = [FrameFile(p, p.name, camera) for p in allowed if p is not None]
    if not files:
        return Comparison(camera, old, new, None, outside=outside,
                          reason=f"nothing to compare against: none of the last {len(paths)} "
                                 "scored frames is inside the scanned folder")
    for b in baselines:
        got: dict[str, float] = {}
        for batch in iter_batches(files, 32,
                                  work=lambda images, b=b: b.score(images, cells=False).scores,
                                  **read_args(b, config)):
            unreadable.update(str(f.path) for f, _ in batch.errors)
            if batch.frames:
                got.update(zip((str(f.file.path) for f in batch.frames), map(float, batch.result)))
        scores.append(got)
    common = [str(f.path) for f in files if str(f.path) not in unreadable
              and all(str(f.path) in s for s in scores)]
    if not common:
        return Comparison(camera, old, new, None, unreadable=len(unreadable), outside=outside,
                          reason=f"nothing to compare against: none of the last {len(paths)} "
                                 "scored frames could be read")
    change = compare_flags(np.array([scores[0][p] for p in common]),
                           baselines[0].threshold.value,
                           np.array([scores[1][p] for p in common]),
                           baselines[1].threshold.value)
    return Comparison(camera, old, new, change, unreadable=len(unreadable), outside=outside)


def version_rows(store: Store, camera: str) -> list[dict]:
    """One dict per version: version, created, frames, first/last frame time, threshold,
    false-alarm rate guaranteed and any extrapolated target (None when there
    is none), model, false alarms added, share of the view masked, text boxes masked,
    active, and ``check`` (see
    :meth:`inspector.storage.store.Store.check`: ok, unchecked or damaged, with the problem).
    A damaged version whose description cannot be read is listed with blanks."""
    active = store.active_version(camera)
    rows = []
    for v in store.versions(camera):
        check = store.check(camera, v)
        try:
            info = asdict(store.info(camera, v))
        except (OSError, ValueError, AttributeError):
            info = {"version": v, "created": "", "model": "", "frames": 0, "first": "",
                    "last": "", "threshold": float("nan"), "false_alarm_rate": float("nan"),
                    "false_alarms_added": 0, "extrapolated_target": None,
                    "masked": float("nan"), "text_boxes": []}
        rows.append({**info, "active": v == active, "check": check})
    return rows
