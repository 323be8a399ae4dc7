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
object within the window without hiding it. A local map is the anomaly map (standardised,
see :mod:`inspector.core.scoring`) less its median over the frame, so a change over the whole
view that the normal frames did not show (evening light, say) does not read as something
left in one place; what is left covers far less than half the view. The frame score is the
maximum, as for single frames (:func:`inspector.core.scoring.frame_scores`), and the
threshold is the conformal threshold (:func:`inspector.core.calibration.conformal_threshold`)
of the persistence scores of held-out normal frames (the same held-out, cross-fitted maps
as the single-frame threshold, :func:`inspector.core.calibration.cross_fit_maps`), taken in
capture-time order within each time block.

A window only spans frames of one stretch of the stream: a gap longer than ``max_gap``
seconds (or, at learn time, a new time block) starts a new window, and frames scored before
a window is full are not flagged (they are counted, see :class:`PersistenceResult`). Each
cell also keeps the capture time since which it has been above the persistence threshold,
so a flagged region says how long it has stayed (the median of its cells' times).

Consecutive persistence scores are dependent; the conformal rate holds for the share of
flagged normal frames over a long stationary stream, not frame by frame independently.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from inspector.core.calibration import Threshold, conformal_threshold
from inspector.core.scoring import frame_scores

#: Frames a region must stay unusual in before it is flagged (the flag comes on the
#: ``WINDOW``-th frame it is seen in). A slow vehicle with a load can cover its own length
#: only after two or three frames; four frames let it move on.
WINDOW = 4
#: A gap between frames longer than this many typical frame intervals starts a new window.
GAP_FACTOR = 10.0
#: A normal frame holds a large short-lived anomaly when its single-frame score is more than
#: ``LARGE`` times that of the quietest quarter of the normal frames (an order of magnitude)
#: and its persistence score keeps less than 1 / ``LARGE`` of it (gone within the window).
LARGE = 10.0
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
    """

    maps: np.ndarray
    times: np.ndarray
    onset: np.ndarray | None = None
    block: int = -1

    @classmethod
    def empty(cls) -> "StreamState":
        return cls(np.zeros((0, 0, 0), np.float32), np.zeros(0))

    def arrays(self) -> dict[str, np.ndarray]:
        """Arrays for an ``.npz`` (see :meth:`from_arrays`)."""
        out = {"maps": self.maps, "times": self.times, "block": np.array(self.block)}
        if self.onset is not None:
            out["onset"] = self.onset
        return out

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> "StreamState":
        return cls(np.asarray(arrays["maps"], np.float32), np.asarray(arrays["times"], float),
                   arrays.get("onset"), int(arrays.get("block", -1)))


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
    """

    maps: np.ndarray
    scores: np.ndarray
    filled: np.ndarray
    since: np.ndarray
    state: StreamState
    late: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))


