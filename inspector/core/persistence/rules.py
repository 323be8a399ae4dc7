"""The rules that judge one window of a stream (used by
:func:`~inspector.core.persistence.stream.persistence`): the step against the reference, what
the picture shows settled or changed, things seen through passers-by, the dark-stretch rules,
and the window since a run began.
"""

from __future__ import annotations

import cv2
import numpy as np

from inspector.core.persistence.constants import LARGE
from inspector.core.persistence.filters import (
    _lowest_and_second,
    _median_along,
    _second_smallest,
    change_spread,
    flat_filter,
    local_size,
    opened,
    past_level,
    robust_spread,
    steady_level,
)
from inspector.core.persistence.looks import (
    _agreement,
    _brightness_of,
    _departs,
    _departure,
    _look_noise_of,
    _median_or_held,
    _or_held,
)


def _limit(threshold: float, start_threshold: float | None, stepped: bool) -> float:
    """The threshold a frame's persistence map is held to: ``threshold`` when it is measured
    from a reference (``stepped``), else ``start_threshold`` when there is one."""
    return threshold if stepped or start_threshold is None else start_threshold


def seen_through(frames: list, looks: list, window: int, scale: float,
                 held: np.ndarray | None, held_look: np.ndarray | None, change: float,
                 around: int = 1, min_past: int = 1, bright: list | None = None,
                 ground: bool = False) -> np.ndarray | None:
    """Per cell, the steady level of the frames, among the last ``window`` + 1, that show
    the same thing as the frame judged, less the reference: what passers-by cross in front
    of.

    A thing left shows one look frame after frame, while passers-by in front of it each
    look different; the steady level of :func:`steady_level` sets one frame aside, so a
    thing crossed in two of its first frames stays below its threshold until two clear
    frames follow each other. Here the frames that agree are found by their looks rather
    than by their values: with the last ``window`` + 1 frames' looks at a cell, those
    within ``change`` of their median (one of the agreeing looks when most agree), the
    frame judged among them (a frame that does not show the thing is not flagged for it;
    see ``shown`` of :func:`persistence`). Where at least ``window`` - 1 frames agree
    (as many as :func:`steady_level` keeps of a window), the level is that of their
    values alone, x(1) - (x(k-1) - x(1)) of the k agreeing values sorted (their spread
    the largest over the ``around`` x ``around`` cells centred on the cell, a cell with
    too few agreeing frames giving an infinite spread: the thing is seen through around
    it too), less the reference of the frames before them (:func:`past_level`; a held
    cell's own). It counts only where the picture changed, by more than ``change`` in two
    ways, each the largest over the ``around`` cells (as :func:`_changed`): every
    agreeing frame's look departs from the median look of the frames before them, and
    the look they agree on (the median) departs from the looks of those frames, all of
    them but one (a look that two of them already had was there before: a region the
    model reads anew while its picture stays as it was, with a passer-by's frame moving
    the median); a held cell's look is ``held_look`` for both. Elsewhere at most 0, and
    where too few frames agree, -inf.

    ``change`` is how much looks change in normal frames (:func:`look_noise`), mostly by
    day. In a dark stretch the gain that brings a frame back amplifies its noise, and a
    thing's own looks scatter by more than that: where the frames' own look noise (the
    median change of a cell's look from one of these frames to the next, times
    :data:`LARGE`, as ``change`` is made from normal frames) is above ``change``, the
    frames agreeing within it are taken as well and the larger level is kept (the
    frames agreeing within ``change`` still count on their own: a looser tolerance can
    take in a frame that a passer-by half covers, whose value is lower). The picture
    must still have changed by more than ``change``.

    A look is the cell's brightness less its mean over a square a quarter of the view
    wide (:func:`cell_looks`), so a passer-by anywhere in that square moves the look of a
    thing it does not cover (by 0.05 for a person and a pallet load beside a parcel, twice
    ``change``), and a load of the thing's own shade covering it keeps its look while the
    model reads it at a tenth. With ``bright``, the cells' own brightness (each frame's
    less its median over the frame's cells), the frames that agree by it (within
    ``change``, and within its own noise in a dark stretch, as above) are taken as well
    and the larger level is kept: the frames a passer-by covers are set aside by what the
    cell itself shows. (By brightness alone, a frame whose thing reads lower because a
    large passer-by beside it moved the local median, :func:`local_maps`, would be kept
    where its look, moved by the same passer-by, sets it aside: hence both.)

    Parameters
    ----------
    frames : list of ndarray, shape (h, w), float32
        The stream's local maps, oldest first, the frame judged last.
    looks : list of ndarray, shape (h, w), float32
        Their :func:`cell_looks`.
    window : int
    scale : float
        What the maps are divided by (see :func:`_step`).
    held, held_look : ndarray, shape (h, w), float32, or None
        Held cells' reference and look (NaN where none is held).
    change : float > 0
    around : int >= 1, odd
    min_past : int >= 1
        Fewest frames before the last ``window`` + 1 for a reference.
    bright : list of ndarray, shape (h, w), float32, optional
        The frames' :func:`cell_brightness`, each less its median over the frame's cells
        (as ``looks``).
    ground : bool
        The reference of the frames before them taken from those that show the place as
        it was (``ground`` of :func:`persistence`, :func:`_reference`).

    Returns
    -------
    ndarray, shape (h, w), float32, or None (too few frames, or a look missing)
    """
    span = window + 1
    if len(frames) < span + min_past or any(v is None for v in looks):
        return None
    values = np.asarray(frames[-span:], np.float32) / np.float32(scale)
    lk = np.asarray(looks[-span:], np.float32)
    before = np.asarray(looks[:-span], np.float32)
    centre = _median_along(lk)
    reference = _reference(frames[:-span], scale, looks[:-span] if ground else None, change,
                           min_past)
    reference = _or_held(reference, held)
    if held is None:
        held_look = None  # (a held look goes with a held reference)
    usual = _median_or_held(before, held_look)  # the looks before, a held cell's own
    apart = np.abs(before - centre)  # how far the looks before are from the one agreed on
    kept = _second_smallest(apart) if len(apart) > 2 else apart.min(axis=0)
    if held_look is not None:
        kept = np.where(np.isnan(held_look), kept, np.abs(centre - held_look))
    # which frames show the same thing: by their looks, and by the cells' own brightness
    # when known (see above)
    alike = [(lk, centre)]
    if bright is not None:
        own = np.asarray(bright[-span:], np.float32)
        alike.append((own, _median_along(own)))
    tests = []
    for by, middle in alike:
        tests.append((by, middle, change))
        noisy = _look_noise_of(by, change)
        if noisy > change:  # a dark, noisy stretch (see above)
            tests.append((by, middle, noisy))
    out = None
    for by, middle, tol in tests:
        agree = np.abs(by - middle) <= tol
        agree &= agree[-1]  # the frame judged shows it
        enough = agree.sum(axis=0) >= max(window - 1, 1)
        low = np.where(agree, values, np.inf).min(axis=0)
        second = _lowest_and_second(np.where(agree, values, -np.inf))[1]
        spread = flat_filter(np.where(enough, second - low, np.inf).astype(np.float32),
                             around, np.maximum)
        each = np.where(agree, np.abs(lk - usual), np.inf).min(axis=0)
        moved = np.minimum(
            flat_filter(np.where(np.isfinite(each), each, 0.0).astype(np.float32), around,
                        np.maximum),
            flat_filter(np.where(enough, kept, 0.0).astype(np.float32), around, np.maximum))
        with np.errstate(invalid="ignore"):
            step = np.where(enough & np.isfinite(spread), low - spread - reference, -np.inf)
        found = np.where(moved > change, step, np.minimum(step, 0.0))
        out = found if out is None else np.maximum(out, found)
    return out.astype(np.float32)


