"""Frames to patch feature vectors, masks to observed-feature masks, patch values to maps.

A patch feature vector holds the luminance of a ``patch x patch`` window followed by the
two chroma channels at half resolution (``patch/2 x patch/2`` each), the layout JPEG
itself uses (4:2:0 chroma subsampling): exported camera frames carry no finer chroma
than that, and the vector is half the size of full RGB (96 instead of 192 values for an
8-pixel patch), which makes each location's covariance 8 times cheaper to decompose.
With ``colour=False`` only the luminance is kept.

Grid geometry: patches start every ``stride`` pixels; the map of a frame is a grid of
``stride x stride`` cells, each the mean of the patches that cover it (``stride`` must
divide ``patch``). Maps therefore keep the frame's aspect ratio.
"""

from __future__ import annotations

import cv2
import numpy as np
from numpy.lib.stride_tricks import sliding_window_view


def grid_shape(height: int, width: int, patch: int, stride: int) -> tuple[int, int]:
    """Number of patch positions (rows, columns) in a ``height x width`` frame."""
    if height < patch or width < patch:
        raise ValueError(f"frame {width}x{height} is smaller than one {patch}-pixel patch")
    return (height - patch) // stride + 1, (width - patch) // stride + 1


def map_shape(height: int, width: int, patch: int, stride: int) -> tuple[int, int]:
    """Shape (rows, columns) of the cell map of a ``height x width`` frame."""
    gh, gw = grid_shape(height, width, patch, stride)
    r = patch // stride
    return gh + r - 1, gw + r - 1


