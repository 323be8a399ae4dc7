"""Grouping flagged frames into events: what a reviewer works through.

A camera that sees a parcel left in an aisle flags many frames in a row; the reviewer wants
one item, not forty. The rule is a plain k-of-n rule with a gap tolerance, applied to each
camera's frames in capture-time order:

* an event opens at a flagged frame when at least ``k`` of the last ``n`` frames (that one
  included) are flagged, not counting frames of an earlier event; it starts at the
  earliest such flagged frame of that window;
* it grows with every further flagged frame, and tolerates up to ``gap`` unflagged frames
  in a row; the ``gap + 1``-th unflagged frame in a row closes it.

An event of a camera that runs with persistence (see :mod:`inspector.core.persistence`)
also says ``since`` when its region first appeared, which is earlier than its first flagged
frame (the flag comes once the region has stayed the whole window).

With the defaults (k = 1, n = 1, gap = 1) every flagged frame belongs to an event and
flagged frames separated by at most one unflagged frame share one. Raising k (say k = 2,
n = 3) leaves isolated flags out of events (they stay in flagged.csv).

The grouping is a pure function (:func:`group_events`), the only one, used by ``scan`` and
``watch`` alike; :mod:`inspector.storage.results` writes ``events.csv``.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Iterable
from dataclasses import dataclass

from inspector.config import EventSettings  # the [events] section: k, n, gap

#: Columns of events.csv, in this order.
#: ``flagged_frames`` counts the flagged frames of the event (called ``frames`` before);
#: ``since`` is when a persistent event's region appeared ('' for single-frame flags).
EVENT_COLUMNS = ("event", "camera", "start", "end", "flagged_frames", "peak_frame",
                 "peak_score", "since")


@dataclass(frozen=True)
class FramePoint:
    """One scored frame as the grouping sees it."""

    camera: str
    #: Capture time, ISO 8601 (sorts in time order for one camera's frames).
    time: str
    #: The frame path as in flagged.csv.
    frame: str
    score: float
    flagged: bool
    #: Persistence (busy cameras): ISO 8601 time since which the flagged region has stayed;
    #: '' for single-frame flags.
    since: str = ""


@dataclass(frozen=True)
class Event:
    event: str
    camera: str
    start: str
    end: str
    frames: int
    peak_frame: str
    peak_score: float
    #: When the persistent region first appeared (the earliest ``since`` of its frames); ''
    #: for an event of single-frame flags.
    since: str = ""

    def row(self) -> tuple:
        return (self.event, self.camera, self.start, self.end, self.frames, self.peak_frame,
                f"{self.peak_score:.4f}", self.since)


def group_events(points: Iterable[FramePoint], settings: EventSettings = EventSettings()
                 ) -> list[Event]:
    """Group flagged frames into events, camera by camera.

    Parameters
    ----------
    points : iterable of FramePoint
        Scored frames of any cameras, in any order; each camera's are sorted by
        (time, frame).
    settings : EventSettings

    Returns
    -------
    list of Event
        Per camera in time order, ids ``<camera>-0001``, ``<camera>-0002``, ...; cameras
        in name order. ``frames`` counts the flagged frames of the event.
    """
    by_camera: dict[str, list[FramePoint]] = {}
    for p in points:
        by_camera.setdefault(p.camera, []).append(p)
    events: list[Event] = []
    for camera in sorted(by_camera):
        series = sorted(by_camera[camera], key=lambda p: (p.time, p.frame))
        events.extend(_camera_events(camera, series, settings))
    return events


def _camera_events(camera: str, series: list[FramePoint], s: EventSettings) -> list[Event]:
    out: list[Event] = []
    window: deque[tuple[int, FramePoint]] = deque(maxlen=s.n)
    members: list[FramePoint] | None = None  # flagged frames of the open event
    misses = 0
    closed_at = -1  # position of the last frame of the last closed event

    def close() -> None:
        peak = max(members, key=lambda p: p.score)
        since = min((p.since for p in members if p.since), default="")
        out.append(Event(f"{camera}-{len(out) + 1:04d}", camera, members[0].time,
                         members[-1].time, len(members), peak.frame, peak.score, since))

    for i, p in enumerate(series):
        window.append((i, p))
        if members is not None:
            if p.flagged:
                members.append(p)
                misses = 0
                continue
            misses += 1
            if misses > s.gap:
                close()
                members = None
                closed_at = i
            continue
        fresh = [q for j, q in window if q.flagged and j > closed_at]
        if p.flagged and len(fresh) >= s.k:
            members = fresh
            misses = 0
    if members is not None:
        close()
    return out
