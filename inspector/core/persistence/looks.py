"""Cell looks and brightness: what the picture itself shows at each cell (its look, a ratio
within the frame, and its own brightness), their noise, the normal look, and how far a cell's
look departs from a reference.
"""

from __future__ import annotations

import cv2
import numpy as np

from inspector.core.persistence.constants import AROUND, LARGE
from inspector.core.persistence.filters import (
    _median_along,
    _second_smallest,
    flat_filter,
    local_size,
)


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


def _or_held(reference: np.ndarray, held: np.ndarray | None) -> np.ndarray:
    """``reference`` (h, w), but where a cell is held the value it keeps (``held``, NaN
    elsewhere; None: no cell held)."""
    return reference if held is None else np.where(np.isnan(held), reference, held)


def _median_or_held(before: list, held: np.ndarray | None) -> np.ndarray:
    """A cell's reference: the median of ``before`` (frames' looks or brightness, oldest
    first; :func:`_median_along`), or where a cell is held, the value it keeps (``held``,
    NaN elsewhere), shape (h, w) float32."""
    return _or_held(_median_along(before), held)


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


def _agreement(win: list) -> np.ndarray:
    """Per cell, the range of a window's looks (oldest first, at least 2) without one of its
    older frames (the newest always kept; the smallest such range), shape (h, w) float32."""
    agree = None
    for j in range(len(win) - 1):
        rest = win[:j] + win[j + 1:]
        spread = np.maximum.reduce(rest) - np.minimum.reduce(rest)
        agree = spread if agree is None else np.minimum(agree, spread)
    return agree


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
