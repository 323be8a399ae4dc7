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
from typing import Any

import numpy as np

from inspector.core.scoring import anomaly_maps, frame_scores, location_stats


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
    """A threshold on frame scores and what it guarantees.

    Attributes
    ----------
    value : float
        Flag a frame iff its score > value.
    alpha : float
        The false-alarm rate asked for (the target).
    guaranteed : float
        The false-alarm rate the calibration set guarantees for a new normal frame
        exchangeable with it: ``alpha`` when it has enough scores, else 1 / (n + 1) (the
        threshold is then at or above the largest score), also when the threshold is
        extrapolated towards ``alpha``.
    n : int
        Number of calibration scores.
    frames_short : int
        How many more calibration frames would reach ``alpha`` (0 when enough).
    method : str
        "conformal" (an order statistic of the calibration scores) or "tail" (extrapolated
        with a generalized Pareto fit of the largest scores, see :func:`tail_threshold`).
    """

    value: float
    alpha: float
    guaranteed: float
    n: int
    frames_short: int
    method: str = "conformal"

    @property
    def extrapolated(self) -> bool:
        """True when the threshold aims at ``alpha`` by a tail fit, beyond the guarantee."""
        return self.method == "tail" and self.guaranteed > self.alpha

    def describe(self) -> str:
        """One phrase: the rate guaranteed and, when extrapolated, the target aimed at."""
        text = f"false-alarm rate guaranteed {self.guaranteed:.3g}"
        if self.extrapolated:
            text += f", extrapolated target {self.alpha:.3g} (not guaranteed)"
        return text

    @property
    def warning(self) -> str:
        if not self.frames_short:
            return ""
        if self.method == "tail":
            return (f"only {self.n} calibration frames for a false-alarm rate of "
                    f"{self.alpha:.3g}: the threshold is extrapolated from a generalized "
                    f"Pareto fit of the largest scores, not guaranteed (guaranteed: "
                    f"1/{self.n + 1} = {self.guaranteed:.3g}); about "
                    f"{self.frames_short} more normal frames would make it exact")
        return (f"only {self.n} calibration frames: the false-alarm rate guaranteed is "
                f"1/{self.n + 1} = {self.guaranteed:.3g}, not {self.alpha:g}; about "
                f"{self.frames_short} more normal frames would reach {self.alpha:g}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (the one layout, read back by :meth:`from_dict`)."""
        return {"value": float(self.value), "alpha": float(self.alpha),
                "guaranteed": float(self.guaranteed), "n": int(self.n),
                "frames_short": int(self.frames_short), "method": self.method}

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "Threshold":
        """Inverse of :meth:`to_dict`; also reads baselines saved before ``guaranteed``
        (then called ``promised``, which held ``alpha`` even for an extrapolated tail)."""
        method = d.get("method", "conformal")
        n = int(d["n"])
        if "guaranteed" in d:
            guaranteed = float(d["guaranteed"])
        elif method == "tail" and d.get("frames_short", 0):
            guaranteed = 1.0 / (n + 1)
        else:
            guaranteed = float(d["promised"])
        return cls(float(d["value"]), float(d["alpha"]), guaranteed, n,
                   int(d["frames_short"]), method)


def conformal_threshold(scores: np.ndarray, alpha: float) -> Threshold:
    """The conformal threshold for false-alarm rate ``alpha``.

    The ceil((n + 1)(1 - alpha))-th smallest calibration score (Vovk, Gammerman & Shafer
    2005): a new normal frame, exchangeable with the calibration frames, exceeds it with
    probability at most ``alpha``. With fewer than 1/alpha - 1 scores that rank does not
    exist; the largest score is used and only 1/(n + 1) is guaranteed.

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
    return Threshold(value, alpha, base.guaranteed, n, base.frames_short, "tail")


def alarms_to_alpha(alarms_per_day: float, times) -> tuple[float, float, int]:
    """The false-alarm rate per frame for a budget of false alarms per camera per day.

    Frames per day are counted from the normal frames themselves, per calendar day of
    their capture times: a camera that captures 100 frames a day, one a minute, has 100,
    not the 1,440 its frame interval would suggest. With three or more capture days the
    first and last are left out (they may be partial) and the median of the others is
    taken; with fewer, the busiest day is taken (the rate is then a lower bound, so the
    per-frame rate may be higher than the budget asks: more normal days make it exact).

    Parameters
    ----------
    alarms_per_day : float > 0
    times : sequence of datetime
        Capture times of the camera's normal frames.

    Returns
    -------
    alpha : float
        ``alarms_per_day / frames_per_day``, clipped to (0, 0.5].
    frames_per_day : float
    days : int
        Capture days the count comes from.
    """
    from collections import Counter

    per_date = Counter(t.date() for t in times)
    if not per_date:
        raise ValueError("there are no capture times to count frames per day")
    counts = [per_date[d] for d in sorted(per_date)]
    inner = counts[1:-1] if len(counts) >= 3 else counts
    per_day = float(np.median(inner)) if len(counts) >= 3 else float(max(counts))
    return float(min(0.5, alarms_per_day / per_day)), per_day, len(inner)


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


# --- the calibration chain: held-out maps -> standardisation, scores, threshold ------------

@dataclass
class Calibration:
    """What one group of normal frames (a camera, or one of its regimes) calibrates.

    Attributes
    ----------
    center, scale : ndarray, shape (h, w), float32
        Per-cell standardisation of raw maps at scan time, from every held-out map of the
        group (see :func:`inspector.core.scoring.location_stats`).
    scores : ndarray, shape (n,), float64
        Calibration scores: held-out frame scores, cross-fitted (see :func:`calibrate`).
    threshold : Threshold
    """

    center: np.ndarray
    scale: np.ndarray
    scores: np.ndarray
    threshold: Threshold

    def score(self, raw_maps: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Anomaly maps (n, h, w) float32, frame scores (n,) and conformal p-values (n,)
        of raw maps (n, h, w)."""
        maps = anomaly_maps(raw_maps, self.center, self.scale)
        scores = frame_scores(maps)
        return maps, scores, conformal_p_values(self.scores, scores)


def cross_fit_scores(maps: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Frame scores of :func:`cross_fit_maps`, shape (n,) float64."""
    return frame_scores(cross_fit_maps(maps, blocks))


def cross_fit_maps(maps: np.ndarray, blocks: np.ndarray) -> np.ndarray:
    """Anomaly maps of held-out raw maps, each block standardised by the others only.

    A frame that helped set its own cell centres and scales would have its largest
    z-score shrunk, and a threshold taken over such scores comes out low (cross-fitting,
    as in Chernozhukov et al. 2018, "Double/debiased machine learning", Econometrics J.
    21(1)). Each block's frames are standardised with :func:`location_stats` of the other
    blocks' maps, so every calibration score is, like a scan score, that of a frame the
    standardisation never saw. A group within one block is split into two halves in the
    given order.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w)
        Held-out raw maps, n >= 2, in capture-time order.
    blocks : ndarray, shape (n,), int
        Time block of each map.

    Returns
    -------
    ndarray, shape (n, h, w), float32
    """
    maps = np.asarray(maps)
    n = len(maps)
    if n < 2:
        raise ValueError(f"at least 2 held-out maps are needed to calibrate, got {n}")
    blocks = np.asarray(blocks)
    if len(np.unique(blocks)) < 2:
        blocks = (np.arange(n) * 2) // n
    out = np.empty(maps.shape, np.float32)
    for b in np.unique(blocks):
        inside = blocks == b
        center, scale = location_stats(maps[~inside])
        out[inside] = anomaly_maps(maps[inside], center, scale)
    return out


def calibrate(maps: np.ndarray, blocks: np.ndarray, alpha: float,
              tail: bool = False) -> Calibration:
    """The calibration chain: held-out raw maps of normal frames -> standardisation,
    calibration scores and threshold. The one path for a camera and for each regime.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float32
        Raw maps of normal frames, each from a model that did not see it (and that was
        fitted on earlier frames only, see :class:`inspector.core.models.base.HeldOut`).
    blocks : ndarray, shape (n,), int
        Time block of each map (cross-fitting, see :func:`cross_fit_scores`).
    alpha : float in (0, 1)
    tail : bool
        Extrapolate with :func:`tail_threshold` when the scores are too few for ``alpha``
        (else :func:`conformal_threshold`).
    """
    center, scale = location_stats(maps)
    scores = cross_fit_scores(maps, blocks)
    threshold = (tail_threshold if tail else conformal_threshold)(scores, alpha)
    return Calibration(center, scale, scores, threshold)


def rate_interval(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Exact (Clopper-Pearson) interval of a false-alarm rate observed as ``k`` of ``n``.

    Computed by ``scipy.stats.binomtest(k, n).proportion_ci(method="exact")``; (0, 1) when
    ``n`` is 0. Used to state a realised rate beside the rate asked for.

    Returns
    -------
    low, high : float in [0, 1]
    """
    from scipy.stats import binomtest

    if n == 0:
        return 0.0, 1.0
    ci = binomtest(k, n).proportion_ci(confidence_level=level, method="exact")
    return float(ci.low), float(ci.high)