def _since_start(frames: list, looks: list, window: int, opened_map: np.ndarray,
                 steady: np.ndarray, scale: float, threshold: float, around: int,
                 footprint: int, change: float) -> np.ndarray:
    """``opened_map``, the persistence map of a window with too few frames before it for a
    reference (as made so far from its steady level: gated, opened; held to the start
    threshold), kept only where the window also stepped up from those frames by more
    than ``threshold`` (the step of the window's ``steady`` level, as :func:`_step` found it
    with the frames divided by ``scale``, from those frames' :func:`past_level`, gated by
    the looks when ``change`` > 0, opened); elsewhere at most 0. What stays since the run
    began was judged by the run's first window; a later one flags only what appeared
    since."""
    step = (steady - _reference(frames[:-window], scale)).astype(np.float32)
    seen = _changed(looks, window, None, 1, around) if change > 0 else None
    if seen is not None:
        step = _gated(step, seen[0], change)
    return np.where(opened(step, footprint) > threshold, opened_map,
                    np.minimum(opened_map, 0.0)).astype(np.float32)


def _changed(looks: list, window: int, held_look: np.ndarray | None, min_past: int,
             around: int = 1) -> tuple[np.ndarray, np.ndarray] | None:
    """Per cell, how much the frames of the window changed from the frames before it: the
    absolute difference of a frame's look from the median look of the frames before (a held
    cell: from ``held_look``), the second smallest over the window (one frame set aside, as
    the steady level sets one aside: a passer-by in front of a thing left, as dull as the
    ground it covers, does not hide that the thing changed the picture), the largest over
    the ``around`` x ``around`` cells centred on the cell (a cell at the edge of a thing, or
    part of a thing that happens to be as bright as the ground, counts with the thing); and
    that reference, shapes (h, w) float32. None with fewer than ``min_past`` frames before
    or a look missing."""
    before = looks[:-window]
    if len(before) < min_past or any(v is None for v in looks):
        return None
    reference = _median_or_held(before, held_look)
    return _departure(looks[-window:], reference, around), reference


