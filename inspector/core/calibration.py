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
Pickands (1975), "Statistical inference using extreme order statistics", Annals of
Statistics 3(1); Balkema & de Haan (1974), "Residual life time at great age", Annals of
Probability 2(5): excesses over a high threshold follow a generalized Pareto distribution.
Hosking & Wallis (1987), "Parameter and quantile estimation for the generalized Pareto
distribution", Technometrics 29(3): probability-weighted-moment estimates.
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
    #: "conformal" (an order statistic of the calibration scores) or "tail" (extrapolated
    #: with a generalized Pareto fit of the largest scores, see :func:`tail_threshold`).
    method: str = "conformal"

    def to_dict(self) -> dict:
        """The threshold as JSON-ready values (the inverse of :meth:`from_dict`)."""
        return {"value": float(self.value), "alpha": float(self.alpha),
                "promised": float(self.promised), "n": int(self.n),
                "frames_short": int(self.frames_short), "method": self.method}

    @classmethod
    def from_dict(cls, d: dict) -> "Threshold":
        """A threshold from :meth:`to_dict`'s values (extra keys ignored; thresholds saved
        before ``method`` existed are conformal)."""
        return cls(float(d["value"]), float(d["alpha"]), float(d["promised"]), int(d["n"]),
                   int(d["frames_short"]), d.get("method", "conformal"))

    @property
    def warning(self) -> str:
        if not self.frames_short:
            return ""
        if self.method == "tail":
            return (f"only {self.n} calibration frames for a false-alarm rate of "
                    f"{self.alpha:.3g}: the threshold is extrapolated from a generalized "
                    f"Pareto fit of the largest scores, not guaranteed; about "
                    f"{self.frames_short} more normal frames would make it exact")
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


#: Share of the calibration scores whose excesses the tail fit uses, and bounds on their count.
TAIL_SHARE = 0.2
TAIL_MIN, TAIL_MAX = 8, 200


def gpd_fit(excesses: np.ndarray) -> tuple[float, float]:
    """Generalized Pareto shape and scale of excesses over a threshold.

    Probability-weighted moments (Hosking & Wallis 1987, eqs. 4-5): with
    ``a0 = mean(x)`` and ``a1 = mean(x_(j) (m - j) / (m - 1))`` over the ascending order
    statistics ``j = 1..m``, ``k = a0 / (a0 - 2 a1) - 2`` and ``sigma = 2 a0 a1 / (a0 - 2 a1)``;
    the shape in the convention of ``scipy.stats.genpareto`` is ``xi = -k``. PWM is stable on
    the few dozen excesses a calibration set has, where maximum likelihood often is not.
    The shape is clipped to [-0.5, 0.5] (outside it the estimator is not defined or
    extrapolation is meaningless).

    Parameters
    ----------
    excesses : ndarray, shape (m,), m >= 3, non-negative

    Returns
    -------
    xi, sigma : float
    """
    x = np.sort(np.asarray(excesses, dtype=np.float64))
    m = len(x)
    if m < 3:
        raise ValueError("at least 3 excesses are needed")
    a0 = float(x.mean())
    a1 = float(np.mean(x * (m - 1 - np.arange(m)) / (m - 1)))
    denom = a0 - 2.0 * a1
    if a0 <= 0 or denom <= 0:
        return 0.0, max(a0, 1e-12)
    k = a0 / denom - 2.0
    sigma = 2.0 * a0 * a1 / denom
    xi = float(np.clip(-k, -0.5, 0.5))
    return xi, max(float(sigma), 1e-12)


def tail_threshold(scores: np.ndarray, alpha: float) -> Threshold:
    """The threshold for false-alarm rate ``alpha``, extrapolated into the tail when needed.

    When the calibration set supports ``alpha`` this is :func:`conformal_threshold`. Below
    that (fewer than 1/alpha - 1 scores), the largest ``m`` scores (``TAIL_SHARE`` of them,
    within [TAIL_MIN, TAIL_MAX]) are taken as excesses over the next one, ``u``, fitted with
    a generalized Pareto distribution (peaks over threshold: Pickands 1975; Balkema & de Haan
    1974), and the threshold is the point where the fitted tail leaves ``alpha``:
    ``P(S > t) = (m / n) * P(excess > t - u) = alpha``. Never below the largest score.

    Parameters
    ----------
    scores : ndarray, shape (n,)
    alpha : float in (0, 1)

    Returns
    -------
    Threshold
        ``method = "tail"`` with ``frames_short`` > 0 when extrapolated.
    """
    base = conformal_threshold(scores, alpha)
    s = np.sort(np.asarray(scores, dtype=np.float64))
    n = len(s)
    m = int(min(TAIL_MAX, max(TAIL_MIN, round(TAIL_SHARE * n))))
    if not base.frames_short or n < m + 1:
        return base
    from scipy.stats import genpareto

    u = s[-m - 1]
    xi, sigma = gpd_fit(s[-m:] - u)
    p = alpha * n / m
    value = float(u + genpareto.isf(p, xi, loc=0.0, scale=sigma))
    value = max(value, float(s[-1]))
    return Threshold(value, alpha, alpha, n, base.frames_short, "tail")


def alarms_to_alpha(alarms_per_day: float, times) -> tuple[float, float]:
    """The false-alarm rate per frame for a budget of false alarms per camera per day.

    The frame rate is measured from capture times: the median gap between consecutive
    frames (gaps longer than an hour, between sessions, are left out).

    Parameters
    ----------
    alarms_per_day : float > 0
    times : sequence of datetime
        Capture times of the camera's normal frames.

    Returns
    -------
    alpha, frames_per_day : float
        ``alpha = alarms_per_day / frames_per_day``, clipped to (0, 0.5].
    """
    t = np.sort(np.array([x.timestamp() for x in times], dtype=np.float64))
    gaps = np.diff(t)
    gaps = gaps[(gaps > 0) & (gaps <= 3600.0)]
    if not len(gaps):
        raise ValueError("capture times do not show a frame rate (need frames less than "
                         "an hour apart)")
    per_day = 86400.0 / float(np.median(gaps))
    return float(min(0.5, alarms_per_day / per_day)), per_day


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
