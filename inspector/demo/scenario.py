"""Synthetic demo scenario: two cameras at the (fictional) Larkspur Parcel Co. depot.

:func:`generate` writes a folder of JPEG frames that look like exports from two fixed
cameras, plus the ground truth needed to score a detector on them:

``dock``
    A loading dock seen from high up: painted block wall, roller dock door, window,
    concrete floor with joints and a safety line, a pallet stack and a parked trolley.
    Normal variation is daylight over the day (brightness and colour temperature), the
    overhead lights switching on and off (a step change plus local light pools), the
    camera's auto-exposure and sensor noise.
``aisle``
    A shelf aisle in perspective: racking with boxes on both sides, a polished floor and
    ceiling lights. Normal variation is slight lamp flicker (with rolling-shutter banding),
    sensor noise and an occasional small exposure step.

Every frame gets Gaussian sensor noise, a burned-in timestamp (top-left) and JPEG
compression at quality 85. Frame names carry the capture time,
``<camera>_YYYYmmdd_HHMMSS.jpg``. Normal frames come from four days of sessions that
together cover the day from early morning to late evening; the frames to scan come from a
later day, and a share of them carries one injected incident (see :data:`INCIDENTS`) with
a pixel mask of where it is.

Rendering is cheap by construction: each camera's scene (reflectance plus a few light
maps) is drawn once; a frame is a weighted sum of the pre-lit light layers, an optional
incident drawn into a small box, noise cut from a pre-drawn bank, text and encoding.
Everything is deterministic for a given ``seed`` and ``size``. Colours are handled in
OpenCV's BGR order, as floats in [0, 1], throughout.
"""

from __future__ import annotations

import csv
import math
import os
import shutil
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from datetime import date, datetime, timedelta
from pathlib import Path

import cv2
import numpy as np

from inspector.errors import UsageError

__all__ = ["CAMERAS", "INCIDENTS", "NUISANCES", "Scenario", "generate", "load_truth"]

#: Camera names, in the order they are generated.
CAMERAS = ("dock", "aisle")
#: Incident kinds injected into frames to scan.
INCIDENTS = ("parcel", "spill", "lens", "haze")
#: Keys accepted in ``generate(nuisance=...)``, with what they mean.
NUISANCES = {
    "jitter_px": "standard deviation, in pixels, of a random camera shift per frame",
    "gain": "largest relative change of a random global gain per frame (0.2 = +-20 %)",
    "ir_night": "1 switches the cameras to infrared greyscale before 8:00 and after 18:00 "
                "(an IR lamp: brighter, colourless), in normal frames and frames to scan",
    # The ones below change the frames to scan only: conditions the normal frames never showed.
    "exposure_step": "relative size of auto-exposure steps in the frames to scan: each "
                     "frame's gain is 1 +- this, plus an offset of +- 40 x this grey levels",
    "moved_px": "the camera is knocked half-way through the frames to scan: the second "
                "half is shifted this many pixels right and half as many down",
    "covered": "share of the incident-free frames to scan with the lens covered",
    "defocus": "share of the incident-free frames to scan that are out of focus",
    "frozen": "share of the incident-free frames to scan that repeat the previous frame "
              "byte for byte (a frozen feed)",
}
#: Camera condition written to ``health_truth.csv`` for each of these nuisances.
HEALTH_NUISANCES = {"covered": "lens covered", "defocus": "out of focus",
                    "frozen": "frozen feed", "moved_px": "camera moved"}
#: File (in the scenario root) listing frames to scan with a camera health condition.
HEALTH_TRUTH = "health_truth.csv"

JPEG_QUALITY = 85
#: First day of the normal frames; four consecutive days follow, then the scan day.
FIRST_DAY = date(2026, 11, 26)
#: Normal sessions: (day offset from FIRST_DAY, start hour, end hour).
NORMAL_SESSIONS = ((0, 6.5, 10.5), (1, 10.0, 14.0), (2, 13.5, 17.5), (3, 17.0, 22.5))
#: Day of the frames to scan and its sessions (start hour, end hour).
SCAN_DAY = date(2026, 11, 30)
SCAN_SESSIONS = ((7.0, 9.0), (11.5, 13.0), (15.0, 17.0), (20.5, 22.5))
#: Late-November sun at the depot, in decimal hours.
SUNRISE, SUNSET = 7.6, 16.1
#: Range of incident sizes as a fraction of the frame area (drawn log-uniformly).
INCIDENT_AREA = (0.01, 0.10)

_MARKER = ".inspector-scenario"
_MIN_SIZE = (64, 36)
_NOISE_BANK = 4
_NOISE_PAD = 24

# Reflectances (BGR).
_CARDBOARD = (0.38, 0.53, 0.67)
_YELLOW = (0.10, 0.70, 0.86)
_BLACK = (0.06, 0.06, 0.07)


@dataclass
class Scenario:
    """Where a generated scenario was written.

    Attributes
    ----------
    root : Path
        The output folder.
    normal : Path
        ``root/"normal"``: ``normal/<camera>/<files>``, frames without incidents
        (the input of ``inspector learn``).
    new : Path
        ``root/"new"``: ``new/<camera>/<files>``, frames to scan, some with incidents.
    truth : Path
        ``root/"truth.csv"`` with columns ``frame,camera,incident``; ``frame`` is the
        path relative to ``new`` with forward slashes, ``incident`` is ``"none"`` or one
        of :data:`INCIDENTS`.
    masks : Path
        ``root/"truth_masks"``: ``<camera>/<frame stem>.png``, uint8 0/255 masks at the
        frame resolution, written for incident frames only.
    """

    root: Path
    normal: Path
    new: Path
    truth: Path
    masks: Path

    @classmethod
    def at(cls, root: str | os.PathLike[str]) -> Scenario:
        """The layout of a scenario in ``root`` (nothing is read or written)."""
        root = Path(root)
        return cls(root=root, normal=root / "normal", new=root / "new",
                   truth=root / "truth.csv", masks=root / "truth_masks")


# --- public entry points ---------------------------------------------------------------


