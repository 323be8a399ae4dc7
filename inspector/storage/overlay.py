"""Heatmap overlays: the picture a reviewer looks at for a flagged frame."""

from __future__ import annotations

from functools import lru_cache

import cv2
import numpy as np

#: Perceptually uniform colour map (brightness rises monotonically with the value).
COLORMAP = cv2.COLORMAP_INFERNO
#: Overlays are drawn at least this wide so the caption stays readable.
MIN_WIDTH = 640
_OUTLINE = (255, 255, 255)
#: Colour of the hatching over masked areas (BGR grey).
_HATCH = (160, 160, 160)
#: Colour of the hatching over clipped areas (BGR cyan: in neither the heatmap's colour map,
#: black-red-yellow-white, nor the masks' grey), and its name in the caption.
_CLIPPED, _CLIPPED_NAME = (255, 255, 0), "cyan"
#: Height of a caption line, pixels.
_LINE = 20


def overlay_caption(camera: str, time: str, score: float, threshold: float,
                    stayed: float | None = None, amplified: tuple[float, float] | None = None,
                    clipped: float = 0.0, conditions: tuple[str, ...] = ()) -> str:
    """The caption of every overlay, saved or drawn on the spot (ASCII: drawn by OpenCV),
    one line per fact.

    ``stayed``: seconds the flagged region has stayed (persistence, busy cameras).
    ``amplified``: (gain, largest gain of the normal frames) of a frame darker than every
    normal frame, judged with its noise amplified
    (:meth:`inspector.core.conditions.Conditions.noise_scale`). ``clipped``: share of the
    view clipped white, where the model saw a prediction of the light (drawn by
    :func:`render_overlay`). ``conditions``: the camera conditions reported for the frame
    (health.csv) when it is flagged all the same (a busy camera's persistence flags an
    underexposed frame: :func:`inspector.core.persistence.held_back`)."""
    sign = ">" if score > threshold else "<="
    text = f"{camera}  {time}  score {score:.2f} {sign} threshold {threshold:.2f}"
    if stayed is not None:
        s = max(stayed, 0.0)
        text += "  stayed " + (f"{s:.0f} s" if s < 120 else f"{s / 60:.0f} min" if s < 7200
                               else f"{s / 3600:.1f} h")
    if amplified is not None:
        text += "\n" + amplified_text(amplified)
    if conditions:
        text += f"\ncamera condition: {', '.join(conditions)} (in health.csv)"
    if clipped > 0:
        text += (f"\nclipped white ({_CLIPPED_NAME}): {_percent(clipped)} of the view, "
                 f"its light predicted")
    return text


def amplified_text(amplified: tuple[float, float]) -> str:
    """How a frame judged with amplified noise is named (overlay caption, watch log):
    ``amplified`` is (its gain, the largest gain of the normal frames)."""
    return (f"judged with amplified noise: gain {amplified[0]:.3f} over the learnt "
            f"{amplified[1]:.3f}")


def _percent(share: float) -> str:
    """A share as a percentage, never rounded to 0 when there is any."""
    p = 100.0 * share
    return f"{p:.0f}%" if p >= 10 else f"{p:.1f}%" if p >= 0.1 else "<0.1%"


