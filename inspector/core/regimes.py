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

from inspector.core.calibration import Calibration, Threshold

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
    prototypes : ndarray, shape (k, f)
        Cluster centres in standardised units (see ``feature_scale``).
    feature_scale : ndarray, shape (f,)
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


def assign(features: np.ndarray, prototypes: np.ndarray, feature_scale: np.ndarray
           ) -> np.ndarray:
    """Nearest regime of each frame, shape (n,) int."""
    z = np.asarray(features, np.float64) / feature_scale
    d = ((z[:, None, :] - prototypes[None]) ** 2).sum(axis=2)
    return d.argmin(axis=1)


@dataclass
class Regimes:
    """A baseline's regimes (k >= 2): how a frame is assigned to one, and what each calibrates.

    Attributes
    ----------
    prototypes : ndarray, shape (k, 2)
        Appearance cluster centres, in units of ``feature_scale``.
    feature_scale : ndarray, shape (2,)
        Per-feature scale of the appearance features (see :func:`find_regimes`).
    calibrations : list of Calibration, length k
        Per-cell standardisation, calibration scores and threshold of each regime.
    """

    prototypes: np.ndarray
    feature_scale: np.ndarray
    calibrations: list[Calibration] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.prototypes)

    def assign(self, images: np.ndarray) -> np.ndarray:
        """Regime of each RGB frame (n, H, W, 3) uint8, shape (n,) int."""
        return assign(appearance(images), self.prototypes, self.feature_scale)

    def to_json(self) -> list[dict[str, Any]]:
        return [{**c.threshold.to_dict(), "prototype": [float(v) for v in p]}
                for c, p in zip(self.calibrations, self.prototypes)]

    def arrays(self) -> dict[str, np.ndarray]:
        return {"prototypes": self.prototypes, "feature_scale": self.feature_scale,
                "cell_center": np.stack([c.center for c in self.calibrations]),
                "cell_scale": np.stack([c.scale for c in self.calibrations]),
                "scores": np.concatenate([c.scores for c in self.calibrations]),
                "labels": np.concatenate([np.full(len(c.scores), i)
                                          for i, c in enumerate(self.calibrations)])}

    @classmethod
    def from_saved(cls, meta: list[dict[str, Any]], a: dict[str, np.ndarray]) -> "Regimes":
        """Inverse of :meth:`to_json` and :meth:`arrays` (also reads the array names of
        baselines saved before the rename: centres, scale, centers, scales)."""
        prototypes = a["prototypes"] if "prototypes" in a else a["centres"]
        feature_scale = a["feature_scale"] if "feature_scale" in a else a["scale"]
        center = a["cell_center"] if "cell_center" in a else a["centers"]
        scale = a["cell_scale"] if "cell_scale" in a else a["scales"]
        return cls(prototypes, feature_scale,
                   [Calibration(center[i], scale[i], a["scores"][a["labels"] == i],
                                Threshold.from_dict(t))
                    for i, t in enumerate(meta)])