def _odd_one(looks: list, change: float) -> np.ndarray:
    """Per cell, whether the newest of a window's ``looks`` differs from the median of the
    others by more than ``change``, bool (h, w)."""
    return np.abs(looks[-1] - _median_along(looks[:-1])) > change


def _odd_both(looks: list, bright: dict, change: float) -> np.ndarray | None:
    """Per cell, whether the newest of a window's ``looks`` differs from the median of the
    others by more than ``change`` (:func:`_odd_one`) and so does its frame's own brightness
    (``bright``: by look, see :func:`_by_look`; frame-relative), bool (h, w); None when a
    look or a brightness is not known. Each by more than the window's own noise of that
    measure where it is larger (:func:`_look_noise_of`): in a dark stretch the gain
    amplifies every look's noise, and a thing's looks scatter by it as a floor's do (a
    night spill on an unseen bench scene, yard 206, read as unlike its window by
    ``change`` alone and was lost). Both are asked: a passer-by beside a thing moves
    its look (the mean around it) but not its brightness, and a load of the thing's own
    shade over it keeps its brightness but not its look (see ``shown`` "all" of
    :func:`persistence`)."""
    raw = _brightness_of(looks, bright)
    if raw is None or any(v is None for v in looks):
        return None
    return (_odd_one(looks, _look_noise_of(looks, change))
            & _odd_one(raw, _look_noise_of(raw, change)))


