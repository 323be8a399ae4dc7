"""Persistence: telling what stays from what passes, in a camera's stream of anomaly maps.

In a busy scene (a loading dock, an aisle, a gate) people and vehicles crossing the view are
normal, and what matters is what is left behind: a parcel, a spill, a fallen pallet. A
passer-by is unusual at one place in one frame and somewhere else in the next; a left
object is unusual at the same place frame after frame.

The persistence map of frame t is, per cell, a steady level of the local anomaly maps of
the last ``window`` frames of the camera's stream, frame t included (:func:`steady_level`):
with the cell's values over the window sorted, x(1) <= ... <= x(w), it is
x(1) - (x(w-1) - x(1)), the lowest value less the spread of the window once its largest value
is set aside. It is high only where every one of those frames was unusual at that cell
(the lowest value: a grey-scale erosion along time by a flat element of ``window`` frames;
Serra 1982, *Image Analysis and Mathematical Morphology*, from memory) *and* unusual in
the same way: a thing that stays shows the same content at the cell frame after frame, so
its anomaly hardly changes, while passers-by who happen to cover a cell in every frame of a
window are different people, bodies and loads, and their anomaly jumps from frame to frame.
This is the long-term / short-term split of abandoned-object detection (unusual against the
normal appearance, unchanged against the last frames; Porikli, Ivanov & Haga 2008, "Robust
abandoned object detection using dual foregrounds", from memory) taken on the anomaly maps
themselves. Setting the largest value aside lets one passer-by walk in front of a left
object within the window without hiding it. The spread is taken as the largest among the
cell and the cells touching it (``around``): a thing left is steady at its edges too, while a
passer-by long enough to cover one cell in every frame (a pallet truck and its load) moves
its edges across the cells beside it. A local map is the anomaly map (standardised,
see :mod:`inspector.core.scoring`) less its median over the cells around each cell, a square
a quarter of the view's long side (``local``; baselines learnt before it: over the whole
frame), so a change of light that the normal frames did not show, over the whole view
(evening light) or over part of it (a lamp's pool switching on, a passer-by's shadow on the
brightness field of preparation), does not read as something left in one place; what is
left covers far less than that square.

A steady level alone cannot tell a parcel from light that stays unusual at one place for a
whole stretch of frames (morning sun through a window, a corner after the lamps go off):
both stay. What tells them apart is when they came. So the persistence map is the steady
level less a reference, the level of the same cell in the ``past`` frames just before the
window (:func:`past_level`; twice the window since the local median, the window before
that): a thing left shows as a step, unusual now and not just before;
light that was already there before the window, or grows over minutes, does not (where
passers-by crossed the place in several of those frames, the reference is taken from the
frames whose looks agree with most of them: ``ground``). A cell
above its threshold keeps its reference while it stays above (held), so a thing left stays
flagged as long as it stays and is not taken into its own reference; a held cell is flagged
only in frames that show what it holds (``shown``), so the flag ends with the frame in which
the thing is taken away, even when the one who takes it still stands there. The local maps of a
window and of the frames before it are also divided by one robust spread, the median of
the window frames' spreads over their cells (``robust``), so that a stretch whose whole
view is disturbed (dark and noisy after the lamps go off) counts a cell by how far it
stands out from the rest of the view, while one frame of the window that a large
passer-by disturbs all over does not shrink a thing left in that frame alone (which would
read as unsteady; baselines learnt before divided each frame by its own spread). A
reference needs :data:`MIN_PAST` frames before the window, so that one passer-by among them
moves it neither up nor down. The first full window of a stretch has no reference: it is
held to the steady level's threshold instead (``start_threshold``); the next ones, with too
few frames before them, are held to it too, but only where they also stepped up from the
frames they have (what stays since the stretch began was judged by its first window). A step
also counts only where the picture itself changed (``looks``, :func:`cell_looks`): the model
can read a region anew while its pixels stay as they were (the gain that preparation fits
over the whole view moves with passers-by elsewhere), and that is not something left there,
while a lamp's smooth pool hardly changes a look at all. A thing that passers-by cross in
two of its first frames has no window of clear frames before its own frames become the
reference; the frames that share its look, or its cells' own brightness, are also taken on
their own (``crossed``, :func:`seen_through`), and the thresholds are calibrated with them.
Where the picture shows a thing settled (its look and its own brightness changed from
before, and its looks the same from frame to frame, within the frames' own look noise in a
dark stretch), the steady level takes no spread off (``brightness``): the model
can read one unchanged thing unevenly, and the spread would take that for passers-by; and
a step counts only where the cell's look changed by more than the mean change of brightness
around it (:func:`_own`): a change of light over a region wider than half the square of a
look (a lamp switching on, the exposure following it) moves the cells around as much as the
cell, a thing set down moves the cell alone. In a
dark, noisy stretch the cells' readings scatter widely but steadily from frame to frame, so a
step at a cell whose own brightness changed is counted against how much the rest of the view
changed rather than against that scatter (``robust`` "change", :func:`_lift`). Last,
the map is opened by the footprint of a model patch (``footprint``, :func:`opened`): anything seen
changes every cell of a patch, so a region narrower than a patch (the edge of a passer-by,
the rim of a masked area) is not something left, and one such region in the few held-out
windows would otherwise set the threshold.

The frame score is the maximum, as for single frames
(:func:`inspector.core.scoring.frame_scores`), and each threshold is the conformal threshold
(:func:`inspector.core.calibration.conformal_threshold`) of the persistence scores of
held-out normal frames (the same held-out, cross-fitted maps as the single-frame threshold,
:func:`inspector.core.calibration.cross_fit_maps`), taken in capture-time order within each
time block: the step's of windows with frames before them, the steady level's of every
window. The calibration holds no cell (no threshold is known yet); holding only keeps a
region flagged after a flag, so a false alarm lasts as long as what raised it stays.

A window only spans frames of one stretch of the stream: a gap longer than ``max_gap``
seconds (or, at learn time, a new time block) starts a new window, and frames scored before
a window is full are not flagged (they are counted, see :class:`PersistenceResult`). Each
cell also keeps the capture time since which it has been above the persistence threshold,
so a flagged region says how long it has stayed (the median of its cells' times).

Consecutive persistence scores are dependent; the conformal rate holds for the share of
flagged normal frames over a long stationary stream, not frame by frame independently.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field, replace
from typing import NamedTuple

import numpy as np

from inspector.core.calibration import Threshold, conformal_p_values, conformal_threshold
from inspector.core.scoring import frame_scores

#: Frames a region must stay unusual in before it is flagged (the flag comes on the
#: ``WINDOW``-th frame it is seen in). A slow vehicle with a load can cover its own length
#: only after two or three frames; four frames let it move on.
WINDOW = 4
#: Fewest frames before a window that its reference is taken from (see :func:`past_level`):
#: the second largest of three or more values is neither the largest nor the smallest, so
#: one passer-by in those frames moves the reference neither up (hiding what appears) nor
#: down (a passer-by who happens to score lower than the ground it covers, where that ground
#: reads unusual all along, would make the whole window a step). A window with fewer frames
#: before it is judged as the first window of a run is (``start_threshold``).
MIN_PAST = 3
#: Cells on a side of the neighbourhood over which a steady level takes its spread (see
#: :func:`steady_level`): the cell and the ones touching it.
AROUND = 3
#: Local maps are taken less their median over a square of cells this fraction of the map's
#: long side (see :func:`local_maps`): a quarter of the view, far larger than a thing left
#: (about 1 % of the view) and about the reach of the brightness field of preparation (a
#: Gaussian of an eighth of the long side, :mod:`inspector.core.conditions`).
LOCAL_SHARE = 0.25
#: A gap between frames longer than this many typical frame intervals starts a new window.
GAP_FACTOR = 10.0
#: An order of magnitude: what "clearly more" means in three rules. A normal frame holds a
#: large short-lived anomaly when its single-frame score is more than ``LARGE`` times that of
#: the quietest quarter of the normal frames and its persistence score keeps less than
#: 1 / ``LARGE`` of it (gone within the window); a step counts where a cell's look changed
#: by more than ``LARGE`` times a normal frame-to-frame change (``change``); a threshold rests
#: on one held-out window when its score is more than ``LARGE`` times the next
#: (:meth:`Persistence.lone`).
LARGE = 10.0
#: Whether new baselines take the two dark-stretch rules (``settle_noise``, ``settle_look`` of
#: :func:`persistence`). Built in 0.13, they were off there: on unseen bench scenes they
#: flagged what the picture going back to normal shows in the dark (yard 227: 0 -> 9 of 120
#: traffic-only frames, the floor after a spill was taken away; gate 203: 0 -> 3, the view
#: turning dark within a burst). They now count only cells that look unlike the camera's
#: normal frames (:func:`_unusual`), and are on again.
NIGHT_RULES = True
#: A camera whose normal frames clearly hold large short-lived anomalies more often than this
#: is busy: its single-frame threshold is then set by what passes (see
#: :func:`calibrate_persistence`).
BUSY_SHARE = 0.05
#: Longest time, in seconds, a window of consecutive normal frames may span for ``learn`` to
#: call a camera busy by itself. Passers-by cross a view in seconds to a minute; over tens of
#: minutes daylight and weather change the scene from one frame to the next as well, so with
#: frames that far apart a short-lived anomaly no longer tells traffic from a change of light
#: (mode "on" still applies persistence to such a camera).
MAX_SPAN = 600.0


@dataclass
class StreamState:
    """The rolling state of one camera's stream (what the next frame's window needs).

    Attributes
    ----------
    maps : ndarray, shape (m, h, w), float32
        Anomaly maps of the last m < window frames, oldest first.
    times : ndarray, shape (m,), float64
        Their capture times, seconds since the epoch.
    onset : ndarray, shape (h, w), float64, or None
        Per cell, the capture time since which the cell has been above the persistence
        threshold (NaN where it is not).
    block : int
        Time block of the last frame (calibration only; -1 otherwise).
    held : ndarray, shape (h, w), float32, or None
        Per cell above its threshold in the last frame, the reference it keeps (NaN where
        none is held); see :func:`persistence` (``past``).
    looks : ndarray, shape (m, h, w), float32, or None
        The frames' :func:`cell_looks`, as ``maps`` (None: not kept).
    held_look : ndarray, shape (h, w), float32, or None
        Per held cell, the look it keeps as its reference (NaN where none is held).
    brightness : ndarray, shape (m, h, w), float32, or None
        The frames' :func:`cell_brightness`, each less its median over its cells, as
        ``looks`` (None: not kept).
    held_brightness : ndarray, shape (h, w), float32, or None
        Per held cell, the brightness it keeps as its reference (NaN where none is held).
    """

    maps: np.ndarray
    times: np.ndarray
    onset: np.ndarray | None = None
    block: int = -1
    held: np.ndarray | None = None
    looks: np.ndarray | None = None
    held_look: np.ndarray | None = None
    brightness: np.ndarray | None = None
    held_brightness: np.ndarray | None = None

    @classmethod
    def empty(cls) -> "StreamState":
        return cls(np.zeros((0, 0, 0), np.float32), np.zeros(0))

    def arrays(self) -> dict[str, np.ndarray]:
        """Arrays for an ``.npz`` (see :meth:`from_arrays`)."""
        out = {"maps": self.maps, "times": self.times, "block": np.array(self.block)}
        if self.onset is not None:
            out["onset"] = self.onset
        for key in ("held", "looks", "held_look", "brightness", "held_brightness"):
            if getattr(self, key) is not None:
                out[key] = getattr(self, key)
        return out

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> "StreamState":
        """The state whose :meth:`arrays` these are (shapes as the attributes'); the keys
        missing from states saved before them read as None."""
        return cls(np.asarray(arrays["maps"], np.float32), np.asarray(arrays["times"], float),
                   arrays.get("onset"), int(arrays.get("block", -1)), arrays.get("held"),
                   arrays.get("looks"), arrays.get("held_look"), arrays.get("brightness"),
                   arrays.get("held_brightness"))


@dataclass
class PersistenceResult:
    """Persistence of a run of frames.

    Attributes
    ----------
    maps : ndarray, shape (n, h, w), float32
        Persistence maps (:func:`steady_level` over the window).
    scores : ndarray, shape (n,), float64
        Their maxima.
    filled : ndarray, shape (n,), bool
        The frame's window was full (only such frames may be flagged).
    since : ndarray, shape (n,), float64
        Capture time (seconds since the epoch) since which the frame's persistent region
        (persistence map above the threshold) has stayed above it: the median over the
        region's cells of the time since which each cell has been above it in every frame
        (a median, so a few cells at its edge that noise held above a low threshold before
        the thing came do not date it back); NaN when there is no such region or no
        threshold was given.
    state : StreamState
        The state after the last frame.
    late : ndarray, shape (n,), bool
        The frame is older than a frame the stream had already taken (it arrived late).
    stepped : ndarray, shape (n,), bool
        The map is measured from a reference: frames before the window were there (see
        ``past`` in :func:`persistence`).
    levels : ndarray, shape (n,), float64
        Maxima of the steady levels before the reference is taken off (the scores when
        ``past`` is 0).
    """

    maps: np.ndarray
    scores: np.ndarray
    filled: np.ndarray
    since: np.ndarray
    state: StreamState
    late: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))
    stepped: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))
    levels: np.ndarray = field(default_factory=lambda: np.zeros(0))


def persistence(maps: np.ndarray, times: np.ndarray, window: int, max_gap: float,
                threshold: float | None = None, state: StreamState | None = None,
                blocks: np.ndarray | None = None, past: int = 0, robust: bool | str = False,
                start_threshold: float | None = None, around: int = 1, local: int = 0,
                footprint: int = 1, made_local: bool = False, min_past: int = 1,
                looks: np.ndarray | None = None, change: float = 0.0,
                shown: bool | str = False, normal: np.ndarray | None = None,
                crossed: bool | str = False,
                brightness: np.ndarray | None = None,
                settle_noise: bool = False, settle_look: bool = False,
                ground: bool = False) -> PersistenceResult:
    """Persistence maps of consecutive frames of one camera's stream.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float
        Anomaly maps in capture-time order (made local with :func:`local_maps` here).
    times : ndarray, shape (n,), float
        Capture times, seconds since the epoch, in the order the frames arrived: normally
        non-decreasing. A frame older than one taken before it (a late arrival, under
        ``watch``) is set among the kept frames in capture-time order: its window is the
        ``window - 1`` frames before it, kept or late like it (a late run of frames makes
        windows of its own), it counts as ``filled`` only when those are there and no gap
        between them passes ``max_gap``, and it joins the windows of the frames that come
        after it; the stream is not restarted. It is judged by the same rules as a frame
        in order, with no cell held (what is held, and since when, is the stream's, as of
        its newest frame).
    window : int >= 1
        Frames in the window.
    max_gap : float > 0
        Seconds between two frames beyond which a new window starts.
    threshold : float, optional
        Persistence threshold, for the per-cell onset times and ``since``.
    state : StreamState, optional
        State after the previous call for the same stream (None: a new stream).
    blocks : ndarray, shape (n,), int, optional
        Time blocks (learn time): a new block starts a new window.
    past : int >= 0
        Frames just before the window whose level at each cell is the cell's reference
        (:func:`past_level`): the persistence map is the window's steady level less the
        reference, so what was already there before the window (a patch of sun, a lamp's
        pool) is not counted, and what appeared and stayed is. A frame with at least
        ``min_past`` such frames in its stretch of the stream has ``stepped`` set; with fewer
        its map is the steady level. 0: no reference (the steady level itself).
    robust : bool or "window"
        True: divide each local map by its cells' robust spread (see :func:`local_maps`).
        "window": divide the local maps of a window and of the frames before it by one
        spread, the median of the robust spreads of the window's frames
        (:func:`robust_spread`), so that a thing that stays keeps its level while a large
        passer-by widens the spread of one frame of the window. "change": as "window", and
        with ``brightness``, a window with a reference counts a cell whose own brightness
        changed by how far its step stands out from how much the rest of the view changed
        from the frames before it, where that is less than the cells' spread (a dark, noisy
        stretch; :func:`_lift`, on the map once opened). This adds flags: the thresholds
        must be calibrated with it (:func:`calibrate_persistence` does). False: neither.
    start_threshold : float, optional
        Threshold of frames without a frame before the window (``stepped`` unset); default
        ``threshold``. Cells above their frame's threshold keep their reference while they
        stay above it (held), so a thing that stays is not taken into its own reference.
    around : int >= 1, odd
        Cells on a side of the neighbourhood whose largest spread the steady level takes
        (:func:`steady_level`).
    local : int >= 0
        Cells on a side of the square whose median each map is taken less
        (:func:`local_maps`); 0: the median over the whole map.
    footprint : int >= 1
        Cells on a side of a patch: the persistence map (the step, or the steady level where
        there is no reference) is opened by a square of that side (:func:`opened`), so a
        region counts only where it covers a whole patch; 1: not opened.
    made_local : bool
        ``maps`` are already :func:`local_maps` with these ``robust`` and ``local`` (a caller
        that runs the same maps more than once makes them local once).
    min_past : int >= 1
        Fewest frames before the window a reference is taken from (see :data:`MIN_PAST`).
    looks : ndarray, shape (n, h, w), float, optional
        The frames' :func:`cell_looks`. With ``change`` > 0, a cell of a frame measured from
        a reference counts only where the frame itself changed there: where every frame of
        the window differs from the frames before it (their median look, per cell; a held
        cell keeps the look it had before it was held) by more than ``change`` (see
        :func:`_changed`: all of them but one, at the cell or one of the ``around`` cells
        around it). Elsewhere the map is at most 0. Something left changes the picture where
        it is; a region whose anomaly steps up while the picture there stays as it was is
        the model's reading of a frame changing (the light fitted over the whole view moved by
        passers-by elsewhere), not something at that place.
    change : float >= 0
        See ``looks``; 0: every cell counts.
    shown : bool
        A held cell (above its threshold in the frame before, with ``threshold`` given) is
        flagged only where the frame being judged shows what it holds: its steady level is
        then taken without setting that frame's own value aside (``shown`` of
        :func:`steady_level`), so the flag ends with the frame in which a thing is taken
        away, even when someone stands where it was (the window's earlier frames still
        hold the thing). The hold itself goes on by the usual steady level, so a passer-by
        in front of a thing for a frame unflags that frame only and does not take the thing
        into its own reference; a cell not held is judged as without it, so a thing is
        flagged as soon. With ``looks`` and ``change`` > 0, a held cell is also flagged only
        where the frame's look is within ``change`` of the median look of the window's
        other frames (:func:`_odd_one`): a passer-by standing where a thing was taken away
        can read as unusual as the thing did, but does not look like it. The spread can
        only grow and the look only takes flags away, so the flags are a subset of those
        without it (the calibrated rate still holds; calibration holds no cell).
        "all": as True, and with ``brightness``, a frame measured from a reference is not
        flagged at a cell not held where its look and its own brightness (frame-relative)
        both differ by more than ``change`` (or the window's own noise of each, where larger:
        a dark stretch) from the median of the window's other frames
        (:func:`_odd_both`): what stays looks the same in the frame judged as in the frames
        before it, while a long load on a slow truck covering a cell in every frame of a
        window (read within a factor 2 from frame to frame, steady enough for the steady
        level) shows another part of itself in each. A thing crossed in the frame judged is
        flagged one frame later. This takes flags away from windows that calibration scores
        too, so it can lower a threshold that such a window had set: it must run in
        calibration as at scan time (:func:`calibrate_persistence` does).
    normal : ndarray, shape (2, h, w) or (3, h, w), float32, optional
        The camera's normal look (:func:`normal_look`). With ``looks`` and ``change`` > 0, a
        window with too few frames before it for a reference (the first of a run, and the
        next ones; not ``stepped``) counts a cell only where its frames' looks depart from
        the normal look (:func:`_departure`) by more than any held-out normal window did
        there, plus ``change``; elsewhere its map is at most 0. Such a window has no
        frames before it to tell what it holds from what was always there: a region that
        looks as it does in normal frames (a floor line the model reads anew under an
        unusual light, the ground where a passer-by stood in the run's first frame) is not
        something left. With the normal brightness (``normal[2]``) and ``brightness``, also
        only where that departure is the cell's own by more than ``change``, as
        :func:`_own` asks of a stepped window but from the normal look and brightness: a
        light unlike every normal frame's over a region wider than half the square around
        a cell (a lamp off over the wall) is not something left either; what it costs is
        the same (a thing within such a region of changed light is not counted until the
        window has frames before it, and then only if it came after them). Its flags are
        a subset of those without it.
    crossed : bool or "brightness"
        With ``looks`` and ``change`` > 0, a window measured from a reference also counts
        what the last ``window`` + 1 frames show in at least ``window`` - 1 of them, the
        frame judged included, where passers-by cross it in the others
        (:func:`seen_through`): a cell's map is the larger of the two. "brightness": with
        ``brightness``, the frames that show the same thing are also found by the cells'
        own brightness (``bright`` of :func:`seen_through`), not by their looks alone.
        Its flags are a superset, so the thresholds must be calibrated with it (as
        :func:`calibrate_persistence` does).
    brightness : ndarray, shape (n, h, w), float, optional
        The frames' :func:`cell_brightness` (with ``looks`` and ``change`` > 0). A cell where
        a thing has settled in the window (:func:`_settled`: its look and its own brightness
        changed from the frames before, the frame judged included, and its looks agree
        from frame to frame within ``change``) takes no spread off its steady level
        (``settled`` of :func:`steady_level`): the spread stands in for "the same content
        frame after frame", which the picture then shows directly, and the model can read
        one unchanged thing unevenly (a weak spill at 6 to 13, or a parcel at 44 then 25,
        from frame to frame while its look stays within a third of ``change``). This adds
        flags: the threshold must be calibrated with it (:func:`calibrate_persistence`).
        With it, a cell of a frame measured from a reference also counts only where its look
        changed from the frames before by more than ``change`` plus the mean change of
        brightness over the square around it (:func:`_own`; the largest over the ``around``
        cells): a change of light over a region wider than half that square (a lamp
        switching on lights the floor and the wall above goes darker as the exposure follows)
        changes the brightness around a cell at least as much as its look; a thing set down
        changes the look of its cells by nearly all of their change. Elsewhere the map is at
        most 0 (it takes flags away, and runs in calibration as at scan time). What it
        costs: a thing set down within the few frames of such a change of light around it
        is not counted, and a thing flagged while the light around it changes that much
        loses its flag then.
    settle_noise : bool
        With ``brightness``, a settled thing's looks agree within the window's own look
        noise where that is above ``change`` (a dark stretch; see :func:`_settled`), not
        within ``change`` alone. With ``normal``, only at cells whose window looks unlike
        the camera's normal frames (:func:`_unusual` above ``change``, as the first windows
        of a run are asked, ``normal`` above): a thing set down makes its cells unlike
        normal, while a thing taken away gives them back the look they normally have, and
        in a dark stretch, where a floor's looks scatter as widely as a thing's, the
        picture going back to normal settles as well as a thing set down does (yard 227 of
        the busy bench: a spill taken away at night, the floor it left read 15.9 against a
        threshold of 1.4, measured from the spill's frames before); so does a change of
        light to one the normal frames know (gate 203: the view turning dark within a
        burst). This adds flags (the gate takes some of them away again):
        the thresholds must be calibrated with it (:func:`calibrate_persistence` does);
        False for baselines learnt before it.
    settle_look : bool
        With ``brightness``, in a dark, noisy stretch (where ``robust`` "change" counts a
        step against the view's changes, :func:`_lift`, and the window's own look noise is
        above ``change``), a cell where a thing has settled (:func:`_settled`) and the model
        reads the window above its reference (a step above 0) also counts what the picture
        reads of it (:func:`_look_reading`: how far its look departed beyond its own
        scatter, in units of the window's look noise), where that is larger: in the dark
        the model can read a thing the picture shows settled no higher than the floor's
        noise. With ``normal``, only at cells unlike normal, as ``settle_noise``. This adds
        flags: the thresholds must be calibrated with it (:func:`calibrate_persistence`
        does); False for baselines learnt before it.
    ground : bool
        With ``looks`` and ``change`` > 0, a window's reference (:func:`past_level` of the
        frames before it, here and in :func:`seen_through`) is taken, where lower, from
        those of the frames before whose looks are within ``change`` of their median look,
        where at least ``min_past`` are (:func:`_reference`): the frames that show the
        place as it was, not the passers-by crossing it. The second largest of the frames
        before sets one passer-by aside; a thing set down just after two or three passed
        over its place (3 of the 6 frames before a spill on an unseen bench scene, read
        14.5 against the spill's 10 to 20) was measured from a passer-by and never stepped
        up. This adds flags: the thresholds must be calibrated with it
        (:func:`calibrate_persistence` does); False for baselines learnt before it.

    Returns
    -------
    PersistenceResult
    """
    if window < 1:
        raise ValueError(f"window must be at least 1, got {window}")
    maps = (np.asarray(maps, np.float32) if made_local
            else local_maps(maps, robust is True, local))
    scaled = robust in ("window", "change")
    changes = robust == "change"
    times = np.asarray(times, np.float64)
    n = len(maps)
    keep = window + past  # frames a map needs: the window and the frames before it
    st = state if state is not None and len(state.maps) else None
    buf = list(st.maps) if st is not None else []
    buf_t = list(st.times) if st is not None else []
    onset = st.onset if st is not None and st.onset is not None else None
    held = st.held if st is not None and st.held is not None else None
    block = st.block if st is not None else -1
    gate = looks is not None and change > 0
    lbuf: list = ([None] * len(buf) if st is None or st.looks is None
                  or len(st.looks) != len(buf) else list(st.looks))
    held_look = st.held_look if st is not None and gate else None
    held_bright = st.held_brightness if st is not None and gate else None
    bright_ref = None
    if buf and buf[0].shape != maps.shape[1:]:
        buf, buf_t, onset, held = [], [], None, None  # another baseline's map size
        lbuf, held_look, held_bright = [], None, None
    look_of = list(np.asarray(looks, np.float32)) if gate else [None] * n
    # each look's frame brightness, by the look (a look is in several windows in turn)
    settle = gate and brightness is not None
    bright: dict = {}
    if settle:
        if st is not None and st.brightness is not None and len(st.brightness) == len(lbuf):
            bright.update(_by_look(lbuf, st.brightness))
        bright.update(_by_look(look_of, _frame_relative(brightness)))
    out = np.empty_like(maps)
    steady = np.empty_like(maps)  # each frame's steady level, opened below
    filled = np.zeros(n, bool)
    stepped = np.zeros(n, bool)
    late = np.zeros(n, bool)
    late_buf: list[np.ndarray] = []
    late_t: list[float] = []
    late_l: list = []
    frames = list(maps)  # one view a frame: its id keys its robust spread (see _spreads)
    spreads: dict = ({id(f): (f, float(v)) for f, v in zip(frames, robust_spread(maps))}
                     if scaled and n else {})  # (all at once: one call, not one a frame)
    since = np.full(n, np.nan)
    lifts: list = [None] * n  # (see _lift)
    looked: list = [None] * n  # (see _look_reading)

    def judge(frames: list, looks: list, held: np.ndarray | None = None,
              held_look: np.ndarray | None = None,
              held_bright: np.ndarray | None = None) -> _Judged:
        """The persistence map of the newest of ``frames`` (local maps, oldest first, its
        window last; ``looks``: theirs) by every rule above, ``held``, ``held_look`` and
        ``held_bright`` the references the stream's held cells keep (None: none held), and
        what was found on the way (see :class:`_Judged`): the same for a frame in order and
        a late one."""
        seen = _changed(looks, window, held_look, min_past, around) if gate else None
        moved = _own_change(looks, window, bright, change, held_bright) if settle else None
        unlike = (_unusual(looks[-window:], normal, around, bright)
                  if settle and (settle_noise or settle_look) and len(looks) > window
                  and _look_noise_of(looks[-window:], change) > change else None)
        unlike = None if unlike is None else unlike > change  # (see settle_noise)
        fixed = (_settled(looks, window, held_look, change, around, bright,
                          None if seen is None else seen[1], held_bright, moved,
                          settle_noise, unlike)
                 if settle else None)
        fixed, bright_ref = (None, None) if fixed is None else fixed
        own = (_own(looks, window, held_look, bright, held_bright, around,
                    None if seen is None else seen[1], bright_ref) if settle else None)
        level, raw, scale, win_scaled = _step(frames, window, held, around, scaled, spreads,
                                              min_past, fixed,
                                              looks if ground and gate else None, change)
        stepped = past > 0 and len(frames) >= window + min_past
        found = raw if seen is None else _gated(raw, seen[0], change)
        if shown == "all" and settle and stepped:  # (a held cell: see the loop below)
            odd = _odd_both(looks[-window:], bright, change)
            if odd is not None:
                odd = odd if held is None else odd & np.isnan(held)
                found = np.where(odd, np.minimum(found, 0.0), found).astype(np.float32)
        through = (seen_through(frames, looks, window, scale, held, held_look, change, around,
                                min_past, _brightness_of(looks, bright)
                                if settle and crossed == "brightness" else None, ground)
                   if crossed and gate and stepped else None)
        if through is not None:
            found = np.maximum(found, through)
        if own is not None and stepped:
            found = _gated(found, own, change)
        if gate and not stepped:
            found = _usual(found, looks[-window:], normal, change, around, bright)
        lift = (_lift(frames, window, scale, min_past, None if moved is None else moved[0])
                if changes and stepped else None)
        look = (_look_reading(looks, window, seen[1], fixed & (raw > 0) if unlike is None
                              else fixed & (raw > 0) & unlike, change, own, footprint)
                if settle_look and fixed is not None and seen is not None and stepped
                and lift is not None else None)
        if threshold is not None:  # (else opened after the loop, all frames at once)
            found = _with_look(_lifted(opened(found, footprint), lift), look)
            if past and window < len(frames) < window + min_past:
                found = _since_start(frames, looks, window, opened_map=found, steady=level,
                                     scale=scale, threshold=threshold, around=around,
                                     footprint=footprint, change=change if gate else 0.0)
        return _Judged(found, level, raw, scale, win_scaled, stepped, lift, look, seen,
                       fixed, bright_ref, own, through)

    for i in range(n):
        b = int(blocks[i]) if blocks is not None else -1
        t = float(times[i])
        if buf_t and t < buf_t[-1] and b == block:
            # Older than the stream's last frame (it arrived late): its window is the frames
            # before it, kept or late like it (a whole late batch makes windows of its own);
            # it takes its place among the kept frames, and the stream's window and onsets
            # stay those of its latest frame.
            late[i] = True
            pos = int(np.searchsorted(buf_t, t, side="right"))
            if not (late_t and late_t[-1] <= t and t - late_t[-1] <= max_gap):
                late_buf, late_t, late_l = buf[:pos], buf_t[:pos], lbuf[:pos]
            late_buf, late_t = (late_buf + [frames[i]])[-keep:], (late_t + [t])[-keep:]
            late_l = (late_l + [look_of[i]])[-keep:]
            w = judge(late_buf, late_l)  # (nothing held: the stream's holds are its newest's)
            out[i], steady[i], stepped[i], lifts[i] = w.map, w.level, w.stepped, w.lift
            looked[i] = w.look
            filled[i] = (len(late_t) >= window
                         and float(np.max(np.diff(late_t[-window:]))) <= max_gap)
            if pos or buf_t[0] - t <= max_gap:
                buf.insert(pos, frames[i])
                buf_t.insert(pos, t)
                lbuf.insert(pos, look_of[i])
                del buf[:-keep], buf_t[:-keep], lbuf[:-keep]
            if threshold is not None and onset is not None:
                region = out[i] > _limit(threshold, start_threshold, stepped[i])
                if region.any() and np.isfinite(onset[region]).any():
                    since[i] = min(float(np.nanmedian(onset[region])), t)
            continue
        late_buf, late_t, late_l = [], [], []
        if buf_t and (t - buf_t[-1] > max_gap or b != block):  # (late frames: above)
            buf, buf_t, onset, held = [], [], None, None
            lbuf, held_look, held_bright = [], None, None
        block = b
        buf.append(frames[i])
        buf_t.append(t)
        lbuf.append(look_of[i])
        del buf[:-keep], buf_t[:-keep], lbuf[:-keep]
        w = judge(buf, lbuf, held, held_look, held_bright)
        out[i], steady[i], stepped[i], lifts[i] = w.map, w.level, w.stepped, w.lift
        looked[i] = w.look
        filled[i] = len(buf) >= window
        if threshold is not None:
            limit = _limit(threshold, start_threshold, stepped[i])
            above = maps[i] > limit * w.scale
            if onset is None:
                onset = np.full(maps.shape[1:], np.nan)
            onset = np.where(above, np.where(np.isnan(onset), t, onset), np.nan)
            region = out[i] > limit  # (what holds its reference: see below)
            if shown and held is not None and stepped[i] and np.isfinite(held).any():
                # a held cell is flagged only where this frame shows what it holds; the
                # hold goes on by ``region`` (a passer-by in front of the thing for a frame
                # does not take it into its own reference)
                alt = np.where(np.isnan(held), w.raw,
                               steady_level(w.win_scaled, around, True, w.fixed)
                               - (w.level - w.raw))
                if w.seen is not None:  # (and where this frame looks as the window's others)
                    odd = ~np.isnan(held) & _odd_one(lbuf[-window:], change)
                    if shown == "all" and settle:
                        both = _odd_both(lbuf[-window:], bright, change)
                        if both is not None:
                            odd |= np.isnan(held) & both
                    alt = np.where(odd, np.minimum(alt, 0.0), alt).astype(np.float32)
                alt = alt if w.seen is None else _gated(alt, w.seen[0], change)
                alt = alt if w.through is None else np.maximum(alt, w.through)
                out[i] = _with_look(_lifted(opened(alt if w.own is None
                                                   else _gated(alt, w.own, change),
                                                   footprint), w.lift), w.look)
            flagged_cells = out[i] > limit
            if flagged_cells.any():
                since[i] = float(np.median(onset[flagged_cells]))
            if past:  # cells above keep the reference they had (NaN: not held)
                reference = w.level - w.raw
                keeps = region & filled[i] & stepped[i]
                held = np.where(keeps, reference, np.nan).astype(np.float32)
                held_look = (None if w.seen is None else
                             np.where(keeps, w.seen[1], np.nan).astype(np.float32))
                held_bright = (None if w.bright_ref is None else
                               np.where(keeps, w.bright_ref, np.nan).astype(np.float32))
    if threshold is None:  # (the maps are not needed in the loop: opened at once)
        out = opened(out, footprint)
        for i, lift in enumerate(lifts):
            out[i] = _with_look(_lifted(out[i], lift), looked[i])
    levels = (opened(steady, footprint).reshape(n, -1).max(axis=1).astype(np.float64) if n
              else np.zeros(0))
    if not n:
        return PersistenceResult(out, np.zeros(0), filled, since,
                                 state if state is not None else StreamState.empty(), late,
                                 stepped, levels)
    kept, kept_t = (buf[-(keep - 1):], buf_t[-(keep - 1):]) if keep > 1 else ([], [])
    kept_l = lbuf[-(keep - 1):] if keep > 1 else []
    state_out = StreamState(np.array(kept, np.float32).reshape(len(kept), *maps.shape[1:]),
                            np.array(kept_t, np.float64), onset, block, held,
                            np.array(kept_l, np.float32).reshape(len(kept), *maps.shape[1:])
                            if gate and all(v is not None for v in kept_l) else None,
                            held_look, _kept_brightness(kept_l, bright, maps.shape[1:])
                            if settle else None, held_bright if settle else None)
    return PersistenceResult(out, frame_scores(out), filled, since, state_out, late, stepped,
                             levels)


class _Judged(NamedTuple):
    """A frame's window as :func:`persistence` judged it (its ``judge``): the map and what
    the rules found on the way, of which the stream's holds are made."""

    #: The persistence map, (h, w) float32 (opened and lifted when a threshold is given).
    map: np.ndarray
    #: The window's steady level and its step from the reference (:func:`_step`), (h, w).
    level: np.ndarray
    raw: np.ndarray
    #: What the maps were divided by, and the window's maps so divided, (window, h, w).
    scale: float
    win_scaled: np.ndarray
    #: Measured from a reference (frames before the window were there).
    stepped: bool
    #: :func:`_lift`, None where it is 1.
    lift: np.ndarray | None
    #: :func:`_look_reading`, or None.
    look: np.ndarray | None
    #: :func:`_changed`: the window's change of look and its reference, or None.
    seen: tuple | None
    #: Cells where a thing has settled (:func:`_settled`) and its brightness reference.
    fixed: np.ndarray | None
    bright_ref: np.ndarray | None
    #: :func:`_own` and :func:`seen_through`, or None.
    own: np.ndarray | None
    through: np.ndarray | None


def _in_two(maps: np.ndarray, times: np.ndarray, window: int, max_gap: float,
            blocks: np.ndarray, looks: np.ndarray | None = None,
            brightness: np.ndarray | None = None, **options) -> PersistenceResult:
    """:func:`persistence` of a whole run of held-out frames (a new stream, no threshold),
    run as two parts of whole time blocks in two threads and joined in order.

    A window never crosses a block: a new block starts a new stream (nothing of the one
    before is kept), and what else the run computes is each frame's own (its robust spread,
    its brightness less its median, its opening and maximum). So each part gives the maps,
    scores, ``filled``, ``stepped`` and ``levels`` of its frames as the whole run does, to
    the bit (``since`` is NaN and ``late`` unset without a threshold; ``state`` is the
    second part's). The loop is Python over small maps whose numpy calls let the other
    thread run part of the time (the held-out run of a busy camera's learn, ~1.5 s of CPU
    at 2,000 frames, was the longest single thread of learn's end).

    Parameters
    ----------
    maps, times, window, max_gap, blocks, looks, brightness
        As :func:`persistence` (``blocks`` required; ``looks``, ``brightness``: one a frame).
    **options
        The other keywords of :func:`persistence` but ``threshold`` and ``state``.

    Returns
    -------
    PersistenceResult
    """
    blocks = np.asarray(blocks)
    starts = np.flatnonzero(blocks[1:] != blocks[:-1]) + 1  # where a block starts
    if not len(starts):
        return persistence(maps, times, window, max_gap, blocks=blocks, looks=looks,
                           brightness=brightness, **options)
    cut = int(starts[np.argmin(np.abs(starts - len(blocks) / 2))])  # nearest the middle

    def part(p: slice) -> PersistenceResult:
        return persistence(maps[p], times[p], window, max_gap, blocks=blocks[p],
                           looks=None if looks is None else looks[p],
                           brightness=None if brightness is None else brightness[p],
                           **options)

    with ThreadPoolExecutor(2) as pool:
        a, b = pool.map(part, (slice(0, cut), slice(cut, len(blocks))))
    return PersistenceResult(
        np.concatenate([a.maps, b.maps]), np.concatenate([a.scores, b.scores]),
        np.concatenate([a.filled, b.filled]), np.concatenate([a.since, b.since]), b.state,
        np.concatenate([a.late, b.late]), np.concatenate([a.stepped, b.stepped]),
        np.concatenate([a.levels, b.levels]))


def _limit(threshold: float, start_threshold: float | None, stepped: bool) -> float:
    """The threshold a frame's persistence map is held to: ``threshold`` when it is measured
    from a reference (``stepped``), else ``start_threshold`` when there is one."""
    return threshold if stepped or start_threshold is None else start_threshold


def seen_through(frames: list, looks: list, window: int, scale: float,
                 held: np.ndarray | None, held_look: np.ndarray | None, change: float,
                 around: int = 1, min_past: int = 1, bright: list | None = None,
                 ground: bool = False) -> np.ndarray | None:
    """Per cell, the steady level of the frames, among the last ``window`` + 1, that show
    the same thing as the frame judged, less the reference: what passers-by cross in front
    of.

    A thing left shows one look frame after frame, while passers-by in front of it each
    look different; the steady level of :func:`steady_level` sets one frame aside, so a
    thing crossed in two of its first frames stays below its threshold until two clear
    frames follow each other. Here the frames that agree are found by their looks rather
    than by their values: with the last ``window`` + 1 frames' looks at a cell, those
    within ``change`` of their median (one of the agreeing looks when most agree), the
    frame judged among them (a frame that does not show the thing is not flagged for it;
    see ``shown`` of :func:`persistence`). Where at least ``window`` - 1 frames agree
    (as many as :func:`steady_level` keeps of a window), the level is that of their
    values alone, x(1) - (x(k-1) - x(1)) of the k agreeing values sorted (their spread
    the largest over the ``around`` x ``around`` cells centred on the cell, a cell with
    too few agreeing frames giving an infinite spread: the thing is seen through around
    it too), less the reference of the frames before them (:func:`past_level`; a held
    cell's own). It counts only where the picture changed, by more than ``change`` in two
    ways, each the largest over the ``around`` cells (as :func:`_changed`): every
    agreeing frame's look departs from the median look of the frames before them, and
    the look they agree on (the median) departs from the looks of those frames, all of
    them but one (a look that two of them already had was there before: a region the
    model reads anew while its picture stays as it was, with a passer-by's frame moving
    the median); a held cell's look is ``held_look`` for both. Elsewhere at most 0, and
    where too few frames agree, -inf.

    ``change`` is how much looks change in normal frames (:func:`look_noise`), mostly by
    day. In a dark stretch the gain that brings a frame back amplifies its noise, and a
    thing's own looks scatter by more than that: where the frames' own look noise (the
    median change of a cell's look from one of these frames to the next, times
    :data:`LARGE`, as ``change`` is made from normal frames) is above ``change``, the
    frames agreeing within it are taken as well and the larger level is kept (the
    frames agreeing within ``change`` still count on their own: a looser tolerance can
    take in a frame that a passer-by half covers, whose value is lower). The picture
    must still have changed by more than ``change``.

    A look is the cell's brightness less its mean over a square a quarter of the view
    wide (:func:`cell_looks`), so a passer-by anywhere in that square moves the look of a
    thing it does not cover (by 0.05 for a person and a pallet load beside a parcel, twice
    ``change``), and a load of the thing's own shade covering it keeps its look while the
    model reads it at a tenth. With ``bright``, the cells' own brightness (each frame's
    less its median over the frame's cells), the frames that agree by it (within
    ``change``, and within its own noise in a dark stretch, as above) are taken as well
    and the larger level is kept: the frames a passer-by covers are set aside by what the
    cell itself shows. (By brightness alone, a frame whose thing reads lower because a
    large passer-by beside it moved the local median, :func:`local_maps`, would be kept
    where its look, moved by the same passer-by, sets it aside: hence both.)

    Parameters
    ----------
    frames : list of ndarray, shape (h, w), float32
        The stream's local maps, oldest first, the frame judged last.
    looks : list of ndarray, shape (h, w), float32
        Their :func:`cell_looks`.
    window : int
    scale : float
        What the maps are divided by (see :func:`_step`).
    held, held_look : ndarray, shape (h, w), float32, or None
        Held cells' reference and look (NaN where none is held).
    change : float > 0
    around : int >= 1, odd
    min_past : int >= 1
        Fewest frames before the last ``window`` + 1 for a reference.
    bright : list of ndarray, shape (h, w), float32, optional
        The frames' :func:`cell_brightness`, each less its median over the frame's cells
        (as ``looks``).
    ground : bool
        The reference of the frames before them taken from those that show the place as
        it was (``ground`` of :func:`persistence`, :func:`_reference`).

    Returns
    -------
    ndarray, shape (h, w), float32, or None (too few frames, or a look missing)
    """
    span = window + 1
    if len(frames) < span + min_past or any(v is None for v in looks):
        return None
    values = np.asarray(frames[-span:], np.float32) / np.float32(scale)
    lk = np.asarray(looks[-span:], np.float32)
    before = np.asarray(looks[:-span], np.float32)
    centre = _median_along(lk)
    reference = _reference(frames[:-span], scale, looks[:-span] if ground else None, change,
                           min_past)
    usual = _median_along(before)
    apart = np.abs(before - centre)
    kept = _second_smallest(apart) if len(apart) > 2 else apart.min(axis=0)
    if held is not None:
        reference = np.where(np.isnan(held), reference, held)
        if held_look is not None:
            usual = np.where(np.isnan(held_look), usual, held_look)
            kept = np.where(np.isnan(held_look), kept, np.abs(centre - held_look))
    # which frames show the same thing: by their looks, and by the cells' own brightness
    # when known (see above)
    alike = [(lk, centre)]
    if bright is not None:
        own = np.asarray(bright[-span:], np.float32)
        alike.append((own, _median_along(own)))
    tests = []
    for by, middle in alike:
        tests.append((by, middle, change))
        noisy = _look_noise_of(by, change)
        if noisy > change:  # a dark, noisy stretch (see above)
            tests.append((by, middle, noisy))
    out = None
    for by, middle, tol in tests:
        agree = np.abs(by - middle) <= tol
        agree &= agree[-1]  # the frame judged shows it
        enough = agree.sum(axis=0) >= max(window - 1, 1)
        low = np.where(agree, values, np.inf).min(axis=0)
        second = _lowest_and_second(np.where(agree, values, -np.inf))[1]
        spread = flat_filter(np.where(enough, second - low, np.inf).astype(np.float32),
                             around, np.maximum)
        each = np.where(agree, np.abs(lk - usual), np.inf).min(axis=0)
        moved = np.minimum(
            flat_filter(np.where(np.isfinite(each), each, 0.0).astype(np.float32), around,
                        np.maximum),
            flat_filter(np.where(enough, kept, 0.0).astype(np.float32), around, np.maximum))
        with np.errstate(invalid="ignore"):
            step = np.where(enough & np.isfinite(spread), low - spread - reference, -np.inf)
        found = np.where(moved > change, step, np.minimum(step, 0.0))
        out = found if out is None else np.maximum(out, found)
    return out.astype(np.float32)


def _since_start(frames: list, looks: list, window: int, opened_map: np.ndarray,
                 steady: np.ndarray, scale: float, threshold: float, around: int,
                 footprint: int, change: float) -> np.ndarray:
    """``opened_map``, the persistence map of a window with too few frames before it for a
    reference (as made so far from its steady level: gated, opened; held to the start
    threshold), kept only where the window also stepped up from those frames by more
    than ``threshold`` (the step of the window's ``steady`` level, as :func:`_step` found it
    with the frames divided by ``scale``, from those frames' :func:`past_level`, gated by
    the looks when ``change`` > 0, opened); elsewhere at most 0. What stays since the run
    began was judged by the run's first window; a later one flags only what appeared
    since."""
    step = (steady - _reference(frames[:-window], scale)).astype(np.float32)
    seen = _changed(looks, window, None, 1, around) if change > 0 else None
    if seen is not None:
        step = _gated(step, seen[0], change)
    return np.where(opened(step, footprint) > threshold, opened_map,
                    np.minimum(opened_map, 0.0)).astype(np.float32)


def _changed(looks: list, window: int, held_look: np.ndarray | None, min_past: int,
             around: int = 1) -> tuple[np.ndarray, np.ndarray] | None:
    """Per cell, how much the frames of the window changed from the frames before it: the
    absolute difference of a frame's look from the median look of the frames before (a held
    cell: from ``held_look``), the second smallest over the window (one frame set aside, as
    the steady level sets one aside: a passer-by in front of a thing left, as dull as the
    ground it covers, does not hide that the thing changed the picture), the largest over
    the ``around`` x ``around`` cells centred on the cell (a cell at the edge of a thing, or
    part of a thing that happens to be as bright as the ground, counts with the thing); and
    that reference, shapes (h, w) float32. None with fewer than ``min_past`` frames before
    or a look missing."""
    before = looks[:-window]
    if len(before) < min_past or any(v is None for v in looks):
        return None
    reference = _median_or_held(before, held_look)
    return _departure(looks[-window:], reference, around), reference


def _odd_one(looks: list, change: float) -> np.ndarray:
    """Per cell, whether the newest of a window's ``looks`` differs from the median of the
    others by more than ``change``, bool (h, w)."""
    return np.abs(looks[-1] - _median_along(looks[:-1])) > change


def _odd_both(looks: list, bright: dict, change: float) -> np.ndarray | None:
    """Per cell, whether the newest of a window's ``looks`` differs from the median of the
    others by more than ``change`` (:func:`_odd_one`) and so does its frame's own brightness
    (``bright``: by look, see :func:`_by_look`; frame-relative), bool (h, w); None when a
    look or a brightness is not known. Each by more than the window's own noise of that
    measure where it is larger (:func:`_look_noise_of`): in a dark stretch the gain
    amplifies every look's noise, and a thing's looks scatter by it as a floor's do (a
    night spill on an unseen bench scene, yard 206, read as unlike its window by
    ``change`` alone and was lost). Both are asked: a passer-by beside a thing moves
    its look (the mean around it) but not its brightness, and a load of the thing's own
    shade over it keeps its brightness but not its look (see ``shown`` "all" of
    :func:`persistence`)."""
    raw = _brightness_of(looks, bright)
    if raw is None or any(v is None for v in looks):
        return None
    return (_odd_one(looks, _look_noise_of(looks, change))
            & _odd_one(raw, _look_noise_of(raw, change)))


def _by_look(looks: list, brightness) -> dict:
    """``id`` of each look -> (the look, its frame's brightness), the look held so that its
    ``id`` stays its own (see :func:`_spreads`); looks that are None are left out."""
    return {id(v): (v, b) for v, b in zip(looks, brightness) if v is not None}


def _brightness_of(looks: list, bright: dict) -> list | None:
    """The frame brightness of each of ``looks`` (``bright``: by look, see :func:`_by_look`),
    oldest first; None when one is not known."""
    found = [bright.get(id(v)) for v in looks]
    if any(f is None or f[0] is not v for f, v in zip(found, looks)):
        return None
    return [f[1] for f in found]


def _median_or_held(before: list, held: np.ndarray | None) -> np.ndarray:
    """A cell's reference: the median of ``before`` (frames' looks or brightness, oldest
    first; :func:`_median_along`), or where a cell is held, the value it keeps (``held``,
    NaN elsewhere), shape (h, w) float32."""
    reference = _median_along(before)
    return reference if held is None else np.where(np.isnan(held), reference, held)


def _frame_relative(brightness: np.ndarray) -> np.ndarray:
    """Each frame's brightness less its median over the frame's cells, shape (n, h, w)
    float32 (a change of exposure moves every cell's log brightness alike)."""
    b = np.asarray(brightness, np.float32)
    return b - np.median(b.reshape(len(b), -1), axis=1).astype(np.float32)[:, None, None]


def _kept_brightness(looks: list, bright: dict, shape: tuple) -> np.ndarray | None:
    """The brightness of the frames whose ``looks`` a state keeps, shape (m, h, w) float32;
    None when one is not known."""
    found = _brightness_of(looks, bright)
    if found is None:
        return None
    return np.array(found, np.float32).reshape(len(found), *shape)


def _settled(looks: list, window: int, held_look: np.ndarray | None, change: float,
             around: int, bright: dict, reference: np.ndarray | None = None,
             held_bright: np.ndarray | None = None, moved: tuple | None = None,
             noise: bool = False, unlike: np.ndarray | None = None
             ) -> tuple[np.ndarray, np.ndarray] | None:
    """Cells where a thing has settled in the window: the picture changed there from the
    frames before it, in the frame judged too, and stays the same from frame to frame
    (see ``brightness`` of :func:`persistence`), bool (h, w); None with no frame before the
    window, fewer than 3 frames in it, or a look or brightness missing.

    A cell is settled where (1) its own look differs from the median look of the frames
    before (a held cell: from ``held_look``; ``reference``: that reference when known, see
    :func:`_changed`) by more than ``change`` in all the window's frames but one and in the
    newest (the frame judged: the frame after a thing is taken away is not settled); (2)
    its own brightness (``bright``: by look, see :func:`_by_look`; each frame's
    :func:`cell_brightness` less its median over the frame's cells, so that a change of
    exposure, which moves every cell alike, does not count) differs from the median of the
    frames before (a held cell: from the brightness it kept, ``held_bright``) by more than
    ``change``, likewise; and (3) the looks of all the window's frames but one (the newest
    kept) agree within ``change`` (with ``noise``: or within the window's own look noise
    where that is larger, :func:`_look_noise_of`: in a dark stretch the gain amplifies every
    look's noise, and one thing's looks scatter by it as a floor's do; with ``unlike``, bool
    (h, w), only at its cells: see ``settle_noise`` of :func:`persistence`), at every one of
    the ``around``
    cells around it; and that brightness reference, (h, w) float32 (what a cell held from
    this frame keeps). (2) is there
    because a look
    is the cell's brightness less the mean around it: when a thing leaves (or comes into)
    that square, the looks of untouched cells move with the mean, while their brightness
    does not. ``moved``: (2) as :func:`_own_change` gives it, when already known."""
    if window < 3:
        return None
    found = moved if moved is not None else _own_change(looks, window, bright, change,
                                                         held_bright)
    if found is None:
        return None
    moved, before_raw = found
    if reference is None:
        reference = _median_or_held(looks[:-window], held_look)
    win = looks[-window:]
    own = _departs(win, reference, change)
    agree = _agreement(win)
    tolerance = _look_noise_of(win, change) if noise else change
    agree = flat_filter(agree, around, np.maximum)
    steady = agree <= tolerance
    if unlike is not None and tolerance > change:
        steady = (agree <= change) | (steady & unlike)
    return own & moved & steady, before_raw


def _own(looks: list, window: int, held_look: np.ndarray | None, bright: dict,
         held_bright: np.ndarray | None, around: int = 1,
         reference: np.ndarray | None = None, bright_reference: np.ndarray | None = None
         ) -> np.ndarray | None:
    """Per cell, by how much the change of the window's frames from the frames before it is
    the cell's own rather than its surroundings': the change of its look less the change of
    the mean around it, shape (h, w) float32 (> 0: its own), or None with no frame before
    the window or a look or brightness missing.

    A look is the cell's brightness (less the frame's median, see :func:`_by_look`) less
    its mean over the square of :func:`local_size` cells around it (:func:`looks_of`), so
    a frame's change of brightness at a cell is the change of its look plus the change of
    that mean. A thing set down covers a small part of the square (about a tenth of it,
    see :data:`LOCAL_SHARE`): its look changes by nearly all of its brightness's change and
    the mean around it by the rest. A change of light over a region wider than half the
    square (a lamp switching on lights the floor and leaves the wall above it darker once
    the exposure follows) moves the mean around a cell more than the cell's look, which
    changes only by how unevenly the light falls. Per frame of the window, the absolute
    change of the look from the frames before (their median, a held cell's
    ``held_look``) less the absolute change of the mean around (from the brightness's
    median, a held cell's ``held_bright``); the second smallest over the window (one
    frame set aside, as :func:`_changed`), the largest over the ``around`` x ``around``
    cells centred on the cell (an edge cell counts with the thing). An untouched cell
    beside a change has its look moved by exactly what its mean moved (0 here, not its
    own); the map's anomaly is already taken less its median over the same square
    (:func:`local_maps`), so a region wider than half of it was never one this method
    calls a thing left. ``reference``, ``bright_reference``: the looks' and brightness's
    references when known (as :func:`_changed` and :func:`_settled` return them)."""
    before = looks[:-window]
    if not before or any(v is None for v in looks):
        return None
    raw = _brightness_of(looks, bright)
    if raw is None:
        return None
    ref_look = _median_or_held(before, held_look) if reference is None else reference
    ref_raw = (_median_or_held(raw[:-window], held_bright) if bright_reference is None
               else bright_reference)
    return _own_from(looks[-window:], raw[-window:], ref_look, ref_raw, around)


def _own_from(looks: list, bright: list, ref_look: np.ndarray, ref_bright: np.ndarray,
                around: int = 1) -> np.ndarray:
    """:func:`_own` of a window's ``looks`` and their frames' ``bright`` (each less its
    frame's median) from the references ``ref_look`` and ``ref_bright``, all (h, w): per
    frame the absolute change of the look less the mean over the :func:`local_size` square
    of the absolute change of brightness, the second smallest over the frames, the largest
    over the ``around`` x ``around`` cells, shape (h, w) float32."""
    look = np.abs(np.asarray(looks, np.float32) - ref_look)
    moved = np.abs(np.asarray(bright, np.float32) - ref_bright)
    if len(look) > 2:
        look, moved = _second_smallest(look), _second_smallest(moved)
    else:
        look, moved = look.min(axis=0), moved.min(axis=0)
    import cv2

    k = local_size(look.shape)
    around_moved = cv2.blur(np.ascontiguousarray(moved, np.float32), (k, k),
                            borderType=cv2.BORDER_REPLICATE)
    return flat_filter(np.ascontiguousarray(look - around_moved, np.float32), around,
                       np.maximum)


def _own_change(looks: list, window: int, bright: dict, change: float,
                held_bright: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray] | None:
    """Per cell, whether its own brightness changed in the window: its frame-relative
    brightness (``bright``, by look: see :func:`_by_look`) differs from the median of the
    frames before the window (a held cell: from ``held_bright``) by more than ``change`` in
    all the window's frames but one and in the newest (:func:`_departs`), bool (h, w); and
    that reference, (h, w) float32. None with no frame before the window or a look or
    brightness missing."""
    if len(looks) <= window or any(v is None for v in looks):
        return None
    raw = _brightness_of(looks, bright)
    if raw is None:
        return None
    before = _median_or_held(raw[:-window], held_bright)
    return _departs(raw[-window:], before, change), before


def _lift(frames: list, window: int, scale: float, min_past: int,
          moved: np.ndarray | None) -> np.ndarray | None:
    """Per cell, what a step (measured with the maps divided by ``scale``, see :func:`_step`)
    is multiplied by so that it counts against the view's changes: ``scale`` over
    :func:`change_spread` of the window from the frames before it (floored at 1, at least
    1) where the cell's own brightness changed in the window (``moved``, as
    :func:`_own_change` gives it), 1 elsewhere, shape (h, w) float32; None where that is 1
    everywhere (or too few frames before, or ``moved`` None).

    A dark, noisy stretch scatters the cells' readings widely but steadily: the scale
    (their spread) then counts noise that the step has already taken off, and a spill
    that steps up by twice what the rest of the view changes reads a fifth of a spread.
    Counted against the changes, it stands out. The cell's own brightness must have
    changed because the local maps themselves can change where the picture did not: a
    thing taken away beside a cell moves the median around it (and the look's surround);
    the changes' spread would count that as sharply."""
    before = frames[:-window]
    if scale <= 1.0 or moved is None or len(before) < max(min_past, 1) or not moved.any():
        return None
    changes = max(change_spread(np.asarray(frames[-window:], np.float32),
                                np.asarray(before, np.float32)), 1.0)
    if changes >= scale:
        return None
    return np.where(moved, np.float32(scale / changes), np.float32(1.0))


def _look_reading(looks: list, window: int, reference: np.ndarray, settled: np.ndarray,
                  change: float, own: np.ndarray | None, footprint: int
                  ) -> np.ndarray | None:
    """What the picture itself reads of a thing settled in a dark stretch, in units of the
    window's own look noise, opened by ``footprint``, shape (h, w) float32 (-inf where it
    reads nothing); None where the window's look noise (:func:`_look_noise_of`) is not
    above ``change``, no cell is in ``settled``, or the window has fewer than 3 frames.

    Per cell in ``settled`` (where :func:`_settled` found a thing settled and the model
    reads the window above its reference, and the window looks unlike normal, see
    ``settle_look`` of :func:`persistence`) whose
    change is its own (``own`` > ``change``, :func:`_own`): the second smallest over the
    window's frames of the absolute difference of its look from ``reference`` (one frame
    set aside, as :func:`_changed`), less its looks' range over the window without one of
    its older frames (as :func:`_settled`'s agreement), divided by the median absolute
    frame-to-frame change of the window's looks (:func:`_look_noise_of` / :data:`LARGE`):
    how far the look departed beyond its own scatter, counted against how much every look
    of the window moves from frame to frame."""
    win = looks[-window:]
    noise = _look_noise_of(win, change)
    if window < 3 or noise <= change or not settled.any():
        return None
    departure = _second_smallest(np.abs(np.asarray(win, np.float32) - reference))
    reading = (departure - _agreement(win)) / np.float32(noise / LARGE)
    keep = settled if own is None else settled & (own > change)
    return opened(np.where(keep, reading, -np.inf).astype(np.float32), footprint)


def _agreement(win: list) -> np.ndarray:
    """Per cell, the range of a window's looks (oldest first, at least 2) without one of its
    older frames (the newest always kept; the smallest such range), shape (h, w) float32."""
    agree = None
    for j in range(len(win) - 1):
        rest = win[:j] + win[j + 1:]
        spread = np.maximum.reduce(rest) - np.minimum.reduce(rest)
        agree = spread if agree is None else np.minimum(agree, spread)
    return agree


def _with_look(step: np.ndarray, look: np.ndarray | None) -> np.ndarray:
    """``step`` or, where larger, the picture's own reading of a settled thing (``look``,
    :func:`_look_reading`)."""
    return step if look is None else np.maximum(step, look)


def _lifted(step: np.ndarray, lift: np.ndarray | None) -> np.ndarray:
    """``step`` (h, w) multiplied by ``lift`` (h, w) where above 0 (see :func:`_lift`; taken
    of the map once opened, so that the cells at a thing's edge, which its brightness moves
    less, do not keep the lift from its middle)."""
    if lift is None:
        return step
    return np.where(step > 0, step * lift, step).astype(np.float32)


def _look_noise_of(looks, floor: float = 0.0) -> float:
    """How much the looks of a few consecutive frames (oldest first, at least 2) change
    from one to the next, on the scale of ``change``: :data:`LARGE` times the median over
    cells and pairs of the absolute difference (as :func:`look_noise` makes ``change`` from
    normal frames), or ``floor`` where that is larger (the callers want the larger of the
    two). In a dark stretch the gain that brings a frame back amplifies its noise, and this
    is above ``change``. By day it is not: when at most half the differences are above
    ``floor`` / ``LARGE`` (less a millionth; the upper middle one is not), the median is not
    either and ``floor`` is returned without it (a count instead of a partition)."""
    diffs = np.abs(np.diff(np.asarray(looks, np.float32), axis=0)).ravel()
    if floor > 0:
        above = int(np.count_nonzero(diffs > floor / LARGE * (1.0 - 1e-6)))
        if above <= len(diffs) - len(diffs) // 2 - 1:
            return floor
    return max(floor, LARGE * float(np.median(diffs)))


def _departs(frames: list, reference: np.ndarray, change: float) -> np.ndarray:
    """Per cell, whether ``frames`` (a window's, oldest first, each (h, w)) differ from
    ``reference`` (h, w) by more than ``change`` in all of them but one, and in the newest,
    bool (h, w)."""
    diff = np.abs(np.asarray(frames, np.float32) - reference)
    return (_second_smallest(diff) > change) & (diff[-1] > change)


def _departure(looks: list, reference: np.ndarray, around: int = 1) -> np.ndarray:
    """Per cell, how far the looks of a window's frames are from ``reference``: the second
    smallest absolute difference over the frames (one set aside, see :func:`_changed`), the
    largest over the ``around`` x ``around`` cells centred on the cell, shape (h, w)
    float32."""
    diff = np.abs(np.asarray(looks, np.float32) - reference)
    change = _second_smallest(diff) if len(diff) > 2 else diff.min(axis=0)
    return flat_filter(np.ascontiguousarray(change, np.float32), around, np.maximum)


def _usual(level: np.ndarray, looks: list, normal: np.ndarray | None, change: float,
           around: int, bright: dict | None = None) -> np.ndarray:
    """``level`` of a window without a reference where the window's looks depart from the
    camera's normal look by more than ``normal[1]`` + ``change``, and, with the normal
    brightness ``normal[2]`` and the frames' brightness (``bright``, by look: see
    :func:`_by_look`), where that departure is the cells' own by more than ``change``
    (:func:`_own_from` the normal look and brightness), else at most 0 (see
    ``normal`` of :func:`persistence`; :func:`_unusual`); ``level`` itself without a normal
    look or a look."""
    found = _unusual(looks, normal, around, bright)
    return level if found is None or found.shape != level.shape else _gated(level, found, change)


def _unusual(looks: list, normal: np.ndarray | None, around: int, bright: dict | None = None
             ) -> np.ndarray | None:
    """Per cell, how far a window's ``looks`` (oldest first, each (h, w)) are unlike the
    camera's normal frames: their :func:`_departure` from the normal look ``normal[0]`` less
    the farthest any held-out normal window went there (``normal[1]``), and, with the normal
    brightness ``normal[2]`` and the frames' brightness (``bright``, by look: see
    :func:`_by_look`), at most by how much that departure is the cells' own
    (:func:`_own_from`), shape (h, w) float32 (above ``change``: unlike normal); None
    without a normal look of that shape or with a look missing."""
    if normal is None or any(v is None for v in looks) or normal.shape[1:] != looks[-1].shape:
        return None
    found = _departure(looks, normal[0], around) - normal[1]
    raw = _brightness_of(looks, bright) if bright and len(normal) > 2 else None
    if raw:
        found = np.minimum(found, _own_from(looks, raw, normal[0], normal[2], around))
    return found


def normal_look(looks: np.ndarray, times: np.ndarray, window: int, max_gap: float,
                blocks: np.ndarray | None = None, around: int = AROUND,
                brightness: np.ndarray | None = None) -> np.ndarray:
    """A camera's normal look, and how far windows of normal frames depart from it.

    Parameters
    ----------
    looks : ndarray, shape (n, h, w), float
        :func:`cell_looks` of normal frames in capture-time order.
    times : ndarray, shape (n,), float
        Their capture times, seconds.
    window : int
    max_gap : float
        A window's frames are at most this many seconds apart (and of one block).
    blocks : ndarray, shape (n,), int, optional
    around : int
    brightness : ndarray, shape (n, h, w), float, optional
        The same frames' :func:`cell_brightness`.

    Returns
    -------
    ndarray, shape (2, h, w), or (3, h, w) with ``brightness``, float32
        [0]: per cell, the median look of the frames (a passer-by covers a cell in far
        fewer than half of them); [1]: per cell, the largest :func:`_departure` from it of
        the windows of ``window`` consecutive frames (how far the light of normal days, and
        passers-by in all but one frame of a window, take a cell's look), 0 where there is
        no window; [2]: per cell, the median of the frames' brightness, each less its
        median over the frame's cells (:func:`_frame_relative`), as [0] is of the looks.
    """
    looks = np.asarray(looks, np.float32)
    times = np.asarray(times, np.float64)
    centre = np.median(looks, axis=0)
    reach = np.zeros_like(centre)
    for end in range(window, len(looks) + 1):
        span = slice(end - window, end)
        if (np.diff(times[span]) > max_gap).any() or (
                blocks is not None and len(np.unique(np.asarray(blocks)[span])) > 1):
            continue
        reach = np.maximum(reach, _departure(list(looks[span]), centre, around))
    layers = [centre, reach]
    if brightness is not None:
        layers.append(np.median(_frame_relative(brightness), axis=0))
    return np.stack(layers).astype(np.float32)


def _gated(step: np.ndarray, changed: np.ndarray, change: float) -> np.ndarray:
    """``step`` where the picture changed (``changed``, the same shape) by more than
    ``change``, else at most 0, as float32."""
    return np.where(changed > change, step, np.minimum(step, 0.0)).astype(np.float32)


def cell_looks(grey: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Per frame and map cell, the log brightness of the frame there less its mean over
    the cells around (see :func:`persistence`, ``looks``).

    The mean of the frame's grey over each cell (an area average to the map's shape), its
    logarithm, less its mean over the square of :func:`local_size` cells around (edges
    repeat the nearest cell): a change of exposure or gain multiplies the brightness and a
    lamp's pool changes it smoothly over a large part of the view, so both leave the look
    nearly as it was (a ratio is a difference of logarithms, and the mean around takes out
    what is smooth over a quarter of the view), while something set down changes it where
    it is. (A mean, not the median of :func:`local_maps`: a thing left covers a few
    percent of that square, so it moves the mean by as little, and a mean over a square
    costs a few microseconds a frame where the median costs about half a millisecond. That
    little can still pass ``change`` at untouched cells when a large thing leaves or comes
    into their square: :func:`_settled` also asks for a cell's own brightness to change.)

    Parameters
    ----------
    grey : ndarray, shape (n, H, W), float or uint8
        The frames' grey, as aligned to the reference (see
        :attr:`inspector.core.conditions.Prepared.aligned`).
    shape : (int, int)
        The map's (h, w).

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    return looks_of(cell_brightness(grey, shape))


def cell_brightness(grey: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Per frame and map cell, the log brightness of the frame there: the logarithm (of 1 +)
    the mean of the frame's grey over the cell (an area average to the map's shape).
    :func:`looks_of` makes them looks.

    Parameters
    ----------
    grey : ndarray, shape (n, H, W), float or uint8
        The frames' grey, as aligned to the reference.
    shape : (int, int)
        The map's (h, w).

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    import cv2

    h, w = shape
    out = np.empty((len(grey), h, w), np.float32)
    for i, g in enumerate(grey):
        out[i] = np.log1p(cv2.resize(np.asarray(g, np.float32), (w, h),
                                     interpolation=cv2.INTER_AREA))
    return out


def looks_of(brightness: np.ndarray) -> np.ndarray:
    """:func:`cell_looks` from the frames' :func:`cell_brightness`: each cell less its mean
    over the square of :func:`local_size` cells around (edges repeat the nearest cell).

    Parameters
    ----------
    brightness : ndarray, shape (n, h, w), float32

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    import cv2

    brightness = np.asarray(brightness, np.float32)
    k = local_size(brightness.shape)
    out = np.empty(brightness.shape, np.float32)
    for i, cells in enumerate(brightness):
        out[i] = cells - cv2.blur(cells, (k, k), borderType=cv2.BORDER_REPLICATE)
    return out


def look_noise(looks: np.ndarray, times: np.ndarray, max_gap: float,
               blocks: np.ndarray | None = None) -> float:
    """How much a cell's look changes from one normal frame to the next: the median over
    cells and consecutive pairs (within ``max_gap`` seconds and one block) of the absolute
    difference of :func:`cell_looks`; 0 when there is no such pair.

    Parameters
    ----------
    looks : ndarray, shape (n, h, w), float
        The frames' :func:`cell_looks`, in capture-time order.
    times : ndarray, shape (n,), float
        Their capture times, seconds since the epoch.
    max_gap : float
        Seconds between two frames beyond which they are no pair.
    blocks : ndarray, shape (n,), int, optional
        Their time blocks: two frames of different blocks are no pair.

    Returns
    -------
    float
    """
    looks = np.asarray(looks, np.float32)
    times = np.asarray(times, np.float64)
    if len(looks) < 2:
        return 0.0
    pair = np.diff(times) <= max_gap
    if blocks is not None:
        pair &= np.diff(np.asarray(blocks)) == 0
    if not pair.any():
        return 0.0
    idx = np.flatnonzero(pair)
    return float(np.median(np.abs(looks[idx + 1] - looks[idx])))


def opened(level: np.ndarray, footprint: int) -> np.ndarray:
    """A persistence map opened by a ``footprint`` x ``footprint`` square: per cell, the
    largest value that a whole square of cells holding the cell reaches or passes (a
    grey-scale opening, erosion then dilation; Serra 1982, from memory; edges repeat the
    nearest cell). A patch spans ``footprint`` cells on a side (patch / stride), so anything
    seen in the frames changes every cell of a patch at least: a region narrower than that
    (one cell at the edge of a passer-by, of a masked area) is not something left, while a
    region at least one patch wide keeps its values and its shape.

    Parameters
    ----------
    level : ndarray, shape (..., h, w), float
        One map or a stack of maps (each opened on its own).
    footprint : int >= 1

    Returns
    -------
    ndarray, shape (..., h, w), float32
    """
    level = np.asarray(level, np.float32)
    if footprint <= 1:
        return level
    # (scipy.ndimage.grey_opening's alignment: the erosion's square ends (footprint - 1) // 2
    # cells after the cell, the dilation's, mirrored, footprint // 2)
    return flat_filter(flat_filter(level, footprint, np.minimum, (footprint - 1) // 2),
                       footprint, np.maximum, footprint // 2)


def flat_filter(maps: np.ndarray, size: int, op, after: int | None = None) -> np.ndarray:
    """A minimum or maximum over a ``size`` x ``size`` square of cells, map by map, edges
    repeating the nearest cell (a flat grey-scale erosion or dilation, Serra 1982, from
    memory): the square of a cell runs from ``size - 1 - after`` cells before it to
    ``after`` cells after it on both axes (default ``(size - 1) // 2``, the alignment of
    ``scipy.ndimage.minimum_filter`` / ``maximum_filter`` with ``mode="nearest"``, whose
    numbers these are). By shifted slices, one axis then the other: about three times
    faster than scipy's filters at the small sizes used here, which were most of
    persistence's time in calibration. Maps holding NaN go to scipy (which orders NaN its
    own way).

    Parameters
    ----------
    maps : ndarray, shape (..., h, w), float32
    size : int >= 1
    op : ``numpy.minimum`` or ``numpy.maximum``
    after : int, optional

    Returns
    -------
    ndarray, shape (..., h, w), float32 (``maps`` itself when ``size`` is 1)
    """
    if size <= 1:
        return maps
    after = (size - 1) // 2 if after is None else int(after)
    before = size - 1 - after
    if np.isnan(maps).any():
        from scipy.ndimage import maximum_filter, minimum_filter

        fn = minimum_filter if op is np.minimum else maximum_filter
        return fn(maps, size=(1,) * (maps.ndim - 2) + (size, size), mode="nearest",
                  origin=(0,) * (maps.ndim - 2) + ((size - 1) // 2 - after,) * 2)
    out = maps
    for axis in (maps.ndim - 2, maps.ndim - 1):
        src, out = out, out.copy()
        n = src.shape[axis]

        def part(a: int, b: int, arr=src, ax=axis) -> np.ndarray:
            index = [slice(None)] * arr.ndim
            index[ax] = slice(a, b)
            return arr[tuple(index)]

        for d in range(-before, after + 1):
            if d == 0 or not n:
                continue
            if d > 0:  # out[i] with src[min(i + d, n - 1)]
                k = min(d, n)
                if n > d:
                    op(part(0, n - d, out), part(d, n), out=part(0, n - d, out))
                op(part(n - k, n, out), part(n - 1, n), out=part(n - k, n, out))
            else:  # out[i] with src[max(i + d, 0)]
                k = min(-d, n)
                if n > -d:
                    op(part(-d, n, out), part(0, n + d), out=part(-d, n, out))
                op(part(0, k, out), part(0, 1), out=part(0, k, out))
    return out


def _step(frames: list[np.ndarray], window: int, held: np.ndarray | None = None,
          around: int = 1, scaled: bool = False, spreads: dict | None = None,
          min_past: int = 1, settled: np.ndarray | None = None,
          looks: list | None = None, change: float = 0.0
          ) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
    """Steady level of the last ``window`` of ``frames`` and that level less the reference
    from the frames before them (:func:`past_level`; none: 0), a held cell keeping its
    reference from ``held`` (NaN where not held), shapes (h, w), float32; the scale the
    frames were divided by: with ``scaled``, the median of the window frames' robust spreads
    floored at 1 (:func:`robust_spread`), else 1; and the window's frames divided by it
    (what the steady level is taken of), shape (m, h, w), float32, m = min(window,
    len(frames)). ``spreads``: the
    robust spreads of frames met before, by frame (see :func:`_spreads`); fewer than
    ``min_past`` frames before the window: no reference. ``settled``: cells whose steady
    level takes no spread off (see :func:`steady_level`)."""
    win = np.asarray(frames[-window:], np.float32)
    scale = (max(float(np.median(_spreads(frames[-window:], win, spreads))), 1.0) if scaled
             else 1.0)
    win_scaled = win / np.float32(scale)
    level = steady_level(win_scaled, around, settled=settled)
    before = frames[:-window]
    reference = (_reference(before, scale, None if looks is None else looks[:-window],
                            change, min_past) if before and len(before) >= min_past
                 else np.zeros_like(level))
    if held is not None:
        reference = np.where(np.isnan(held), reference, held)
    return level, (level - reference).astype(np.float32), scale, win_scaled


def change_spread(window_maps: np.ndarray, past_maps: np.ndarray) -> float:
    """How much a view changed from the frames before a window to the window: the robust
    spread (:func:`robust_spread`) over the cells of the median of the window's maps less
    the median of the maps before it, per cell.

    A step (the window's steady level less the level before it) is divided by how much
    the view as a whole changed, not by how scattered its cells are: in a dark, noisy
    stretch each cell's reading scatters widely from cell to cell but stays much the same
    from frame to frame (the noise raises each cell's reading by its own, steady amount),
    so the cells' spread counts the noise a step takes off, while the spread of the changes
    counts what it leaves. When the whole view does change between the two (the lamps go
    off, a gain switches), the changes are as scattered as the cells. The medians leave out
    one passer-by per cell in the window (and up to half the frames before it).

    Parameters
    ----------
    window_maps : ndarray, shape (m, h, w), float32, m >= 1
    past_maps : ndarray, shape (k, h, w), float32, k >= 1

    Returns
    -------
    float
    """
    moved = _median_along(window_maps) - _median_along(past_maps)
    return float(robust_spread(moved[None])[0])


def _reference(before: list[np.ndarray], scale: float, looks: list | None = None,
               change: float = 0.0, min_past: int = 1) -> np.ndarray:
    """:func:`past_level` of the frames ``before`` a window (at least one) divided by
    ``scale`` (see :func:`_step`), shape (h, w), float32.

    With their ``looks`` (one a frame; ``change`` > 0): where at least ``min_past`` (and 2)
    of the frames have a look within ``change`` of the median of their looks, the
    :func:`past_level` of those frames alone where that is lower (``ground`` of
    :func:`persistence`): the frames that show the place as most of them do, passers-by
    set aside by what they look like rather than only by being the largest. A level of
    fewer frames is never above the level of all of them (the second largest of a subset
    is at most that of the whole), so the reference only goes down."""
    q = np.asarray(before, np.float32) / np.float32(scale)
    level = past_level(q)
    if (looks is None or change <= 0 or len(looks) != len(before) or len(before) < 2
            or any(v is None for v in looks)):
        return level
    lk = np.asarray(looks, np.float32)
    agree = np.abs(lk - _median_along(lk)) <= change
    enough = agree.sum(axis=0) >= max(min_past, 2)
    if not enough.any():
        return level
    ground = np.maximum(_lowest_and_second(np.where(agree, q, -np.inf))[1], 0.0)
    return np.where(enough, np.minimum(level, ground), level).astype(np.float32)


def _spreads(frames: list[np.ndarray], win: np.ndarray, cache: dict | None) -> np.ndarray:
    """:func:`robust_spread` of each of ``frames`` (``win``: them as one float32 array), each
    frame's computed once in ``cache`` (``id`` of the frame -> (frame, spread), the frame
    held there so that its ``id`` stays its own): a frame is in ``window`` steps in turn."""
    if cache is None:
        return robust_spread(win)
    out = np.empty(len(frames))
    for j, f in enumerate(frames):
        hit = cache.get(id(f))
        if hit is None or hit[0] is not f:
            hit = cache[id(f)] = (f, float(robust_spread(win[j:j + 1])[0]))
        out[j] = hit[1]
    return out


def past_level(past_maps: np.ndarray) -> np.ndarray:
    """Per cell, the level of the frames just before a window: the reference a change is
    measured from.

    With the cell's values over those frames sorted, x(1) <= ... <= x(m): the second
    largest, x(m-1) (x(1) when m = 1), and never below 0, the normal level of a local
    map. The largest is set aside so that one passer-by in those frames does not hide what
    appears after them; taking a high value otherwise (rather than the lowest) keeps a
    region whose anomaly varies from frame to frame (a dark, noisy corner after the lamps go
    off) from reading as a change. With :func:`steady_level` it makes the long-term /
    short-term split of abandoned-object detection (Porikli, Ivanov & Haga 2008, from
    memory): the window is compared with the frames just before it at the same place, so a
    slow change of light covering a region, already there before the window, is not counted.

    Parameters
    ----------
    past_maps : ndarray, shape (m, h, w), float, m >= 1

    Returns
    -------
    ndarray, shape (h, w), float32, >= 0
    """
    q = np.asarray(past_maps, np.float32)
    return np.maximum(_lowest_and_second(q)[1] if len(q) >= 2 else q[0], 0.0)


def steady_level(window_maps: np.ndarray, around: int = 1, shown: bool = False,
                 settled: np.ndarray | None = None) -> np.ndarray:
    """Per cell, how unusual a window of local maps is in a steady way.

    With the cell's values over the window sorted, x(1) <= ... <= x(m): the lowest value less
    the spread of the others once the largest is set aside, x(1) - (x(m-1) - x(1)) (m >= 3;
    x(1) for m <= 2). See the module notes for why. With ``around`` > 1 the spread is the
    largest among the ``around`` x ``around`` cells centred on the cell (a grey-scale
    dilation of the spread map, Serra 1982, from memory; edges repeat the nearest cell): a
    thing left is steady at its place and around it, edges included, while a passer-by who
    covers a cell in every frame of the window moves its edges across the cells beside it.
    With ``shown``, the value set aside is the largest of the frames before the last one
    (the frame being judged is never set aside): the spread is then
    max(x_last, y(m-2)) - x(1), y(1) <= ... <= y(m-1) the values of the frames before the
    last (m >= 3). A thing is then counted in a frame only where that frame shows it:
    when it has been taken away and a passer-by stands where it was (or the frame is
    otherwise unlike the window's other frames there), the frame is not flagged for what
    the frames before it held. Where ``settled`` (the picture shows a thing settled there,
    see ``brightness`` of :func:`persistence`), the level is x(1): no spread is taken off.

    Parameters
    ----------
    window_maps : ndarray, shape (m, h, w), float, m >= 1
    around : int >= 1, odd
    shown : bool
    settled : ndarray, shape (h, w), bool, optional

    Returns
    -------
    ndarray, shape (h, w), float32
    """
    m = np.asarray(window_maps, np.float32)
    if len(m) <= 2:
        return m.min(axis=0)
    low, second = _lowest_and_second(m)
    if shown:
        second = np.maximum(m[-1], _lowest_and_second(m[:-1])[1])
    spread = second - low
    if around > 1:
        spread = flat_filter(spread, around, np.maximum)
    if settled is not None:
        spread = np.where(settled, np.float32(0.0), spread)
    return low - spread


def _lowest_and_second(m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """x(1) and x(m-1) of each cell's values sorted along the first axis (as
    ``np.sort(m, axis=0)[[0, -2]]``, NaN sorting last), shape (m, h, w) float32, m >= 2:
    values picked, not computed, so the same numbers; without NaN by a running minimum and
    two largest (a sort along the first axis is several times slower)."""
    if np.isnan(m).any():
        q = np.sort(m, axis=0)
        return q[0], q[-2]
    top, second = m[0], None
    for x in m[1:]:
        below = np.minimum(top, x)  # the smaller of the largest so far and x
        second = below if second is None else np.maximum(second, below)
        top = np.maximum(top, x)
    return m.min(axis=0), second


def _second_smallest(m: np.ndarray) -> np.ndarray:
    """x(2) of each cell's values sorted along the first axis (as ``np.sort(m, axis=0)[1]``
    for values without NaN), shape (m, h, w) float32, m >= 2: values picked, not computed,
    by a running smallest and second smallest (as :func:`_lowest_and_second`)."""
    low, second = m[0], None
    for x in m[1:]:
        above = np.maximum(low, x)  # the larger of the smallest so far and x
        second = above if second is None else np.minimum(second, above)
        low = np.minimum(low, x)
    return second


def _sorted_along(m: np.ndarray) -> list[np.ndarray]:
    """Each cell's values sorted along the first axis, as ``np.sort(m, axis=0)`` for values
    without NaN (values picked, not computed): an odd-even transposition sort by elementwise
    minimum and maximum (Knuth, *The Art of Computer Programming* vol. 3, 5.3.4, from
    memory), m passes for m values, many times faster than a sort or partition along the
    first axis for the few frames of a window.

    Parameters
    ----------
    m : ndarray, shape (m, h, w), float32

    Returns
    -------
    list of m ndarray, shape (h, w), float32, smallest first
    """
    rows = list(np.asarray(m, np.float32))
    for p in range(len(rows)):
        for j in range(p % 2, len(rows) - 1, 2):
            rows[j], rows[j + 1] = (np.minimum(rows[j], rows[j + 1]),
                                    np.maximum(rows[j], rows[j + 1]))
    return rows


def _median_along(m: np.ndarray) -> np.ndarray:
    """``np.median(m, axis=0)`` of values without NaN, by :func:`_sorted_along`: the middle
    value, or the mean of the two middle ones, shape (h, w) float32."""
    rows = _sorted_along(m)
    k = len(rows)
    return rows[k // 2] if k % 2 else (rows[k // 2 - 1] + rows[k // 2]) / np.float32(2.0)


def local_maps(maps: np.ndarray, robust: bool = False, local: int = 0) -> np.ndarray:
    """Anomaly maps less their median over the frame's cells, or over the cells around each
    cell.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float
    robust : bool
        Also divide each map by its cells' robust spread (:func:`robust_spread`) when that
        is above the spread of standardised normal cells, i.e. floored at 1. A frame whose
        whole view is disturbed (dark and noisy after the lamps go off, say) counts a cell
        by how far it stands out from the rest of that frame; a frame where a thing covers
        a small part of the view keeps its scale.
    local : int >= 0
        With ``local`` > 0, each cell less the median of the ``local`` x ``local`` cells
        around it (a median filter, as ``scipy.ndimage.median_filter``; edges repeat the
        nearest cell), taken on the map reduced to half size by area averaging and enlarged
        back bilinearly (the median of a quarter of the view changes slowly; a full-size
        filter costs about 15 ms a frame): a change of light over part of the view (a lamp's
        pool switching on, sun on one side, a passer-by's shadow over the brightness field
        of preparation) is taken out as a change over the whole view is, while a thing
        left, far smaller than the square, keeps its level. 0: the median over the whole
        map.

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    maps = np.asarray(maps, np.float32)
    if not len(maps):
        return maps
    if local > 0:
        out = maps - local_median(maps, local)
    else:
        flat = maps.reshape(len(maps), -1)
        centre = np.median(flat, axis=1).astype(np.float32)
        out = maps - centre[:, None, None]
    if robust:
        out = out / np.maximum(robust_spread(out), 1.0).astype(np.float32)[:, None, None]
    return out


def local_median(maps: np.ndarray, local: int) -> np.ndarray:
    """Per cell, the median of the ``local`` x ``local`` cells around it, on maps reduced to
    half size (``local`` // 2 cells there, made odd) and enlarged back (see
    :func:`local_maps`).

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float32
    local : int >= 1

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    import cv2

    h, w = maps.shape[1:]
    small = (max(1, w // 2), max(1, h // 2))
    filtered = median_filtered(np.stack([cv2.resize(m, small, interpolation=cv2.INTER_AREA)
                                         for m in maps]), (local // 2) | 1)
    return np.stack([cv2.resize(m, (w, h), interpolation=cv2.INTER_LINEAR) for m in filtered])


def median_filtered(maps: np.ndarray, size: int, chunk: int = 1 << 22) -> np.ndarray:
    """Each map's ``size`` x ``size`` median filter, edges repeating the nearest cell: the
    values of ``scipy.ndimage.median_filter(m, size=size, mode="nearest")`` for finite maps
    (the median of each window is one of its values), computed for a stack of maps at once
    by partitioning every window's values (about a quarter of the CPU time of the filter
    map by map, for 11 x 11 windows of 23 x 40 maps).

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float32
    size : int >= 1, odd
    chunk : int
        Window values gathered at once at most (bounds the temporary copy).

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    from numpy.lib.stride_tricks import sliding_window_view

    n, h, w = maps.shape
    r, k = size // 2, size * size
    out = np.empty(maps.shape, np.float32)
    step = max(1, chunk // max(1, h * w * k))
    for start in range(0, n, step):
        padded = np.pad(np.asarray(maps[start:start + step], np.float32),
                        ((0, 0), (r, r), (r, r)), mode="edge")
        windows = sliding_window_view(padded, (size, size), axis=(1, 2))
        out[start:start + step] = np.partition(windows.reshape(len(padded), h, w, k), k // 2,
                                               axis=-1)[..., k // 2]
    return out


def local_size(shape: tuple[int, ...]) -> int:
    """Cells on a side of the square of :func:`local_maps` for maps of ``shape`` (..., h, w):
    :data:`LOCAL_SHARE` of the long side."""
    return max(1, int(round(LOCAL_SHARE * max(shape[-2:]))))


def robust_spread(maps: np.ndarray) -> np.ndarray:
    """Robust spread of each map's cells: the median absolute deviation from the median
    times 1.4826, which estimates a normal standard deviation (Rousseeuw & Croux 1993,
    "Alternatives to the median absolute deviation", JASA 88; as
    ``scipy.stats.median_abs_deviation(scale="normal")``).

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float

    Returns
    -------
    ndarray, shape (n,), float64
    """
    flat = np.asarray(maps, np.float32).reshape(len(maps), -1)
    centre = np.median(flat, axis=1)
    return 1.4826 * np.median(np.abs(flat - centre[:, None]), axis=1).astype(np.float64)


def frame_interval(times: np.ndarray) -> float:
    """Typical seconds between frames: the median positive gap of sorted capture ``times``
    (shape (n,), seconds, in any order); 1.0 when there is none."""
    gaps = np.diff(np.sort(np.asarray(times, np.float64)))
    gaps = gaps[gaps > 0]
    return float(np.median(gaps)) if len(gaps) else 1.0


@dataclass
class Persistence:
    """A camera's calibrated persistence: its window, threshold and how busy it is.

    Attributes
    ----------
    window : int
    max_gap : float
        Seconds; :data:`GAP_FACTOR` typical frame intervals of the normal frames.
    threshold : Threshold
        Flag a frame iff its window is full and its persistence score > ``threshold.value``.
    calibration_scores : ndarray, shape (k,)
        Persistence scores of the held-out normal frames with a full window.
    transient_share : float
        Share of those frames that hold a large short-lived anomaly (see
        :func:`calibrate_persistence`).
    busy : bool
        The share is clearly above ``BUSY_SHARE`` (:func:`clearly_busy`): persistence is on
        by default.
    past : int
        Frames before the window the reference comes from (``past`` of
        :func:`persistence`; 0 for baselines learnt before there was one).
    robust : bool, "window" or "change"
        Local maps scaled by their robust spread, each by its own (True, baselines learnt
        before "window") or a window's by one ("window", baselines learnt before "change"),
        a step where a cell's own brightness changed then counted against how much the
        view changed ("change"; ``robust`` of :func:`persistence`).
    start_threshold : Threshold or None
        Threshold of frames with no frame before their window in their stretch of the
        stream (the first of a run): the conformal threshold of the steady levels of every
        held-out window. None: ``threshold`` for every frame.
    start_scores : ndarray, shape (k,), or None
        Its calibration scores.
    around : int
        Neighbourhood of the steady level's spread (``around`` of :func:`persistence`; 1
        for baselines learnt before it).
    floor : float
        Neither threshold is below this: the steady level that the cells of held-out
        normal windows pass in a share ``alpha`` of cells and windows, and at least 0 (see
        :func:`calibrate_persistence`); 0 for baselines learnt before it.
    local : int
        Cells on a side of the square whose median the local maps are taken less (``local``
        of :func:`persistence`); 0 (the whole view) for baselines learnt before it.
    footprint : int
        Cells on a side of a patch, by which the persistence maps are opened (``footprint``
        of :func:`persistence`); 1 (not opened) for baselines learnt before it.
    min_past : int
        Fewest frames before a window for a reference (``min_past`` of :func:`persistence`;
        :data:`MIN_PAST`, 1 for baselines learnt before it).
    change : float
        A cell measured from a reference counts only where the frames' looks changed by
        more than this (``change`` of :func:`persistence`): :data:`LARGE` times how much a
        cell's look changes from one normal frame to the next (:func:`look_noise`); 0 (every
        cell counts) for baselines learnt before it, or without looks.
    shown : bool or "all"
        A held cell is flagged only where the frame shows what it holds (``shown`` of
        :func:`persistence`); False for baselines learnt before it. "all" (with
        ``settle``): a cell not held, too, where the frame looks unlike the window's others
        by its look and its own brightness, calibrated with it; True for baselines learnt
        before it.
    normal : ndarray, shape (2, h, w) or (3, h, w), float32, or None
        The camera's normal look (:func:`normal_look` of the calibrating frames), which
        windows without a reference must depart from (``normal`` of :func:`persistence`),
        with the normal brightness as its third layer when ``settle`` (2 layers for
        baselines learnt before it: their first windows run as then); None for baselines
        learnt before it, or without looks.
    crossed : bool or "brightness"
        Windows measured from a reference also count what frames seen through passers-by
        show (``crossed`` of :func:`persistence`); False for baselines learnt before it,
        whose thresholds were calibrated without it; "brightness": those frames also found
        by the cells' own brightness (with ``settle``), True for baselines learnt before
        it (by their looks alone).
    settle : bool
        A cell where a thing has settled (its look and its brightness changed, its looks
        steady) takes no spread off its steady level (``brightness`` of
        :func:`persistence`): the frames' measures for it (:meth:`cells`) are then their
        :func:`cell_brightness`, else their :func:`cell_looks`; False for baselines learnt
        before it, or without looks.
    settle_noise : bool
        A settled thing's looks agree within the window's own look noise where that is
        above ``change``, at cells that look unlike the normal frames (``settle_noise`` of
        :func:`persistence`); False for baselines learnt before it, whose thresholds were
        calibrated without it. (0.13's baselines that carry it, calibrated without the
        normal-look condition, run with it: it only takes flags away.)
    settle_look : bool
        In a dark stretch a settled thing the model reads above its reference also counts
        by what the picture reads of it, at cells that look unlike the normal frames
        (``settle_look`` of :func:`persistence`); False for baselines learnt before it,
        whose thresholds were calibrated without it (0.13's that carry it: as
        ``settle_noise``).
    ground : bool
        A window's reference is taken from the frames before it that show the place as most
        of them do (``ground`` of :func:`persistence`); False for baselines learnt before
        it, whose thresholds were calibrated without it.
    """

    window: int
    max_gap: float
    threshold: Threshold
    calibration_scores: np.ndarray = field(repr=False)
    transient_share: float
    busy: bool
    past: int = 0
    robust: bool | str = False
    start_threshold: Threshold | None = None
    start_scores: np.ndarray | None = field(default=None, repr=False)
    around: int = 1
    floor: float = 0.0
    local: int = 0
    footprint: int = 1
    min_past: int = 1
    change: float = 0.0
    shown: bool | str = False
    normal: np.ndarray | None = field(default=None, repr=False)
    crossed: bool | str = False
    settle: bool = False
    settle_noise: bool = False
    settle_look: bool = False
    ground: bool = False

    def cells(self, grey: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
        """What :meth:`run` takes of each frame (its ``cells``): the frames'
        :func:`cell_brightness` when ``settle`` (:meth:`run` makes the looks of them), else
        their :func:`cell_looks`, shape (n, h, w) float32 (``grey``, ``shape``: as for
        those)."""
        return (cell_brightness if self.settle else cell_looks)(grey, shape)

    def run(self, maps: np.ndarray, times: np.ndarray, state: StreamState | None = None,
            cells: np.ndarray | None = None) -> PersistenceResult:
        """:func:`persistence` of a camera's frames with these settings and thresholds:
        ``maps`` (n, h, w) and ``times`` (n,) as there, ``state`` the state after the
        previous call, ``cells`` (n, h, w) float32 the frames' :meth:`cells` when known."""
        looks, bright = cells, None
        if self.settle and cells is not None:
            looks, bright = looks_of(cells), cells
        return persistence(maps, times, self.window, self.max_gap, self.threshold.value,
                           state, past=self.past, robust=self.robust,
                           start_threshold=(self.start_threshold.value
                                            if self.start_threshold is not None else None),
                           around=self.around, local=self.local, footprint=self.footprint,
                           min_past=self.min_past, looks=looks, change=self.change,
                           shown=self.shown, normal=self.normal, crossed=self.crossed,
                           brightness=bright, settle_noise=self.settle_noise,
                           settle_look=self.settle_look, ground=self.ground)

    def judged(self, run: PersistenceResult) -> tuple[np.ndarray, np.ndarray]:
        """Threshold of each frame of ``run`` and its conformal p-value against the matching
        calibration scores, shapes (n,)."""
        thresholds = np.full(len(run.scores), self.threshold.value)
        p = conformal_p_values(self.calibration_scores, run.scores)
        if self.start_threshold is not None:  # the first frames of a run: their own
            first = ~run.stepped
            thresholds[first] = self.start_threshold.value
            if self.start_scores is not None:
                p = np.where(first, conformal_p_values(self.start_scores, run.scores), p)
        return thresholds, p

    def lone(self) -> list[tuple[str, float, float]]:
        """The thresholds that rest on one held-out window: (which, threshold, next), for
        each threshold ("change" or "first frames") set by the largest of its calibration
        scores where that is more than :data:`LARGE` times the next largest score and the
        floor. With fewer windows than ``alpha`` needs the conformal threshold is the
        largest score (see :func:`inspector.core.calibration.conformal_threshold`), so one
        window unlike all the others sets what every frame is held to."""
        out = []
        for which, thr, scores in (("change", self.threshold, self.calibration_scores),
                                   ("first frames", self.start_threshold, self.start_scores)):
            if thr is None or scores is None or len(scores) < 2:
                continue
            top, second = np.sort(np.asarray(scores, np.float64))[-2:][::-1]
            below = max(float(second), self.floor)
            if thr.value <= top and top > LARGE * below and top > 0:
                out.append((which, float(thr.value), below))
        return out

    @property
    def span(self) -> float:
        """Seconds a window of typical normal frames spans."""
        return self.window * self.max_gap / GAP_FACTOR

    def to_json(self) -> dict:
        out = {"window": self.window, "max_gap": self.max_gap,
               "transient_share": self.transient_share, "busy": self.busy,
               "threshold": self.threshold.to_dict(), "past": self.past,
               "robust": self.robust, "around": self.around, "floor": self.floor,
               "local": self.local, "footprint": self.footprint, "min_past": self.min_past,
               "change": self.change, "shown": self.shown, "crossed": self.crossed,
               "settle": self.settle, "settle_noise": self.settle_noise,
               "settle_look": self.settle_look, "ground": self.ground}
        if self.start_threshold is not None:
            out["start_threshold"] = self.start_threshold.to_dict()
        return out

    @classmethod
    def from_saved(cls, meta: dict, calibration_scores: np.ndarray,
                   start_scores: np.ndarray | None = None,
                   normal: np.ndarray | None = None) -> "Persistence":
        """Rebuild from :meth:`to_json` (``meta``), the calibration scores, shape (k,), the
        first frames' scores, shape (k',), and the normal look, shape (2 or 3, h, w) (see
        ``normal`` of :func:`persistence`); keys missing from older baselines take the
        values that ran them."""
        start = meta.get("start_threshold")
        return cls(int(meta["window"]), float(meta["max_gap"]),
                   Threshold.from_dict(meta["threshold"]),
                   np.asarray(calibration_scores, np.float64), float(meta["transient_share"]),
                   bool(meta["busy"]), int(meta.get("past", 0)), _robust(meta.get("robust", False)),
                   Threshold.from_dict(start) if start else None,
                   None if start_scores is None else np.asarray(start_scores, np.float64),
                   int(meta.get("around", 1)), float(meta.get("floor", 0.0)),
                   int(meta.get("local", 0)), int(meta.get("footprint", 1)),
                   int(meta.get("min_past", 1)), float(meta.get("change", 0.0)),
                   _shown(meta.get("shown", False)),
                   None if normal is None else np.asarray(normal, np.float32),
                   _crossed(meta.get("crossed", False)), bool(meta.get("settle", False)),
                   bool(meta.get("settle_noise", False)),
                   bool(meta.get("settle_look", False)), bool(meta.get("ground", False)))


def _robust(saved) -> bool | str:
    """``robust`` as saved in a baseline's JSON: "window", "change", or a bool."""
    return saved if saved in ("window", "change") else bool(saved)


def _shown(saved) -> bool | str:
    """``shown`` as saved in a baseline's JSON: "all", or a bool."""
    return saved if saved == "all" else bool(saved)


def _crossed(saved) -> bool | str:
    """``crossed`` as saved in a baseline's JSON: "brightness", or a bool."""
    return saved if saved == "brightness" else bool(saved)


def calibrate_persistence(maps: np.ndarray, times: np.ndarray, blocks: np.ndarray,
                          alpha: float, window: int = WINDOW,
                          scanned: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
                          footprint: int = 1, looks: np.ndarray | None = None,
                          brightness: np.ndarray | None = None) -> Persistence:
    """Calibrate persistence on held-out normal maps, and measure how busy the camera is.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float
        Standardised anomaly maps of held-out normal frames (each from a model that did not
        see that frame, standardised without its time block: see
        :func:`inspector.core.calibration.cross_fit_maps`), in capture-time order.
    times : ndarray, shape (n,), float
        Capture times, seconds since the epoch.
    blocks : ndarray, shape (n,), int
        Time block of each frame; windows do not cross blocks.
    alpha : float in (0, 1)
        False-alarm rate asked for.
    window : int
    scanned : (maps, times, blocks), optional
        The held-out frames that set the thresholds, with their maps standardised as scan
        maps are (by the blocks the single-frame calibration keeps, see
        :func:`inspector.core.calibration.newest_blocks`); default: ``maps``, ``times``,
        ``blocks``. How busy the camera is is measured on all of ``maps``.
    footprint : int >= 1
        Cells on a side of a model patch (patch / stride): the persistence maps are opened
        by it (see :func:`opened`).
    looks : ndarray, shape (k, h, w), float, optional
        :func:`cell_looks` of the frames of ``scanned`` (of ``maps`` without it): a cell
        measured from a reference then counts only where the picture changed by more than
        :data:`LARGE` times how much a cell's look changes from one normal frame to the next
        (``change``; see :func:`persistence`), in calibration as at scan time.
    brightness : ndarray, shape (k, h, w), float, optional
        :func:`cell_brightness` of the same frames, instead of ``looks`` (which are then
        made from it, :func:`looks_of`): a cell where a thing has settled then also takes
        no spread off its steady level (``settle``; ``brightness`` of :func:`persistence`),
        its looks agreeing within the window's own look noise in a dark stretch
        (``settle_noise``), where the model reads it above its reference also counting by
        what the picture reads of it (``settle_look``), in calibration as at scan time;
        with it too, a window's reference is taken from the frames before it that show the
        place as most of them do (``ground``), and a frame unlike its window's others by its
        look and its own brightness is not flagged where nothing is held (``shown`` "all"),
        in calibration as at scan time.

    Returns
    -------
    Persistence
        The conformal threshold of the persistence scores of frames with a full window,
        raised to ``floor`` when below it: the (1 - ``alpha``) quantile of the steady levels
        of every cell of every held-out window, and at least 0 (a thing left must stand above
        what normal cells steadily show, not only above the largest step of a few dozen
        windows). A
        frame holds a large short-lived anomaly when its single-frame score is above
        ``LARGE`` x the first quartile of the single-frame scores (an order of magnitude above
        the quietest quarter of the frames; this assumes passers-by leave at least a quarter
        of the frames empty) while its persistence score is below 1 / ``LARGE`` of it
        (almost all of it gone within the window). Slow changes (daylight, lamps) stay over
        the window and do not count. The camera is busy when clearly more than ``BUSY_SHARE``
        of the frames hold one (:func:`clearly_busy`): a single-frame threshold at any alpha
        below that share is then set by what passes. A camera whose window of typical frames
        spans more than ``MAX_SPAN`` seconds is never called busy.

    Raises
    ------
    ValueError
        No frame has a full window (too few consecutive normal frames).
    """
    max_gap = GAP_FACTOR * frame_interval(times)
    run = persistence(maps, times, window, max_gap, blocks=blocks)
    if not run.filled.any():
        raise ValueError(f"no run of {window} consecutive normal frames within "
                         f"{max_gap:.0f} s of each other")
    scores = run.scores[run.filled]
    single = frame_scores(np.asarray(maps, np.float32))[run.filled]
    transient = (single > LARGE * np.quantile(single, 0.25)) & (scores < single / LARGE)
    share = float(transient.mean())
    close = window * max_gap / GAP_FACTOR <= MAX_SPAN
    busy = close and clearly_busy(int(transient.sum()), len(transient))
    # Flags come from the step from the frames just before the window, on maps less their
    # median around each cell, scaled by the window's robust spread and opened by a patch;
    # frames with no frame before their window are held to the steady level of any window.
    # The reference comes from up to twice the window's frames before it: the second largest
    # of more frames is more often one that no passer-by near the cell disturbed.
    s_maps, s_times, s_blocks = scanned if scanned is not None else (maps, times, blocks)
    past = 2 * window
    local = local_size(np.shape(s_maps))
    # both runs below take the same local maps: made once (the median around each cell is
    # most of their cost)
    s_maps = local_maps(s_maps, False, local)
    if brightness is not None:
        looks = looks_of(brightness)
    settle = brightness is not None
    robust = "change" if settle else "window"  # (a cell's own brightness: see _lift)
    crossed = "brightness" if settle else True  # (see seen_through)
    night = NIGHT_RULES and settle  # (settle_noise, settle_look: they need the brightness)
    opts = dict(robust=robust, around=AROUND, local=local, footprint=footprint,
                made_local=True, min_past=MIN_PAST)
    change = (LARGE * look_noise(looks, s_times, max_gap, s_blocks) if looks is not None
              else 0.0)
    # (scan time only: windows without a reference flag a subset of what the start
    # threshold, calibrated without it, allows)
    normal = (normal_look(looks, s_times, window, max_gap, s_blocks, brightness=brightness)
              if looks is not None else None)
    # (in two threads, whole blocks each: the same numbers, see _in_two)
    step = _in_two(s_maps, s_times, window, max_gap, s_blocks, looks, brightness, past=past,
                   change=change, crossed=crossed, settle_noise=night, settle_look=night,
                   ground=settle, shown="all" if settle else False,
                   **opts)
    if not step.filled.any():
        raise ValueError(f"no run of {window} consecutive calibrating frames within "
                         f"{max_gap:.0f} s of each other")
    starts = step.levels[step.filled]
    stepped = step.filled & step.stepped
    # A cell counts as unusual now only above the steady level that normal cells pass in
    # alpha of cells and windows (the reference is never below 0, so a step above it leaves
    # its cell there): a step smaller than that, though larger than every step of the few
    # held-out windows, is within what normal cells show.
    # Never below 0 either: a step below 0 is a cell less unusual now than before, never what
    # a thing left looks like (a map opened by a patch can have every cell below 0 when
    # nothing stays, and a few held-out windows of noise then give a threshold below 0).
    levels = persistence(s_maps, s_times, window, max_gap, blocks=s_blocks, **opts)
    floor = max(float(np.quantile(levels.maps[levels.filled], 1.0 - alpha)), 0.0)
    if not stepped.any():
        return Persistence(window, max_gap, _floored(conformal_threshold(starts, alpha), floor),
                           starts, share, busy, 0, robust, around=AROUND, floor=floor,
                           local=local, footprint=footprint, min_past=MIN_PAST,
                           change=change, shown="all" if settle else True, normal=normal,
                           crossed=crossed,
                           settle=settle, settle_noise=night, settle_look=night,
                           ground=settle)
    return Persistence(window, max_gap,
                       _floored(conformal_threshold(step.scores[stepped], alpha), floor),
                       step.scores[stepped], share, busy, past, robust,
                       _floored(conformal_threshold(starts, alpha), floor), starts, AROUND,
                       floor, local, footprint, MIN_PAST, change, "all" if settle else True,
                       normal, crossed, settle, night, night, settle)


def _floored(threshold: Threshold, floor: float) -> Threshold:
    """``threshold`` raised to ``floor`` when below it (a higher threshold keeps the rate it
    guarantees)."""
    return replace(threshold, value=max(threshold.value, floor))


def clearly_busy(transient: int, frames: int, level: float = 0.05) -> bool:
    """Whether ``transient`` of ``frames`` normal frames show a share above
    :data:`BUSY_SHARE`: a one-sided exact binomial test at ``level``, so a few odd frames
    of a short stretch do not make a camera busy. The p-value is ``P(X >= transient)``
    for ``X ~ Binomial(frames, BUSY_SHARE)``, that of ``scipy.stats.binomtest(...,
    alternative="greater")``, from ``scipy.special.bdtrc`` (scipy.stats takes about half a
    second of CPU to import, a share of a learn)."""
    if frames == 0:
        return False
    from scipy.special import bdtrc

    p = float(bdtrc(transient - 1, frames, BUSY_SHARE)) if transient > 0 else 1.0
    return p < level


def persistence_on(busy: bool | None, mode: str = "auto") -> bool:
    """Whether frames are flagged by persistence: ``mode`` "on" or "off" decides, "auto"
    follows the camera's measured busyness (:attr:`Persistence.busy`); never without a
    calibration (``busy`` None)."""
    if busy is None or mode == "off":
        return False
    return mode == "on" or bool(busy)


#: Camera conditions (:meth:`inspector.core.conditions.Conditions.conditions`) under which a
#: frame is still flagged by persistence (and reported in health.csv as well): an underexposed
#: frame is darker than the normal frames, so its single-frame score is outside what the
#: model knows, but a persistence step compares it with the frames just before it, taken in
#: the same dark, and its looks are ratios within the frame. Measured on the busy bench's
#: yard (night bursts at 22:00 whose 99th percentile of grey is 15-17, under the limit of 20,
#: so below 0.7 x every normal frame's): in six such bursts none of 87 traffic-only frames is
#: flagged, and 5 of the 6 objects left in them are flagged within 5 frames.
STEP_CONDITIONS = frozenset({"underexposed"})


def held_back(health) -> bool:
    """Whether a frame's camera health conditions, ``(condition, measure, limit)`` tuples,
    keep it from being flagged by persistence: any condition but those of
    :data:`STEP_CONDITIONS` (a moved camera, a covered lens, a frozen feed... make the
    step itself meaningless)."""
    return any(c[0] not in STEP_CONDITIONS for c in health)
