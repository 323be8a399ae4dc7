"""What the review page shows, read from a results folder: flagged frames, events, scores over
time. Plain functions and data classes; the web server only wires them to requests.

A results folder OUT (written by ``scan`` or ``watch``) holds ``flagged.csv``,
``overlays/<camera>/<stem>.jpg``, ``run.json`` (the scanned folder and the store) and
possibly ``events.csv`` and an all-scores CSV. The store's frame ledger (table ``frames``)
adds scores of unflagged frames to the timelines when present.
"""

from __future__ import annotations

import csv
import json
import math
import threading
from dataclasses import dataclass, field
from datetime import date, datetime
from html import escape
from pathlib import Path
from typing import NamedTuple
from urllib.parse import urlencode

from inspector.storage.labels import LABEL_TEXT as LABEL_WORDS
from inspector.storage.ledger import read_scored
from inspector.storage.results import OLD_COLUMNS

#: All-scores files looked for in OUT for the timelines (``scan --all-scores OUT/all_scores.csv``).
ALL_SCORES_NAMES = ("all_scores.csv", "scores.csv")
#: At most this many timeline points per camera (the newest).
MAX_POINTS = 5000


@dataclass
class Item:
    """A flagged frame or an event (shown by its peak frame), or any scored frame.

    Attributes
    ----------
    id : str
        ``f<row>`` for a row of flagged.csv, ``e<row>`` for a row of events.csv,
        ``p<n>`` for an unflagged frame of the timelines.
    path : Path
        Absolute path of the (peak) frame as the results name it; the page reads it only
        through its boundary check on ``rel`` (see :func:`inspector.review.server.inside`).
    overlay : str
        The saved overlay, relative to the results folder ('' when none was saved).
    members : list of str
        Absolute paths of the flagged frames a label applies to.
    """

    id: str
    kind: str
    camera: str
    rel: str
    path: Path
    time: datetime
    score: float
    threshold: float
    p_value: float
    version: str
    overlay: str = ""
    flagged: bool = True
    event: str = ""
    start: datetime | None = None
    end: datetime | None = None
    frames: int = 1
    members: list[str] = field(default_factory=list)
    #: Persistent events (busy cameras): when the region first appeared; None otherwise.
    since: datetime | None = None
    #: A frame darker than every normal frame: its gain over the largest normal one, by
    #: which its noise was taken as amplified (column ``noise_amplified``); None otherwise.
    noise_amplified: float | None = None


@dataclass(frozen=True)
class Point:
    """A scored frame on a timeline; ``item`` is what clicking it opens, ``path`` the frame."""

    camera: str
    time: datetime
    score: float
    threshold: float
    flagged: bool
    item: str
    path: str = ""


class Scored(NamedTuple):
    """A scored frame as an all-scores file or the ledger gives it (a timeline point to be)."""

    camera: str
    path: Path
    rel: str
    time: datetime
    score: float
    threshold: float
    version: str
    noise_amplified: float | None