def _settled(looks: list, window: int, held_look: np.ndarray | None, change: float,
             around: int, bright: list | None, reference: np.ndarray | None = None,
             held_bright: np.ndarray | None = None, moved: tuple | None = None,
             noise: bool = False, unlike: np.ndarray | None = None
             ) -> tuple[np.ndarray, np.ndarray] | None:
    """Cells where a thing has settled in the window: the picture changed there from the
    frames before it, in the frame judged too, and stays the same from frame to frame
    (see ``brightness`` of :func:`persistence`), bool (h, w); None with no frame before the
    window, fewer than 3 frames in it, or a look or brightness missing.

    A cell is settled where (1) its own look differs from the median look of the frames
    before (a held cell: from ``held_look``; ``reference``: that reference when known, see
    :func:`_changed`) by more than ``change`` in all the window's frames but one and in the
    newest (the frame judged: the frame after a thing is taken away is not settled); (2) its
    own brightness (``bright``: one a look, each frame's :func:`cell_brightness` less its
    median over the frame's cells, so that a change of exposure, which moves every cell
    alike, does not count) differs from the median of the frames before (a held cell: from
    the brightness it kept, ``held_bright``) by more than ``change``, likewise; and (3) the
    looks of all the window's frames but one (the newest kept) agree within ``change`` (with
    ``noise``: or within the window's own look noise where that is larger,
    :func:`_look_noise_of`: in a dark stretch the gain amplifies every look's noise, and one
    thing's looks scatter by it as a floor's do; with ``unlike``, bool (h, w), only at its
    cells: see ``settle_noise`` of :func:`persistence`), at every one of the ``around``
    cells around it; and that brightness reference, (h, w) float32 (what a cell held from
    this frame keeps). (2) is there because a look is the cell's brightness less the mean
    around it: when a thing leaves (or comes into) that square, the looks of untouched cells
    move with the mean, while their brightness does not. ``moved``: (2) as
    :func:`_own_change` gives it, when already known."""
    if window < 3:
        return None
    found = moved if moved is not None else _own_change(looks, window, bright, change,
                                                         held_bright)
    if found is None:
        return None
    moved, before_raw = found
    if reference is None:
        reference = _median_or_held(looks[:-window], held_look)
    win = looks[-window:]
    own = _departs(win, reference, change)
    agree = _agreement(win)
    tolerance = _look_noise_of(win, change) if noise else change
    agree = flat_filter(agree, around, np.maximum)
    steady = agree <= tolerance
    if unlike is not None and tolerance > change:
        steady = (agree <= change) | (steady & unlike)
    return own & moved & steady, before_raw


def _own(looks: list, window: int, held_look: np.ndarray | None, bright: list | None,
         held_bright: np.ndarray | None, around: int = 1,
         reference: np.ndarray | None = None, bright_reference: np.ndarray | None = None
         ) -> np.ndarray | None:
    """Per cell, by how much the change of the window's frames from the frames before it is
    the cell's own rather than its surroundings': the change of its look less the change of
    the mean around it, shape (h, w) float32 (> 0: its own), or None with no frame before
    the window or a look or brightness missing.

    A look is the cell's brightness (less the frame's median, see :func:`_by_look`) less
    its mean over the square of :func:`local_size` cells around it (:func:`looks_of`), so
    a frame's change of brightness at a cell is the change of its look plus the change of
    that mean. A thing set down covers a small part of the square (about a tenth of it,
    see :data:`LOCAL_SHARE`): its look changes by nearly all of its brightness's change and
    the mean around it by the rest. A change of light over a region wider than half the
    square (a lamp switching on lights the floor and leaves the wall above it darker once
    the exposure follows) moves the mean around a cell more than the cell's look, which
    changes only by how unevenly the light falls. Per frame of the window, the absolute
    change of the look from the frames before (their median, a held cell's
    ``held_look``) less the absolute change of the mean around (from the brightness's
    median, a held cell's ``held_bright``); the second smallest over the window (one
    frame set aside, as :func:`_changed`), the largest over the ``around`` x ``around``
    cells centred on the cell (an edge cell counts with the thing). An untouched cell
    beside a change has its look moved by exactly what its mean moved (0 here, not its
    own); the map's anomaly is already taken less its median over the same square
    (:func:`local_maps`), so a region wider than half of it was never one this method
    calls a thing left. ``reference``, ``bright_reference``: the looks' and brightness's
    references when known (as :func:`_changed` and :func:`_settled` return them)."""
    before = looks[:-window]
    if not before or any(v is None for v in looks):
        return None
    raw = bright  # (each look's frame brightness, None when one is not known)
    if raw is None:
        return None
    ref_look = _median_or_held(before, held_look) if reference is None else reference
    ref_raw = (_median_or_held(raw[:-window], held_bright) if bright_reference is None
               else bright_reference)
    return _own_from(looks[-window:], raw[-window:], ref_look, ref_raw, around)


