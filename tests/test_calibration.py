"""Conformal thresholds and p-values against their published definitions."""

import math
from datetime import datetime, timedelta

import numpy as np
import pytest
from scipy.stats import binom

from inspector.core.calibration import (
    Threshold,
    alarms_to_alpha,
    calibrate,
    conformal_p_values,
    conformal_threshold,
    cross_fit_scores,
    frames_needed,
    newest_blocks,
    rate_interval,
    tail_threshold,
    time_blocks,
)
from inspector.core.scoring import anomaly_maps, frame_scores, location_stats


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
    assert t.value == scores[k - 1] and t.guaranteed == 0.05 and t.frames_short == 0


def test_too_few_scores_use_the_maximum_and_say_how_many_are_missing():
    t = conformal_threshold(np.arange(30.0), 0.01)
    assert t.value == 29.0
    assert t.guaranteed == 1 / 31
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
    # With n + 1 = 200 and a a multiple of 1/200, P(p <= a) = a exactly (Bates et al. 2023,
    # Lemma 2 for continuous scores): the count must lie in the binomial interval both ways.
    for a in (0.05, 0.1, 0.5):
        lo, hi = binom.interval(0.999, len(p), a)  # scipy.stats.binom
        assert lo <= (p <= a).sum() <= hi, ((p <= a).mean(), a)


def test_time_blocks_are_contiguous_in_time():
    t0 = datetime(2026, 11, 1)
    times = [t0 + timedelta(minutes=int(m)) for m in np.random.default_rng(3).permutation(100)]
    blocks = time_blocks(times, 4)
    order = np.argsort([t.timestamp() for t in times])
    assert list(blocks[order]) == sorted(blocks)  # never interleaved
    assert np.bincount(blocks).tolist() == [25, 25, 25, 25]


def test_alarms_per_day_counts_frames_per_capture_day():
    # 100 frames a day, one a minute from 08:00, over five days: 100 frames a day, not the
    # 1,440 a one-minute interval would give round the clock (arithmetic).
    t0 = datetime(2026, 11, 2, 8, 0)
    times = [t0 + timedelta(days=d, minutes=m) for d in range(5) for m in range(100)]
    times += [t0 + timedelta(days=5)]  # a partial last day is left out
    alpha, per_day, days = alarms_to_alpha(2.0, times)
    assert per_day == 100 and days == 4 and alpha == 2.0 / 100


def test_tail_threshold_records_what_is_guaranteed_apart_from_its_target():
    rng = np.random.default_rng(4)
    t = tail_threshold(rng.gumbel(size=200), 1e-3)
    assert t.method == "tail" and t.extrapolated
    assert t.guaranteed == 1 / 201 and t.alpha == 1e-3  # the order-statistic bound, 1/(n+1)
    assert "guaranteed 0.00498" in t.describe() and "extrapolated target 0.001" in t.describe()
    assert Threshold.from_dict(t.to_dict()) == t
    # A baseline saved before the field existed stored the target as "promised".
    old = {"value": t.value, "alpha": 1e-3, "promised": 1e-3, "n": 200, "frames_short": 799,
           "method": "tail"}
    assert Threshold.from_dict(old).guaranteed == 1 / 201


def test_cross_fitted_scores_never_standardise_a_frame_with_itself():
    rng = np.random.default_rng(5)
    maps = rng.gumbel(size=(30, 4, 5)).astype(np.float32)
    blocks = np.repeat([0, 1, 2], 10)
    got = cross_fit_scores(maps, blocks)
    for b in range(3):
        c, s = location_stats(maps[blocks != b])
        np.testing.assert_allclose(got[blocks == b],
                                   frame_scores(anomaly_maps(maps[blocks == b], c, s)))
    cal = calibrate(maps, blocks, 0.02)  # 49 frames needed: every block calibrates
    np.testing.assert_array_equal(cal.scores, got)
    np.testing.assert_array_equal(cal.center, location_stats(maps)[0])


