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
``<camera>_YYYYmmdd_HHMMSS.jpg``. Normal frames come from four days, each recorded from early
morning to late evening; the frames to scan come from a
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
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from datetime import date, datetime, timedelta
from pathlib import Path

import cv2
import numpy as np

from inspector.demo import traffic
from inspector.demo.incidents import HEALTH_NUISANCES, INJECT, camera_faults
from inspector.demo.scenes import (
    BUILDERS,
    LIGHTING,
    Lighting,
    Scene,
    coverage,
    hours,
    smooth_noise,
)
from inspector.errors import UsageError

__all__ = ["BUSY", "BUSY_CAMERAS", "CAMERAS", "HEALTH_NUISANCES", "INCIDENTS", "NUISANCES",
           "Scenario", "generate", "load_truth"]

#: Camera names, in the order they are generated.
CAMERAS = ("dock", "aisle")
#: Busy cameras (staff and pallet trucks passing; see :mod:`inspector.demo.traffic`), with
#: the share of frames that show someone passing: ``walkway`` is the demo's, ``gate`` and
#: ``yard`` (gravel from a photograph bundled with scikit-image) are kept for benchmarks
#: (views the demo never shows).
BUSY_CAMERAS = {"walkway": 0.45, "gate": 0.5, "yard": 0.5}
#: The busy camera of the demo.
BUSY = "walkway"
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
#: File (in the scenario root) listing frames to scan with a camera health condition.
HEALTH_TRUTH = "health_truth.csv"

JPEG_QUALITY = 85
#: First day of the normal frames; four consecutive days follow, then the scan day.
FIRST_DAY = date(2026, 11, 26)
#: Normal sessions: (day offset from FIRST_DAY, start hour, end hour). Each of the four days
#: is recorded from early morning to late evening, as a camera's kept recording would be, so
#: every stretch of the normal frames shows every light of the day.
NORMAL_SESSIONS = tuple((d, 6.5, 22.5) for d in range(4))
#: Day of the frames to scan and its sessions (start hour, end hour).
SCAN_DAY = date(2026, 11, 30)
SCAN_SESSIONS = ((7.0, 9.0), (11.5, 13.0), (15.0, 17.0), (20.5, 22.5))

_MARKER = ".inspector-scenario"
_MIN_SIZE = (64, 36)
_NOISE_BANK = 4
_NOISE_PAD = 24



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
             nuisance: Mapping[str, float] | None = None,
             cameras: Sequence[str] = CAMERAS,
             busy_frames: tuple[int, int] | None = None) -> Scenario:
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
    cameras : sequence of str, optional
        Cameras to render: any of :data:`CAMERAS` and :data:`BUSY_CAMERAS`. A busy camera
        records bursts of frames :data:`~inspector.demo.traffic.INTERVAL` seconds apart
        with people and pallet trucks passing; in its frames to scan, one object per
        burst (a parcel or a spill) is left on the floor for
        :data:`~inspector.demo.traffic.LEFT_FRAMES` frames (``incident_fraction`` does not
        apply to it).
    busy_frames : (int, int), optional
        Normal frames and frames to scan of each busy camera, when they should differ from
        ``normal_per_camera`` and ``new_per_camera``.

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
    unknown = [c for c in cameras if c not in CAMERAS and c not in BUSY_CAMERAS]
    if unknown or not cameras:
        raise UsageError(f"unknown camera {unknown[0] if unknown else '(none given)'}; known: "
                         f"{', '.join((*CAMERAS, *BUSY_CAMERAS))}")
    out = Scenario.at(root)
    _prepare(out)

    bank = _noise_bank(np.random.default_rng([seed, 3]), height, width)
    scenes = {}
    jobs: list[_Job] = []
    truth_rows: list[tuple[str, str, str]] = []
    for cam_index, camera in enumerate(cameras):
        if camera in BUSY_CAMERAS:  # stable seeds, whatever else is rendered
            cam_index = 10 + list(BUSY_CAMERAS).index(camera)
        scene_rng = np.random.default_rng([seed, 0, cam_index])
        scenes[camera] = BUILDERS[camera](scene_rng, width, height)
        counts = (normal_per_camera, new_per_camera)
        if camera in BUSY_CAMERAS and busy_frames is not None:
            counts = busy_frames
        for split, count in enumerate(counts):
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
        jobs = [replace(j, ir=not 8.0 <= hours(j.time) < 18.0) for j in jobs]
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
    conditions: Lighting
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
    #: Busy cameras: seed of the left object (the same drawing in every frame it stays) and
    #: the passers-by in this frame.
    left_seed: tuple[int, ...] | None = None
    movers: tuple = ()


