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
    confidence : float
        For an extrapolated threshold, the one-sided confidence with which, under the
        fitted tail, it keeps the rate at ``alpha`` (an upper bound of the fitted quantile,
        not a guarantee); 0 when not extrapolated, or learnt before it was recorded.
    """

    value: float
    alpha: float
    guaranteed: float
    n: int
    frames_short: int
    method: str = "conformal"
    confidence: float = 0.0

    @property
    def extrapolated(self) -> bool:
        """True when the threshold aims at ``alpha`` by a tail fit, beyond the guarantee."""
        return self.method == "tail" and self.guaranteed > self.alpha

    def describe(self) -> str:
        """One phrase: the rate guaranteed and, when extrapolated, the target aimed at."""
        text = f"false-alarm rate guaranteed {self.guaranteed:.3g}"
        if self.extrapolated:
            text += f", extrapolated target {self.alpha:.3g}{self._at_confidence} (not guaranteed)"
        return text

    @property
    def _at_confidence(self) -> str:
        return (f" at {self.confidence:.0%} confidence under the tail fit" if self.confidence
                else "")

    @property
    def warning(self) -> str:
        if not self.frames_short:
            return ""
        if self.method == "tail":
            return (f"only {self.n} calibration frames for a false-alarm rate of "
                    f"{self.alpha:.3g}: the threshold is extrapolated from a generalized "
                    f"Pareto fit of the largest scores{self._at_confidence}, not "
                    f"guaranteed (guaranteed: "
                    f"1/{self.n + 1} = {self.guaranteed:.3g}); about "
                    f"{self.frames_short} more normal frames would make it exact")
        return (f"only {self.n} calibration frames: the false-alarm rate guaranteed is "
                f"1/{self.n + 1} = {self.guaranteed:.3g}, not {self.alpha:g}; about "
                f"{self.frames_short} more normal frames would reach {self.alpha:g}")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict (the one layout, read back by :meth:`from_dict`)."""
        return {"value": float(self.value), "alpha": float(self.alpha),
                "guaranteed": float(self.guaranteed), "n": int(self.n),
                "frames_short": int(self.frames_short), "method": self.method,
                "confidence": float(self.confidence)}

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
                   int(d["frames_short"]), method, float(d.get("confidence", 0.0)))


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
    return Threshold(float(s[-1]), alpha, 1.0 / (n + 1), n, max(frames_needed(alpha) - n, 1))


def frames_needed(alpha: float) -> int:
    """Fewest calibration scores whose conformal threshold guarantees ``alpha``:
    ``ceil(1 / alpha - 1)``, where the rank ``ceil((n + 1)(1 - alpha))`` reaches n."""
    return math.ceil(1.0 / alpha - 1.0)


#: Share of the calibration scores whose excesses the tail fit uses, and bounds on their count.
TAIL_SHARE = 0.2
TAIL_MIN, TAIL_MAX = 8, 200


def gpd_fit(excesses: np.ndarray):
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
    excesses : ndarray, shape (m,) or (b, m), m >= 3, non-negative
        One sample, or ``b`` samples fitted at once (one per row).

    Returns
    -------
    xi, sigma : float, or ndarray of shape (b,) for 2-D input
    """
    x = np.sort(np.asarray(excesses, dtype=np.float64), axis=-1)
    m = x.shape[-1]
    if m < 3:
        raise ValueError("at least 3 excesses are needed")
    a0 = x.mean(axis=-1)
    a1 = np.mean(x * (m - 1 - np.arange(m)) / (m - 1), axis=-1)
    denom = a0 - 2.0 * a1
    ok = (a0 > 0) & (denom > 0)
    safe = np.where(ok, denom, 1.0)
    xi = np.where(ok, np.clip(2.0 - a0 / safe, -0.5, 0.5), 0.0)
    sigma = np.maximum(np.where(ok, 2.0 * a0 * a1 / safe, a0), 1e-12)
    if x.ndim == 1:
        return float(xi), float(sigma)
    return xi, sigma


#: One-sided confidence of the bound an extrapolated threshold is set at, and the number of
#: parametric bootstrap draws that estimate it (see :func:`tail_threshold`).
TAIL_CONFIDENCE = 0.9
TAIL_DRAWS = 400


def tail_threshold(scores: np.ndarray, alpha: float, confidence: float = TAIL_CONFIDENCE,
                   draws: int = TAIL_DRAWS, seed: int = 0) -> Threshold:
    """The threshold for false-alarm rate ``alpha``, extrapolated into the tail when needed.

    When the calibration set supports ``alpha`` this is :func:`conformal_threshold`. Below
    that (fewer than 1/alpha - 1 scores), the largest ``m`` scores (``TAIL_SHARE`` of them,
    within [TAIL_MIN, TAIL_MAX]) are taken as excesses over the next one, ``u``, fitted with
    a generalized Pareto distribution (peaks over threshold: Pickands 1975; Balkema & de Haan
    1974); the fitted tail leaves ``alpha`` at ``P(S > t) = (m / n) * P(excess > t - u) =
    alpha``. That point estimate misses often: on Gumbel, normal and generalized Pareto
    scores its realised rate averaged 1.8 to 8.4 times ``alpha`` (n = 200 and 500, alpha
    1e-3 and 1e-4; the tail fitted on a few dozen excesses; ``bench/calibration.py
    --tail-trials 300``). So the threshold is the upper ``confidence`` bound of that quantile,
    by parametric bootstrap (Efron & Tibshirani 1993, "An Introduction to the Bootstrap",
    ch. 6 and 13, percentile interval): ``draws`` samples of ``m`` excesses from the fitted
    distribution are refitted the same way and the bound is the ``confidence`` quantile of
    their estimates. It holds under the tail model only, and only approximately (on the
    same scores the 90% bound lay at or above the true quantile in 66 to 87% of draws, and
    its realised rate averaged 0.35 to 1.75 times ``alpha``, the worst on normal scores at
    n = 500, alpha = 1e-4), so it is recorded as a target at that confidence, never as a
    guarantee. Never below the point estimate nor
    the largest score.

    Parameters
    ----------
    scores : ndarray, shape (n,)
    alpha : float in (0, 1)
    confidence : float in (0, 1)
        One-sided confidence of the bound; 0.5 is about the point estimate.
    draws : int
        Bootstrap samples.
    seed : int
        Seeds the bootstrap (the same scores always give the same threshold).

    Returns
    -------
    Threshold
        ``method = "tail"`` and ``confidence`` set when extrapolated (``frames_short`` > 0).
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
    point = float(genpareto.isf(p, xi, loc=0.0, scale=sigma))
    sims = genpareto.rvs(xi, loc=0.0, scale=sigma, size=(draws, m),
                         random_state=np.random.default_rng(seed))
    bx, bs = gpd_fit(sims)
    bound = float(np.quantile(genpareto.isf(p, bx, loc=0.0, scale=bs), confidence))
    value = max(u + max(point, bound), float(s[-1]))
    return Threshold(value, alpha, base.guaranteed, n, base.frames_short, "tail",
                     float(confidence))


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


