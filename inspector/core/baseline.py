"""A camera's baseline: a fitted density model plus its calibration, ready to score frames."""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from inspector.core.calibration import Calibration, Threshold
from inspector.core.conditions import Conditions
from inspector.core.image import grey
from inspector.core.models.base import DensityModel
from inspector.core.persistence import Persistence
from inspector.core.regimes import Regimes


@dataclass
class Scores:
    """Scores of a batch of frames.

    Attributes
    ----------
    maps : ndarray, shape (n, h, w), float32
        Anomaly maps (standardised NLL; higher = more unusual).
    scores : ndarray, shape (n,)
        Frame scores; flagged iff score > threshold.
    p_values : ndarray, shape (n,)
        Conformal p-values against the calibration scores.
    flagged : ndarray, shape (n,), bool
        Score above the threshold and no health condition (a covered lens or a moved
        camera is reported as such, not as an anomaly).
    health : list (one per frame) of lists of (condition, measure, limit)
        Camera health conditions of each frame (empty lists when all is well).
    thresholds : ndarray, shape (n,), or None
        Threshold each frame was held to (its regime's; see :mod:`inspector.core.regimes`).
    regimes : ndarray, shape (n,), int, or None
        Regime of each frame (None when the baseline has one).
    cells : ndarray, shape (n, h, w), float32, or None
        The frames' :meth:`~inspector.core.persistence.Persistence.cells`, for persistence
        (None when it does not use them).
    """

    maps: np.ndarray
    scores: np.ndarray
    p_values: np.ndarray
    flagged: np.ndarray
    health: list = field(default_factory=list)
    thresholds: np.ndarray | None = None
    regimes: np.ndarray | None = None
    cells: np.ndarray | None = None


@dataclass
class Evaluation:
    """What :meth:`Baseline.evaluate` found in a batch of frames.

    Attributes
    ----------
    images : ndarray, shape (n, H, W, 3), uint8
        The frames as given.
    raw : ndarray, shape (n, h, w), float32
        The model's raw maps of the prepared frames.
    measures : dict of str to ndarray, shape (n,), or None
        Health measures (the first frame's "frozen" not yet compared with the stream).
    grey : ndarray, shape (n, H, W), float32, or None
        Grey of the frames as captured (for the next batch's "frozen" measure).
    gains : ndarray, shape (n,), float, or None
        Gain that brought each frame to the reference
        (:attr:`~inspector.core.conditions.Prepared.gains`).
    noise : ndarray, shape (n,), float, or None
        By how much each frame's noise variance was scaled, >= 1
        (:meth:`~inspector.core.conditions.Conditions.noise_scale`).
    clipped : ndarray, shape (n, H, W), uint8, or None
        Pixels whose brightness was only bounded, 255
        (:attr:`~inspector.core.conditions.Prepared.clipped`, as aligned): the model saw a
        prediction there; None when no frame has any.
    cells : ndarray, shape (n, h, w), float32, or None
        What the baseline's persistence measures of each aligned frame
        (:meth:`~inspector.core.persistence.Persistence.cells`), when it uses them.
    """

    images: np.ndarray
    raw: np.ndarray
    measures: dict | None = None
    grey: np.ndarray | None = None
    gains: np.ndarray | None = None
    noise: np.ndarray | None = None
    clipped: np.ndarray | None = None
    cells: np.ndarray | None = None


