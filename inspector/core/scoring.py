"""From a model's raw NLL maps to anomaly maps and frame scores, the same for every model.

Raw maps are standardised per cell against held-out normal frames: a cell over a busy
conveyor and a cell over a bare wall have very different normal NLLs, and only the
surprise relative to each cell's own normal range matters. The centre is the median and
the scale 1.4826 x the median absolute deviation (a consistent estimate of the standard
deviation for Gaussian data, robust to a few odd frames in the normal set), floored at a
tenth of the median scale so a cell with almost no normal variation cannot dominate.

Frame score: the maximum of the standardised map after a Gaussian blur of one cell. The
incidents that matter (a parcel, a spill, a blocked corner) are local, so a high quantile
of the map would dilute a small one among hundreds of normal cells, while the maximum
responds to it directly; the blur pools evidence over neighbouring cells, so one noisy
cell weighs less than a coherent region. The maximum's tail is heavy, but the conformal
threshold is taken over the same statistic, so the false-alarm rate holds regardless.
"""

from __future__ import annotations

import cv2
import numpy as np

from inspector.core.image import median_stack

#: Gaussian blur of the standardised map, in cells.
SMOOTH_SIGMA = 1.0
_MAD_TO_SD = 1.4826


def location_stats(heldout_maps: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-cell centre and scale of held-out raw maps.

    Parameters
    ----------
    heldout_maps : ndarray, shape (n, h, w)

    Returns
    -------
    center, scale : ndarray, shape (h, w), float32
    """
    m = np.asarray(heldout_maps, dtype=np.float64)
    center = median_stack(m)
    scale = _MAD_TO_SD * median_stack(np.abs(m - center))
    positive = scale[scale > 0]
    floor = 0.1 * float(np.median(positive)) if positive.size else 1.0
    return center.astype(np.float32), np.maximum(scale, floor).astype(np.float32)


def anomaly_maps(raw_maps: np.ndarray, center: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Standardised, smoothed anomaly maps (higher = more unusual).

    Parameters
    ----------
    raw_maps : ndarray, shape (n, h, w)
    center, scale : ndarray, shape (h, w)

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    z = (np.asarray(raw_maps, np.float32) - center[None]) / scale[None]
    out = np.empty_like(z)
    for i in range(len(z)):
        out[i] = cv2.GaussianBlur(z[i], (0, 0), SMOOTH_SIGMA, borderType=cv2.BORDER_REFLECT)
    return out


def frame_scores(maps: np.ndarray) -> np.ndarray:
    """Frame score of each anomaly map: its maximum. Shape (n,) float64."""
    maps = np.asarray(maps)
    return maps.reshape(len(maps), -1).max(axis=1).astype(np.float64)
