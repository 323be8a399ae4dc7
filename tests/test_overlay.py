"""Overlays and result rows say how a frame was judged: clipped areas drawn and their share
captioned, frames judged with amplified noise captioned; old results files kept readable."""

from __future__ import annotations

import csv
from collections import Counter
from dataclasses import replace
from datetime import datetime, timezone

import cv2
import numpy as np
import pytest
from scipy import ndimage
from skimage import data as skdata

from inspector.core.conditions import Conditions
from inspector.jobs.scan import noise_note, note_amplified
from inspector.storage.results import (
    COLUMNS,
    Amplified,
    FrameResult,
    ResultWriter,
    overlay_picture,
    result_caption,
)

CYAN = (255, 255, 0)  # BGR


def _result(image: np.ndarray, **kw) -> FrameResult:
    return FrameResult(frame="dock/f.jpg", camera="dock",
                       time=datetime(2026, 12, 5, 3, 0, tzinfo=timezone.utc), score=3.0,
                       threshold=2.0, p_value=0.01, version="v1", flagged=True, image=image,
                       amap=np.zeros((image.shape[0] // 4, image.shape[1] // 4), np.float32),
                       **kw)


def test_clipped_pixels_are_hatched_and_their_share_captioned():
    # scikit-image's coffee made 1.6 times brighter and clipped at 255 as a sensor clips,
    # against a baseline of the photograph as it is: the pixels with a channel at 250 or
    # more, grown by their 8 neighbours (scipy.ndimage.binary_dilation), are those whose
    # light the model sees as a prediction; the caption gives their share (numpy's mean)
    photo = cv2.resize(skdata.coffee(), (160, 106), interpolation=cv2.INTER_AREA)
    rng = np.random.default_rng(0)
    normal = np.clip(photo + rng.normal(0, 2, (6,) + photo.shape), 0, 255).astype(np.uint8)
    c = Conditions().fit(normal)
    bright = np.clip(photo.astype(np.float32) * 1.6, 0, 255).astype(np.uint8)
    rec = c.prepare(bright[None])
    expected = ndimage.binary_dilation((bright >= 250).any(axis=2), np.ones((3, 3), bool))
    assert np.hypot(*rec.shifts[0]) <= 0.05  # not moved: the mask is the frame's own
    np.testing.assert_array_equal(rec.clipped[0] > 0, expected)
    r = _result(bright, clipped=rec.clipped[0])
    share = f"{100 * expected.mean():.0f}%"
    assert f"clipped white (cyan): {share} of the view" in result_caption(r)
    assert "clipped" not in result_caption(replace(r, clipped=None))
    shown, plain = overlay_picture(r)[:424], overlay_picture(replace(r, clipped=None))[:424]
    big = cv2.resize(expected.astype(np.uint8), (640, 424),
                     interpolation=cv2.INTER_NEAREST) > 0
    changed = np.any(shown != plain, axis=2)
    # cyan lines inside the clipped area, nothing changed beyond its anti-aliased outline
    assert np.all(shown[big & changed] == CYAN, axis=1).mean() > 0.5
    assert not (changed & ~ndimage.binary_dilation(big, iterations=2)).any()
    inner = ndimage.binary_erosion(big, iterations=2) & ~np.all(shown == CYAN, axis=2)
    assert (shown[inner] == plain[inner]).all()  # between the lines, the frame not dimmed


def test_a_frame_judged_with_amplified_noise_says_so_in_its_caption_and_row(tmp_path):
    image = np.full((40, 64, 3), 90, np.uint8)
    r = _result(image, amplified=(2.12, 1.41))
    assert "judged with amplified noise: gain 2.120 over the learnt 1.410" in result_caption(r)
    assert r.noise_amplified == pytest.approx(2.12 / 1.41)  # the column: gain over learnt
    assert "amplified" not in result_caption(replace(r, amplified=None))
    # a flagged frame with a camera condition (persistence flags underexposed frames of a
    # busy camera) names it: never flagged in silence about what health.csv says of it
    dark = replace(r, health=[("underexposed", 15.0, 20.0)])
    assert "camera condition: underexposed (in health.csv)" in result_caption(dark)
    assert "camera condition" not in result_caption(r)
    barely = replace(r, frame="dock/h.jpg", amplified=(1.411, 1.41), flagged=False)
    with ResultWriter(tmp_path / "out", all_scores=tmp_path / "all.csv") as w:
        w.write([r, replace(r, frame="dock/g.jpg", amplified=None, flagged=False)])
        w.write([barely])
    with open(tmp_path / "all.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [row["noise_amplified"] for row in rows] == [f"{2.12 / 1.41:.4f}", "",
                                                        f"{1.411 / 1.41:.4f}"]
    # the summary's note: how many, by how much at most, how many by 1.5x or more
    notes = Counter()
    note_amplified(w, notes)
    assert notes == {noise_note("dock", w.amplified["dock"]): 2}
    note = next(iter(notes))
    assert "gain above 1.41, at most 1.504x that, 1 of them at 1.5x or more)" in note
    w.amplified["dock"] = Amplified()
    w.amplified["dock"].add(barely.amplified)
    assert "at most 1.001x that)" in noise_note("dock", w.amplified["dock"])


def test_a_watch_appending_to_results_written_before_a_column_adds_it(tmp_path):
    # flagged.csv as written before noise_amplified, with the baseline column still
    # under its former name ``model``: the old row keeps its values, the new one lines up
    out = tmp_path / "out"
    out.mkdir()
    old = ("frame", "camera", "time", "score", "threshold", "p_value", "model", "overlay")
    with open(out / "flagged.csv", "w", newline="") as fh:
        csv.writer(fh).writerows([old, ("dock/a.jpg", "dock", "t", "3", "2", "0.1", "v0", "")])
    r = _result(np.full((40, 64, 3), 90, np.uint8), amplified=(2.0, 1.6))
    with ResultWriter(out, append=True) as w:
        w.write([r])
    with open(out / "flagged.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert tuple(rows[0]) == COLUMNS and all(len(row) == len(COLUMNS) for row in rows)
    first, second = (dict(zip(COLUMNS, row)) for row in rows[1:])
    assert first["baseline"] == "v0" and first["noise_amplified"] == ""
    assert second["noise_amplified"] == "1.2500"


def test_overlay_is_the_plain_blend_and_hatching_drawn_over_the_whole_frame():
    # The overlay draws the heatmap and the hatching only inside the boxes where they show;
    # the picture must be the whole-frame drawing (OpenCV's applyColorMap and blendLinear
    # over every pixel, numpy's masked copies), pixel for pixel. scikit-image's astronaut
    # with a hot spot, a masked strip at the edge and a masked patch.
    from inspector.storage.overlay import COLORMAP, _lines, render_overlay

    image = cv2.resize(skdata.astronaut(), (128, 72), interpolation=cv2.INTER_AREA)
    amap = np.random.default_rng(1).normal(0, 1, (18, 32)).astype(np.float32)
    amap[5:8, 20:24] += 12.0
    mask = np.zeros((72, 128), bool)
    mask[:, :6] = mask[40:52, 60:75] = True
    got = render_overlay(image, amap, 4.0, "x", mask)
    frame = cv2.resize(cv2.cvtColor(image, cv2.COLOR_RGB2BGR), (640, 360))
    heat = cv2.resize(amap, (640, 360))
    colour = cv2.applyColorMap((np.clip(heat / heat.max(), 0, 1) * 255).astype(np.uint8),
                               COLORMAP)
    alpha = np.clip((heat - 2.0) / 4.0, 0.0, 1.0) * 0.65
    want = cv2.blendLinear(colour, frame, alpha, 1.0 - alpha)
    assert (alpha == 0).mean() > 0.5  # most of the frame shows no heat
    cv2.drawContours(want, cv2.findContours((heat > 4.0).astype(np.uint8), cv2.RETR_EXTERNAL,
                                            cv2.CHAIN_APPROX_SIMPLE)[0], -1, (255,) * 3, 2,
                     cv2.LINE_AA)
    big = cv2.resize(mask.astype(np.uint8), (640, 360), interpolation=cv2.INTER_NEAREST)
    want[big > 0] //= 2
    want[(big & _lines((360, 640), 8)) > 0] = (160, 160, 160)
    cv2.drawContours(want, cv2.findContours(big, cv2.RETR_EXTERNAL,
                                            cv2.CHAIN_APPROX_SIMPLE)[0], -1, (160,) * 3, 1,
                     cv2.LINE_AA)
    np.testing.assert_array_equal(got[:360], want)