class Results:
    """A results folder, re-read when its files change.

    Parameters
    ----------
    out : Path
        The results folder.
    source : Path, optional
        The scanned folder; by default the one recorded in ``OUT/run.json``.
    database : Path, optional
        The store's SQLite file (for the frame ledger).
    """

    def __init__(self, out: Path, source: Path | None = None, database: Path | None = None):
        self.out = Path(out).resolve()
        run = read_run(self.out)
        self.source = Path(source).resolve() if source else Path(run.get("source") or self.out)
        self.database = database
        self.problems: list[str] = []
        self._stamp: tuple = ()
        self._lock = threading.Lock()
        self.items: dict[str, Item] = {}
        self.listed: list[Item] = []
        self.frames: list[Item] = []
        self.points: list[Point] = []
        self.refresh()

    def _files(self) -> list[Path]:
        files = [self.out / "flagged.csv", self.out / "events.csv"]
        files += [self.out / n for n in ALL_SCORES_NAMES]
        if self.database is not None:
            files += [Path(self.database), Path(f"{self.database}-wal")]
        return files

    def refresh(self) -> None:
        """Re-read the folder if any of its files changed since the last read."""
        with self._lock:
            self._refresh()

    def _refresh(self) -> None:
        stamp = tuple(_stamp(p) for p in self._files())
        if stamp == self._stamp:
            return
        self._stamp = stamp
        self.problems = []
        flagged = self._read_flagged()
        events = self._read_events(flagged)
        in_event = {m for e in events for m in e.members}
        self.frames = flagged
        self.listed = events + [f for f in flagged if str(f.path) not in in_event]
        self.items = {i.id: i for i in events + flagged}
        self._read_points(flagged, events)

    def path_of(self, rel: str) -> Path:
        return self.source / rel

    def _read_flagged(self) -> list[Item]:
        """The rows of flagged.csv as items ``f<row>``, each its own member; a malformed row
        is left out with a line in :attr:`problems`."""
        items = []
        for n, row in enumerate(_rows(self.out / "flagged.csv", self.problems), start=1):
            try:
                camera = row["camera"]
                items.append(Item(
                    id=f"f{n}", kind="frame", camera=camera, rel=row["frame"],
                    path=self.path_of(row["frame"]), time=parse_time(row["time"]),
                    score=float(row["score"]), threshold=float(row["threshold"]),
                    p_value=_float(row.get("p_value")), version=_baseline(row),
                    overlay=self._overlay(camera, row.get("overlay") or ""),
                    noise_amplified=_optional(row.get("noise_amplified"))))
            except (KeyError, TypeError, ValueError):
                self.problems.append(f"flagged.csv row {n + 1} is malformed; left out")
                continue
            items[-1].members = [str(items[-1].path)]
        return items

    @staticmethod
    def _overlay(camera: str, written: str) -> str:
        """Where the row's saved overlay lies in the results folder ('' when none); whether it
        is there, and inside the folder, is checked when it is served."""
        return f"overlays/{camera}/{Path(written).name}" if written else ""

    def _read_events(self, flagged: list[Item]) -> list[Item]:
        """The rows of events.csv as items ``e<row>``, shown by their peak frame (its
        flagged row's threshold, p-value, version and overlay when it has one), their
        members the ``flagged`` frames of the camera between the event's start and end (and
        the peak); a malformed row is left out with a line in :attr:`problems`."""
        events = []
        by_rel = {(f.camera, f.rel): f for f in flagged}
        for n, row in enumerate(_rows(self.out / "events.csv", self.problems), start=1):
            try:
                camera, peak = row["camera"], row["peak_frame"]
                start, end = parse_time(row["start"]), parse_time(row["end"])
                score = float(row["peak_score"])
                count = int(float(row.get("flagged_frames") or row.get("frames") or 1))
                since = parse_time(row["since"]) if row.get("since") else None
            except (KeyError, TypeError, ValueError):
                self.problems.append(f"events.csv row {n + 1} is malformed; left out")
                continue
            top = by_rel.get((camera, peak))
            members = [str(f.path) for f in flagged
                       if f.camera == camera and start <= f.time <= end]
            path = self.path_of(peak)
            if str(path) not in members:
                members.append(str(path))
            events.append(Item(
                id=f"e{n}", kind="event", camera=camera, rel=peak, path=path,
                time=top.time if top else start, score=score,
                threshold=top.threshold if top else math.nan,
                p_value=top.p_value if top else math.nan, version=top.version if top else "",
                overlay=top.overlay if top else "", event=row.get("event") or str(n),
                start=start, end=end, frames=count, members=members, since=since,
                noise_amplified=top.noise_amplified if top else None))
        return events

    def _read_points(self, flagged: list[Item], events: list[Item]) -> None:
        """The timelines (:attr:`points`, the newest :data:`MAX_POINTS` of each camera):
        the ``flagged`` frames (a click opens their event when they are in one), then every
        other scored frame of the all-scores files and the ledger, each also made an item
        (``p<n>``) of :attr:`items`."""
        owner = {}
        for e in events:
            for m in e.members:
                owner[m] = e.id
        seen: dict[tuple[str, str], Point] = {}
        for f in flagged:
            seen[(f.camera, str(f.path))] = Point(f.camera, f.time, f.score, f.threshold, True,
                                                  owner.get(str(f.path), f.id), str(f.path))
        extra: list[Scored] = []
        for name in ALL_SCORES_NAMES:
            for row in _rows(self.out / name, None):
                try:
                    extra.append(Scored(row["camera"], self.path_of(row["frame"]), row["frame"],
                                        parse_time(row["time"]), float(row["score"]),
                                        float(row["threshold"]), _baseline(row),
                                        _optional(row.get("noise_amplified"))))
                except (KeyError, TypeError, ValueError):
                    continue
        extra += self._ledger()
        n = 0
        for s in extra:
            key = (s.camera, str(s.path))
            if key in seen:
                continue
            n += 1
            above = s.score > s.threshold
            item = Item(id=f"p{n}", kind="frame", camera=s.camera, rel=s.rel, path=s.path,
                        time=s.time, score=s.score, threshold=s.threshold, p_value=math.nan,
                        version=s.version, flagged=above, members=[str(s.path)],
                        noise_amplified=s.noise_amplified)
            self.items[item.id] = item
            seen[key] = Point(s.camera, s.time, s.score, s.threshold, above, item.id,
                              str(s.path))
        points = sorted(seen.values(), key=lambda p: (p.camera, p.time))
        by_cam: dict[str, list[Point]] = {}
        for p in points:
            by_cam.setdefault(p.camera, []).append(p)
        self.points = [p for ps in by_cam.values() for p in ps[-MAX_POINTS:]]

    def _ledger(self) -> list[Scored]:
        """Scored frames of the scanned folder from the ledger (read only)."""
        if self.database is None:
            return []
        out = []
        for r in read_scored(self.database):
            try:
                p = Path(r["path"])
                rel = p.relative_to(self.source).as_posix()
                out.append(Scored(r["camera"], p, rel, parse_time(r["capture_time"]),
                                  float(r["score"]), float(r["threshold"]), r["version"] or "",
                                  _optional(_column(r, "noise_amplified"))))
            except (TypeError, ValueError):
                continue
        return out


