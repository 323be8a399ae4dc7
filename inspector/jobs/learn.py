"""Learning a camera's baseline from a folder of its normal frames.

Frames are put in capture-time order and split into time blocks; the model fits on all
of them and returns held-out maps (each from a model that did not see that frame's
block); the held-out maps set the per-cell standardisation and the calibration scores;
the conformal threshold follows. The result is saved as a new, active version.

Before the model sees them, frames are aligned and photometrically normalised to a
reference learnt from a sample of the normal frames (:mod:`inspector.core.conditions`); the
same sample finds burned-in text overlays, which are masked, and sets the health limits.
"""

from __future__ import annotations

import queue
import threading
from collections import Counter, deque
from collections.abc import Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from itertools import chain
from pathlib import Path

import numpy as np

import inspector
from inspector.clock import now
from inspector.config import CalibrationSettings, CameraConfig, Config, settings_dict
from inspector.core.baseline import Baseline
from inspector.core.calibration import (
    Calibration,
    Threshold,
    alarms_to_alpha,
    calibrate,
    cross_fit_maps,
    newest_blocks,
    time_blocks,
)
from inspector.core.conditions import Conditions
from inspector.core.features import map_shape, rasterize_mask
from inspector.core.image import exposure_copy, grey, noise_bank, recompress, subpixel_levels
from inspector.core.models import model_class
from inspector.core.models.base import DensityModel
from inspector.core.persistence import (
    LARGE,
    MAX_SPAN,
    STEP_CONDITIONS,
    Persistence,
    calibrate_persistence,
    cell_brightness,
    persistence_on,
)
from inspector.core.regimes import Regimes, appearance, assign, find_regimes
from inspector.core.textmask import boxes_mask, cap_boxes, find_text_boxes
from inspector.errors import UsageError
from inspector.jobs.progress import progress_bar
from inspector.storage.frames import (
    FrameFile,
    Skip,
    capture_time,
    image_size,
    iter_batches,
    jpeg_compression,
    read_settings,
    working_size,
)
from inspector.storage.store import Store, VersionFacts, describe

#: Fewer normal frames than this cannot make a baseline at all.
MIN_FRAMES = 10
#: Normal frames (spread evenly in time) that set the reference, health limits and text mask.
CONDITION_SAMPLE = 48
#: Fewest normal frames a regime (see :mod:`inspector.core.regimes`) may be calibrated on.
MIN_REGIME_FRAMES = 30
#: Frames prepared at once within a batch (bounds the temporaries of preparation: about
#: 1.1 MB a frame at 320 x 180).
PREPARE_PART = 16
#: Threads preparing batches of frames while the model learns from the ones before.
PREPARE_WORKERS = 2
#: Long side at which burned-in text is looked for (small text vanishes at working size).
TEXT_LONG_SIDE = 640
#: Frames of the condition sample decoded as exported to measure how light spreads within
#: each working pixel (:func:`inspector.core.image.subpixel_levels`).
FINE_SAMPLE = 8
#: Frames a batch of the conditions sample (decoded in parallel, a batch a thread).
SAMPLE_BATCH = 8
#: Batches of the model's first pass decoded while the conditions are learnt (the
#: conditions step leaves a core idle most of its time; 8 x 64 frames: 88 MB at 320 x 180).
AHEAD_BATCHES = 8