def _own_from(looks: list, bright: list, ref_look: np.ndarray, ref_bright: np.ndarray,
              around: int = 1) -> np.ndarray:
    """:func:`_own` of a window's ``looks`` and their frames' ``bright`` (each less its
    frame's median) from the references ``ref_look`` and ``ref_bright``, all (h, w): per
    frame the absolute change of the look less the mean over the :func:`local_size` square
    of the absolute change of brightness, the second smallest over the frames, the largest
    over the ``around`` x ``around`` cells, shape (h, w) float32."""
    look = np.abs(np.asarray(looks, np.float32) - ref_look)
    moved = np.abs(np.asarray(bright, np.float32) - ref_bright)
    if len(look) > 2:
        look, moved = _second_smallest(look), _second_smallest(moved)
    else:
        look, moved = look.min(axis=0), moved.min(axis=0)
    k = local_size(look.shape)
    around_moved = cv2.blur(np.ascontiguousarray(moved, np.float32), (k, k),
                            borderType=cv2.BORDER_REPLICATE)
    return flat_filter(np.ascontiguousarray(look - around_moved, np.float32), around,
                       np.maximum)


def _own_change(looks: list, window: int, bright: list | None, change: float,
                held_bright: np.ndarray | None = None
                ) -> tuple[np.ndarray, np.ndarray] | None:
    """Per cell, whether its own brightness changed in the window: its frame-relative
    brightness (``bright``, one a look) differs from the median of the
    frames before the window (a held cell: from ``held_bright``) by more than ``change`` in
    all the window's frames but one and in the newest (:func:`_departs`), bool (h, w); and
    that reference, (h, w) float32. None with no frame before the window or a look or
    brightness missing."""
    if len(looks) <= window or any(v is None for v in looks):
        return None
    raw = bright  # (each look's frame brightness, None when one is not known)
    if raw is None:
        return None
    before = _median_or_held(raw[:-window], held_bright)
    return _departs(raw[-window:], before, change), before


def _lift(frames: list, window: int, scale: float, min_past: int,
          moved: np.ndarray | None) -> np.ndarray | None:
    """Per cell, what a step (measured with the maps divided by ``scale``, see :func:`_step`)
    is multiplied by so that it counts against the view's changes: ``scale`` over
    :func:`change_spread` of the window from the frames before it (floored at 1, at least
    1) where the cell's own brightness changed in the window (``moved``, as
    :func:`_own_change` gives it), 1 elsewhere, shape (h, w) float32; None where that is 1
    everywhere (or too few frames before, or ``moved`` None).

    A dark, noisy stretch scatters the cells' readings widely but steadily: the scale
    (their spread) then counts noise that the step has already taken off, and a spill
    that steps up by twice what the rest of the view changes reads a fifth of a spread.
    Counted against the changes, it stands out. The cell's own brightness must have
    changed because the local maps themselves can change where the picture did not: a
    thing taken away beside a cell moves the median around it (and the look's surround);
    the changes' spread would count that as sharply."""
    before = frames[:-window]
    if scale <= 1.0 or moved is None or len(before) < max(min_past, 1) or not moved.any():
        return None
    changes = max(change_spread(np.asarray(frames[-window:], np.float32),
                                np.asarray(before, np.float32)), 1.0)
    if changes >= scale:
        return None
    return np.where(moved, np.float32(scale / changes), np.float32(1.0))


