"""Burned-in text (clock, date, camera name) in a camera's normal frames, and box masks."""

from __future__ import annotations

import cv2
import numpy as np

from inspector.core.image import median_stack


def find_text_boxes(greys: np.ndarray, ignore: np.ndarray | None = None,
                    ) -> list[tuple[int, int, int, int]]:
    """Boxes of burned-in text (a clock, a date, a camera name) in a sample of normal frames.

    Burned-in text is small, set in rows of character height, and its strokes change in
    step with capture time while the wall behind them stays. So:

    1. A pixel is a changing stroke when its fine detail (frame minus a Gaussian blur of
       1.5 px) varies over the sample far more than the noise does (8 x the median of that
       variation, and at least 12 grey levels), more than its smooth content does (the
       wall behind stays) and more than its mean fine detail (strokes come and go; an edge
       whose contrast follows the light does not), both in the frames as they are and
       once they are aligned to the scene (text stays put while the scene jitters); or
       when it is still text that does not move with the scene (see below).
    2. Changing strokes are joined along rows (gaps up to 2 % of the frame width) into
       lines.
    3. A line is text when it is a row of characters: between 3 pixels and a twelfth of the
       frame high, at least three times as wide as high, with at least three separate stroke
       columns (or strokes along its median row), changing strokes filling at least 15 % of
       it, and standing alone: the band around it (one line height on every side) holds
       far fewer changing strokes than the line (moving foliage, water or a jittering
       textured shelf change everywhere around).
    4. A text line takes the rows its strokes fill (changing or not: the whole height of
       the characters), the changing pieces in its rows up to four heights away (a day
       digit between still hours), then the columns up to two heights away that have
       strokes in its rows and at most half as many just above and below (the still rest of a
       date; a scene edge or texture runs on above and below), at most its own width
       further.

    Text that never changes (a camera name in another corner) is found in step 1 when the
    camera jitters: it stays put on the frame while the scene moves, so its fine detail
    varies several times more once the frames are aligned to the scene than in the frames
    as they are (a scene edge varies less once aligned, moving foliage alike in both).
    Aligned and moved back at scan time, it would land a little off its place on every
    jittered frame, and it does not follow the exposure either. On a steady camera it is
    not found (and it moves with nothing); a name on the clock's line is part of that line
    (step 4).

    Parameters
    ----------
    greys : ndarray, shape (n, H, W), float
        Normal frames in time order, n >= 3, grey levels in [0, 255] (not normalised:
        burned-in text keeps its colour when the scene's light changes).
    ignore : ndarray, shape (H, W), bool, optional

    Returns
    -------
    list of (x0, y0, x1, y1)
        Pixel boxes at the frames' resolution, end-exclusive, smallest first.
    """
    g = np.asarray(greys, np.float32)
    n, h, w = g.shape
    if n < 3:
        return []
    # Text stays put on the frame while the scene jitters: a stroke must change both in
    # the frames as they are and in the frames aligned to the scene (a jittering edge
    # changes only in the first, a still edge of text that does not change only in the
    # second).
    changing, strokes, spread = _changing_strokes(g)
    changing_aligned, _, spread_aligned = _changing_strokes(_aligned(g))
    # Text that never changes (a camera name) stays put while the scene jitters, so
    # aligning the frames to the scene moves it: its fine detail varies several times more
    # in the aligned frames than in the frames as they are (a scene edge varies less once
    # aligned, moving foliage as much; without jitter there is nothing to find, and the
    # text then moves with nothing either). Its lines are found after the changing ones,
    # outside them (the still part of a date is in the clock's line already).
    level = float(np.median(spread_aligned))
    still = (spread_aligned > 3.0 * spread) & (spread_aligned > max(8.0 * level, 12.0))
    boxes: list[tuple[int, int, int, int]] = []
    for cand in (changing & changing_aligned, still):
        if ignore is not None:
            cand &= ~ignore
        if boxes:
            cand &= ~boxes_mask(boxes, (w, h))
        if cand.sum() >= 4:
            boxes += _line_boxes(cand, strokes)
    return sorted(_merge_boxes(boxes), key=lambda b: (b[2] - b[0]) * (b[3] - b[1]))


