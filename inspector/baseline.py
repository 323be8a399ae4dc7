"""A camera's baseline: a fitted density model plus its calibration, ready to score frames."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from inspector.calibration import Threshold, conformal_p_values
from inspector.models.base import DensityModel
from inspector.scoring import anomaly_maps, frame_scores


@dataclass
class Scores:
    """Scores of a batch of frames.

    Attributes
    ----------
    maps : ndarray, shape (n, h, w), float32
        Anomaly maps (standardised NLL; higher = more unusual).
    scores : ndarray, shape (n,)
        Frame scores; flagged iff score > threshold.
    p_values : ndarray, shape (n,)
        Conformal p-values against the calibration scores.
    flagged : ndarray, shape (n,), bool
    """

    maps: np.ndarray
    scores: np.ndarray
    p_values: np.ndarray
    flagged: np.ndarray


@dataclass
class Baseline:
    """One version of a camera's normal appearance.

    Attributes
    ----------
    camera, version : str
    model : DensityModel
    center, scale : ndarray, shape (h, w), float32
        Per-cell standardisation of raw maps (see :mod:`inspector.scoring`).
    calibration_scores : ndarray, shape (n,)
        Held-out frame scores of normal frames.
    threshold : Threshold
    size : (int, int)
        Working (width, height).
    source_size : (int, int)
        (width, height) of the exported frames learnt from.
    mask : ndarray, shape (H, W), bool, or None
        Ignored pixels at working resolution.
    meta : dict
        Everything else recorded in the version's JSON (times, counts, settings, notes).
    """

    camera: str
    version: str
    model: DensityModel
    center: np.ndarray
    scale: np.ndarray
    calibration_scores: np.ndarray
    threshold: Threshold
    size: tuple[int, int]
    source_size: tuple[int, int]
    mask: np.ndarray | None = None
    meta: dict[str, Any] = field(default_factory=dict)

    def score(self, images: np.ndarray) -> Scores:
        """Score RGB frames (n, H, W, 3) uint8 at the baseline's working size."""
        maps = anomaly_maps(self.model.score_maps(images), self.center, self.scale)
        scores = frame_scores(maps)
        return Scores(maps=maps, scores=scores,
                      p_values=conformal_p_values(self.calibration_scores, scores),
                      flagged=scores > self.threshold.value)
