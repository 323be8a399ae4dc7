"""Where thresholds are set: time blocks, conformal thresholds and conformal p-values.

The one calibration path of the tool, shared by every model. Calibration scores must come
from models that did not see those frames; neighbouring frames of a camera are near
copies, so frames are held out in whole blocks of time, never interleaved.

References
----------
Vovk, Gammerman & Shafer (2005), *Algorithmic Learning in a Random World*, ch. 2.
Vovk (2015), "Cross-conformal predictors", Annals of Mathematics and AI 74.
Bates, Candes, Lei, Romano & Sesia (2023), "Testing for outliers with conformal p-values",
Annals of Statistics 51(1).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime

import numpy as np


def time_blocks(times: Sequence[datetime], folds: int) -> np.ndarray:
    """Split frames into ``folds`` blocks of consecutive capture times, equal in size.

    Parameters
    ----------
    times : sequence of datetime, length N
    folds : int

    Returns
    -------
    ndarray, shape (N,), int
        Block 0 .. K-1 of each frame (in the given order); K = min(folds, N).
    """
    n = len(times)
    if n == 0:
        return np.zeros(0, int)
    k = max(1, min(folds, n))
    order = np.argsort(np.array([t.timestamp() for t in times]), kind="stable")
    blocks = np.empty(n, int)
    blocks[order] = (np.arange(n) * k) // n
    return blocks


@dataclass(frozen=True)
class Threshold:
    """A conformal threshold and what it promises.

    Attributes
    ----------
    value : float
        Flag a frame iff its score > value.
    alpha : float
        The false-alarm rate asked for.
    promised : float
        The false-alarm rate the calibration set supports: ``alpha`` when it has enough
        scores, else 1 / (n + 1).
    n : int
        Number of calibration scores.
    frames_short : int
        How many more calibration frames would reach ``alpha`` (0 when enough).
    """

    value: float
    alpha: float
    promised: float
    n: int
    frames_short: int

    @property
    def warning(self) -> str:
        if not self.frames_short:
            return ""
        return (f"only {self.n} calibration frames: the false-alarm rate promised is "
                f"1/{self.n + 1} = {self.promised:.3g}, not {self.alpha:g}; about "
                f"{self.frames_short} more normal frames would reach {self.alpha:g}")


def conformal_threshold(scores: np.ndarray, alpha: float) -> Threshold:
    """The conformal threshold for false-alarm rate ``alpha``.

    The ceil((n + 1)(1 - alpha))-th smallest calibration score (Vovk, Gammerman & Shafer
    2005): a new normal frame, exchangeable with the calibration frames, exceeds it with
    probability at most ``alpha``. With fewer than 1/alpha - 1 scores that rank does not
    exist; the largest score is used and only 1/(n + 1) is promised.

    Parameters
    ----------
    scores : ndarray, shape (n,)
        Calibration scores of normal frames (higher = more unusual), n >= 1.
    alpha : float in (0, 1)
    """
    s = np.sort(np.asarray(scores, dtype=np.float64))
    n = len(s)
    if n == 0:
        raise ValueError("no calibration scores")
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must lie in (0, 1), got {alpha}")
    k = math.ceil((n + 1) * (1.0 - alpha))
    if k <= n:
        return Threshold(float(s[k - 1]), alpha, alpha, n, 0)
    needed = math.ceil(1.0 / alpha - 1.0)
    return Threshold(float(s[-1]), alpha, 1.0 / (n + 1), n, max(needed - n, 1))


def conformal_p_values(calibration: np.ndarray, scores: np.ndarray) -> np.ndarray:
    """Conformal p-values ``(1 + #{calibration >= s}) / (n + 1)`` (Bates et al. 2023, eq. 2).

    Parameters
    ----------
    calibration : ndarray, shape (n,)
    scores : ndarray, shape (m,)

    Returns
    -------
    ndarray, shape (m,), float64 in (0, 1]
    """
    cal = np.sort(np.asarray(calibration, dtype=np.float64))
    s = np.asarray(scores, dtype=np.float64)
    at_least = len(cal) - np.searchsorted(cal, s, side="left")
    return (1.0 + at_least) / (len(cal) + 1.0)
