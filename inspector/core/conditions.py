"""Camera conditions: what a fixed camera does to its frames that is not an incident.

Shared by every density model: frames are prepared here before any model sees them, at
learn time and at scoring time alike, so PPCA and VAE get the same help.

* Registration: each frame is aligned to the baseline's reference by phase correlation
  (Kuglin & Hines 1975, "The phase correlation image alignment method"; sub-pixel peak as
  in ``cv2.phaseCorrelate``), the fraction of a pixel refined by Lucas-Kanade steps (the
  peak's centroid is drawn towards whole pixels, see :func:`refine_shift`), kept only when
  it makes the frame correlate better with the reference (a large incident can fool the
  peak). A shift beyond ``max_shift`` is not corrected: the camera has been moved, which is
  a health condition, not an anomaly.
* Photometric normalisation: a robust fit ``reference ~ gain * frame + offset`` over the
  frame's pixels (percentile matching, then least squares refitted twice on the pixels
  whose residual is within 3 robust standard deviations, so a local incident does not pull
  the fit), applied to
  every channel ("global"); "local" also divides out a smooth brightness field (a Gaussian
  blur of an eighth of the long side), for lights that change one side of a scene only,
  one field per colour channel once the reference's colours are known, so that light of
  another colour over part of the view (floodlights coming on) is taken out as well.
  The chroma of every prepared frame is smoothed (:func:`smooth_chroma`): compression
  rounds its fine detail anew at each exposure.
* Clipping: a pixel with a colour channel clipped white (and its neighbours) only bounds
  its light. It is left out of the gain fit (its grey reads too dark) and, channel by
  channel, out of the brightness fields (its unclipped channels still count where the
  reference says this exposure saturates the clipped ones), and is raised to the
  reference where that is brighter. A frame brighter than the reference also clips finer
  than its working pixels (a sunlit tiled roof whose working pixels stay below the clip
  level): what that costs each pixel is predicted from the reference and how light
  spreads within the pixel, measured at learn time on frames as exported (a censored
  mean, Tobin 1958), and given back. A channel clipped black (most of its neighbourhood at
  0 to 5) shows at most its light, lifted by its noise cut at 0: it is lowered to what the
  reference's light reads in the frame (the reference, or the frame's black floor), and
  left out of the brightness field.
* Burned-in text (clock, date, camera name): found at learn time as places where the sample
  frames differ in sharp strokes while the smooth content stays put, grown along the text
  line, and masked.
* Noise: a frame brought to the reference with a larger gain than any normal frame needed
  carries its sensor and compression noise amplified beyond what the model learnt; the
  models are told by how much (:meth:`Conditions.noise_scale`).
* Health: lens covered, out of focus, frozen feed, underexposed, overexposed, camera moved,
  each a measure with a limit, the limits widened by what the normal frames showed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import cv2
import numpy as np

from inspector.core.image import (
    brightness_field,
    cell_contrast,
    cell_correlation,
    cell_detail,
    cell_terms,
    clip_loss,
    correlation,
    correlation_terms,
    grey,
    halved,
    lucas_kanade,
    median_stack,
    percentile_rows,
    phase_shifts,
    PerReference,
    phase_spectrum,
    refine_shift,
    robust_gains,
    shift_images,
    shift_terms,
)
from inspector.core.estimator import Estimator

#: Lighting modes of :class:`Conditions` (its ``lighting``).
LIGHTING_MODES = ("global", "local", "off")
#: Health limits before they are widened by the normal frames (see :meth:`Conditions.fit`).
DEFAULT_LIMITS = {"dark": 20.0, "bright": 0.5, "covered": 0.5, "focus": 0.35, "frozen": 0.25}
#: Neighbourhood of a clipped pixel whose brightness is not trusted (see ``prepare``).
_NEAR = np.ones((3, 3), np.uint8)
#: Where the reference is clipped white (and next to it), a frame at most this share darker
#: reads as the same glare and takes the reference's colour: the normal frames saw nothing
#: but the clip there, and an exposure step moves a normalised pixel by a few percent; a lamp
#: switched off or an object in front of it is far darker and stays (common practice, no
#: source).
GLARE_TOLERANCE = 0.1
#: Per-channel bound of ``cv2.compare``: a channel above it is clipped white (>= 250).
_UNCLIPPED = (249, 249, 249)
#: A channel at or below this level is clipped black: its light is at most what it shows
#: (the same margin as white's 250 below 255; common practice, no source).
BLACK_LEVEL = 5
#: Per-channel bound of ``cv2.compare``: a channel below it is clipped black.
_UNBLACK = (BLACK_LEVEL + 1,) * 3
#: A textured cell whose correlation with the reference falls below this is lost from view.
COVER_CORRELATION = 0.2
#: Blur (working pixels) of the chroma of prepared frames (see :func:`smooth_chroma`).
CHROMA_SIGMA = 1.0
#: Frames whose shorter side has at least this many working pixels are registered from a
#: phase correlation of their 2 x 2 reductions (a quarter of the Fourier work), refined at
#: full size by Lucas-Kanade steps until they converge; a frame whose steps do not
#: converge within :data:`HALF_STEPS`, or stop shrinking, is registered at full size, as
#: smaller frames are (a 128 x 72 frame halves to 64 x 36, where the peak is off by half
#: a pixel and more).
HALVE_FROM = 160
#: Most Lucas-Kanade steps from a half-size estimate (see :data:`HALVE_FROM`).
HALF_STEPS = 6


@dataclass
class Prepared:
    """Frames after :meth:`Conditions.prepare`, with what preparation measured on them.

    Handed on to the model (``images``) and to the health measures (:meth:`Conditions.measures`),
    so the grey frame, the shift and the gain of a frame are computed once.

    Attributes
    ----------
    images : ndarray, shape (n, H, W, 3), uint8
        Aligned and normalised frames, as the model sees them.
    grey : ndarray, shape (n, H, W), float32
        Grey (:func:`~inspector.core.image.grey`) of the frames as captured.
    aligned : ndarray, shape (n, H, W), float32
        That grey moved back by the measured shift, however large (``grey`` where none).
    shifts : ndarray, shape (n, 2), float
        Measured (dx, dy) of each frame; frames beyond ``max_shift`` are not moved.
    gains : ndarray, shape (n, 2), float
        Robust (gain, offset) of ``reference ~ gain * aligned + offset``
        (:func:`~inspector.core.image.robust_gains`); (1, 0) without a reference.
    clipped : ndarray, shape (n, H, W), uint8, or None
        Pixels (of the frames as aligned) clipped white, or next to a clipped one (255),
        whose brightness was only bounded; None when no frame has any.
    """

    images: np.ndarray
    grey: np.ndarray
    aligned: np.ndarray
    shifts: np.ndarray
    gains: np.ndarray
    clipped: np.ndarray | None = None

    def __len__(self) -> int:
        return len(self.images)


def _channel_max(image: np.ndarray) -> np.ndarray:
    """Largest channel of each pixel of an (H, W, 3) uint8 image, shape (H, W) (OpenCV:
    numpy's reduction over a last axis of 3 is slow)."""
    r, g, b = cv2.split(image)
    return cv2.max(cv2.max(r, g), b)


def _any_channel(mask: np.ndarray) -> np.ndarray:
    """255 where any channel of an (H, W, 3) 0/255 uint8 mask is set, else 0, (H, W)
    uint8: its grey (every BT.601 weight of 255 rounds to at least 29) compared with 0, two
    passes where :func:`_channel_max` takes a split and two."""
    return cv2.compare(cv2.cvtColor(mask, cv2.COLOR_RGB2GRAY), 0, cv2.CMP_GT)


def _extremes(image: np.ndarray) -> tuple[float, float]:
    """Darkest and brightest level of any channel of an (H, W, 3) uint8 image (one pass;
    the test before a clipping mask is made)."""
    lo, hi, _, _ = cv2.minMaxLoc(image.reshape(image.shape[0], -1))
    return lo, hi


def _moved_back(mask: np.ndarray, shift: tuple[float, float] | None) -> np.ndarray:
    """A 0/255 uint8 mask of a frame's pixels, moved back by ``shift`` (dx, dy) as the frame
    is: 255 wherever any part of a marked pixel lands (None: as it is)."""
    if shift is None:
        return mask
    return cv2.compare(shift_images(mask, -shift[0], -shift[1]), 0, cv2.CMP_GT)


def smooth_chroma(image: np.ndarray, sigma: float = CHROMA_SIGMA,
                  out: np.ndarray | None = None) -> np.ndarray:
    """An RGB frame with its chroma blurred and its luma kept.

    Compressed frames carry their colour at half resolution and quantise its detail far
    more coarsely than their brightness (JPEG 4:2:0 with the chroma table; ITU-T T.81
    annex K). Normal frames of a still scene round that detail the same way every time, so
    the model learns it as fixed, while a frame at another exposure rounds it anew: at
    the edges of saturated colours its chroma moves by several levels, more than the
    luma's noise (the demo aisle re-exposed by 15 % and JPEG-encoded again by OpenCV:
    chroma 2.3 levels RMS from the original, 1 at half resolution; luma 0.5). Cr and Cb
    (ITU-R BT.601, as in JPEG) are blurred with a Gaussian of ``sigma`` pixels; the luma is
    kept (up to rounding, and where a blurred colour leaves the RGB cube and is clipped).

    Parameters
    ----------
    image : ndarray, shape (H, W, 3), uint8
    sigma : float
        Standard deviation of the blur, in pixels.
    out : ndarray, shape (H, W, 3), uint8, optional
        Where to write the result (not ``image``).

    Returns
    -------
    ndarray, shape (H, W, 3), uint8
        ``out`` when given.
    """
    ycc = cv2.cvtColor(image, cv2.COLOR_RGB2YCrCb)
    chroma = np.empty(ycc.shape[:2] + (2,), np.uint8)
    cv2.mixChannels([ycc], [chroma], [1, 0, 2, 1])
    # only Cr and Cb are blurred (OpenCV blurs 8-bit images in exact fixed point, channel
    # by channel: the same numbers as blurring all three)
    cv2.mixChannels([cv2.GaussianBlur(chroma, (0, 0), sigma)], [ycc], [0, 1, 1, 2])
    return cv2.cvtColor(ycc, cv2.COLOR_YCrCb2RGB, dst=out)


def _field_keep(near: np.ndarray | None, channels: np.ndarray | None,
                expected: np.ndarray | None, seen: np.ndarray | None = None,
                seen_rgb: np.ndarray | None = None) -> np.ndarray | None:
    """Pixels whose light each colour channel's brightness field may compare: (H, W) bool
    when the same for every channel, (H, W, 3) bool channel by channel, None for all.

    Only pixels of ``seen`` count at all: burned-in text (ignored) is drawn on the frame
    after its exposure and does not follow the gain, so a brighter frame's white clock,
    brought back by the gain, reads darker than the reference's and would brighten the
    field around it (the demo aisle 30 % brighter: the shelf beam below its clock 7-11
    levels too bright in red).

    A pixel with a clipped channel (``near``) only bounds its light and is left out of
    every channel's field, unless each channel it clipped is one the reference says this
    exposure saturates there (``expected``): the clip is then the exposure's, and its other
    channels are measured light, kept for their own fields (a red saucer that clips in red
    still tells green and blue how bright it is). A channel expected to saturate is left out
    of its own field wherever it is.

    Parameters
    ----------
    near : ndarray, shape (H, W), uint8, or None
        255 where a channel is clipped or next to a clipped one.
    channels : ndarray, shape (H, W, 3), uint8, or None
        The same, channel by channel.
    expected : ndarray, shape (H, W, 3), uint8, or None
        Channels the reference says this frame's exposure saturates (255, else 0).
    seen : ndarray, shape (H, W), bool, or None
        Pixels that may count (None: all).
    seen_rgb : ndarray, shape (H, W * 3), uint8, optional
        :func:`_seen_rgb` of ``seen``, when made before (the same for every frame of a
        camera without channels clipped black).
    """
    if expected is None:
        keep = None if near is None else near == 0
        return seen if keep is None else keep if seen is None else keep & seen
    # OpenCV's 0/255 masks on (H, W * 3) views: numpy's logic over a last axis of 3 is slow
    h, w = expected.shape[:2]
    keep = cv2.bitwise_not(expected.reshape(h, -1))
    if near is not None:
        clipped = cv2.compare(channels.reshape(h, -1), 0, cv2.CMP_GT)
        # a pixel with a clipped channel the exposure does not explain keeps no channel
        odd = _any_channel(cv2.bitwise_and(clipped, keep).reshape(h, w, 3))
        use = cv2.bitwise_not(cv2.bitwise_and(odd, near))
        keep = cv2.bitwise_and(keep, cv2.bitwise_not(clipped))
        keep = cv2.bitwise_and(keep, cv2.cvtColor(use, cv2.COLOR_GRAY2RGB).reshape(h, -1))
    if seen is not None:
        keep = cv2.bitwise_and(keep, _seen_rgb(seen) if seen_rgb is None else seen_rgb)
    return cv2.bitwise_and(keep, 1).reshape(h, w, 3).view(bool)


def _health_terms(ignore: np.ndarray | None, cells: np.ndarray | None
                  ) -> tuple[np.ndarray | None, np.ndarray | None, int | None,
                             np.ndarray | None]:
    """What the health measures need of the ignore mask ``ignore`` ((H, W) bool, None:
    none) and the reference cells ``cells`` ((g, g), None: not known yet): the pixels
    kept, (H, W) uint8 1/0 (None: all); the flat indices of every fourth of them (None:
    every fourth pixel); how many there are (at least 1; None when all are kept: the
    callers take the frame's size); and the textured cells, (g, g) bool (None without
    ``cells``)."""
    keep = quarter = count = None
    if ignore is not None:
        keep = (~ignore).astype(np.uint8)
        kept = np.flatnonzero(keep)
        quarter, count = kept[::4], max(len(kept), 1)
    textured = (None if cells is None else
                cells > max(2.0, 0.1 * float(np.median(cells))))
    return keep, quarter, count, textured


def _seen_rgb(seen: np.ndarray) -> np.ndarray:
    """An (H, W) bool mask in every channel, 255 where set, else 0, as an (H, W * 3) uint8
    array (for :func:`_field_keep`)."""
    return cv2.cvtColor(seen.view(np.uint8) * np.uint8(255),
                        cv2.COLOR_GRAY2RGB).reshape(seen.shape[0], -1)


class Conditions(Estimator):
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
    limits : dict of str to float, optional
        Health limits asked for, before :meth:`fit` widens them (missing keys take
        :data:`DEFAULT_LIMITS`).

    Attributes
    ----------
    reference_ : ndarray, shape (H, W), float32, or None
        Median grey of the (aligned, normalised) sample of normal frames (None when fitted
        on no frames: frames then pass through unchanged).
    reference_rgb_ : ndarray, shape (H, W, 3), uint8, or None
        Their median colour (fills what a shift uncovers; bounds clipped pixels).
    ignore_ : ndarray, shape (H, W), bool, or None
        Pixels left out of the fits and the health measures (user mask and text overlays).
    ref_cells_ : ndarray, shape (g, g), float32, or None
        Median cell contrast of the normal frames (which cells have texture to lose).
    ref_detail_ : ndarray, shape (g, g), float32, or None
        Median cell detail (:func:`cell_detail`) of the normal frames, brought to the
        reference's gain.
    limits_ : dict of str to float
        Health limits in force (see :meth:`fit`).
    gain_max_ : float or None
        Largest gain (:attr:`Prepared.gains`) of the normal frames as captured (see
        :meth:`noise_scale`); None when unknown.
    fine_ : ndarray, shape (H, W, 3, levels), float16, or None
        How light spreads within each working pixel (see :meth:`fit`).
    """

    def __init__(self, lighting: str = "local", register: bool = True, max_shift: float = 8.0,
                 health: bool = True, limits: dict[str, float] | None = None):
        if lighting not in LIGHTING_MODES:
            raise ValueError(f"lighting must be one of {LIGHTING_MODES}, got {lighting!r}")
        self.lighting = lighting
        self.register = register
        self.max_shift = max_shift
        self.health = health
        self.limits = limits
        self._forget()

    def _forget(self) -> None:
        """What frames need of the reference, made anew once per reference (a new fit)."""
        #: The colour reference's glare and brightest level (:meth:`_reference_glare`).
        self._ref_terms = PerReference()
        #: The colour reference and :attr:`fine_` as :meth:`_lost` uses them
        #: (:meth:`_fine_terms`).
        self._fine = PerReference()
        #: What registration needs of the grey reference (:meth:`_registration`).
        self._spectrum = PerReference()
        #: What the health measures need of the ignore mask and the reference cells
        #: (:func:`_health_terms`).
        self._health = PerReference()
        #: The grey reference's :func:`~inspector.core.image.cell_terms`.
        self._cells = PerReference()
        #: The pixels not ignored, in every channel (:func:`_seen_rgb`).
        self._seen = PerReference()

    # -- learning ------------------------------------------------------------------------
    def fit(self, images: np.ndarray, ignore: np.ndarray | None = None,
            fine: np.ndarray | None = None) -> "Conditions":
        """Learn the reference and the health limits from a sample of normal frames.

        Limits start from ``limits`` (``dark``: 99th percentile of grey below which a
        frame is underexposed; ``bright``: share of clipped pixels above which it is
        overexposed; ``covered``: share of the reference's textured cells that no longer
        correlate with it; ``focus``: median over textured cells of their detail (variance of the
        Laplacian) relative to normal, below which it is out of focus; ``frozen``: mean absolute
        difference to the previous frame, in grey levels, below which the feed is frozen)
        and are widened so that no more than the sample's extremes would have tripped them
        (with a margin), so a camera that is normally dim or soft is not reported all day.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
            Normal frames in time order (none: nothing is learnt, frames pass through).
        ignore : ndarray, shape (H, W), bool, optional
        fine : ndarray, shape (H, W, 3, levels), float, optional
            :func:`~inspector.core.image.subpixel_levels` of the camera's frames as
            exported: frames brighter than the reference then get back the light their
            finer pixels lost to clipping (see :meth:`prepare`).
        """
        images = np.asarray(images)
        self.ignore_ = ignore
        self.fine_ = None if fine is None else np.asarray(fine, np.float16)
        self.reference_ = self.reference_rgb_ = self.ref_cells_ = self.ref_detail_ = None
        self.gain_max_ = None
        self.limits_ = {**DEFAULT_LIMITS, **(self.limits or {})}
        self._forget()
        if not len(images):
            return self
        ref = median_stack(grey(images))
        ref_rgb = None
        for _ in range(2):  # align and normalise the sample to a first reference, then redo
            rgb = self._prepare(images, ref, ref_rgb).images
            ref = median_stack(grey(rgb))
            ref_rgb = median_stack(rgb).astype(np.uint8)
        self.reference_ = ref.astype(np.float32)
        self.reference_rgb_ = ref_rgb
        rec = self.prepare(images)
        self.ref_cells_ = median_stack(cell_contrast(grey(rec.images)))
        self.ref_detail_ = median_stack(self._detail(rec))
        self.set_limits(self.measures(rec))
        return self

    def set_limits(self, m: dict[str, np.ndarray]) -> None:
        """Health limits from ``limits`` widened by the measures ``m`` of normal frames
        (:meth:`measures`: each of shape (n,); see :meth:`fit`), and ``gain_max_`` from
        their ``gain`` when given; call again with the measures of all normal frames when
        known."""
        self.check_fitted()
        if "gain" in m and len(m["gain"]):
            self.gain_max_ = float(np.max(m["gain"]))
        d = {**DEFAULT_LIMITS, **(self.limits or {})}
        self.limits_ = {
            "dark": float(min(d["dark"], 0.7 * np.min(m["dark"]))),
            "bright": float(min(0.99, max(d["bright"], 1.5 * np.max(m["bright"])))),
            "covered": float(min(0.99, max(d["covered"], np.max(m["covered"]) + 0.2))),
            "focus": float(min(d["focus"], 0.7 * np.min(m["focus"]))),
            "frozen": float(d["frozen"]),
        }

    # -- per frame -----------------------------------------------------------------------
    def prepare(self, images: np.ndarray, shifts: np.ndarray | None = None,
                clipped: np.ndarray | None = None, render: np.ndarray | None = None
                ) -> Prepared:
        """Align and normalise frames to the learnt reference.

        A frame shifted by ``(dx, dy)`` is moved back; the strip its edge leaves uncovered and
        the places where burned-in text (which does not move with the camera) would land are
        filled from the colour reference. A pixel clipped white in the frame (>= 250) only
        bounds its true value from below, so after the gain it is raised to the reference
        when that is brighter (never lowered: a white parcel stays white); so are its
        neighbours, which mix clipped light into their average at the working size. Where
        the reference is clipped (a lamp, a sunlit window) and next to it, the normal frames
        showed nothing but the clip, whatever this frame's exposure: the pixels take the
        reference's colour unless the frame is clearly darker there
        (:data:`GLARE_TOLERANCE`; a lamp gone out stays visible). Black clipping is left
        alone: at night most dark pixels are near 0 and follow no gain either, but they are
        all alike.

        Parameters
        ----------
        images : ndarray, shape (n, H, W, 3), uint8
        shifts : ndarray, shape (n, 2), optional
            The frames' shifts when already measured (``Prepared.shifts`` of the frames
            these were made from, e.g. made darker): registration is not measured again.
        clipped : ndarray, shape (n, H, W), uint8, optional
            ``Prepared.clipped`` of the frames these were made from: treated as clipped
            too (a darker copy of a clipped pixel shows a flat level that only bounds its
            light, as the pixel did).
        render : ndarray, shape (n,), bool, optional
            Frames to align and normalise (default all). The others are measured only (grey,
            shift, gain, clipped pixels) and left in ``images`` as given: a frame whose
            measures are wanted but whose pixels will be replaced, e.g. by a copy at another
            exposure prepared with this frame's ``shifts`` and ``clipped``.

        Returns
        -------
        Prepared
            The prepared frames with their grey, shifts and gains.

        Raises
        ------
        NotFittedError
            Before :meth:`fit`.
        """
        self.check_fitted()
        return self._prepare(images, self.reference_, self.reference_rgb_, shifts,
                             was_clipped=clipped, render=render)

    def _prepare(self, images: np.ndarray, ref: np.ndarray | None,
                 ref_rgb: np.ndarray | None, known: np.ndarray | None = None,
                 was_clipped: np.ndarray | None = None,
                 render: np.ndarray | None = None) -> Prepared:
        """:meth:`prepare` against a given reference (also while learning it)."""
        images = np.asarray(images)
        n = len(images)
        g_all = grey(images)
        shifts = np.zeros((n, 2))
        gains = np.tile([1.0, 0.0], (n, 1))
        if ref is None or (not self.register and self.lighting == "off" and not self.health):
            return Prepared(images, g_all, g_all, shifts, gains)
        keep = None if self.ignore_ is None else ~self.ignore_
        aligned = g_all
        moved: dict[int, tuple[float, float]] = {}  # frames moved back, by their shift
        if self.register:
            if known is None:
                spectrum, terms, half, compared = self._spectrum.get(self._registration, ref)
                found = (phase_shifts(g_all, spectrum, self.ignore_) if half is None else
                         2.0 * phase_shifts(halved(g_all), *half))
            for i, g in enumerate(g_all):
                dx, dy = found[i] if known is None else known[i]
                if known is None and half is not None:  # a half-size estimate
                    dx, dy, done = lucas_kanade(g, terms, dx, dy, HALF_STEPS, True)
                    if not done:  # not near enough: measured at full size
                        dx, dy = phase_shifts(g[None], spectrum, self.ignore_)[0]
                        dx, dy = refine_shift(g, terms, dx, dy)
                elif known is None:
                    dx, dy = refine_shift(g, terms, dx, dy)
                if np.hypot(dx, dy) > 0.05:
                    back = shift_images(g, -dx, -dy)
                    # a shift measured before is taken as measured; a new one only when the
                    # frame is better aligned (a large change can fool the peak)
                    if known is None and (correlation(back, ref, terms=compared)
                                          <= correlation(g, ref, terms=compared)):
                        dx = dy = 0.0
                    else:
                        if aligned is g_all:  # copied only when a frame moves
                            aligned = g_all.copy()
                        aligned[i] = back
                shifts[i] = dx, dy
                if 0.05 < np.hypot(dx, dy) <= self.max_shift:
                    moved[i] = (dx, dy)
        # the grey the gain is fitted on: moved back where the shift is corrected
        fitted = g_all
        if moved:
            fitted = g_all.copy()
            idx = list(moved)
            fitted[idx] = aligned[idx]
        # clipped white pixels of each frame as captured (255 where a channel is >= 250),
        # moved with the frame (moving back interpolates, which takes a thin clipped line
        # below the clip level), then with their neighbours; they only bound their light
        extremes = [_extremes(img) for img in images]  # the test before either mask
        nears = [self._near_clipped(img, moved.get(i),
                                    None if was_clipped is None else was_clipped[i],
                                    extremes[i][1])
                 for i, img in enumerate(images)]
        # and the channels clipped black (most of their neighbourhood), bounded from above
        darks = [self._near_black(img, moved.get(i), extremes[i][0])
                 for i, img in enumerate(images)]
        if self.lighting != "off" or self.health:
            bounded = None
            if any(m is not None for m, _ in nears):
                bounded = np.zeros(images.shape[:3], bool)
                for i, (m, _) in enumerate(nears):
                    if m is not None:
                        bounded[i] = m > 0
            gains = robust_gains(fitted, ref, keep, bounded)
        out = np.empty_like(images)
        clipped: np.ndarray | None = None
        sigma = max(images.shape[1:3]) / 8.0
        for i, img in enumerate(images):
            fill = None
            near, channels = nears[i]
            if i in moved:
                dx, dy = moved[i]
                img = shift_images(img, -dx, -dy)
                fill = self._uncovered(dx, dy, img.shape[:2])
            if near is not None:
                if clipped is None:
                    clipped = np.zeros(images.shape[:3], np.uint8)
                clipped[i] = near
            if render is not None and not render[i]:  # measured only
                out[i] = images[i]
                continue
            if self.lighting == "off":
                o = smooth_chroma(img, out=out[i])
            else:
                gain, offset = gains[i]
                expected = (None if ref_rgb is None else
                            self._saturating(ref_rgb, gain, offset))
                lost = None if ref_rgb is None else self._lost(ref_rgb, gain, offset, near,
                                                               img)
                if self.lighting == "local":
                    # (gain * img + offset) * field = (img + offset / gain) * (gain * field);
                    # the field compares the pixels the frame did not clip: a clipped one
                    # only bounds its light (a clipped sky of a brighter frame reads darker
                    # than the reference's and would brighten everything near it); one
                    # field per colour channel once the reference's colours are known:
                    # light of another colour over part of the view (floodlights coming on,
                    # low sun beside lamps) changes the channels by different factors
                    seen, seen_rgb = keep, None
                    if darks[i] is not None:  # a channel clipped black only bounds its light
                        seen = _any_channel(darks[i]) == 0
                        seen = seen if keep is None else seen & keep
                    elif keep is not None:  # the pixels not ignored: the same every frame
                        seen_rgb = self._seen.get(lambda ignore: _seen_rgb(~ignore),
                                                  self.ignore_)
                    kept = _field_keep(near, channels, expected, seen,  # (H, W) without ref_rgb
                                       seen_rgb)
                    field = (brightness_field(img, ref_rgb, sigma, gain, offset, scale=gain,
                                              keep=kept, added=lost)
                             if ref_rgb is not None else
                             brightness_field(fitted[i], ref, sigma, gain, offset, scale=gain,
                                              channels=3, keep=kept))
                    if lost is None:
                        f = cv2.addWeighted(img, 1.0, img, 0.0, offset / gain, dtype=cv2.CV_32F)
                    else:
                        # (img + lost) + offset / gain, in float32: one pass over the
                        # frame, the few with lost light apart (the same numbers)
                        lift = np.float32(offset / gain)
                        f = np.add(img, lift, dtype=np.float32)
                        f.reshape(-1)[lost[0]] = (img.reshape(-1)[lost[0]].astype(np.float32)
                                                  + lost[1]) + lift
                    o = cv2.multiply(f, field, dtype=cv2.CV_8U)  # rounds, clips
                    # what a channel at 0 reads once normalised: the frame's black floor
                    floor = (None if darks[i] is None or offset <= 0 else
                             cv2.convertScaleAbs(field, alpha=offset / gain))
                else:
                    level = img  # the frame's levels, the lost light given back
                    if lost is not None:
                        level = img.astype(np.float32)
                        level.reshape(-1)[lost[0]] += lost[1]
                    o = cv2.addWeighted(level, gain, level, 0.0, offset, dtype=cv2.CV_8U)
                    floor = (None if darks[i] is None or offset <= 0 else
                             np.full_like(o, min(round(offset), 255)))
                # the colour is evened out before the reference bounds clipped pixels and
                # glare: the reference's is evened out too, and a frame compared with it
                # unevened took the reference's blurred colour where its own was sharper,
                # then blurred it again (the demo aisle 30 % brighter: blue 20-27 levels
                # too high along its clipped orange shelf beams, 32 of 56 frames flagged)
                o = smooth_chroma(o, out=out[i])  # written in place from here on
                if ref_rgb is not None:
                    self._restore(o, near, ref_rgb, dark=darks[i], floor=floor)
            if fill is not None and ref_rgb is not None:
                cv2.copyTo(ref_rgb, fill.view(np.uint8), o)
            if o.base is not out:  # not written in place
                out[i] = o
        return Prepared(out, g_all, aligned, shifts, gains, clipped)

    def _restore(self, o: np.ndarray, near: np.ndarray | None, ref_rgb: np.ndarray,
                 dark: np.ndarray | None = None, floor: np.ndarray | None = None) -> None:
        """Bounded pixels of a normalised frame ``o`` (H, W, 3) uint8, in place: those clipped
        or next to a clipped one (``near``) raised to the colour reference, channels clipped
        black (``dark``, :meth:`_near_black`) lowered to it, and the reference's glare given
        its colour unless the frame is clearly darker there (see :meth:`prepare`).

        A channel clipped black shows at most its light, and its noise, cut at 0, lifts it:
        it takes what the reference's light would read in this frame if it is darker, that
        is the reference, or the frame's black ``floor`` (H, W, 3) uint8 (what 0 reads once
        normalised, None for 0) where the reference is darker still: normal frames as dark
        cannot show it either (a night frame brought back by a large gain keeps its floor,
        as its normal nights do).
        """
        if near is not None:
            cv2.copyTo(cv2.max(o, ref_rgb), near, o)
        if dark is not None:  # never raised
            target = ref_rgb if floor is None else cv2.max(ref_rgb, floor)
            cv2.copyTo(cv2.min(o, target), dark, o)
        glare, _ = self._ref_terms.get(self._reference_glare, ref_rgb)
        if glare is not None:  # glare pixels whose brightest channel is >= floor
            box, mask, below, colour = glare
            part = o[box]  # a view: written in place
            cv2.copyTo(colour, cv2.bitwise_and(
                mask, cv2.bitwise_not(cv2.inRange(part, *below))), part)

    def _saturating(self, ref_rgb: np.ndarray, gain: float, offset: float
                    ) -> np.ndarray | None:
        """Channels of each pixel that a frame of this ``gain`` and ``offset`` (as fitted by
        :func:`robust_gains`, ``reference ~ gain * frame + offset``) would clip white if it
        showed the reference: the reference's level there is at least what 250 in the
        frame becomes, (H, W, 3) uint8, 255 there and 0 elsewhere; None where there are
        none (no reference level reaches it)."""
        level = 250.0 * gain + offset
        if level > self._ref_terms.get(self._reference_glare, ref_rgb)[1]:
            return None
        # whole levels: at least the float32 level is at least its ceiling (OpenCV compares
        # in one pass what numpy compares through a float32 copy)
        least = min(max(int(np.ceil(np.float32(level))), 0), 255)
        h = ref_rgb.shape[0]
        return cv2.compare(ref_rgb.reshape(h, -1), least, cv2.CMP_GE).reshape(ref_rgb.shape)

    def _lost(self, ref_rgb: np.ndarray, gain: float, offset: float,
              near: np.ndarray | None, img: np.ndarray | None = None
              ) -> tuple[np.ndarray, np.ndarray] | None:
        """Light a frame of this ``gain`` and ``offset`` is expected to have lost to
        clipping finer than its working pixels, in its own levels: ``(index, light)``, the
        flat indices into the (H, W, 3) frame where it lost any (a few: bright fine
        detail) and the light lost there, float32; None without :attr:`fine_` or where it
        is nowhere more than a hundredth of a level.

        Had the frame shown the reference, a working pixel would average finer pixels
        ``(reference + spread - offset) / gain`` (``spread`` from :attr:`fine_`, measured
        at about the reference's exposure), each clipped at 255, and read lower by their
        :func:`~inspector.core.image.clip_loss`; the reference itself lost that at its
        own exposure (gain 1). A brighter frame loses more where detail is fine and bright,
        and gets the difference back here, so that it reads as the reference would; a
        frame at the reference's exposure gets nothing. Pixels clipped or next to a clipped
        one (``near``) get nothing either: they are bounded, and raised to the reference
        afterwards; nor does a channel of ``img`` (the frame, (H, W, 3), as aligned) darker
        than the pixel's own darkest finer level would be: that is not this clip but
        something else (a dark object), left as seen.
        """
        if self.fine_ is None:
            return None
        r, spread, neg_high, order, own, low, top, pixel = self._fine.get(self._fine_terms,
                                                                          ref_rgb)
        g, o = np.float32(gain), np.float32(offset)
        # a frame whose 255 reads at least 255 in the reference's levels loses no more than
        # the reference did (level by level, max(x - 255 g - offset, 0) <= max(x - 255, 0))
        if 255.0 * gain + offset >= 255.0:
            return None
        # reach below needs r + spread_max - offset >= 255 gain; a hundredth of a level of
        # slack keeps float32 rounding from dropping a candidate the full test would keep
        bound = -(255.0 * gain + offset - 0.01)
        # searched as float32 (a float64 bound would copy the whole array to float64): the
        # largest float32 not above the bound finds the same place
        bound32 = np.float32(bound)
        if float(bound32) > bound:
            bound32 = np.nextafter(bound32, np.float32(-np.inf))
        n = int(np.searchsorted(neg_high, bound32, "right"))
        if not n:
            return None
        idx = order[:n]
        mean = (r[:n] - o) / g
        reach = mean + top[:n] / g >= np.float32(255.0)
        if near is not None:
            reach &= near.reshape(-1)[pixel[:n]] == 0
        if img is not None:  # darker than its own darkest finer level: not this clip
            reach &= img.reshape(-1)[idx] >= mean + low[:n] / g
        if not reach.any():
            return None
        # what this exposure loses beyond what the reference's own exposure lost
        # (on every candidate: cheaper than gathering the levels of those that reach)
        more = clip_loss(mean, spread[:, :n].T, divide=g)
        more -= own[:n] / g
        more = np.maximum(more[reach], 0.0)
        if float(more.max()) <= 0.01:
            return None
        return idx[reach], more

    def _near_clipped(self, img: np.ndarray, shift: tuple[float, float] | None,
                      was: np.ndarray | None, brightest: float
                      ) -> tuple[np.ndarray | None, np.ndarray | None]:
        """Pixels of one frame (H, W, 3) uint8 that only bound their light, as aligned.

        Returns ``(near, channels)``: ``near`` (H, W) uint8 is 255 where a channel is
        clipped white (>= 250) there or next to it, with ``was`` (the clipped pixels of the
        frame a copy was made from) added; ``channels`` (H, W, 3) uint8 the same channel
        by channel (``was`` in every channel: which of its channels clipped is not known).
        (None, None) when there are none or lighting is off. ``shift``: the (dx, dy) the
        frame is moved back by, if any; ``brightest``: the frame's brightest level
        (:func:`_extremes`).
        """
        if self.lighting == "off":
            return None, None
        near = channels = None
        if brightest >= 250:  # any clipped pixel
            channels = cv2.dilate(_moved_back(cv2.compare(img, _UNCLIPPED, cv2.CMP_GT), shift),
                                  _NEAR)
            near = _any_channel(channels)
        if was is not None:
            near = was if near is None else cv2.max(near, was)
            every = cv2.merge([was] * 3)
            channels = every if channels is None else cv2.max(channels, every)
        return near, channels

    def _near_black(self, img: np.ndarray, shift: tuple[float, float] | None,
                    darkest: float) -> np.ndarray | None:
        """Channels of one frame (H, W, 3) uint8 clipped black, as aligned: (H, W, 3) uint8,
        255 where at least 5 of the 9 pixels around (itself included) are at most
        :data:`BLACK_LEVEL` in that channel; None when there are none or lighting is off.

        Such a channel shows at most its light: a darker exposure (or a lower black level)
        sets a shadow to 0 where the reference saw texture a few levels above it, and its
        noise, cut at 0, reads brighter on average than the light. Brought back by the gain
        it reads a flat level above the reference's shadow (the demo aisle 30 % darker with
        its black level 12 lower: 5 to 8 levels above the reference over its darkest shelf,
        4.5 times the threshold). Most of the neighbourhood, not any pixel: the pixels of a
        crushed shadow that its noise lifts above the level are no more to be trusted than
        the rest, and a lit pixel alone among black ones is kept as seen. Mirror of the
        white clip (:meth:`_near_clipped`). ``darkest``: the frame's darkest level
        (:func:`_extremes`).
        """
        if self.lighting == "off":
            return None
        if darkest > BLACK_LEVEL:  # no channel clipped black
            return None
        dark = _moved_back(cv2.compare(img, _UNBLACK, cv2.CMP_LT), shift)
        dark = cv2.compare(cv2.blur(dark, (3, 3)), 127, cv2.CMP_GT)
        return dark if cv2.countNonZero(dark.reshape(dark.shape[0], -1)) else None

    def _uncovered(self, dx: float, dy: float, shape: tuple[int, int]) -> np.ndarray:
        """Pixels of a frame moved back by (dx, dy) that its content no longer covers: the
        strip its edge leaves (pixel x takes the content at x + dx: uncovered unless both
        pixels it interpolates from lie inside), and where burned-in text (which stays
        put) would land."""
        h, w = shape
        x, y = np.arange(w) + dx, np.arange(h) + dy
        fill = ((y < 0) | (y > h - 1))[:, None] | ((x < 0) | (x > w - 1))[None, :]
        if self.ignore_ is not None:
            m = np.float32([[1, 0, -dx], [0, 1, -dy]])
            fill |= cv2.warpAffine(self.ignore_.astype(np.float32), m, (w, h),
                                   flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT,
                                   borderValue=0) > 0.001
        return fill

    def _fine_terms(self, ref_rgb: np.ndarray) -> tuple:
        """What :meth:`_lost` needs of the colour reference and :attr:`fine_`: it flattened
        and :attr:`fine_` as (levels, pixels), float32, the negated highest finer levels in falling
        order, that order, the reference's own clip loss, the darkest and the highest finer
        levels, the pixel of each (all but the order in that order)."""
        r = ref_rgb.astype(np.float32)
        spread = np.asarray(self.fine_, np.float32)
        # candidates by the highest level of their finer pixels, in falling order: a
        # frame's loss is computed on the few that can reach the clip, not on all
        high = (r + spread[..., -1]).ravel()
        order = np.argsort(-high, kind="stable")
        # kept in that order, so that a frame's candidates are a slice, not a gather, and
        # level by level (levels, pixels): each level of the candidates is contiguous
        # (:func:`clip_loss` goes a level at a time)
        spread = np.ascontiguousarray(spread.reshape(-1, spread.shape[-1])[order].T)
        own = clip_loss(r.reshape(-1)[order], spread.T)
        # the darkest and highest finer levels are its first and last rows; the pixel of each
        return (r.reshape(-1)[order], spread, -high[order], order, own, spread[0],
                spread[-1], order // 3)

    def _registration(self, ref: np.ndarray
                      ) -> tuple[np.ndarray, np.ndarray, tuple[np.ndarray, Any] | None, tuple]:
        """:func:`phase_spectrum` and :func:`shift_terms` of the reference, for frames
        registered from their 2 x 2 reductions (:data:`HALVE_FROM`) the spectrum of its
        reduction with the pixels to ignore there (None for smaller frames), and its
        :func:`correlation_terms` over the pixels not ignored (made once per reference:
        ``self._spectrum``)."""
        half = None
        if min(ref.shape) >= HALVE_FROM:
            ignore = None
            if self.ignore_ is not None:  # a reduced pixel with any ignored pixel
                ignore = halved(self.ignore_[None].astype(np.float32))[0] > 0
            half = (phase_spectrum(halved(ref[None])[0], ignore), ignore)
        return (phase_spectrum(ref, self.ignore_), shift_terms(ref, self.ignore_), half,
                correlation_terms(ref, None if self.ignore_ is None else ~self.ignore_))

    @staticmethod
    def _reference_glare(ref_rgb: np.ndarray
                         ) -> tuple[tuple[tuple[slice, slice], np.ndarray,
                                          tuple[np.ndarray, np.ndarray], np.ndarray] | None,
                                    float]:
        """Where the colour reference has glare, and its brightest level (for
        :meth:`_saturating`). The glare is None when it has no clipped whites, else
        ``(box, mask, below, colour)`` over the bounding box ``box`` (a pair of slices) of
        the dilated mask of its clipped whites: that mask (uint8), the bounds of
        ``cv2.inRange`` that are met where a frame's brightest channel is below what it
        must keep there to read as that glare (:data:`GLARE_TOLERANCE` below the
        reference's: every channel <= floor - 1, and never where the floor is 0, lower
        bound 1 > upper bound 0; each (h, w, 3) uint8), and the reference's colour there.
        Computed once per reference rather than once per frame (``self._ref_terms``)."""
        brightest = _channel_max(np.asarray(ref_rgb))
        clipped = (brightest >= 250).astype(np.uint8)
        glare = None
        if clipped.any():
            mask = cv2.dilate(clipped, _NEAR)
            x, y, w, h = cv2.boundingRect(mask)
            box = np.s_[y:y + h, x:x + w]
            floor = (brightest[box].astype(np.float32)
                     * (1.0 - GLARE_TOLERANCE)).astype(np.uint8)
            lower = (floor == 0).astype(np.uint8)
            upper = np.where(floor == 0, 0, floor.astype(np.int16) - 1).astype(np.uint8)
            glare = (box, np.ascontiguousarray(mask[box]),
                     (cv2.merge([lower] * 3), cv2.merge([upper] * 3)),
                     np.ascontiguousarray(ref_rgb[box]))
        return glare, float(brightest.max())

    def measures(self, prepared: Prepared, previous: np.ndarray | None = None
                 ) -> dict[str, np.ndarray]:
        """Health measures of each frame (see :meth:`fit` for their meaning), from what
        :meth:`prepare` measured.

        Parameters
        ----------
        prepared : Prepared
            The frames' preparation record.
        previous : ndarray, shape (H, W), float, optional
            Grey of the frame before the first one (for "frozen feed").

        Returns
        -------
        dict of str to ndarray, shape (n,)
            ``dark``, ``bright``, ``covered``, ``focus``, ``frozen``, ``shift``, and
            ``gain`` (of the brightness fit, :attr:`Prepared.gains`).
        """
        self.check_fitted()
        g = prepared.grey
        n = len(g)
        keep, quarter_at, count, textured = self._health_terms()
        flat = g.reshape(n, -1)
        count = count or max(flat.shape[1], 1)
        # a quarter of the pixels is plenty (np.take: faster than fancy indexing)
        quarter = flat[:, ::4] if quarter_at is None else np.take(flat, quarter_at, axis=1)
        # clipped pixels counted by OpenCV, a frame at a time (numpy's compare, mask and
        # count over the batch take twice as long)
        clipped = [cv2.compare(x, 250, cv2.CMP_GE) for x in g]
        out = {"dark": percentile_rows(quarter, 99),
               "bright": np.array([cv2.countNonZero(c if keep is None else
                                                    cv2.bitwise_and(c, keep))
                                   for c in clipped], np.float64) / count,
               "covered": np.zeros(n), "focus": np.ones(n),
               "frozen": np.full(n, np.inf),
               "shift": np.hypot(prepared.shifts[:, 0], prepared.shifts[:, 1]),
               "gain": prepared.gains[:, 0].astype(np.float64)}
        if textured is not None and textured.any() and n:
            if self.reference_ is not None:
                lost = cell_correlation(prepared.aligned, self.reference_,
                                        terms=self._cells.get(cell_terms, self.reference_)
                                        ) < COVER_CORRELATION
                out["covered"] = lost[:, textured].mean(axis=1)
            if self.ref_detail_ is not None:
                ratio = self._detail(prepared) / np.maximum(self.ref_detail_, 1e-6)
                out["focus"] = np.median(ratio[:, textured], axis=1)
        before = g[:-1] if previous is None else np.concatenate([previous[None], g[:-1]])
        if len(before):
            out["frozen"][n - len(before):] = self.frozen(g[n - len(before):], before)
        return out

    def noise_scale(self, prepared: Prepared) -> np.ndarray:
        """By how much each frame's noise variance exceeds what the model learnt.

        Normalisation multiplies a frame by its gain g (:attr:`Prepared.gains`), and with it
        the sensor and compression noise the frame was captured with: a frame exposed 40 %
        darker is brought back with about twice the gain of a normal one, and its noise
        variance with four times theirs. The model learnt frames as captured at gains up to
        ``gain_max_`` (the exposure copies add sensor noise but not the compression of a
        real exposure), so a frame at a larger gain has its noise variance scaled by
        ``(g / gain_max_)^2`` (white noise times g has variance g^2 sigma^2); frames at
        gains the model learnt, and frames not normalised (``lighting = "off"``), by 1.

        Parameters
        ----------
        prepared : Prepared

        Returns
        -------
        ndarray, shape (n,), float64, >= 1
        """
        self.check_fitted()
        scale = np.ones(len(prepared))
        if self.lighting == "off" or not self.gain_max_:
            return scale
        return np.maximum(scale, (prepared.gains[:, 0] / self.gain_max_) ** 2)

    def frozen(self, grey: np.ndarray, before: np.ndarray) -> np.ndarray:
        """The "frozen feed" measure: mean absolute difference of each frame's grey to the
        grey of the frame before it, over the pixels not ignored.

        Parameters
        ----------
        grey, before : ndarray, shape (n, H, W), float32

        Returns
        -------
        ndarray, shape (n,), float
        """
        keep, _, count, _ = self._health_terms()
        count = count or grey[0].size
        return np.array([cv2.norm(g, b, cv2.NORM_L1, keep) / count
                         for g, b in zip(grey, before)])

    def _health_terms(self) -> tuple[np.ndarray | None, np.ndarray | None, int | None,
                                     np.ndarray | None]:
        """:func:`_health_terms` of the ignore mask and the reference cells, made once per
        fit."""
        return self._health.get(_health_terms, self.ignore_, self.ref_cells_)

    @staticmethod
    def _detail(prepared: Prepared) -> np.ndarray:
        """Cell detail (:func:`cell_detail`) of each captured frame at the reference's gain
        (the Laplacian is linear: the detail of ``gain * g`` is ``gain**2`` times g's),
        shape (n, g, g)."""
        gain2 = (prepared.gains[:, 0] ** 2).astype(np.float32)
        return cell_detail(prepared.grey) * gain2[:, None, None]

    def conditions(self, m: dict[str, np.ndarray]) -> list[list[tuple[str, float, float]]]:
        """Health conditions of each frame from its measures.

        Parameters
        ----------
        m : dict of str to ndarray, shape (n,)
            The frames' :meth:`measures`.

        Returns
        -------
        list (one per frame) of lists of (condition, measure, limit)
        """
        self.check_fitted()
        lim = self.limits_
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
                found.append(("underexposed", m["dark"][i], lim.get("dark", 20.0)))
            if m["bright"][i] > lim.get("bright", 0.5):
                found.append(("overexposed", m["bright"][i], lim.get("bright", 0.5)))
            rows.append([(c, float(v), float(li)) for c, v, li in found])
        return rows

    # -- persistence ---------------------------------------------------------------------
    #: Learned arrays as saved (``conditions.npz`` keys; attribute = key + "_").
    _ARRAYS = ("reference", "reference_rgb", "ignore", "ref_cells", "ref_detail", "fine")

    def to_json(self) -> dict[str, Any]:
        """Settings and the health limits in force, JSON-ready (``limits`` are the learnt
        ones, ``limits_asked`` the constructor's; ``gain_max``: see :meth:`noise_scale`)."""
        self.check_fitted()
        return {"lighting": self.lighting, "register": self.register,
                "max_shift": self.max_shift, "health": self.health, "limits": self.limits_,
                "limits_asked": self.limits, "gain_max": self.gain_max_}

    def arrays(self) -> dict[str, np.ndarray]:
        """Learned arrays by their saved names (None ones left out)."""
        self.check_fitted()
        return {k: v for k in self._ARRAYS if (v := getattr(self, k + "_")) is not None}

    @classmethod
    def from_saved(cls, meta: dict[str, Any], arrays: dict[str, np.ndarray]) -> "Conditions":
        """Rebuild fitted conditions from :meth:`to_json` and :meth:`arrays`."""
        limits = {k: float(v) for k, v in meta["limits"].items()}
        asked = meta.get("limits_asked")
        c = cls(lighting=meta["lighting"], register=bool(meta["register"]),
                max_shift=float(meta["max_shift"]), health=bool(meta["health"]),
                limits=limits if asked is None else {k: float(v) for k, v in asked.items()})
        for k in cls._ARRAYS:
            setattr(c, k + "_", arrays.get(k))
        c.limits_ = limits
        gain_max = meta.get("gain_max")  # None in baselines learnt before it was kept
        c.gain_max_ = None if gain_max is None else float(gain_max)
        return c
