"""What goes wrong in the demo's frames to scan: injected incidents and camera faults.

Each incident draws into a small box of the lit frame and returns the pixel mask of where it
is; camera faults (a covered lens, defocus, a frozen feed, a knocked camera) are planned per
frame and rendered by :func:`inspector.demo.scenario.generate`.
"""

from __future__ import annotations

import math

import cv2
import numpy as np

from inspector.demo.scenes import (
    Lighting,
    Scene,
    bbox,
    cardboard,
    coverage,
    rect,
    segment,
    smooth_noise,
    smoothstep,
)

#: Range of incident sizes as a fraction of the frame area (drawn log-uniformly).
INCIDENT_AREA = (0.01, 0.10)
#: Camera condition written to ``health_truth.csv`` for each of these nuisances.
HEALTH_NUISANCES = {"covered": "lens covered", "defocus": "out of focus",
                    "frozen": "frozen feed", "moved_px": "camera moved"}


def camera_faults(count: int, incidents, seed: int, cam_index: int, extra):
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



# --- incidents -------------------------------------------------------------------------


def target_area(rng: np.random.Generator, scene: Scene,
                area: tuple[float, float] = INCIDENT_AREA) -> float:
    """An incident size in pixels, log-uniform over ``area`` (fractions of the frame)."""
    lo, hi = area
    return float(np.exp(rng.uniform(np.log(lo), np.log(hi)))) * scene.height * scene.width


def floor_point(rng: np.random.Generator, scene: Scene) -> tuple[float, float]:
    y, x = scene.floor_yx[int(rng.integers(len(scene.floor_yx)))]
    return float(x), float(y)


def full_mask(scene: Scene, box, local: np.ndarray) -> np.ndarray:
    y0, y1, x0, x1 = box
    mask = np.zeros((scene.height, scene.width), bool)
    mask[y0:y1, x0:x1] = local
    return mask


def _ellipse(cx: float, cy: float, rx: float, ry: float, reach: float, W: int, H: int):
    """The box around an ellipse grown ``reach`` times (2 pixels more, clipped to the frame),
    its (rows, columns) slices, (height, width), pixel coordinates (gy, gx) and each pixel's
    elliptical distance from the centre (1 on the ellipse)."""
    box = bbox(np.array([(cx - reach * rx, cy - reach * ry), (cx + reach * rx, cy + reach * ry)]),
               2, W, H)
    y0, y1, x0, x1 = box
    gy, gx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dist = np.sqrt(((gx - cx) / rx) ** 2 + ((gy - cy) / ry) ** 2)
    return box, (slice(y0, y1), slice(x0, x1)), (y1 - y0, x1 - x0), (gy, gx), dist


