"""Burned-in text (clock, date, camera name) in a camera's normal frames, and box masks."""

from __future__ import annotations

import cv2
import numpy as np


def find_text_boxes(greys: np.ndarray, ignore: np.ndarray | None = None,
                    ) -> list[tuple[int, int, int, int]]:
    """Boxes of burned-in text (clock, date, camera name) in a sample of normal frames.

    A pixel is a changing stroke when its high-pass content (frame minus a Gaussian blur
    of 1.5 px) varies over the sample far more than the noise does (8 x the median of that
    variation, and at least 12 grey levels) while its smooth content varies less (a clock's
    digits change; the wall behind them does not), and more than its mean high-pass value
    (strokes come and go; a painted edge whose contrast follows the light does not). Such pixels are joined along rows into
    lines; a line is kept when it is flat (height at most a tenth of the frame, wider than
    high) and then extended sideways over the steady strokes next to it (the static part of
    a date or a camera name).

    Parameters
    ----------
    greys : ndarray, shape (n, H, W), float
        Normal frames in time order, n >= 3, photometrically normalised.
    ignore : ndarray, shape (H, W), bool, optional

    Returns
    -------
    list of (x0, y0, x1, y1)
        Pixel boxes at the frames' resolution, end-exclusive.
    """
    g = np.asarray(greys, np.float32)
    n, h, w = g.shape
    if n < 3:
        return []
    low = np.stack([cv2.GaussianBlur(x, (0, 0), 1.5) for x in g])
    high = g - low
    v_high = high.std(axis=0)
    v_low = low.std(axis=0)
    level = float(np.median(v_high))
    cand = ((v_high > max(8.0 * level, 12.0)) & (v_high > 1.2 * v_low)
            & (v_high > np.abs(high.mean(axis=0))))
    if ignore is not None:
        cand &= ~ignore
    if cand.sum() < 4:
        return []
    strokes = np.abs(high).mean(axis=0)
    stroke_level = float(np.median(strokes))
    steady = strokes > max(6.0 * stroke_level, 8.0)
    k = max(3, int(round(0.02 * w)))
    joined = cv2.morphologyEx(cand.astype(np.uint8), cv2.MORPH_CLOSE,
                              cv2.getStructuringElement(cv2.MORPH_RECT, (2 * k + 1, 3)))
    count, _, stats, _ = cv2.connectedComponentsWithStats(joined, connectivity=8)
    boxes = []
    for i in range(1, count):
        x, y, bw, bh, area = (int(v) for v in stats[i])
        if bh > max(0.1 * h, 3) or bw < bh or cand[y:y + bh, x:x + bw].sum() < 4:
            continue
        gap = max(2 * bh, 3)
        x0, x1 = x, x + bw
        band = steady[y:y + bh]
        while True:
            left = band[:, max(0, x0 - gap):x0].any(axis=0)
            if not left.any():
                break
            x0 = max(0, x0 - gap) + int(np.argmax(left))
            if x0 == 0:
                break
        while True:
            right = band[:, x1:min(w, x1 + gap)].any(axis=0)
            if not right.any():
                break
            x1 = x1 + len(right) - int(np.argmax(right[::-1]))
            if x1 >= w:
                break
        pad = max(1, bh // 3)
        boxes.append((max(0, x0 - pad), max(0, y - pad), min(w, x1 + pad), min(h, y + bh + pad)))
    return _merge_boxes(boxes)


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
