"""Image measures of camera frames: grey levels, robust brightness fits, registration by
phase correlation, brightness fields, per-cell detail and noise.

Pure functions over numpy arrays; :mod:`inspector.core.conditions` builds on them.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from functools import lru_cache
from typing import Any

import cv2
import numpy as np
import scipy.fft as sfft

#: Side of the grid of cells used by the "lens covered" measure.
COVER_GRID = 8


def grey(images: np.ndarray) -> np.ndarray:
    """Luma (ITU-R BT.601 weights) of RGB frames.

    Parameters
    ----------
    images : ndarray, shape (n, H, W, 3), uint8 or float

    Returns
    -------
    ndarray, shape (n, H, W), float32 in [0, 255]
    """
    images = np.asarray(images)
    n, h, w = images.shape[:3]
    out = np.zeros((n, h, w), np.float32)
    if not images.size:
        return out
    # OpenCV's conversion of float input is the exact weighted sum, unrounded; a frame at
    # a time, so that its float copy stays in the processor's cache
    buf = np.empty((h, w, 3), np.float32)
    for image, o in zip(images, out):
        np.copyto(buf, image)
        cv2.cvtColor(buf, cv2.COLOR_RGB2GRAY, dst=o)
    return out


#: Pixels a robust gain fit samples from a frame (on an even grid; see :func:`robust_gains`).
GAIN_SAMPLE = 3600


def gain_step(shape: tuple[int, int]) -> int:
    """Step of the sampling grid of :func:`robust_gains` for frames of ``shape`` (H, W):
    every ``step``-th pixel each way, at least 4, more on frames larger than the default
    working size so that about :data:`GAIN_SAMPLE` pixels are left."""
    h, w = shape
    return max(4, int(round(np.sqrt(h * w / GAIN_SAMPLE))))


#: Grey levels strictly between these are trusted; at or beyond them a pixel may be clipped
#: black or white, and then only bounds its true brightness.
CLIP_LOW, CLIP_HIGH = 2.0, 253.0


def trusted(g: np.ndarray) -> np.ndarray:
    """Pixels of a grey image (float, [0, 255]) that are not clipped black or white,
    bool of the same shape."""
    g = np.asarray(g)
    return (g > CLIP_LOW) & (g < CLIP_HIGH)


def _masked_quantiles(v: np.ndarray, ok: np.ndarray, qs) -> np.ndarray:
    """Quantiles (linear interpolation, numpy's default) of each row of ``v`` over its
    ``ok`` entries; shape (len(qs), n). Rows with no ok entry give NaN.

    A row at a time, its ok entries gathered and sorted; for one quantile, partitioned at
    its lower order statistic instead, the one above it being the smallest value beyond
    (the same numbers; a sort of the rows padded with infinity, or numpy's partition at
    several places at once, is several times slower)."""
    out = np.full((len(qs), len(v)), np.nan)
    for i, (row, use) in enumerate(zip(v, ok)):
        c = row[use]
        k = len(c)
        if not k:
            continue
        if len(qs) > 1:
            c.sort()
        for j, q in enumerate(qs):
            pos = q * (k - 1)
            lo = math.floor(pos)
            if len(qs) > 1:
                a, b = c[lo], c[min(lo + 1, k - 1)]
            else:
                c.partition(lo)
                a = c[lo]
                b = c[lo + 1:].min() if lo + 1 < k else a
            out[j, i] = a + (b - a) * (pos - lo)
    return out


def robust_gains(frames: np.ndarray, reference: np.ndarray,
                 keep: np.ndarray | None = None,
                 bounded: np.ndarray | None = None) -> np.ndarray:
    """Fit ``reference ~ gain * frame + offset`` robustly, for each of a stack of frames.

    Starts from matching the 10th-90th percentile range and the medians (unmoved by a
    small bright or dark region), then refits by least squares twice on the pixels whose
    residual lies within 3 x 1.4826 x MAD (iteratively trimmed least squares), so a local
    change (an incident) does not move the fit. The fit samples the pixels on an even grid
    (:func:`gain_step`): a two-parameter fit needs far fewer than the thousands it keeps.

    Parameters
    ----------
    frames : ndarray, shape (n, H, W), float
    reference : ndarray, shape (H, W), float
    keep : ndarray, shape (H, W), bool, optional
        Pixels that may be used (e.g. outside masks and text overlays).
    bounded : ndarray, shape (n, H, W), bool, optional
        Pixels of each frame whose grey only bounds its light (a colour channel clipped
        there, or next to it): left out like grey clipped black or white, unless fewer than
        16 of the frame's sampled pixels would be left.

    Returns
    -------
    ndarray, shape (n, 2), float64
        ``(gain, offset)`` of each frame, ``gain`` within [0.1, 10]; (1, 0) for a frame with
        no usable contrast.
    """
    frames = np.asarray(frames)
    n = len(frames)
    step = gain_step(frames.shape[1:3])
    x = np.asarray(frames[:, ::step, ::step], np.float64).reshape(n, -1)
    y = np.broadcast_to(np.asarray(reference, np.float64)[::step, ::step].ravel(), x.shape)
    # Clipped in the frame only: leaving out the reference's clipped pixels too made the
    # altered frames of bench/scenes.py worse (counter 0/15 -> 4/15 flagged).
    ok = trusted(x)
    if keep is not None:
        ok &= np.asarray(keep)[::step, ::step].ravel()[None]
    if bounded is not None:
        unbounded = ok & ~np.asarray(bounded)[:, ::step, ::step].reshape(n, -1)
        enough = unbounded.sum(axis=1) >= 16
        ok[enough] = unbounded[enough]
    out = np.tile([1.0, 0.0], (n, 1))
    cnt = ok.sum(axis=1)
    mx = np.where(ok, x, 0.0).sum(axis=1) / np.maximum(cnt, 1)
    sd = np.sqrt(np.where(ok, (x - mx[:, None]) ** 2, 0.0).sum(axis=1) / np.maximum(cnt, 1))
    fit = (cnt >= 16) & (sd >= 1.0)
    if not fit.any():
        return out
    x, y, ok = x[fit], y[fit], ok[fit]
    qx = _masked_quantiles(x, ok, (0.1, 0.5, 0.9))
    qy = _masked_quantiles(y, ok, (0.1, 0.5, 0.9))
    gain = (qy[2] - qy[0]) / np.maximum(qx[2] - qx[0], 1.0)
    offset = qy[1] - gain * qx[1]
    active = np.ones(len(x), bool)
    for _ in range(2):
        r = y - (gain[:, None] * x + offset[:, None])
        med = _masked_quantiles(r, ok, (0.5,))[0]
        dev = np.abs(r - med[:, None])
        mad = 1.4826 * _masked_quantiles(dev, ok, (0.5,))[0]
        use = ok & (dev <= 3.0 * np.maximum(mad, 0.5)[:, None])
        m = use.sum(axis=1).astype(np.float64)
        active &= m >= 16
        m = np.maximum(m, 1.0)
        mxu = np.where(use, x, 0.0).sum(axis=1) / m
        myu = np.where(use, y, 0.0).sum(axis=1) / m
        dx = np.where(use, x - mxu[:, None], 0.0)
        vx = (dx * dx).sum(axis=1) / m
        active &= vx >= 1.0
        cov = (dx * np.where(use, y - myu[:, None], 0.0)).sum(axis=1) / m
        new_gain = cov / np.maximum(vx, 1e-12)  # least squares line
        gain = np.where(active, new_gain, gain)
        offset = np.where(active, myu - new_gain * mxu, offset)
        if not active.any():
            break
    out[fit, 0] = np.clip(gain, 0.1, 10.0)
    out[fit, 1] = offset
    return out


def robust_gain_offset(frame: np.ndarray, reference: np.ndarray,
                       keep: np.ndarray | None = None) -> tuple[float, float]:
    """:func:`robust_gains` of one frame (H, W); returns ``(gain, offset)``."""
    gain, offset = robust_gains(np.asarray(frame)[None], reference, keep)[0]
    return float(gain), float(offset)


def _dft_size(n: int) -> int:
    """Smallest even size >= n whose DFT is fast (2^a 3^b 5^c, as OpenCV pads to)."""
    m = cv2.getOptimalDFTSize(n)
    while m % 2:
        m = cv2.getOptimalDFTSize(m + 1)
    return m


def _filled(image: np.ndarray, ignore: np.ndarray | None) -> np.ndarray:
    """An (H, W) float32 image with its ``ignore`` pixels set to the mean of the others."""
    if ignore is None or not ignore.any():
        return image
    return np.where(ignore, np.float32(cv2.mean(image, (~ignore).astype(np.uint8))[0]), image)


def phase_spectrum(reference: np.ndarray, ignore: np.ndarray | None = None) -> np.ndarray:
    """The windowed spectrum of a registration reference, for :func:`phase_shifts`
    (computed once per reference, not once per frame).

    Parameters
    ----------
    reference : ndarray, shape (H, W), float
    ignore : ndarray, shape (H, W), bool, optional
        As in :func:`phase_shifts`.

    Returns
    -------
    ndarray, shape (H', W' // 2 + 1), complex64
        Real-input DFT of the Hann-windowed reference, zero-padded to (H', W'), the even
        sizes >= (H, W) with fast DFTs.
    """
    ref = np.asarray(reference, np.float32)
    h, w = ref.shape
    ref = _filled(ref, ignore) * _hanning((h, w))
    return sfft.rfft2(ref, s=(_dft_size(h), _dft_size(w)), workers=1).astype(np.complex64)


def phase_shifts(frames: np.ndarray, spectrum: np.ndarray,
                 ignore: np.ndarray | None = None) -> np.ndarray:
    """Sub-pixel translation of frames relative to a reference, by phase correlation.

    Phase correlation (Kuglin & Hines 1975, "The phase correlation image alignment
    method"): the inverse DFT of the normalised cross-power spectrum of the Hann-windowed
    frame and reference peaks at their relative shift; the sub-pixel position is the
    weighted centroid of the 5 x 5 values around the peak. This is what
    ``cv2.phaseCorrelate`` computes (checked against it in the tests), with the
    reference's spectrum computed once (:func:`phase_spectrum`) and real-input DFTs; a
    frame at a time, so that its arrays stay in the processor's cache.

    Parameters
    ----------
    frames : ndarray, shape (n, H, W), float
    spectrum : ndarray
        :func:`phase_spectrum` of the reference, with the same ``ignore``.
    ignore : ndarray, shape (H, W), bool, optional
        Pixels filled with the image mean first (burned-in text does not move with the
        camera and would pull the estimate towards zero).

    Returns
    -------
    ndarray, shape (n, 2), float64
        ``(dx, dy)`` of each frame: its content sits that many pixels right and down of
        where it sits in the reference.
    """
    frames = np.asarray(frames, np.float32)
    n, h, w = frames.shape
    size = (_dft_size(h), _dft_size(w))
    rows, cols = size
    window = _hanning((h, w))
    step = np.arange(-2, 3)
    out = np.zeros((n, 2))
    if not n:
        return out
    # the ignored pixels take the mean of the others (as _filled), set after windowing
    where = None if ignore is None or not ignore.any() else np.flatnonzero(ignore)
    windowed = frames * window
    if where is not None:
        at, kept = window.ravel()[where], max(h * w - len(where), 1)
        for frame, win in zip(frames, windowed):
            mean = (cv2.sumElems(frame)[0] - frame.ravel()[where].sum(dtype=np.float64)) / kept
            np.put(win, where, np.float32(mean) * at)
    # the whole stack at once (the same transforms, frame by frame, as one at a time)
    cross = sfft.rfft2(windowed, s=size, workers=1)
    np.conjugate(cross, out=cross)
    cross *= spectrum
    mag = np.abs(cross)
    np.maximum(mag, np.float32(1e-20), out=mag)
    np.reciprocal(mag, out=mag)
    parts = cross.view(np.float32)  # real and imaginary parts, interleaved
    parts[..., 0::2] *= mag
    parts[..., 1::2] *= mag
    surfaces = sfft.irfft2(cross, s=size, workers=1)  # each peaks at minus the shift
    for i, surface in enumerate(surfaces):
        py, px = divmod(int(surface.argmax()), cols)
        box = surface[np.ix_((py + step) % rows, (px + step) % cols)].astype(np.float64)
        total = box.sum() + np.finfo(float).eps
        cy = py + box.sum(axis=1) @ step / total
        cx = px + box.sum(axis=0) @ step / total
        # lags beyond half the size are negative ones, wrapped round
        out[i] = -((cx + cols / 2) % cols - cols / 2), -((cy + rows / 2) % rows - rows / 2)
    return out


def phase_shift(frame: np.ndarray, reference: np.ndarray,
                ignore: np.ndarray | None = None) -> tuple[float, float]:
    """:func:`phase_shifts` of one frame (H, W) against ``reference`` (H, W); returns
    ``(dx, dy)``."""
    dx, dy = phase_shifts(np.asarray(frame)[None], phase_spectrum(reference, ignore),
                          ignore)[0]
    return float(dx), float(dy)


@lru_cache(maxsize=8)
def _hanning(shape: tuple[int, int]) -> np.ndarray:
    """Hanning window of an (H, W) image, float32 (made once per size)."""
    return cv2.createHanningWindow((shape[1], shape[0]), cv2.CV_32F)


def correlation(a: np.ndarray, b: np.ndarray, keep: np.ndarray | None = None,
                terms: tuple | None = None) -> float:
    """Pearson correlation of two grey images ``a`` and ``b`` (H, W) over the kept pixels
    (``keep``: (H, W) bool, None: all), a 10-pixel margin left out (the edges a shift moves
    in); ``terms``: :func:`correlation_terms` of ``b`` and ``keep`` when made before (``b``
    and ``keep`` are then not read)."""
    sel, index, y, yy = correlation_terms(b, keep) if terms is None else terms
    x = a[sel] if index is None else np.take(a, index)
    x = x - x.mean()
    den = float(np.sqrt((x * x).sum() * yy))
    return float((x * y).sum() / den) if den > 0 else 0.0


def correlation_terms(b: np.ndarray, keep: np.ndarray | None = None) -> tuple:
    """What :func:`correlation` needs of an image it is computed with many times (a
    registration reference): the part compared, the flat indices of its kept pixels
    (None: all), its values there less their mean, and their sum of squares."""
    h, w = b.shape
    m = min(10, h // 8, w // 8)
    sel = np.s_[m:h - m, m:w - m]
    index = None
    if keep is None:
        y = b[sel]
    else:
        inside = np.zeros((h, w), bool)
        inside[sel] = keep[sel]
        index = np.flatnonzero(inside)
        y = b[sel][keep[sel]]
    y = y - y.mean()
    return sel, index, y, (y * y).sum()


def shift_images(images: np.ndarray, dx: float, dy: float) -> np.ndarray:
    """Move the content of images by (dx, dy) pixels (bilinear, edge pixels repeated into
    the strip the move uncovers: several times faster in OpenCV than reflecting them, and
    callers that care fill that strip themselves).

    Parameters
    ----------
    images : ndarray, shape (H, W, C) or (H, W)
    """
    h, w = images.shape[:2]
    m = np.float32([[1, 0, dx], [0, 1, dy]])
    return cv2.warpAffine(images, m, (w, h), flags=cv2.INTER_LINEAR,
                          borderMode=cv2.BORDER_REPLICATE)


#: Largest correction, in pixels, :func:`refine_shift` makes to a shift it is given: beyond
#: about a pixel the linear model of a small move no longer holds (Lucas & Kanade 1981).
REFINE_LIMIT = 1.0
#: A correction below this many pixels ends :func:`refine_shift` (a hundredth of a pixel
#: moves a step of 255 grey levels by under 3).
REFINE_DONE = 0.01


def shift_terms(reference: np.ndarray, ignore: np.ndarray | None = None) -> np.ndarray:
    """What :func:`refine_shift` needs of a reference, computed once per reference: the
    pseudo-inverse of its design ``[reference, 1, d/dx reference, d/dy reference]``
    (central differences, ``numpy.gradient``) over the pixels it uses (not ignored, a
    10-pixel margin left out, as in :func:`correlation`), zero at the others.

    Parameters
    ----------
    reference : ndarray, shape (H, W), float
    ignore : ndarray, shape (H, W), bool, optional

    Returns
    -------
    ndarray, shape (4, H * W), float32
    """
    ref = np.asarray(reference, np.float64)
    h, w = ref.shape
    gy, gx = np.gradient(ref)
    m = min(10, h // 8, w // 8)
    keep = np.zeros((h, w), bool)
    keep[m:h - m, m:w - m] = True
    if ignore is not None:
        keep &= ~ignore
    index = np.flatnonzero(keep)
    design = np.stack([ref.flat[index], np.ones(len(index)), gx.flat[index], gy.flat[index]], 1)
    solve = np.zeros((4, h * w), np.float32)
    solve[:, index] = np.linalg.pinv(design)
    return solve


def refine_shift(frame: np.ndarray, terms: np.ndarray, dx: float, dy: float,
                 steps: int = 3) -> tuple[float, float]:
    """A frame's shift relative to a reference, refined from an estimate by Lucas-Kanade
    steps (Lucas & Kanade 1981, "An iterative image registration technique with an
    application to stereo vision", IJCAI): the frame moved back by the estimate differs from
    the reference by about ``a * grad(reference) . e`` for a small error ``e`` (and a gain
    ``a`` and offset ``b``), so one least-squares fit of ``[reference, 1, grad]`` gives
    ``e``.

    The weighted centroid of the phase-correlation peak (:func:`phase_shifts`) is drawn
    towards whole pixels: a third of a pixel reads as about a quarter on photographs
    (measured on scikit-image's ``coffee``), and a frame moved back by that leaves sharp
    edges a tenth of a pixel off, which a model of well-aligned frames sees as change.

    Parameters
    ----------
    frame : ndarray, shape (H, W), float
        Grey frame as captured.
    terms : ndarray, shape (4, H * W), float32
        :func:`shift_terms` of the reference.
    dx, dy : float
        The estimate (as :func:`phase_shifts` gives it).
    steps : int
        Most fits, each on the frame moved back by the estimate so far (fewer when one
        corrects by less than :data:`REFINE_DONE`).

    Returns
    -------
    dx, dy : float
        The estimate unchanged when a fit finds no positive gain or a correction beyond
        :data:`REFINE_LIMIT` (the linear model does not hold there).
    """
    return lucas_kanade(frame, terms, dx, dy, steps)[:2]


def lucas_kanade(frame: np.ndarray, terms: np.ndarray, dx: float, dy: float,
                 steps: int = 3, shrinking: bool = False) -> tuple[float, float, bool]:
    """:func:`refine_shift`, also saying whether the steps converged: True when a step
    corrected by less than :data:`REFINE_DONE` within ``steps``, False when they did not,
    or when the estimate was given back unchanged (no positive gain, or a correction
    beyond :data:`REFINE_LIMIT`).

    With ``shrinking``, a step that turns back on the one before is an overshoot: the fit's
    gain, taken over the whole frame, can be well below the contrast of the edges that
    carry the shift (light that differs across the view), and every step then overshoots
    by the same factor, back and forth. Steps ``s`` and ``-lam * s`` of such an overshoot
    meet ``1 / (1 + lam)`` of the way along ``s`` (the secant of the two), so from then on
    steps are shortened by that factor (and again at the next turn). The estimate is given
    back, unconverged, at the first step, so shortened, no smaller than the one before:
    steps that do not shrink do not converge (the linear model does not hold)."""
    frame = np.asarray(frame, np.float32)
    d = np.array([dx, dy], np.float64)
    last, turned, damp = np.inf, None, 1.0
    for _ in range(steps):
        a, _, ex, ey = terms @ shift_images(frame, -d[0], -d[1]).ravel()
        if a <= 0:
            return float(dx), float(dy), False
        step = np.array([ex, ey]) / a
        if shrinking:
            back = -float(step @ turned) if turned is not None else 0.0
            if back > 0:  # the step turned back: lam = back / |s|^2
                damp /= 1.0 + back / float(turned @ turned)
            turned = step
            step = step * damp
        d -= step
        size = np.hypot(*step)
        if np.hypot(d[0] - dx, d[1] - dy) > REFINE_LIMIT or (shrinking and size >= last):
            return float(dx), float(dy), False
        if size < REFINE_DONE:
            return float(d[0]), float(d[1]), True
        last = size
    return float(d[0]), float(d[1]), False


def halved(images: np.ndarray) -> np.ndarray:
    """Images (n, H, W) reduced 2 x 2 by area averaging (a last odd row or column left
    out), float32 (n, H // 2, W // 2): a shift of d pixels in the images is one of d / 2
    in the result."""
    images = np.asarray(images, np.float32)
    n, h, w = images.shape
    out = np.empty((n, h // 2, w // 2), np.float32)
    for img, o in zip(images, out):
        cv2.resize(img[:2 * (h // 2), :2 * (w // 2)], (w // 2, h // 2), dst=o,
                   interpolation=cv2.INTER_AREA)
    return out


def brightness_field(frame: np.ndarray, reference: np.ndarray, sigma: float,
                     gain: float = 1.0, offset: float = 0.0, scale: float = 1.0,
                     channels: int = 1, keep: np.ndarray | None = None,
                     added: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Smooth multiplicative field that brings the local brightness of ``gain * frame +
    offset`` to the reference's: ``blur(reference) / blur(gain * frame + offset)``, clipped
    to [0.25, 4]; one field per channel of a colour frame. The field is smooth: both are
    averaged over cells of about ``sigma / 4`` pixels, blurred there and the field
    enlarged bilinearly.

    With ``keep``, both blurs are normalised convolutions over the kept pixels only
    (``blur(keep * x) / blur(keep)``, Knutsson & Westin 1993, "Normalized and differential
    convolution"): a pixel clipped white or black in the frame or the reference only bounds
    its true value, and a lamp that stays clipped at 255 while the frame darkens would
    otherwise read as a region brighter than the reference and darken its surroundings.

    Parameters
    ----------
    frame, reference : ndarray, shape (H, W) or (H, W, C), float or uint8
        Both of the same shape; a (H, W, C) pair gives the field of each channel.
    sigma : float
        Blur, in pixels.
    gain, offset : float
        Brightness fit of the frame (applied after the frame is reduced: the reduction is
        an average, so the result is the same).
    scale : float
        Factor applied to the field (at reduced size, before it is enlarged).
    channels : int
        Channels of the result of an (H, W) pair (the field repeated, to multiply a colour
        image).
    keep : ndarray, shape (H, W) or (H, W, C), bool, optional
        Pixels whose brightness is trusted (all when None), the same for every channel or,
        (H, W, C), channel by channel: each channel's field is then the field of that
        channel alone with its own ``keep``.
    added : (ndarray of int, ndarray of float), optional
        Light added to ``frame`` at a few places: their flat indices into it and the
        amounts (the field is that of ``frame`` with them added; a uint8 frame stays
        uint8, and its cell sums exact).

    Returns
    -------
    ndarray, shape (H, W), (H, W, channels) or (H, W, C), float32
    """
    frame, ref = np.asarray(frame), np.asarray(reference)
    h, w = frame.shape[:2]
    k = max(1, int(sigma // 4))  # the field is smooth: estimated on cells of about k x k
    grid = _cell_grid(h, w, k, sigma / k)
    if keep is not None:
        keep = np.asarray(keep, bool)
        if keep.ndim == 2 and frame.ndim == 3:
            keep = keep[..., None]
    if keep is None:
        means = [grid.means(frame), grid.means(ref)]
    elif frame.ndim == 3 and frame.dtype == ref.dtype == np.uint8:
        means = grid.kept_means([frame, ref], keep)  # (the same numbers, sooner)
    else:  # normalised convolution: blur(keep * x) / blur(keep)
        means = [grid.means(x) for x in (_kept(frame, keep), _kept(ref, keep),
                                         keep.view(np.uint8))]
    if added is not None and len(added[0]):
        means[0] = means[0] + grid.means_of(added, frame.shape, keep)
    c = means[0].shape[2]
    small = grid.blur(np.concatenate(means, axis=2))
    f, r = small[..., :c], small[..., c:2 * c]
    unseen = None
    if keep is not None:
        weight = small[..., 2 * c:]
        whole = (means[2] == 1.0).all(axis=(0, 1))
        if whole.any():  # a channel kept whole takes no weight, as it would alone
            weight[..., whole] = 1.0
        unseen = weight <= 1e-3  # nothing trusted is near: no correction
        weight = np.maximum(weight, 1e-3)
        f, r = f / weight, r / weight
    field = np.clip((r + 4.0) / (f * gain + offset + 4.0), 0.25, 4.0)
    if unseen is not None and unseen.any():
        field[np.broadcast_to(unseen, field.shape)] = 1.0
    field = (field * scale).astype(np.float32)
    if frame.ndim == 2:
        field = field[..., 0] if channels == 1 else np.repeat(field, channels, axis=2)
    # one bilinear enlargement, all channels at once
    return cv2.resize(field, (w, h), interpolation=cv2.INTER_LINEAR)


def _kept(x: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """``x * keep`` ((H, W) or (H, W, C) ``x``, bool ``keep`` of the same shape or
    (H, W, 1)), in ``x``'s own type (uint8 stays uint8: exact, and four times smaller)."""
    return np.multiply(x, keep.view(np.uint8).reshape(x.shape[:2] + keep.shape[2:]))


class PerReference:
    """A value made from some arrays and kept while they are the same arrays (the same
    objects, not equal copies): what frames need of a reference, made once per reference
    rather than once per frame. The arrays are held with the value, so that no other array
    takes their identity, and the two are replaced together (one tuple): threads sharing
    the conditions never read a value with another reference's arrays."""

    __slots__ = ("_made",)

    def __init__(self) -> None:
        self._made: tuple[tuple, Any] | None = None

    def get(self, make: Callable[..., Any], *arrays: Any) -> Any:
        """``make(*arrays)``, made anew only when ``arrays`` are not those of the last
        call."""
        made = self._made
        if made is None or any(a is not b for a, b in zip(made[0], arrays)):
            made = self._made = (arrays, make(*arrays))
        return made[1]


@lru_cache(maxsize=16)
def _blur_matrix(n: int, sigma: float) -> np.ndarray:
    """(n, n) float64 matrix of ``cv2.GaussianBlur`` along one axis of length ``n``: its
    kernel for float images (``ksize`` 8 sigma + 1, ``cv2.getGaussianKernel``) with the
    border reflected about the edge pixel (``BORDER_REFLECT_101``, OpenCV's default)."""
    size = int(round(sigma * 8 + 1)) | 1
    kernel = cv2.getGaussianKernel(size, sigma, cv2.CV_64F).ravel()
    m = np.zeros((n, n))
    for i in range(n):
        for j, v in zip(range(i - size // 2, i + size // 2 + 1), kernel):
            m[i, cv2.borderInterpolate(j, n, cv2.BORDER_REFLECT_101) if n > 1 else 0] += v
    return m


class _CellGrid:
    """The cells of about ``k`` x ``k`` pixels a brightness field of an (h, w) frame is
    estimated on (their edges along each axis as ``cv2.resize`` to (w // k, h // k) with
    ``INTER_AREA`` averages), the means of an image over them and the Gaussian blur of
    ``sigma`` cells between them (as ``cv2.GaussianBlur``, see :func:`_blur_matrix`)."""

    def __init__(self, h: int, w: int, k: int, sigma: float):
        self.ny, self.nx = max(1, h // k), max(1, w // k)
        self.rows = np.linspace(0, h, self.ny + 1).astype(int)
        self.cols = np.linspace(0, w, self.nx + 1).astype(int)
        self.equal = h % self.ny == 0 and w % self.nx == 0
        self.counts = np.outer(np.diff(self.rows), np.diff(self.cols))[..., None]
        self.my, self.mx = _blur_matrix(self.ny, sigma), _blur_matrix(self.nx, sigma)
        # the summed-area table's entries at the cells' corners, flat (for :meth:`means`)
        self.corners = (self.rows[:, None] * (w + 1) + self.cols[None, :]).ravel()
        # cell of each pixel, row-major (for :meth:`means_of`)
        self.cell = ((np.searchsorted(self.rows, np.arange(h), "right") - 1)[:, None]
                     * self.nx + np.searchsorted(self.cols, np.arange(w), "right") - 1)
        self._entries: dict[int, np.ndarray] = {}  # :meth:`entry_cells`
        #: the sums of the last reference of :meth:`kept_means` (a camera's, frame after
        #: frame)
        self._reference = PerReference()

    def means(self, x: np.ndarray) -> np.ndarray:
        """Means of an (h, w) or (h, w, C) image over the cells, (ny, nx, C) float64:
        ``cv2.resize`` with ``INTER_AREA`` for a float image whose cells are equal, else
        sums from a summed-area table (Crow 1984, "Summed-area tables for texture
        mapping"; exact for a uint8 image)."""
        x = np.asarray(x)
        if x.dtype != np.uint8 and self.equal:
            m = cv2.resize(np.asarray(x, np.float32), (self.nx, self.ny),
                           interpolation=cv2.INTER_AREA).astype(np.float64)
            return m.reshape(self.ny, self.nx, -1)
        return self._sums(x) / self.counts

    def _sums(self, x: np.ndarray) -> np.ndarray:
        """Sums of an (h, w) or (h, w, C) image over the cells, (ny, nx, C) float64, from
        a summed-area table (whole numbers for a uint8 image, exact)."""
        if x.dtype == np.uint8 and x.size * 255 < 2**31:
            table = cv2.integral(x)  # int32
        else:
            table = cv2.integral(np.asarray(x, np.float64))
        c = table.reshape(table.shape[0] * table.shape[1], -1)[self.corners]
        c = c.astype(np.float64).reshape(len(self.rows), len(self.cols), -1)
        return c[1:, 1:] - c[:-1, 1:] - c[1:, :-1] + c[:-1, :-1]

    def kept_means(self, images: list[np.ndarray], keep: np.ndarray) -> list[np.ndarray]:
        """:meth:`means` of ``image * keep`` for each uint8 image (h, w, C) of ``images``
        (all but the first taken as references: their whole sums kept while they are the
        same arrays, see :class:`PerReference`),
        and of ``keep`` itself ((h, w, C) or (h, w, 1) bool), each (ny, nx, C) ((ny, nx,
        1) for ``keep`` (h, w, 1)) float64: the whole image's sums less those of the
        entries left out, most often a few (clipped pixels, burned-in text), added up by
        ``np.bincount``: whole numbers all through, so the same numbers as the means of
        the products, without a product and a summed-area table for each."""
        h, w, c = images[0].shape
        kc = keep.shape[2]
        out = np.flatnonzero(~keep)  # entries of keep left out
        size = self.ny * self.nx
        shape = (self.ny, self.nx)
        dropped = np.bincount(self.entry_cells(kc)[out], minlength=size * kc)
        if kc != c:  # a pixel left out leaves out all its channels
            out = (out[:, None] * c + np.arange(c)).ravel()
        cells = self.entry_cells(c)[out]
        means = [(self._sums(x) if i == 0 else self._reference.get(self._sums, x))
                 - np.bincount(cells, x.reshape(-1)[out], size * c).reshape(shape + (c,))
                 for i, x in enumerate(images)]
        means = [m / self.counts for m in means]
        means.append((self.counts - dropped.reshape(shape + (kc,))) / self.counts)
        return means

    def means_of(self, added: tuple[np.ndarray, np.ndarray], shape: tuple[int, ...],
                 keep: np.ndarray | None) -> np.ndarray:
        """What values at a few flat indices into an image of ``shape`` (h, w[, C]) add
        to its cell means, those outside ``keep`` ((h, w, C) or (h, w, 1)) left out,
        (ny, nx, C) float64."""
        index, values = np.asarray(added[0]), np.asarray(added[1], np.float64)
        c = shape[2] if len(shape) == 3 else 1
        if keep is not None:
            values = values * keep.reshape(-1)[index if keep.size == np.prod(shape)
                                               else index // c]
        sums = np.bincount(self.entry_cells(c)[index], values, self.ny * self.nx * c)
        return sums.reshape(self.ny, self.nx, c) / self.counts

    def entry_cells(self, c: int) -> np.ndarray:
        """For each flat index into an (h, w, c) image, its cell and channel (``cell * c +
        channel``), made once per ``c``."""
        if c not in self._entries:
            self._entries[c] = (self.cell.reshape(-1, 1) * c + np.arange(c)).ravel()
        return self._entries[c]

    def blur(self, x: np.ndarray) -> np.ndarray:
        """Blur of a (ny, nx, C) float64 array over the cells, by two matrix products."""
        return np.matmul(self.mx, (self.my @ x.reshape(self.ny, -1)).reshape(x.shape))


@lru_cache(maxsize=16)
def _cell_grid(h: int, w: int, k: int, sigma: float) -> _CellGrid:
    """:class:`_CellGrid` of these sizes, made once."""
    return _CellGrid(h, w, k, sigma)


@lru_cache(maxsize=16)
def _cell_membership(n: int, grid: int) -> np.ndarray:
    """(grid, n) float64 0/1 matrix: which of ``grid`` near-equal parts each of ``n``
    positions falls in (part k spans ``linspace(0, n, grid + 1)`` truncated)."""
    edges = np.linspace(0, n, grid + 1).astype(int)
    part = np.searchsorted(edges, np.arange(n), side="right") - 1
    return (part[None, :] == np.arange(grid)[:, None]).astype(np.float64)


def _cell_sums(x: np.ndarray, grid: int, other: np.ndarray | None = None) -> np.ndarray:
    """Sums over the cells of a ``grid`` x ``grid`` split of the last two axes of float32
    ``x`` (..., H, W): of ``x``, of ``x * other`` (``other`` (H, W) float32, when given) and
    of ``x * x``, shape (2 or 3, ..., grid, grid), float64.

    Two matrix products with 0/1 membership matrices, the first (sums along rows of one
    cell, a few dozen terms) in float32, the second in float64; a frame's products are
    made and summed while the frame is in the processor's cache (no batch-sized
    temporaries)."""
    h, w = x.shape[-2:]
    rows, cols = _cell_membership(h, grid), _cell_membership(w, grid).T.astype(np.float32)
    flat = np.asarray(x, np.float32).reshape(-1, h, w)
    k = 2 if other is None else 3
    part = np.empty((k, len(flat), h, grid), np.float32)
    product = np.empty((h, w), np.float32)
    for i, f in enumerate(flat):
        np.matmul(f, cols, out=part[0, i])
        if other is not None:
            np.multiply(f, other, out=product)
            np.matmul(product, cols, out=part[1, i])
        np.multiply(f, f, out=product)
        np.matmul(product, cols, out=part[k - 1, i])
    return (rows @ part.astype(np.float64)).reshape((k,) + x.shape[:-2] + (grid, grid))


@lru_cache(maxsize=16)
def _cell_counts(shape: tuple[int, int], grid: int) -> np.ndarray:
    """Pixels in each cell of a ``grid`` x ``grid`` split of an image of ``shape`` (H, W),
    (grid, grid) float64, made once per size (read only)."""
    h, w = shape
    ny = np.diff(np.linspace(0, h, grid + 1).astype(int))
    nx = np.diff(np.linspace(0, w, grid + 1).astype(int))
    return np.outer(ny, nx).astype(np.float64)


def _cell_var(x: np.ndarray, grid: int) -> np.ndarray:
    x = np.asarray(x, np.float32)
    n = _cell_counts(x.shape[-2:], grid)
    s, sq = _cell_sums(x, grid)
    m = s / n
    return np.maximum(sq / n - m * m, 0.0)


def cell_detail(g: np.ndarray, grid: int = COVER_GRID) -> np.ndarray:
    """Variance of the Laplacian in each cell of a ``grid`` x ``grid`` split (the detail a
    sharp lens resolves there).

    Parameters
    ----------
    g : ndarray, shape (H, W) or (n, H, W), float

    Returns
    -------
    ndarray, shape (grid, grid) or (n, grid, grid), float32
    """
    g = np.asarray(g, np.float32)
    lap = np.empty(g.shape, np.float32)
    for x, out in zip(g.reshape(-1, *g.shape[-2:]), lap.reshape(-1, *g.shape[-2:])):
        cv2.Laplacian(x, cv2.CV_32F, dst=out, ksize=3)
    return _cell_var(lap, grid).astype(np.float32)


def cell_contrast(g: np.ndarray, grid: int = COVER_GRID) -> np.ndarray:
    """Standard deviation of each cell of a ``grid`` x ``grid`` split of the image.

    Returns
    -------
    ndarray, shape (grid, grid), float32
    """
    return np.sqrt(_cell_var(g, grid)).astype(np.float32)


def cell_correlation(g: np.ndarray, ref: np.ndarray, grid: int = COVER_GRID,
                     terms: tuple[np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """Normalised cross-correlation of each cell of ``g`` with the same cell of ``ref``.

    Blind to gain and offset cell by cell, so night and day frames of the same view both
    correlate with the reference, while a cell behind a hand, a bag or tape does not.

    Parameters
    ----------
    g : ndarray, shape (H, W) or (n, H, W), float
    ref : ndarray, shape (H, W), float
    terms : (ndarray, ndarray), optional
        :func:`cell_terms` of ``ref`` when made before (a reference compared with many
        frames).

    Returns
    -------
    ndarray, shape (grid, grid) or (n, grid, grid), float32 in [-1, 1]
    """
    a = np.asarray(g, np.float32)
    b = np.asarray(ref, np.float32)
    n = _cell_counts(a.shape[-2:], grid)
    mb, vb = cell_terms(b, grid) if terms is None else terms
    s, sb, sq = _cell_sums(a, grid, b)
    ma = s / n
    cov = sb / n - ma * mb
    va = np.maximum(sq / n - ma * ma, 0.0)
    den = np.sqrt(va * vb)
    return np.where(den > 1e-9, cov / np.maximum(den, 1e-9), 0.0).astype(np.float32)


def cell_terms(ref: np.ndarray, grid: int = COVER_GRID) -> tuple[np.ndarray, np.ndarray]:
    """What :func:`cell_correlation` needs of its reference (H, W): the mean and the
    variance of each cell, (grid, grid) float64 each."""
    b = np.asarray(ref, np.float32)
    n = _cell_counts(b.shape[-2:], grid)
    s, sq = _cell_sums(b, grid)
    mb = s / n
    return mb, np.maximum(sq / n - mb * mb, 0.0)


def percentile_rows(x: np.ndarray, q: float) -> np.ndarray:
    """``np.percentile(x, q, axis=1)`` (linear interpolation) of an (n, m) array, the same
    numbers, several times faster: one partition at the lower order statistic (numpy's
    partition at two is much slower), the next one being the smallest value above it.

    Parameters
    ----------
    x : ndarray, shape (n, m), float, no NaN
    q : float in [0, 100]

    Returns
    -------
    ndarray, shape (n,), dtype of ``x``
    """
    m = x.shape[1]
    if not m or not len(x):
        return np.percentile(x, q, axis=1)
    pos = q / 100 * (m - 1)
    lo = int(np.floor(pos))
    part = np.partition(x, lo, axis=1)
    a = part[:, lo]
    b = part[:, lo + 1:].min(axis=1) if lo + 1 < m else a
    t = pos - lo
    d = b - a
    # numpy's lerp: from the nearer end
    return np.where(t >= 0.5, b - d * (1 - t), a + d * t).astype(x.dtype, copy=False)


def median_stack(x: np.ndarray) -> np.ndarray:
    """``np.median(x, axis=0)``, the same numbers, several times faster on a stack of a few
    dozen frames: one sort along the first axis (numpy's partition, which its median uses,
    runs lane by lane there; 48 frames of 320 x 180: 27 -> 9 ms in float32, 49 -> 33 ms
    for RGB uint8), then the mean of the two middle values (the middle one when their
    number is odd) as numpy takes it: in float32 for float32, in float64 for integers.

    Parameters
    ----------
    x : ndarray, shape (n, ...), no NaN

    Returns
    -------
    ndarray, shape x.shape[1:], float64 (float32 for float32 ``x``)
    """
    if not len(x):
        return np.median(x, axis=0)
    floats = x.dtype in (np.float32, np.float64)
    s = np.sort(x, axis=0, kind=None if floats else "stable")  # (stable: radix for uint8)
    n = len(s)
    dtype = s.dtype if floats else np.dtype(np.float64)
    lo, hi = s[(n - 1) // 2].astype(dtype), s[n // 2].astype(dtype)
    return (lo + hi) / dtype.type(2)


#: Levels the light within a working pixel is summarised by (:func:`subpixel_levels`).
FINE_LEVELS = 8


def subpixel_levels(frames, size: tuple[int, int], levels: int = FINE_LEVELS
                    ) -> np.ndarray | None:
    """How light spreads within each working pixel: the pixels of larger frames that area
    reduction averages into it, sorted, at ``levels`` evenly spaced quantiles (the middle
    of each of ``levels`` equal shares), less their mean; per colour channel, the median
    over the frames.

    A working pixel whose mean is below the clip level can still hold clipped pixels when
    its detail is fine and bright (roof tiles in sunlight, foliage): what it loses to the
    clip depends on this spread (:func:`clip_loss`), which the working size no longer
    shows.

    Parameters
    ----------
    frames : iterable of ndarray, shape (h, w, 3), uint8
        Frames of one camera, at least twice the working size each way (exported frames).
    size : (int, int)
        Working (width, height).
    levels : int

    Returns
    -------
    ndarray, shape (height, width, 3, levels), float32, ascending along the last axis;
    None without frames or when they are less than twice the working size.
    """
    w, h = size
    pos = (np.arange(levels) + 0.5) / levels
    found = []
    for f in frames:
        f = np.asarray(f)
        k = min(f.shape[1] // w, f.shape[0] // h)
        if k < 2:
            return None
        x = cv2.resize(f, (k * w, k * h), interpolation=cv2.INTER_AREA)
        # whole levels: sorted and summed as integers (faster than as floats, and exact),
        # gathered and widened in one pass
        block = np.empty((h, w, 3, k * k), np.int16)
        np.copyto(block.reshape(h, w, 3, k, k), x.reshape(h, k, w, k, 3).transpose(0, 2, 4, 1, 3))
        block.sort(axis=-1)
        at = pos * (k * k) - 0.5  # the middle of each share, between sorted pixels
        lo = np.clip(np.floor(at).astype(int), 0, k * k - 1)
        hi = np.minimum(lo + 1, k * k - 1)
        t = np.clip(at - lo, 0.0, 1.0).astype(np.float32)
        # (np.take: several times faster than fancy indexing along the last axis)
        q = np.take(block, lo, axis=-1).astype(np.float32)
        q *= 1 - t
        upper = np.take(block, hi, axis=-1).astype(np.float32)
        upper *= t
        q += upper
        mean = block.sum(axis=-1, keepdims=True, dtype=np.int32).astype(np.float32)
        mean /= np.float32(k * k)
        q -= mean
        found.append(q)
    if not found:
        return None
    return median_stack(np.stack(found))


def clip_loss(mean: np.ndarray, spread: np.ndarray, level: float = 255.0,
              divide: float | None = None) -> np.ndarray:
    """Light a pixel loses when the finer pixels it averages are clipped at ``level``: the
    mean of ``max(mean + d - level, 0)`` over its spread ``d``.

    The mean of a clipped variable ``min(X, level)`` is the mean of ``X`` less this
    (censored mean; Tobin 1958, "Estimation of relationships for limited dependent
    variables", Econometrica 26(1)), here with ``X`` taking the pixel's quantiles of
    :func:`subpixel_levels` with equal weight.

    Computed on the levels stacked first (``np.moveaxis(spread, -1, 0)``: the transpose
    of a (levels, ...) array is read as it lies) and summed over them in the order numpy's
    mean over the last axis takes (:func:`_pairwise_sum`): the same numbers as that mean,
    without its slow reduction over a short last axis.

    Parameters
    ----------
    mean : ndarray, shape (...), float
        The pixels' unclipped means.
    spread : ndarray, shape (..., levels), float
        Their quantiles less their means, in the same units.
    level : float
    divide : float, optional
        ``spread`` is divided by this first (in float32, as ``spread / divide`` would be).

    Returns
    -------
    ndarray, shape (...), float32, >= 0
    """
    mean = np.asarray(mean, np.float32)
    x = np.asarray(np.moveaxis(np.asarray(spread), -1, 0), np.float32)
    x = x / np.float32(divide) if divide is not None else x.copy()
    x += mean  # (mean + d, the same sum)
    x -= np.float32(level)
    np.maximum(x, 0.0, out=x)
    total = _pairwise_sum(x)
    total /= np.float32(len(x))
    return total if total.ndim else total[()]


def _pairwise_sum(x: np.ndarray) -> np.ndarray:
    """The sum of a float array over its first axis, added in the order numpy's sum over
    a last axis takes (its pairwise summation: up to 7 terms in turn; up to 128 in 8
    running sums, combined as a tree; more split in two halves, the first a multiple of 8
    long), so the same numbers; a new array, shape ``x.shape[1:]``."""
    n = len(x)
    if n < 8:
        out = x[0].copy()
        for p in x[1:]:
            out += p
        return out
    if n > 128:
        half = n // 2
        half -= half % 8
        return _pairwise_sum(x[:half]) + _pairwise_sum(x[half:])
    whole = n - n % 8
    r = x[:8].copy() if whole > 8 else x[:8]  # (only added to in place when longer)
    for i in range(8, whole, 8):
        r += x[i:i + 8]
    r = r[0::2] + r[1::2]  # (r0 + r1), (r2 + r3), (r4 + r5), (r6 + r7)
    r = r[0::2] + r[1::2]
    out = r[0] + r[1]
    for p in x[whole:]:
        out += p
    return out


def noise_sigma(g: np.ndarray) -> float:
    """Standard deviation of white noise in a grey image ``g`` (H, W), in its grey levels.

    The image is filtered with the difference of two Laplacians of Immerkaer (1996, "Fast
    noise variance estimation", Computer Vision and Image Understanding 64(2)), which
    cancels smooth content and leaves 6 sigma of white noise; the robust spread
    1.4826 x median |response| is used instead of the mean absolute response, so edges
    (a small share of the pixels) do not inflate the estimate.
    """
    kernel = np.array([[1, -2, 1], [-2, 4, -2], [1, -2, 1]], np.float32)
    r = cv2.filter2D(np.asarray(g, np.float32), -1, kernel)[1:-1, 1:-1]
    return float(1.4826 * percentile_rows(np.abs(r).reshape(1, -1), 50)[0] / 6.0)


def noise_bank(values: int, seed=7) -> np.ndarray:
    """Standard normal values for :func:`exposure_copy` to read its noise from.

    Parameters
    ----------
    values : int
        Values a frame needs (H * W * 3); the bank holds at least four times as many, and
        at least 2^20, so that frames rarely read the same stretch.
    seed : int or sequence of int
        For :func:`numpy.random.default_rng`: the same seed gives the same bank.

    Returns
    -------
    ndarray, shape (m,), float32
    """
    return np.random.default_rng(seed).standard_normal(max(1 << 20, 4 * int(values)),
                                                       dtype=np.float32)


def exposure_copy(image: np.ndarray, gain: float, rng: np.random.Generator,
                  g: np.ndarray | None = None, bank: np.ndarray | None = None) -> np.ndarray:
    """The frame as another exposure would have caught it: the signal times ``gain`` with
    the sensor noise unchanged, clipped at 0 and 255 as the sensor clips.

    A shorter exposure (``gain`` < 1) is ``gain * image`` plus fresh noise of variance
    ``sigma^2 (1 - gain^2)`` (sigma from :func:`noise_sigma`): normalised back to the
    reference it is noisier than the original, as real darker frames are. A longer one
    (``gain`` >= 1) is ``gain * image``, whose noise is then ``gain`` times the sensor's (a
    little more than a real brighter frame has), with its highlights clipped at 255.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
    gain : float > 0
    rng : numpy.random.Generator
    g : ndarray, shape (H, W), float32, optional
        :func:`grey` of ``image`` when already computed.
    bank : ndarray, shape (m,), float32, optional
        Standard normal values (:func:`noise_bank`, m >= H * W * 3): the noise is the
        stretch of them starting at an offset drawn from ``rng``, instead of a fresh draw
        (a copy, not a draw: about 0.1 instead of 1.7 ms for a 320 x 180 frame). The values
        of one frame are distinct draws, and two frames share a value at the same place
        only when their offsets are equal.

    Returns
    -------
    ndarray, shape (H, W, 3), uint8
        Rounded to the nearest grey level and clipped to [0, 255].
    """
    image = np.asarray(image)
    if gain >= 1.0:
        return cv2.convertScaleAbs(image, alpha=float(gain))  # rounds, saturates at 255
    sigma = noise_sigma(grey(image[None])[0] if g is None else g)
    extra = sigma * np.sqrt(1.0 - gain * gain)
    if bank is None:
        noise = rng.standard_normal(image.shape, dtype=np.float32)  # single precision: faster
    else:
        if len(bank) < image.size:
            raise ValueError(f"a noise bank of {len(bank)} values is too small for a frame "
                             f"of {image.size}")
        start = int(rng.integers(0, len(bank) - image.size + 1))
        noise = bank[start:start + image.size].reshape(image.shape)
    return cv2.addWeighted(image, float(gain), noise, float(extra), 0.0, dtype=cv2.CV_8U)


#: Pixels by which :func:`recompress` moves a frame's JPEG block grid: half a block of 8 (a
#: quarter of a 4:2:0 colour block of 16), so that no block lines up with the export's.
REGRID = 4


def recompress(image: np.ndarray, tables, subsampling: int) -> np.ndarray:
    """The frame JPEG-encoded and decoded again as its camera's exports are, on a block grid
    shifted by :data:`REGRID` pixels (for frames learnt at their exported size).

    A frame caught at another exposure is compressed anew: its 8 x 8 block artefacts differ
    from those of the frames learnt from by about one quantisation error. At the exports'
    own size nothing averages them away, so they are part of what a normal frame after an
    exposure step looks like. A decoded frame encoded again on its own grid redraws only
    part of them: its coefficients already sit on the quantisation lattice, a scaled one
    rounds back near it and the coefficients quantised to zero stay zero. On a grid half a
    block away its quantisation error is drawn anew, as a fresh compression's is (the
    frame keeps its first compression's error too, so this errs on the generous side at
    small steps). Measured on scikit-image's astronaut, coffee and chelsea at 320 px,
    Pillow qualities 75/85/95, gains 0.7-1.3 (rms of the difference to the frame as
    exported, once brought back by the gain): a fresh compression 1.8-5.8 levels, the same
    grid 40-50 % less (coffee q85 gain 1.3: 4.02 vs 2.28), the shifted grid within -15 %
    to +30 % of it (3.83). (Baseline tables and their scaling with quality: ITU-T T.81
    Annex K, IJG libjpeg.)

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8, RGB
    tables : sequence of array-like of 64 int
        Quantisation tables in natural (row-major) order, as
        ``PIL.Image.open(path).quantization`` gives them (luminance first).
    subsampling : int
        As ``PIL.JpegImagePlugin.get_sampling`` gives it: 0 (4:4:4), 1 (4:2:2), 2 (4:2:0).

    Returns
    -------
    ndarray, shape (H, W, 3), uint8, RGB
    """
    import io

    from PIL import Image

    # the frame moved down and right by REGRID pixels (its first rows and columns mirrored
    # into the margin), encoded, decoded and moved back
    padded = cv2.copyMakeBorder(np.ascontiguousarray(image, dtype=np.uint8), REGRID, 0,
                                REGRID, 0, cv2.BORDER_REFLECT_101)
    buf = io.BytesIO()
    Image.fromarray(padded).save(
        buf, "JPEG", qtables=[[int(v) for v in t] for t in tables], subsampling=subsampling)
    buf.seek(0)
    with Image.open(buf) as im:
        return np.ascontiguousarray(np.asarray(im.convert("RGB"))[REGRID:, REGRID:])
