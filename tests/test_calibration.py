"""Conformal thresholds and p-values against their published definitions."""

import math
from datetime import datetime, timedelta

import numpy as np
from scipy.stats import binom

from inspector.core.calibration import (
    conformal_p_values,
    conformal_threshold,
    time_blocks,
)


def test_false_alarm_rate_on_fresh_normal_scores_is_alpha():
    # Vovk, Gammerman & Shafer (2005): P(new score > threshold) <= alpha for exchangeable
    # scores, and close to alpha for continuous ones. Check it over many calibration draws.
    rng = np.random.default_rng(0)
    alpha, n_cal, n_new, trials = 0.01, 999, 200, 300
    alarms = 0
    for _ in range(trials):
        t = conformal_threshold(rng.gumbel(size=n_cal), alpha)
        alarms += int((rng.gumbel(size=n_new) > t.value).sum())
    total = n_new * trials
    # 99.9% binomial interval around alpha (scipy.stats.binom); with n+1 = 1000 the
    # conformal rank is exact, so the expected rate is alpha itself.
    lo, hi = binom.interval(0.999, total, alpha)
    assert lo <= alarms <= hi, (alarms / total, lo / total, hi / total)


def test_threshold_is_the_conformal_rank():
    scores = np.arange(1.0, 201.0)  # 1..200
    t = conformal_threshold(scores, 0.05)
    k = math.ceil((200 + 1) * (1 - 0.05))  # Vovk et al. (2005): ceil((n+1)(1-alpha))
    assert t.value == scores[k - 1] and t.promised == 0.05 and t.frames_short == 0


def test_too_few_scores_use_the_maximum_and_say_how_many_are_missing():
    t = conformal_threshold(np.arange(30.0), 0.01)
    assert t.value == 29.0
    assert t.promised == 1 / 31
    assert t.frames_short == 99 - 30  # 1/alpha - 1 = 99 scores reach alpha
    assert "69 more normal frames" in t.warning


def test_p_values_follow_the_definition():
    rng = np.random.default_rng(1)
    cal = rng.normal(size=50)
    new = np.r_[rng.normal(size=20), cal[:5]]  # ties with calibration scores too
    p = conformal_p_values(cal, new)
    # Bates et al. (2023), eq. (2): (1 + #{cal >= s}) / (n + 1).
    ref = [(1 + (cal >= s).sum()) / (len(cal) + 1) for s in new]
    np.testing.assert_allclose(p, ref)
    assert p.min() > 0 and p.max() <= 1


def test_p_values_of_normal_scores_are_uniform():
    # Conformal p-values of exchangeable scores are (super-)uniform: P(p <= a) <= a.
    rng = np.random.default_rng(2)
    p = np.concatenate([conformal_p_values(rng.normal(size=199), rng.normal(size=50))
                        for _ in range(200)])
    for a in (0.05, 0.1, 0.5):
        lo, hi = binom.interval(0.999, len(p), a)  # scipy.stats.binom
        assert (p <= a).sum() <= hi


def test_time_blocks_are_contiguous_in_time():
    t0 = datetime(2026, 11, 1)
    times = [t0 + timedelta(minutes=int(m)) for m in np.random.default_rng(3).permutation(100)]
    blocks = time_blocks(times, 4)
    order = np.argsort([t.timestamp() for t in times])
    assert list(blocks[order]) == sorted(blocks)  # never interleaved
    assert np.bincount(blocks).tolist() == [25, 25, 25, 25]
