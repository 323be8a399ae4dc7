"""Estimator manners shared by the camera conditions and the density models, checked
against scikit-learn's own base class, and the preparation record handed to the health
measures."""

from __future__ import annotations

import numpy as np
import pytest
from skimage import data as skdata
from sklearn.base import BaseEstimator

from inspector.core.conditions import Conditions, Prepared
from inspector.core.estimator import Estimator, NotFittedError
from inspector.core.image import grey, shift_images
from inspector.core.models.ppca import PatchPPCA


class _Ours(Estimator):
    def __init__(self, alpha: float = 1.0, mode: str = "a", limits: dict | None = None):
        self.alpha = alpha
        self.mode = mode
        self.limits = limits


class _Theirs(BaseEstimator):
    def __init__(self, alpha: float = 1.0, mode: str = "a", limits: dict | None = None):
        self.alpha = alpha
        self.mode = mode
        self.limits = limits


def test_get_params_as_scikit_learn_reads_them():
    # sklearn.base.BaseEstimator.get_params reads the constructor's signature the same way
    kw = {"alpha": 0.5, "mode": "b", "limits": {"dark": 3.0}}
    assert _Ours(**kw).get_params() == _Theirs(**kw).get_params(deep=False)
    assert type(_Ours(**kw))(**_Ours(**kw).get_params()).get_params() == kw
    assert repr(_Ours(alpha=2.0)) == "_Ours(alpha=2.0, mode='a', limits=None)"


def test_models_and_conditions_share_the_base():
    m = PatchPPCA(patch=8, stride=4, latent=3)
    assert m.get_params()["latent"] == 3 and repr(m).startswith("PatchPPCA(patch=8, ")
    c = Conditions(lighting="global", limits={"dark": 10.0})
    assert c.get_params() == {"lighting": "global", "register": True, "max_shift": 8.0,
                              "health": True, "limits": {"dark": 10.0}}
    assert not c.is_fitted() and not m.is_fitted()


def _frames() -> np.ndarray:
    """Frames of the scikit-image 'astronaut' photograph (bundled), moved a little."""
    img = skdata.astronaut()[::4, ::4]  # 128 x 128 RGB
    moves = [(0.0, 0.0), (1.0, 0.0), (0.0, -1.5), (0.5, 0.5), (-1.0, 1.0), (0.0, 0.0)]
    return np.stack([shift_images(img, dx, dy) for dx, dy in moves])


def test_conditions_used_unfitted_says_so():
    c = Conditions()
    with pytest.raises(NotFittedError, match="Conditions is not fitted yet"):
        c.prepare(_frames())
    with pytest.raises(NotFittedError):
        c.to_json()


def test_learned_state_has_trailing_underscores_and_round_trips():
    frames = _frames()
    c = Conditions(limits={"dark": 15.0}).fit(frames)
    assert c.is_fitted() and c.reference_.shape == (128, 128)
    assert c.limits == {"dark": 15.0} and set(c.limits_) >= {"dark", "focus", "covered"}
    back = Conditions.from_saved(c.to_json(), c.arrays())
    assert back.limits_ == c.limits_ and back.limits == c.limits
    assert np.array_equal(back.prepare(frames).images, c.prepare(frames).images)


def test_preparation_record_feeds_the_health_measures():
    frames = _frames()
    c = Conditions().fit(frames)
    rec = c.prepare(frames[2:4])
    assert isinstance(rec, Prepared) and len(rec) == 2
    # the grey of the frames as captured (ITU-R BT.601 luma, as computed by grey())
    assert np.allclose(rec.grey, grey(frames[2:4]))
    # the shift measured by phase correlation moves the frame back onto the reference:
    # the aligned grey is the captured grey shifted by minus that shift
    dx, dy = rec.shifts[0]
    assert abs(dy - -1.5) < 0.4
    assert np.allclose(rec.aligned[0], shift_images(rec.grey[0], -dx, -dy))
    m = c.measures(rec)
    assert np.allclose(m["shift"], np.hypot(*rec.shifts.T))
    assert not any(c.conditions(m))  # normal frames: no health condition


def test_known_shifts_are_not_measured_again():
    # a darker copy of a frame (as learn varies its training frames) sits where the frame
    # sits: prepared with the frame's measured shift, it is moved back by that shift
    # exactly, as the captured frame was (same shift, same aligned grey at its gain)
    frames = _frames()
    c = Conditions().fit(frames)
    rec = c.prepare(frames[1:3])
    darker = (frames[1:3] * 0.8).astype(np.uint8)
    again = c.prepare(darker, rec.shifts)
    assert np.array_equal(again.shifts, rec.shifts)
    for k in range(2):
        dx, dy = rec.shifts[k]
        assert np.allclose(again.aligned[k], shift_images(again.grey[k], -dx, -dy))
    # and the prepared darker copy looks like the prepared frame (gain normalised away)
    assert np.abs(again.images.astype(int) - rec.images.astype(int)).mean() < 3.0


def test_learn_prepares_batches_ahead_as_it_would_at_once(monkeypatch):
    # learn prepares each batch in a worker thread, a few frames at a time: the frames,
    # their copies at other exposures and health measures (the frozen-feed measure
    # included, which compares a frame with the one before) are those of
    # Conditions.prepare and Conditions.measures on the whole batch at once
    import inspector.jobs.learn as learn
    from inspector.core.models.base import ArraySource

    frames = np.concatenate([_frames()] * 3)
    c = Conditions().fit(frames[:6])
    whole = learn.PreparedSource(ArraySource(frames), c, exposure=0.4)
    monkeypatch.setattr(learn, "PREPARE_PART", len(frames))
    at_once = list(whole.batches(range(len(frames)), 5))
    parts = learn.PreparedSource(ArraySource(frames), c, exposure=0.4)
    monkeypatch.setattr(learn, "PREPARE_PART", 2)
    in_parts = list(parts.batches(range(len(frames)), 5))
    assert len(at_once) == len(in_parts) == -(-len(frames) // 5)
    for (i1, p1), (i2, p2) in zip(at_once, in_parts):
        assert np.array_equal(i1, i2) and np.array_equal(p1, p2)
    # about half the frames are copies at another exposure, the others as prepared
    same = [np.array_equal(p[k], c.prepare(frames[i]).images[k])
            for i, p in at_once for k in range(len(i))]
    assert 0 < sum(same) < len(same)
    assert [np.array_equal(a, b) for (_, a), (_, b) in zip(
        whole.batches(range(len(frames)), 5), at_once)] == [True] * len(at_once)
    assert whole.measures == parts.measures
    m = c.measures(c.prepare(frames[:5]))
    assert [whole.measures[i]["frozen"] for i in range(5)] == list(m["frozen"])
