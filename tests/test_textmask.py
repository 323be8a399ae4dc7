"""Burned-in text masks: they find the text that changes or stays put while the scene
jitters, and nothing else.

Scenes are photographs bundled with scikit-image and scikit-learn; text is rendered with
OpenCV's Hershey fonts in several places and sizes; moving foliage-like texture, lighting
drift, jitter and sensor noise are drawn by the scene bench (bench/scenes.py).
"""

from __future__ import annotations

import sys
from datetime import datetime, timedelta
from pathlib import Path

import cv2
import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

import scenes  # noqa: E402

from inspector.core.textmask import boxes_mask, cap_boxes, find_text_boxes  # noqa: E402
from inspector.storage.overlay import render_overlay  # noqa: E402

SIZE = (640, 360)
TEXT = (scenes.Overlay("clock", (0.03, 0.08), 0.035, 0),
        scenes.Overlay("clock", (0.52, 0.95), 0.024, 1),
        scenes.Overlay("GATE 7 NORTH", (0.70, 0.07), 0.03, 1))


def _stream(photo: str, n: int = 32, foliage=(0.0, 0.3, 0.45, 1.0)):
    """Grey frames (n, 360, 640) with burned-in text; the clocks' changing pixels and,
    for each line of text, every pixel it ever inks."""
    rng = np.random.default_rng(1)
    cam = scenes.Camera("t", photo, SIZE, TEXT, foliage)
    scene = scenes.fit_photo(scenes.photograph(photo), SIZE)
    leaves = scenes.make_leaves(rng)
    frames, inks = [], []
    for i in range(n):
        t = datetime(2026, 11, 1, 6) + timedelta(hours=7.3 * i, seconds=int(rng.integers(600)))
        layer, a = scenes.foliage_layer(SIZE, cam.foliage, rng, rng.uniform(0.2, 1.0), leaves)
        img = scene * (1 - a[..., None]) + layer * a[..., None]
        img = img * (0.8 + 0.3 * rng.random())
        dx, dy = rng.uniform(-1, 1, 2)
        img = cv2.warpAffine(img, np.float32([[1, 0, dx], [0, 1, dy]]), SIZE,
                             borderMode=cv2.BORDER_REFLECT)
        img = np.clip(img + rng.normal(0, 2.5, img.shape), 0, 255).astype(np.uint8)
        frames.append(cv2.cvtColor(scenes.burn_text(img, cam.text, t), cv2.COLOR_RGB2GRAY))
        inks.append([scenes.burn_text(np.zeros(SIZE[::-1] + (3,), np.uint8), [o], t)[..., 0] > 0
                     for o in cam.text])
    inks = np.array(inks)  # (n, lines, H, W)
    clocks = inks[:, :2].any(axis=1)
    changing = clocks.any(axis=0) & ~clocks.all(axis=0)
    return np.stack(frames).astype(np.float32), changing, inks.any(axis=0)


@pytest.mark.parametrize("photo", ["china", "coffee"])
def test_text_masks_cover_the_clocks_and_almost_nothing_else(photo):
    greys, changing, inks = _stream(photo)
    boxes = find_text_boxes(greys)
    mask = boxes_mask(boxes, SIZE)
    # Every pixel the clocks' strokes ever change is covered (criterion from issue 10), and
    # the still camera name, which stays put while the scene jitters by up to a pixel.
    assert mask[changing].mean() > 0.97
    assert mask[inks[2]].mean() > 0.97
    # Outside the three lines (their rows, with a line's height of margin) almost nothing
    # is masked: not the moving foliage, not the jittering edges of the photograph.
    lines = np.zeros_like(mask)
    for ink in inks:
        ys, xs = np.nonzero(ink)
        y0, y1, x0, x1 = ys.min(), ys.max(), xs.min(), xs.max()
        hgt = y1 - y0
        lines[max(0, y0 - hgt):y1 + hgt, max(0, x0 - 2 * hgt):x1 + 2 * hgt] = True
    assert (mask & ~lines).mean() < 0.002
    assert mask.mean() < 0.05


