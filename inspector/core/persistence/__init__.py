"""Persistence: telling what stays from what passes, in a camera's stream of anomaly maps.

In a busy scene (a loading dock, an aisle, a gate) people and vehicles crossing the view are
normal, and what matters is what is left behind: a parcel, a spill, a fallen pallet. A
passer-by is unusual at one place in one frame and somewhere else in the next; a left
object is unusual at the same place frame after frame.

The persistence map of frame t is, per cell, a steady level of the local anomaly maps of
the last ``window`` frames of the camera's stream, frame t included (:func:`steady_level`):
with the cell's values over the window sorted, x(1) <= ... <= x(w), it is
x(1) - (x(w-1) - x(1)), the lowest value less the spread of the window once its largest value
is set aside. It is high only where every one of those frames was unusual at that cell
(the lowest value: a grey-scale erosion along time by a flat element of ``window`` frames;
Serra 1982, *Image Analysis and Mathematical Morphology*, from memory) *and* unusual in
the same way: a thing that stays shows the same content at the cell frame after frame, so
its anomaly hardly changes, while passers-by who happen to cover a cell in every frame of a
window are different people, bodies and loads, and their anomaly jumps from frame to frame.
This is the long-term / short-term split of abandoned-object detection (unusual against the
normal appearance, unchanged against the last frames; Porikli, Ivanov & Haga 2008, "Robust
abandoned object detection using dual foregrounds", from memory) taken on the anomaly maps
themselves. Setting the largest value aside lets one passer-by walk in front of a left
object within the window without hiding it. The spread is taken as the largest among the
cell and the cells touching it (``around``): a thing left is steady at its edges too, while a
passer-by long enough to cover one cell in every frame (a pallet truck and its load) moves
its edges across the cells beside it. A local map is the anomaly map (standardised,
see :mod:`inspector.core.scoring`) less its median over the cells around each cell, a square
a quarter of the view's long side (``local``; baselines learnt before it: over the whole
frame), so a change of light that the normal frames did not show, over the whole view
(evening light) or over part of it (a lamp's pool switching on, a passer-by's shadow on the
brightness field of preparation), does not read as something left in one place; what is
left covers far less than that square.

A steady level alone cannot tell a parcel from light that stays unusual at one place for a
whole stretch of frames (morning sun through a window, a corner after the lamps go off):
both stay. What tells them apart is when they came. So the persistence map is the steady
level less a reference, the level of the same cell in the ``past`` frames just before the
window (:func:`past_level`; twice the window since the local median, the window before
that): a thing left shows as a step, unusual now and not just before;
light that was already there before the window, or grows over minutes, does not (where
passers-by crossed the place in several of those frames, the reference is taken from the
frames whose looks agree with most of them: ``ground``). A cell
above its threshold keeps its reference while it stays above (held), so a thing left stays
flagged as long as it stays and is not taken into its own reference; a held cell is flagged
only in frames that show what it holds (``shown``), so the flag ends with the frame in which
the thing is taken away, even when the one who takes it still stands there. The local maps of a
window and of the frames before it are also divided by one robust spread, the median of
the window frames' spreads over their cells (``robust``), so that a stretch whose whole
view is disturbed (dark and noisy after the lamps go off) counts a cell by how far it
stands out from the rest of the view, while one frame of the window that a large
passer-by disturbs all over does not shrink a thing left in that frame alone (which would
read as unsteady; baselines learnt before divided each frame by its own spread). A
reference needs :data:`MIN_PAST` frames before the window, so that one passer-by among them
moves it neither up nor down. The first full window of a stretch has no reference: it is
held to the steady level's threshold instead (``start_threshold``); the next ones, with too
few frames before them, are held to it too, but only where they also stepped up from the
frames they have (what stays since the stretch began was judged by its first window). A step
also counts only where the picture itself changed (``looks``, :func:`cell_looks`): the model
can read a region anew while its pixels stay as they were (the gain that preparation fits
over the whole view moves with passers-by elsewhere), and that is not something left there,
while a lamp's smooth pool hardly changes a look at all. A thing that passers-by cross in
two of its first frames has no window of clear frames before its own frames become the
reference; the frames that share its look, or its cells' own brightness, are also taken on
their own (``crossed``, :func:`seen_through`), and the thresholds are calibrated with them.
Where the picture shows a thing settled (its look and its own brightness changed from
before, and its looks the same from frame to frame, within the frames' own look noise in a
dark stretch), the steady level takes no spread off (``brightness``): the model
can read one unchanged thing unevenly, and the spread would take that for passers-by; and
a step counts only where the cell's look changed by more than the mean change of brightness
around it (:func:`_own`): a change of light over a region wider than half the square of a
look (a lamp switching on, the exposure following it) moves the cells around as much as the
cell, a thing set down moves the cell alone. In a
dark, noisy stretch the cells' readings scatter widely but steadily from frame to frame, so a
step at a cell whose own brightness changed is counted against how much the rest of the view
changed rather than against that scatter (``robust`` "change", :func:`_lift`). Last,
the map is opened by the footprint of a model patch (``footprint``, :func:`opened`): anything seen
changes every cell of a patch, so a region narrower than a patch (the edge of a passer-by,
the rim of a masked area) is not something left, and one such region in the few held-out
windows would otherwise set the threshold.

The frame score is the maximum, as for single frames
(:func:`inspector.core.scoring.frame_scores`), and each threshold is the conformal threshold
(:func:`inspector.core.calibration.conformal_threshold`) of the persistence scores of
held-out normal frames (the same held-out, cross-fitted maps as the single-frame threshold,
:func:`inspector.core.calibration.cross_fit_maps`), taken in capture-time order within each
time block: the step's of windows with frames before them, the steady level's of every
window. The calibration holds no cell (no threshold is known yet); holding only keeps a
region flagged after a flag, so a false alarm lasts as long as what raised it stays.

A window only spans frames of one stretch of the stream: a gap longer than ``max_gap``
seconds (or, at learn time, a new time block) starts a new window, and frames scored before
a window is full are not flagged (they are counted, see :class:`PersistenceResult`). Each
cell also keeps the capture time since which it has been above the persistence threshold,
so a flagged region says how long it has stayed (the median of its cells' times).

Consecutive persistence scores are dependent; the conformal rate holds for the share of
flagged normal frames over a long stationary stream, not frame by frame independently.

The package's modules, each importing only those before it: :mod:`.constants`, the
fixed numbers; :mod:`.filters`, map filters; :mod:`.looks`, cell looks and brightness;
:mod:`.rules`, the rules that judge a window; :mod:`.stream`, a stream's state and its
per-frame judging (:func:`persistence`, :class:`Persistence`); :mod:`.calibrate`, learn-time
calibration and the busy-camera decision.
"""