@dataclass
class Baseline:
    """One version of a camera's normal appearance.

    Attributes
    ----------
    camera, version : str
    model : DensityModel
    calibration : Calibration
        Per-cell standardisation, calibration scores and threshold of all normal frames
        (see :func:`inspector.core.calibration.calibrate`).
    size : (int, int)
        Working (width, height).
    source_size : (int, int)
        (width, height) of the exported frames learnt from.
    mask : ndarray, shape (H, W), bool, or None
        Ignored pixels at working resolution (the user's mask and burned-in text).
    meta : dict
        Everything else recorded in the version's JSON (times, counts, settings, notes).
    """

    camera: str
    version: str
    model: DensityModel
    calibration: Calibration
    size: tuple[int, int]
    source_size: tuple[int, int]
    mask: np.ndarray | None = None
    meta: dict[str, Any] = field(default_factory=dict)
    #: Registration, photometric normalisation and health limits; None for baselines
    #: learnt without them (frames are then scored as they are).
    conditions: Conditions | None = None
    #: Appearance regimes (day/night, colour/IR) with their own standardisation and
    #: calibration; None when the camera has one (``calibration``).
    regimes: Regimes | None = None
    #: Persistence calibration (busy cameras; see :mod:`inspector.core.persistence`); None
    #: for baselines learnt without it.
    persistence: Persistence | None = None
    #: Grey of the last frame scored with ``sequence=True`` (for "frozen feed").
    _previous: np.ndarray | None = field(default=None, init=False, repr=False, compare=False)

    def continue_from(self, image: np.ndarray | None) -> "Baseline":
        """A copy whose next ``score(..., sequence=True)`` continues a stream after ``image``.

        For scoring one stretch of a camera's stream apart from the rest (a cluster task):
        the first frame is compared with ``image``, the frame just before the stretch, for a
        frozen feed, as it would be in one pass. The learned arrays are shared, not copied.

        Parameters
        ----------
        image : ndarray, shape (H, W, 3), uint8, or None
            None starts a new stream (no comparison for the first frame).
        """
        other = copy.copy(self)
        other._previous = None if image is None else grey(np.asarray(image)[None])[0]
        return other

    @property
    def threshold(self) -> Threshold:
        """The threshold of all normal frames (each regime has its own, see ``regimes``)."""
        return self.calibration.threshold

    def prepare(self, images: np.ndarray) -> np.ndarray:
        """Frames as the model sees them: aligned and normalised to the baseline's reference.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8

        Returns
        -------
        ndarray, shape (n, H, W, 3), uint8
        """
        if self.conditions is None:
            return np.asarray(images)
        return self.conditions.prepare(images).images

    def evaluate(self, images: np.ndarray, cells: bool = True) -> "Evaluation":
        """The work of :meth:`score` that needs no other batch: preparation, health
        measures and the model's raw maps. Safe to run on several batches at once (e.g.
        in the decoding threads); :meth:`judge` finishes it in stream order.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
        cells : bool
            Also measure the frames' :meth:`~inspector.core.persistence.Persistence.cells` when
            the baseline's persistence uses them; False when its persistence will not run
            on these frames (a camera whose persistence is off: nothing reads them).
        """
        images = np.asarray(images)
        if self.conditions is None:
            return Evaluation(images, self.model.score_maps(images))
        rec = self.conditions.prepare(images)
        m = self.conditions.measures(rec) if self.conditions.health else None
        noise = self.conditions.noise_scale(rec)
        raw = self.model.score_maps(rec.images, noise=noise)
        measured = (self.persistence.cells(rec.aligned, raw.shape[1:])
                    if cells and self.persistence is not None and self.persistence.change > 0
                    else None)
        return Evaluation(images, raw, m, rec.grey, rec.gains[:, 0], noise, rec.clipped,
                          measured)

    def score(self, images: np.ndarray, sequence: bool = False, cells: bool = True
              ) -> Scores:
        """Score RGB frames (n, H, W, 3) uint8 at the baseline's working size.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
        sequence : bool
            The frames continue the stream of the previous call with ``sequence=True``
            (scan and watch): the first is compared with the last of that call for a
            frozen feed.
        cells : bool
            As in :meth:`evaluate`.
        """
        return self.judge(self.evaluate(images, cells), sequence)

    def judge(self, ev: "Evaluation", sequence: bool = False) -> Scores:
        """Scores from an :meth:`evaluate` result (``sequence`` as in :meth:`score`; batches
        of one stream must be judged in order)."""
        images, raw = ev.images, ev.raw
        health: list = [[] for _ in range(len(images))]
        if ev.measures is not None:
            m = ev.measures
            if sequence and self._previous is not None and len(images):
                m["frozen"][0] = self.conditions.frozen(ev.grey[:1], self._previous[None])[0]
            health = self.conditions.conditions(m)
        if sequence and ev.grey is not None and len(images):
            self._previous = ev.grey[-1]
        healthy = np.array([not h for h in health], bool)
        groups = self.regimes.calibrations if self.regimes is not None else [self.calibration]
        labels = (self.regimes.assign(images) if self.regimes is not None and len(images)
                  else np.zeros(len(images), int))
        maps = np.empty(raw.shape, np.float32)
        scores, p_values, thresholds = (np.empty(len(raw)) for _ in range(3))
        for r in np.unique(labels):
            idx = np.flatnonzero(labels == r)
            maps[idx], scores[idx], p_values[idx] = groups[r].score(raw[idx])
            thresholds[idx] = groups[r].threshold.value
        return Scores(maps=maps, scores=scores, p_values=p_values,
                      flagged=(scores > thresholds) & healthy, health=health,
                      thresholds=thresholds,
                      regimes=labels if self.regimes is not None else None, cells=ev.cells)