def _look_reading(looks: list, window: int, reference: np.ndarray, settled: np.ndarray,
                  change: float, own: np.ndarray | None, footprint: int
                  ) -> np.ndarray | None:
    """What the picture itself reads of a thing settled in a dark stretch, in units of the
    window's own look noise, opened by ``footprint``, shape (h, w) float32 (-inf where it
    reads nothing); None where the window's look noise (:func:`_look_noise_of`) is not
    above ``change``, no cell is in ``settled``, or the window has fewer than 3 frames.

    Per cell in ``settled`` (where :func:`_settled` found a thing settled and the model
    reads the window above its reference, and the window looks unlike normal, see
    ``settle_look`` of :func:`persistence`) whose
    change is its own (``own`` > ``change``, :func:`_own`): the second smallest over the
    window's frames of the absolute difference of its look from ``reference`` (one frame
    set aside, as :func:`_changed`), less its looks' range over the window without one of
    its older frames (as :func:`_settled`'s agreement), divided by the median absolute
    frame-to-frame change of the window's looks (:func:`_look_noise_of` / :data:`LARGE`):
    how far the look departed beyond its own scatter, counted against how much every look
    of the window moves from frame to frame."""
    win = looks[-window:]
    noise = _look_noise_of(win, change)
    if window < 3 or noise <= change or not settled.any():
        return None
    departure = _second_smallest(np.abs(np.asarray(win, np.float32) - reference))
    reading = (departure - _agreement(win)) / np.float32(noise / LARGE)
    keep = settled if own is None else settled & (own > change)
    return opened(np.where(keep, reading, -np.inf).astype(np.float32), footprint)


def _with_look(step: np.ndarray, look: np.ndarray | None) -> np.ndarray:
    """``step`` or, where larger, the picture's own reading of a settled thing (``look``,
    :func:`_look_reading`)."""
    return step if look is None else np.maximum(step, look)


def _lifted(step: np.ndarray, lift: np.ndarray | None) -> np.ndarray:
    """``step`` (h, w) multiplied by ``lift`` (h, w) where above 0 (see :func:`_lift`; taken
    of the map once opened, so that the cells at a thing's edge, which its brightness moves
    less, do not keep the lift from its middle)."""
    if lift is None:
        return step
    return np.where(step > 0, step * lift, step).astype(np.float32)


def _usual(level: np.ndarray, looks: list, normal: np.ndarray | None, change: float,
           around: int, bright: dict | None = None) -> np.ndarray:
    """``level`` of a window without a reference where the window's looks depart from the
    camera's normal look by more than ``normal[1]`` + ``change``, and, with the normal
    brightness ``normal[2]`` and the frames' brightness (``bright``, by look: see
    :func:`_by_look`), where that departure is the cells' own by more than ``change``
    (:func:`_own_from` the normal look and brightness), else at most 0 (see
    ``normal`` of :func:`persistence`; :func:`_unusual`); ``level`` itself without a normal
    look or a look."""
    found = _unusual(looks, normal, around, bright)
    return level if found is None or found.shape != level.shape else _gated(level, found, change)


def _unusual(looks: list, normal: np.ndarray | None, around: int, bright: dict | None = None
             ) -> np.ndarray | None:
    """Per cell, how far a window's ``looks`` (oldest first, each (h, w)) are unlike the
    camera's normal frames: their :func:`_departure` from the normal look ``normal[0]`` less
    the farthest any held-out normal window went there (``normal[1]``), and, with the normal
    brightness ``normal[2]`` and the frames' brightness (``bright``, by look: see
    :func:`_by_look`), at most by how much that departure is the cells' own
    (:func:`_own_from`), shape (h, w) float32 (above ``change``: unlike normal); None
    without a normal look of that shape or with a look missing."""
    if normal is None or any(v is None for v in looks) or normal.shape[1:] != looks[-1].shape:
        return None
    found = _departure(looks, normal[0], around) - normal[1]
    raw = _brightness_of(looks, bright) if bright and len(normal) > 2 else None
    if raw:
        found = np.minimum(found, _own_from(looks, raw, normal[0], normal[2], around))
    return found


