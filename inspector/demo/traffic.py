"""Passers-by for the demo's busy cameras: staff walking and pallet trucks crossing the floor.

A busy camera records in bursts of frames a couple of seconds apart. In each burst, movers
walk in straight lines between two points of the free floor at walking pace (a person at
about 1.4 m/s covers roughly a fifth of a depot view between two frames); they are drawn
over the lit scene with a soft shadow, lit by the scene's own light at their place. What a
busy camera is asked about is what stays: parcels and spills left on the floor
(:func:`left_objects` lists them from a scenario's ground truth).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from inspector.demo.scenes import Lighting, Scene, cardboard, coverage, rect, segment

#: Seconds between two frames of a busy camera's burst.
INTERVAL = 2.0
#: Frames in one burst: normal frames come in short bursts spread over the day (so the
#: baseline sees every light of the day), frames to scan in bursts long enough for an object
#: to be left, stay and be taken away.
BURST = (10, 30)
#: Frames a left object stays before it is taken away.
LEFT_FRAMES = 15
#: Size range of left objects, as a fraction of the frame area: from half to about one and a
#: half times a person standing mid-view (the demo's incidents are 1 to 10 %).
LEFT_AREA = (0.006, 0.02)

_VESTS = ((0.10, 0.85, 0.95), (0.05, 0.45, 0.95), (0.25, 0.25, 0.28), (0.45, 0.30, 0.15),
          (0.70, 0.70, 0.72))
_SKIN = ((0.45, 0.60, 0.80), (0.30, 0.42, 0.60), (0.20, 0.28, 0.40))


@dataclass(frozen=True)
class Mover:
    """One passer-by in one frame: where its feet are and how it looks."""

    kind: str                 # "person" or "truck"
    x: float
    y: float
    #: +1 walking right, -1 left (the truck's load trails behind).
    facing: int
    #: Seed of its colours (the same for the whole walk).
    look: int
    #: Stride phase in [0, 1).
    step: float


def plan_traffic(rng: np.random.Generator, scene: Scene, frames: int, busy: float
                 ) -> list[tuple[Mover, ...]]:
    """Movers in each frame of a burst.

    Parameters
    ----------
    rng : numpy.random.Generator
    scene : Scene
    frames : int
        Frames in the burst.
    busy : float in [0, 1)
        Share of frames meant to show at least one mover.

    Returns
    -------
    list (one per frame) of tuples of Mover
    """
    W = scene.width
    speed = {"person": (0.14, 0.24), "truck": (0.09, 0.15)}       # of the width per frame
    mean_frames = 0.55 / 0.17                                      # a typical walk in view
    rate = -math.log(max(1.0 - busy, 1e-3)) / mean_frames          # Poisson arrivals
    out: list[list[Mover]] = [[] for _ in range(frames)]
    for start in range(-4, frames):
        for _ in range(int(rng.poisson(rate))):
            kind = "truck" if rng.random() < 0.2 else "person"
            x0, y0 = _floor(rng, scene)
            for _ in range(20):
                x1, y1 = _floor(rng, scene)
                if abs(x1 - x0) + abs(y1 - y0) > 0.4 * W:
                    break
            v = rng.uniform(*speed[kind]) * W
            n = max(1, int(math.hypot(x1 - x0, y1 - y0) / v))
            look, phase = int(rng.integers(1 << 30)), rng.random()
            for k in range(n + 1):
                f = start + k
                if 0 <= f < frames:
                    t = k / n
                    out[f].append(Mover(kind, x0 + (x1 - x0) * t, y0 + (y1 - y0) * t,
                                        1 if x1 >= x0 else -1, look, (phase + 0.5 * k) % 1.0))
    return [tuple(sorted(m, key=lambda m: m.y)) for m in out]   # far ones drawn first


def draw_movers(scene: Scene, out: np.ndarray, movers, cond: Lighting) -> None:
    """Draw movers (far first) over the lit frame ``out`` (H, W, 3) float32, in place."""
    for m in movers:
        _draw(scene, out, m, cond)


def left_objects(rows: list[tuple[str, str, str]], camera: str) -> list[tuple[int, int]]:
    """Where left objects appear and go in a camera's frames to scan.

    Parameters
    ----------
    rows : list of (frame, camera, incident)
        Ground truth (see :func:`inspector.demo.scenario.load_truth`), in time order.
    camera : str

    Returns
    -------
    list of (first, last)
        Positions (in the camera's frames, time order) of each object's first and last frame.
    """
    kinds = [kind for _, c, kind in rows if c == camera]
    spans, start = [], None
    for i, kind in enumerate(kinds + ["none"]):
        if kind != "none" and start is None:
            start = i
        elif kind == "none" and start is not None:
            spans.append((start, i - 1))
            start = None
    return spans


def busy_results(rows: list[tuple[str, str, str]], flagged: set[str], camera: str,
                 within: int = 5, reported: set[str] = frozenset()) -> dict:
    """How a busy camera's scan did: false alarms on traffic-only frames, left objects caught.

    Parameters
    ----------
    rows : list of (frame, camera, incident)
        Ground truth, in time order.
    flagged : set of str
        Frames flagged (paths as in the truth).
    camera : str
    within : int
        An object counts as caught when flagged within this many frames of appearing.
    reported : set of str
        Frames held back with a camera condition (health.csv): never flagged as anomalies,
        reported instead.

    Returns
    -------
    dict
        ``false`` flagged of ``quiet`` traffic-only frames; ``caught`` of ``objects`` left
        objects, with ``delays`` (frames after the object's first, 0 = at once) of those
        caught; ``held`` objects not caught whose frames within ``within`` of appearing
        were all held back with a camera condition (not caught, but not silent either).
    """
    mine = [r for r in rows if r[1] == camera]
    quiet = [f for f, _, kind in mine if kind == "none"]
    delays, held = [], 0
    for first, _ in left_objects(rows, camera):
        span = range(first, min(first + within, len(mine)))
        hit = [i - first for i in span if mine[i][0] in flagged]
        if hit:
            delays.append(hit[0])
        elif all(mine[i][0] in reported for i in span):
            held += 1
    return {"false": sum(f in flagged for f in quiet), "quiet": len(quiet),
            "objects": len(left_objects(rows, camera)), "caught": len(delays),
            "delays": delays, "held": held}


def _floor(rng: np.random.Generator, scene: Scene) -> tuple[float, float]:
    y, x = scene.floor_yx[int(rng.integers(len(scene.floor_yx)))]
    return float(x), float(y)


def _height(scene: Scene, y: float) -> float:
    """A person's height in pixels with their feet at row ``y`` (nearer = lower = taller)."""
    top = float(scene.floor_yx[:, 0].min())
    depth = (y - top) / max(scene.height - top, 1.0)
    return scene.height * (0.16 + 0.30 * depth)


def _draw(scene: Scene, out: np.ndarray, m: Mover, cond: Lighting) -> None:
    H, W = scene.height, scene.width
    h = _height(scene, m.y)
    look = np.random.default_rng(m.look)
    vest = np.array(_VESTS[int(look.integers(len(_VESTS)))], np.float32)
    skin = np.array(_SKIN[int(look.integers(len(_SKIN)))], np.float32)
    trousers = np.array((0.12, 0.11, 0.10), np.float32) * look.uniform(0.8, 2.0)
    x, y, s = m.x, m.y, m.facing
    parts: list[tuple[list[np.ndarray], np.ndarray]] = []
    swing = 0.08 * h * math.sin(2 * math.pi * m.step)
    hip = (x, y - 0.47 * h)
    parts.append(([segment(hip, (x - swing, y), 0.09 * h),
                   segment(hip, (x + swing, y), 0.09 * h)], trousers))
    parts.append(([rect(x - 0.13 * h, y - 0.80 * h, x + 0.13 * h, y - 0.44 * h)], vest))
    parts.append(([segment((x - 0.12 * h, y - 0.76 * h), (x - 0.14 * h - swing, y - 0.48 * h),
                           0.07 * h),
                   segment((x + 0.12 * h, y - 0.76 * h), (x + 0.14 * h + swing, y - 0.48 * h),
                           0.07 * h)], vest * 0.85))
    a = np.linspace(0, 2 * np.pi, 16, endpoint=False)
    head = np.stack([x + 0.075 * h * np.cos(a), y - 0.88 * h + 0.085 * h * np.sin(a)], 1)
    parts.append(([head], skin))
    shadow = [np.stack([x + 0.2 * h * np.cos(a), y + 0.035 * h * np.sin(a)], 1)]
    if m.kind == "truck":                                  # pallet truck pulled behind
        tx0, tx1 = sorted((x - s * 0.15 * h, x - s * 0.85 * h))
        parts.append(([rect(tx0, y - 0.10 * h, tx1, y)], np.array((0.10, 0.15, 0.75),
                                                                  np.float32)))
        parts.append(([rect(tx0 + 0.03 * h, y - 0.45 * h, tx1 - 0.03 * h, y - 0.10 * h)],
                      np.asarray(cardboard(look), np.float32)))
        parts.append(([segment((x - s * 0.15 * h, y - 0.05 * h), (x, y - 0.45 * h), 0.03 * h)],
                      np.array((0.08, 0.08, 0.08), np.float32)))
        shadow.append(rect(tx0, y - 0.03 * h, tx1 + 0.1 * h, y + 0.05 * h))
    pts = np.concatenate([np.concatenate([np.asarray(p).reshape(-1, 2) for p in ps])
                          for ps, _ in parts] + [np.concatenate(shadow)])
    x0, x1 = max(int(pts[:, 0].min()) - 3, 0), min(int(pts[:, 0].max()) + 4, W)
    y0, y1 = max(int(pts[:, 1].min()) - 3, 0), min(int(pts[:, 1].max()) + 4, H)
    if x0 >= x1 or y0 >= y1:
        return
    ys, xs = slice(y0, y1), slice(x0, x1)
    region = out[ys, xs]
    dark = coverage(y1 - y0, x1 - x0, shadow, (x0, y0), blur=max(1.0, 0.02 * h))
    region *= (1.0 - 0.45 * dark)[..., None]
    light = scene.illumination(ys, xs, cond.coeffs)
    for polys, colour in parts:
        cover = coverage(y1 - y0, x1 - x0, polys, (x0, y0))
        region += (colour * light - region) * cover[..., None]