def test_no_text_no_mask_on_moving_foliage():
    rng = np.random.default_rng(2)
    scene = scenes.fit_photo(scenes.photograph("china"), SIZE)
    leaves = scenes.make_leaves(rng)
    frames = []
    for _ in range(24):
        layer, a = scenes.foliage_layer(SIZE, (0.0, 0.0, 1.0, 1.0), rng, 1.0, leaves)
        img = scene * (1 - a[..., None]) + layer * a[..., None]
        frames.append(cv2.cvtColor(np.clip(img + rng.normal(0, 2.5, img.shape), 0, 255)
                                   .astype(np.uint8), cv2.COLOR_RGB2GRAY))
    assert find_text_boxes(np.stack(frames).astype(np.float32)) == []


def test_cap_keeps_the_smallest_boxes_within_the_share():
    boxes = [(0, 0, 100, 100), (0, 0, 10, 10), (50, 50, 70, 60)]  # 10000, 100, 200 pixels
    kept, dropped = cap_boxes(boxes, (200, 100), 0.02)  # 400 pixels allowed
    assert kept == [(0, 0, 10, 10), (50, 50, 70, 60)] and dropped == [(0, 0, 100, 100)]
    assert cap_boxes(boxes, (200, 100), 1.0)[1] == []


def test_masked_pixels_are_dimmed_and_hatched_on_overlays():
    image = scenes.fit_photo(scenes.photograph("coffee"), (640, 360)).astype(np.uint8)
    mask = np.zeros((360, 640), bool)
    mask[10:40, 20:200] = True
    plain = render_overlay(image, np.zeros((90, 160)), 1.0, "x")
    shown = render_overlay(image, np.zeros((90, 160)), 1.0, "x", mask)
    assert (plain[:360][~mask] == shown[:360][~mask]).mean() > 0.99
    inside = shown[12:38, 22:198].astype(int)
    assert not np.array_equal(inside, plain[12:38, 22:198])
    assert np.ptp(inside[..., 0]) > 0  # hatch lines over the dimmed frame


def test_a_still_camera_name_after_the_clock_is_covered_even_over_a_scene_edge():
    # The clock and the camera's name on one line, white on a dark outline, over a bundled
    # scikit-image photograph; a steady scene edge (a shelf) runs from below the line up
    # into the name, so the columns of the name are not quiet below.
    rng = np.random.default_rng(4)
    scene = scenes.fit_photo(scenes.photograph("coffee"), SIZE).astype(np.float32)
    cv2.line(scene, (250, 64), (380, 46), (250, 250, 250), 5)
    frames, ink = [], np.zeros(SIZE[::-1], bool)
    for i in range(24):
        t = datetime(2026, 11, 1, 6) + timedelta(hours=5.3 * i, seconds=int(rng.integers(600)))
        img = np.clip(scene * (0.85 + 0.3 * rng.random()) + rng.normal(0, 2.5, scene.shape),
                      0, 255).astype(np.uint8)
        text = f"{t:%Y-%m-%d %H:%M:%S} AISLE 4"
        for colour, extra in (((0, 0, 0), 2), ((235, 235, 235), 0)):
            cv2.putText(img, text, (12, 40), cv2.FONT_HERSHEY_SIMPLEX, 0.8, colour, 2 + extra,
                        cv2.LINE_AA)
        name = np.zeros(SIZE[::-1], np.uint8)
        (w_all, _), _ = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, 0.8, 2)
        (w_time, _), _ = cv2.getTextSize(text[:-7], cv2.FONT_HERSHEY_SIMPLEX, 0.8, 2)
        cv2.putText(name, text, (12, 40), cv2.FONT_HERSHEY_SIMPLEX, 0.8, 255, 2, cv2.LINE_AA)
        ink[:, 12 + w_time:12 + w_all] |= name[:, 12 + w_time:12 + w_all] > 0
        frames.append(cv2.cvtColor(img, cv2.COLOR_RGB2GRAY))
    mask = boxes_mask(find_text_boxes(np.stack(frames).astype(np.float32)), SIZE)
    assert ink.any() and mask[ink].mean() > 0.97  # the name "AISLE 4" is masked with the clock
    assert mask.mean() < 0.05
