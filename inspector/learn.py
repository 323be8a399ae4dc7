"""Learning a camera's baseline from a folder of its normal frames.

Frames are put in capture-time order and split into time blocks; the model fits on all
of them and returns held-out maps (each from a model that did not see that frame's
block); the held-out maps set the per-cell standardisation and the calibration scores;
the conformal threshold follows. The result is saved as a new, active version.
"""

from __future__ import annotations

import sys
from collections import Counter
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from PIL import Image
from tqdm import tqdm

import inspector
from inspector.baseline import Baseline
from inspector.calibration import conformal_threshold, time_blocks
from inspector.config import CameraConfig, settings_dict
from inspector.errors import FrameError, UsageError
from inspector.features import rasterize_mask
from inspector.frames import FrameFile, Skip, capture_time, iter_frames, working_size
from inspector.models import model_class
from inspector.scoring import anomaly_maps, frame_scores, location_stats
from inspector.store import Store

#: Fewer normal frames than this cannot make a baseline at all.
MIN_FRAMES = 10


def progress_bar(total: int | None, desc: str) -> tqdm:
    """A progress bar on stderr, silent when stderr is not a terminal."""
    return tqdm(total=total, desc=desc, unit="frame", leave=False, file=sys.stderr,
                disable=not sys.stderr.isatty(), dynamic_ncols=True)


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
        ``long_side``, ``max_pixels``, ``time_formats`` for :func:`inspector.frames.read_frame`.

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

    def __len__(self) -> int:
        return len(self.files)

    def batches(self, indices: Sequence[int], batch_size: int = 64
                ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        indices = [int(i) for i in indices]
        pos = {id(self.files[i]): i for i in indices}
        idx: list[int] = []
        imgs: list[np.ndarray] = []
        with progress_bar(len(indices), f"{self.camera}: reading") as bar:
            for f, frame in iter_frames((self.files[i] for i in indices), size=self.size,
                                        source_size=self.source_size, **self.read_args):
                bar.update()
                i = pos[id(f)]
                if isinstance(frame, FrameError):
                    self.skipped[i] = str(frame)
                    continue
                self.notes.update(frame.notes)
                idx.append(i)
                imgs.append(frame.image)
                if len(idx) == batch_size:
                    yield np.array(idx), np.stack(imgs)
                    idx, imgs = [], []
            if idx:
                yield np.array(idx), np.stack(imgs)


@dataclass
class LearnReport:
    """What ``learn`` did for one camera."""

    camera: str
    version: str
    frames: int
    skipped: list[Skip]
    threshold: float
    promised_alpha: float
    warnings: list[str] = field(default_factory=list)
    seconds: float = 0.0


def learn_camera(files: Sequence[FrameFile], cfg: CameraConfig, store: Store,
                 activate: bool = True, extra: dict | None = None) -> LearnReport:
    """Build, calibrate and save a new baseline version from one camera's normal frames.

    ``extra`` is added to the version's metadata (e.g. how many frames came from review).

    Raises
    ------
    UsageError
        Too few usable frames for the model at all (the message says how many are needed),
        or a mask image that cannot be read.
    """
    started = datetime.now(timezone.utc)
    fs = cfg.frames
    camera = cfg.name
    if len(files) < MIN_FRAMES:
        raise UsageError(f"camera {camera}: {len(files)} normal frames found, at least "
                         f"{MIN_FRAMES} are needed to learn a baseline")
    times = [capture_time(f.path, fs.time_formats) for f in files]
    order = np.argsort([t.timestamp() for t in times], kind="stable")
    files = [files[i] for i in order]
    times = [times[i] for i in order]
    source_size = _common_resolution(files)
    size = working_size(source_size, fs.long_side)
    blocks = time_blocks(times, cfg.calibration.folds)
    read_args = {"long_side": fs.long_side, "max_pixels": fs.max_pixels,
                 "time_formats": fs.time_formats}
    source = FileSource(files, blocks, size, source_size, read_args, camera)
    mask = _mask(cfg, source_size, size)
    model = model_class(cfg.model.model)(**_model_params(cfg))
    try:
        held = model.fit(source, mask)
    except ValueError as exc:
        raise UsageError(f"camera {camera}: cannot learn a baseline: {exc}") from None
    used = len(files) - len(source.skipped)
    if used < MIN_FRAMES:
        raise UsageError(f"camera {camera}: only {used} of {len(files)} normal frames could be "
                         f"read, at least {MIN_FRAMES} are needed to learn a baseline")
    center, scale = location_stats(held.maps)
    cal = frame_scores(anomaly_maps(held.maps, center, scale))
    threshold = conformal_threshold(cal, cfg.calibration.alpha)
    warnings = [threshold.warning] if threshold.warning else []
    warnings += [f"{n} frames: {note}" for note, n in source.notes.items()]
    good = [t for i, t in enumerate(times) if i not in source.skipped]
    meta = {
        "camera": camera,
        "created": started.isoformat(timespec="seconds"),
        "model": model.kind,
        "model_params": model.get_params(),
        "model_learned": model.learned(),
        "frames": used,
        "frames_skipped": len(source.skipped),
        "calibration_frames": int(len(cal)),
        "first_frame_time": min(good).isoformat(),
        "last_frame_time": max(good).isoformat(),
        "source_size": list(source_size),
        "working_size": list(size),
        "settings": {"frames": settings_dict(fs), "model": settings_dict(cfg.model),
                     "calibration": settings_dict(cfg.calibration),
                     "mask": settings_dict(cfg.mask)},
        "threshold": {"value": threshold.value, "alpha": threshold.alpha,
                      "promised": threshold.promised, "n": threshold.n,
                      "frames_short": threshold.frames_short},
        "warnings": warnings,
        "inspector_version": inspector.__version__,
        **(extra or {}),
    }
    baseline = Baseline(camera=camera, version="", model=model, center=center, scale=scale,
                        calibration_scores=cal, threshold=threshold, size=size,
                        source_size=source_size, mask=mask, meta=meta)
    version = store.save(baseline, activate=activate)
    skipped = [Skip(files[i].rel, camera, reason) for i, reason in sorted(source.skipped.items())]
    seconds = (datetime.now(timezone.utc) - started).total_seconds()
    return LearnReport(camera, version, used, skipped, threshold.value, threshold.promised,
                       warnings, seconds)


def _model_params(cfg: CameraConfig) -> dict:
    m = cfg.model
    return {"patch": m.patch, "stride": m.stride, "colour": cfg.frames.colour,
            "latent": m.latent, **({"explained_variance": m.explained_variance,
                                    "max_latent": m.max_latent} if m.model == "ppca" else {})}


def _common_resolution(files: Sequence[FrameFile]) -> tuple[int, int]:
    """The most common exported resolution among the frames (read from headers only)."""
    sizes: Counter[tuple[int, int]] = Counter()
    saved = Image.MAX_IMAGE_PIXELS
    Image.MAX_IMAGE_PIXELS = None
    try:
        for f in files:
            try:
                with Image.open(f.path) as im:
                    sizes[(int(im.size[0]), int(im.size[1]))] += 1
            except Exception:  # unreadable ones are recorded when decoded
                continue
    finally:
        Image.MAX_IMAGE_PIXELS = saved
    if not sizes:
        raise UsageError("none of the normal frames could be read")
    return sizes.most_common(1)[0][0]


def _mask(cfg: CameraConfig, source_size: tuple[int, int], size: tuple[int, int]):
    image = None
    if cfg.mask.image:
        path = Path(cfg.mask.image)
        image = None
        if path.is_file():
            import cv2

            image = cv2.imread(str(path), cv2.IMREAD_GRAYSCALE)
        if image is None:
            raise UsageError(f"[cameras.{cfg.name}] mask_image {str(path)!r} is not a readable image")
    return rasterize_mask(cfg.mask.polygons, image, source_size, size)