def newest_blocks(blocks: np.ndarray, alpha: float) -> np.ndarray:
    """Which held-out frames calibrate: the newest whole time blocks that together reach
    the conformal rank for ``alpha``, or all of them when even all do not.

    Held-out maps come from forward chaining: each block is scored by a model of the blocks
    before it, so an older block's model learnt from fewer frames than the final model that
    scans. Such a model is a worse fit, and it scores new normal frames higher, with a
    heavier tail, than the final one does: a threshold taken over all blocks is valid but
    needlessly high. (Measured on the same later frames of ``bench/scenes.py``: the 99th
    percentile of frame scores fell from 56 to 21 on a camera with moving foliage as the
    model grew from 48 to 120 frames; on a still scene it hardly moved.) Calibration scores
    are exchangeable with scan scores only as far as their models resemble the final one,
    so the newest blocks, scored by the largest models, are kept, and as many as the
    conformal threshold for ``alpha`` needs: ``n >= ceil(1 / alpha) - 1`` scores, for the
    rank ``ceil((n + 1)(1 - alpha))`` to exist (Vovk, Gammerman & Shafer 2005; see
    :func:`conformal_threshold`). Older blocks then add no rank the threshold needs, only
    scores from models further from the final one. At least two blocks are kept (when there
    are two), so that each is standardised by another block's maps
    (:func:`cross_fit_maps`), not by half of its own.

    Parameters
    ----------
    blocks : ndarray, shape (n,), int
        Time block of each held-out map; a larger label is a later block.
    alpha : float in (0, 1)

    Returns
    -------
    ndarray, shape (n,), bool
        True for the frames that calibrate.
    """
    blocks = np.asarray(blocks)
    needed = frames_needed(alpha)
    keep = np.zeros(len(blocks), bool)
    for i, b in enumerate(np.unique(blocks)[::-1]):
        keep |= blocks == b
        if i >= 1 and keep.sum() >= needed:
            return keep
    return np.ones(len(blocks), bool)


def calibrate(maps: np.ndarray, blocks: np.ndarray, alpha: float,
              tail: bool = False) -> Calibration:
    """The calibration chain: held-out raw maps of normal frames -> standardisation,
    calibration scores and threshold. The one path for a camera and for each regime.

    Only the newest blocks that the threshold for ``alpha`` needs calibrate
    (:func:`newest_blocks`): their maps set the standardisation and the scores.

    Parameters
    ----------
    maps : ndarray, shape (n, h, w), float32
        Raw maps of normal frames, each from a model that did not see it (and that was
        fitted on earlier frames only, see :class:`inspector.core.models.base.HeldOut`).
    blocks : ndarray, shape (n,), int
        Time block of each map (cross-fitting, see :func:`cross_fit_scores`); a larger
        label is a later block.
    alpha : float in (0, 1)
    tail : bool
        Extrapolate with :func:`tail_threshold` when the scores are too few for ``alpha``
        (else :func:`conformal_threshold`).
    """
    keep = newest_blocks(blocks, alpha)
    maps, blocks = np.asarray(maps)[keep], np.asarray(blocks)[keep]
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