def generate(root: str | os.PathLike[str], *, seed: int = 0, normal_per_camera: int = 240,
             new_per_camera: int = 120, incident_fraction: float = 0.3,
             size: tuple[int, int] = (960, 540),
             nuisance: Mapping[str, float] | None = None) -> Scenario:
    """Render the Larkspur Parcel Co. demo scenario into ``root``.

    Parameters
    ----------
    root : path-like
        Output folder. It is created if needed. Folders ``normal``, ``new`` and
        ``truth_masks`` and ``truth.csv`` left by an earlier run of this function are
        replaced; if they exist but were not written by it, nothing is touched and
        :class:`~inspector.errors.UsageError` is raised.
    seed : int, optional
        Seed of everything random: the scene layout, the schedule, the incidents and the
        noise. The same seed and size give the same files, byte for byte.
    normal_per_camera : int, optional
        Number of normal frames per camera (at least 1), spread over four days.
    new_per_camera : int, optional
        Number of frames to scan per camera (may be 0), from a later day.
    incident_fraction : float, optional
        Share of the frames to scan that carry an incident, in [0, 1]. The incident
        kinds are spread evenly over those frames.
    size : (int, int), optional
        Frame width and height in pixels.
    nuisance : mapping, optional
        Extra camera conditions applied to normal and scanned frames alike, for testing
        robustness. Keys (see :data:`NUISANCES`): ``"jitter_px"``, the standard
        deviation of a random sub-pixel camera shift per frame; ``"gain"``, the largest
        relative random gain change per frame. ``None`` or ``{}`` adds nothing.

    Returns
    -------
    Scenario
        Paths of what was written.

    Raises
    ------
    UsageError
        For invalid arguments or an output folder holding other data.
    """
    width, height = _check_args(seed, normal_per_camera, new_per_camera, incident_fraction,
                                size)
    extra = _check_nuisance(nuisance)
    out = Scenario.at(root)
    _prepare(out)

    bank = _noise_bank(np.random.default_rng([seed, 3]), height, width)
    scenes = {}
    jobs: list[_Job] = []
    truth_rows: list[tuple[str, str, str]] = []
    for cam_index, camera in enumerate(CAMERAS):
        scene_rng = np.random.default_rng([seed, 0, cam_index])
        scenes[camera] = _BUILDERS[camera](scene_rng, width, height)
        for split, count in ((0, normal_per_camera), (1, new_per_camera)):
            jobs += _plan(camera, cam_index, split, int(count), seed, incident_fraction, extra,
                          scenes[camera], out)
        (out.normal / camera).mkdir(parents=True, exist_ok=True)
        (out.new / camera).mkdir(parents=True, exist_ok=True)
        (out.masks / camera).mkdir(parents=True, exist_ok=True)

    for job in jobs:
        if job.split == 1:
            truth_rows.append((job.path.relative_to(out.new).as_posix(), job.camera,
                               job.incident or "none"))
    health_rows = [(j.path.relative_to(out.new).as_posix(), j.camera, j.fault)
                   for j in jobs if j.fault]

    jitter = float(extra.get("jitter_px", 0.0))
    if extra.get("ir_night"):
        jobs = [replace(j, ir=not 8.0 <= _hours(j.time) < 18.0) for j in jobs]
    workers = max(1, min(4, os.cpu_count() or 1))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        for _ in pool.map(lambda j: _render(j, scenes[j.camera], bank, jitter), jobs):
            pass
    for before, job in zip(jobs, jobs[1:]):  # a frozen feed repeats the frame before
        if job.fault == "frozen feed" and before.camera == job.camera:
            job.path.write_bytes(before.path.read_bytes())
    if health_rows:
        with open(out.root / HEALTH_TRUTH, "w", newline="", encoding="utf-8") as fh:
            writer = csv.writer(fh)
            writer.writerow(("frame", "camera", "condition"))
            writer.writerows(health_rows)

    with open(out.truth, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(("frame", "camera", "incident"))
        writer.writerows(truth_rows)
    return out


def load_truth(scenario_or_root: Scenario | str | os.PathLike[str]) -> list[tuple[str, str, str]]:
    """Read a scenario's ground truth.

    Parameters
    ----------
    scenario_or_root : Scenario or path-like
        A :class:`Scenario`, its root folder, or the ``truth.csv`` file itself.

    Returns
    -------
    list of (str, str, str)
        ``(frame, camera, incident)`` per frame to scan, in file order; ``frame`` is
        relative to the ``new`` folder, ``incident`` is ``"none"`` or an incident kind.
    """
    if isinstance(scenario_or_root, Scenario):
        path = scenario_or_root.truth
    else:
        path = Path(scenario_or_root)
        if path.is_dir():
            path = path / "truth.csv"
    with open(path, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        return [(row["frame"], row["camera"], row["incident"]) for row in reader]


# --- arguments and output folder -------------------------------------------------------


def _check_args(seed, normal_per_camera, new_per_camera, incident_fraction, size):
    if not isinstance(seed, (int, np.integer)) or seed < 0:
        raise UsageError(f"seed must be a non-negative integer, got {seed!r}")
    if int(normal_per_camera) < 1 or int(new_per_camera) < 0:
        raise UsageError("need at least 1 normal frame per camera and a non-negative "
                         "number of new frames")
    if not 0.0 <= float(incident_fraction) <= 1.0:
        raise UsageError(f"incident_fraction must be in [0, 1], got {incident_fraction!r}")
    try:
        width, height = (int(v) for v in size)
    except (TypeError, ValueError):
        raise UsageError(f"size must be (width, height), got {size!r}") from None
    if width < _MIN_SIZE[0] or height < _MIN_SIZE[1]:
        raise UsageError(f"size must be at least {_MIN_SIZE[0]}x{_MIN_SIZE[1]}, "
                         f"got {width}x{height}")
    return width, height


def _check_nuisance(nuisance: Mapping[str, float] | None) -> dict[str, float]:
    if not nuisance:
        return {}
    unknown = sorted(set(nuisance) - set(NUISANCES))
    if unknown:
        raise UsageError(f"unknown nuisance {', '.join(unknown)}; known: "
                         f"{', '.join(NUISANCES)}")
    extra = {}
    for key, value in nuisance.items():
        value = float(value)
        if not math.isfinite(value) or value < 0:
            raise UsageError(f"nuisance {key} must be a non-negative number, got {value!r}")
        extra[key] = value
    if extra.get("gain", 0.0) >= 1.0:
        raise UsageError("nuisance gain must be below 1")
    return extra


def _prepare(out: Scenario) -> None:
    """Create the output folder; clear what an earlier run left, refuse foreign data."""
    out.root.mkdir(parents=True, exist_ok=True)
    ours = (out.root / _MARKER).exists()
    for path in (out.normal, out.new, out.masks, out.truth, out.root / HEALTH_TRUTH):
        if not path.exists():
            continue
        if path.is_dir() and not any(path.iterdir()):
            continue
        if not ours:
            raise UsageError(f"{path} already exists and was not written by the scenario "
                             f"generator; choose an empty output folder")
        if path.is_dir():
            shutil.rmtree(path)
        else:
            path.unlink()
    (out.root / _MARKER).write_text("written by inspector.demo.scenario.generate\n",
                                    encoding="utf-8")


# --- drawing helpers -------------------------------------------------------------------


def _smooth_noise(rng: np.random.Generator, shape: tuple[int, int], scale: float,
                  octaves: int = 1, persistence: float = 0.5) -> np.ndarray:
    """A smooth random field with zero mean and unit standard deviation.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    shape : (int, int)
        Height and width of the field.
    scale : float
        Feature size in pixels of the coarsest octave.
    octaves : int, optional
        Number of octaves, each at half the scale of the previous one.
    persistence : float, optional
        Amplitude ratio between consecutive octaves.

    Returns
    -------
    numpy.ndarray
        float32 array of ``shape``.
    """
    h, w = shape
    total = np.zeros((h, w), np.float32)
    amp = 1.0
    for _ in range(octaves):
        step = max(float(scale), 1.0)
        gh, gw = int(math.ceil(h / step)) + 3, int(math.ceil(w / step)) + 3
        grid = rng.standard_normal((gh, gw), dtype=np.float32)
        if step > 1.0:
            grid = cv2.resize(grid, (int(gw * step), int(gh * step)),
                              interpolation=cv2.INTER_CUBIC)
        oy, ox = (int(v) for v in rng.integers(0, int(step) + 1, 2))
        total += amp * grid[oy:oy + h, ox:ox + w]
        amp *= persistence
        scale /= 2.0
    std = float(total.std())
    return total / std if std > 0 else total


def _bbox(points: np.ndarray, margin: float, width: int, height: int):
    """Pixel bounding box (y0, y1, x0, x1) of ``points`` plus ``margin``, clipped."""
    x0 = max(int(math.floor(points[:, 0].min() - margin)), 0)
    x1 = min(int(math.ceil(points[:, 0].max() + margin)) + 1, width)
    y0 = max(int(math.floor(points[:, 1].min() - margin)), 0)
    y1 = min(int(math.ceil(points[:, 1].max() + margin)) + 1, height)
    return y0, y1, x0, x1


def _coverage(h: int, w: int, polys, offset=(0.0, 0.0), blur: float = 0.0) -> np.ndarray:
    """Anti-aliased coverage in [0, 1] of polygons on an ``h`` x ``w`` canvas."""
    canvas = np.zeros((h, w), np.uint8)
    ox, oy = offset
    pts = [np.round((np.asarray(p, np.float64).reshape(-1, 2) - (ox, oy)) * 16)
           .astype(np.int32) for p in polys]
    cv2.fillPoly(canvas, pts, 255, cv2.LINE_AA, shift=4)
    cover = canvas.astype(np.float32) * np.float32(1 / 255)
    if blur > 0:
        cover = cv2.GaussianBlur(cover, (0, 0), blur)
    return cover


def _paint(img: np.ndarray, polys, colour, shade: np.ndarray | None = None,
           opacity: float = 1.0, blur: float = 0.0) -> None:
    """Composite a colour into ``img`` inside polygons, in place.

    Parameters
    ----------
    img : numpy.ndarray
        (H, W, 3) float32 image.
    polys : sequence of array-like
        Polygons as (N, 2) sequences of (x, y) pixel coordinates.
    colour : sequence of 3 floats or numpy.ndarray
        A BGR colour, or a full-size (H, W, 3) colour image to copy from.
    shade : numpy.ndarray, optional
        Full-size (H, W) multiplier of the colour (texture).
    opacity : float, optional
        Peak opacity.
    blur : float, optional
        Gaussian softening of the edge, in pixels.
    """
    height, width = img.shape[:2]
    points = np.concatenate([np.asarray(p, np.float64).reshape(-1, 2) for p in polys])
    y0, y1, x0, x1 = _bbox(points, 3 * blur + 2, width, height)
    if y0 >= y1 or x0 >= x1:
        return
    alpha = _coverage(y1 - y0, x1 - x0, polys, (x0, y0), blur) * np.float32(opacity)
    if isinstance(colour, np.ndarray) and colour.ndim == 3:
        col = colour[y0:y1, x0:x1]
    else:
        col = np.asarray(colour, np.float32).reshape(1, 1, 3)
    if shade is not None:
        col = col * shade[y0:y1, x0:x1, None]
    region = img[y0:y1, x0:x1]
    region += (col - region) * alpha[..., None]


def _darken(img: np.ndarray, polys, factor: float, blur: float = 0.0) -> None:
    """Multiply ``img`` by ``factor`` inside polygons (soft-edged), in place."""
    height, width = img.shape[:2]
    points = np.concatenate([np.asarray(p, np.float64).reshape(-1, 2) for p in polys])
    y0, y1, x0, x1 = _bbox(points, 3 * blur + 2, width, height)
    if y0 >= y1 or x0 >= x1:
        return
    alpha = _coverage(y1 - y0, x1 - x0, polys, (x0, y0), blur)
    img[y0:y1, x0:x1] *= (1.0 - (1.0 - factor) * alpha)[..., None]


def _segment(p0, p1, thickness: float) -> np.ndarray:
    """The quadrilateral of a straight stroke from ``p0`` to ``p1``."""
    p0, p1 = np.asarray(p0, np.float64), np.asarray(p1, np.float64)
    d = p1 - p0
    n = np.array([-d[1], d[0]]) / max(np.hypot(*d), 1e-9) * thickness / 2
    return np.array([p0 + n, p1 + n, p1 - n, p0 - n])


def _rect(x0, y0, x1, y1) -> np.ndarray:
    return np.array([(x0, y0), (x1, y0), (x1, y1), (x0, y1)], np.float64)


def _gauss(xx: np.ndarray, yy: np.ndarray, cx: float, cy: float, sigma: float) -> np.ndarray:
    return np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * sigma * sigma)).astype(np.float32)