def persistence(maps: np.ndarray, times: np.ndarray, window: int, max_gap: float,
                threshold: float | None = None, state: StreamState | None = None,
                blocks: np.ndarray | None = None) -> PersistenceResult:
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
        after it; the stream is not restarted.
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

    Returns
    -------
    PersistenceResult
    """
    if window < 1:
        raise ValueError(f"window must be at least 1, got {window}")
    maps = local_maps(maps)
    times = np.asarray(times, np.float64)
    n = len(maps)
    st = state if state is not None and len(state.maps) else None
    buf = list(st.maps) if st is not None else []
    buf_t = list(st.times) if st is not None else []
    onset = st.onset if st is not None and st.onset is not None else None
    block = st.block if st is not None else -1
    if buf and buf[0].shape != maps.shape[1:]:
        buf, buf_t, onset = [], [], None  # another baseline's map size: start again
    out = np.empty_like(maps)
    filled = np.zeros(n, bool)
    late = np.zeros(n, bool)
    late_buf: list[np.ndarray] = []
    late_t: list[float] = []
    since = np.full(n, np.nan)
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
                late_buf, late_t = buf[:pos], buf_t[:pos]
            late_buf, late_t = (late_buf + [maps[i]])[-window:], (late_t + [t])[-window:]
            out[i] = steady_level(np.asarray(late_buf))
            filled[i] = len(late_t) == window and float(np.max(np.diff(late_t))) <= max_gap
            if pos or buf_t[0] - t <= max_gap:
                buf.insert(pos, maps[i])
                buf_t.insert(pos, t)
                del buf[:-window], buf_t[:-window]
            if threshold is not None and onset is not None:
                region = out[i] > threshold
                if region.any() and np.isfinite(onset[region]).any():
                    since[i] = min(float(np.nanmedian(onset[region])), t)
            continue
        late_buf, late_t = [], []
        if buf_t and (t - buf_t[-1] > max_gap or b != block):  # (late frames: above)
            buf, buf_t, onset = [], [], None
        block = b
        buf.append(maps[i])
        buf_t.append(t)
        del buf[:-window], buf_t[:-window]
        out[i] = steady_level(np.asarray(buf))
        filled[i] = len(buf) == window
        if threshold is not None:
            above = maps[i] > threshold
            if onset is None:
                onset = np.full(maps.shape[1:], np.nan)
            onset = np.where(above, np.where(np.isnan(onset), t, onset), np.nan)
            region = out[i] > threshold
            if region.any():
                since[i] = float(np.median(onset[region]))
    if not n:
        return PersistenceResult(out, np.zeros(0), filled, since,
                                 state if state is not None else StreamState.empty(), late)
    keep = window - 1
    kept, kept_t = (buf[-keep:], buf_t[-keep:]) if keep else ([], [])
    state_out = StreamState(np.array(kept, np.float32).reshape(len(kept), *maps.shape[1:]),
                            np.array(kept_t, np.float64), onset, block)
    return PersistenceResult(out, frame_scores(out), filled, since, state_out, late)


def steady_level(window_maps: np.ndarray) -> np.ndarray:
    """Per cell, how unusual a window of local maps is in a steady way.

    With the cell's values over the window sorted, x(1) <= ... <= x(m): the lowest value less
    the spread of the others once the largest is set aside, x(1) - (x(m-1) - x(1)) (m >= 3;
    x(1) for m <= 2). See the module notes for why.

    Parameters
    ----------
    window_maps : ndarray, shape (m, h, w), float, m >= 1

    Returns
    -------
    ndarray, shape (h, w), float32
    """
    m = np.asarray(window_maps, np.float32)
    if len(m) <= 2:
        return m.min(axis=0)
    q = np.sort(m, axis=0)
    return 2.0 * q[0] - q[-2]


def local_maps(maps: np.ndarray) -> np.ndarray:
    """Anomaly maps less their median over the frame's cells.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    maps = np.asarray(maps, np.float32)
    if not len(maps):
        return maps
    return maps - np.median(maps.reshape(len(maps), -1), axis=1).astype(np.float32)[:, None, None]


def frame_interval(times: np.ndarray) -> float:
    """Typical seconds between frames: the median positive gap of sorted capture times
    (1.0 when there is none)."""
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
    """

    window: int
    max_gap: float
    threshold: Threshold
    calibration_scores: np.ndarray = field(repr=False)
    transient_share: float
    busy: bool

    @property
    def span(self) -> float:
        """Seconds a window of typical normal frames spans."""
        return self.window * self.max_gap / GAP_FACTOR

    def to_json(self) -> dict:
        return {"window": self.window, "max_gap": self.max_gap,
                "transient_share": self.transient_share, "busy": self.busy,
                "threshold": self.threshold.to_dict()}

    @classmethod
    def from_saved(cls, meta: dict, calibration_scores: np.ndarray) -> "Persistence":
        return cls(int(meta["window"]), float(meta["max_gap"]),
                   Threshold.from_dict(meta["threshold"]),
                   np.asarray(calibration_scores, np.float64), float(meta["transient_share"]),
                   bool(meta["busy"]))


def calibrate_persistence(maps: np.ndarray, times: np.ndarray, blocks: np.ndarray,
                          alpha: float, window: int = WINDOW) -> Persistence:
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

    Returns
    -------
    Persistence
        The conformal threshold of the persistence scores of frames with a full window. A
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
    threshold = conformal_threshold(scores, alpha)
    single = frame_scores(np.asarray(maps, np.float32))[run.filled]
    transient = (single > LARGE * np.quantile(single, 0.25)) & (scores < single / LARGE)
    share = float(transient.mean())
    close = window * max_gap / GAP_FACTOR <= MAX_SPAN
    return Persistence(window, max_gap, threshold, scores, share,
                       close and clearly_busy(int(transient.sum()), len(transient)))


def clearly_busy(transient: int, frames: int, level: float = 0.05) -> bool:
    """Whether ``transient`` of ``frames`` normal frames show a share above
    :data:`BUSY_SHARE`: a one-sided exact binomial test at ``level``
    (``scipy.stats.binomtest``), so a few odd frames of a short stretch do not make a
    camera busy."""
    if frames == 0:
        return False
    from scipy.stats import binomtest

    return bool(binomtest(transient, frames, BUSY_SHARE, alternative="greater").pvalue < level)


def persistence_on(busy: bool | None, mode: str = "auto") -> bool:
    """Whether frames are flagged by persistence: ``mode`` "on" or "off" decides, "auto"
    follows the camera's measured busyness (:attr:`Persistence.busy`); never without a
    calibration (``busy`` None)."""
    if busy is None or mode == "off":
        return False
    return mode == "on" or bool(busy)
