"""The fixed numbers of the persistence rules, with why each is what it is."""

from __future__ import annotations


#: Frames a region must stay unusual in before it is flagged (the flag comes on the
#: ``WINDOW``-th frame it is seen in). A slow vehicle with a load can cover its own length
#: only after two or three frames; four frames let it move on.
WINDOW = 4
#: Fewest frames before a window that its reference is taken from (see :func:`past_level`):
#: the second largest of three or more values is neither the largest nor the smallest, so
#: one passer-by in those frames moves the reference neither up (hiding what appears) nor
#: down (a passer-by who happens to score lower than the ground it covers, where that ground
#: reads unusual all along, would make the whole window a step). A window with fewer frames
#: before it is judged as the first window of a run is (``start_threshold``).
MIN_PAST = 3
#: Cells on a side of the neighbourhood over which a steady level takes its spread (see
#: :func:`steady_level`): the cell and the ones touching it.
AROUND = 3
#: Local maps are taken less their median over a square of cells this fraction of the map's
#: long side (see :func:`local_maps`): a quarter of the view, far larger than a thing left
#: (about 1 % of the view) and about the reach of the brightness field of preparation (a
#: Gaussian of an eighth of the long side, :mod:`inspector.core.conditions`).
LOCAL_SHARE = 0.25
#: A gap between frames longer than this many typical frame intervals starts a new window.
GAP_FACTOR = 10.0
#: An order of magnitude: what "clearly more" means in three rules. A normal frame holds a
#: large short-lived anomaly when its single-frame score is more than ``LARGE`` times that of
#: the quietest quarter of the normal frames and its persistence score keeps less than
#: 1 / ``LARGE`` of it (gone within the window); a step counts where a cell's look changed
#: by more than ``LARGE`` times a normal frame-to-frame change (``change``); a threshold rests
#: on one held-out window when its score is more than ``LARGE`` times the next
#: (:meth:`Persistence.lone`).
LARGE = 10.0
#: Whether new baselines take the two dark-stretch rules (``settle_noise``, ``settle_look`` of
#: :func:`persistence`). Built in 0.13, they were off there: on unseen bench scenes they
#: flagged what the picture going back to normal shows in the dark (yard 227: 0 -> 9 of 120
#: traffic-only frames, the floor after a spill was taken away; gate 203: 0 -> 3, the view
#: turning dark within a burst). They now count only cells that look unlike the camera's
#: normal frames (:func:`_unusual`), and are on again.
NIGHT_RULES = True
#: A camera whose normal frames clearly hold large short-lived anomalies more often than this
#: is busy: its single-frame threshold is then set by what passes (see
#: :func:`calibrate_persistence`).
BUSY_SHARE = 0.05
#: Longest time, in seconds, a window of consecutive normal frames may span for ``learn`` to
#: call a camera busy by itself. Passers-by cross a view in seconds to a minute; over tens of
#: minutes daylight and weather change the scene from one frame to the next as well, so with
#: frames that far apart a short-lived anomaly no longer tells traffic from a change of light
#: (mode "on" still applies persistence to such a camera).
MAX_SPAN = 600.0