def test_cross_fitting_keeps_the_rate_that_in_sample_standardisation_breaks():
    # The leak of issue 11: standardising calibration maps with their own median/MAD shrinks
    # their maxima. Fresh maps from the same distribution must exceed the threshold at most
    # alpha of the time (Vovk et al. 2005) when the calibration scores are cross-fitted.
    rng = np.random.default_rng(6)
    alpha, n, trials, fresh = 0.1, 30, 400, 20
    leaky = honest = 0
    for _ in range(trials):
        maps = rng.normal(size=(n, 6, 8)).astype(np.float32)
        new = rng.normal(size=(fresh, 6, 8)).astype(np.float32)
        cal = calibrate(maps, np.arange(n) * 3 // n, alpha)
        honest += int((cal.score(new)[1] > cal.threshold.value).sum())
        c, s = location_stats(maps)
        t = conformal_threshold(frame_scores(anomaly_maps(maps, c, s)), alpha).value
        leaky += int((frame_scores(anomaly_maps(new, c, s)) > t).sum())
    total = trials * fresh
    hi = binom.interval(0.999, total, alpha)[1]  # scipy.stats.binom
    assert honest <= hi < leaky, (honest / total, leaky / total)


def test_rate_interval_is_clopper_pearson():
    # Clopper & Pearson (1934): the exact interval's ends are beta quantiles,
    # Beta(a/2; k, n-k+1) and Beta(1-a/2; k+1, n-k) (scipy.stats.beta).
    from scipy.stats import beta

    for k, n in ((1, 140), (7, 140), (70, 140), (140, 140)):
        lo, hi = rate_interval(k, n)
        assert lo == pytest.approx(beta.ppf(0.025, k, n - k + 1))
        assert hi == pytest.approx(beta.ppf(0.975, k + 1, n - k) if k < n else 1.0)
    assert rate_interval(0, 0) == (0.0, 1.0)


def test_gpd_fit_recovers_scipy_genpareto_parameters():
    # Hosking & Wallis (1987): probability-weighted moments are consistent for the
    # generalized Pareto; scipy.stats.genpareto (shape c = xi, scale) draws the sample and
    # its maximum-likelihood fit is the second opinion. Rows are fitted one by one or at once.
    from scipy.stats import genpareto

    from inspector.core.calibration import gpd_fit

    rng = np.random.default_rng(7)
    for xi in (-0.2, 0.0, 0.3):
        x = genpareto.rvs(xi, scale=2.0, size=20000, random_state=rng)
        got_xi, got_sigma = gpd_fit(x)
        mle_xi, _, mle_sigma = genpareto.fit(x, floc=0.0)
        assert got_xi == pytest.approx(xi, abs=0.03) and got_sigma == pytest.approx(2.0, rel=0.03)
        assert got_xi == pytest.approx(mle_xi, abs=0.04)
        assert got_sigma == pytest.approx(mle_sigma, rel=0.04)
    rows = genpareto.rvs(0.1, size=(5, 40), random_state=rng)
    xi_b, sigma_b = gpd_fit(rows)
    np.testing.assert_allclose([gpd_fit(r) for r in rows], np.c_[xi_b, sigma_b], rtol=1e-12)


def test_extrapolated_threshold_is_an_upper_confidence_bound_of_the_quantile():
    # Scores with a generalized Pareto tail (scipy.stats.genpareto, xi = 0.2), 200 of them,
    # alpha = 1e-3: five times fewer than 1/alpha, so the threshold is extrapolated. The
    # point estimate (confidence 0.5) lies below the true quantile about half the time and its
    # realised rate averages more than twice alpha; the 90% bound (parametric bootstrap,
    # Efron & Tibshirani 1993, ch. 13) covers the true quantile most of the time (measured
    # 0.79 over these draws: the percentile bound of a skewed estimator falls somewhat short
    # of its nominal level) and its realised rate stays near alpha.
    from scipy.stats import genpareto

    rng = np.random.default_rng(8)
    alpha, truth = 1e-3, genpareto.isf(1e-3, 0.2)
    point, bound = [], []
    for i in range(150):
        s = genpareto.rvs(0.2, size=200, random_state=rng)
        point.append(tail_threshold(s, alpha, confidence=0.5, seed=i).value)
        t = tail_threshold(s, alpha, seed=i)
        assert t.confidence == 0.9 and "at 90% confidence" in t.describe()
        bound.append(t.value)
    point, bound = np.array(point), np.array(bound)
    assert np.all(bound >= point)
    assert 0.3 <= np.mean(point >= truth) <= 0.7
    assert np.mean(bound >= truth) >= 0.7
    assert np.mean(genpareto.sf(point, 0.2)) > 2 * alpha
    assert np.mean(genpareto.sf(bound, 0.2)) < 1.5 * alpha


def test_newest_blocks_reach_the_conformal_rank_and_keep_its_exact_rate():
    # The rank ceil((n + 1)(1 - alpha)) exists from n = ceil(1/alpha - 1) scores on (Vovk,
    # Gammerman & Shafer 2005); the k-th smallest of n exchangeable continuous scores leaves
    # a new one above it with probability 1 - k/(n + 1), the mean of 1 - Beta(k, n + 1 - k)
    # (order statistics of uniforms, scipy.stats.beta). Older blocks scored by models of
    # fewer frames score higher (here: twice the spread); the newest blocks, exchangeable
    # with the new scores, must give that exact rate, all blocks a far lower one.
    from scipy.stats import beta

    assert [frames_needed(a) for a in (0.01, 0.05, 0.1, 0.3)] == [99, 19, 9, 3]
    alpha, per_block, trials, fresh = 0.05, 12, 3000, 40
    blocks = np.repeat([2, 3, 4], per_block)
    keep = newest_blocks(blocks, alpha)
    np.testing.assert_array_equal(keep, blocks >= 3)  # 24 frames reach the 19 needed
    assert newest_blocks(blocks, 0.01).all()           # 99 needed: all there are
    assert newest_blocks(blocks[::-1], alpha).sum() == 24  # labels, not positions, tell age
    assert newest_blocks(blocks, 0.3).sum() == 24      # 3 needed, but two blocks at least
    assert newest_blocks(np.zeros(5, int), 0.3).all()  # one block: all of it
    rng = np.random.default_rng(8)
    scores = rng.gumbel(size=(trials, len(blocks))) * np.where(blocks == 2, 2.0, 1.0)
    new = rng.gumbel(size=(trials, fresh))
    n = int(keep.sum())
    k = math.ceil((n + 1) * (1 - alpha))
    rate = {}
    for name, sel in (("newest", keep), ("all", np.ones(len(blocks), bool))):
        t = np.array([conformal_threshold(s[sel], alpha).value for s in scores])
        rate[name] = float((new > t[:, None]).mean())
    expected = 1 - beta(k, n + 1 - k).mean()  # = 1 / 25
    sd = math.sqrt(beta(k, n + 1 - k).var() / trials + expected / (trials * fresh))
    assert abs(rate["newest"] - expected) < 4 * sd, (rate, expected)
    assert rate["all"] < expected - 8 * sd, (rate, expected)