def _line_boxes(cand: np.ndarray, strokes: np.ndarray) -> list[tuple[int, int, int, int]]:
    """Steps 2-4 of :func:`find_text_boxes` on candidate stroke pixels ``cand`` (H, W)
    bool, with the stroke pixels ``strokes`` (H, W) bool; boxes (x0, y0, x1, y1)."""
    h, w = cand.shape
    max_height = max(3, h // 12)
    k = max(3, int(round(0.02 * w)))
    joined = cv2.morphologyEx(cand.astype(np.uint8), cv2.MORPH_CLOSE,
                              cv2.getStructuringElement(cv2.MORPH_RECT, (2 * k + 1, 3)))
    count, _, stats, _ = cv2.connectedComponentsWithStats(joined, connectivity=8)
    boxes = []
    for i in range(1, count):
        x, y, bw, bh, _ = (int(v) for v in stats[i])
        if not 3 <= bh <= max_height or bw < 3 * bh:
            continue
        inside = cand[y:y + bh, x:x + bw]
        # separate strokes: across the columns, or along the line's typical row (the
        # outlines of small still characters fill every column; a row crosses them)
        starts = np.diff(np.concatenate([np.zeros((bh + 1, 1), np.int8),
                                         np.vstack([inside.any(axis=0), inside])
                                         .astype(np.int8)], axis=1), axis=1) == 1
        runs = max(int(starts[0].sum()), int(np.median(starts[1:].sum(axis=1))))
        if runs < 3 or inside.mean() < 0.15:
            continue
        ring = cand[max(0, y - bh):y + 2 * bh, max(0, x - bh):x + bw + bh]
        around = (ring.sum() - inside.sum()) / max(ring.size - inside.size, 1)
        if around > 0.2 * inside.mean():
            continue
        y0, y1 = _text_rows(strokes, x, x + bw, y, y + bh, max_height)
        x0, x1 = _extend_row(stats[1:], x, x + bw, y, y + bh, 4 * bh, w)
        x0, x1 = _extend_columns(strokes, x0, x1, y0, y1)
        # A character's width on each side (a digit that changed too rarely to be seen), a
        # quarter of its height above and below (the outline and blur of the strokes).
        th = y1 - y0
        pad = max(1, th // 4)
        boxes.append((max(0, x0 - th), max(0, y0 - pad), min(w, x1 + th), min(h, y1 + pad)))
    return boxes


def _text_rows(strokes: np.ndarray, x0: int, x1: int, y0: int, y1: int, most: int
               ) -> tuple[int, int]:
    """The rows [top, bottom) of the characters of a line whose changing strokes fill
    rows [y0, y1): the rows around it (up to a line height above and below) where strokes
    cover at least a third of the line's columns as densely as in its densest row; at most
    ``most`` rows."""
    bh = y1 - y0
    top, bottom = max(0, y0 - bh), min(strokes.shape[0], y1 + bh)
    density = strokes[top:bottom, x0:x1].mean(axis=1)
    dense = density >= max(density.max() / 3, 1e-9)
    a, b = y0 - top, y1 - top
    while a > 0 and dense[a - 1]:
        a -= 1
    while b < len(dense) and dense[b]:
        b += 1
    if b - a > most:
        return y0, y1
    return top + a, top + b


def _extend_row(pieces: np.ndarray, x0: int, x1: int, y0: int, y1: int, gap: int,
                reach: int) -> tuple[int, int]:
    """Extend a text line [x0, x1) x [y0, y1) sideways over pieces of changing strokes
    (rows of ``connectedComponentsWithStats`` stats: x, y, w, h, area) at least 2 pixels
    high that lie within the line's rows (a third of its height and 2 px of slack) and
    start within ``gap`` pixels of it; at most ``reach`` pixels on each side."""
    bh = y1 - y0
    slack = bh // 3 + 2  # the fine-detail halo of a stroke (blur of 1.5 px) reaches ~2 px
    fits = ((pieces[:, 1] >= y0 - slack) & (pieces[:, 1] + pieces[:, 3] <= y1 + slack)
            & (pieces[:, 3] >= 2))
    cand = pieces[fits]
    lo, hi = x0 - reach, x1 + reach
    grown = True
    while grown:
        grown = False
        for px, _, pw, _, _ in cand:
            if px < x0 and px + pw >= x0 - gap and px >= lo:
                x0, grown = int(px), True
            if px + pw > x1 and px <= x1 + gap and px + pw <= hi:
                x1, grown = int(px + pw), True
    return x0, x1


def _extend_columns(strokes: np.ndarray, x0: int, x1: int, y0: int, y1: int
                    ) -> tuple[int, int]:
    """Extend a text line [x0, x1) x [y0, y1) sideways over text columns: columns with
    strokes in at least 30 % of the line's rows and at most half as dense in the rows of
    one line height above and below it (the band of text stands out; a scene edge or
    texture runs on), while
    they come within two line heights of each other; at most the line's width each way."""
    th = y1 - y0
    h = strokes.shape[0]
    density = strokes[y0:y1].mean(axis=0)
    band = density >= 0.3  # characters fill a good part of a column
    outside = np.concatenate([strokes[max(0, y0 - th):max(0, y0 - 2)],
                              strokes[min(h, y1 + 2):min(h, y1 + th)]])
    # A scene edge or texture runs on above and below as densely as in the line's rows;
    # a column of characters is at least twice as dense in them as just outside (a shelf
    # edge passing under a camera name leaves it as text).
    quiet = (outside.mean(axis=0) < np.maximum(0.05, density / 2) if len(outside)
             else np.ones_like(band))
    text = band & quiet
    gap, reach = 2 * th, x1 - x0
    lo, hi = max(0, x0 - reach), min(len(text), x1 + reach)
    while True:
        left = np.nonzero(text[max(lo, x0 - gap):x0])[0]
        if not len(left):
            break
        x0 = max(lo, x0 - gap) + int(left[0])
    while True:
        right = np.nonzero(text[x1:min(hi, x1 + gap)])[0]
        if not len(right):
            break
        x1 = x1 + int(right[-1]) + 1
    return x0, x1


def _changing_strokes(g: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels whose fine detail changes far beyond noise while the smooth content stays;
    stroke pixels (fine detail far above the frame's typical level on average); and the
    standard deviation over the frames of each pixel's fine detail, float32 (H, W)."""
    low = np.empty_like(g)  # (blurred in place: no list of frames stacked again)
    for x, o in zip(g, low):
        cv2.GaussianBlur(x, (0, 0), 1.5, dst=o)
    high = g - low
    v_high = high.std(axis=0)
    level = float(np.median(v_high))
    changing = ((v_high > max(8.0 * level, 12.0)) & (v_high > 1.2 * low.std(axis=0))
                & (v_high > np.abs(high.mean(axis=0))))
    strength = np.abs(high).mean(axis=0)
    return changing, strength > max(6.0 * float(np.median(strength)), 8.0), v_high


def _aligned(g: np.ndarray) -> np.ndarray:
    """Frames shifted onto their median frame (phase correlation, sub-pixel)."""
    ref = median_stack(g).astype(np.float32)
    window = cv2.createHanningWindow(ref.shape[::-1], cv2.CV_32F)
    out = np.empty_like(g)
    for i, x in enumerate(g):
        (dx, dy), _ = cv2.phaseCorrelate(ref, np.ascontiguousarray(x, np.float32), window)
        out[i] = cv2.warpAffine(x, np.float32([[1, 0, -dx], [0, 1, -dy]]), x.shape[::-1],
                                flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REFLECT)
    return out


def _merge_boxes(boxes: list[tuple[int, int, int, int]]) -> list[tuple[int, int, int, int]]:
    out: list[list[int]] = []
    for b in sorted(boxes):
        for o in out:
            if b[0] <= o[2] and o[0] <= b[2] and b[1] <= o[3] and o[1] <= b[3]:
                o[:] = [min(o[0], b[0]), min(o[1], b[1]), max(o[2], b[2]), max(o[3], b[3])]
                break
        else:
            out.append(list(b))
    return [tuple(o) for o in out]  # type: ignore[misc]


def cap_boxes(boxes, size: tuple[int, int], cap: float
              ) -> tuple[list[tuple[int, int, int, int]], list[tuple[int, int, int, int]]]:
    """Keep boxes, smallest first, while together they cover at most ``cap`` of the view.

    Parameters
    ----------
    boxes : sequence of (x0, y0, x1, y1)
        Pixel boxes, end-exclusive.
    size : (int, int)
        Frame (width, height) in the boxes' pixels.
    cap : float
        Largest share of the view, in [0, 1].

    Returns
    -------
    kept, dropped : list of (x0, y0, x1, y1)
    """
    w, h = size
    covered = np.zeros((h, w), bool)
    kept, dropped = [], []
    for b in sorted(boxes, key=lambda b: (b[2] - b[0]) * (b[3] - b[1])):
        trial = covered.copy()
        trial[max(0, b[1]):b[3], max(0, b[0]):b[2]] = True
        if trial.mean() <= cap:
            covered = trial
            kept.append(tuple(b))
        else:
            dropped.append(tuple(b))
    return kept, dropped


def boxes_mask(boxes, size: tuple[int, int], scale: tuple[float, float] = (1.0, 1.0)
               ) -> np.ndarray:
    """Boolean (H, W) mask of boxes (x0, y0, x1, y1), scaled by (sx, sy) first."""
    w, h = size
    m = np.zeros((h, w), bool)
    sx, sy = scale
    for x0, y0, x1, y1 in boxes:
        m[max(0, int(np.floor(y0 * sy))):int(np.ceil(y1 * sy)),
          max(0, int(np.floor(x0 * sx))):int(np.ceil(x1 * sx))] = True
    return m