def _plan(camera, cam_index, split, count, seed, incident_fraction, extra, scene,
          out: Scenario) -> list[_Job]:
    if camera in BUSY_CAMERAS:
        return _plan_busy(camera, cam_index, split, count, seed, extra, scene, out)
    rng = np.random.default_rng([seed, 1, cam_index, split])
    times = _schedule(rng, count, split)
    weather = LIGHTING[camera](np.random.default_rng([seed, 4, cam_index, split]))
    incidents: list[str | None] = [None] * count
    if split == 1 and count:
        n_inc = int(round(incident_fraction * count))
        kinds = [INCIDENTS[i % len(INCIDENTS)] for i in range(n_inc)]
        rng.shuffle(kinds)
        for pos, kind in zip(rng.choice(count, n_inc, replace=False), kinds):
            incidents[int(pos)] = kind
    folder = (out.normal if split == 0 else out.new) / camera
    faults, exposure, moved = camera_faults(count if split == 1 else 0, incidents, seed, cam_index,
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


def _plan_busy(camera, cam_index, split, count, seed, extra, scene, out: Scenario
               ) -> list[_Job]:
    """A busy camera: bursts of frames with passers-by; objects left in the frames to scan."""
    rng = np.random.default_rng([seed, 1, cam_index, split])
    weather = LIGHTING[camera](np.random.default_rng([seed, 4, cam_index, split]))
    # A busy camera's normal frames are bursts spread over the whole working day of each of
    # the four days (as when a few days of a camera's recording are kept), so every time
    # block of them shows every light of the day.
    day_start = min(a for _, a, _ in NORMAL_SESSIONS)
    day_end = max(b for _, _, b in NORMAL_SESSIONS)
    sessions = ([(FIRST_DAY + timedelta(days=d), day_start, day_end)
                 for d in sorted({d for d, _, _ in NORMAL_SESSIONS})]
                if split == 0 else [(SCAN_DAY, a, b) for a, b in SCAN_SESSIONS])
    folder = (out.normal if split == 0 else out.new) / camera
    jobs: list[_Job] = []
    size = traffic.BURST[split]
    bursts = -(-count // size)
    for b in range(bursts):
        n = min(size, count - b * size)
        k = b * len(sessions) // bursts                 # bursts in time order
        first = -(-k * bursts // len(sessions))         # first burst of session k
        per = -(-(k + 1) * bursts // len(sessions)) - first
        day, lo, hi = sessions[k]
        hour = lo + (hi - lo) * (b - first + rng.uniform(0.1, 0.9)) / max(per, 1)
        start = datetime(day.year, day.month, day.day) + timedelta(seconds=round(hour * 3600))
        movers = traffic.plan_traffic(rng, scene, n, BUSY_CAMERAS[camera])
        left = range(0)
        if split == 1 and n >= traffic.LEFT_FRAMES + 4:
            first = int(rng.integers(2, n - traffic.LEFT_FRAMES - 1))
            left = range(first, first + traffic.LEFT_FRAMES)
        kind = ("parcel", "spill")[b % 2]
        for i in range(n):
            t = start + timedelta(seconds=traffic.INTERVAL * i)
            name = f"{camera}_{t:%Y%m%d_%H%M%S}"
            here = kind if i in left else None
            jobs.append(_Job(camera=camera, split=split, time=t, incident=here,
                             conditions=weather.conditions(t, scene, extra.get("gain", 0.0)),
                             seed=(seed, 2, cam_index, split, b * size + i),
                             path=folder / f"{name}.jpg",
                             mask_path=(out.masks / camera / f"{name}.png") if here else None,
                             left_seed=(seed, 6, cam_index, b) if here else None,
                             movers=movers[i]))
    return jobs


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


def _shifted(out: np.ndarray, mask: np.ndarray | None, dx: float, dy: float
             ) -> tuple[np.ndarray, np.ndarray | None]:
    """A frame (H, W, 3) float32 and its incident's mask (H, W) bool, if any, moved by
    ``dx``, ``dy`` pixels (the frame's edges reflected)."""
    H, W = out.shape[:2]
    shift = np.float32([[1, 0, dx], [0, 1, dy]])
    out = cv2.warpAffine(out, shift, (W, H), flags=cv2.INTER_LINEAR,
                         borderMode=cv2.BORDER_REFLECT_101)
    if mask is not None:
        mask = cv2.warpAffine(mask.astype(np.uint8), shift, (W, H),
                              flags=cv2.INTER_NEAREST) > 0
    return out, mask


def _render(job: _Job, scene: Scene, bank: list[np.ndarray], jitter_px: float) -> None:
    """Render one frame (and its mask, for an incident) and write it."""
    rng = np.random.default_rng(list(job.seed))
    cond = job.conditions
    out = scene.light(cond.coeffs)
    mask = None
    if job.left_seed is not None:
        mask = INJECT[job.incident](np.random.default_rng(list(job.left_seed)), scene, out,
                                    cond, area=traffic.LEFT_AREA)
    elif job.incident:
        mask = INJECT[job.incident](rng, scene, out, cond)
    traffic.draw_movers(scene, out, job.movers, cond)
    H, W = out.shape[:2]
    if jitter_px > 0:
        out, mask = _shifted(out, mask, *rng.normal(0.0, jitter_px, 2))
    if job.moved != (0.0, 0.0):
        out, mask = _shifted(out, mask, *job.moved)
    if job.fault == "out of focus":
        out = cv2.GaussianBlur(out, (0, 0), 0.008 * W)
    if job.fault == "lens covered":                   # a hand or a bag: dark, soft, most of it
        a = np.linspace(0.0, 2 * np.pi, 48, endpoint=False)
        blob = np.stack([W * (0.45 + 0.6 * np.cos(a)), H * (0.55 + 0.75 * np.sin(a))], 1)
        cover = coverage(H, W, [blob], blur=0.05 * W)
        shade = 0.06 + 0.03 * smooth_noise(rng, (H, W), 0.3 * W)          # skin or cloth
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