def _gated(step: np.ndarray, changed: np.ndarray, change: float) -> np.ndarray:
    """``step`` where the picture changed (``changed``, the same shape) by more than
    ``change``, else at most 0, as float32."""
    return np.where(changed > change, step, np.minimum(step, 0.0)).astype(np.float32)


def _step(frames: list[np.ndarray], window: int, held: np.ndarray | None = None,
          around: int = 1, scaled: bool = False, spreads: dict | None = None,
          min_past: int = 1, settled: np.ndarray | None = None,
          looks: list | None = None, change: float = 0.0
          ) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
    """Steady level of the last ``window`` of ``frames`` and that level less the reference
    from the frames before them (:func:`past_level`; none: 0), a held cell keeping its
    reference from ``held`` (NaN where not held), shapes (h, w), float32; the scale the
    frames were divided by: with ``scaled``, the median of the window frames' robust spreads
    floored at 1 (:func:`robust_spread`), else 1; and the window's frames divided by it
    (what the steady level is taken of), shape (m, h, w), float32, m = min(window,
    len(frames)). ``spreads``: the
    robust spreads of frames met before, by frame (see :func:`_spreads`); fewer than
    ``min_past`` frames before the window: no reference. ``settled``: cells whose steady
    level takes no spread off (see :func:`steady_level`)."""
    win = np.asarray(frames[-window:], np.float32)
    scale = (max(float(np.median(_spreads(frames[-window:], win, spreads))), 1.0) if scaled
             else 1.0)
    win_scaled = win / np.float32(scale)
    level = steady_level(win_scaled, around, settled=settled)
    before = frames[:-window]
    reference = (_reference(before, scale, None if looks is None else looks[:-window],
                            change, min_past) if before and len(before) >= min_past
                 else np.zeros_like(level))
    reference = _or_held(reference, held)
    return level, (level - reference).astype(np.float32), scale, win_scaled


def _reference(before: list[np.ndarray], scale: float, looks: list | None = None,
               change: float = 0.0, min_past: int = 1) -> np.ndarray:
    """:func:`past_level` of the frames ``before`` a window (at least one) divided by
    ``scale`` (see :func:`_step`), shape (h, w), float32.

    With their ``looks`` (one a frame; ``change`` > 0): where at least ``min_past`` (and 2)
    of the frames have a look within ``change`` of the median of their looks, the
    :func:`past_level` of those frames alone where that is lower (``ground`` of
    :func:`persistence`): the frames that show the place as most of them do, passers-by
    set aside by what they look like rather than only by being the largest. A level of
    fewer frames is never above the level of all of them (the second largest of a subset
    is at most that of the whole), so the reference only goes down."""
    q = np.asarray(before, np.float32) / np.float32(scale)
    level = past_level(q)
    if (looks is None or change <= 0 or len(looks) != len(before) or len(before) < 2
            or any(v is None for v in looks)):
        return level
    lk = np.asarray(looks, np.float32)
    agree = np.abs(lk - _median_along(lk)) <= change
    enough = agree.sum(axis=0) >= max(min_past, 2)
    if not enough.any():
        return level
    ground = np.maximum(_lowest_and_second(np.where(agree, q, -np.inf))[1], 0.0)
    return np.where(enough, np.minimum(level, ground), level).astype(np.float32)


def _spreads(frames: list[np.ndarray], win: np.ndarray, cache: dict | None) -> np.ndarray:
    """:func:`robust_spread` of each of ``frames`` (``win``: them as one float32 array), each
    frame's computed once in ``cache`` (``id`` of the frame -> (frame, spread), the frame
    held there so that its ``id`` stays its own): a frame is in ``window`` steps in turn."""
    if cache is None:
        return robust_spread(win)
    out = np.empty(len(frames))
    for j, f in enumerate(frames):
        hit = cache.get(id(f))
        if hit is None or hit[0] is not f:
            hit = cache[id(f)] = (f, float(robust_spread(win[j:j + 1])[0]))
        out[j] = hit[1]
    return out
