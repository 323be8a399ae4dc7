"""Persistence for busy cameras: the steady level over a window, its state, calibration, scan and bench."""

from __future__ import annotations

import importlib.util
import math
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from scipy.ndimage import median_filter, minimum_filter1d, rank_filter

from inspector.config import Config, PersistenceSettings, load_config
from inspector.core.calibration import rate_interval
from inspector.core.events import FramePoint, group_events
from inspector.core.persistence import (
    BUSY_SHARE,
    MAX_SPAN,
    MIN_PAST,
    Persistence,
    StreamState,
    calibrate_persistence,
    cell_brightness,
    cell_looks,
    change_spread,
    clearly_busy,
    flat_filter,
    held_back,
    local_maps,
    local_median,
    local_size,
    looks_of,
    median_filtered,
    normal_look,
    opened,
    past_level,
    persistence,
    persistence_on,
    robust_spread,
    seen_through,
    steady_level,
)
from inspector.core.persistence.calibrate import _in_two
from inspector.core.persistence.filters import _median_along, _second_smallest, _sorted_along
from inspector.core.persistence.rules import _look_reading, _own, _unusual
from inspector.errors import UsageError


def _stream(n=40, h=6, w=8, seed=0):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, h, w)).astype(np.float32), np.arange(n) * 2.0


def test_steady_level_matches_scipy_rank_filters_along_time():
    # Reference: scipy.ndimage.minimum_filter1d (a flat erosion along the time axis) for the
    # lowest value and scipy.ndimage.rank_filter for the second largest of the window; origin
    # (size - 1) // 2 makes each window the trailing one [t - size + 1, t]. Each map is first
    # made local: less its median over the cells (numpy.median as the reference).
    maps, times = _stream()
    local = maps - np.median(maps, axis=(1, 2), keepdims=True)
    np.testing.assert_allclose(local_maps(maps), local, atol=1e-6)
    for window in (1, 2, 3, 5):
        run = persistence(maps, times, window, max_gap=10.0)
        origin = (window - 1) // 2
        low = minimum_filter1d(local, size=window, axis=0, origin=origin)
        second = rank_filter(local, rank=max(window - 2, 0), size=(window, 1, 1),
                             origin=(origin, 0, 0))
        ref = 2 * low - second if window >= 3 else low
        full = run.filled
        assert full.sum() == len(maps) - window + 1
        np.testing.assert_allclose(run.maps[full], ref[full], atol=1e-5)
        np.testing.assert_allclose(run.scores, run.maps.reshape(len(maps), -1).max(axis=1))


def test_levels_pick_the_sorted_values_exactly():
    # Reference: numpy.sort along the time axis (NaN sorts last): the steady level is
    # x(1) - (x(m-1) - x(1)) and the past level max(x(m-1), 0) of the sorted values, the same
    # numbers to the bit, with ties, NaN and any number of frames.
    rng = np.random.default_rng(3)
    for m in range(2, 7):
        for nan in (False, True):
            x = np.round(rng.standard_normal((m, 6, 7)) * 4).astype(np.float32) / 4
            if nan:
                x[rng.random(x.shape) < 0.1] = np.nan
            q = np.sort(x, axis=0)
            np.testing.assert_array_equal(past_level(x), np.maximum(q[-2], 0.0))
            if m >= 3:
                np.testing.assert_array_equal(steady_level(x), q[0] - (q[-2] - q[0]))


