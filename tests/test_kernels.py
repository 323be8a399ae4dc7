"""The compiled passes of frame preparation (inspector.core.kernels) against the numpy and
OpenCV steps each replaces, on random frames."""

import cv2
import numpy as np

from inspector.core import kernels
from inspector.core.conditions import _any_channel, _field_keep
from inspector.core.image import _cell_grid, _kept, apply_field, clip_loss

SIZES = [(180, 320), (37, 51)]


def _masks(rng, h, w):
    """A 0/255 clip mask (dilated speckles), its channels, what the reference saturates
    and the pixels seen."""
    channels = np.where(rng.random((h, w, 3)) < 0.03, 255, 0).astype(np.uint8)
    channels = cv2.dilate(channels, np.ones((3, 3), np.uint8))
    near = _any_channel(channels)
    expected = np.where(rng.random((h, w, 3)) < 0.2, 255, 0).astype(np.uint8)
    seen = rng.random((h, w)) > 0.1
    return near, channels, expected, seen


def test_kept_cell_sums_are_opencvs_summed_area_sums_of_the_masked_frames():
    # reference: numpy's masked products summed by OpenCV's summed-area table
    # (cv2.integral), the path _CellGrid.means takes for uint8 images
    rng = np.random.default_rng(0)
    for h, w in SIZES:
        grid = _cell_grid(h, w, 4, 2.5)
        frame, ref = (rng.integers(0, 256, (h, w, 3), dtype=np.uint8) for _ in range(2))
        for keep in (rng.random((h, w, 3)) > 0.2, (rng.random((h, w)) > 0.2)[..., None]):
            got = grid.kept_means(frame, ref, keep)
            want = [grid.means(_kept(frame, keep)), grid.means(_kept(ref, keep)),
                    grid.means(keep.view(np.uint8))]
            for g, x in zip(got, want):
                assert g.shape == x.shape and np.array_equal(g, x)


def _field_keep_opencv(near, channels, expected, seen):
    """The rule as OpenCV mask operations (the code the compiled pass replaced)."""
    h, w = expected.shape[:2]
    keep = cv2.bitwise_not(expected.reshape(h, -1))
    if near is not None:
        clipped = cv2.compare(channels.reshape(h, -1), 0, cv2.CMP_GT)
        odd = _any_channel(cv2.bitwise_and(clipped, keep).reshape(h, w, 3))
        use = cv2.bitwise_not(cv2.bitwise_and(odd, near))
        keep = cv2.bitwise_and(keep, cv2.bitwise_not(clipped))
        keep = cv2.bitwise_and(keep, cv2.cvtColor(use, cv2.COLOR_GRAY2RGB).reshape(h, -1))
    if seen is not None:
        keep = cv2.bitwise_and(keep, cv2.cvtColor(seen.view(np.uint8) * np.uint8(255),
                                                  cv2.COLOR_GRAY2RGB).reshape(h, -1))
    return cv2.bitwise_and(keep, 1).reshape(h, w, 3).view(bool)


def test_field_keep_is_the_opencv_mask_rule():
    rng = np.random.default_rng(1)
    for h, w in SIZES:
        near, channels, expected, seen = _masks(rng, h, w)
        for n, c in ((near, channels), (None, None)):
            for s in (seen, None):
                assert np.array_equal(_field_keep(n, c, expected, s),
                                      _field_keep_opencv(n, c, expected, s))


def test_lost_light_is_the_numpy_arithmetic_of_clip_loss():
    # reference: the float32 numpy steps of Conditions._lost over its candidates, with
    # clip_loss (numpy's float32 mean), bit for bit
    rng = np.random.default_rng(2)
    m, levels = 4000, 8
    r = rng.uniform(150, 255, m).astype(np.float32)
    spread = np.sort(rng.normal(0, 25, (m, levels)).astype(np.float32), axis=1)
    own = clip_loss(r, spread)
    low, top = np.ascontiguousarray(spread[:, 0]), np.ascontiguousarray(spread[:, -1])
    index = rng.permutation(m * 3)[:m].astype(np.int64)
    pixel = index // 3
    near = np.where(rng.random(m) < 0.1, 255, 0).astype(np.uint8)
    img = rng.integers(100, 256, m * 3, dtype=np.uint8)
    for gain, offset in ((0.8, -5.0), (0.6, 12.0), (1.0, 0.0)):
        g, o = np.float32(gain), np.float32(offset)
        for has in (True, False):
            n = m - 7
            mean = (r[:n] - o) / g
            reach = mean + top[:n] / g >= np.float32(255.0)
            if has:
                reach &= near[pixel[:n]] == 0
                reach &= img[index[:n]] >= mean + low[:n] / g
            want = np.maximum(clip_loss(mean[reach], spread[:n][reach] / g)
                              - own[:n][reach] / g, 0.0)
            at, more = kernels.lost_light(r, spread, own, low, top, pixel, index, n, g, o,
                                          near, img, has, has)
            assert np.array_equal(at, np.flatnonzero(reach))
            assert more.dtype == want.dtype and np.array_equal(more, want)


def test_apply_field_is_opencvs_add_and_multiply():
    # reference: cv2.addWeighted (a float copy with the light added where there is some),
    # cv2.multiply to uint8 and cv2.convertScaleAbs, value for value
    rng = np.random.default_rng(3)
    for h, w in SIZES:
        cells = rng.uniform(0.3, 3.0, (max(1, h // 10), max(1, w // 10), 3)).astype(np.float32)
        field = cv2.resize(cells, (w, h), interpolation=cv2.INTER_LINEAR)
        img = rng.integers(0, 256, (h, w, 3), dtype=np.uint8)
        offset = float(rng.normal(0, 5)) / 1.3
        got, floor = apply_field(img, field, offset, floor=abs(offset))
        f = cv2.addWeighted(img, 1.0, img, 0.0, offset, dtype=cv2.CV_32F)
        assert np.array_equal(got, cv2.multiply(f, field, dtype=cv2.CV_8U))
        assert np.array_equal(floor, cv2.convertScaleAbs(field, alpha=abs(offset)))
        index = rng.permutation(img.size)[:50]
        light = rng.uniform(0, 30, 50).astype(np.float32)
        level = img.astype(np.float32)
        level.reshape(-1)[index] += light
        level += np.float32(offset)
        got, none = apply_field(img, field, offset, (index, light))
        assert none is None and np.array_equal(got, cv2.multiply(level, field, dtype=cv2.CV_8U))
