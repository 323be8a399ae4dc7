"""Image measures of camera frames: grey levels, robust brightness fits, registration by
phase correlation, brightness fields, sharpness, per-cell detail and noise.

Pure functions over numpy arrays; :mod:`inspector.core.conditions` builds on them.
"""

from __future__ import annotations

import cv2
import numpy as np

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


def correlation(a: np.ndarray, b: np.ndarray, keep: np.ndarray | None = None) -> float:
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