def render_overlay(image: np.ndarray, amap: np.ndarray, threshold: float,
                   caption: str, mask: np.ndarray | None = None,
                   clipped: np.ndarray | None = None) -> np.ndarray:
    """The frame with a translucent heatmap, the flagged region outlined, and a caption.

    Pixels the baseline does not look at (``mask``: burned-in text, configured masks) are
    dimmed and hatched, so a reviewer sees what could not have been flagged. Pixels clipped
    white (``clipped``), whose light the model saw only as a prediction, are hatched the
    other way in cyan and outlined, not dimmed.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
        RGB frame at working resolution.
    amap : ndarray, shape (h, w), float
        Anomaly map (same aspect ratio as the frame).
    threshold : float
        Frame threshold; map regions above it are outlined.
    caption : str
        One line per ``\\n``-separated part.
    mask : ndarray, shape (H, W), bool, optional
        Ignored pixels at working resolution.
    clipped : ndarray, shape (H, W), bool or uint8, optional
        Clipped pixels at working resolution (nonzero).

    Returns
    -------
    ndarray, shape (H' + caption band, W', 3), uint8, BGR (ready for cv2.imwrite)
    """
    scale = max(1, int(np.ceil(MIN_WIDTH / image.shape[1])))
    h, w = image.shape[0] * scale, image.shape[1] * scale
    frame = cv2.resize(cv2.cvtColor(image, cv2.COLOR_RGB2BGR), (w, h),
                       interpolation=cv2.INTER_LINEAR)
    heat = cv2.resize(np.asarray(amap, np.float32), (w, h), interpolation=cv2.INTER_LINEAR)
    top = max(float(heat.max()), threshold * 1.25, 1e-6)
    # Transparent where the map is unremarkable, up to 65% opaque where it is hottest: the
    # heatmap is drawn only over the box holding the pixels where it shows (elsewhere the
    # blend is the frame itself), most of a frame flagged for one object.
    alpha = heat - np.float32(0.5 * threshold)
    alpha /= np.float32(max(threshold, 1e-6))
    np.clip(alpha, 0.0, 1.0, out=alpha)
    alpha *= np.float32(0.65)
    out = frame
    x, y, bw, bh = cv2.boundingRect((alpha != 0).view(np.uint8))
    if bw and bh:
        box = np.s_[y:y + bh, x:x + bw]
        level = heat[box] / np.float32(top)
        np.clip(level, 0.0, 1.0, out=level)
        level *= np.float32(255)
        colour = cv2.LUT(cv2.cvtColor(level.astype(np.uint8), cv2.COLOR_GRAY2BGR),
                         _colour_table())
        out[box] = cv2.blendLinear(colour, frame[box], alpha[box], 1.0 - alpha[box])
    region = (heat > threshold).astype(np.uint8)
    contours, _ = cv2.findContours(region, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
    cv2.drawContours(out, contours, -1, _OUTLINE, 2, cv2.LINE_AA)
    # clipped areas sparser, so the heatmap shows between their lines; a mask over a clip
    # is drawn as masked
    for m, spacing, colour, dim, rising in ((clipped, 12, _CLIPPED, False, True),
                                            (mask, 8, _HATCH, True, False)):
        if m is not None and np.any(m):
            out = hatch(out, cv2.resize(np.asarray(m, np.uint8), (w, h),
                                        interpolation=cv2.INTER_NEAREST) > 0,
                        spacing, colour, dim, rising)
    lines = caption.split("\n")
    band = np.zeros((8 + _LINE * len(lines), w, 3), np.uint8)
    for k, line in enumerate(lines):
        cv2.putText(band, line, (8, 19 + _LINE * k), cv2.FONT_HERSHEY_SIMPLEX, 0.5,
                    (255, 255, 255), 1, cv2.LINE_AA)
    return np.vstack([out, band])


def hatch(image: np.ndarray, mask: np.ndarray, spacing: int = 8,
          colour: tuple[int, int, int] = _HATCH, dim: bool = True,
          rising: bool = False) -> np.ndarray:
    """``image`` (H, W, 3) uint8 with the pixels of ``mask`` (H, W) bool crossed by diagonal
    lines of ``colour`` every ``spacing`` pixels (falling to the right, or rising with
    ``rising``) and dimmed to half with ``dim``; the edge of the mask is outlined."""
    out = image.copy()
    m = mask.astype(np.uint8)
    # only the box around the mask changes (one pixel more, so that its outline is found
    # as in the whole image); the outline is drawn on the whole image
    x, y, bw, bh = cv2.boundingRect(m)
    if not (bw and bh):
        return out
    x0, y0 = max(x - 1, 0), max(y - 1, 0)
    box = np.s_[y0:min(y + bh + 1, m.shape[0]), x0:min(x + bw + 1, m.shape[1])]
    part, mb = out[box], m[box]
    if dim:
        cv2.copyTo(part // 2, mb, part)
    cv2.copyTo(_plain(out.shape, colour)[box], mb & _lines(mask.shape, spacing, rising)[box],
               part)
    contours, _ = cv2.findContours(mb, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE,
                                   offset=(x0, y0))
    cv2.drawContours(out, contours, -1, colour, 1, cv2.LINE_AA)
    return out


@lru_cache(maxsize=1)
def _colour_table() -> np.ndarray:
    """:data:`COLORMAP` as a lookup table, (256, 1, 3) uint8 BGR (``cv2.applyColorMap`` of
    a grey level is its row)."""
    return cv2.applyColorMap(np.arange(256, dtype=np.uint8)[:, None], COLORMAP)


@lru_cache(maxsize=4)
def _plain(shape: tuple[int, int, int], colour: tuple[int, int, int]) -> np.ndarray:
    """An image of one colour (made once per overlay size: OpenCV would otherwise copy a
    broadcast colour into a full image at every call, about 1 ms at 640 x 360)."""
    return np.full(shape, colour, np.uint8)


@lru_cache(maxsize=8)
def _lines(shape: tuple[int, int], spacing: int, rising: bool = False) -> np.ndarray:
    """(H, W) uint8, 1 on the diagonal hatching lines (made once per overlay size)."""
    h, w = shape
    yy, xx = np.mgrid[0:h, 0:w]
    return ((((xx - yy) if rising else (xx + yy)) % spacing) < 2).astype(np.uint8)