def _stamp(path: Path):
    try:
        st = path.stat()
        return st.st_mtime_ns, st.st_size
    except OSError:
        return None


def read_run(out: Path) -> dict:
    """``OUT/run.json`` as a dict ({} when missing or unreadable)."""
    try:
        data = json.loads((Path(out) / "run.json").read_text(encoding="utf-8"))
        return data if isinstance(data, dict) else {}
    except (OSError, ValueError):
        return {}


def _rows(path: Path, problems: list[str] | None):
    if not path.is_file():
        return
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            yield from csv.DictReader(fh)
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        if problems is not None:
            problems.append(f"{path.name} could not be read to the end: {exc}")


def _baseline(row: dict) -> str:
    """The baseline version of a results row (column ``model`` in folders written before the
    column was named ``baseline``)."""
    return row.get("baseline") or row.get(OLD_COLUMNS["baseline"]) or ""


def _optional(text) -> float | None:
    """A number of an optional column (None when empty, missing or not a number)."""
    v = _float(text)
    return v if math.isfinite(v) else None


def _column(row, name: str):
    """A ledger row's column, None in a ledger made before the column existed."""
    return row[name] if name in row.keys() else None


def _float(text) -> float:
    try:
        return float(text)
    except (TypeError, ValueError):
        return math.nan


def parse_time(text) -> datetime:
    """ISO 8601 capture time, compared as local wall-clock time (any offset dropped)."""
    t = datetime.fromisoformat(str(text).strip())
    return t.replace(tzinfo=None) if t.tzinfo else t


# --- filtering and ordering ----------------------------------------------------------------

@dataclass(frozen=True)
class Filters:
    """What the list shows; built from the page's query string by :func:`parse_filters`."""

    camera: str = ""
    since: date | None = None
    until: date | None = None
    label: str = "all"
    sort: str = "score"
    view: str = "events"

    def query(self, **changes) -> str:
        """The query string for these filters with some changed (for links)."""
        values = {"camera": self.camera, "since": self.since.isoformat() if self.since else "",
                  "until": self.until.isoformat() if self.until else "", "label": self.label,
                  "sort": self.sort, "view": self.view}
        values.update(changes)
        return urlencode({k: v for k, v in values.items() if v not in ("", None)})