def _parcel(rng: np.random.Generator, scene: Scene, out: np.ndarray,
            cond: Lighting, area: tuple[float, float] = INCIDENT_AREA) -> np.ndarray:
    """A box left on the floor, with its shadow; the mask covers box and shadow."""
    H, W = scene.height, scene.width
    area = target_area(rng, scene, area)
    aspect = rng.uniform(0.7, 1.6)                     # width / silhouette height
    for attempt in range(60):
        tall = math.sqrt(area / 1.3 / aspect)
        bw = aspect * tall
        depth = tall * rng.uniform(0.45, 0.65)         # footprint depth on the floor
        rise = tall - depth                            # visible height of the sides
        cx, cy = floor_point(rng, scene)
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
    base = rect(x0, yb0, x0 + bw, yb0 + depth)
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
    box = bbox(np.concatenate([top, base, cast]), 3 * soft + 3, W, H)
    y0, y1, bx0, bx1 = box
    ys, xs = slice(y0, y1), slice(bx0, bx1)
    h, w = y1 - y0, bx1 - bx0
    offset = (bx0, y0)

    albedo = scene.albedo[ys, xs].copy()
    shade_cover = coverage(h, w, [shadow], offset, blur=soft)
    albedo *= (1.0 - rng.uniform(0.45, 0.65) * shade_cover)[..., None]
    colour = cardboard(rng)
    tex = 1.0 + 0.05 * scene.mid[ys, xs] + 0.02 * scene.fine[ys, xs]
    faces = np.zeros((h, w), np.float32)
    for poly, tone in ((side, 0.64), (front, 0.80), (top, 1.08)):
        cover = coverage(h, w, [poly], offset)
        col = (colour * tone)[None, None, :] * tex[..., None]
        albedo += (col - albedo) * cover[..., None]
        faces = np.maximum(faces, cover)
    # Tape along the top and a shipping label on the front.
    mid_front, mid_back = (top[3] + top[2]) / 2, (top[0] + top[1]) / 2
    tape = segment(mid_back, mid_front, max(1.0, bw * rng.uniform(0.08, 0.16)))
    tape_col = np.clip(colour * 1.08 * rng.uniform(0.9, 1.25), 0, 1)
    cover = coverage(h, w, [tape], offset) * faces
    albedo += (tape_col[None, None, :] - albedo) * cover[..., None]
    if rise > 6:
        u0, u1 = rng.uniform(0.15, 0.45), rng.uniform(0.55, 0.85)
        label = np.array([front[0] + (front[1] - front[0]) * u0 + (front[3] - front[0]) * 0.25,
                          front[0] + (front[1] - front[0]) * u1 + (front[3] - front[0]) * 0.25,
                          front[0] + (front[1] - front[0]) * u1 + (front[3] - front[0]) * 0.75,
                          front[0] + (front[1] - front[0]) * u0 + (front[3] - front[0]) * 0.75])
        cover = coverage(h, w, [label], offset)
        albedo += (np.float32(0.88) - albedo) * cover[..., None]
    out[ys, xs] = albedo * scene.illumination(ys, xs, cond.coeffs)
    return full_mask(scene, box, (faces > 0.5) | (shade_cover > 0.3))


_SPILL_COLOURS = (
    (0.04, 0.05, 0.06),   # oil
    (0.07, 0.15, 0.26),   # coffee
    (0.28, 0.50, 0.16),   # green coolant
    (0.62, 0.36, 0.10),   # blue cleaning fluid
    (0.10, 0.20, 0.60),   # red paint
    (0.80, 0.82, 0.82),   # milky white
)


def _spill(rng: np.random.Generator, scene: Scene, out: np.ndarray,
           cond: Lighting, area: tuple[float, float] = INCIDENT_AREA) -> np.ndarray:
    """An irregular, partly translucent liquid blob on the floor."""
    H, W = scene.height, scene.width
    area = target_area(rng, scene, area)
    aspect = rng.uniform(1.2, 2.2)                     # floors are foreshortened
    ry = math.sqrt(area / (math.pi * aspect))
    rx = aspect * ry
    for attempt in range(30):                          # prefer a spot with free floor around
        cx, cy = floor_point(rng, scene)
        box = bbox(np.array([(cx - rx, cy - ry), (cx + rx, cy + ry)]), 0, W, H)
        if scene.floor[box[0]:box[1], box[2]:box[3]].mean() > 0.9:
            break
        if attempt % 10 == 9:
            rx, ry = rx * 0.9, ry * 0.9
    box, (ys, xs), (h, w), (gy, gx), dist = _ellipse(cx, cy, rx, ry, 1.5, W, H)
    field = dist + 0.3 * smooth_noise(rng, (h, w), max(ry * 0.6, 2.0), octaves=3)
    for _ in range(int(rng.integers(1, 5))):           # a few splashes near the rim
        ang = rng.uniform(0, 2 * np.pi)
        reach = rng.uniform(1.0, 1.35, 2)
        dx, dy = np.cos(ang) * rx * reach[0], np.sin(ang) * ry * reach[1]
        r = rng.uniform(0.08, 0.2)
        drop = np.sqrt(((gx - cx - dx) / (rx * r)) ** 2 + ((gy - cy - dy) / (ry * r)) ** 2)
        field = np.minimum(field, drop)
    edge = max(1.5 / ry, 0.06)
    body = smoothstep((1.0 - field) / edge)
    body *= scene.floor[ys, xs]
    strength = rng.uniform(0.55, 0.9)
    alpha = body * strength * (0.9 + 0.1 * scene.fine[ys, xs])
    rim = np.clip(1.0 - np.abs(field - 1.0) / (2 * edge), 0, 1) * 0.25 * body
    colour = np.array(_SPILL_COLOURS[int(rng.integers(len(_SPILL_COLOURS)))], np.float32)
    albedo = scene.albedo[ys, xs]
    mixed = albedo + (colour - albedo) * alpha[..., None]
    mixed *= (1.0 - rim)[..., None]
    light = scene.illumination(ys, xs, cond.coeffs)
    sheen = np.clip(smooth_noise(rng, (h, w), max(ry * 0.25, 1.5)) - 1.3, 0, None) * 0.12
    out[ys, xs] = mixed * light + (sheen * body)[..., None] * light
    return full_mask(scene, box, alpha > 0.15)