def test_step_from_the_frames_before_matches_scipy_rank_filters():
    # Reference: scipy.ndimage.rank_filter along time for the steady level (as above) and for
    # the second largest of the ``past`` frames before the window (origin shifted so that the
    # filter covers [t - window - past + 1, t - window]); the local maps divided by their
    # cells' robust spread, scipy.stats.median_abs_deviation(scale="normal"), floored at 1.
    from scipy.stats import median_abs_deviation

    maps, times = _stream(30)
    maps[10:] *= 3.0  # a disturbed stretch: its robust spread is about 3
    local = maps - np.median(maps, axis=(1, 2), keepdims=True)
    spread = np.maximum(median_abs_deviation(local.reshape(30, -1), axis=1, scale="normal"), 1)
    local = local / spread[:, None, None]
    np.testing.assert_allclose(local_maps(maps, robust=True), local, atol=1e-5)
    window, past = 3, 4
    run = persistence(maps, times, window, 10.0, past=past, robust=True)
    low = minimum_filter1d(local, size=window, axis=0, origin=(window - 1) // 2)
    second = rank_filter(local, rank=window - 2, size=(window, 1, 1),
                         origin=((window - 1) // 2, 0, 0))
    level = 2 * low - second
    before = np.full_like(local, np.nan)
    before[window + past - 1:] = rank_filter(local, rank=past - 2, size=(past, 1, 1),
                                             origin=((past - 1) // 2, 0, 0))[past - 1:-window]
    full = np.arange(30) >= window + past - 1
    assert run.stepped.tolist() == (np.arange(30) >= window).tolist()
    np.testing.assert_allclose(run.maps[full], (level - np.maximum(before, 0))[full], atol=1e-4)
    np.testing.assert_allclose(run.levels[window - 1:],
                               level[window - 1:].reshape(30 - window + 1, -1).max(axis=1),
                               atol=1e-4)
    # The spread over the 3 x 3 cells around: scipy.ndimage.maximum_filter of the spread map.
    from scipy.ndimage import maximum_filter

    win = local[10:13]
    spread = np.sort(win, axis=0)[-2] - win.min(axis=0)
    np.testing.assert_allclose(steady_level(win, around=3),
                               win.min(axis=0) - maximum_filter(spread, size=3, mode="nearest"),
                               atol=1e-5)
    # One past frame: its own value; never below the normal level 0.
    one = np.array([[[-3.0, 5.0]]], np.float32)
    assert past_level(one).tolist() == [[0.0, 5.0]]


def test_a_window_shares_one_spread_so_a_wide_frame_does_not_break_what_stays():
    # Reference: scipy.stats.median_abs_deviation(scale="normal") for each frame's robust
    # spread; robust="window" divides the window and the frames before it by the median of
    # the window frames' spreads (floored at 1), then takes the same step as unscaled maps.
    from scipy.stats import median_abs_deviation

    maps, times = _stream(12, 10, 12)
    maps[8:] += 40.0 * (np.arange(10 * 12).reshape(10, 12) % 5 == 0)  # a thing appears
    maps[9] += 3.0 * _stream(1, 10, 12, seed=1)[0][0]  # one frame disturbed all over
    local = maps - np.median(maps, axis=(1, 2), keepdims=True)
    spreads = median_abs_deviation(local.reshape(12, -1), axis=1, scale="normal")
    np.testing.assert_allclose(robust_spread(local), spreads, rtol=1e-5)
    run = persistence(maps, times, 4, 10.0, past=4, robust="window")
    scale = max(np.median(spreads[8:12]), 1.0)
    plain = persistence(local / scale, times, 4, 10.0, past=4)
    np.testing.assert_allclose(run.maps[11], plain.maps[11], atol=1e-4)
    # Each frame by its own spread (robust=True) shrinks the thing in the disturbed frame,
    # which then reads as unsteady; one spread for the window keeps its level.
    own = persistence(maps, times, 4, 10.0, past=4, robust=True)
    assert own.scores[11] < 0.6 * run.scores[11]


def test_in_a_noisy_stretch_a_step_counts_by_how_far_its_change_stands_out():
    # Reference: numpy.median per cell of the window and of the frames before it, and
    # scipy.stats.median_abs_deviation(scale="normal") over the cells of their difference
    # (the view's change) and of each frame (the window's spread, as above). A dark stretch:
    # each cell's noise reading scatters from cell to cell (10) but stays from frame to frame
    # (1). A spill adds 12 from frame 8 and darkens its cells: robust="window" divides it by
    # the cells' scatter and does not count it; "change" multiplies that step by the cells'
    # scatter over the changes' (floored at 1) where a cell's own brightness changed.
    from scipy.stats import median_abs_deviation

    rng = np.random.default_rng(5)
    n, h, w = 12, 24, 32
    maps = (rng.normal(0, 10, (h, w)) + rng.normal(0, 1, (n, h, w))).astype(np.float32)
    bright = (rng.normal(4.0, 0.3, (h, w)) + rng.normal(0, 0.003, (n, h, w))).astype(np.float32)
    times = np.arange(n) * 2.0
    maps[8:, 3:6, 4:7] += 12.0
    bright[8:, 3:6, 4:7] -= 0.3
    local = maps - np.median(maps, axis=(1, 2), keepdims=True)
    spreads = median_abs_deviation(local.reshape(n, -1), axis=1, scale="normal")
    moved = np.median(local[8:12], axis=0) - np.median(local[4:8], axis=0)
    changes = median_abs_deviation(moved.ravel(), scale="normal")
    assert change_spread(local[8:12], local[4:8]) == pytest.approx(changes, rel=1e-5)
    opts = dict(past=4, looks=looks_of(bright), change=0.05, brightness=bright)
    runs = {r: persistence(maps, times, 4, 10.0, robust=r, **opts) for r in ("window", "change")}
    lift = np.median(spreads[8:12]) / max(changes, 1.0)
    assert lift > 5
    spill = np.zeros((h, w), bool)
    spill[3:6, 4:7] = True
    before = runs["window"].maps[11]
    expected = np.where(spill & (before > 0), before * lift, before)
    np.testing.assert_allclose(runs["change"].maps[11], expected, rtol=1e-4, atol=1e-5)
    assert runs["change"].scores[11] > 5.0 > runs["window"].scores[11]
    # When the lamps go off between the frames before and the window, the changes are as
    # scattered as the cells: a lift of about 1 (their ratio), nothing like the spill's.
    dark = maps.copy()
    dark[:8] = rng.normal(0, 1, (8, h, w))
    both = [persistence(dark, times, 4, 10.0, robust=r, **opts).scores[11]
            for r in ("change", "window")]
    assert both[0] == pytest.approx(both[1], rel=0.1)


def test_what_was_there_before_is_not_counted_and_what_appears_stays_flagged():
    # A patch already there when the stretch begins (sun through a window) against a thing
    # that appears at frame 8 and stays to frame 19 (a parcel): with the frames before the
    # window as reference the patch scores nothing once they are there, the parcel is flagged
    # on its window-th frame and, its reference kept while it is above, as long as it stays;
    # once it is taken away nothing is flagged.
    n = 26
    maps = np.zeros((n, 6, 8), np.float32)
    maps[:, 0, 0] = 50.0 + np.arange(n) * 0.1      # the patch, slowly brighter
    maps[8:20, 4, 5] = 30.0                         # the parcel
    times = np.arange(n) * 2.0
    run = persistence(maps, times, 4, 10.0, threshold=5.0, past=4, start_threshold=60.0)
    flagged = run.filled & (run.scores > np.where(run.stepped, 5.0, 60.0))
    assert flagged.tolist() == [False] * 11 + [True] * 9 + [False] * 6
    assert run.maps[11:, 0, 0].max() < 1.0           # the patch: no step
    assert run.levels[3] > 49.0 and not run.stepped[3]  # first full window: the level itself
    assert (run.since[11:20] == times[8]).all()
    # Without keeping the reference, the parcel goes into it and stops being flagged.
    loose = persistence(maps, times, 4, 10.0, past=4)
    assert (loose.scores[11:20] > 5.0).sum() < 9


def test_a_held_cell_is_flagged_only_in_frames_that_show_what_it_holds():
    # A parcel (30) at (4, 5) from frame 8 to 15; a passer-by (300) stands in front of it in
    # frame 12 and where it was in frame 16, the frame it is taken away in. Without
    # ``shown`` frame 16 is still flagged (its window's three earlier frames hold the parcel
    # and the passer-by's value is the one set aside); with it, frame 16 is not, frame 12
    # (passer-by in front) is not either, and the hold goes on through frame 12, so frames
    # 13-15 are flagged again; the first flag (frame 11) is unchanged and the flags are a
    # subset of those without it.
    n = 22
    maps = np.zeros((n, 6, 8), np.float32)
    maps[8:16, 4, 5] = 30.0
    maps[12, 4, 5] = maps[16, 4, 5] = 300.0
    times = np.arange(n) * 2.0
    kw = dict(threshold=5.0, past=8, start_threshold=60.0, min_past=MIN_PAST)
    plain = persistence(maps, times, 4, 10.0, **kw)
    shown = persistence(maps, times, 4, 10.0, shown=True, **kw)
    flags = [np.flatnonzero(r.filled & r.stepped & (r.scores > 5.0)).tolist()
             for r in (plain, shown)]
    assert flags[0] == [11, 12, 13, 14, 15, 16]
    assert flags[1] == [11, 13, 14, 15]
    assert np.isnan(shown.since[12]) and shown.since[13] == times[8]
    # A passer-by who reads as the parcel did (30) where it was taken away: the steady level
    # cannot tell, the look can (frame 16's look is not the median of its window's others).
    same = np.where(maps == 300.0, np.float32(30.0), maps)
    looks = np.zeros((n, 6, 8), np.float32)
    looks[8:16, 4, 5] = 0.5
    looks[16, 4, 5] = 0.9
    runs = (persistence(same, times, 4, 10.0, shown=True, **kw),
            persistence(same, times, 4, 10.0, shown=True, looks=looks, change=0.05, **kw))
    assert [np.flatnonzero(r.filled & r.stepped & (r.scores > 5.0)).tolist()
            for r in runs] == [[11, 12, 13, 14, 15, 16], [11, 12, 13, 14, 15]]
    # steady_level(shown=True), as its docstring's formula from numpy.sort: the lowest value
    # less (max(last, second largest of the frames before the last) - lowest).
    rng = np.random.default_rng(5)
    for m in (3, 4, 6):
        x = rng.standard_normal((m, 5, 6)).astype(np.float32)
        q = np.sort(x[:-1], axis=0)
        low = x.min(axis=0)
        np.testing.assert_allclose(steady_level(x, shown=True),
                                   low - (np.maximum(x[-1], q[-2]) - low), atol=1e-6)
        assert (steady_level(x, shown=True) <= steady_level(x) + 1e-6).all()


def test_windows_without_a_reference_flag_only_what_looks_unlike_normal_frames():
    # normal_look: the median look (numpy.median) and, per cell, the largest over windows of
    # 4 consecutive frames of the second smallest departure from it (numpy.sort), the
    # largest over the 3 x 3 cells around (scipy.ndimage.maximum_filter, mode "nearest");
    # the window spanning a gap is left out.
    from scipy.ndimage import maximum_filter

    rng = np.random.default_rng(7)
    looks = (rng.standard_normal((12, 5, 6)) * 0.01).astype(np.float32)
    times = np.arange(12) * 2.0
    times[8:] += 100.0
    normal = normal_look(looks, times, 4, 10.0)
    centre = np.median(looks, axis=0)
    reach = np.zeros_like(centre)
    for end in list(range(4, 9)) + list(range(12, 13)):
        d = np.sort(np.abs(looks[end - 4:end] - centre), axis=0)[1]
        reach = np.maximum(reach, maximum_filter(d, size=3, mode="nearest"))
    np.testing.assert_allclose(normal[0], centre, atol=1e-7)
    np.testing.assert_allclose(normal[1], reach, atol=1e-7)
    # A run whose first frames read unusual (30) at (1, 1), where the picture looks as in
    # normal frames (a line the model reads anew under an unusual light), and at (3, 4),
    # where its look departs by 0.5 (a parcel there before the run began): with the normal
    # look, the first window flags only the parcel; without it, both.
    maps = np.zeros((6, 5, 6), np.float32)
    maps[:, 1, 1] = maps[:, 3, 4] = 30.0
    run_looks = np.repeat(centre[None], 6, axis=0)
    run_looks[:, 3, 4] += 0.5
    kw = dict(threshold=5.0, start_threshold=10.0, past=8, min_past=MIN_PAST,
              looks=run_looks, change=0.05)
    plain = persistence(maps, np.arange(6) * 2.0, 4, 10.0, **kw)
    usual = persistence(maps, np.arange(6) * 2.0, 4, 10.0, normal=normal, **kw)
    assert plain.maps[3, 1, 1] > 10.0 and plain.maps[3, 3, 4] > 10.0
    assert usual.maps[3, 1, 1] <= 0.0 and usual.maps[3, 3, 4] > 10.0
    assert not usual.stepped[3]


def test_a_step_counts_only_where_the_picture_changed():
    # The same step of the anomaly maps at two places from frame 8 on: at (4, 5) a parcel is
    # set down (the frames' looks change there and stay changed), at (1, 1) the picture stays
    # as it was (the model reads a frame differently: the gain fitted over the view moved).
    # With the looks, only the parcel counts; it stays flagged while it stays (a held cell
    # keeps the look from before it as its reference), and nothing after it is taken away.
    n = 26
    maps = np.zeros((n, 6, 8), np.float32)
    maps[8:20, 4, 5] = 30.0
    maps[8:20, 1, 1] = 30.0
    looks = np.zeros((n, 6, 8), np.float32)
    looks[8:20, 4, 5] = 0.5                       # the parcel, darker than the floor
    looks += np.random.default_rng(0).normal(0.0, 0.002, looks.shape).astype(np.float32)
    times = np.arange(n) * 2.0
    opts = dict(threshold=5.0, past=4, start_threshold=60.0, min_past=3)
    plain = persistence(maps, times, 4, 10.0, **opts)
    assert (plain.maps[11:20, 1, 1] > 5.0).all()
    run = persistence(maps, times, 4, 10.0, looks=looks, change=0.05, **opts)
    assert (run.maps[11:20, 1, 1] <= 0.0).all()
    flagged = run.filled & (run.scores > np.where(run.stepped, 5.0, 60.0))
    assert flagged.tolist() == [False] * 11 + [True] * 9 + [False] * 6
    # the looks go with the stream's state (the ledger's arrays) like the maps
    first = persistence(maps[:13], times[:13], 4, 10.0, looks=looks[:13], change=0.05, **opts)
    saved = StreamState.from_arrays(first.state.arrays())
    second = persistence(maps[13:], times[13:], 4, 10.0, state=saved, looks=looks[13:],
                         change=0.05, **opts)
    np.testing.assert_allclose(np.concatenate([first.maps, second.maps]), run.maps)
    # A look is the log of each cell's mean less its mean over the square around it: the
    # same after a change of gain (a ratio is a difference of logs), and the square's mean is
    # scipy.ndimage.uniform_filter's with edges repeated ("nearest").
    from scipy.ndimage import uniform_filter

    grey = np.random.default_rng(1).uniform(20.0, 200.0, (2, 24, 48)).astype(np.float32)
    look = cell_looks(grey, (6, 12))
    cells = np.log1p(grey.reshape(2, 6, 4, 12, 4).mean(axis=(2, 4)))
    k = local_size((6, 12))
    assert k == 3
    want = cells - uniform_filter(cells, size=(1, k, k), mode="nearest")
    np.testing.assert_allclose(look, want, atol=1e-5)
    assert np.abs(cell_looks(grey * 1.5 + 0.5, (6, 12)) - look).max() < 1e-5


def test_a_thing_crossed_by_passers_by_in_its_first_frames_is_seen_through_them():
    # A parcel (30, look 0.5) at (2, 3) from frame 8; passers-by in front of it in frames 9
    # (300, look -0.4) and 11 (3, look 1.2): no 4 consecutive frames show it alone, and by
    # frame 15 its own frames are the reference. With ``crossed`` the frames that share the
    # frame judged's look are taken on their own: 8, 10 and 12 flag it at frame 12. At (4,
    # 6) three different passers-by in five frames: not flagged.
    n = 20
    maps = np.zeros((n, 6, 8), np.float32)
    looks = np.zeros((n, 6, 8), np.float32)
    maps[8:, 2, 3], looks[8:, 2, 3] = 30.0, 0.5
    maps[9, 2, 3], looks[9, 2, 3] = 300.0, -0.4
    maps[11, 2, 3], looks[11, 2, 3] = 3.0, 1.2
    for i, (v, lk) in zip((13, 15, 17), ((300.0, 0.9), (200.0, -0.6), (250.0, 0.3))):
        maps[i, 4, 6], looks[i, 4, 6] = v, lk
    times = np.arange(n) * 2.0
    kw = dict(threshold=5.0, past=8, start_threshold=60.0, min_past=MIN_PAST, looks=looks,
              change=0.05, shown=True)
    plain = persistence(maps, times, 4, 10.0, **kw)
    crossed = persistence(maps, times, 4, 10.0, crossed=True, **kw)
    assert not (plain.filled & (plain.scores > 5.0)).any()
    assert np.flatnonzero(crossed.filled & (crossed.scores > 5.0)).tolist() == list(range(12, n))
    assert (crossed.maps[:, 4, 6] <= 0.0).all()
    # its sort along the frames is numpy.sort's, its median numpy.median's, to the bit
    stack = np.random.default_rng(4).normal(size=(6, 3, 4)).astype(np.float32)
    for k in (1, 2, 5, 6):
        assert np.array_equal(np.stack(_sorted_along(stack[:k])), np.sort(stack[:k], axis=0))
        assert np.array_equal(_median_along(stack[:k]), np.median(stack[:k], axis=0))
        if k >= 2:  # and its second smallest numpy.sort's
            assert np.array_equal(_second_smallest(stack[:k]), np.sort(stack[:k], axis=0)[1])
    # seen_through against its docstring's formula cell by cell (numpy.median, numpy.sort),
    # by day and in a noisy stretch (the frames agreeing within the frames' own noise too)
    rng = np.random.default_rng(3)
    frames = rng.normal(0.0, 1.0, (9, 5, 6)).astype(np.float32)
    frames[4:] += 10.0 + 100.0 * (rng.random((5, 5, 6)) < 0.25)
    lks = rng.normal(0.0, 0.001, (9, 5, 6)).astype(np.float32)
    lks[4:] += np.where(rng.random((5, 5, 6)) < 0.7, 0.5, rng.uniform(-1.0, 1.0, (5, 5, 6)))
    lks[4:, 0, :2] = 0.0  # agreeing, but where they were
    for night in (False, True):
        if night:  # every look scatters by about 0.03: a dark, noisy stretch
            lks = lks + rng.normal(0.0, 0.03, lks.shape).astype(np.float32)
        span = lks[4:]
        noisy = 10.0 * np.median(np.abs(np.diff(span, axis=0)))  # LARGE x the frames' noise
        assert (noisy > 0.05) == night
        # with the cells' own brightness, the frames agreeing by it are taken as well (here
        # as likely to agree as the looks, but in other frames)
        own = rng.normal(0.0, 0.001, lks.shape).astype(np.float32)
        own[4:] += np.where(rng.random((5, 5, 6)) < 0.7, 0.5,
                            rng.uniform(-1.0, 1.0, (5, 5, 6)))
        if night:
            own += rng.normal(0.0, 0.03, own.shape).astype(np.float32)
        bnoisy = 10.0 * np.median(np.abs(np.diff(own[4:], axis=0)))
        got = seen_through(list(frames), list(lks), 4, 2.0, None, None, 0.05)
        both = seen_through(list(frames), list(lks), 4, 2.0, None, None, 0.05,
                            bright=list(own))
        if not night:
            assert (got > 0).sum() > 5 and (got == -np.inf).sum() > 5
            assert (got[0, :2] <= 0).all()
        assert (both >= got).all() and (both > got).any()
        for y in range(5):
            for x in range(6):
                v, lk, b = frames[:, y, x] / 2.0, lks[:, y, x], own[:, y, x]
                by_look = [(lk, tol) for tol in ((0.05, noisy) if night else (0.05,))]
                by_own = [(b, tol) for tol in ((0.05, bnoisy) if bnoisy > 0.05 else (0.05,))]
                for result, tests in ((got, by_look), (both, by_look + by_own)):
                    want = -np.inf
                    for by, tol in tests:
                        ok = np.abs(by[-5:] - np.median(by[-5:])) <= tol
                        ok &= ok[-1]
                        if ok.sum() < 3:
                            continue
                        q = np.sort(v[-5:][ok])
                        step = q[0] - (q[-2] - q[0]) - max(np.sort(v[:-5])[-2], 0.0)
                        moved = min(np.abs(lk[-5:][ok] - np.median(lk[:-5])).min(),
                                    np.sort(np.abs(lk[:-5] - np.median(lk[-5:])))[1])
                        want = max(want, step if moved > 0.05 else min(step, 0.0))
                    assert result[y, x] == pytest.approx(want, abs=1e-5)


def test_a_settled_thing_read_unevenly_keeps_its_lowest_reading():
    # A weak spill set down at frame 8 on a 2 x 2 patch of cells, read by the model at 6 to
    # 13 from frame to frame while its look and its brightness stay put. At a second patch
    # passers-by read the same values, each changing the picture differently; at a third the
    # model reads the same values and the look moves as the spill's does, but the cells'
    # brightness does not (the mean around them moved: something came into their square).
    # The spread of the readings takes all three below 0. With the brightness, the spill
    # keeps its lowest reading, x(1) of the sorted window (numpy.sort), and is flagged on its
    # 4th frame, while the other two are not; once it is taken away (frame 16; the model
    # still reads 4 there) the frame no longer shows it: not settled, not flagged.
    n = 19
    reads = np.array([8.0, 6.0, 13.0, 11.0, 12.0, 6.0, 10.0, 13.0], np.float32)
    maps = np.zeros((n, 6, 14), np.float32)
    for c in (1, 6, 11):
        maps[8:16, 2:4, c:c + 2] = reads[:, None, None]
    maps[16:, 2:4, 1:3] = 4.0
    rng = np.random.default_rng(0)
    looks = rng.normal(0.0, 0.002, maps.shape).astype(np.float32)
    bright = rng.normal(3.0, 0.002, maps.shape).astype(np.float32)
    moved = rng.uniform(0.1, 0.9, (8, 1, 1)).astype(np.float32)
    for arr in (looks, bright):
        arr[8:16, 2:4, 1:3] += 0.3                               # the spill: one new look
        arr[8:16, 2:4, 6:8] += moved                             # passers-by
    looks[8:16, 2:4, 11:13] += 0.3                               # only the look moved
    times = np.arange(n) * 2.0
    opts = dict(threshold=3.0, past=8, start_threshold=60.0, min_past=3, around=3,
                looks=looks, change=0.05)
    plain = persistence(maps, times, 4, 10.0, **opts)
    assert plain.maps[11:16].max() < 3.0
    run = persistence(maps, times, 4, 10.0, brightness=bright, **opts)
    for i in range(11, 16):
        np.testing.assert_allclose(run.maps[i, 2:4, 1:3],
                                   np.sort(maps[i - 3:i + 1, 2:4, 1:3], axis=0)[0])
    assert run.maps[11:, 2:4, 6:].max() < 3.0
    flagged = run.filled & (run.scores > np.where(run.stepped, 3.0, 60.0))
    assert flagged.tolist() == [False] * 11 + [True] * 5 + [False] * 3
    # the brightness goes with the stream's state (the ledger's arrays) like the looks
    first = persistence(maps[:13], times[:13], 4, 10.0, brightness=bright[:13],
                        **dict(opts, looks=looks[:13]))
    # under the keys a ledger has held since 0.11 (a state kept then reads as this one)
    assert sorted(first.state.arrays()) == ["block", "brightness", "held", "held_brightness",
                                            "held_look", "looks", "maps", "onset", "times"]
    saved = StreamState.from_arrays(first.state.arrays())
    assert np.isfinite(saved.held_brightness).any() and saved.brightness.shape == (11, 6, 14)
    second = persistence(maps[13:], times[13:], 4, 10.0, state=saved, brightness=bright[13:],
                         **dict(opts, looks=looks[13:]))
    np.testing.assert_allclose(np.concatenate([first.maps, second.maps]), run.maps)
    # cell_looks is looks_of(cell_brightness): the log of each cell's mean (numpy)
    grey = np.random.default_rng(1).uniform(20.0, 200.0, (2, 24, 48)).astype(np.float32)
    cells = cell_brightness(grey, (6, 12))
    np.testing.assert_allclose(cells, np.log1p(grey.reshape(2, 6, 4, 12, 4).mean(axis=(2, 4))),
                               rtol=1e-6)
    np.testing.assert_array_equal(looks_of(cells), cell_looks(grey, (6, 12)))


def test_a_lamp_switching_on_is_not_a_thing_left_but_a_parcel_set_down_with_it_is():
    # At frame 8 the lamps come on: the floor (lower half) brighter, the wall above darker
    # once the exposure follows, over the whole width; the model reads the wall's foot,
    # where the looks change most, as unusual from then on. A parcel (2 x 2 cells, darker
    # than the floor) is set down at frame 14. The looks alone count both (the look changes
    # by more than the change gate where the light's edge is); with the brightness, the
    # light's change is the surroundings' (wider than half the square around a cell), so
    # only the parcel is flagged, from its 3rd frame on (three frames that look alike).
    n, h, w = 22, 14, 28
    rng = np.random.default_rng(0)
    bright = rng.normal(3.0, 0.002, (n, h, w)).astype(np.float32)
    bright[8:, :7] -= 0.4
    bright[8:, 7:] += 0.1
    bright[14:, 10:12, 20:22] -= 0.3
    looks = looks_of(bright)
    maps = np.zeros((n, h, w), np.float32)
    maps[8:, 5:9, 3:9] = 30.0
    maps[14:, 10:12, 20:22] = 30.0
    times = np.arange(n) * 2.0
    opts = dict(threshold=5.0, past=8, start_threshold=60.0, min_past=3, around=3,
                looks=looks, change=0.05, shown=True, crossed=True)
    plain = persistence(maps, times, 4, 10.0, **opts)
    assert (plain.maps[11:, 5:9, 3:9] > 5.0).any()
    run = persistence(maps, times, 4, 10.0, brightness=bright, **opts)
    assert (run.maps[:, 5:9, 3:9] <= 0.0).all()
    assert (run.maps[16:, 10:12, 20:22] > 5.0).all()
    flagged = run.filled & (run.scores > np.where(run.stepped, 5.0, 60.0))
    assert flagged.tolist() == [False] * 16 + [True] * 6
    # the same across two calls, the stream's state (the ledger's arrays) carrying the rest
    first = persistence(maps[:15], times[:15], 4, 10.0, brightness=bright[:15],
                        **dict(opts, looks=looks[:15]))
    saved = StreamState.from_arrays(first.state.arrays())
    second = persistence(maps[15:], times[15:], 4, 10.0, state=saved, brightness=bright[15:],
                         **dict(opts, looks=looks[15:]))
    np.testing.assert_allclose(np.concatenate([first.maps, second.maps]), run.maps)
    # _own against its docstring's formula, cell by cell: numpy.median of the frames
    # before, numpy.sort's second smallest over the window, the mean around as
    # scipy.ndimage.uniform_filter's with edges repeated ("nearest"; odd square: 7)
    from scipy.ndimage import maximum_filter, uniform_filter

    rel = bright - np.median(bright.reshape(n, -1), axis=1)[:, None, None]
    win = list(looks[4:12])
    got = _own(win, 4, None, list(rel[4:12]), None, 3)
    k = local_size((h, w))
    assert k == 7
    look = np.sort(np.abs(looks[8:12] - np.median(looks[4:8], axis=0)), axis=0)[1]
    moved = np.sort(np.abs(rel[8:12] - np.median(rel[4:8], axis=0)), axis=0)[1]
    want = maximum_filter(look - uniform_filter(moved, size=k, mode="nearest"), size=3,
                          mode="nearest")
    np.testing.assert_allclose(got, want, atol=1e-5)


def test_first_windows_take_a_change_of_light_from_normal_as_no_thing_left():
    # normal_look with the frames' brightness: its third layer is the per-cell median
    # (numpy.median) of each frame's brightness less its median over the frame's cells. A
    # run begins with the wall's upper part darker than in every normal frame (a lamp off
    # over five of 14 rows), the model reading the light's edge (rows 3-7), and a parcel
    # there since before the run (2 x 2 cells, darker). Its first window has no frames
    # before it: against the normal look alone the edge departs (its looks move by what the
    # mean around moved) and is flagged; with the normal brightness, only where the
    # departure is the cells' own (more than the mean change of brightness around), so
    # only the parcel (an older baseline's normal look, 2 layers, runs as before).
    h, w = 14, 28
    rng = np.random.default_rng(3)
    cal = rng.normal(3.0, 0.002, (12, h, w)).astype(np.float32)
    normal = normal_look(looks_of(cal), np.arange(12) * 2.0, 4, 10.0, brightness=cal)
    assert normal.shape == (3, h, w)
    np.testing.assert_allclose(
        normal[2], np.median(cal - np.median(cal.reshape(12, -1), axis=1)[:, None, None],
                             axis=0), atol=1e-6)
    bright = rng.normal(3.0, 0.002, (6, h, w)).astype(np.float32)
    bright[:, :5] -= 0.4
    bright[:, 10:12, 20:22] -= 0.3
    maps = np.zeros((6, h, w), np.float32)
    maps[:, 3:8, 3:9] = maps[:, 10:12, 20:22] = 30.0
    kw = dict(threshold=5.0, start_threshold=10.0, past=8, min_past=MIN_PAST, around=3,
              looks=looks_of(bright), change=0.05)
    before = persistence(maps, np.arange(6) * 2.0, 4, 10.0, normal=normal[:2],
                         brightness=bright, **kw)
    run = persistence(maps, np.arange(6) * 2.0, 4, 10.0, normal=normal, brightness=bright,
                      **kw)
    assert not run.stepped[3] and before.maps[3, 3:8, 3:9].max() > 10.0
    assert run.maps[3, 3:8, 3:9].max() <= 0.0 and (run.maps[3, 10:12, 20:22] > 10.0).all()


def test_a_reference_needs_frames_a_passer_by_cannot_move():
    # A cell that reads unusual all along (30), covered in the first frame of a run by a
    # passer-by who reads less unusual there (2): a reference from that one frame makes the
    # next window a step of 28, one from MIN_PAST frames or more does not; a window with
    # fewer frames before it is judged as a first window (not stepped).
    maps = np.full((10, 5, 5), 0.0, np.float32)
    maps[:, 2, 2] = 30.0
    maps[0, 2, 2] = 2.0
    times = np.arange(10) * 2.0
    one = persistence(maps, times, 4, 10.0, past=8)
    assert one.stepped[4] and one.maps[4, 2, 2] == pytest.approx(28.0)
    three = persistence(maps, times, 4, 10.0, past=8, min_past=MIN_PAST)
    assert not three.stepped[4:6].any() and three.stepped[6:].all()
    assert np.abs(three.maps[6:, 2, 2]).max() < 1e-5
    assert past_level(maps[:3, 2:3, 2:3])[0, 0] == 30.0  # second largest of (2, 30, 30)


def test_windows_short_of_a_reference_flag_only_what_appeared_since_the_run_began():
    # (2, 2) reads unusual from the run's first frame (there before it began); (4, 6) from
    # frame 2 on (set down during the run). The first full window (frame 3) is held to the
    # start threshold and flags what is there; frames 4 and 5, with 1-2 frames before their
    # window, too few for a reference, flag only a region that also stepped up from those
    # frames; from frame 6 on the reference is there (MIN_PAST frames).
    maps = np.zeros((9, 6, 8), np.float32)
    maps[:, 2, 2] = 30.0
    maps[2:, 4, 6] = 30.0
    times = np.arange(9) * 2.0
    run = persistence(maps, times, 4, 10.0, threshold=5.0, start_threshold=10.0, past=8,
                      min_past=MIN_PAST)
    assert not run.stepped[:6].any() and run.stepped[6:].all()
    assert run.maps[3, 2, 2] > 10.0                       # judged on the level at the start
    assert (run.maps[4:6, 2, 2] <= 0.0).all()             # no step since: not again
    assert run.maps[5, 4, 6] > 10.0 and run.maps[4, 4, 6] <= 0.0  # its 4th frame
    assert (run.maps[6:, 2, 2] < 1e-5).all() and (run.maps[6:, 4, 6] > 5.0).all()


def test_a_threshold_resting_on_one_window_is_told():
    # 48 windows at alpha 1 %: too few for the rank, so the conformal threshold is the
    # largest score (Vovk, Gammerman & Shafer 2005). One window 100x the others sets it.
    from inspector.core.calibration import conformal_threshold

    scores = np.linspace(0.1, 2.0, 48)
    lone = np.append(scores[:-1], 200.0)
    for values, told in ((scores, []), (lone, [("change", 200.0, scores[-2])])):
        p = Persistence(4, 20.0, conformal_threshold(values, 0.01), values, 0.5, True,
                        floor=1.5)
        assert p.threshold.value == values.max()
        assert p.threshold.guaranteed == pytest.approx(1 / 49)
        assert p.lone() == told


def test_what_stays_outscores_what_passes():
    # A left object (the same value at one cell in every frame, one frame covered by a
    # passer-by) against a cell crossed by a different passer-by in every frame of the window.
    cells = np.zeros((4, 2, 4), np.float32)
    cells[:, 0, 0] = [80.0, 81.0, 700.0, 79.0]       # left object, occluded once
    cells[:, 1, 3] = [600.0, 900.0, 150.0, 1200.0]    # four different passers-by
    level = steady_level(cells - np.median(cells.reshape(4, -1), axis=1)[:, None, None])
    assert level[0, 0] == pytest.approx(2 * 79.0 - 81.0)
    assert level[1, 3] < 0 < level[0, 0]
    # A passer-by steady at one cell for the window, whose edges cross the cells beside it,
    # against a thing left, steady with its edges: only the second keeps its level once the
    # spread is taken around the cell.
    cells = np.zeros((4, 5, 10), np.float32)
    cells[:, 2, 2] = [300.0, 310.0, 305.0, 302.0]           # passer-by, steady at its centre
    cells[:, 1:4, 1] = np.array([0.0, 350.0, 0.0, 380.0])[:, None]  # its edge comes and goes
    cells[:, 1:4, 6:9] = 100.0 + np.arange(4)[:, None, None]       # the thing left
    level = steady_level(cells, around=3)
    assert level[2, 2] < 0 < 95.0 < level[2, 7]


def test_local_maps_take_out_light_over_part_of_the_view_and_opening_drops_thin_regions():
    # A lamp's pool lights the left 12 columns (+5); a thing left (+20, 4 x 4 cells) lies in it.
    maps = np.zeros((1, 24, 32), np.float32)
    maps[0, :, :12] += 5.0
    maps[0, 8:12, 4:8] += 20.0
    # The median around each cell: scipy.ndimage.median_filter of the map reduced to half
    # size (2 x 2 means), here read where the reduced map's cells and the map's agree.
    small = maps[0].reshape(12, 2, 16, 2).mean(axis=(1, 3))
    ref = median_filter(small, size=5, mode="nearest")
    got = local_median(maps, 10)[0]
    assert got[18, 2] == pytest.approx(ref[9, 1]) and got[18, 2] == pytest.approx(5.0)
    local = local_maps(maps, local=10)[0]
    assert local[9, 5] == pytest.approx(20.0)        # the thing keeps its level
    assert abs(local[18, 2]) < 1e-6 and abs(local[18, 28]) < 1e-6  # the pool is taken out
    assert local_maps(maps)[0, 18, 2] == pytest.approx(5.0)  # over the whole view it is not
    # Opening by a 2 x 2 square (erosion then dilation; Serra 1982, from memory): a region
    # one cell wide is dropped, one at least 2 x 2 keeps its values.
    step = np.zeros((6, 8), np.float32)
    step[1, 1] = 50.0                    # one cell at the edge of a passer-by
    step[3:5, 4:7] = [[9.0, 8.0, 7.0], [9.0, 8.0, 7.0]]
    out = opened(step, 2)
    assert out[1, 1] == 0.0 and out[3:5, 4:7].min() == 7.0 and out.max() == 8.0
    assert np.array_equal(opened(step, 1), step)
    stack = np.stack([step, np.roll(step, 3, axis=1) * 2.0])  # a stack: each map opened on its own
    assert np.array_equal(opened(stack, 2), np.stack([opened(m, 2) for m in stack]))


def test_median_filter_of_a_stack_is_scipys_map_by_map():
    # scipy.ndimage.median_filter, edges repeating the nearest cell, map by map: the same
    # values (each a value of its window), with ties, windows wider than the map and a
    # stack cut into chunks.
    rng = np.random.default_rng(3)
    maps = rng.standard_normal((5, 7, 12)).astype(np.float32)
    maps[:, 2:4, 3:9] = 1.5
    for size in (1, 3, 5, 9, 15):
        got = median_filtered(maps, size, chunk=200)
        ref = np.stack([median_filter(m, size=size, mode="nearest") for m in maps])
        assert got.dtype == np.float32 and np.array_equal(got, ref), size


def test_flat_filters_and_opening_are_scipys():
    # scipy.ndimage.minimum_filter / maximum_filter / grey_opening over squares, edges
    # repeating the nearest cell, map by map: the same values (each a value of its square;
    # a zero's sign may differ), with ties, NaN, maps smaller than the square and a stack.
    from scipy.ndimage import grey_opening, maximum_filter, minimum_filter

    rng = np.random.default_rng(5)
    maps = np.round(rng.standard_normal((3, 7, 12)) * 2).astype(np.float32) / 2
    with_nan = maps.copy()
    with_nan[1, 2, 3] = np.nan
    for m in (maps, maps[0], maps[:, :2, :1], with_nan):
        for size in (1, 2, 3, 4, 5):
            sq = (1,) * (m.ndim - 2) + (size, size)
            assert np.array_equal(flat_filter(m, size, np.maximum),
                                  maximum_filter(m, size=sq, mode="nearest"), equal_nan=True)
            assert np.array_equal(flat_filter(m, size, np.minimum),
                                  minimum_filter(m, size=sq, mode="nearest"), equal_nan=True)
            assert np.array_equal(opened(m, size), grey_opening(m, size=sq, mode="nearest"),
                                  equal_nan=True), (m.shape, size)


def test_state_carries_the_window_across_calls_and_through_arrays():
    maps, times = _stream()
    whole = persistence(maps, times, 3, 10.0, threshold=1.0)
    first = persistence(maps[:17], times[:17], 3, 10.0, threshold=1.0)
    saved = StreamState.from_arrays(first.state.arrays())  # as the ledger keeps it
    second = persistence(maps[17:], times[17:], 3, 10.0, threshold=1.0, state=saved)
    np.testing.assert_allclose(np.concatenate([first.maps, second.maps]), whole.maps)
    assert np.array_equal(np.concatenate([first.filled, second.filled]), whole.filled)
    np.testing.assert_array_equal(np.concatenate([first.since, second.since]), whole.since)


def test_gap_and_new_block_start_a_new_window():
    maps, times = _stream(12)
    times = times.copy()
    times[6:] += 1000.0  # a long gap before frame 6
    run = persistence(maps, times, 3, max_gap=10.0)
    assert run.filled.tolist() == [False, False] + [True] * 4 + [False, False] + [True] * 4
    blocks = np.repeat([0, 1], 6)
    run = persistence(maps, np.arange(12) * 2.0, 3, 10.0, blocks=blocks)
    assert not run.filled[6] and not run.filled[7] and run.filled[8]


def test_a_late_frame_takes_its_place_in_the_stream():
    # Frame 10 arrives after frame 11 (as across two watch batches). The reference is the
    # stream in capture-time order: the late frame gets the window it has there, and every
    # frame after it the same maps; only frame 11, scored before frame 10 was there, differs.
    maps, times = _stream(20)
    order = list(range(10)) + [11, 10] + list(range(12, 20))
    pos = {f: k for k, f in enumerate(order)}
    for step in ({}, {"past": 4, "robust": True, "around": 3}):  # also from frames before
        ref = persistence(maps, times, 4, 10.0, **step)
        got = persistence(maps[order], times[order], 4, 10.0, **step)
        assert got.late.tolist() == [False] * 11 + [True] + [False] * 8
        for f in [*range(11), *range(12, 20)]:
            np.testing.assert_allclose(got.maps[pos[f]], ref.maps[f], atol=1e-5)
            assert got.filled[pos[f]] == ref.filled[f]
            assert got.stepped[pos[f]] == ref.stepped[f]
    ref = persistence(maps, times, 4, 10.0)
    # A whole batch late (frames 0-7 after 8-19, as when two watch workers finish in the
    # other order): its frames make windows among themselves, as in the ordered stream.
    order = list(range(8, 20)) + list(range(8))
    got = persistence(maps[order], times[order], 4, 10.0)
    assert got.late.tolist() == [False] * 12 + [True] * 8
    np.testing.assert_allclose(got.maps[12 + 3:], ref.maps[3:8], atol=1e-6)
    assert got.filled[12 + 3:].all() and not got.filled[12:12 + 3].any()
    # A frame far older than anything kept (beyond the gap) is scored alone, not flagged,
    # and leaves the stream as it was.
    stale = persistence(np.concatenate([maps, maps[:1]]), np.append(times, -100.0), 4, 10.0)
    assert stale.late[-1] and not stale.filled[-1]
    np.testing.assert_allclose(stale.state.maps, ref.state.maps)


def test_a_late_frame_is_judged_by_the_rules_an_in_order_one_is():
    # A late frame gets the map it has in the stream in capture-time order (nothing is held
    # without a threshold), by every rule: the spill of a dark, noisy stretch (its step
    # counted against the view's change, robust="change"; the fixture of the noisy-stretch
    # test above) and the parcel crossed by passers-by (seen through them, crossed=True; the
    # fixture of the crossed test above), each with one frame arriving after the next.
    rng = np.random.default_rng(5)
    n, h, w = 14, 24, 32
    maps = (rng.normal(0, 10, (h, w)) + rng.normal(0, 1, (n, h, w))).astype(np.float32)
    bright = (rng.normal(4.0, 0.3, (h, w)) + rng.normal(0, 0.003, (n, h, w))).astype(np.float32)
    maps[8:, 3:6, 4:7] += 12.0
    bright[8:, 3:6, 4:7] -= 0.3
    spill = (maps, bright, 11, dict(past=4, looks=looks_of(bright), change=0.05,
                                    brightness=bright, robust="change"))
    maps = np.zeros((20, 6, 8), np.float32)
    looks = np.zeros((20, 6, 8), np.float32)
    maps[8:, 2, 3], looks[8:, 2, 3] = 30.0, 0.5
    maps[9, 2, 3], looks[9, 2, 3] = 300.0, -0.4
    maps[11, 2, 3], looks[11, 2, 3] = 3.0, 1.2
    crossed = (maps, None, 12, dict(past=8, min_past=MIN_PAST, looks=looks, change=0.05,
                                    crossed=True))
    for maps, bright, late, kw in (spill, crossed):
        n = len(maps)
        times = np.arange(n) * 2.0
        order = [*range(late), late + 1, late, *range(late + 2, n)]
        ref = persistence(maps, times, 4, 10.0, **kw)
        got = persistence(maps[order], times[order], 4, 10.0,
                          **dict(kw, looks=kw["looks"][order],
                                 **({} if bright is None else {"brightness": bright[order]})))
        assert got.late.tolist() == [k == late for k in order]
        off = persistence(maps, times, 4, 10.0, **dict(kw, robust="window", crossed=False))
        assert ref.scores[late] > off.scores[late] + 2.0  # the rule counts there
        for k, f in enumerate(order):
            if f != late + 1:  # (scored before the late frame was there)
                np.testing.assert_allclose(got.maps[k], ref.maps[f], atol=1e-5)
                assert got.stepped[k] == ref.stepped[f]


def test_since_is_when_the_region_appeared():
    maps = np.zeros((8, 4, 4), np.float32)
    maps[3:, 1, 2] = 5.0           # something appears at frame 3 and stays
    maps[2, 0, 0] = 9.0            # something passes at frame 2
    times = 100.0 + np.arange(8) * 2.0
    run = persistence(maps, times, 3, 10.0, threshold=1.0)
    flagged = run.filled & (run.scores > 1.0)
    assert flagged.tolist() == [False] * 5 + [True] * 3   # on its third frame (window 3)
    assert run.since[5:].tolist() == [times[3]] * 3
    assert np.isnan(run.since[:5]).all()


def test_calibrate_tells_busy_from_quiet():
    rng = np.random.default_rng(1)
    n, h, w = 300, 12, 16
    quiet = np.abs(rng.normal(size=(n, h, w))).astype(np.float32)
    times = np.arange(n) * 2.0
    blocks = (np.arange(n) * 5) // n
    p = calibrate_persistence(quiet, times, blocks, alpha=0.01)
    assert not p.busy and p.transient_share < BUSY_SHARE
    # Busy only when the share is clearly above BUSY_SHARE: the one-sided exact binomial
    # p-value, checked against the binomial tail summed directly (scipy.stats.binom.sf).
    from scipy.stats import binom

    for k, m in ((0, 10), (2, 26), (12, 100), (40, 100)):
        assert clearly_busy(k, m) == (binom.sf(k - 1, m, BUSY_SHARE) < 0.05)
    assert not clearly_busy(2, 26) and clearly_busy(40, 100)
    # Conformal threshold: the ceil((k + 1)(1 - alpha))-th smallest persistence score
    # (Vovk, Gammerman & Shafer 2005), i.e. numpy's "inverted_cdf" quantile at that rank.
    k = len(p.calibration_scores)
    rank = math.ceil((k + 1) * 0.99)
    assert p.threshold.value == pytest.approx(np.sort(p.calibration_scores)[rank - 1])
    busy = quiet.copy()
    for i in range(0, n, 2):  # a large passer-by in every other frame, never twice in place
        y, x = (i * 7) % (h - 3), (i * 5) % (w - 3)
        busy[i, y:y + 3, x:x + 3] += 200.0
    b = calibrate_persistence(busy, times, blocks, alpha=0.01)
    assert b.busy and b.transient_share > 0.3
    assert b.threshold.value < 10.0  # passers-by do not set the persistence threshold
    # Flags come from the step from the frames before the window; the first frame of a
    # stretch, with none before it, is held to the steady level of every window.
    assert b.past == 8 and b.robust and b.start_threshold is not None
    # the first MIN_PAST full windows of each block have too few frames before them
    assert b.min_past == MIN_PAST == 3
    assert len(b.start_scores) == len(b.calibration_scores) + 5 * MIN_PAST
    rank = math.ceil((len(b.start_scores) + 1) * 0.99)
    # Each threshold is that order statistic, raised to the floor when below it: the 99th
    # percentile (numpy.quantile) of the steady levels of every cell of every full window.
    levels = persistence(busy, times, b.window, b.max_gap, blocks=blocks, robust="window",
                         around=3, local=b.local)
    assert b.local == 4 and b.footprint == 1  # a quarter of the 16-cell long side
    assert b.floor == pytest.approx(max(np.quantile(levels.maps[levels.filled], 0.99), 0.0))
    assert b.start_threshold.value == pytest.approx(
        max(np.sort(b.start_scores)[rank - 1], b.floor))
    rank = math.ceil((len(b.calibration_scores) + 1) * 0.99)
    assert b.threshold.value == pytest.approx(
        max(np.sort(b.calibration_scores)[rank - 1], b.floor))
    again = Persistence.from_saved(b.to_json(), b.calibration_scores, b.start_scores, b.normal)
    assert again.to_json() == b.to_json() and again.around == 3 and again.normal is None
    old = Persistence.from_saved({k: v for k, v in b.to_json().items()
                                  if k not in ("past", "robust", "start_threshold", "around",
                                               "floor", "local", "footprint", "min_past",
                                               "change", "crossed")},
                                 b.calibration_scores)  # saved before the step
    assert old.past == 0 and not old.robust and old.start_threshold is None and old.around == 1
    assert old.floor == 0.0 and old.local == 0 and old.footprint == 1
    assert old.min_past == 1 and old.change == 0.0 and not old.crossed and b.crossed
    # without brightness the frames seen through are found by their looks alone; a baseline
    # that has it saves "brightness" (by the cells' own brightness too)
    assert b.crossed is True
    mine = Persistence.from_saved(dict(b.to_json(), crossed="brightness"), b.calibration_scores)
    assert mine.crossed == "brightness" and mine.to_json()["crossed"] == "brightness"
    assert not old.settle_look and not b.settle_look  # (looks only: no settled rule)
    # The same frames 16 minutes apart: a window spans an hour, longer than MAX_SPAN, where a
    # change of light looks as short-lived as traffic; learn does not call the camera busy.
    sparse = calibrate_persistence(busy, np.arange(n) * 960.0, blocks, alpha=0.01)
    assert sparse.span > MAX_SPAN and not sparse.busy
    assert sparse.transient_share == pytest.approx(b.transient_share)


def test_mode_and_config():
    assert persistence_on(True) and not persistence_on(False)
    assert persistence_on(False, "on") and not persistence_on(True, "off")
    assert not persistence_on(None, "on")            # never without a calibration
    cfg = Config(cameras={"gate": {"persistence": "on", "persistence_window": 4}})
    assert cfg.camera("gate").persistence == PersistenceSettings("on", 4)
    assert cfg.camera("dock").persistence.mode == "auto"
    # an underexposed frame is still flagged by persistence (a step within the same dark);
    # a moved camera, a frozen feed... hold it back
    assert not held_back([]) and not held_back([("underexposed", 15.0, 20.0)])
    assert held_back([("underexposed", 15.0, 20.0), ("camera moved", 3.0, 2.0)])
    assert held_back([("frozen feed", 0.1, 0.25)])


def test_bad_persistence_mode_is_a_usage_error(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text('[cameras.gate]\npersistence = "sometimes"\n')
    with pytest.raises(UsageError, match="persistence"):
        load_config(path)
    # A camera table's key is named as the user wrote it, with the file it is in.
    path.write_text('[cameras.gate]\npersistence_window = 99\n')
    with pytest.raises(UsageError, match=r"c\.toml: \[cameras\.gate\] persistence_window = 99"):
        load_config(path).camera("gate")


def test_events_carry_since():
    t0 = datetime(2026, 11, 30, 8, 0, 0)
    points = [FramePoint("gate", (t0 + timedelta(seconds=2 * i)).isoformat(), f"f{i}", 1.0,
                         i >= 4, (t0 + timedelta(seconds=4)).isoformat() if i >= 4 else "")
              for i in range(8)]
    (event,) = group_events(points)
    assert event.since == (t0 + timedelta(seconds=4)).isoformat()
    assert event.row()[-1] == event.since


def test_ledger_keeps_a_stream(tmp_path):
    from inspector.storage.ledger import Ledger

    maps, times = _stream(5)
    state = persistence(maps, times, 3, 10.0, threshold=0.5).state
    with Ledger(tmp_path / "db.sqlite") as ledger:
        assert ledger.stream("gate") is None
        ledger.keep_stream("gate", "v1", state.arrays())
    with Ledger(tmp_path / "db.sqlite") as ledger:  # a restart
        version, again = ledger.stream("gate")
    assert version == "v1"
    np.testing.assert_array_equal(again.maps, state.maps)
    np.testing.assert_array_equal(again.onset, state.onset)


def test_bench_busy_smoke(capsys):
    # A tiny run of bench/busy.py: it learns, scans with persistence on and off and prints
    # both rows (figures at this size mean nothing).
    path = Path(__file__).resolve().parents[1] / "bench" / "busy.py"
    spec = importlib.util.spec_from_file_location("bench_busy", path)
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    # Clopper-Pearson upper bound for 0 of n: 1 - (alpha / 2) ** (1 / n) (closed form).
    assert rate_interval(0, 30)[1] == pytest.approx(1 - 0.025 ** (1 / 30))
    # The yard camera: ground from scikit-image's bundled gravel photograph.
    assert bench.main(["--normal", "30", "--new", "30", "--size", "128x72", "--seeds", "1",
                       "--camera", "yard", "--detail"]) == 0
    out = capsys.readouterr().out
    assert "\non seed 1 " in out and "\noff seed 1 " in out and "'yard'" in out
    assert "\nseed 1    start " in out
    # false alarms sorted by kind: a burst of 4 frames, an object at positions 1-2 of the
    # next, every traffic-only frame flagged
    names = [f"yard/yard_20261130_{t}.jpg" for t in
             ("100000", "100002", "100004", "100006", "120000", "120002", "120004",
              "120006", "120008", "120010", "120012", "120014")]
    truth = [(n, "yard", "parcel" if i in (5, 6) else "none") for i, n in enumerate(names)]
    kinds = bench.false_kinds(truth, set(names), "yard", 4, 60.0)
    assert kinds == {"start": [0, 1, 2, 3, 4, 7], "after": [8, 9], "other": [10, 11]}


def test_a_late_frame_first_of_its_run_takes_the_start_threshold():
    # A late frame with no frame before its window (not stepped) is judged against the start
    # threshold, and so is the region its ``since`` dates. The stream (frames 4-9) has the
    # cell above the step threshold since frame 8; the late frame 3 reaches only that.
    maps = np.zeros((10, 4, 4), np.float32)
    maps[:, 1, 2] = 5.0                         # there from the first frame on
    times = 100.0 + np.arange(10) * 2.0
    order = [4, 5, 6, 7, 8, 9, 0, 1, 2, 3]      # frames 0-3 arrive after 4-9
    for start, dated in ((50.0, False), (2.0, True)):
        run = persistence(maps[order], times[order], 4, 10.0, threshold=1.0, past=4,
                          start_threshold=start)
        assert run.late[-1] and run.filled[-1] and not run.stepped[-1]
        assert np.isfinite(run.since[-1]) == dated


def test_a_thing_settled_in_a_noisy_stretch_is_told_by_its_looks_noise():
    # Night: every cell's look and brightness scatter by 0.03 from frame to frame (the
    # window's look noise, ten times the median change, about 0.34, is above ``change``
    # 0.05), and the model reads a spill set down at frame 8 (2 x 2 cells, its look and
    # brightness 0.3 darker) at 6 to 13. Its looks agree within that noise, not within
    # ``change``: settled, it keeps its lowest reading, x(1) of the window (numpy.sort), and
    # is flagged from its 4th frame; without the brightness (no settled rule), or as
    # baselines learnt before it (settle_noise False: looks within ``change``), the spread
    # takes it below 3.
    rng = np.random.default_rng(0)
    n, h, w = 16, 6, 14
    maps = np.zeros((n, h, w), np.float32)
    maps[8:, 2:4, 1:3] = np.array([8, 6, 13, 11, 12, 6, 10, 13], np.float32)[:, None, None]
    looks = rng.normal(0.0, 0.03, maps.shape).astype(np.float32)
    bright = rng.normal(3.0, 0.03, maps.shape).astype(np.float32)
    for arr in (looks, bright):
        arr[8:, 2:4, 1:3] -= 0.3
    times = np.arange(n) * 2.0
    opts = dict(threshold=3.0, past=8, start_threshold=60.0, min_past=3, around=3,
                looks=looks, change=0.05)
    assert persistence(maps, times, 4, 10.0, **opts).maps[11:].max() < 3.0
    before = persistence(maps, times, 4, 10.0, brightness=bright, **opts)
    assert before.maps[11:].max() < 3.0
    run = persistence(maps, times, 4, 10.0, brightness=bright, settle_noise=True, **opts)
    for i in range(11, n):
        np.testing.assert_allclose(run.maps[i, 2:4, 1:3],
                                   np.sort(maps[i - 3:i + 1, 2:4, 1:3], axis=0)[0])
    flagged = run.filled & (run.scores > np.where(run.stepped, 3.0, 60.0))
    assert flagged.tolist() == [False] * 11 + [True] * 5


def test_the_picture_reads_a_thing_settled_in_the_dark():
    # A window of 4 night frames whose looks scatter by 0.03, a spill 0.3 darker at 2 x 2
    # cells from the frames before (reference 0). Its reading, against its formula: x(2) over
    # the frames of |look - reference| (numpy.sort), less the smallest range of the looks
    # without one older frame, over the median absolute frame-to-frame change of the looks
    # (numpy.median); -inf where not settled. Not a dark stretch (look noise, ten times that
    # median, not above ``change``): nothing.
    rng = np.random.default_rng(1)
    win = rng.normal(0.0, 0.03, (4, 6, 14)).astype(np.float32)
    win[:, 2:4, 1:3] -= 0.3
    settled = np.zeros((6, 14), bool)
    settled[2:4, 1:3] = True
    got = _look_reading(list(win), 4, np.zeros((6, 14), np.float32), settled, 0.05, None, 1)
    far = np.sort(np.abs(win), axis=0)[1]
    ranges = [np.ptp(np.delete(win, j, axis=0), axis=0) for j in range(3)]
    noise = np.median(np.abs(np.diff(win, axis=0)))
    want = (far - np.min(ranges, axis=0)) / noise
    np.testing.assert_allclose(got[settled], want[settled], rtol=1e-5)
    assert np.all(got[~settled] == -np.inf) and got[settled].min() > 3.0
    assert _look_reading(list(win), 4, np.zeros((6, 14), np.float32), settled, 10 * noise
                         + 0.01, None, 1) is None
    # in a stream: only adds (the maps are >= those without it), and a baseline without it
    # runs exactly as before
    n = 24
    maps = rng.normal(0.0, 3.0, (n, 6, 14)).astype(np.float32)
    looks = rng.normal(0.0, 0.03, maps.shape).astype(np.float32)
    bright = rng.normal(3.0, 0.03, maps.shape).astype(np.float32)
    for arr in (looks, bright):
        arr[12:, 2:4, 1:3] -= 0.3
    maps[12:, 2:4, 1:3] += 1.0
    opts = dict(past=8, robust="change", min_past=3, around=3, looks=looks, change=0.05,
                brightness=bright, settle_noise=True)
    times = np.arange(n) * 2.0
    old = persistence(maps, times, 4, 10.0, **opts)
    assert np.array_equal(persistence(maps, times, 4, 10.0, settle_look=False, **opts).maps,
                          old.maps)
    new = persistence(maps, times, 4, 10.0, settle_look=True, **opts)
    assert np.all(new.maps >= old.maps) and (new.maps > old.maps).any()


def test_a_thing_taken_away_in_the_dark_is_not_a_thing_settled():
    # Night (looks and brightness scattering by 0.03, ``change`` 0.05): a spill 0.3 darker
    # at 2 x 2 cells, read far below the floor around it (-30), is taken away at frame 12;
    # the floor it leaves reads 3 above the view. Its looks went back to the camera's normal
    # look (0, reached 0.1 by normal windows) and agree within the night's noise: as built in
    # 0.13, without the normal look, the two dark-stretch rules took the floor for a thing
    # settled and flagged it against the spill's frames before (yard 227 of the busy bench).
    # With the normal look they count only cells unlike normal (_unusual: the second
    # smallest |look - normal| over the window (numpy.sort), largest over the 3 x 3 cells
    # (scipy.ndimage.maximum_filter), less the reach), so nothing is flagged. A spill set
    # down at frame 12 (read 5 above the floor) is flagged from its 4th frame by the rules
    # alone, with the normal look as without it.
    from scipy.ndimage import maximum_filter

    n, h, w = 24, 6, 14
    cells = (slice(None), slice(2, 4), slice(1, 3))
    normal = np.stack([np.zeros((h, w)), np.full((h, w), 0.1),
                       np.zeros((h, w))]).astype(np.float32)
    times = np.arange(n) * 2.0
    rules = dict(settle_noise=True, settle_look=True)

    def scene(away: bool):
        rng = np.random.default_rng(2)
        maps = rng.normal(0.0, 3.0, (n, h, w)).astype(np.float32)
        looks = rng.normal(0.0, 0.03, maps.shape).astype(np.float32)
        bright = rng.normal(0.0, 0.03, maps.shape).astype(np.float32)
        there = slice(0, 12) if away else slice(12, n)
        for arr in (looks, bright):
            arr[there][cells] -= 0.3
        if away:
            maps[:12][cells] -= 30.0
            maps[12:][cells] += 3.0
        else:
            maps[12:][cells] += 5.0
        return maps, dict(threshold=1.0, past=8, start_threshold=60.0, robust="change",
                          min_past=3, around=3, looks=looks, change=0.05, brightness=bright)

    def flagged(run):
        return np.flatnonzero(run.filled & run.stepped & (run.scores > 1.0)).tolist()

    maps, opts = scene(away=True)
    assert flagged(persistence(maps, times, 4, 10.0, **opts)) == []
    assert len(flagged(persistence(maps, times, 4, 10.0, **rules, **opts))) >= 5
    assert flagged(persistence(maps, times, 4, 10.0, normal=normal, **rules, **opts)) == []
    win = list(opts["looks"][12:16])
    want = maximum_filter(np.sort(np.abs(np.array(win)), axis=0)[1], size=3,
                          mode="nearest") - 0.1
    np.testing.assert_allclose(_unusual(win, normal, 3), want, atol=1e-6)
    maps, opts = scene(away=False)
    assert flagged(persistence(maps, times, 4, 10.0, normal=normal, **opts)) == []
    found = flagged(persistence(maps, times, 4, 10.0, normal=normal, **rules, **opts))
    assert found == flagged(persistence(maps, times, 4, 10.0, **rules, **opts))
    assert found[:3] == [15, 16, 17]


def test_in_two_parts_equal_the_whole_run():
    # Reference: persistence's own single run over all frames (the definition): windows never
    # cross a time block, so two parts of whole blocks run in two threads give the same bits.
    rng = np.random.default_rng(3)
    n, shape = 36, (12, 16)
    maps = rng.gamma(2.0, 1.0, (n,) + shape).astype(np.float32)
    maps[20:, 4:8, 5:9] += 6.0  # a thing left in the second block
    bright = (100 + 5 * rng.standard_normal((n,) + shape)).astype(np.float32)
    bright[20:, 4:8, 5:9] -= 40.0
    blocks = np.repeat([0, 1, 2], [10, 14, 12])
    times = np.arange(n) * 60.0
    opts = dict(past=4, robust="change", around=3, local=5, footprint=2, min_past=2,
                looks=looks_of(bright), brightness=bright, change=0.05, crossed="brightness",
                settle_noise=True, settle_look=True)
    whole = persistence(maps, times, 3, 180.0, blocks=blocks, **opts)
    two = _in_two(maps, times, 3, 180.0, blocks, **opts)
    for name in ("maps", "scores", "filled", "since", "late", "stepped", "levels"):
        assert np.array_equal(getattr(two, name), getattr(whole, name), equal_nan=True), name
    assert whole.stepped.any() and (whole.scores[whole.stepped] > 0).any()


def test_a_reference_is_taken_from_the_frames_that_show_the_ground():
    # A spill (10, look 0.5) at (2, 3) from frame 8, set down just after passers-by crossed
    # that cell in 3 of the 6 frames before it (40, 30, 50 with their own looks): the second
    # largest of the frames before is a passer-by's (40), above the spill, which never
    # steps up. With ``ground`` the reference is taken from the frames before whose looks
    # agree with their median (the floor's), and the spill is flagged on its 3rd frame (the
    # window's 4th frame, the passer-by of frame 7, is the one set aside).
    # Common practice, no source: the long-term background of abandoned-object detection
    # is what the place shows when nothing is in front of it.
    n = 16
    maps = np.zeros((n, 6, 8), np.float32)
    looks = np.zeros((n, 6, 8), np.float32)
    maps[8:, 2, 3], looks[8:, 2, 3] = 10.0, 0.5
    for i, v, lk in ((3, 40.0, -0.4), (5, 30.0, 0.8), (7, 50.0, 0.3)):
        maps[i, 2, 3], looks[i, 2, 3] = v, lk
    times = np.arange(n) * 2.0
    kw = dict(threshold=5.0, past=8, start_threshold=60.0, min_past=MIN_PAST, looks=looks,
              change=0.05, shown=True)
    plain = persistence(maps, times, 4, 10.0, **kw)
    ground = persistence(maps, times, 4, 10.0, ground=True, **kw)
    assert not (plain.filled & (plain.scores > 5.0)).any()
    assert np.flatnonzero(ground.filled & (ground.scores > 5.0)).tolist() == list(range(10, n))
    # _reference against its formula cell by cell (numpy.median, numpy.sort): the second
    # largest of the values whose look is within change of the looks' median, at least 0,
    # where at least min_past of them agree; else (and where higher) past_level's
    from inspector.core.persistence.rules import _reference

    rng = np.random.default_rng(5)
    for k in (3, 5, 8):
        vals = rng.normal(0.0, 5.0, (k, 5, 6)).astype(np.float32)
        lks = np.where(rng.random((k, 5, 6)) < 0.6, 0.0,
                       rng.uniform(-1.0, 1.0, (k, 5, 6))).astype(np.float32)
        lks += rng.normal(0.0, 0.01, lks.shape).astype(np.float32)
        got = _reference(list(vals), 2.0, list(lks), 0.05, MIN_PAST)
        np.testing.assert_array_equal(_reference(list(vals), 2.0), past_level(vals / 2.0))
        for y in range(5):
            for x in range(6):
                v, lk = vals[:, y, x] / 2.0, lks[:, y, x]
                want = max(np.sort(v)[-2], 0.0)
                ok = np.abs(lk - np.median(lk)) <= 0.05
                if ok.sum() >= MIN_PAST:
                    want = min(want, max(np.sort(v[ok])[-2], 0.0))
                assert got[y, x] == pytest.approx(want, abs=1e-6)


def test_a_frame_unlike_its_window_is_not_flagged_for_it():
    # A long load on a slow truck covers the cells (2, 3)-(3, 4) in 4 consecutive frames
    # (8-11), read 40 to 60 (within a factor 2 of each other: steady enough for the steady
    # level) while its look and its brightness there change from frame to frame: with
    # ``shown`` True (held cells only) frame 11 is flagged. With "all", a frame whose look
    # and own brightness both differ from the median of the window's other frames by more
    # than ``change`` is not flagged where no cell is held, and the truck is not. A parcel
    # (20, one look) at (2, 10)-(3, 11) from frame 20 is flagged on its 4th frame either
    # way; a passer-by in front of it at frame 26 unflags that frame only (its hold goes
    # on: frames 27 on are flagged again).
    n = 32
    maps = np.zeros((n, 6, 14), np.float32)
    rng = np.random.default_rng(2)
    looks = rng.normal(0.0, 0.002, maps.shape).astype(np.float32)
    bright = rng.normal(3.0, 0.002, maps.shape).astype(np.float32)
    for i, v, lk in zip(range(8, 12), (40.0, 60.0, 45.0, 42.0), (0.6, 0.5, 0.35, 0.2)):
        maps[i, 2:4, 3:5], looks[i, 2:4, 3:5], bright[i, 2:4, 3:5] = v, lk, 3.0 + lk
    maps[20:, 2:4, 10:12], looks[20:, 2:4, 10:12], bright[20:, 2:4, 10:12] = 20.0, 0.4, 3.4
    maps[26, 2:4, 10:12], looks[26, 2:4, 10:12], bright[26, 2:4, 10:12] = 300.0, -0.5, 2.5
    times = np.arange(n) * 2.0
    kw = dict(threshold=5.0, past=8, start_threshold=600.0, min_past=MIN_PAST, around=3,
              looks=looks, change=0.05, brightness=bright)
    held_only = persistence(maps, times, 4, 10.0, shown=True, **kw)
    every = persistence(maps, times, 4, 10.0, shown="all", **kw)
    flags = [np.flatnonzero(r.filled & (r.scores > 5.0)).tolist() for r in (held_only, every)]
    assert flags[0] == [11] + list(range(23, 26)) + list(range(27, n))
    assert flags[1] == list(range(23, 26)) + list(range(27, n))
    # it runs in calibration (no threshold, nothing held) as at scan time
    free = persistence(maps, times, 4, 10.0, shown="all", past=8, min_past=MIN_PAST, around=3,
                       looks=looks, change=0.05, brightness=bright)
    assert free.scores[11] <= 0.0 < held_only.scores[11]
    # and a baseline keeps which it ran with
    meta = {"window": 4, "max_gap": 10.0, "threshold": {"value": 5.0, "alpha": 0.01, "n": 48, "guaranteed": 0.02,
                          "frames_short": 51},
            "transient_share": 0.5, "busy": True, "shown": "all", "ground": True}
    p = Persistence.from_saved(meta, np.zeros(48))
    assert p.shown == "all" and p.ground and p.to_json()["shown"] == "all"
    assert not Persistence.from_saved(dict(meta, shown=True, ground=False), np.zeros(48)).ground