#: The unreviewed state is called "to review" everywhere (filter value ``to_review``).
UNREVIEWED = "to review"
LABEL_FILTERS = ("all", "to_review", "incident", "false_alarm", "unsure")
#: Former filter values still accepted (links saved before a rename).
_OLD_FILTERS = {"unlabelled": "to_review"}
SORTS = ("score", "newest")
VIEWS = ("events", "frames")


def parse_filters(args) -> Filters:
    """Filters from query arguments; raises ValueError with a readable message when bad."""
    def day(name):
        text = (args.get(name) or "").strip()
        if not text:
            return None
        try:
            return date.fromisoformat(text)
        except ValueError:
            raise ValueError(f"{name} must be a date like 2026-11-30, not {text!r}") from None

    def choice(name, options):
        value = args.get(name) or options[0]
        value = _OLD_FILTERS.get(value, value) if name == "label" else value
        if value not in options:
            raise ValueError(f"{name} must be one of {', '.join(options)}, not {value!r}")
        return value

    return Filters(camera=(args.get("camera") or "").strip(), since=day("since"),
                   until=day("until"), label=choice("label", LABEL_FILTERS),
                   sort=choice("sort", SORTS), view=choice("view", VIEWS))


def select(items: list[Item], f: Filters, labels: dict[tuple[str, str], str]) -> list[Item]:
    """Items passing the filters, highest score or newest first.

    ``labels`` maps (camera, absolute frame path) to a label.
    """
    out = []
    for it in items:
        if f.camera and it.camera != f.camera:
            continue
        if f.since and it.time.date() < f.since:
            continue
        if f.until and it.time.date() > f.until:
            continue
        lab = labels.get((it.camera, str(it.path)), "")
        if f.label == "to_review" and lab:
            continue
        if f.label not in ("all", "to_review") and lab != f.label:
            continue
        out.append(it)
    if f.sort == "newest":
        out.sort(key=lambda i: (i.time, i.score), reverse=True)
    else:
        out.sort(key=lambda i: (i.score, i.time), reverse=True)
    return out


# --- timeline ------------------------------------------------------------------------------

def symlog(v: float) -> float:
    """Scores span orders of magnitude: sign(v) log10(1 + |v|) keeps them on one plot."""
    return math.copysign(math.log10(1.0 + abs(v)), v)