def _smoothstep(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


# --- scenes ----------------------------------------------------------------------------


@dataclass
class _Scene:
    """A camera's static scene: reflectance and light maps, drawn once."""

    camera: str
    #: (H, W, 3) float32 reflectance, BGR.
    albedo: np.ndarray
    #: Light maps (H, W) float32, vignetting included; a frame weights each by a BGR colour.
    maps: tuple[np.ndarray, ...]
    #: albedo * map for each map, (H, W, 3): the pre-lit layers summed per frame.
    layers: tuple[np.ndarray, ...]
    #: Mean of each layer (over pixels and channels), for the auto-exposure estimate.
    layer_means: tuple[float, ...]
    #: Where parcels and spills may be placed (free floor).
    floor: np.ndarray
    #: (y, x) coordinates of floor pixels, to draw positions from.
    floor_yx: np.ndarray
    #: Fine (pixel grain) and medium-scale texture fields (H, W), unit variance.
    fine: np.ndarray
    mid: np.ndarray

    @property
    def height(self) -> int:
        return self.albedo.shape[0]

    @property
    def width(self) -> int:
        return self.albedo.shape[1]

    def light(self, coeffs) -> np.ndarray:
        """The lit scene for per-layer BGR weights ``coeffs``, a new (H, W, 3) array."""
        # cv2.transform with a diagonal matrix scales channels several times faster than
        # numpy broadcasting over the last axis.
        out = cv2.transform(self.layers[0], np.diag(np.asarray(coeffs[0], np.float32)))
        for layer, c in zip(self.layers[1:], coeffs[1:]):
            out += cv2.transform(layer, np.diag(np.asarray(c, np.float32)))
        return out

    def illumination(self, ys: slice, xs: slice, coeffs) -> np.ndarray:
        """Light falling on a window of the scene, (h, w, 3)."""
        total = None
        for lmap, c in zip(self.maps, coeffs):
            part = lmap[ys, xs, None] * np.asarray(c, np.float32)
            total = part if total is None else total + part
        return total


def _finish_scene(camera: str, albedo: np.ndarray, maps, floor: np.ndarray,
                  fine: np.ndarray, mid: np.ndarray) -> _Scene:
    h, w = floor.shape
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    r2 = ((xx / w - 0.5) ** 2 + (yy / h - 0.5) ** 2) / 0.5
    vignette = (1.0 - 0.22 * r2).astype(np.float32)
    maps = tuple((m * vignette).astype(np.float32) for m in maps)
    np.clip(albedo, 0.0, 1.0, out=albedo)
    layers = tuple(albedo * m[..., None] for m in maps)
    means = tuple(float(layer.mean()) for layer in layers)
    floor_yx = np.argwhere(floor)
    return _Scene(camera=camera, albedo=albedo, maps=maps, layers=layers, layer_means=means,
                  floor=floor, floor_yx=floor_yx, fine=fine, mid=mid)


def _cardboard(rng: np.random.Generator) -> np.ndarray:
    """A cardboard-like BGR colour, sometimes a white or grey container instead."""
    pick = rng.random()
    if pick < 0.75:
        base = np.array(_CARDBOARD) * rng.uniform(0.8, 1.15)
        base += rng.normal(0.0, 0.025, 3)
    elif pick < 0.88:
        base = np.full(3, rng.uniform(0.72, 0.86)) + rng.normal(0.0, 0.015, 3)
    else:
        base = np.array((0.55, 0.38, 0.22)) * rng.uniform(0.7, 1.1)  # blue plastic tote
    return np.clip(base, 0.02, 0.95)


def _dock_scene(rng: np.random.Generator, width: int, height: int) -> _Scene:
    """Loading dock: wall with dock door and window, concrete floor, pallets, trolley."""
    W, H = width, height
    fine = _smooth_noise(rng, (H, W), 1.0)
    mid = _smooth_noise(rng, (H, W), 0.03 * W, octaves=2)
    coarse = _smooth_noise(rng, (H, W), 0.25 * W, octaves=2)
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
    wall_y = 0.34 * H

    # Painted block wall with mortar joints.
    albedo = np.empty((H, W, 3), np.float32)
    albedo[:] = np.array((0.63, 0.60, 0.55), np.float32)
    albedo *= (1.0 + 0.035 * mid + 0.05 * coarse + 0.02 * fine)[..., None]
    course_h = max(0.045 * H, 4.0)
    block_w = 2.0 * course_h * W / H * 0.9
    joint = max(0.8, 0.0025 * H)
    course = np.floor(yy / course_h)
    shifted = xx + (course % 2) * block_w / 2
    mortar = ((yy % course_h) < joint) | ((shifted % block_w) < joint)
    albedo[mortar & (yy < wall_y)] *= 0.88

    # Concrete floor.
    floor_shade = 1.0 + 0.07 * coarse + 0.04 * mid + 0.035 * fine
    concrete = np.array((0.50, 0.52, 0.53), np.float32)
    sel = yy >= wall_y
    albedo[sel] = concrete * floor_shade[sel][:, None]
    # Saw-cut joints converging towards a point far above the frame.
    vp = np.array((0.5 * W, -1.1 * H))
    for xb in (-0.35, 0.12, 0.5, 0.88, 1.35):
        bottom = np.array((xb * W, H))
        t = (wall_y - vp[1]) / (bottom[1] - vp[1])
        top = vp + (bottom - vp) * t
        _darken(albedo, [_segment(top, bottom, max(1.0, 0.003 * H))], 0.72, blur=0.4)
    for yj in (0.56, 0.82):
        _darken(albedo, [_segment((0, yj * H), (W, yj * H), max(1.0, 0.003 * H))], 0.72,
                blur=0.4)
    # Dark skirting along the wall foot.
    _paint(albedo, [_rect(0, 0.31 * H, W, wall_y)], (0.22, 0.23, 0.24), shade=1 + 0.05 * mid)

    # Dock leveller plate with a hazard-striped border in front of the door.
    stripes = ((xx + yy) / max(0.018 * W, 3.0)) % 2.0 < 1.0
    hazard = np.where(stripes[..., None], np.array(_YELLOW, np.float32),
                      np.array(_BLACK, np.float32)).astype(np.float32)
    plate_outer = np.array([(0.29 * W, wall_y), (0.61 * W, wall_y),
                            (0.63 * W, 0.49 * H), (0.27 * W, 0.49 * H)])
    _paint(albedo, [plate_outer], hazard, shade=1 + 0.06 * mid)
    plate = np.array([(0.31 * W, wall_y), (0.59 * W, wall_y),
                      (0.605 * W, 0.465 * H), (0.295 * W, 0.465 * H)])
    period = max(0.012 * W, 3.0)
    tread = (1.0 + 0.07 * np.sin(2 * np.pi * (xx + yy) / period)
             * np.sin(2 * np.pi * (xx - yy) / period) + 0.04 * mid)
    _paint(albedo, [plate], (0.44, 0.45, 0.46), shade=tread.astype(np.float32))

    # Roller door: ribbed steel in a dark frame, rubber bumpers either side.
    _paint(albedo, [_rect(0.285 * W, 0.025 * H, 0.615 * W, wall_y)], (0.20, 0.21, 0.22))
    ribs = (1.0 + 0.08 * np.sin(2 * np.pi * yy / max(0.02 * H, 3.0)) + 0.03 * mid
            + 0.04 * coarse)
    _paint(albedo, [_rect(0.30 * W, 0.04 * H, 0.60 * W, 0.328 * H)], (0.58, 0.58, 0.56),
           shade=ribs.astype(np.float32))
    _paint(albedo, [_rect(0.30 * W, 0.318 * H, 0.60 * W, 0.332 * H)], (0.08, 0.08, 0.08))
    for x0 in (0.245, 0.625):
        _paint(albedo, [_rect(x0 * W, 0.22 * H, (x0 + 0.03) * W, 0.32 * H)], (0.07, 0.07, 0.08),
               shade=1 + 0.05 * mid)

    # Window (its glass is lit by the sky map, see below), fire extinguisher, exit sign.
    win = (0.70 * W, 0.06 * H, 0.90 * W, 0.17 * H)
    _paint(albedo, [_rect(win[0] - 0.006 * W, win[1] - 0.01 * H, win[2] + 0.006 * W,
                          win[3] + 0.01 * H)], (0.25, 0.25, 0.26))
    glass = [_rect(win[0], win[1], 0.797 * W, win[3]), _rect(0.803 * W, win[1], win[2], win[3])]
    _paint(albedo, glass, (0.95, 0.93, 0.90))
    _paint(albedo, [_rect(0.945 * W, 0.19 * H, 0.962 * W, 0.285 * H)], (0.10, 0.10, 0.72),
           shade=1 + 0.05 * mid)
    _paint(albedo, [_rect(0.14 * W, 0.08 * H, 0.205 * W, 0.125 * H)], (0.30, 0.62, 0.15))
    _paint(albedo, [_rect(0.15 * W, 0.09 * H, 0.195 * W, 0.115 * H)], (0.85, 0.88, 0.86))

    # Painted safety line across the floor, a little worn.
    wear = np.clip(1.0 - 0.35 * np.maximum(mid, 0), 0.4, 1.0).astype(np.float32)
    _paint(albedo, [_rect(0, 0.525 * H, W, 0.54 * H)], _YELLOW, shade=wear, opacity=0.9)

    # Pallet stack on the left: slatted top, dark gaps in the front.
    objects = np.zeros((H, W), np.float32)
    px0, px1, ptop, pfront, pbot = 0.03 * W, 0.21 * W, 0.40 * H, 0.50 * H, 0.58 * H
    _darken(albedo, [_rect(px0 + 0.01 * W, ptop + 0.02 * H, px1 + 0.025 * W, pbot + 0.025 * H)],
            0.55, blur=0.012 * W)
    wood = np.array((0.38, 0.56, 0.68))
    _paint(albedo, [_rect(px0, pfront, px1, pbot)], wood * 0.8, shade=1 + 0.06 * mid)
    for k in range(3):
        y = pfront + (k + 0.5) * (pbot - pfront) / 3
        for xg in np.linspace(px0 + 0.02 * W, px1 - 0.045 * W, 3):
            _paint(albedo, [_rect(xg, y - 0.008 * H, xg + 0.025 * W, y + 0.008 * H)],
                   (0.05, 0.05, 0.05))
    for k, y in enumerate(np.linspace(ptop, pfront, 8, endpoint=False)):
        tone = 1.0 + (0.06 if k % 2 else -0.04) + rng.normal(0, 0.03)
        _paint(albedo, [_rect(px0, y, px1, y + (pfront - ptop) / 8 * 0.8)], wood * tone,
               shade=1 + 0.08 * mid + 0.04 * fine)
    objects += _coverage(H, W, [_rect(px0, ptop, px1 + 0.03 * W, pbot + 0.03 * H)])

    # Parked platform trolley on the right, with its shadow, handle and wheels.
    tx0, tx1, ty0, ty1 = 0.64 * W, 0.84 * W, 0.62 * H, 0.80 * H
    _darken(albedo, [_rect(tx0 + 0.01 * W, ty0 + 0.03 * H, tx1 + 0.02 * W, ty1 + 0.04 * H)],
            0.5, blur=0.01 * W)
    for wx, wy in ((tx0 + 0.015 * W, ty1 + 0.01 * H), (tx1 - 0.015 * W, ty1 + 0.01 * H)):
        cv2.ellipse(albedo, (int(wx), int(wy)), (max(2, int(0.012 * W)), max(1, int(0.018 * H))),
                    0, 0, 360, (0.04, 0.04, 0.04), -1)
    _paint(albedo, [_rect(tx0, ty0, tx1, ty1)], (0.30, 0.26, 0.20))
    deck = (1.0 + 0.05 * mid + 0.06 * np.sign(np.sin(2 * np.pi * yy / max(0.012 * H, 2.0))))
    _paint(albedo, [_rect(tx0 + 0.008 * W, ty0 + 0.012 * H, tx1 - 0.008 * W, ty1 - 0.012 * H)],
           (0.50, 0.34, 0.20), shade=deck.astype(np.float32))
    tube = max(1.5, 0.008 * W)
    hx = tx1 - 0.012 * W
    for seg in (((hx, ty0 + 0.01 * H), (hx + 0.01 * W, 0.50 * H)),
                ((hx, ty1 - 0.01 * H), (hx + 0.01 * W, 0.68 * H)),
                ((hx + 0.01 * W, 0.50 * H), (hx + 0.01 * W, 0.68 * H))):
        _paint(albedo, [_segment(*seg, tube)], (0.16, 0.16, 0.17))
    objects += _coverage(H, W, [_rect(tx0 - 0.01 * W, 0.49 * H, tx1 + 0.03 * W, ty1 + 0.05 * H)])

    # Light maps: daylight (window side), overhead lamps (pools on the floor), fill.
    sky = (0.45 + 0.35 * np.exp(-((xx / W - 0.8) ** 2 / 0.08 + (yy / H - 0.12) ** 2 / 0.5))
           + 0.15 * (1.0 - yy / H)).astype(np.float32)
    sky += 0.18 * _coverage(H, W, [np.array([(0.62 * W, 0.45 * H), (0.86 * W, 0.45 * H),
                                             (0.95 * W, 0.70 * H), (0.66 * W, 0.70 * H)])],
                            blur=0.04 * W)
    glass_cover = _coverage(H, W, glass)
    sky = sky * (1 - glass_cover) + 2.4 * glass_cover
    sigma = 0.13 * W
    lamps = 0.22 + 0.85 * (_gauss(xx, yy, 0.20 * W, 0.62 * H, sigma)
                           + _gauss(xx, yy, 0.52 * W, 0.68 * H, sigma)
                           + _gauss(xx, yy, 0.84 * W, 0.58 * H, sigma))
    lamps = np.where(yy < wall_y, lamps * 0.75, lamps).astype(np.float32)
    lamps = lamps * (1 - glass_cover) + 0.08 * glass_cover
    fill = (1.0 - 0.8 * glass_cover).astype(np.float32)

    floor = (yy > wall_y + 0.02 * H) & (objects < 0.01) & (yy < H - 2)
    return _finish_scene("dock", albedo, (sky, lamps, fill), floor, fine, mid)


def _aisle_scene(rng: np.random.Generator, width: int, height: int) -> _Scene:
    """Shelf aisle in perspective: racking with boxes both sides, floor, ceiling lights."""
    W, H = width, height
    fine = _smooth_noise(rng, (H, W), 1.0)
    mid = _smooth_noise(rng, (H, W), 0.03 * W, octaves=2)
    coarse = _smooth_noise(rng, (H, W), 0.25 * W, octaves=2)
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
    vpx, vpy = 0.5 * W + rng.uniform(-0.02, 0.02) * W, 0.33 * H
    near_base, near_top, near_x = 1.0 * H, -0.30 * H, 0.10 * W   # left rack at depth z = 1

    def x_at(z: float, side: int) -> float:          # rack face x at depth z (side -1 / +1)
        return vpx + side * (vpx - near_x) / z

    def y_at(z: float, level: float) -> float:       # height level 0 (floor) .. 1 (rack top)
        base = vpy + (near_base - vpy) / z
        top = vpy + (near_top - vpy) / z
        return base + level * (top - base)

    albedo = np.empty((H, W, 3), np.float32)
    albedo[:] = np.array((0.24, 0.24, 0.26), np.float32)           # ceiling
    albedo *= (1.0 + 0.04 * coarse + 0.02 * fine)[..., None]
    z_far = 4.0
    # Back wall with a dark doorway.
    bx0, bx1 = x_at(z_far, -1), x_at(z_far, 1)
    ceiling_drop = 0.8 * H            # how far the ceiling is above the camera, in image rows
    _paint(albedo, [_rect(bx0, vpy - ceiling_drop / z_far, bx1, y_at(z_far, 0.0))],
           (0.60, 0.62, 0.62), shade=1 + 0.04 * coarse)
    dw = (bx1 - bx0) * 0.22
    _paint(albedo, [_rect(vpx - dw, y_at(z_far, 0.48), vpx + dw, y_at(z_far, 0.0))],
           (0.09, 0.09, 0.10))
    # Floor with lane lines and a lighter polished strip down the middle.
    floor_poly = np.array([(-0.2 * W, H), (1.2 * W, H), (bx1, y_at(z_far, 0.0)),
                           (bx0, y_at(z_far, 0.0))])
    depth = np.clip((yy - vpy) / (H - vpy), 1e-3, None)
    polish = np.exp(-((xx - vpx) / (0.18 * W * depth)) ** 2)
    floor_shade = (1.0 + 0.06 * coarse + 0.03 * mid + 0.03 * fine + 0.18 * polish)
    _paint(albedo, [floor_poly], (0.46, 0.49, 0.47), shade=floor_shade.astype(np.float32))
    worn = np.clip(1.0 - 0.3 * np.maximum(mid, 0), 0.5, 1).astype(np.float32)

    def lane(z: float, side: int, dx: float) -> tuple[float, float]:   # lane line on the floor
        return vpx + side * (vpx - near_x) * 0.8 / z + dx / z, y_at(z, 0.0)

    half = 0.006 * W
    for side in (-1, 1):
        _paint(albedo, [np.array([lane(0.7, side, -half), lane(0.7, side, half),
                                  lane(z_far, side, half), lane(z_far, side, -half)])],
               _YELLOW, shade=worn, opacity=0.85)

    # Ceiling light fixtures (their lamp map is very high, so they saturate).
    fixtures = []
    for z in (2.5, 2.9, 3.35):
        yc = vpy - ceiling_drop / z
        half_w, half_h = 0.12 * W / z, 0.03 * H / z + 0.5
        fixtures.append(_rect(vpx - half_w, yc - half_h, vpx + half_w, yc + half_h))
    _paint(albedo, fixtures, (0.95, 0.95, 0.95))

    # Racking on both sides.
    beam_colour = np.array((0.10, 0.42, 0.88))       # orange beams
    upright_colour = np.array((0.52, 0.30, 0.12))    # blue uprights
    levels = (0.0, 0.07, 0.34, 0.62, 0.90)
    for side in (-1, 1):
        edge_x = 0.0 if side < 0 else float(W)
        z0 = abs(vpx - near_x) / abs(vpx - edge_x) * 0.98   # the rack reaches the frame edge
        # Dark back of the shelves.
        face = np.array([(x_at(z0, side), y_at(z0, 0.0)), (x_at(z_far, side), y_at(z_far, 0.0)),
                         (x_at(z_far, side), y_at(z_far, 1.0)), (x_at(z0, side), y_at(z0, 1.0))])
        _paint(albedo, [face], (0.08, 0.08, 0.09), shade=1 + 0.1 * mid)
        uprights = np.arange(z0, z_far + 1e-6, 0.9)
        # Boxes on each level between the beams.
        for li in range(1, len(levels) - 1):
            lo, hi = levels[li], levels[li + 1]
            z = z0 + rng.uniform(0.0, 0.06)
            while z < z_far:
                span = rng.uniform(0.12, 0.32)
                gap = rng.uniform(0.01, 0.05)
                if rng.random() < 0.12:                 # an empty slot
                    z += span + gap
                    continue
                za, zb = z, min(z + span, z_far)
                top = lo + (hi - lo) * rng.uniform(0.45, 0.88)
                base = lo + 0.02
                colour = _cardboard(rng)
                poly = np.array([(x_at(za, side), y_at(za, base)),
                                 (x_at(zb, side), y_at(zb, base)),
                                 (x_at(zb, side), y_at(zb, top)),
                                 (x_at(za, side), y_at(za, top))])
                _paint(albedo, [poly], colour, shade=1 + 0.05 * mid + 0.02 * fine)
                # A label on some boxes.
                if rng.random() < 0.5 and zb - za > 0.12:
                    la, lb = za + 0.3 * (zb - za), za + 0.6 * (zb - za)
                    l0, l1 = base + 0.35 * (top - base), base + 0.6 * (top - base)
                    _paint(albedo, [np.array([(x_at(la, side), y_at(la, l0)),
                                              (x_at(lb, side), y_at(lb, l0)),
                                              (x_at(lb, side), y_at(lb, l1)),
                                              (x_at(la, side), y_at(la, l1))])],
                           (0.90, 0.92, 0.92))
                z += span + gap
        # Beams (front edge of each level) and uprights.
        for level in levels[1:]:
            thick = 0.025
            beam = np.array([(x_at(z0, side), y_at(z0, level)),
                             (x_at(z_far, side), y_at(z_far, level)),
                             (x_at(z_far, side), y_at(z_far, level - thick)),
                             (x_at(z0, side), y_at(z0, level - thick))])
            _paint(albedo, [beam], beam_colour, shade=1 + 0.04 * mid)
        for z in uprights:
            w_half = 0.012 * W / z
            xu = x_at(z, side)
            post = np.array([(xu - w_half, y_at(z, 0.0)), (xu + w_half, y_at(z, 0.0)),
                             (xu + w_half, y_at(z, 1.0)), (xu - w_half, y_at(z, 1.0))])
            _paint(albedo, [post], upright_colour, shade=1 + 0.04 * mid)

    # Light maps: ceiling lamps down the aisle, and a weak fill.
    fixture_cover = _coverage(H, W, fixtures, blur=0.6)
    lamps = (0.70 + 0.40 * np.exp(-((xx - vpx) / (0.38 * W)) ** 2)
             - 0.12 * np.clip((vpy - yy) / H, 0, 1) + 0.08 * coarse * 0.3).astype(np.float32)
    lamps = lamps * (1 - fixture_cover) + 3.0 * fixture_cover
    fill = np.ones((H, W), np.float32)

    floor_cover = _coverage(H, W, [floor_poly])
    # Free floor: inside the floor polygon and between the rack bases.
    left_edge = vpx + (near_x - vpx) * (yy - vpy) / (near_base - vpy)
    right_edge = 2 * vpx - left_edge
    floor = ((floor_cover > 0.99) & (xx > left_edge + 0.01 * W) & (xx < right_edge - 0.01 * W)
             & (yy > y_at(z_far, 0.0) + 2) & (yy < H - 2))
    return _finish_scene("aisle", albedo, (lamps, fill), floor, fine, mid)


_BUILDERS: dict[str, Callable[[np.random.Generator, int, int], _Scene]] = {
    "dock": _dock_scene,
    "aisle": _aisle_scene,
}


# --- conditions over time --------------------------------------------------------------


@dataclass(frozen=True)
class _Conditions:
    """How one frame is lit and exposed."""

    #: BGR weight of each light layer of the scene, exposure gain included.
    coeffs: tuple[tuple[float, float, float], ...]
    #: Sensor noise standard deviation in 8-bit levels.
    sigma: float
    #: Rolling-shutter flicker band: (amplitude, period in rows, phase) or None.
    band: tuple[float, float, float] | None
    #: Approximate mean brightness of the frame in [0, 1].
    level: float


def _hours(t: datetime) -> float:
    return t.hour + t.minute / 60 + t.second / 3600


class _DockWeather:
    """Daylight and lamp schedule of the dock, with per-day randomness."""

    def __init__(self, rng: np.random.Generator):
        self.rng = rng
        self.days: dict[date, tuple] = {}

    def _day(self, day: date):
        if day not in self.days:
            r = np.random.default_rng([day.toordinal(), int(self.rng.integers(2**31))])
            clear = r.uniform(0.55, 1.0)
            waves = [(r.uniform(0.02, 0.07), r.uniform(0.6, 3.0), r.uniform(0, 2 * np.pi))
                     for _ in range(3)]
            lamps_off_morning = 8.1 + r.normal(0, 0.25)
            lamps_on_evening = 15.6 + r.normal(0, 0.25)
            lamps_off_night = 21.8 + r.normal(0, 0.2)
            self.days[day] = (clear, waves, lamps_off_morning, lamps_on_evening,
                              lamps_off_night)
        return self.days[day]

    def conditions(self, t: datetime, scene: _Scene, gain_jitter: float) -> _Conditions:
        clear, waves, off_morning, on_evening, off_night = self._day(t.date())
        h = _hours(t)
        if SUNRISE < h < SUNSET:
            elevation = math.sin(math.pi * (h - SUNRISE) / (SUNSET - SUNRISE))
        else:
            elevation = 0.0
        clouds = 1.0 + sum(a * math.sin(2 * math.pi * h / p + ph) for a, p, ph in waves)
        twilight = 0.07 * math.exp(-min(abs(h - SUNRISE), abs(h - SUNSET)) / 0.4)
        sky = 2.2 * clear * elevation ** 0.7 * clouds + twilight
        warm = 1.0 - elevation ** 0.5                     # low sun and dusk are warmer
        noon, low = np.array((1.05, 1.0, 0.95)), np.array((0.72, 0.90, 1.12))
        sky_tint = noon + (low - noon) * warm
        lamps_on = h < off_morning or on_evening <= h < off_night
        lamp = 0.95 if lamps_on else 0.0
        lamp_tint = np.array((0.86, 0.97, 1.08))
        fill = 0.045
        raw = (sky * sky_tint, lamp * lamp_tint, np.full(3, fill))
        level = sum(float(c.mean()) * m for c, m in zip(raw, scene.layer_means))
        gain = float(np.clip((0.40 / max(level, 1e-3)) ** 0.6, 0.8, 3.0))   # auto-exposure
        gain *= 1.0 + self.rng.uniform(-gain_jitter, gain_jitter) if gain_jitter else 1.0
        coeffs = tuple(tuple(float(v) for v in c * gain) for c in raw)
        sigma = 1.6 * gain ** 0.8
        return _Conditions(coeffs=coeffs, sigma=sigma, band=None, level=level * gain)


class _AisleLamps:
    """Fluorescent lighting of the aisle: flicker and occasional exposure steps."""

    def __init__(self, rng: np.random.Generator):
        self.rng = rng
        self.exposure = 1.0

    def conditions(self, t: datetime, scene: _Scene, gain_jitter: float) -> _Conditions:
        rng = self.rng
        if rng.random() < 0.07:
            self.exposure = rng.uniform(0.93, 1.07) if self.exposure == 1.0 else 1.0
        gain = self.exposure * (1.0 + rng.normal(0.0, 0.006))
        if gain_jitter:
            gain *= 1.0 + rng.uniform(-gain_jitter, gain_jitter)
        lamp = np.array((1.03, 1.0, 0.96)) * gain
        fill = np.full(3, 0.06) * gain
        band = (rng.uniform(0.004, 0.012), scene.height * rng.uniform(0.3, 0.5),
                rng.uniform(0.0, 2 * np.pi))
        level = (float(lamp.mean()) * scene.layer_means[0]
                 + float(fill.mean()) * scene.layer_means[1])
        coeffs = (tuple(float(v) for v in lamp), tuple(float(v) for v in fill))
        return _Conditions(coeffs=coeffs, sigma=2.0, band=band, level=level)


_WEATHER = {"dock": _DockWeather, "aisle": _AisleLamps}


def _schedule(rng: np.random.Generator, count: int, split: int) -> list[datetime]:
    """Capture times: ``count`` frames spread over the sessions of a split, sorted."""
    if split == 0:
        sessions = [(FIRST_DAY + timedelta(days=d), a, b) for d, a, b in NORMAL_SESSIONS]
    else:
        sessions = [(SCAN_DAY, a, b) for a, b in SCAN_SESSIONS]
    lengths = np.array([b - a for _, a, b in sessions])
    share = lengths / lengths.sum() * count
    per = np.floor(share).astype(int)
    for i in np.argsort(-(share - per))[: count - per.sum()]:
        per[i] += 1
    times: list[datetime] = []
    for (day, a, b), n in zip(sessions, per):
        if n == 0:
            continue
        step = (b - a) * 3600 / n
        start = datetime(day.year, day.month, day.day)
        offsets = (np.arange(n) + 0.5 + rng.uniform(-0.3, 0.3, n)) * step + a * 3600
        stamps = [start + timedelta(seconds=int(round(s))) for s in offsets]
        for s in stamps:
            if times and s <= times[-1]:
                s = times[-1] + timedelta(seconds=1)
            times.append(s)
    return times


# --- frames ----------------------------------------------------------------------------


@dataclass(frozen=True)
class _Job:
    """Everything needed to render and write one frame."""

    camera: str
    split: int
    time: datetime
    incident: str | None
    conditions: _Conditions
    seed: tuple[int, ...]
    path: Path
    mask_path: Path | None
    #: Camera condition of a frame to scan (see :data:`HEALTH_NUISANCES`), or "".
    fault: str = ""
    #: Exposure step (gain, offset in grey levels) and camera shift (dx, dy) in pixels.
    exposure: tuple[float, float] = (1.0, 0.0)
    moved: tuple[float, float] = (0.0, 0.0)
    #: Infrared night mode: greyscale under an IR lamp.
    ir: bool = False


def _plan(camera, cam_index, split, count, seed, incident_fraction, extra, scene,
          out: Scenario) -> list[_Job]:
    rng = np.random.default_rng([seed, 1, cam_index, split])
    times = _schedule(rng, count, split)
    weather = _WEATHER[camera](np.random.default_rng([seed, 4, cam_index, split]))
    incidents: list[str | None] = [None] * count
    if split == 1 and count:
        n_inc = int(round(incident_fraction * count))
        kinds = [INCIDENTS[i % len(INCIDENTS)] for i in range(n_inc)]
        rng.shuffle(kinds)
        for pos, kind in zip(rng.choice(count, n_inc, replace=False), kinds):
            incidents[int(pos)] = kind
    folder = (out.normal if split == 0 else out.new) / camera
    faults, exposure, moved = _faults(count if split == 1 else 0, incidents, seed, cam_index,
                                      extra)
    jobs = []
    for i, (t, kind) in enumerate(zip(times, incidents)):
        name = f"{camera}_{t:%Y%m%d_%H%M%S}"
        cond = weather.conditions(t, scene, extra.get("gain", 0.0))
        jobs.append(_Job(camera=camera, split=split, time=t, incident=kind, conditions=cond,
                         seed=(seed, 2, cam_index, split, i), path=folder / f"{name}.jpg",
                         mask_path=(out.masks / camera / f"{name}.png") if kind else None,
                         fault=faults[i] if faults else "",
                         exposure=exposure[i] if exposure else (1.0, 0.0),
                         moved=moved[i] if moved else (0.0, 0.0)))
    return jobs


def _faults(count: int, incidents, seed: int, cam_index: int, extra):
    """Camera conditions of the frames to scan: faults, exposure steps and shifts."""
    if not count or not any(k in extra for k in ("exposure_step", "moved_px", "covered",
                                                 "defocus", "frozen")):
        return [], [], []
    rng = np.random.default_rng([seed, 5, cam_index])
    faults = [""] * count
    free = [i for i in range(1, count) if incidents[i] is None]
    rng.shuffle(free)
    start = 0
    for key in ("covered", "defocus", "frozen"):
        n = int(round(extra.get(key, 0.0) * len(free)))
        for i in free[start:start + n]:
            faults[i] = HEALTH_NUISANCES[key]
        start += n
    step = extra.get("exposure_step", 0.0)
    signs = rng.choice([-1.0, 1.0], size=(count, 2))
    exposure = [(1.0 + step * a, 40.0 * step * b) for a, b in signs]
    px = extra.get("moved_px", 0.0)
    moved = [(px, px / 2) if i >= count // 2 else (0.0, 0.0) for i in range(count)]
    if px > 0:
        for i in range(count // 2, count):
            faults[i] = faults[i] or HEALTH_NUISANCES["moved_px"]
    return faults, exposure, moved


def _noise_bank(rng: np.random.Generator, height: int, width: int) -> list[np.ndarray]:
    """A few unit Gaussian noise images, a little larger than a frame, to cut noise from."""
    shape = (height + _NOISE_PAD, width + _NOISE_PAD, 3)
    return [rng.standard_normal(shape, dtype=np.float32) for _ in range(_NOISE_BANK)]


def _stamp(img: np.ndarray, t: datetime, camera: str) -> None:
    """Burn the camera's timestamp into the top-left corner, white on a dark outline."""
    h = img.shape[0]
    text = f"{t:%Y-%m-%d %H:%M:%S} {camera.upper()}"
    scale = max(0.3, 0.6 * h / 540)
    thick = max(1, int(round(1.5 * h / 540)))
    (_, th), _ = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, scale, thick)
    org = (max(2, int(0.012 * img.shape[1])), int(0.02 * h) + th + 1)
    cv2.putText(img, text, org, cv2.FONT_HERSHEY_SIMPLEX, scale, (0, 0, 0), thick + 2,
                cv2.LINE_AA)
    cv2.putText(img, text, org, cv2.FONT_HERSHEY_SIMPLEX, scale, (235, 235, 235), thick,
                cv2.LINE_AA)


def _render(job: _Job, scene: _Scene, bank: list[np.ndarray], jitter_px: float) -> None:
    """Render one frame (and its mask, for an incident) and write it."""
    rng = np.random.default_rng(list(job.seed))
    cond = job.conditions
    out = scene.light(cond.coeffs)
    mask = None
    if job.incident:
        mask = _INJECT[job.incident](rng, scene, out, cond)
    H, W = out.shape[:2]
    if jitter_px > 0:
        dx, dy = rng.normal(0.0, jitter_px, 2)
        shift = np.float32([[1, 0, dx], [0, 1, dy]])
        out = cv2.warpAffine(out, shift, (W, H), flags=cv2.INTER_LINEAR,
                             borderMode=cv2.BORDER_REFLECT_101)
        if mask is not None:
            mask = cv2.warpAffine(mask.astype(np.uint8), shift, (W, H),
                                  flags=cv2.INTER_NEAREST) > 0
    if job.moved != (0.0, 0.0):
        shift = np.float32([[1, 0, job.moved[0]], [0, 1, job.moved[1]]])
        out = cv2.warpAffine(out, shift, (W, H), flags=cv2.INTER_LINEAR,
                             borderMode=cv2.BORDER_REFLECT_101)
        if mask is not None:
            mask = cv2.warpAffine(mask.astype(np.uint8), shift, (W, H),
                                  flags=cv2.INTER_NEAREST) > 0
    if job.fault == "out of focus":
        out = cv2.GaussianBlur(out, (0, 0), 0.008 * W)
    if job.fault == "lens covered":                   # a hand or a bag: dark, soft, most of it
        a = np.linspace(0.0, 2 * np.pi, 48, endpoint=False)
        blob = np.stack([W * (0.45 + 0.6 * np.cos(a)), H * (0.55 + 0.75 * np.sin(a))], 1)
        cover = _coverage(H, W, [blob], blur=0.05 * W)
        shade = 0.06 + 0.03 * _smooth_noise(rng, (H, W), 0.3 * W)          # skin or cloth
        hand = (shade[..., None] * np.array([0.8, 0.9, 1.1], np.float32)).astype(np.float32)
        c = cover[..., None].astype(np.float32)
        out = out * (1.0 - c) + hand * c
    if job.ir:
        luma = out @ np.array([0.114, 0.587, 0.299], np.float32)   # BGR weights
        ir = 0.12 + 0.33 * luma / max(float(luma.mean()), 1e-3)
        out = np.repeat(ir[..., None], 3, axis=2).astype(np.float32)
    if job.exposure != (1.0, 0.0):
        out = out * np.float32(job.exposure[0]) + np.float32(job.exposure[1] / 255.0)
    if cond.band is not None:
        amp, period, phase = cond.band
        rows = 1.0 + amp * np.sin(2 * np.pi * np.arange(H, dtype=np.float32) / period + phase)
        out *= rows.astype(np.float32)[:, None, None]
    k = int(rng.integers(len(bank)))
    oy, ox = (int(v) for v in rng.integers(0, _NOISE_PAD + 1, 2))
    noise = bank[k][oy:oy + H, ox:ox + W]
    if rng.random() < 0.5:
        noise = noise[::-1]
    if rng.random() < 0.5:
        noise = noise[:, ::-1]
    out += noise * np.float32(cond.sigma / 255.0)
    img = cv2.convertScaleAbs(out, alpha=255.0)
    _stamp(img, job.time, job.camera)
    ok, buf = cv2.imencode(".jpg", img, [cv2.IMWRITE_JPEG_QUALITY, JPEG_QUALITY])
    if not ok:  # pragma: no cover - encoding an in-memory uint8 image does not fail
        raise RuntimeError(f"could not encode {job.path.name}")
    job.path.write_bytes(buf.tobytes())
    if job.mask_path is not None and mask is not None:
        ok, png = cv2.imencode(".png", mask.astype(np.uint8) * 255)
        job.mask_path.write_bytes(png.tobytes())


# --- incidents -------------------------------------------------------------------------


def _target_area(rng: np.random.Generator, scene: _Scene) -> float:
    """An incident size in pixels, log-uniform over :data:`INCIDENT_AREA` of the frame."""
    lo, hi = INCIDENT_AREA
    return float(np.exp(rng.uniform(np.log(lo), np.log(hi)))) * scene.height * scene.width


def _floor_point(rng: np.random.Generator, scene: _Scene) -> tuple[float, float]:
    y, x = scene.floor_yx[int(rng.integers(len(scene.floor_yx)))]
    return float(x), float(y)


def _full_mask(scene: _Scene, box, local: np.ndarray) -> np.ndarray:
    y0, y1, x0, x1 = box
    mask = np.zeros((scene.height, scene.width), bool)
    mask[y0:y1, x0:x1] = local
    return mask


def _parcel(rng: np.random.Generator, scene: _Scene, out: np.ndarray,
            cond: _Conditions) -> np.ndarray:
    """A box left on the floor, with its shadow; the mask covers box and shadow."""
    H, W = scene.height, scene.width
    area = _target_area(rng, scene)
    aspect = rng.uniform(0.7, 1.6)                     # width / silhouette height
    for attempt in range(60):
        tall = math.sqrt(area / 1.3 / aspect)
        bw = aspect * tall
        depth = tall * rng.uniform(0.45, 0.65)         # footprint depth on the floor
        rise = tall - depth                            # visible height of the sides
        cx, cy = _floor_point(rng, scene)
        x0, yb0 = cx - bw / 2, cy - depth / 2          # footprint top-left on the floor
        fy0, fy1 = int(yb0 - rise), int(math.ceil(yb0 + depth)) + 1
        fx0, fx1 = int(x0), int(math.ceil(x0 + bw)) + 1
        if fy0 < 0 or fx0 < 0 or fy1 > H or fx1 > W:
            fit = 0.0
        else:
            fit = float(scene.floor[int(yb0):fy1, fx0:fx1].mean())
        if fit > 0.97:
            break
        if attempt % 10 == 9:
            area *= 0.8
    sx = 0.35 * rise * (cx - W / 2) / (W / 2)          # tops lean away from the frame centre
    base = _rect(x0, yb0, x0 + bw, yb0 + depth)
    top = base + (sx, -rise)
    front = np.array([base[3], base[2], top[2], top[3]])
    if sx >= 0:
        side = np.array([base[0], base[3], top[3], top[0]])
    else:
        side = np.array([base[1], base[2], top[2], top[1]])
    light_dx = rng.uniform(-0.5, 0.5)
    cast = base + (light_dx * rise, 0.35 * rise)
    shadow = cv2.convexHull(np.concatenate([base, cast]).astype(np.float32)).reshape(-1, 2)
    soft = max(0.8, 0.08 * rise)
    box = _bbox(np.concatenate([top, base, cast]), 3 * soft + 3, W, H)
    y0, y1, bx0, bx1 = box
    ys, xs = slice(y0, y1), slice(bx0, bx1)
    h, w = y1 - y0, bx1 - bx0
    offset = (bx0, y0)

    albedo = scene.albedo[ys, xs].copy()
    shade_cover = _coverage(h, w, [shadow], offset, blur=soft)
    albedo *= (1.0 - rng.uniform(0.45, 0.65) * shade_cover)[..., None]
    colour = _cardboard(rng)
    tex = 1.0 + 0.05 * scene.mid[ys, xs] + 0.02 * scene.fine[ys, xs]
    faces = np.zeros((h, w), np.float32)
    for poly, tone in ((side, 0.64), (front, 0.80), (top, 1.08)):
        cover = _coverage(h, w, [poly], offset)
        col = (colour * tone)[None, None, :] * tex[..., None]
        albedo += (col - albedo) * cover[..., None]
        faces = np.maximum(faces, cover)
    # Tape along the top and a shipping label on the front.
    mid_front, mid_back = (top[3] + top[2]) / 2, (top[0] + top[1]) / 2
    tape = _segment(mid_back, mid_front, max(1.0, bw * rng.uniform(0.08, 0.16)))
    tape_col = np.clip(colour * 1.08 * rng.uniform(0.9, 1.25), 0, 1)
    cover = _coverage(h, w, [tape], offset) * faces
    albedo += (tape_col[None, None, :] - albedo) * cover[..., None]
    if rise > 6:
        u0, u1 = rng.uniform(0.15, 0.45), rng.uniform(0.55, 0.85)
        label = np.array([front[0] + (front[1] - front[0]) * u0 + (front[3] - front[0]) * 0.25,
                          front[0] + (front[1] - front[0]) * u1 + (front[3] - front[0]) * 0.25,
                          front[0] + (front[1] - front[0]) * u1 + (front[3] - front[0]) * 0.75,
                          front[0] + (front[1] - front[0]) * u0 + (front[3] - front[0]) * 0.75])
        cover = _coverage(h, w, [label], offset)
        albedo += (np.float32(0.88) - albedo) * cover[..., None]
    out[ys, xs] = albedo * scene.illumination(ys, xs, cond.coeffs)
    return _full_mask(scene, box, (faces > 0.5) | (shade_cover > 0.3))


_SPILL_COLOURS = (
    (0.04, 0.05, 0.06),   # oil
    (0.07, 0.15, 0.26),   # coffee
    (0.28, 0.50, 0.16),   # green coolant
    (0.62, 0.36, 0.10),   # blue cleaning fluid
    (0.10, 0.20, 0.60),   # red paint
    (0.80, 0.82, 0.82),   # milky white
)


def _spill(rng: np.random.Generator, scene: _Scene, out: np.ndarray,
           cond: _Conditions) -> np.ndarray:
    """An irregular, partly translucent liquid blob on the floor."""
    H, W = scene.height, scene.width
    area = _target_area(rng, scene)
    aspect = rng.uniform(1.2, 2.2)                     # floors are foreshortened
    ry = math.sqrt(area / (math.pi * aspect))
    rx = aspect * ry
    for attempt in range(30):                          # prefer a spot with free floor around
        cx, cy = _floor_point(rng, scene)
        box = _bbox(np.array([(cx - rx, cy - ry), (cx + rx, cy + ry)]), 0, W, H)
        if scene.floor[box[0]:box[1], box[2]:box[3]].mean() > 0.9:
            break
        if attempt % 10 == 9:
            rx, ry = rx * 0.9, ry * 0.9
    box = _bbox(np.array([(cx - 1.5 * rx, cy - 1.5 * ry), (cx + 1.5 * rx, cy + 1.5 * ry)]),
                2, W, H)
    y0, y1, x0, x1 = box
    ys, xs = slice(y0, y1), slice(x0, x1)
    h, w = y1 - y0, x1 - x0
    gy, gx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dist = np.sqrt(((gx - cx) / rx) ** 2 + ((gy - cy) / ry) ** 2)
    field = dist + 0.3 * _smooth_noise(rng, (h, w), max(ry * 0.6, 2.0), octaves=3)
    for _ in range(int(rng.integers(1, 5))):           # a few splashes near the rim
        ang = rng.uniform(0, 2 * np.pi)
        reach = rng.uniform(1.0, 1.35, 2)
        dx, dy = np.cos(ang) * rx * reach[0], np.sin(ang) * ry * reach[1]
        r = rng.uniform(0.08, 0.2)
        drop = np.sqrt(((gx - cx - dx) / (rx * r)) ** 2 + ((gy - cy - dy) / (ry * r)) ** 2)
        field = np.minimum(field, drop)
    edge = max(1.5 / ry, 0.06)
    body = _smoothstep((1.0 - field) / edge)
    body *= scene.floor[ys, xs]
    strength = rng.uniform(0.55, 0.9)
    alpha = body * strength * (0.9 + 0.1 * scene.fine[ys, xs])
    rim = np.clip(1.0 - np.abs(field - 1.0) / (2 * edge), 0, 1) * 0.25 * body
    colour = np.array(_SPILL_COLOURS[int(rng.integers(len(_SPILL_COLOURS)))], np.float32)
    albedo = scene.albedo[ys, xs]
    mixed = albedo + (colour - albedo) * alpha[..., None]
    mixed *= (1.0 - rim)[..., None]
    light = scene.illumination(ys, xs, cond.coeffs)
    sheen = np.clip(_smooth_noise(rng, (h, w), max(ry * 0.25, 1.5)) - 1.3, 0, None) * 0.12
    out[ys, xs] = mixed * light + (sheen * body)[..., None] * light
    return _full_mask(scene, box, alpha > 0.15)


def _lens(rng: np.random.Generator, scene: _Scene, out: np.ndarray,
          cond: _Conditions) -> np.ndarray:
    """Something on or right in front of the lens at an edge or corner, out of focus."""
    H, W = scene.height, scene.width
    area = _target_area(rng, scene)
    aspect = rng.uniform(0.7, 1.4)
    where = int(rng.integers(8))
    if where < 4:                                      # a corner: a quarter of the blob shows
        cx, cy = (0.0 if where % 2 == 0 else W), (0.0 if where < 2 else H)
        visible = 0.25
    else:                                              # an edge: half of it shows
        visible = 0.5
        along = rng.uniform(0.15, 0.85)
        cx, cy = ((along * W, 0.0), (along * W, H), (0.0, along * H), (W, along * H))[where - 4]
    ry = math.sqrt(area / (math.pi * aspect * visible))
    rx = aspect * ry
    box = _bbox(np.array([(cx - 1.4 * rx, cy - 1.4 * ry), (cx + 1.4 * rx, cy + 1.4 * ry)]),
                2, W, H)
    y0, y1, x0, x1 = box
    ys, xs = slice(y0, y1), slice(x0, x1)
    h, w = y1 - y0, x1 - x0
    gy, gx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dist = np.sqrt(((gx - cx) / rx) ** 2 + ((gy - cy) / ry) ** 2)
    dist += 0.15 * _smooth_noise(rng, (h, w), max(0.5 * min(rx, ry), 2.0), octaves=2)
    kind = ("finger", "sticker", "dirt")[int(rng.integers(3))]
    soft = {"finger": rng.uniform(0.3, 0.5), "sticker": rng.uniform(0.15, 0.3),
            "dirt": rng.uniform(0.35, 0.5)}[kind]
    alpha = _smoothstep((1.0 - dist) / soft + 0.5)
    region = out[ys, xs]
    level = cond.level
    if kind == "finger":
        glow = np.array((0.10, 0.18, 0.34), np.float32) * (0.3 + level)
        content = (np.array((0.02, 0.025, 0.035), np.float32)
                   + glow * np.clip(dist, 0, 1)[..., None] ** 2)
    elif kind == "sticker":
        colour = np.array(((0.70, 0.70, 0.69), (0.25, 0.62, 0.75), (0.20, 0.20, 0.22),
                           (0.50, 0.34, 0.20))[int(rng.integers(4))], np.float32)
        content = colour * (0.25 + 0.75 * min(level * 2, 1.0))
        content = content * (1.0 + 0.03 * scene.mid[ys, xs])[..., None]
    else:
        blurred = cv2.GaussianBlur(region, (0, 0), max(0.2 * min(rx, ry), 1.0))
        content = blurred * 0.45 + np.array((0.05, 0.09, 0.13), np.float32) * (0.3 + level)
        alpha = alpha * rng.uniform(0.75, 0.95)
    out[ys, xs] = region + (content - region) * alpha[..., None]
    return _full_mask(scene, box, alpha >= 0.5)


def _haze(rng: np.random.Generator, scene: _Scene, out: np.ndarray,
          cond: _Conditions) -> np.ndarray:
    """A translucent, smoke-like grey haze over a region, modulated by smooth noise."""
    H, W = scene.height, scene.width
    area = _target_area(rng, scene)
    aspect = rng.uniform(0.9, 2.0)
    # The mask covers roughly the inner part of the ellipse below; 1.7 makes up for it.
    ry = math.sqrt(1.7 * area / (math.pi * aspect))
    rx = aspect * ry
    cx, cy = rng.uniform(0.15, 0.85) * W, rng.uniform(0.2, 0.85) * H
    box = _bbox(np.array([(cx - 1.6 * rx, cy - 1.6 * ry), (cx + 1.6 * rx, cy + 1.6 * ry)]),
                2, W, H)
    y0, y1, x0, x1 = box
    ys, xs = slice(y0, y1), slice(x0, x1)
    h, w = y1 - y0, x1 - x0
    gy, gx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dist = np.sqrt(((gx - cx) / rx) ** 2 + ((gy - cy) / ry) ** 2)
    dist += 0.3 * _smooth_noise(rng, (h, w), max(0.7 * ry, 2.0), octaves=2)
    body = _smoothstep((1.0 - dist) / 0.6)
    wisps = np.clip(0.65 + 0.35 * _smooth_noise(rng, (h, w), max(0.35 * ry, 2.0), octaves=3),
                    0, 1)
    peak = rng.uniform(0.45, 0.75)
    alpha = peak * body * wisps
    region = out[ys, xs]
    blurred = cv2.GaussianBlur(region, (0, 0), max(0.02 * ry, 0.8))
    region = region + (blurred - region) * (0.7 * alpha / peak)[..., None]
    grey = np.clip(0.35 + 1.0 * cond.level, 0.45, 0.9) * rng.uniform(0.85, 1.05)
    tint = np.array((1.03, 1.0, 0.97), np.float32) * np.float32(grey)
    out[ys, xs] = region + (tint - region) * alpha[..., None]
    return _full_mask(scene, box, alpha >= max(0.12, 0.3 * peak))


_INJECT = {"parcel": _parcel, "spill": _spill, "lens": _lens, "haze": _haze}
