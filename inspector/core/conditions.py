"""Camera conditions: what a fixed camera does to its frames that is not an incident.

Shared by every density model: frames are prepared here before any model sees them, at
learn time and at scoring time alike, so PPCA and VAE get the same help.

* Registration: each frame is aligned to the baseline's reference by phase correlation
  (Kuglin & Hines 1975, "The phase correlation image alignment method"; sub-pixel peak as
  in ``cv2.phaseCorrelate``), kept only when it makes the frame correlate better with the
  reference (a large incident can fool the peak). A shift beyond ``max_shift`` is not corrected: the camera
  has been moved, which is a health condition, not an anomaly.
* Photometric normalisation: a robust fit ``reference ~ gain * frame + offset`` over the
  frame's pixels (percentile matching, then least squares refitted twice on the pixels
  whose residual is within 3 robust standard deviations, so a local incident does not pull
  the fit), applied to
  every channel ("global"); "local" also divides out a smooth brightness field (a Gaussian
  blur of an eighth of the long side), for lights that change one side of a scene only.
* Burned-in text (clock, date, camera name): found at learn time as places where the sample
  frames differ in sharp strokes while the smooth content stays put, grown along the text
  line, and masked.
* Health: lens covered, out of focus, frozen feed, too dark, overexposed, camera moved,
  each a measure with a limit, the limits widened by what the normal frames showed.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import cv2
import numpy as np

#: Lighting modes of :func:`photometric`.
LIGHTING_MODES = ("global", "local", "off")
#: Health conditions, in the order they are reported.
HEALTH_CONDITIONS = ("camera moved", "lens covered", "out of focus", "frozen feed",
                     "too dark", "overexposed")
#: Health limits before they are widened by the normal frames (see :meth:`Conditions.fit`).
DEFAULT_LIMITS = {"dark": 20.0, "bright": 0.5, "covered": 0.5, "focus": 0.35, "frozen": 0.25}
#: Neighbourhood of a clipped pixel whose brightness is not trusted (see ``prepare``).
_NEAR = np.ones((3, 3), np.uint8)
#: Side of the grid of cells used by the "lens covered" measure.
COVER_GRID = 8
#: A textured cell whose correlation with the reference falls below this is lost from view.
COVER_CORRELATION = 0.2


# --- pure functions -------------------------------------------------------------------------

def grey(images: np.ndarray) -> np.ndarray:
    """Luma (ITU-R BT.601 weights) of RGB frames.

    Parameters
    ----------
    images : ndarray, shape (n, H, W, 3), uint8 or float

    Returns
    -------
    ndarray, shape (n, H, W), float32 in [0, 255]
    """
    w = np.array([0.299, 0.587, 0.114], np.float32)
    return np.asarray(images, np.float32) @ w


def robust_gain_offset(frame: np.ndarray, reference: np.ndarray,
                       keep: np.ndarray | None = None) -> tuple[float, float]:
    """Fit ``reference ~ gain * frame + offset`` robustly.

    Starts from matching the 10th-90th percentile range and the medians (unmoved by a
    small bright or dark region), then refits by least squares twice on the pixels whose
    residual lies within 3 x 1.4826 x MAD (iteratively trimmed least squares), so a local
    change (an incident) does not move the fit.

    Parameters
    ----------
    frame, reference : ndarray, shape (H, W), float
    keep : ndarray, shape (H, W), bool, optional
        Pixels that may be used (e.g. outside masks and text overlays).

    Returns
    -------
    gain, offset : float
        ``gain`` within [0.1, 10]; (1, 0) when the frame has no usable contrast.
    """
    # Every 4th pixel each way: a two-parameter fit needs far fewer than the thousands of
    # pixels this leaves, and it runs for every frame scored.
    x = np.asarray(frame, np.float64)[::4, ::4].ravel()
    y = np.asarray(reference, np.float64)[::4, ::4].ravel()
    ok = (x > 2) & (x < 253)
    if keep is not None:
        ok &= np.asarray(keep)[::4, ::4].ravel()
    x, y = x[ok], y[ok]
    if len(x) < 16 or x.std() < 1.0:
        return 1.0, 0.0
    qx, qy = np.percentile(x, [10, 50, 90]), np.percentile(y, [10, 50, 90])
    gain = (qy[2] - qy[0]) / max(qx[2] - qx[0], 1.0)
    offset = qy[1] - gain * qx[1]
    for _ in range(2):
        r = y - (gain * x + offset)
        mad = 1.4826 * np.median(np.abs(r - np.median(r)))
        use = np.abs(r - np.median(r)) <= 3.0 * max(mad, 0.5)
        xs, ys = x[use], y[use]
        if len(xs) < 16:
            break
        mx, my = xs.mean(), ys.mean()
        vx = float(((xs - mx) ** 2).mean())
        if vx < 1.0:
            break
        gain = float(((xs - mx) * (ys - my)).mean()) / vx  # least squares line
        offset = my - gain * mx
    gain = float(np.clip(gain, 0.1, 10.0))
    return gain, float(offset)


def phase_shift(frame: np.ndarray, reference: np.ndarray,
                ignore: np.ndarray | None = None) -> tuple[float, float]:
    """Sub-pixel translation of ``frame`` relative to ``reference`` by phase correlation.

    Parameters
    ----------
    frame, reference : ndarray, shape (H, W), float
    ignore : ndarray, shape (H, W), bool, optional
        Pixels filled with the image mean first (burned-in text does not move with the
        camera and would pull the estimate towards zero).

    Returns
    -------
    dx, dy : float
        The content of ``frame`` sits ``(dx, dy)`` pixels right and down of where it sits in
        ``reference``.
    """
    a = np.asarray(reference, np.float32).copy()
    b = np.asarray(frame, np.float32).copy()
    if ignore is not None and ignore.any():
        a[ignore] = a[~ignore].mean()
        b[ignore] = b[~ignore].mean()
    win = cv2.createHanningWindow((a.shape[1], a.shape[0]), cv2.CV_32F)
    (dx, dy), _ = cv2.phaseCorrelate(a, b, win)
    return float(dx), float(dy)


def _correlation(a: np.ndarray, b: np.ndarray, keep: np.ndarray | None = None) -> float:
    """Pearson correlation of two images over the kept pixels, a 10-pixel margin left out
    (the edges a shift moves in)."""
    h, w = a.shape
    m = min(10, h // 8, w // 8)
    sel = np.s_[m:h - m, m:w - m]
    x, y = a[sel], b[sel]
    if keep is not None:
        x, y = x[keep[sel]], y[keep[sel]]
    x = x - x.mean()
    y = y - y.mean()
    den = float(np.sqrt((x * x).sum() * (y * y).sum()))
    return float((x * y).sum() / den) if den > 0 else 0.0


def shift_images(images: np.ndarray, dx: float, dy: float) -> np.ndarray:
    """Move the content of images by (dx, dy) pixels (bilinear, edges reflected).

    Parameters
    ----------
    images : ndarray, shape (H, W, C) or (H, W)
    """
    h, w = images.shape[:2]
    m = np.float32([[1, 0, dx], [0, 1, dy]])
    return cv2.warpAffine(images, m, (w, h), flags=cv2.INTER_LINEAR,
                          borderMode=cv2.BORDER_REFLECT_101)


def brightness_field(frame: np.ndarray, reference: np.ndarray, sigma: float) -> np.ndarray:
    """Smooth multiplicative field that brings ``frame``'s local brightness to the
    reference's: ``blur(reference) / blur(frame)``, clipped to [0.25, 4].

    Returns
    -------
    ndarray, shape (H, W), float32
    """
    frame = np.asarray(frame, np.float32)
    h, w = frame.shape
    k = max(1, int(sigma // 4))  # the field is smooth: blur a 1/k image, then enlarge it
    small = (max(1, w // k), max(1, h // k))
    f = cv2.GaussianBlur(cv2.resize(frame, small, interpolation=cv2.INTER_AREA), (0, 0),
                         sigma / k)
    r = cv2.GaussianBlur(cv2.resize(np.asarray(reference, np.float32), small,
                                    interpolation=cv2.INTER_AREA), (0, 0), sigma / k)
    field = np.clip((r + 4.0) / (f + 4.0), 0.25, 4.0).astype(np.float32)
    return cv2.resize(field, (w, h), interpolation=cv2.INTER_LINEAR)


def sharpness(g: np.ndarray) -> float:
    """Variance of the Laplacian over the variance of the image (Pech-Pacheco et al. 2000,
    "Diatom autofocusing in brightfield microscopy"); dividing by the image variance makes it
    blind to gain, so a darker frame does not look blurred."""
    g = np.asarray(g, np.float32)
    lap = cv2.Laplacian(g, cv2.CV_32F, ksize=3)
    return float(lap.var() / max(float(g.var()), 1e-3))


def _cell_sums(x: np.ndarray, grid: int) -> np.ndarray:
    """Sums of ``x`` (H, W) over the cells of a ``grid`` x ``grid`` split, shape (grid, grid)."""
    h, w = x.shape
    ys = np.linspace(0, h, grid + 1).astype(int)[:-1]
    xs = np.linspace(0, w, grid + 1).astype(int)[:-1]
    return np.add.reduceat(np.add.reduceat(x, ys, axis=0), xs, axis=1)


def _cell_counts(shape: tuple[int, int], grid: int) -> np.ndarray:
    h, w = shape
    ny = np.diff(np.linspace(0, h, grid + 1).astype(int))
    nx = np.diff(np.linspace(0, w, grid + 1).astype(int))
    return np.outer(ny, nx).astype(np.float64)


def _cell_var(x: np.ndarray, grid: int) -> np.ndarray:
    x = np.asarray(x, np.float64)
    n = _cell_counts(x.shape, grid)
    m = _cell_sums(x, grid) / n
    return np.maximum(_cell_sums(x * x, grid) / n - m * m, 0.0)


def cell_detail(g: np.ndarray, grid: int = COVER_GRID) -> np.ndarray:
    """Variance of the Laplacian in each cell of a ``grid`` x ``grid`` split (the detail a
    sharp lens resolves there).

    Returns
    -------
    ndarray, shape (grid, grid), float32
    """
    lap = cv2.Laplacian(np.asarray(g, np.float32), cv2.CV_32F, ksize=3)
    return _cell_var(lap, grid).astype(np.float32)


def cell_contrast(g: np.ndarray, grid: int = COVER_GRID) -> np.ndarray:
    """Standard deviation of each cell of a ``grid`` x ``grid`` split of the image.

    Returns
    -------
    ndarray, shape (grid, grid), float32
    """
    return np.sqrt(_cell_var(g, grid)).astype(np.float32)


def cell_correlation(g: np.ndarray, ref: np.ndarray, grid: int = COVER_GRID) -> np.ndarray:
    """Normalised cross-correlation of each cell of ``g`` with the same cell of ``ref``.

    Blind to gain and offset cell by cell, so night and day frames of the same view both
    correlate with the reference, while a cell behind a hand, a bag or tape does not.

    Returns
    -------
    ndarray, shape (grid, grid), float32 in [-1, 1]
    """
    a = np.asarray(g, np.float64)
    b = np.asarray(ref, np.float64)
    n = _cell_counts(a.shape, grid)
    ma, mb = _cell_sums(a, grid) / n, _cell_sums(b, grid) / n
    cov = _cell_sums(a * b, grid) / n - ma * mb
    va = np.maximum(_cell_sums(a * a, grid) / n - ma * ma, 0.0)
    vb = np.maximum(_cell_sums(b * b, grid) / n - mb * mb, 0.0)
    den = np.sqrt(va * vb)
    return np.where(den > 1e-9, cov / np.maximum(den, 1e-9), 0.0).astype(np.float32)


def noise_sigma(g: np.ndarray) -> float:
    """Standard deviation of white noise in an image.

    The image is filtered with the difference of two Laplacians of Immerkaer (1996, "Fast
    noise variance estimation", Computer Vision and Image Understanding 64(2)), which
    cancels smooth content and leaves 6 sigma of white noise; the robust spread
    1.4826 x median |response| is used instead of the mean absolute response, so edges
    (a small share of the pixels) do not inflate the estimate.
    """
    kernel = np.array([[1, -2, 1], [-2, 4, -2], [1, -2, 1]], np.float32)
    r = cv2.filter2D(np.asarray(g, np.float32), -1, kernel)[1:-1, 1:-1]
    return float(1.4826 * np.median(np.abs(r)) / 6.0)


def darker_exposure(image: np.ndarray, gain: float, rng: np.random.Generator) -> np.ndarray:
    """The frame as a shorter exposure would have caught it: the signal times ``gain``
    (<= 1) with the sensor noise unchanged, i.e. ``gain * image`` plus fresh noise of
    variance ``sigma^2 (1 - gain^2)`` (sigma from :func:`noise_sigma`). Normalised back to
    the reference, such a frame is noisier than the original, as real darker frames are.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
    gain : float in (0, 1]

    Returns
    -------
    ndarray, shape (H, W, 3), uint8
    """
    sigma = noise_sigma(grey(image[None])[0])
    extra = sigma * np.sqrt(max(0.0, 1.0 - gain * gain))
    out = image.astype(np.float32) * gain + rng.normal(0.0, extra, image.shape)
    return np.clip(out + 0.5, 0, 255).astype(np.uint8)


def find_text_boxes(greys: np.ndarray, ignore: np.ndarray | None = None,
                    ) -> list[tuple[int, int, int, int]]:
    """Boxes of burned-in text (clock, date, camera name) in a sample of normal frames.

    A pixel is a changing stroke when its high-pass content (frame minus a Gaussian blur
    of 1.5 px) varies over the sample far more than the noise does (8 x the median of that
    variation, and at least 12 grey levels) while its smooth content varies less (a clock's
    digits change; the wall behind them does not), and more than its mean high-pass value
    (strokes come and go; a painted edge whose contrast follows the light does not). Such pixels are joined along rows into
    lines; a line is kept when it is flat (height at most a tenth of the frame, wider than
    high) and then extended sideways over the steady strokes next to it (the static part of
    a date or a camera name).

    Parameters
    ----------
    greys : ndarray, shape (n, H, W), float
        Normal frames in time order, n >= 3, photometrically normalised.
    ignore : ndarray, shape (H, W), bool, optional

    Returns
    -------
    list of (x0, y0, x1, y1)
        Pixel boxes at the frames' resolution, end-exclusive.
    """
    g = np.asarray(greys, np.float32)
    n, h, w = g.shape
    if n < 3:
        return []
    low = np.stack([cv2.GaussianBlur(x, (0, 0), 1.5) for x in g])
    high = g - low
    v_high = high.std(axis=0)
    v_low = low.std(axis=0)
    level = float(np.median(v_high))
    cand = ((v_high > max(8.0 * level, 12.0)) & (v_high > 1.2 * v_low)
            & (v_high > np.abs(high.mean(axis=0))))
    if ignore is not None:
        cand &= ~ignore
    if cand.sum() < 4:
        return []
    strokes = np.abs(high).mean(axis=0)
    stroke_level = float(np.median(strokes))
    steady = strokes > max(6.0 * stroke_level, 8.0)
    k = max(3, int(round(0.02 * w)))
    joined = cv2.morphologyEx(cand.astype(np.uint8), cv2.MORPH_CLOSE,
                              cv2.getStructuringElement(cv2.MORPH_RECT, (2 * k + 1, 3)))
    count, _, stats, _ = cv2.connectedComponentsWithStats(joined, connectivity=8)
    boxes = []
    for i in range(1, count):
        x, y, bw, bh, area = (int(v) for v in stats[i])
        if bh > max(0.1 * h, 3) or bw < bh or cand[y:y + bh, x:x + bw].sum() < 4:
            continue
        gap = max(2 * bh, 3)
        x0, x1 = x, x + bw
        band = steady[y:y + bh]
        while True:
            left = band[:, max(0, x0 - gap):x0].any(axis=0)
            if not left.any():
                break
            x0 = max(0, x0 - gap) + int(np.argmax(left))
            if x0 == 0:
                break
        while True:
            right = band[:, x1:min(w, x1 + gap)].any(axis=0)
            if not right.any():
                break
            x1 = x1 + len(right) - int(np.argmax(right[::-1]))
            if x1 >= w:
                break
        pad = max(1, bh // 3)
        boxes.append((max(0, x0 - pad), max(0, y - pad), min(w, x1 + pad), min(h, y + bh + pad)))
    return _merge_boxes(boxes)


def _merge_boxes(boxes: list[tuple[int, int, int, int]]) -> list[tuple[int, int, int, int]]:
    out: list[list[int]] = []
    for b in sorted(boxes):
        for o in out:
            if b[0] <= o[2] and o[0] <= b[2] and b[1] <= o[3] and o[1] <= b[3]:
                o[:] = [min(o[0], b[0]), min(o[1], b[1]), max(o[2], b[2]), max(o[3], b[3])]
                break
        else:
            out.append(list(b))
    return [tuple(o) for o in out]  # type: ignore[misc]


def boxes_mask(boxes, size: tuple[int, int], scale: tuple[float, float] = (1.0, 1.0)
               ) -> np.ndarray:
    """Boolean (H, W) mask of boxes (x0, y0, x1, y1), scaled by (sx, sy) first."""
    w, h = size
    m = np.zeros((h, w), bool)
    sx, sy = scale
    for x0, y0, x1, y1 in boxes:
        m[max(0, int(np.floor(y0 * sy))):int(np.ceil(y1 * sy)),
          max(0, int(np.floor(x0 * sx))):int(np.ceil(x1 * sx))] = True
    return m


# --- learned state --------------------------------------------------------------------------

@dataclass
class Conditions:
    """A camera's normal conditions, learnt with its baseline, applied to every frame.

    Parameters
    ----------
    lighting : {"global", "local", "off"}
    register : bool
        Align frames to the reference before scoring.
    max_shift : float
        Largest shift corrected, in working pixels; beyond it, "camera moved".
    health : bool
        Report health conditions (and keep frames with one from being flagged).
    limits : dict of str to float
        Limit of each health measure (see :meth:`fit`).

    Attributes
    ----------
    reference : ndarray, shape (H, W), float32
        Median grey of the (aligned, normalised) sample of normal frames.
    reference_rgb : ndarray, shape (H, W, 3), uint8
        Their median colour (fills what a shift uncovers; bounds clipped pixels).
    ignore : ndarray, shape (H, W), bool, or None
        Pixels left out of the fits and the health measures (user mask and text overlays).
    ref_cells : ndarray, shape (g, g), float32
        Median cell contrast of the normal frames (which cells have texture to lose).
    ref_detail : ndarray, shape (g, g), float32
        Median cell detail (:func:`cell_detail`) of the normal frames, brought to the
        reference's gain.
    """

    lighting: str = "local"
    register: bool = True
    max_shift: float = 8.0
    health: bool = True
    limits: dict[str, float] = field(default_factory=dict)
    reference: np.ndarray | None = None
    reference_rgb: np.ndarray | None = None
    ignore: np.ndarray | None = None
    ref_cells: np.ndarray | None = None
    ref_detail: np.ndarray | None = None
    #: (colour reference, it as float32, dilated mask of its clipped whites), made once.
    _ref_terms: tuple | None = field(default=None, init=False, repr=False, compare=False)

    # -- learning ------------------------------------------------------------------------
    def fit(self, images: np.ndarray, ignore: np.ndarray | None = None,
            defaults: dict[str, float] | None = None) -> "Conditions":
        """Learn the reference and the health limits from a sample of normal frames.

        Limits start from ``defaults`` (``dark``: 99th percentile of grey below which a
        frame is too dark; ``bright``: share of clipped pixels above which it is
        overexposed; ``covered``: share of the reference's textured cells that no longer
        correlate with it; ``focus``: median over textured cells of their detail (variance of the
        Laplacian) relative to normal, below which it is out of focus; ``frozen``: mean absolute
        difference to the previous frame, in grey levels, below which the feed is frozen)
        and are widened so that no more than the sample's extremes would have tripped them
        (with a margin), so a camera that is normally dim or soft is not reported all day.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
            Normal frames in time order.
        ignore : ndarray, shape (H, W), bool, optional
        """
        self.ignore = ignore
        ref = np.median(grey(images), axis=0)
        ref_rgb = None
        for _ in range(2):  # align and normalise the sample to a first reference, then redo
            rgb = self.prepare(images, reference=ref, reference_rgb=ref_rgb)[0]
            ref = np.median(grey(rgb), axis=0)
            ref_rgb = np.median(rgb, axis=0).astype(np.uint8)
        self.reference = ref.astype(np.float32)
        self.reference_rgb = ref_rgb
        rgb, shifts = self.prepare(images)
        self.ref_cells = np.median(np.stack([cell_contrast(x) for x in grey(rgb)]), axis=0)
        self.ref_detail = np.median(np.stack([self._detail(x) for x in grey(images)]), axis=0)
        self.set_limits(self.measures(images, shifts=shifts), defaults)
        return self

    def set_limits(self, m: dict[str, np.ndarray], defaults: dict[str, float] | None = None
                   ) -> None:
        """Health limits from ``defaults`` widened by the measures ``m`` of normal frames
        (see :meth:`fit`); call again with the measures of all normal frames when known."""
        d = dict(DEFAULT_LIMITS)
        d.update(defaults or {})
        self.limits = {
            "dark": float(min(d["dark"], 0.7 * np.min(m["dark"]))),
            "bright": float(min(0.99, max(d["bright"], 1.5 * np.max(m["bright"])))),
            "covered": float(min(0.99, max(d["covered"], np.max(m["covered"]) + 0.2))),
            "focus": float(min(d["focus"], 0.7 * np.min(m["focus"]))),
            "frozen": float(d["frozen"]),
        }

    # -- per frame -----------------------------------------------------------------------
    def prepare(self, images: np.ndarray, reference: np.ndarray | None = None,
                reference_rgb: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Align and normalise frames to the reference.

        A frame shifted by ``(dx, dy)`` is moved back; the strip its edge leaves uncovered and
        the places where burned-in text (which does not move with the camera) would land are
        filled from the colour reference. A pixel clipped white in the frame (>= 250) only
        bounds its true value from below, so after the gain it is raised to the reference
        when that is brighter (never lowered: a white parcel stays white). Where the frame
        is clipped next to where the reference is clipped too (a lamp, a sunlit window),
        the pixels do not follow a gain at all (their edges mix clipped and unclipped
        light) and take the reference's colour. Black clipping is left alone: at night most
        dark pixels are near 0 and follow no gain either, but they are all alike.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
        reference, reference_rgb : ndarray, optional
            Used instead of the learnt ones (while learning them).

        Returns
        -------
        prepared : ndarray, shape (n, H, W, 3), uint8
        shifts : ndarray, shape (n, 2), float
            Measured (dx, dy) of each frame; frames beyond ``max_shift`` are not moved.
        """
        if reference is None:
            ref, ref_rgb = self.reference, self.reference_rgb
        else:
            ref, ref_rgb = reference, reference_rgb
        images = np.asarray(images)
        shifts = np.zeros((len(images), 2))
        if ref is None or (not self.register and self.lighting == "off"):
            return images, shifts
        keep = None if self.ignore is None else ~self.ignore
        out = np.empty_like(images)
        sigma = max(images.shape[1:3]) / 8.0
        ones = np.ones(images.shape[1:3], np.float32)
        ignore = (np.zeros(images.shape[1:3], np.float32) if self.ignore is None
                  else self.ignore.astype(np.float32))
        for i, img in enumerate(images):
            g = grey(img[None])[0]
            fill = None
            if self.register:
                dx, dy = phase_shift(g, ref, self.ignore)
                if np.hypot(dx, dy) > 0.05:
                    moved_back = shift_images(g, -dx, -dy)
                    if _correlation(moved_back, ref, keep) <= _correlation(g, ref, keep):
                        dx = dy = 0.0  # no better aligned: a large change fooled the peak
                shifts[i] = dx, dy
                if 0.05 < np.hypot(dx, dy) <= self.max_shift:
                    img = shift_images(img, -dx, -dy)
                    g = moved_back
                    m = np.float32([[1, 0, -dx], [0, 1, -dy]])
                    h, w = g.shape
                    covered = cv2.warpAffine(ones, m, (w, h), flags=cv2.INTER_LINEAR,
                                             borderMode=cv2.BORDER_CONSTANT, borderValue=0)
                    ghost = cv2.warpAffine(ignore, m, (w, h), flags=cv2.INTER_LINEAR,
                                           borderMode=cv2.BORDER_CONSTANT, borderValue=0)
                    fill = (covered < 0.999) | (ghost > 0.001)
            if self.lighting == "off":
                f = img.astype(np.float32)
            else:
                gain, offset = robust_gain_offset(g, ref, keep)
                f = img.astype(np.float32) * gain + offset
                if self.lighting == "local":
                    f *= brightness_field(g * gain + offset, ref, sigma)[..., None]
                if ref_rgb is not None and img.max() >= 250:  # any clipped pixel at all
                    r, ref_glare = self._reference_terms(ref_rgb)
                    clipped = img.max(axis=2) >= 250
                    np.maximum(f, r, out=f, where=clipped[..., None])
                    glare = (cv2.dilate(clipped.astype(np.uint8), _NEAR) & ref_glare) > 0
                    f[glare] = r[glare]
            if fill is not None and ref_rgb is not None:
                f[fill] = ref_rgb[fill]
            out[i] = np.clip(f + 0.5, 0, 255).astype(np.uint8)
        return out, shifts

    def _reference_terms(self, ref_rgb: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The colour reference as float32 and the dilated mask of its clipped whites,
        computed once per reference rather than once per frame."""
        if self._ref_terms is None or self._ref_terms[0] is not ref_rgb:
            clipped = (np.asarray(ref_rgb).max(axis=2) >= 250).astype(np.uint8)
            self._ref_terms = (ref_rgb, np.asarray(ref_rgb, np.float32),
                               cv2.dilate(clipped, _NEAR))
        return self._ref_terms[1], self._ref_terms[2]

    def measures(self, images: np.ndarray, previous: np.ndarray | None = None,
                 shifts: np.ndarray | None = None) -> dict[str, np.ndarray]:
        """Health measures of each frame (see :meth:`fit` for their meaning).

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
            Frames as captured.
        previous : ndarray, shape (H, W), float, optional
            Grey of the frame before the first one (for "frozen feed").
        shifts : ndarray, shape (n, 2), optional
            Shifts measured by :meth:`prepare` ("camera moved"; the "lens covered" measure
            compares the frame aligned by them).

        Returns
        -------
        dict of str to ndarray, shape (n,)
            ``dark``, ``bright``, ``covered``, ``focus``, ``frozen``, ``shift``.
        """
        g = grey(images)
        keep = np.ones(g.shape[1:], bool) if self.ignore is None else ~self.ignore
        n = len(g)
        out = {k: np.zeros(n) for k in ("dark", "bright", "covered", "focus", "frozen", "shift")}
        textured = self.ref_cells > max(2.0, 0.1 * float(np.median(self.ref_cells))) \
            if self.ref_cells is not None else None
        for i in range(n):
            px = g[i][keep]
            out["dark"][i] = np.percentile(px[::4], 99)  # a quarter of the pixels is plenty
            out["bright"][i] = float(np.mean(px >= 250))
            if textured is not None and textured.any() and self.reference is not None:
                aligned = g[i] if shifts is None else shift_images(g[i], *(-shifts[i]))
                lost = cell_correlation(aligned, self.reference) < COVER_CORRELATION
                out["covered"][i] = float(lost[textured].mean())
            if textured is not None and textured.any() and self.ref_detail is not None:
                ratio = self._detail(g[i]) / np.maximum(self.ref_detail, 1e-6)
                out["focus"][i] = float(np.median(ratio[textured]))
            else:
                out["focus"][i] = 1.0
            before = previous if i == 0 else g[i - 1]
            out["frozen"][i] = (float(np.abs(g[i] - before)[keep].mean())
                                if before is not None else np.inf)
            if shifts is not None:
                out["shift"][i] = float(np.hypot(*shifts[i]))
        return out

    def _detail(self, g: np.ndarray) -> np.ndarray:
        """Cell detail of a grey frame at the reference's gain."""
        if self.reference is not None:
            keep = None if self.ignore is None else ~self.ignore
            gain, _ = robust_gain_offset(g, self.reference, keep)
            g = g * gain
        return cell_detail(g)

    def conditions(self, m: dict[str, np.ndarray]) -> list[list[tuple[str, float, float]]]:
        """Health conditions of each frame from its measures.

        Returns
        -------
        list (one per frame) of lists of (condition, measure, limit)
        """
        lim = self.limits
        rows: list[list[tuple[str, float, float]]] = []
        for i in range(len(m["dark"])):
            found = []
            covered = m["covered"][i] > lim.get("covered", 0.5)
            # a covered lens leaves nothing to correlate: its "shift" means nothing
            moved = self.register and m["shift"][i] > self.max_shift and not covered
            if moved:
                found.append(("camera moved", m["shift"][i], self.max_shift))
            dark = m["dark"][i] < lim.get("dark", 20.0)
            if covered:
                found.append(("lens covered", m["covered"][i], lim.get("covered", 0.5)))
            elif m["focus"][i] < lim.get("focus", 0.35) and not moved and not dark:
                found.append(("out of focus", m["focus"][i], lim.get("focus", 0.35)))
            if m["frozen"][i] < lim.get("frozen", 0.25):
                found.append(("frozen feed", m["frozen"][i], lim.get("frozen", 0.25)))
            if dark:
                found.append(("too dark", m["dark"][i], lim.get("dark", 20.0)))
            if m["bright"][i] > lim.get("bright", 0.5):
                found.append(("overexposed", m["bright"][i], lim.get("bright", 0.5)))
            rows.append([(c, float(v), float(li)) for c, v, li in found])
        return rows

    # -- persistence ---------------------------------------------------------------------
    def to_json(self) -> dict[str, Any]:
        return {"lighting": self.lighting, "register": self.register,
                "max_shift": self.max_shift, "health": self.health, "limits": self.limits}

    def arrays(self) -> dict[str, np.ndarray]:
        out = {}
        for k in ("reference", "reference_rgb", "ignore", "ref_cells", "ref_detail"):
            v = getattr(self, k)
            if v is not None:
                out[k] = v
        return out

    @classmethod
    def from_saved(cls, meta: dict[str, Any], arrays: dict[str, np.ndarray]) -> "Conditions":
        c = cls(lighting=meta["lighting"], register=bool(meta["register"]),
                max_shift=float(meta["max_shift"]), health=bool(meta["health"]),
                limits={k: float(v) for k, v in meta["limits"].items()})
        c.reference = arrays.get("reference")
        c.reference_rgb = arrays.get("reference_rgb")
        c.ignore = arrays.get("ignore")
        c.ref_cells = arrays.get("ref_cells")
        c.ref_detail = arrays.get("ref_detail")
        return c