from inspector.core.persistence.constants import (
    AROUND,
    BUSY_SHARE,
    GAP_FACTOR,
    LARGE,
    LOCAL_SHARE,
    MAX_SPAN,
    MIN_PAST,
    NIGHT_RULES,
    WINDOW,
)
from inspector.core.persistence.filters import (
    change_spread,
    flat_filter,
    local_maps,
    local_median,
    local_size,
    median_filtered,
    opened,
    past_level,
    robust_spread,
    steady_level,
)
from inspector.core.persistence.looks import (
    cell_brightness,
    cell_looks,
    look_noise,
    looks_of,
    normal_look,
)
from inspector.core.persistence.rules import (
    seen_through,
)
from inspector.core.persistence.stream import (
    STEP_CONDITIONS,
    Persistence,
    PersistenceResult,
    StreamState,
    held_back,
    persistence,
)
from inspector.core.persistence.calibrate import (
    calibrate_persistence,
    clearly_busy,
    frame_interval,
    persistence_on,
)

__all__ = [
    "AROUND",
    "BUSY_SHARE",
    "GAP_FACTOR",
    "LARGE",
    "LOCAL_SHARE",
    "MAX_SPAN",
    "MIN_PAST",
    "NIGHT_RULES",
    "STEP_CONDITIONS",
    "WINDOW",
    "Persistence",
    "PersistenceResult",
    "StreamState",
    "calibrate_persistence",
    "cell_brightness",
    "cell_looks",
    "change_spread",
    "clearly_busy",
    "flat_filter",
    "frame_interval",
    "held_back",
    "local_maps",
    "local_median",
    "local_size",
    "look_noise",
    "looks_of",
    "median_filtered",
    "normal_look",
    "opened",
    "past_level",
    "persistence",
    "persistence_on",
    "robust_spread",
    "seen_through",
    "steady_level",
]
