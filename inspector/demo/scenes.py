"""The demo's scenes: drawing helpers, each camera's static scene and how it is lit over time.

A scene (reflectance plus a few light maps) is drawn once per camera; a frame is a weighted
sum of its pre-lit layers (see :meth:`Scene.light`). Colours are BGR floats in [0, 1].
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date, datetime

import cv2
import numpy as np

#: Late-November sun at the depot, in decimal hours.
SUNRISE, SUNSET = 7.6, 16.1

# Reflectances (BGR).
CARDBOARD = (0.38, 0.53, 0.67)
YELLOW = (0.10, 0.70, 0.86)
BLACK = (0.06, 0.06, 0.07)



def smooth_noise(rng: np.random.Generator, shape: tuple[int, int], scale: float,
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


def bbox(points: np.ndarray, margin: float, width: int, height: int):
    """Pixel bounding box (y0, y1, x0, x1) of ``points`` plus ``margin``, clipped."""
    x0 = max(int(math.floor(points[:, 0].min() - margin)), 0)
    x1 = min(int(math.ceil(points[:, 0].max() + margin)) + 1, width)
    y0 = max(int(math.floor(points[:, 1].min() - margin)), 0)
    y1 = min(int(math.ceil(points[:, 1].max() + margin)) + 1, height)
    return y0, y1, x0, x1


def coverage(h: int, w: int, polys, offset=(0.0, 0.0), blur: float = 0.0) -> np.ndarray:
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


def _covered(img: np.ndarray, polys, blur: float
             ) -> tuple[tuple[int, int, int, int], np.ndarray] | None:
    """The box (y0, y1, x0, x1) of ``img`` that polygons softened by ``blur`` pixels reach,
    and their :func:`coverage` of it, (y1 - y0, x1 - x0) float32; None when they fall
    outside the image."""
    height, width = img.shape[:2]
    points = np.concatenate([np.asarray(p, np.float64).reshape(-1, 2) for p in polys])
    y0, y1, x0, x1 = bbox(points, 3 * blur + 2, width, height)
    if y0 >= y1 or x0 >= x1:
        return None
    return (y0, y1, x0, x1), coverage(y1 - y0, x1 - x0, polys, (x0, y0), blur)


def paint(img: np.ndarray, polys, colour, shade: np.ndarray | None = None,
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
    found = _covered(img, polys, blur)
    if found is None:
        return
    (y0, y1, x0, x1), alpha = found
    alpha *= np.float32(opacity)
    if isinstance(colour, np.ndarray) and colour.ndim == 3:
        col = colour[y0:y1, x0:x1]
    else:
        col = np.asarray(colour, np.float32).reshape(1, 1, 3)
    if shade is not None:
        col = col * shade[y0:y1, x0:x1, None]
    region = img[y0:y1, x0:x1]
    region += (col - region) * alpha[..., None]


def darken(img: np.ndarray, polys, factor: float, blur: float = 0.0) -> None:
    """Multiply ``img`` by ``factor`` inside polygons (soft-edged), in place."""
    found = _covered(img, polys, blur)
    if found is None:
        return
    (y0, y1, x0, x1), alpha = found
    img[y0:y1, x0:x1] *= (1.0 - (1.0 - factor) * alpha)[..., None]


def segment(p0, p1, thickness: float) -> np.ndarray:
    """The quadrilateral of a straight stroke from ``p0`` to ``p1``."""
    p0, p1 = np.asarray(p0, np.float64), np.asarray(p1, np.float64)
    d = p1 - p0
    n = np.array([-d[1], d[0]]) / max(np.hypot(*d), 1e-9) * thickness / 2
    return np.array([p0 + n, p1 + n, p1 - n, p0 - n])


def rect(x0, y0, x1, y1) -> np.ndarray:
    return np.array([(x0, y0), (x1, y0), (x1, y1), (x0, y1)], np.float64)


def gauss(xx: np.ndarray, yy: np.ndarray, cx: float, cy: float, sigma: float) -> np.ndarray:
    return np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * sigma * sigma)).astype(np.float32)


def smoothstep(x: np.ndarray) -> np.ndarray:
    x = np.clip(x, 0.0, 1.0)
    return x * x * (3.0 - 2.0 * x)


# --- scenes ----------------------------------------------------------------------------


@dataclass
class Scene:
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


def finish_scene(camera: str, albedo: np.ndarray, maps, floor: np.ndarray,
                  fine: np.ndarray, mid: np.ndarray) -> Scene:
    h, w = floor.shape
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    r2 = ((xx / w - 0.5) ** 2 + (yy / h - 0.5) ** 2) / 0.5
    vignette = (1.0 - 0.22 * r2).astype(np.float32)
    maps = tuple((m * vignette).astype(np.float32) for m in maps)
    np.clip(albedo, 0.0, 1.0, out=albedo)
    layers = tuple(albedo * m[..., None] for m in maps)
    means = tuple(float(layer.mean()) for layer in layers)
    floor_yx = np.argwhere(floor)
    return Scene(camera=camera, albedo=albedo, maps=maps, layers=layers, layer_means=means,
                  floor=floor, floor_yx=floor_yx, fine=fine, mid=mid)


def cardboard(rng: np.random.Generator) -> np.ndarray:
    """A cardboard-like BGR colour, sometimes a white or grey container instead."""
    pick = rng.random()
    if pick < 0.75:
        base = np.array(CARDBOARD) * rng.uniform(0.8, 1.15)
        base += rng.normal(0.0, 0.025, 3)
    elif pick < 0.88:
        base = np.full(3, rng.uniform(0.72, 0.86)) + rng.normal(0.0, 0.015, 3)
    else:
        base = np.array((0.55, 0.38, 0.22)) * rng.uniform(0.7, 1.1)  # blue plastic tote
    return np.clip(base, 0.02, 0.95)


def _canvas(rng: np.random.Generator, W: int, H: int):
    """A scene's texture fields (pixel grain, medium and coarse, unit variance) and its pixel
    row and column coordinates, each (H, W) float32."""
    fine = smooth_noise(rng, (H, W), 1.0)
    mid = smooth_noise(rng, (H, W), 0.03 * W, octaves=2)
    coarse = smooth_noise(rng, (H, W), 0.25 * W, octaves=2)
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
    return fine, mid, coarse, yy, xx


def dock_scene(rng: np.random.Generator, width: int, height: int) -> Scene:
    """Loading dock: wall with dock door and window, concrete floor, pallets, trolley."""
    W, H = width, height
    fine, mid, coarse, yy, xx = _canvas(rng, W, H)
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
        darken(albedo, [segment(top, bottom, max(1.0, 0.003 * H))], 0.72, blur=0.4)
    for yj in (0.56, 0.82):
        darken(albedo, [segment((0, yj * H), (W, yj * H), max(1.0, 0.003 * H))], 0.72,
                blur=0.4)
    # Dark skirting along the wall foot.
    paint(albedo, [rect(0, 0.31 * H, W, wall_y)], (0.22, 0.23, 0.24), shade=1 + 0.05 * mid)

    # Dock leveller plate with a hazard-striped border in front of the door.
    stripes = ((xx + yy) / max(0.018 * W, 3.0)) % 2.0 < 1.0
    hazard = np.where(stripes[..., None], np.array(YELLOW, np.float32),
                      np.array(BLACK, np.float32)).astype(np.float32)
    plate_outer = np.array([(0.29 * W, wall_y), (0.61 * W, wall_y),
                            (0.63 * W, 0.49 * H), (0.27 * W, 0.49 * H)])
    paint(albedo, [plate_outer], hazard, shade=1 + 0.06 * mid)
    plate = np.array([(0.31 * W, wall_y), (0.59 * W, wall_y),
                      (0.605 * W, 0.465 * H), (0.295 * W, 0.465 * H)])
    period = max(0.012 * W, 3.0)
    tread = (1.0 + 0.07 * np.sin(2 * np.pi * (xx + yy) / period)
             * np.sin(2 * np.pi * (xx - yy) / period) + 0.04 * mid)
    paint(albedo, [plate], (0.44, 0.45, 0.46), shade=tread.astype(np.float32))

    # Roller door: ribbed steel in a dark frame, rubber bumpers either side.
    paint(albedo, [rect(0.285 * W, 0.025 * H, 0.615 * W, wall_y)], (0.20, 0.21, 0.22))
    ribs = (1.0 + 0.08 * np.sin(2 * np.pi * yy / max(0.02 * H, 3.0)) + 0.03 * mid
            + 0.04 * coarse)
    paint(albedo, [rect(0.30 * W, 0.04 * H, 0.60 * W, 0.328 * H)], (0.58, 0.58, 0.56),
           shade=ribs.astype(np.float32))
    paint(albedo, [rect(0.30 * W, 0.318 * H, 0.60 * W, 0.332 * H)], (0.08, 0.08, 0.08))
    for x0 in (0.245, 0.625):
        paint(albedo, [rect(x0 * W, 0.22 * H, (x0 + 0.03) * W, 0.32 * H)], (0.07, 0.07, 0.08),
               shade=1 + 0.05 * mid)

    # Window (its glass is lit by the sky map, see below), fire extinguisher, exit sign.
    win = (0.70 * W, 0.06 * H, 0.90 * W, 0.17 * H)
    paint(albedo, [rect(win[0] - 0.006 * W, win[1] - 0.01 * H, win[2] + 0.006 * W,
                          win[3] + 0.01 * H)], (0.25, 0.25, 0.26))
    glass = [rect(win[0], win[1], 0.797 * W, win[3]), rect(0.803 * W, win[1], win[2], win[3])]
    paint(albedo, glass, (0.95, 0.93, 0.90))
    paint(albedo, [rect(0.945 * W, 0.19 * H, 0.962 * W, 0.285 * H)], (0.10, 0.10, 0.72),
           shade=1 + 0.05 * mid)
    paint(albedo, [rect(0.14 * W, 0.08 * H, 0.205 * W, 0.125 * H)], (0.30, 0.62, 0.15))
    paint(albedo, [rect(0.15 * W, 0.09 * H, 0.195 * W, 0.115 * H)], (0.85, 0.88, 0.86))

    # Painted safety line across the floor, a little worn.
    wear = np.clip(1.0 - 0.35 * np.maximum(mid, 0), 0.4, 1.0).astype(np.float32)
    paint(albedo, [rect(0, 0.525 * H, W, 0.54 * H)], YELLOW, shade=wear, opacity=0.9)

    # Pallet stack on the left: slatted top, dark gaps in the front.
    objects = np.zeros((H, W), np.float32)
    px0, px1, ptop, pfront, pbot = 0.03 * W, 0.21 * W, 0.40 * H, 0.50 * H, 0.58 * H
    darken(albedo, [rect(px0 + 0.01 * W, ptop + 0.02 * H, px1 + 0.025 * W, pbot + 0.025 * H)],
            0.55, blur=0.012 * W)
    wood = np.array((0.38, 0.56, 0.68))
    paint(albedo, [rect(px0, pfront, px1, pbot)], wood * 0.8, shade=1 + 0.06 * mid)
    for k in range(3):
        y = pfront + (k + 0.5) * (pbot - pfront) / 3
        for xg in np.linspace(px0 + 0.02 * W, px1 - 0.045 * W, 3):
            paint(albedo, [rect(xg, y - 0.008 * H, xg + 0.025 * W, y + 0.008 * H)],
                   (0.05, 0.05, 0.05))
    for k, y in enumerate(np.linspace(ptop, pfront, 8, endpoint=False)):
        tone = 1.0 + (0.06 if k % 2 else -0.04) + rng.normal(0, 0.03)
        paint(albedo, [rect(px0, y, px1, y + (pfront - ptop) / 8 * 0.8)], wood * tone,
               shade=1 + 0.08 * mid + 0.04 * fine)
    objects += coverage(H, W, [rect(px0, ptop, px1 + 0.03 * W, pbot + 0.03 * H)])

    # Parked platform trolley on the right, with its shadow, handle and wheels.
    tx0, tx1, ty0, ty1 = 0.64 * W, 0.84 * W, 0.62 * H, 0.80 * H
    darken(albedo, [rect(tx0 + 0.01 * W, ty0 + 0.03 * H, tx1 + 0.02 * W, ty1 + 0.04 * H)],
            0.5, blur=0.01 * W)
    for wx, wy in ((tx0 + 0.015 * W, ty1 + 0.01 * H), (tx1 - 0.015 * W, ty1 + 0.01 * H)):
        cv2.ellipse(albedo, (int(wx), int(wy)), (max(2, int(0.012 * W)), max(1, int(0.018 * H))),
                    0, 0, 360, (0.04, 0.04, 0.04), -1)
    paint(albedo, [rect(tx0, ty0, tx1, ty1)], (0.30, 0.26, 0.20))
    deck = (1.0 + 0.05 * mid + 0.06 * np.sign(np.sin(2 * np.pi * yy / max(0.012 * H, 2.0))))
    paint(albedo, [rect(tx0 + 0.008 * W, ty0 + 0.012 * H, tx1 - 0.008 * W, ty1 - 0.012 * H)],
           (0.50, 0.34, 0.20), shade=deck.astype(np.float32))
    tube = max(1.5, 0.008 * W)
    hx = tx1 - 0.012 * W
    for seg in (((hx, ty0 + 0.01 * H), (hx + 0.01 * W, 0.50 * H)),
                ((hx, ty1 - 0.01 * H), (hx + 0.01 * W, 0.68 * H)),
                ((hx + 0.01 * W, 0.50 * H), (hx + 0.01 * W, 0.68 * H))):
        paint(albedo, [segment(*seg, tube)], (0.16, 0.16, 0.17))
    objects += coverage(H, W, [rect(tx0 - 0.01 * W, 0.49 * H, tx1 + 0.03 * W, ty1 + 0.05 * H)])

    # Light maps: daylight (window side), overhead lamps (pools on the floor), fill.
    sky = (0.45 + 0.35 * np.exp(-((xx / W - 0.8) ** 2 / 0.08 + (yy / H - 0.12) ** 2 / 0.5))
           + 0.15 * (1.0 - yy / H)).astype(np.float32)
    sky += 0.18 * coverage(H, W, [np.array([(0.62 * W, 0.45 * H), (0.86 * W, 0.45 * H),
                                             (0.95 * W, 0.70 * H), (0.66 * W, 0.70 * H)])],
                            blur=0.04 * W)
    glass_cover = coverage(H, W, glass)
    sky = sky * (1 - glass_cover) + 2.4 * glass_cover
    sigma = 0.13 * W
    lamps = 0.22 + 0.85 * (gauss(xx, yy, 0.20 * W, 0.62 * H, sigma)
                           + gauss(xx, yy, 0.52 * W, 0.68 * H, sigma)
                           + gauss(xx, yy, 0.84 * W, 0.58 * H, sigma))
    lamps = np.where(yy < wall_y, lamps * 0.75, lamps).astype(np.float32)
    lamps = lamps * (1 - glass_cover) + 0.08 * glass_cover
    fill = (1.0 - 0.8 * glass_cover).astype(np.float32)

    floor = (yy > wall_y + 0.02 * H) & (objects < 0.01) & (yy < H - 2)
    return finish_scene("dock", albedo, (sky, lamps, fill), floor, fine, mid)


def aisle_scene(rng: np.random.Generator, width: int, height: int) -> Scene:
    """Shelf aisle in perspective: racking with boxes both sides, floor, ceiling lights."""
    W, H = width, height
    fine, mid, coarse, yy, xx = _canvas(rng, W, H)
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
    paint(albedo, [rect(bx0, vpy - ceiling_drop / z_far, bx1, y_at(z_far, 0.0))],
           (0.60, 0.62, 0.62), shade=1 + 0.04 * coarse)
    dw = (bx1 - bx0) * 0.22
    paint(albedo, [rect(vpx - dw, y_at(z_far, 0.48), vpx + dw, y_at(z_far, 0.0))],
           (0.09, 0.09, 0.10))
    # Floor with lane lines and a lighter polished strip down the middle.
    floor_poly = np.array([(-0.2 * W, H), (1.2 * W, H), (bx1, y_at(z_far, 0.0)),
                           (bx0, y_at(z_far, 0.0))])
    depth = np.clip((yy - vpy) / (H - vpy), 1e-3, None)
    polish = np.exp(-((xx - vpx) / (0.18 * W * depth)) ** 2)
    floor_shade = (1.0 + 0.06 * coarse + 0.03 * mid + 0.03 * fine + 0.18 * polish)
    paint(albedo, [floor_poly], (0.46, 0.49, 0.47), shade=floor_shade.astype(np.float32))
    worn = np.clip(1.0 - 0.3 * np.maximum(mid, 0), 0.5, 1).astype(np.float32)

    def lane(z: float, side: int, dx: float) -> tuple[float, float]:   # lane line on the floor
        return vpx + side * (vpx - near_x) * 0.8 / z + dx / z, y_at(z, 0.0)

    half = 0.006 * W
    for side in (-1, 1):
        paint(albedo, [np.array([lane(0.7, side, -half), lane(0.7, side, half),
                                  lane(z_far, side, half), lane(z_far, side, -half)])],
               YELLOW, shade=worn, opacity=0.85)

    # Ceiling light fixtures (their lamp map is very high, so they saturate).
    fixtures = []
    for z in (2.5, 2.9, 3.35):
        yc = vpy - ceiling_drop / z
        half_w, half_h = 0.12 * W / z, 0.03 * H / z + 0.5
        fixtures.append(rect(vpx - half_w, yc - half_h, vpx + half_w, yc + half_h))
    paint(albedo, fixtures, (0.95, 0.95, 0.95))

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
        paint(albedo, [face], (0.08, 0.08, 0.09), shade=1 + 0.1 * mid)
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
                colour = cardboard(rng)
                poly = np.array([(x_at(za, side), y_at(za, base)),
                                 (x_at(zb, side), y_at(zb, base)),
                                 (x_at(zb, side), y_at(zb, top)),
                                 (x_at(za, side), y_at(za, top))])
                paint(albedo, [poly], colour, shade=1 + 0.05 * mid + 0.02 * fine)
                # A label on some boxes.
                if rng.random() < 0.5 and zb - za > 0.12:
                    la, lb = za + 0.3 * (zb - za), za + 0.6 * (zb - za)
                    l0, l1 = base + 0.35 * (top - base), base + 0.6 * (top - base)
                    paint(albedo, [np.array([(x_at(la, side), y_at(la, l0)),
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
            paint(albedo, [beam], beam_colour, shade=1 + 0.04 * mid)
        for z in uprights:
            w_half = 0.012 * W / z
            xu = x_at(z, side)
            post = np.array([(xu - w_half, y_at(z, 0.0)), (xu + w_half, y_at(z, 0.0)),
                             (xu + w_half, y_at(z, 1.0)), (xu - w_half, y_at(z, 1.0))])
            paint(albedo, [post], upright_colour, shade=1 + 0.04 * mid)

    # Light maps: ceiling lamps down the aisle, and a weak fill.
    fixture_cover = coverage(H, W, fixtures, blur=0.6)
    lamps = (0.70 + 0.40 * np.exp(-((xx - vpx) / (0.38 * W)) ** 2)
             - 0.12 * np.clip((vpy - yy) / H, 0, 1) + 0.08 * coarse * 0.3).astype(np.float32)
    lamps = lamps * (1 - fixture_cover) + 3.0 * fixture_cover
    fill = np.ones((H, W), np.float32)

    floor_cover = coverage(H, W, [floor_poly])
    # Free floor: inside the floor polygon and between the rack bases.
    left_edge = vpx + (near_x - vpx) * (yy - vpy) / (near_base - vpy)
    right_edge = 2 * vpx - left_edge
    floor = ((floor_cover > 0.99) & (xx > left_edge + 0.01 * W) & (xx < right_edge - 0.01 * W)
             & (yy > y_at(z_far, 0.0) + 2) & (yy < H - 2))
    return finish_scene("aisle", albedo, (lamps, fill), floor, fine, mid)


def yard_scene(rng: np.random.Generator, width: int, height: int) -> Scene:
    """Gravel yard behind the depot: a fence along the top, gravel ground from a photograph
    (``skimage.data.gravel``, bundled with scikit-image, so only when it is installed: a
    bench camera, not one of the demo's), floodlights on poles.

    The photograph gives the ground a texture unlike the drawn floors of the other views:
    dense, irregular stones whose normal appearance varies from cell to cell.
    """
    from skimage import data  # noqa: PLC0415 - test dependency, only for this camera

    W, H = width, height
    fine, mid, coarse, yy, xx = _canvas(rng, W, H)
    fence_y = 0.22 * H
    grey = data.gravel().astype(np.float32) / 255.0          # (512, 512) photograph
    x0 = int(rng.integers(0, grey.shape[1] // 4))
    y0 = int(rng.integers(0, grey.shape[0] // 4))
    crop = grey[y0:y0 + 3 * grey.shape[0] // 4, x0:x0 + 3 * grey.shape[1] // 4]
    ground = cv2.resize(crop, (W, H), interpolation=cv2.INTER_AREA)
    tint = np.array((0.52, 0.56, 0.60), np.float32) * rng.uniform(0.9, 1.1)
    albedo = (0.55 + 0.9 * (ground - ground.mean()))[..., None] * tint
    albedo *= (1.0 + 0.04 * coarse)[..., None]
    # Fence: vertical boards over a dark gap, along the top of the view.
    boards = ((xx % max(0.03 * W, 4.0)) > 0.004 * W).astype(np.float32)
    fence = np.array((0.30, 0.42, 0.50), np.float32) * (0.55 + 0.45 * boards)[..., None]
    fence *= (1.0 + 0.03 * mid)[..., None]
    albedo = np.where((yy < fence_y)[..., None], fence, albedo).astype(np.float32)

    sky = (0.55 + 0.25 * (1.0 - yy / H) + 0.05 * coarse).astype(np.float32)
    sigma = 0.16 * W
    lamps = (0.2 + 0.8 * (gauss(xx, yy, 0.25 * W, 0.55 * H, sigma)
                          + gauss(xx, yy, 0.75 * W, 0.60 * H, sigma))).astype(np.float32)
    fill = np.ones((H, W), np.float32)
    floor = (yy > fence_y + 0.03 * H) & (yy < H - 2)
    return finish_scene("yard", albedo, (sky, lamps, fill), floor, fine, mid)


BUILDERS: dict[str, Callable[[np.random.Generator, int, int], Scene]] = {
    "dock": dock_scene,
    "aisle": aisle_scene,
    # Busy cameras (see inspector.demo.traffic): the same kinds of place, other views.
    "walkway": aisle_scene,
    "gate": dock_scene,
    "yard": yard_scene,
}


# --- conditions over time --------------------------------------------------------------


@dataclass(frozen=True)
class Lighting:
    """How one frame is lit and exposed."""

    #: BGR weight of each light layer of the scene, exposure gain included.
    coeffs: tuple[tuple[float, float, float], ...]
    #: Sensor noise standard deviation in 8-bit levels.
    sigma: float
    #: Rolling-shutter flicker band: (amplitude, period in rows, phase) or None.
    band: tuple[float, float, float] | None
    #: Approximate mean brightness of the frame in [0, 1].
    level: float


def hours(t: datetime) -> float:
    return t.hour + t.minute / 60 + t.second / 3600


class DockWeather:
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

    def conditions(self, t: datetime, scene: Scene, gain_jitter: float) -> Lighting:
        clear, waves, off_morning, on_evening, off_night = self._day(t.date())
        h = hours(t)
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
        return Lighting(coeffs=coeffs, sigma=sigma, band=None, level=level * gain)


class AisleLamps:
    """Fluorescent lighting of the aisle: flicker and occasional exposure steps."""

    def __init__(self, rng: np.random.Generator):
        self.rng = rng
        self.exposure = 1.0

    def conditions(self, t: datetime, scene: Scene, gain_jitter: float) -> Lighting:
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
        return Lighting(coeffs=coeffs, sigma=2.0, band=band, level=level)


LIGHTING = {"dock": DockWeather, "aisle": AisleLamps, "walkway": AisleLamps, "gate": DockWeather,
            "yard": DockWeather}