def _lens(rng: np.random.Generator, scene: Scene, out: np.ndarray,
          cond: Lighting) -> np.ndarray:
    """Something on or right in front of the lens at an edge or corner, out of focus."""
    H, W = scene.height, scene.width
    area = target_area(rng, scene)
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
    box, (ys, xs), (h, w), (gy, gx), dist = _ellipse(cx, cy, rx, ry, 1.4, W, H)
    dist += 0.15 * smooth_noise(rng, (h, w), max(0.5 * min(rx, ry), 2.0), octaves=2)
    kind = ("finger", "sticker", "dirt")[int(rng.integers(3))]
    soft = {"finger": rng.uniform(0.3, 0.5), "sticker": rng.uniform(0.15, 0.3),
            "dirt": rng.uniform(0.35, 0.5)}[kind]
    alpha = smoothstep((1.0 - dist) / soft + 0.5)
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
    return full_mask(scene, box, alpha >= 0.5)


def _haze(rng: np.random.Generator, scene: Scene, out: np.ndarray,
          cond: Lighting) -> np.ndarray:
    """A translucent, smoke-like grey haze over a region, modulated by smooth noise."""
    H, W = scene.height, scene.width
    area = target_area(rng, scene)
    aspect = rng.uniform(0.9, 2.0)
    # The mask covers roughly the inner part of the ellipse below; 1.7 makes up for it.
    ry = math.sqrt(1.7 * area / (math.pi * aspect))
    rx = aspect * ry
    cx, cy = rng.uniform(0.15, 0.85) * W, rng.uniform(0.2, 0.85) * H
    box, (ys, xs), (h, w), (gy, gx), dist = _ellipse(cx, cy, rx, ry, 1.6, W, H)
    dist += 0.3 * smooth_noise(rng, (h, w), max(0.7 * ry, 2.0), octaves=2)
    body = smoothstep((1.0 - dist) / 0.6)
    wisps = np.clip(0.65 + 0.35 * smooth_noise(rng, (h, w), max(0.35 * ry, 2.0), octaves=3),
                    0, 1)
    peak = rng.uniform(0.45, 0.75)
    alpha = peak * body * wisps
    region = out[ys, xs]
    blurred = cv2.GaussianBlur(region, (0, 0), max(0.02 * ry, 0.8))
    region = region + (blurred - region) * (0.7 * alpha / peak)[..., None]
    grey = np.clip(0.35 + 1.0 * cond.level, 0.45, 0.9) * rng.uniform(0.85, 1.05)
    tint = np.array((1.03, 1.0, 0.97), np.float32) * np.float32(grey)
    out[ys, xs] = region + (tint - region) * alpha[..., None]
    return full_mask(scene, box, alpha >= max(0.12, 0.3 * peak))


INJECT = {"parcel": _parcel, "spill": _spill, "lens": _lens, "haze": _haze}

