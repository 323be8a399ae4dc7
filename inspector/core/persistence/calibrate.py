"""Learn time: persistence calibrated on a camera's held-out normal maps
(:func:`calibrate_persistence`), and the busy-camera decision (:func:`clearly_busy`,
:func:`persistence_on`).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import replace

import numpy as np

from inspector.core.calibration import Threshold, conformal_threshold
from inspector.core.persistence.constants import (
    AROUND,
    BUSY_SHARE,
    GAP_FACTOR,
    LARGE,
    MAX_SPAN,
    MIN_PAST,
    NIGHT_RULES,
    WINDOW,
)
from inspector.core.persistence.filters import local_maps, local_size
from inspector.core.persistence.looks import look_noise, looks_of, normal_look
from inspector.core.persistence.stream import Persistence, PersistenceResult, persistence
from inspector.core.scoring import frame_scores


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


def frame_interval(times: np.ndarray) -> float:
    """Typical seconds between frames: the median positive gap of sorted capture ``times``
    (shape (n,), seconds, in any order); 1.0 when there is none."""
    gaps = np.diff(np.sort(np.asarray(times, np.float64)))
    gaps = gaps[gaps > 0]
    return float(np.median(gaps)) if len(gaps) else 1.0


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
