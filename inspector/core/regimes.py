"""Regimes: the few distinct ways a camera's normal frames look (day and night, lights on and
off, colour and infrared greyscale), each with its own standardisation and calibration.

A frame's global appearance is two numbers: the log of its mean grey level and its mean
colour saturation (an infrared night picture has none). The normal frames are clustered on
them with k-means (Lloyd 1982) for k = 2 .. ``max_regimes``; a split is kept only when it
is clear (silhouette, Rousseeuw 1987, of at least ``MIN_SILHOUETTE``) and every regime has
enough frames to be calibrated on its own; otherwise the camera has one regime. A frame is
then scored against the regime whose centre is nearest, with that regime's per-cell
standardisation and conformal threshold, so the false-alarm rate holds within each regime.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import cv2
import numpy as np

from inspector.core.calibration import Threshold

#: Smallest silhouette for a split into regimes to be kept.
MIN_SILHOUETTE = 0.7


def appearance(images: np.ndarray) -> np.ndarray:
    """Global appearance of frames: log(1 + mean grey) and mean HSV saturation.

    Parameters
    ----------
    images : ndarray, shape (n, H, W, 3), uint8, RGB

    Returns
    -------
    ndarray, shape (n, 2), float64
    """
    out = np.zeros((len(images), 2))
    for i, img in enumerate(np.asarray(images)):
        small = img[::2, ::2]
        hsv = cv2.cvtColor(np.ascontiguousarray(small), cv2.COLOR_RGB2HSV)
        out[i] = np.log1p(hsv[..., 2].mean()), hsv[..., 1].mean() / 255.0
    return out


def find_regimes(features: np.ndarray, min_frames: int, max_regimes: int = 3,
                 seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cluster normal frames into regimes.

    Parameters
    ----------
    features : ndarray, shape (n, f)
    min_frames : int
        Fewest frames a regime may hold.
    max_regimes : int

    Returns
    -------
    centres : ndarray, shape (k, f)
        In standardised units (see ``scale``).
    scale : ndarray, shape (f,)
        Per-feature scale the centres and distances use (overall standard deviation,
        floored so a feature that barely varies cannot split the frames).
    labels : ndarray, shape (n,), int
    """
    from sklearn.cluster import KMeans
    from sklearn.metrics import silhouette_score

    x = np.asarray(features, np.float64)
    scale = np.maximum(x.std(axis=0), np.array([0.05, 0.02])[: x.shape[1]])
    z = x / scale
    best = (z.mean(axis=0, keepdims=True), np.zeros(len(z), int), -1.0)
    for k in range(2, max_regimes + 1):
        if len(z) < k * min_frames:
            break
        km = KMeans(k, n_init=4, random_state=seed).fit(z)
        counts = np.bincount(km.labels_, minlength=k)
        if counts.min() < min_frames:
            continue
        sil = float(silhouette_score(z, km.labels_))
        if sil >= MIN_SILHOUETTE and sil > best[2]:
            best = (km.cluster_centers_, km.labels_.astype(int), sil)
    return best[0], scale, best[1]


def assign(features: np.ndarray, centres: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Nearest regime of each frame, shape (n,) int."""
    z = np.asarray(features, np.float64) / scale
    d = ((z[:, None, :] - centres[None]) ** 2).sum(axis=2)
    return d.argmin(axis=1)


@dataclass
class Regimes:
    """A baseline's regimes and what each calibrates (k >= 2).

    Attributes
    ----------
    centres : ndarray, shape (k, 2)
    scale : ndarray, shape (2,)
    centers, scales : ndarray, shape (k, h, w), float32
        Per-cell standardisation of each regime (see :mod:`inspector.core.scoring`).
    calibration_scores : list of ndarray
        Held-out frame scores of each regime's normal frames.
    thresholds : list of Threshold
    """

    centres: np.ndarray
    scale: np.ndarray
    centers: np.ndarray
    scales: np.ndarray
    calibration_scores: list = field(default_factory=list)
    thresholds: list = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.centres)

    def assign(self, images: np.ndarray) -> np.ndarray:
        return assign(appearance(images), self.centres, self.scale)

    def to_json(self) -> list[dict[str, Any]]:
        return [{**t.to_dict(), "centre": [float(v) for v in c]}
                for t, c in zip(self.thresholds, self.centres)]

    def arrays(self) -> dict[str, np.ndarray]:
        return {"centres": self.centres, "scale": self.scale, "centers": self.centers,
                "scales": self.scales,
                "scores": np.concatenate(self.calibration_scores),
                "labels": np.concatenate([np.full(len(s), i)
                                          for i, s in enumerate(self.calibration_scores)])}

    @classmethod
    def from_saved(cls, meta: list[dict[str, Any]], a: dict[str, np.ndarray]) -> "Regimes":
        k = len(a["centres"])
        return cls(centres=a["centres"], scale=a["scale"], centers=a["centers"],
                   scales=a["scales"],
                   calibration_scores=[a["scores"][a["labels"] == i] for i in range(k)],
                   thresholds=[Threshold.from_dict(t) for t in meta])