def feature_size(patch: int, colour: bool) -> int:
    """Length d of a patch feature vector."""
    return patch * patch + (2 * (patch // 2) ** 2 if colour else 0)


def _planes(images: np.ndarray, colour: bool) -> tuple[np.ndarray, np.ndarray | None]:
    """Luma (n, H, W) uint8 (a strided view) and chroma 2x2 means (n, H/2, W/2, 2) float32
    in [0, 255]."""
    images = np.asarray(images)
    if images.ndim != 4 or images.shape[-1] != 3 or images.dtype != np.uint8:
        raise ValueError(f"expected (n, H, W, 3) uint8 frames, got {images.shape} {images.dtype}")
    n, h, w, _ = images.shape
    flat = images.reshape(n * h, w, 3)
    if not colour:
        return cv2.cvtColor(flat, cv2.COLOR_RGB2GRAY).reshape(n, h, w), None
    ycc = cv2.cvtColor(flat, cv2.COLOR_RGB2YCrCb)
    # An exact 2x2 mean of Cr and Cb: area interpolation by a factor of two, in float (no
    # rounding), a frame at a time (its float copy stays in the processor's cache; OpenCV
    # copies the two channels out far faster than a strided numpy copy).
    half = np.empty((n, h // 2, w // 2, 2), np.float32)
    crcb, buf = np.empty((h, w, 2), np.uint8), np.empty((h, w, 2), np.float32)
    for k in range(n):
        cv2.mixChannels([ycc[k * h:(k + 1) * h]], [crcb], [1, 0, 2, 1])
        np.copyto(buf, crcb)
        cv2.resize(buf, (w // 2, h // 2), dst=half[k], interpolation=cv2.INTER_AREA)
    return ycc[..., 0].reshape(n, h, w), half


def to_planes(images: np.ndarray, colour: bool) -> tuple[np.ndarray, np.ndarray | None]:
    """Luminance and half-resolution chroma of RGB frames.

    Parameters
    ----------
    images : ndarray, shape (n, H, W, 3), uint8
        RGB frames; H and W even.
    colour : bool

    Returns
    -------
    luma : ndarray, shape (n, H, W), float32 in [0, 1]
    chroma : ndarray, shape (n, H/2, W/2, 2), float32 in [0, 1], or None
        Cr and Cb (ITU-R BT.601, as in JPEG), each the mean of a 2x2 block.
    """
    luma, chroma = _planes(images, colour)
    scale = np.float32(1 / 255)
    return luma.astype(np.float32) * scale, None if chroma is None else chroma * scale


def patch_features(images: np.ndarray, patch: int, stride: int, colour: bool,
                   center: np.ndarray | None = None, scale: float = 1 / 255) -> np.ndarray:
    """Feature vector of every patch of every frame.

    Parameters
    ----------
    images : ndarray, shape (n, H, W, 3), uint8
    patch, stride : int
        Even; ``stride`` divides ``patch``.
    colour : bool
    center : ndarray, shape (gh * gw, d), optional
        Subtracted from every frame's features, in the same units as the result. The
        subtraction happens while the patches are gathered, which saves a pass over the
        largest array of scoring.
    scale : float
        Unit of the result: 1/255 gives [0, 1] (as :func:`to_planes`); 1 leaves grey levels
        and skips a pass when the caller folds the scale into its own small arrays.

    Returns
    -------
    ndarray, shape (n, gh * gw, d), float32
        Row-major over the patch grid (see :func:`grid_shape`), d = :func:`feature_size`.
    """
    luma, chroma = _planes(images, colour)
    n, h, w = luma.shape
    gh, gw = grid_shape(h, w, patch, stride)
    d = feature_size(patch, colour)
    out = np.empty((n, gh, gw, d), np.float32)
    ctr = None if center is None else (np.asarray(center, np.float32) / np.float32(scale)
                                       ).reshape(gh, gw, d)
    half = patch // 2
    p2, c = patch * patch, half * half
    parts = [(slice(0, p2), luma, patch, stride)]
    if chroma is not None:
        parts += [(slice(p2 + k * c, p2 + (k + 1) * c), chroma[..., k], half, stride // 2)
                  for k in range(2)]
    for cols, plane, size, step in parts:
        # Gather the windows straight into the output (one pass, casting on the way).
        dst = out[..., cols].reshape(n, gh, gw, size, size)
        src = _windows(plane, size, step, gh, gw)
        if ctr is None:
            np.copyto(dst, src, casting="unsafe")
        else:
            np.subtract(src, ctr[..., cols].reshape(gh, gw, size, size), out=dst,
                        casting="unsafe")
    if scale != 1:
        out *= np.float32(scale)
    return out.reshape(n, gh * gw, d)


def block_order(patch: int, stride: int, colour: bool) -> np.ndarray | None:
    """How a patch feature vector splits into ``stride x stride`` blocks.

    A patch of side ``patch = r * stride`` is ``r x r`` neighbouring blocks, each holding
    ``stride x stride`` luminance pixels (and the two ``stride/2 x stride/2`` chroma
    squares under them): every entry of the feature vector belongs to exactly one block,
    and a pixel's entry is the same in every patch that covers it.

    Returns
    -------
    ndarray, shape (d,), int, or None
        The feature index of each block entry, block by block (row-major over the r x r
        blocks, each block's entries in the order of :func:`block_features`); None when the
        patches do not split into blocks (``stride`` does not divide ``patch``, or odd
        ``stride`` with colour).
    """
    if patch % stride or (colour and stride % 2):
        return None
    r, s, hs, half = patch // stride, stride, stride // 2, patch // 2
    order = []
    for a in range(r):
        for b in range(r):
            order += [(a * s + u) * patch + b * s + v for u in range(s) for v in range(s)]
            if colour:
                for c in range(2):
                    order += [patch * patch + c * half * half + (a * hs + u) * half + b * hs + v
                              for u in range(hs) for v in range(hs)]
    return np.array(order)


def block_features(images: np.ndarray, stride: int, colour: bool, shape: tuple[int, int]
                   ) -> np.ndarray:
    """The entries of every ``stride x stride`` block of every frame, in grey levels.

    Parameters
    ----------
    images : ndarray, shape (n, H, W, 3), uint8
    stride : int
        Block side (even with colour).
    colour : bool
    shape : (int, int)
        Blocks (rows, columns) to take from the top left, at most H // stride, W // stride.

    Returns
    -------
    ndarray, shape (rows, columns, n, e), float32 in [0, 255]
        Each block's luminance (row-major) then, with colour, its Cr and Cb squares at half
        resolution; e = stride^2 (+ stride^2 / 2). The order of :func:`block_order`.
    """
    luma, chroma = _planes(images, colour)
    n = len(luma)
    s = stride
    bh, bw = shape
    e = s * s + (s * s // 2 if colour else 0)
    out = np.empty((bh, bw, n, e), np.float32)
    dst = np.reshape(out[..., :s * s], (bh, bw, n, s, s), copy=False)
    np.copyto(dst, luma[:, :bh * s, :bw * s].reshape(n, bh, s, bw, s).transpose(1, 3, 0, 2, 4))
    if colour:
        hs = s // 2
        dst = np.reshape(out[..., s * s:], (bh, bw, n, 2, hs, hs), copy=False)
        src = chroma[:, :bh * hs, :bw * hs].reshape(n, bh, hs, bw, hs, 2)
        np.copyto(dst, src.transpose(1, 3, 0, 5, 2, 4))
    return out


def _windows(planes: np.ndarray, size: int, step: int, gh: int, gw: int) -> np.ndarray:
    view = sliding_window_view(planes, (size, size), axis=(1, 2))[:, ::step, ::step]
    return view[:, :gh, :gw]


def observed_features(mask: np.ndarray | None, patch: int, stride: int,
                      colour: bool) -> np.ndarray | None:
    """Which entries of each patch's feature vector are observed under an ignore mask.

    Parameters
    ----------
    mask : ndarray, shape (H, W), bool, or None
        True where pixels are to be ignored.

    Returns
    -------
    ndarray, shape (gh * gw, d), bool, or None when nothing is masked
        A chroma entry counts as masked when any pixel of its 2x2 block is.
    """
    if mask is None or not mask.any():
        return None
    seen = (~mask.astype(bool)).astype(np.uint8)[None, ..., None].repeat(3, axis=-1)
    h, w = mask.shape
    gh, gw = grid_shape(h, w, patch, stride)
    parts = [_windows(seen[..., 0].astype(bool), patch, stride, gh, gw).reshape(gh * gw, -1)]
    if colour:
        half = patch // 2
        block = seen[0, ..., 0].reshape(h // 2, 2, w // 2, 2).min(axis=(1, 3)).astype(bool)[None]
        win = _windows(block, half, stride // 2, gh, gw).reshape(gh * gw, -1)
        parts += [win, win]
    return np.concatenate(parts, axis=1)


def fold_to_cells(values: np.ndarray, grid: tuple[int, int], patch: int,
                  stride: int) -> np.ndarray:
    """Spread per-patch values onto the cell map, averaging overlapping patches.

    Parameters
    ----------
    values : ndarray, shape (n, gh * gw)
    grid : (gh, gw)

    Returns
    -------
    ndarray, shape (n, gh + r - 1, gw + r - 1), float32, with r = patch // stride
    """
    gh, gw = grid
    r = patch // stride
    v = np.asarray(values, dtype=np.float32).reshape(-1, gh, gw)
    if r == 1:
        return v.copy()
    out = np.zeros((v.shape[0], gh + r - 1, gw + r - 1), np.float32)
    count = np.zeros(out.shape[1:], np.float32)
    for a in range(r):
        for b in range(r):
            out[:, a:a + gh, b:b + gw] += v
            count[a:a + gh, b:b + gw] += 1.0
    return out / count


def rasterize_mask(polygons, image_mask: np.ndarray | None, source_size: tuple[int, int],
                   size: tuple[int, int]) -> np.ndarray | None:
    """The ignore mask at working resolution from polygons and/or a mask image.

    Parameters
    ----------
    polygons : sequence of sequences of (x, y)
        In pixel coordinates of the exported frame (``source_size``).
    image_mask : ndarray, shape (h, w), or None
        Non-zero = ignore; any resolution with the frame's aspect ratio.
    source_size, size : (width, height)
        Exported and working resolution.

    Returns
    -------
    ndarray, shape (H, W), bool, or None when nothing is masked
    """
    w, h = size
    mask = np.zeros((h, w), np.uint8)
    sx, sy = w / source_size[0], h / source_size[1]
    for poly in polygons:
        pts = np.array([[x * sx, y * sy] for x, y in poly], np.float32)
        cv2.fillPoly(mask, [np.round(pts).astype(np.int32)], 1)
    if image_mask is not None:
        resized = cv2.resize((np.asarray(image_mask) > 0).astype(np.uint8), (w, h),
                             interpolation=cv2.INTER_NEAREST)
        mask |= resized
    return mask.astype(bool) if mask.any() else None
