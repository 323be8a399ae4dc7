"""Compiled loops of frame preparation: one pass over a frame where numpy and OpenCV took
several (masks combined, products summed, light given back), each the same numbers as the
numpy/OpenCV steps it replaces (the tests hold each to them).

Compiled by numba on first use and cached beside this file (``cache=True``), so a process
pays the compilation once per installation, not once per run; ``nogil=True``: they run in
the decoding threads beside each other (:func:`inspector.storage.frames.iter_batches`).
Imported lazily by :mod:`inspector.core.image` and :mod:`inspector.core.conditions`:
commands that prepare no frame do not import numba.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, nogil=True)
def kept_cell_sums(frame, ref, keep, rows, cols):  # pragma: no cover - compiled
    """Sums over the cells of a grid of ``keep * frame``, ``keep * ref`` and ``keep``.

    The sums a normalised convolution (Knutsson & Westin 1993) of a uint8 frame and its
    reference needs, in one pass: what ``(x * keep)`` then a summed-area table of each of
    the three gives (exact integers). Rows of a cell are added column by column first (a
    run of contiguous adds), then the columns of each cell.

    Parameters
    ----------
    frame, ref : ndarray, shape (H, W, C), uint8, C-contiguous
    keep : ndarray, shape (H, W, K), uint8 0/1, C-contiguous
        K = C (channel by channel) or K = 1 (the same for every channel).
    rows, cols : ndarray, shape (ny + 1,), (nx + 1,), int
        Cell edges along each axis, from 0 to H and W.

    Returns
    -------
    ndarray, shape (ny, nx, 2 C + K), int64
        Per cell: sums of ``keep * frame`` (C), ``keep * ref`` (C) and ``keep`` (K).
    """
    h, w, c = frame.shape
    kc = keep.shape[2]
    ny, nx = len(rows) - 1, len(cols) - 1
    f2 = frame.reshape(h, w * c)
    r2 = ref.reshape(h, w * c)
    k2 = keep.reshape(h, w * kc)
    out = np.zeros((ny, nx, 2 * c + kc), np.int64)
    af = np.zeros(w * c, np.int32)
    ar = np.zeros(w * c, np.int32)
    ak = np.zeros(w * kc, np.int32)
    for cy in range(ny):
        af[:] = 0
        ar[:] = 0
        ak[:] = 0
        for y in range(rows[cy], rows[cy + 1]):
            fr, rr, kr = f2[y], r2[y], k2[y]
            if kc == c:
                for j in range(w * c):
                    kk = np.int32(kr[j])
                    af[j] += np.int32(fr[j]) * kk
                    ar[j] += np.int32(rr[j]) * kk
            else:
                for x in range(w):
                    kk = np.int32(kr[x])
                    for ch in range(c):
                        af[x * c + ch] += np.int32(fr[x * c + ch]) * kk
                        ar[x * c + ch] += np.int32(rr[x * c + ch]) * kk
            for j in range(w * kc):
                ak[j] += np.int32(kr[j])
        for cx in range(nx):
            for x in range(cols[cx], cols[cx + 1]):
                for ch in range(c):
                    out[cy, cx, ch] += af[x * c + ch]
                    out[cy, cx, c + ch] += ar[x * c + ch]
                for j in range(kc):
                    out[cy, cx, 2 * c + j] += ak[x * kc + j]
    return out


@njit(cache=True, nogil=True)
def field_keep(expected, near, channels, seen, has_near, has_seen):  # pragma: no cover
    """Channels whose light a brightness field may compare, when the reference says which
    channels this exposure saturates (the rule of
    :func:`inspector.core.conditions._field_keep`, one pass instead of eleven OpenCV ones).

    A channel is kept unless it is expected to saturate; where a pixel has a clipped
    channel that is not expected to saturate and it is near a clip, no channel of it is
    kept; a clipped channel is never kept; a pixel not ``seen`` keeps nothing. Loops of
    0/1 bytes over pixels and over values, without branches (vectorised).

    Parameters
    ----------
    expected : ndarray, shape (H, W, 3), uint8
        Nonzero where the reference says the channel saturates at this exposure.
    near : ndarray, shape (H, W), uint8
        Nonzero where a channel is clipped or next to one (read when ``has_near``).
    channels : ndarray, shape (H, W, 3), uint8
        The same channel by channel (read when ``has_near``).
    seen : ndarray, shape (H, W), uint8
        Nonzero where the pixel may count at all (read when ``has_seen``).
    has_near, has_seen : bool

    Returns
    -------
    ndarray, shape (H, W, 3), uint8, 1 where kept, else 0
    """
    h, w, _ = expected.shape
    n = h * w
    e = expected.reshape(n * 3)
    ch = channels.reshape(-1)
    nr = near.reshape(-1)
    sn = seen.reshape(-1)
    out = np.empty(n * 3, np.uint8)
    ok = np.ones(n, np.uint8)  # pixels that keep their channels
    if has_seen:
        for p in range(n):
            ok[p] = sn[p] != 0
    if has_near:
        for p in range(n):  # near a clip, with a channel clipped the exposure does not explain
            odd = (((ch[3 * p] != 0) & (e[3 * p] == 0))
                   | ((ch[3 * p + 1] != 0) & (e[3 * p + 1] == 0))
                   | ((ch[3 * p + 2] != 0) & (e[3 * p + 2] == 0)))
            ok[p] &= np.uint8(1) - np.uint8(odd & (nr[p] != 0))
        for j in range(n * 3):
            out[j] = (e[j] == 0) & (ch[j] == 0)
    else:
        for j in range(n * 3):
            out[j] = e[j] == 0
    for p in range(n):
        k = ok[p]
        out[3 * p] &= k
        out[3 * p + 1] &= k
        out[3 * p + 2] &= k
    return out.reshape(h, w, 3)


@njit(cache=True, nogil=True)
def _mean_levels(row, g, base):  # pragma: no cover - compiled
    """Mean over its levels of ``max(base + row / g - 255, 0)`` in float32, summed as
    numpy's float32 mean sums a row (pairwise: eight running sums for 8 to 128 levels,
    added as ((0 + 1) + (2 + 3)) + ((4 + 5) + (6 + 7)); in order below 8)."""
    n = len(row)
    lim = np.float32(255.0)
    zero = np.float32(0.0)
    if n < 8:
        s = zero
        for i in range(n):
            s += max(base + row[i] / g - lim, zero)
        return s / np.float32(n)
    r = np.empty(8, np.float32)
    for j in range(8):
        r[j] = max(base + row[j] / g - lim, zero)
    i = 8
    while i + 8 <= n:
        for j in range(8):
            r[j] += max(base + row[i + j] / g - lim, zero)
        i += 8
    s = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]))
    while i < n:
        s += max(base + row[i] / g - lim, zero)
        i += 1
    return s / np.float32(n)


@njit(cache=True, nogil=True)
def lost_light(r, spread, own, low, top, pixel, index, n, gain, offset, near, img,
               has_near, has_img):  # pragma: no cover - compiled
    """Light the first ``n`` clip candidates of a frame lost beyond what the reference's
    own exposure lost (the arithmetic of :meth:`inspector.core.conditions.Conditions._lost`
    over its candidates, in its float32 order: the candidate's mean ``(r - offset) /
    gain``, reached when ``mean + top / gain >= 255``, not near a clip, not darker in the
    frame than ``mean + low / gain``; the loss :func:`inspector.core.image.clip_loss` of
    ``mean`` and ``spread / gain`` less ``own / gain``, at least 0).

    Parameters
    ----------
    r, own, low, top : ndarray, shape (m,), float32
        The reference's level, its own loss, the darkest and highest finer level of each
        candidate, in candidate order.
    spread : ndarray, shape (m, levels), float32
    pixel, index : ndarray, shape (m,), int
        Each candidate's pixel (into ``near``) and value (into ``img``), flat.
    n : int
        Candidates to test (the first ``n``).
    gain, offset : float32
    near : ndarray, shape (H * W,), uint8
        Nonzero near a clip (read when ``has_near``).
    img : ndarray, shape (H * W * 3,), uint8
        The frame (read when ``has_img``).

    Returns
    -------
    at : ndarray, shape (k,), int64
        Positions (< n) of the candidates that lost light.
    more : ndarray, shape (k,), float32
        Light each lost.
    """
    at = np.empty(n, np.int64)
    more = np.empty(n, np.float32)
    lim = np.float32(255.0)
    zero = np.float32(0.0)
    k = 0
    for i in range(n):
        mean = (r[i] - offset) / gain
        if not (mean + top[i] / gain >= lim):
            continue
        if has_near and near[pixel[i]] != 0:
            continue
        if has_img and not (np.float32(img[index[i]]) >= mean + low[i] / gain):
            continue
        at[k] = i
        more[k] = max(_mean_levels(spread[i], gain, mean) - own[i] / gain, zero)
        k += 1
    return at[:k], more[:k]


@njit(cache=True, nogil=True)
def apply_field(image, field, add, index, light, scale, floor):  # pragma: no cover
    """``(image + add) * field`` rounded to the nearest level (ties to even) and clipped to
    [0, 255], with ``light`` added first at ``index``: what a float32 copy of the frame
    (``cv2.addWeighted``, or ``astype`` and the light added, then the offset) times the
    field with ``cv2.multiply(..., dtype=cv2.CV_8U)`` computes, in one pass; with
    ``scale`` > 0, also ``cv2.convertScaleAbs(field, alpha=scale)`` into ``floor``.

    Parameters
    ----------
    image : ndarray, shape (H, W, C), uint8, C-contiguous
    field : ndarray, shape (H, W, C), float32, C-contiguous
    add : float32
    index : ndarray, shape (k,), int64
        Flat indices into ``image`` where ``light`` (float32, (k,)) is added first.
    scale : float32
    floor : ndarray, shape (H, W, C), uint8
        Written when ``scale`` > 0.

    Returns
    -------
    ndarray, shape (H, W, C), uint8
    """
    h, w, c = image.shape
    n = h * w * c
    out = np.empty(n, np.uint8)
    src = image.reshape(n)
    f = field.reshape(n)
    top = np.float32(255.0)
    for j in range(n):
        v = np.rint((np.float32(src[j]) + add) * f[j])
        out[j] = np.uint8(min(max(v, np.float32(0.0)), top))
    if scale > 0:
        fl = floor.reshape(n)
        for j in range(n):
            fl[j] = np.uint8(min(np.rint(abs(f[j] * scale)), top))
    for k in range(len(index)):  # the light given back at a few places
        at = index[k]
        v = np.rint(((np.float32(src[at]) + light[k]) + add) * f[at])
        out[at] = np.uint8(min(max(v, np.float32(0.0)), top))
    return out.reshape(h, w, c)
