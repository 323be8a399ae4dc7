"""Map filters of persistence: flat filters and openings over cells, the steady level of a
window and the past level before it, local maps and their robust spreads, and the sorting
helpers they share.
"""

from __future__ import annotations

import cv2
import numpy as np

from inspector.core.persistence.constants import LOCAL_SHARE


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