def timeline_svg(camera: str, points: list[Point], events: list[Item], link: str,
                 selected: str = "", width: int = 1200, height: int = 120,
                 labels: dict[tuple[str, str], str] | None = None) -> str:
    """An inline SVG: score over capture time, the threshold line, events shaded.

    Each point links to ``link + point.item`` (the page URL for that frame). A flagged
    frame is marked by its review label (``labels``: (camera, frame path) -> label): a
    neutral ring while it is still to review, the label's colour once reviewed.
    """
    labels = labels or {}
    pad_l, pad_r, pad_t, pad_b = 48, 12, 8, 22
    pw, ph = width - pad_l - pad_r, height - pad_t - pad_b
    pts = [p for p in points if p.camera == camera]
    evs = [e for e in events if e.camera == camera and e.start and e.end]
    title = f"Scores of {escape(camera)} over capture time"
    if not pts:
        return (f'<svg class="timeline" role="img" aria-label="{title}" viewBox="0 0 {width} 40" '
                f'width="{width}" height="40"><text x="8" y="24">no scores for '
                f'{escape(camera)}</text></svg>')
    t0 = min([p.time for p in pts] + [e.since or e.start for e in evs]).timestamp()
    t1 = max([p.time for p in pts] + [e.end for e in evs]).timestamp()
    span = max(t1 - t0, 1.0)
    ys = [symlog(p.score) for p in pts] + [symlog(p.threshold) for p in pts
                                         if math.isfinite(p.threshold)]
    lo, hi = min(min(ys), 0.0), max(ys) * 1.05 + 1e-9

    def x(t: float) -> float:
        return pad_l + (t - t0) / span * pw

    def y(v: float) -> float:
        return pad_t + ph - (symlog(v) - lo) / (hi - lo) * ph

    parts = [(f'<svg class="timeline" role="img" aria-label="{title}" viewBox="0 0 {width} '
             f'{height}" width="{width}" height="{height}" data-camera="{escape(camera)}">'),
             f'<title>{title}</title>',
             f'<rect x="{pad_l}" y="{pad_t}" width="{pw}" height="{ph}" class="plot"/>']
    for e in evs:  # a persistent event spans from when its region appeared, drawn apart
        x0, x1 = x((e.since or e.start).timestamp()), x(e.end.timestamp())
        kind, note = ("event persistent", f", stayed since {e.since:%H:%M:%S}") if e.since \
            else ("event", "")
        parts.append(f'<a href="{escape(link + e.id)}"><rect class="{kind}" x="{x0 - 2:.1f}" '
                     f'y="{pad_t}" width="{max(x1 - x0, 0) + 4:.1f}" height="{ph}">'
                     f'<title>event {escape(e.event)}: {e.frames} flagged frames, peak '
                     f'{e.score:.2f}{note}</title></rect></a>')
    line: list[tuple[float, float]] = []  # thresholds can change with the version: steps
    for p in pts:
        if math.isfinite(p.threshold):
            px, py = x(p.time.timestamp()), y(p.threshold)
            line.append((px, line[-1][1]) if line else (pad_l, py))
            line.append((px, py))
    if line:
        line.append((pad_l + pw, line[-1][1]))
        coords = " ".join(f"{a:.1f},{b:.1f}" for a, b in line)
        parts.append(f'<polyline class="threshold" points="{coords}"><title>threshold'
                     f'</title></polyline>')
    for p in pts:
        label = labels.get((p.camera, p.path), "")
        cls = "pt"
        if p.flagged or label:
            cls += f" {label}" if label else " flagged"
        if p.item == selected:
            cls += " selected"
        r = 4 if p.flagged or label else 2.5
        state = (f", {LABEL_WORDS.get(label, label)}" if label
                 else f", flagged, {UNREVIEWED}" if p.flagged else "")
        parts.append(f'<a href="{escape(link + p.item)}" data-item="{escape(p.item)}">'
                     f'<circle class="{cls}" cx="{x(p.time.timestamp()):.1f}" '
                     f'cy="{y(p.score):.1f}" r="{r}"><title>{p.time:%Y-%m-%d %H:%M:%S}  score '
                     f'{p.score:.2f}{state}</title></circle></a>')
    for v in _ticks(lo, hi):
        parts.append(f'<text class="tick" x="{pad_l - 4}" y="{y(v) + 4:.1f}" '
                     f'text-anchor="end">{_short(v)}</text>')
    for frac, anchor in ((0.0, "start"), (0.5, "middle"), (1.0, "end")):
        t = datetime.fromtimestamp(t0 + frac * span)
        parts.append(f'<text class="tick" x="{pad_l + frac * pw:.1f}" y="{height - 6}" '
                     f'text-anchor="{anchor}">{t:%Y-%m-%d %H:%M}</text>')
    parts.append("</svg>")
    return "".join(parts)


def _ticks(lo: float, hi: float) -> list[float]:
    """Score values at powers of ten inside the plotted symlog range."""
    out = [0.0] if lo <= 0 <= hi else []
    k = 1
    while math.log10(1 + 10 ** k) <= hi + 1e-9 and k < 12:
        out.append(10.0 ** k)
        k += 1
    if len(out) < 2:
        out.append(10 ** hi - 1)
    while len(out) > 4:  # keep the axis readable on a short plot: every other decade
        out = out[:1] + out[2::2]
    return out


def _short(v: float) -> str:
    if abs(v) >= 1000:
        return f"{v:.0e}".replace("e+0", "e").replace("e+", "e")
    return f"{v:.3g}"