class FileSource:
    """A camera's normal frames on disk, decoded on demand (see ``FrameSource``).

    Parameters
    ----------
    files : sequence of FrameFile
        In capture-time order.
    blocks : ndarray, shape (N,), int
    size, source_size : (int, int)
        Working and exported (width, height).
    read_args : dict
        Arguments of :func:`inspector.storage.frames.read_frame`
        (:func:`~inspector.storage.frames.read_settings`).

    Attributes
    ----------
    skipped : dict of int to str
        Frames that failed to decode, by position, with the reason.
    """

    def __init__(self, files: Sequence[FrameFile], blocks: np.ndarray, size: tuple[int, int],
                 source_size: tuple[int, int], read_args: dict, camera: str = ""):
        self.files = list(files)
        self.blocks = np.asarray(blocks)
        self.size = size
        self.source_size = source_size
        self.read_args = read_args
        self.camera = camera
        self.skipped: dict[int, str] = {}
        self.notes: Counter[str] = Counter()
        self._ahead: tuple | None = None  # see prefetch
        #: Frames decoded before (by ``spawn(keep=True)``), by ``id`` of their file, until
        #: a read takes them (see :func:`inspector.storage.frames.iter_batches`).
        self._decoded: dict = {}
        self._keep: dict | None = None  # where this copy's decoded frames go, if anywhere

    def __len__(self) -> int:
        return len(self.files)

    def prefetch(self, indices: Sequence[int], batch_size: int = 64,
                 ahead: int = AHEAD_BATCHES) -> None:
        """Start decoding, in a thread, the first ``ahead`` batches of what
        ``batches(indices, batch_size)`` gives: the next call of :meth:`batches` with the same
        arguments takes them, then reads the rest; any other call first ends this one, and
        :meth:`stop` ends it unused. The frames' skips and notes are recorded as they are
        read."""
        self.stop()
        key = ([int(i) for i in indices], int(batch_size))
        done: queue.Queue = queue.Queue()
        halt = threading.Event()

        def run() -> None:
            # (stacked by the reader: arrays made in this thread would stay in its memory
            # arena once freed, up to 150 MB more resident for the rest of learn)
            reading = self._read(key[0][:ahead * key[1]], key[1], stack=False)
            try:
                for item in reading:
                    if halt.is_set():
                        return
                    done.put(item)
            except BaseException as exc:  # handed to the reader
                done.put(exc)
            finally:
                reading.close()
                done.put(None)  # the end

        thread = threading.Thread(target=run, name=f"{self.camera}: reading ahead",
                                  daemon=True)
        self._ahead = (key, ahead, done, halt, thread)
        thread.start()

    def stop(self) -> None:
        """End a :meth:`prefetch` not (or not fully) taken."""
        if self._ahead is not None:
            *_, halt, thread = self._ahead
            self._ahead = None
            halt.set()
            thread.join()

    def spawn(self, keep: bool = False) -> "FileSource":
        """The same frames with empty records (to read some of them elsewhere). With
        ``keep``, the frames the copy decodes are kept for this source, whose reads take
        them instead of decoding them again (a sample read before the frames' pass; at
        working size, 173 KB a frame at 320 x 180)."""
        copy = FileSource(self.files, self.blocks, self.size, self.source_size,
                          self.read_args, self.camera)
        copy._keep = self._decoded if keep else None
        return copy

    def collected(self) -> dict:
        """This copy's records, for the :meth:`absorb` of the source it was spawned from
        (picklable, as a pooled run sends them back): the frames it could not decode and
        its reading notes."""
        return {"skipped": dict(self.skipped), "notes": Counter(self.notes)}

    def absorb(self, record: dict) -> None:
        """Add a spawned copy's records."""
        self.skipped.update(record["skipped"])
        self.notes.update(record["notes"])

    def batches(self, indices: Sequence[int], batch_size: int = 64
                ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """``(positions (b,) int, frames (b, H, W, 3) uint8)`` of the frames at ``indices``
        that decode, ``batch_size`` indices a batch (see ``FrameSource``); the first batches
        from a :meth:`prefetch` of the same call when one was started, the rest read here.
        Frames that do not decode are recorded in :attr:`skipped`."""
        indices = [int(i) for i in indices]
        if self._ahead is not None and self._ahead[0] == (indices, int(batch_size)):
            _, ahead, done, _, _ = self._ahead
            try:
                while (item := done.get()) is not None:
                    if isinstance(item, BaseException):
                        raise item
                    yield item[0], np.stack(item[1])
            finally:
                self.stop()
            # the batches after those (a batch is batch_size consecutive indices, read or not)
            indices = indices[ahead * int(batch_size):]
        self.stop()
        if indices:
            yield from self._read(indices, batch_size)

    def _read(self, indices: list[int], batch_size: int, stack: bool = True
              ) -> Iterator[tuple[np.ndarray, np.ndarray | list]]:
        """The frames at ``indices`` decoded in batches (see :meth:`batches`); without
        ``stack``, each batch's frames as a list of (H, W, 3) images, to stack later."""
        pos = {id(self.files[i]): i for i in indices}
        with progress_bar(len(indices), f"{self.camera}: reading") as bar:
            for batch in iter_batches((self.files[i] for i in indices), batch_size,
                                      size=self.size, source_size=self.source_size,
                                      known=self._decoded, **self.read_args):
                bar.update(len(batch.frames) + len(batch.errors))
                for f, err in batch.errors:
                    self.skipped[pos[id(f)]] = str(err)
                for frame in batch.frames:
                    self.notes.update(frame.notes)
                    if self._keep is not None:
                        self._keep[id(frame.file)] = frame
                if batch.frames:
                    yield (np.array([pos[id(f.file)] for f in batch.frames]),
                           batch.images if stack else [f.image for f in batch.frames])


class PreparedSource:
    """A :class:`FrameSource` whose frames pass through :meth:`Conditions.prepare` first.

    With ``exposure`` > 0, every other frame (chosen at random, the same on every pass) is
    given as if caught at another exposure, darker or brighter by up to that fraction, with
    the sensor noise unchanged and highlights clipped as the sensor clips
    (:func:`inspector.core.image.exposure_copy`); the model learns from them and scores them
    for calibration alike (one stream, :meth:`batches`). A normal
    frame after an exposure step is normal, and differs from the frames learnt from by more
    than noise: its compressed colour detail is quantised anew (bench/conditions.py's
    exposure steps raised the scores of every stepped frame even with the extra noise
    learnt), so the threshold must hold for such frames too. The health measures and
    appearances are those of the frames as captured.
    Their extra noise is read from one bank of normal draws
    (:func:`inspector.core.image.noise_bank`, the same for every copy of the source) at a
    random offset per frame. ``record_appearance``: record each frame's global appearance
    (:func:`inspector.core.regimes.appearance`, for the regimes).
    ``cell_shape``: the model's map shape (h, w), to record each frame's
    :func:`~inspector.core.persistence.cell_brightness` at it (for persistence; None: not
    recorded).
    ``compression``: the exports' JPEG quantisation tables and chroma subsampling when the
    frames are learnt at their exported size (else None): the copies are then compressed
    anew as the camera compresses a frame (:func:`inspector.core.image.recompress`), since
    a frame caught at another exposure carries other block artefacts than the frames it is
    compared with, and at that size nothing averages them away.
    """

    def __init__(self, source, conditions: Conditions, exposure: float = 0.0,
                 record_appearance: bool = True, compression: tuple | None = None,
                 cell_shape: tuple[int, int] | None = None):
        self.source = source
        self.cell_shape = cell_shape
        self.conditions = conditions
        self.exposure = exposure
        self.record_appearance = record_appearance
        self.compression = compression
        self.blocks = source.blocks
        self.size = source.size
        #: Health measures of every frame prepared, by position (for the health limits).
        self.measures: dict[int, dict[str, float]] = {}
        #: Global appearance of every frame, by position (for the regimes).
        self.appearance: dict[int, np.ndarray] = {}
        #: Cell brightness of every frame, by position (for persistence).
        self.cell_brightness: dict[int, np.ndarray] = {}
        self._bank: np.ndarray | None = None  # drawn when first needed (not sent to workers)

    def __len__(self) -> int:
        return len(self.source)

    def spawn(self) -> "PreparedSource":
        """The same frames with empty records (to read some of them elsewhere)."""
        return PreparedSource(self.source.spawn(), self.conditions, self.exposure,
                              self.record_appearance, self.compression, self.cell_shape)

    def collected(self) -> dict:
        """This copy's records, for the :meth:`absorb` of the source it was spawned from
        (picklable): its frame source's, and the health measures, appearances and cell
        brightness of the frames it prepared, by position."""
        return {"source": self.source.collected(), "measures": dict(self.measures),
                "appearance": dict(self.appearance), "cell_brightness": dict(self.cell_brightness)}

    def absorb(self, record: dict) -> None:
        """Add a spawned copy's records."""
        self.source.absorb(record["source"])
        self.measures.update(record["measures"])
        self.appearance.update(record["appearance"])
        self.cell_brightness.update(record["cell_brightness"])

    def batches(self, indices: Sequence[int], batch_size: int = 64
                ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        yield from self._prepared(indices, batch_size)

    def _prepared(self, indices: Sequence[int], batch_size: int
                  ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Batches prepared in order, in :data:`PREPARE_WORKERS` threads while the caller
        works on the batch before (OpenCV and numpy release the GIL): as many batches
        ahead of it at most."""
        with ThreadPoolExecutor(PREPARE_WORKERS) as pool:
            pending: deque = deque()
            for idx, images in self.source.batches(indices, batch_size):
                pending.append(pool.submit(self._prepare_batch, idx, images))
                if len(pending) > PREPARE_WORKERS:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()

    def _noise(self) -> np.ndarray:
        """The noise bank of the darker copies (the same values in every thread and copy)."""
        if self._bank is None:
            self._bank = noise_bank(3 * self.size[0] * self.size[1])
        return self._bank

    def _prepare_batch(self, idx: np.ndarray, images: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray]:
        """One batch prepared (every other frame at another exposure when ``exposure`` >
        0), its health measures and appearance recorded. Prepared :data:`PREPARE_PART`
        frames at a time (the same frames as at once; fewer temporaries)."""
        prepared = np.empty_like(images)
        measure = self.conditions.reference_ is not None and not all(
            int(i) in self.measures for i in idx)
        previous = None  # grey of the frame before the part (for the frozen-feed measure)
        for start in range(0, len(idx), PREPARE_PART):
            part = slice(start, start + PREPARE_PART)
            draws = {}  # frames given at another exposure: their gain and random stream
            for j, i in enumerate(idx[part]):
                rng = np.random.default_rng([7, int(i)])
                if self.exposure > 0 and rng.random() < 0.5:
                    draws[j] = (1.0 + self.exposure * (2.0 * rng.random() - 1.0), rng)
            # The record of the frames as captured feeds the health measures (those given
            # at another exposure are measured, not rendered); the copies are prepared with
            # their frames' shifts and clipped pixels.
            render = np.ones(len(idx[part]), bool)
            render[list(draws)] = False
            rec = self.conditions.prepare(images[part], render=render)
            prepared[part] = rec.images
            if self.cell_shape is not None:
                for i, cells in zip(idx[part], cell_brightness(rec.aligned, self.cell_shape)):
                    self.cell_brightness[int(i)] = cells
            copies = {j: exposure_copy(images[start + j], gain, rng, rec.grey[j], self._noise())
                      for j, (gain, rng) in draws.items()}
            if self.compression is not None:
                copies = {j: recompress(c, *self.compression) for j, c in copies.items()}
            if copies:
                rows = list(copies)
                prepared[[start + j for j in rows]] = self.conditions.prepare(
                    np.stack(list(copies.values())), rec.shifts[rows],
                    None if rec.clipped is None else rec.clipped[rows]).images
            if measure:
                m = self.conditions.measures(rec, previous)
                for j, i in enumerate(idx[part]):
                    self.measures[int(i)] = {k: float(v[j]) for k, v in m.items()}
            previous = rec.grey[-1]
        if self.record_appearance and not all(int(i) in self.appearance for i in idx):
            for i, a in zip(idx, appearance(images)):
                self.appearance[int(i)] = a
        return idx, prepared


@dataclass
class LearnReport:
    """What ``learn`` did for one camera."""

    camera: str
    version: str
    frames: int
    skipped: list[Skip]
    #: The camera's threshold: its value, the rate guaranteed and any extrapolated target.
    threshold: Threshold
    warnings: list[str] = field(default_factory=list)
    seconds: float = 0.0
    #: Burned-in text boxes masked, (x0, y0, x1, y1) in pixels of the exported frames.
    text_boxes: list[tuple[int, int, int, int]] = field(default_factory=list)
    #: Other facts worth a line in the summary (alarm budget, health limits).
    notes: list[str] = field(default_factory=list)


def learn_camera(files: Sequence[FrameFile], cfg: CameraConfig, store: Store,
                 activate: bool = True, extra: dict | None = None, pool=None) -> LearnReport:
    """Build, calibrate and save a new baseline version from one camera's normal frames.

    ``pool``: an executor (e.g. :class:`inspector.jobs.cluster.ClusterPool`) in whose workers
    the model's passes over the frames run, for models whose ``fit`` takes one (PPCA).

    ``extra`` is added to the version's metadata (e.g. how many frames came from review).

    Raises
    ------
    UsageError
        Too few usable frames for the model at all (the message says how many are needed),
        or a mask image that cannot be read.
    """
    started = now()
    files, times = _in_time_order(files, cfg)
    source = _file_source(files, times, cfg)
    mask = _mask(cfg, source.source_size, source.size)
    model = model_class(cfg.model.model)(**_model_params(cfg))
    learnt = _learn(model, source, mask, times, cfg, pool)
    version = _save(learnt, cfg, store, started, activate, extra)
    return _report(learnt, cfg.name, version, (now() - started).total_seconds())


def _in_time_order(files: Sequence[FrameFile], cfg: CameraConfig
                   ) -> tuple[list[FrameFile], list]:
    """The camera's frames and their capture times, in capture-time order (stable), after
    :func:`check_camera`."""
    check_camera(files, cfg)
    times = [capture_time(f.path, cfg.frames.time_formats) for f in files]
    order = np.argsort([t.timestamp() for t in times], kind="stable")
    return [files[i] for i in order], [times[i] for i in order]


def _file_source(files: list[FrameFile], times: list, cfg: CameraConfig) -> FileSource:
    """The frames (in capture-time order, capture ``times``) as the model reads them: at
    the working size of their most common resolution, in the calibration's time blocks."""
    source_size = _common_resolution(files)
    size = working_size(source_size, cfg.frames.long_side)
    blocks = time_blocks(times, cfg.calibration.folds)
    return FileSource(files, blocks, size, source_size, read_settings(cfg.frames), cfg.name)


@dataclass(frozen=True)
class Learnt:
    """What :func:`_learn` makes of a camera's frames, for :func:`_save` and
    :func:`_report`."""

    #: The model, fitted on every frame.
    model: DensityModel
    #: The frames as read (its ``skipped`` and ``notes`` filled in by the pass).
    source: FileSource
    conditions: Conditions
    #: The model's mask, shape (H, W), bool (the configured one and the text boxes), or None.
    mask: np.ndarray | None
    #: Burned-in text boxes masked, (x0, y0, x1, y1) in exported pixels.
    text_boxes: list[tuple[int, int, int, int]]
    #: What is masked (see :func:`_conditions`), its warnings taken by the calibration.
    masking: dict
    calibrated: Calibrated

    @property
    def warnings(self) -> list[str]:
        """The warnings recorded with the version: the calibration's, then one a kind of
        note on the frames read."""
        return self.calibrated.warnings + [f"{n} frames: {note}"
                                           for note, n in self.source.notes.items()]


def _learn(model: DensityModel, source: FileSource, mask: np.ndarray | None, times: list,
           cfg: CameraConfig, pool=None) -> Learnt:
    """Learn the camera's conditions from a sample of ``source``'s frames, fit ``model`` on
    all of them prepared by those conditions, and calibrate its held-out maps (beside the
    final fit, for a model that can). Raises UsageError when the model cannot be fitted or
    calibrated (see :func:`_calibrated`)."""
    extra_args = {"pool": pool} if pool is not None and takes_pool(model) else {}
    if not extra_args and hasattr(model, "first_reads"):
        # the model's first frames decoded while the conditions are learnt (a core is idle)
        source.prefetch(*model.first_reads(source.blocks))
    try:
        conditions, text_boxes, mask, masking = _conditions(cfg, source, mask,
                                                            keep=not extra_args)
        prepared = PreparedSource(source, conditions,
                                  cfg.conditions.exposure_range
                                  if cfg.conditions.lighting != "off" else 0.0,
                                  record_appearance=cfg.calibration.regimes,
                                  compression=_compression(source.files, source.source_size,
                                                           source.size),
                                  cell_shape=map_shape(source.size[1], source.size[0],
                                                       cfg.model.patch, cfg.model.stride))
        if takes(model, "alpha"):  # held-out maps calibration would drop are not made
            extra_args["alpha"] = _planned_alpha(cfg, times)
        halves: dict = {}
        if takes(model, "beside"):  # calibrated while the final model is fitted: the
            # threshold and the (longer) regimes and persistence as two jobs
            extra_args["beside"] = [
                lambda held: halves.update(threshold=_threshold_half(
                    held, cfg, times, source, prepared, conditions, masking)),
                lambda held: halves.update(stream=_stream_half(held, cfg, times, source,
                                                               prepared))]
        held = model.fit(prepared, mask, **extra_args)
    except ValueError as exc:
        raise UsageError(f"camera {cfg.name}: cannot learn a baseline: {exc}") from None
    finally:
        source.stop()
    done = (_joined(halves["threshold"], halves["stream"]) if halves else
            _calibrated(held, cfg, times, source, prepared, conditions, masking))
    return Learnt(model, source, conditions, mask, text_boxes, masking, done)


def _save(learnt: Learnt, cfg: CameraConfig, store: Store, started, activate: bool,
          extra: dict | None) -> str:
    """Save the learnt baseline as a new version in ``store`` (active when ``activate``),
    with the facts of how it was learnt (``started``: when learn began; ``extra``: more
    metadata); returns the version."""
    done, source = learnt.calibrated, learnt.source
    facts = VersionFacts(
        created=started, frames=done.used, frames_skipped=len(source.skipped),
        first_frame_time=min(done.times), last_frame_time=max(done.times),
        settings={"frames": settings_dict(cfg.frames), "model": settings_dict(cfg.model),
                  "calibration": settings_dict(cfg.calibration),
                  "conditions": settings_dict(cfg.conditions),
                  "mask": settings_dict(cfg.mask)},
        text_boxes=learnt.text_boxes, warnings=learnt.warnings,
        extra=dict(extra or {}, masked=learnt.masking))
    baseline = Baseline(camera=cfg.name, version="", model=learnt.model,
                        calibration=done.calibration, size=source.size,
                        source_size=source.source_size, mask=learnt.mask,
                        conditions=learnt.conditions, regimes=done.regimes,
                        persistence=done.persistence)
    baseline.meta = describe(baseline, facts, inspector.__version__)
    return store.save(baseline, activate=activate)


def _report(learnt: Learnt, camera: str, version: str, seconds: float) -> LearnReport:
    """The report of a camera's learn: frames used and skipped, threshold, warnings and
    notes (the calibration's, then what is masked)."""
    done, source = learnt.calibrated, learnt.source
    skipped = [Skip(source.files[i].rel, camera, reason)
               for i, reason in sorted(source.skipped.items())]
    notes = done.notes + [_masked_note(learnt.masking)]
    if learnt.text_boxes:
        notes.append("burned-in text masked (x0, y0, x1, y1 in frame pixels): "
                     + ", ".join(str(tuple(b)) for b in learnt.text_boxes))
    return LearnReport(camera, version, done.used, skipped, done.threshold, learnt.warnings,
                       seconds, text_boxes=learnt.text_boxes, notes=notes)


@dataclass(frozen=True)
class Calibrated:
    """What :func:`_calibrated` makes of the held-out maps, for :func:`learn_camera`.

    Attributes
    ----------
    used : int
        Frames read and used (the folder's frames less those skipped).
    times : list of datetime
        Capture times of the frames used, in capture-time order.
    calibration : Calibration
        The camera's calibration (standardisation, scores, threshold).
    regimes : Regimes or None
        Lighting regimes each calibrated on its own, None when there is one.
    persistence : Persistence or None
        Persistence calibrated on the held-out maps, None when it is off.
    notes : list of str
        Lines for the learn summary (alarm budget, threshold, regimes, persistence).
    warnings : list of str
        Warnings recorded with the version (threshold, regimes, masking, persistence).
    """

    used: int
    times: list
    calibration: Calibration
    regimes: Regimes | None
    persistence: Persistence | None
    notes: list[str]
    warnings: list[str]

    @property
    def threshold(self) -> Threshold:
        """The camera's threshold (``calibration.threshold``)."""
        return self.calibration.threshold


def _calibrated(held, cfg: CameraConfig, times: list, source: FileSource,
                prepared: PreparedSource, conditions: Conditions, masking: dict) -> Calibrated:
    """The calibration of the held-out maps (threshold, regimes, persistence) once the
    model's pass over the frames is done (see :class:`Calibrated`): :func:`_threshold_half`
    then :func:`_stream_half` (beside the final fit the two run at once, see
    :func:`_learn`), :func:`_joined`. Raises UsageError when too few frames were read or the
    maps cannot be calibrated."""
    return _joined(_threshold_half(held, cfg, times, source, prepared, conditions, masking),
                   _stream_half(held, cfg, times, source, prepared))


def _threshold_half(held, cfg: CameraConfig, times: list, source: FileSource,
                    prepared: PreparedSource, conditions: Conditions, masking: dict) -> tuple:
    """The threshold half of :func:`_calibrated` (and the health limits): ``(used, times
    of the frames used, calibration, notes, warnings)``. Raises as it does."""
    camera = cfg.name
    files = source.files
    used = len(files) - len(source.skipped)
    if used < MIN_FRAMES:
        raise UsageError(f"camera {camera}: only {used} of {len(files)} normal frames could be "
                         f"read, at least {MIN_FRAMES} are needed to learn a baseline")
    if prepared.measures:  # health limits from every normal frame, not just the sample
        conditions.set_limits({k: np.array([m[k] for m in prepared.measures.values()])
                               for k in ("dark", "bright", "covered", "focus", "gain")})
    notes: list[str] = []
    good, alpha, tail = _rate(cfg, times, source, notes)
    held_blocks = source.blocks[held.index]
    try:
        calibration = calibrate(held.maps, held_blocks, alpha, tail)
    except ValueError as exc:
        raise UsageError(f"camera {camera}: cannot calibrate: {exc}") from None
    threshold = calibration.threshold
    notes.append(f"threshold from {threshold.n} calibration frames, each scored by a model of "
                 f"earlier frames only ({used - threshold.n} frames only trained); "
                 f"{threshold.describe()}" + (
                     f" (about half of them re-exposed up to +-{prepared.exposure:.0%}: for "
                     f"frames exactly as captured at most twice that rate)"
                     if prepared.exposure > 0 else ""))
    if conditions.lighting != "off" and conditions.gain_max_:  # see Conditions.noise_scale
        notes.append(f"frames darker than every normal frame (brought back with a gain above "
                     f"{conditions.gain_max_:.2f}) are scored with their sensor noise amplified "
                     f"by that gain: less sharply, and outside the guaranteed rate")
    warnings = [threshold.warning] if threshold.warning else []
    warnings += masking.pop("warnings")
    return used, good, calibration, notes, warnings


def _stream_half(held, cfg: CameraConfig, times: list, source: FileSource,
                 prepared: PreparedSource) -> tuple:
    """The regimes and persistence half of :func:`_calibrated`: ``(regimes, persistence,
    notes, warnings)``; needs nothing of the threshold half (it finds the rate the same
    way, its note left to that half)."""
    _, alpha, tail = _rate(cfg, times, source, [])
    held_blocks = source.blocks[held.index]
    notes: list[str] = []
    warnings: list[str] = []
    regimes, labels = _regimes(held, held_blocks, prepared.appearance, cfg.calibration, alpha,
                               tail, notes, warnings)
    persistence = _persistence(held, held_blocks, labels, times, alpha, cfg, notes,
                               prepared.cell_brightness, warnings)
    return regimes, persistence, notes, warnings


def _rate(cfg: CameraConfig, times: list, source: FileSource, notes: list[str]
          ) -> tuple[list, float, bool]:
    """The capture times of the frames used, the false-alarm rate their threshold is set
    for (:func:`_alpha`, with its line in ``notes``) and whether the threshold's tail is
    extrapolated."""
    cs = cfg.calibration
    good = [t for i, t in enumerate(times) if i not in source.skipped]
    alpha = _alpha(cs, cfg.name, good, notes)
    # A budget in alarms per day can ask for a rate far below what the normal frames
    # support: then the tail is extrapolated (and only 1/(n+1) is guaranteed). A plain
    # alpha keeps the exact conformal threshold (the largest score, guaranteeing 1/(n+1),
    # with a warning when frames are too few).
    return good, alpha, cs.tail_fit and cs.alarms_per_day > 0


def _joined(threshold: tuple, stream: tuple) -> Calibrated:
    """:class:`Calibrated` of the two halves' results: the threshold's notes and warnings,
    then those of the regimes and persistence."""
    used, good, calibration, notes, warnings = threshold
    regimes, persistence, more_notes, more_warnings = stream
    return Calibrated(used, good, calibration, regimes, persistence, notes + more_notes,
                      warnings + more_warnings)


def _alpha(cs: CalibrationSettings, camera: str, times: list, notes: list[str]) -> float:
    """The false-alarm rate per frame the threshold is set for: ``cs.alpha``, or with an
    alarm budget (``cs.alarms_per_day``) the rate it gives over the capture ``times`` of the
    frames used, with a line in ``notes`` on how. Raises UsageError when the budget cannot
    be made a rate."""
    if cs.alarms_per_day <= 0:
        return cs.alpha
    try:
        alpha, per_day, days = alarms_to_alpha(cs.alarms_per_day, times)
    except ValueError as exc:
        raise UsageError(f"camera {camera}: alarms_per_day is set but {exc}") from None
    notes.append(f"{cs.alarms_per_day:g} false alarms a day at {per_day:.0f} frames a day "
                 f"(counted over {days} capture day{'s' if days != 1 else ''}): "
                 f"false-alarm rate {alpha:.3g} per frame")
    return alpha


def _regimes(held, held_blocks: np.ndarray, appearances: dict, cs: CalibrationSettings,
             alpha: float, tail: bool, notes: list[str], warnings: list[str]
             ) -> tuple[Regimes | None, np.ndarray | None]:
    """The lighting regimes of the held-out frames, each calibrated on its own (see
    :mod:`inspector.core.regimes`), and the regime of each held-out map, shape (n,) int;
    (None, None) for one regime (regimes off in ``cs``; the frames' ``appearances`` by
    position not all recorded; no clear split). A line in ``notes`` names the regimes;
    ``warnings`` gets each regime's threshold warning."""
    if not (cs.regimes and cs.max_regimes > 1 and len(appearances) >= len(held.index)):
        return None, None
    feats = np.array([appearances[int(i)] for i in held.index])
    prototypes, fscale, _ = find_regimes(feats, MIN_REGIME_FRAMES, cs.max_regimes)
    if len(prototypes) <= 1:
        return None, None
    labels = assign(feats, prototypes, fscale)  # as frames are assigned at scan time
    regimes = Regimes(prototypes, fscale,
                      [calibrate(held.maps[labels == r], held_blocks[labels == r], alpha, tail)
                       for r in range(len(prototypes))])
    desc = ", ".join(f"{c.threshold.n} frames (brightness {np.expm1(p[0] * fscale[0]):.0f}, "
                     f"saturation {p[1] * fscale[1]:.2f})"
                     for c, p in zip(regimes.calibrations, prototypes))
    notes.append(f"{len(prototypes)} regimes, each calibrated on its own: {desc}")
    warnings += [f"regime {r + 1}: {c.threshold.warning}"
                 for r, c in enumerate(regimes.calibrations) if c.threshold.warning]
    return regimes, labels


def _compression(files: Sequence[FrameFile], source_size: tuple[int, int],
                 size: tuple[int, int]) -> tuple | None:
    """The exports' JPEG tables and subsampling (from the first frame that has them, of
    the first few) when the working size is the exported size, for
    :class:`PreparedSource`; None when the frames are reduced or not JPEG. (Reduced, each
    working pixel averages several exported ones and their block artefacts fade: the
    conditions bench's 320 x 180 frames learnt at long side 160 flagged 1/140 exposure
    steps of 15 % without this.)"""
    if tuple(size) != tuple(source_size):
        return None
    for f in files[:4]:
        found = jpeg_compression(f.path)
        if found is not None:
            return found
    return None


def _conditions(cfg: CameraConfig, source: FileSource, mask: np.ndarray | None,
                keep: bool = False
                ) -> tuple[Conditions, list[tuple[int, int, int, int]], np.ndarray | None, dict]:
    """Learn the camera's conditions from a sample of its normal frames (``keep``: the
    sample frames decoded are kept for ``source``'s pass over the frames, see
    :meth:`FileSource.spawn`).

    Returns the conditions, the text boxes masked (exported pixels), the model's mask
    (the user's mask with the text boxes added) and what is masked: shares of the view
    (``share``, ``text_share``, ``configured_share``), the automatic boxes left unmasked
    by the cap (``over_cap``) and ``warnings``.
    """
    cs = cfg.conditions
    n = len(source)
    sample = np.unique(np.linspace(0, n - 1, min(CONDITION_SAMPLE, n)).round().astype(int))
    # (a copy of the source: the main pass records the sample frames' skips and notes, and
    # takes the frames decoded here; in batches of SAMPLE_BATCH, decoded in parallel)
    images = np.concatenate([b for _, b in source.spawn(keep).batches(sample, SAMPLE_BATCH)] or
                            [np.zeros((0, source.size[1], source.size[0], 3), np.uint8)])
    # (one after the other: measuring the light within pixels in a thread beside the text
    # search kept its temporaries in that thread's memory arena, 70-150 MB more resident
    # for the rest of learn; the core left idle decodes the first frames instead, see
    # FileSource.prefetch)
    found_boxes, over_cap, warnings = _text_boxes(cs, source, sample, len(images))
    return _fitted(cfg, source, images, mask, _fine(cs, source, sample), found_boxes,
                   over_cap, warnings)


def _fine(cs, source: FileSource, sample: np.ndarray) -> np.ndarray | None:
    """:func:`subpixel_levels` of a few sample frames as exported; None when lighting is off
    or the frames are less than twice the working size."""
    w, h = source.size
    sw, sh = source.source_size
    if cs.lighting == "off" or sw < 2 * w or sh < 2 * h or not len(sample):
        return None
    # a few sample frames as exported: how light spreads within each working pixel
    picks = sample[np.unique(np.linspace(0, len(sample) - 1, min(FINE_SAMPLE, len(sample)))
                             .round().astype(int))]
    exported = FileSource([source.files[i] for i in picks], np.zeros(len(picks), int),
                          (sw, sh), source.source_size, source.read_args, source.camera)
    return subpixel_levels((f for _, b in exported.batches(range(len(picks)), 2) for f in b),
                           (w, h))


def _text_boxes(cs, source: FileSource, sample: np.ndarray, read: int
                ) -> tuple[list, list, list[str]]:
    """Burned-in text boxes found on the sample frames at a larger size (exported pixels),
    those left out by the cap, and the warnings; ``read``: sample frames decoded."""
    w, h = source.size
    sw, sh = source.source_size
    found_boxes: list[tuple[int, int, int, int]] = []
    over_cap: list[tuple[int, int, int, int]] = []
    warnings: list[str] = []
    if cs.auto_text_mask and read >= 3:
        long_side = min(max(sw, sh), max(TEXT_LONG_SIDE, w, h))
        big = FileSource([source.files[i] for i in sample], np.zeros(len(sample), int),
                         working_size((sw, sh), long_side), source.source_size,
                         source.read_args, source.camera)
        frames = np.concatenate([b for _, b in big.batches(range(len(sample)), SAMPLE_BATCH)]
                                or [np.zeros((0, 1, 1, 3), np.uint8)])
        if len(frames) >= 3:
            tw, th = big.size
            found = find_text_boxes(grey(frames))
            found_boxes = [(int(x0 * sw / tw), int(y0 * sh / th), int(np.ceil(x1 * sw / tw)),
                            int(np.ceil(y1 * sh / th))) for x0, y0, x1, y1 in found]
            found_boxes, over_cap = cap_boxes(found_boxes, (sw, sh), cs.text_mask_cap)
            if over_cap:
                warnings.append(
                    f"{len(over_cap)} more areas look like burned-in text but are not masked: "
                    f"the automatic text mask may cover at most {cs.text_mask_cap:.1%} of the "
                    f"view (text_mask_cap); mask them with text_boxes if they are text: "
                    + ", ".join(str(tuple(b)) for b in over_cap))
    return found_boxes, over_cap, warnings


def _fitted(cfg: CameraConfig, source: FileSource, images: np.ndarray,
            mask: np.ndarray | None, fine: np.ndarray | None, found_boxes: list,
            over_cap: list, warnings: list[str]
            ) -> tuple[Conditions, list[tuple[int, int, int, int]], np.ndarray | None, dict]:
    """The conditions fitted on the sample ``images`` with the text boxes masked; returns
    as :func:`_conditions`."""
    cs = cfg.conditions
    w, h = source.size
    sw, sh = source.source_size
    boxes: list[tuple[int, int, int, int]] = [tuple(int(round(v)) for v in b)  # type: ignore
                                              for b in cs.text_boxes]
    configured = mask
    if boxes:
        drawn = boxes_mask(boxes, (w, h), (w / sw, h / sh))
        configured = drawn if configured is None else (configured | drawn)
    boxes += found_boxes
    if boxes:
        text = boxes_mask(boxes, (w, h), (w / sw, h / sh))
        mask = text if mask is None else (mask | text)
    auto = boxes_mask(found_boxes, (w, h), (w / sw, h / sh))
    masking = {"share": float(mask.mean()) if mask is not None else 0.0,
               "text_share": float(auto.mean()),
               "configured_share": float(configured.mean()) if configured is not None else 0.0,
               "over_cap": [list(b) for b in over_cap], "warnings": warnings}
    limits = {"dark": cs.dark_level, "bright": cs.overexposed_share,
              "covered": cs.covered_share, "focus": cs.focus_ratio,
              "frozen": cs.frozen_difference}
    conditions = Conditions(lighting=cs.lighting, register=cs.register,
                            max_shift=cs.max_shift * max(w, h), health=cs.health, limits=limits)
    return conditions.fit(images, mask, fine), boxes, mask, masking


def _masked_note(masking: dict) -> str:
    """One line: the share of the view the model does not look at, and why."""
    return (f"masked: {masking['share']:.1%} of the view (automatic text mask "
            f"{masking['text_share']:.1%}, configured {masking['configured_share']:.1%})")


# --- persistence (busy cameras; see inspector.core.persistence) ---------------------------


def _persistence(held, held_blocks, labels: np.ndarray | None, times, alpha,
                 cfg: CameraConfig, notes: list[str], brightness_by_frame: dict | None = None,
                 warnings: list[str] | None = None) -> Persistence | None:
    """Calibrate persistence on the held-out maps (cross-fitted, as the single-frame
    threshold) in capture-time order and say whether the camera is busy (a line in
    ``notes``); None when the normal frames have no run long enough. ``labels``: the
    regime of each held-out map, shape (n,) int, as :func:`_calibrated` assigned them (None:
    one regime). ``brightness_by_frame``: the frames' cell brightness by position
    (:attr:`PreparedSource.cell_brightness`), used when every calibrating frame has one of
    the maps' shape. ``warnings`` gets a line for each threshold of a camera with
    persistence on that rests on one held-out window."""
    maps = np.empty(held.maps.shape, np.float32)
    groups = np.zeros(len(held.index), int) if labels is None else labels  # as scored
    # Thresholds from the blocks the single-frame calibration keeps, standardised among
    # themselves as scan maps are; how busy the camera is from all held-out frames (the
    # model scores only the blocks calibration keeps, unless regimes may need others).
    kept = np.zeros(len(held.index), bool)
    kept_maps = np.empty(held.maps.shape, np.float32)
    for r in np.unique(groups):
        mine = np.flatnonzero(groups == r)
        maps[mine] = cross_fit_maps(held.maps[mine], held_blocks[mine])
        newest = newest_blocks(held_blocks[mine], alpha)
        sel = mine[newest]
        kept[sel] = True
        # (the same maps when calibration keeps every block, as when learn scored only those)
        kept_maps[sel] = (maps[mine] if newest.all() else
                          cross_fit_maps(held.maps[sel], held_blocks[sel]))
    order = np.argsort(held.index, kind="stable")  # positions are in capture-time order
    seconds = np.array([times[int(i)].timestamp() for i in held.index[order]])
    ko = order[kept[order]]
    scanned = (kept_maps[ko], seconds[kept[order]], held_blocks[ko])
    mine = [None if brightness_by_frame is None else brightness_by_frame.get(int(i))
            for i in held.index[ko]]
    scanned_brightness = (np.stack(mine) if mine and all(
        v is not None and v.shape == held.maps.shape[1:] for v in mine) else None)
    try:
        p = calibrate_persistence(maps[order], seconds, held_blocks[order], alpha,
                                  cfg.persistence.window, scanned,
                                  footprint=max(1, cfg.model.patch // cfg.model.stride),
                                  brightness=scanned_brightness)
    except ValueError as exc:
        notes.append(f"persistence not calibrated: {exc}")
        return None
    mode = cfg.persistence.mode
    on = persistence_on(p.busy, mode)
    notes.append(_persistence_note(p, on, mode, alpha))
    if on and warnings is not None:
        warnings += [f"persistence threshold for {which} {value:.3g} rests on one held-out "
                     f"window, more than {LARGE:g}x the next ({below:.3g}): what steps up less "
                     f"than that is not flagged; more normal frames like that window's (its "
                     f"light, its traffic) would spread it"
                     for which, value, below in p.lone()]
    return p


def _persistence_note(p: Persistence, on: bool, mode: str, alpha: float) -> str:
    """Learn's note on a calibrated persistence: busy or quiet, on or off (``mode``: the
    config's), and when on, what it flags (``alpha``: the calibration's rate)."""
    apart = (f" (frames {p.span / p.window / 60:.0f} min apart: too far apart to tell passing "
             f"from staying)" if p.span > MAX_SPAN else "")
    head = (f"{'busy' if p.busy else 'quiet'} camera: {p.transient_share:.0%} of normal "
            f"frames hold large short-lived anomalies{apart}; persistence "
            f"{'on' if on else 'off'}{' (config)' if mode != 'auto' else ''}")
    if not on:
        return f"{head}: single-frame flags"
    steps = p.start_threshold is not None  # judged on the step from the frames before
    threshold = f"threshold {p.threshold.value:.3f}"
    if steps:
        threshold += (f" on the change from the {p.past} frames before, "
                      f"{p.start_threshold.value:.3f} for the first frames of a run")
    clauses = [f"flags what stays {p.window} frames ({threshold}; at least {p.floor:.3f}, the "
               f"steady level {alpha:.3g} of normal cells pass; {p.threshold.describe()} over "
               f"{p.threshold.n} windows)"]
    if p.change > 0:
        around = (", and more than around it: not a change of light over a wider region"
                  if p.settle else "")
        alike = (" (or whose cells' own brightness does)" if p.crossed == "brightness"
                 else "")
        crossed = (f", also in {p.window - 1} of {p.window + 1} frames that look alike{alike} "
                   f"where passers-by cross it in the others (calibrated with it)"
                   if p.crossed and steps else "")
        ground = (" (measured from the frames before that look as most of them do, where "
                  "passers-by cross the place in others)" if p.ground and steps else "")
        unlike = (", in a frame that looks as the window's others (by its look or its "
                  "cells' own brightness)" if p.shown == "all" and steps else "")
        clauses.append(f"a change counts where the picture changed (log brightness by more "
                       f"than {p.change:.3f}{around}){ground}{unlike}{crossed}")
    if p.settle:
        noise = (", within the frames' own noise when they are dark and it looks unlike "
                 "the normal frames" if p.settle_noise else "")
        look = (" (in a dark, noisy stretch, where the model reads it above the frames "
                "before and it looks unlike the normal frames, also how far its look "
                "departed beyond its own scatter, in units of the frames' look noise, "
                "calibrated with it)" if p.settle_look else "")
        clauses.append(f"where the picture shows a thing settled (its look and brightness "
                       f"changed, then stayed{noise}), its lowest reading of the window "
                       f"counts{look}")
    if p.robust == "change" and steps:
        clauses.append("in a noisy stretch (dark) a change counts by how far it stands out "
                       "from the view's other changes, not from its cells' scatter")
    if p.normal is not None and steps:
        light = (", and by more than the light around them changed from the normal "
                 "brightness: not a change of light over a wider region"
                 if len(p.normal) > 2 else "")
        clauses.append(f"the first frames of a run only where they look unlike the normal "
                       f"frames (further from their median look than any window of them{light})")
    clauses.append(f"frames reported {' or '.join(sorted(STEP_CONDITIONS))} are still judged, "
                   f"against the frames just before them (and stay in health.csv)")
    return f"{head}: " + "; ".join(clauses)


def learn_cameras(files: Sequence[FrameFile], config: Config, store: Store
                  ) -> Iterator[LearnReport]:
    """Learn a baseline for every camera among ``files``, in camera-name order, each with
    its own settings from ``config``; yields each camera's report as it is done."""
    for camera in sorted({f.camera for f in files}):
        yield learn_camera([f for f in files if f.camera == camera], config.camera(camera),
                           store)


def takes_pool(model) -> bool:
    """Whether a model (or model class) can fit with a pool of workers (``fit(pool=)``)."""
    return takes(model, "pool")


def takes(model, name: str) -> bool:
    """Whether a model's (or model class's) ``fit`` takes the keyword ``name``."""
    import inspect

    return name in inspect.signature(model.fit).parameters


def _planned_alpha(cfg: CameraConfig, times) -> float | None:
    """The false-alarm rate the held-out maps will be calibrated for, known before any
    frame is read (None: all held-out blocks are wanted). With an alarm budget, the rate
    of all the frames' capture times: frames that fail to decode only make the rate of the
    rest larger, which needs fewer calibration frames. Regimes calibrate each on its own
    share of the frames, which may need every block."""
    cs = cfg.calibration
    if cs.regimes and cs.max_regimes > 1:
        return None
    try:
        return _alpha(cs, cfg.name, times, [])
    except UsageError:  # (reported after the fit)
        return None


def _model_params(cfg: CameraConfig) -> dict:
    m = cfg.model
    return {"patch": m.patch, "stride": m.stride, "colour": cfg.frames.colour,
            "latent": m.latent, **({"explained_variance": m.explained_variance,
                                    "max_latent": m.max_latent, "latent_rule": m.latent_rule,
                                    "chroma_noise": m.chroma_noise}
                                   if m.model == "ppca" else {})}


def _common_resolution(files: Sequence[FrameFile]) -> tuple[int, int]:
    """The most common exported (upright) resolution among the frames, from headers only."""
    sizes = Counter(size for f in files if (size := image_size(f.path)) is not None)
    if not sizes:  # unreadable ones are recorded when decoded
        raise UsageError("none of the normal frames could be read")
    return sizes.most_common(1)[0][0]


def check_camera(files: Sequence[FrameFile], cfg: CameraConfig) -> None:
    """Raise the UsageError :func:`learn_camera` would raise before any work: too few
    frames, or a mask image that cannot be read (``learn`` checks every camera first)."""
    if len(files) < MIN_FRAMES:
        raise UsageError(f"camera {cfg.name}: {len(files)} normal frames found, at least "
                         f"{MIN_FRAMES} are needed to learn a baseline")
    _mask_image(cfg)


def _mask_image(cfg: CameraConfig) -> np.ndarray | None:
    """The camera's configured mask image (grey), None when there is none."""
    if not cfg.mask.image:
        return None
    path = Path(cfg.mask.image)
    image = None
    if path.is_file():
        import cv2

        image = cv2.imread(str(path), cv2.IMREAD_GRAYSCALE)
    if image is None:
        raise UsageError(f"[cameras.{cfg.name}] mask_image {str(path)!r} is not a readable image")
    return image


def _mask(cfg: CameraConfig, source_size: tuple[int, int], size: tuple[int, int]):
    return rasterize_mask(cfg.mask.polygons, _mask_image(cfg), source_size, size)
