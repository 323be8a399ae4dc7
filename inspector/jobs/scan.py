"""Scoring frames against their camera's active baseline: the batch scan, and the pieces the
watcher reuses (one loaded baseline per camera, batch scoring into results)."""

from __future__ import annotations

import functools
import threading
import time
from collections import Counter
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np

from inspector.config import Config
from inspector.core.baseline import Baseline, Evaluation
from inspector.core.persistence import StreamState, held_back, persistence_on
from inspector.errors import FrameError
from inspector.jobs.progress import progress_bar
from inspector.storage.frames import (
    Frame,
    FrameFile,
    Skip,
    capture_time,
    discover,
    iter_batches,
    read_frame,
    read_settings,
)
from inspector.storage.results import (
    STRONGLY_AMPLIFIED,
    Amplified,
    FrameResult,
    ResultWriter,
)
from inspector.storage.store import DamagedBaseline, Store

#: Frames scored together: amortises per-call overhead while a batch's patches still fit in
#: cache (8 measured fastest of 4, 8, 16 and 32 at the default working resolution). Not 16:
#: the PPCA's maps make one small matrix product per location and block whatever the
#: number of frames, so at 16 they cost less a frame (0.54 -> 0.46 ms of CPU, 6 alternated
#: scans of bench/throughput.py), but OpenBLAS's products of 16 rows differ in their last
#: bits from those of 8 for some latent sizes, and scores move with them (the demo's
#: walkway, latent 15: 4 of 330 scores in their 4th decimal).
BATCH = 8


class BaselineCache:
    """Loaded baselines, each loaded once and reused (scan, watch and the review page).

    ``get`` raises LookupError ("no baseline for camera X") for a camera without one, and
    :class:`inspector.storage.store.DamagedBaseline` (a LookupError) for a damaged
    version; the answer is kept until ``forget``. Safe to use from several threads: a
    baseline being loaded holds up only the callers that want that same baseline, never
    the scoring of cameras already loaded.
    """

    def __init__(self, store: Store):
        self.store = store
        self._loaded: dict[tuple[str, str | None], Baseline | LookupError] = {}
        self._lock = threading.Lock()  # guards the two dicts and the generation
        self._loading: dict[tuple[str, str | None], threading.Lock] = {}
        self._generation = 0  # moves on at every forget: a load begun before is not kept

    def get(self, camera: str, version: str | None = None) -> Baseline:
        """The camera's active baseline, or the given version of it."""
        key = (camera, version)
        with self._lock:
            found = self._loaded.get(key)
            gate = self._loading.setdefault(key, threading.Lock()) if found is None else None
        if gate is not None:
            with gate:  # one load of a baseline at a time; others wait for it, not for all
                with self._lock:
                    found, generation = self._loaded.get(key), self._generation
                if found is None:
                    try:
                        found = self.store.load(camera, version)
                    except LookupError as exc:
                        found = exc
                    with self._lock:
                        if generation == self._generation:
                            self._loaded[key] = found
        if isinstance(found, LookupError):
            raise found
        return found

    def forget(self, camera: str | None = None) -> None:
        """Load again on next use (after ``learn`` or an activation); all cameras when
        none is named."""
        with self._lock:
            self._generation += 1
            for key in [k for k in self._loaded if camera is None or k[0] == camera]:
                del self._loaded[key]


def read_args(baseline: Baseline, config: Config) -> dict:
    """Arguments of :func:`inspector.storage.frames.read_frame` for frames scored by ``baseline``."""
    return dict(read_settings(config.camera(baseline.camera).frames), size=baseline.size,
                source_size=baseline.source_size)


def score_frames(baseline: Baseline, frames: Sequence[Frame],
                 evaluation: Evaluation | None = None,
                 streams: "Streams | None" = None,
                 notes: Counter | None = None) -> list[FrameResult]:
    """Score decoded frames of one camera, consecutive in its stream; results in the same
    order, each with its health conditions, whether its noise was taken as amplified, and
    its clipped pixels. ``evaluation`` is the frames'
    :meth:`~inspector.core.baseline.Baseline.evaluate` when already done (in the decoding
    threads). With ``streams``, a camera that runs with persistence is flagged by what
    stays (see :class:`Streams`). ``notes`` (a run's summary notes, counted per camera)
    gets the frames' reading notes; the frames judged with amplified noise are counted by
    the writer (:func:`note_amplified`)."""
    if not frames:
        return []
    if evaluation is None:
        evaluation = baseline.evaluate(np.stack([f.image for f in frames]),
                                       cells=streams is not None and streams.on(baseline))
    s = baseline.judge(evaluation, sequence=True)
    amplified = _amplified(baseline, evaluation, len(frames))
    clipped = evaluation.clipped
    results = [FrameResult(frame=f.file.rel, camera=baseline.camera, time=f.time,
                        score=float(s.scores[i]),
                        threshold=float(s.thresholds[i]),
                        p_value=float(s.p_values[i]), version=baseline.version,
                        flagged=bool(s.flagged[i]), image=f.image, amap=s.maps[i],
                        health=s.health[i] if s.health else [], mask=baseline.mask,
                        amplified=amplified[i],
                        clipped=None if clipped is None else clipped[i],
                        cells=None if s.cells is None else s.cells[i])
               for i, f in enumerate(frames)]
    if streams is not None:
        streams.apply(baseline, s.maps, results, s.cells)
    if notes is not None:
        for f in frames:
            notes.update(f"{baseline.camera}: {n}" for n in f.notes)
    return results


def _amplified(baseline: Baseline, evaluation: Evaluation, n: int
               ) -> list[tuple[float, float] | None]:
    """Per frame, (gain, largest gain of the normal frames) when its noise was taken as
    amplified (:meth:`~inspector.core.conditions.Conditions.noise_scale` above 1), else
    None."""
    if evaluation.noise is None or evaluation.gains is None:
        return [None] * n
    top = baseline.conditions.gain_max_
    return [(float(g), top) if v > 1.0 else None
            for g, v in zip(evaluation.gains, evaluation.noise)]


def noise_note(camera: str, amplified: Amplified) -> str:
    """The summary note of a camera's frames judged with amplified noise (after "N frames
    of"): by how much at most, and how many by :data:`STRONGLY_AMPLIFIED` or more; the same
    words as learn's note on them."""
    strongly = (f", {amplified.strongly} of them at {STRONGLY_AMPLIFIED:g}x or more"
                if amplified.strongly else "")
    return (f"{camera}: darker than every normal frame (brought back with a gain above "
            f"{amplified.learnt:.2f}, at most {amplified.largest:.3f}x that{strongly}), judged "
            f"with their noise amplified by that gain: less sharply, and outside the "
            f"guaranteed false-alarm rate (column noise_amplified)")


def note_amplified(writer, notes: Counter) -> None:
    """Add to a run's summary ``notes`` the frames ``writer`` wrote judged with amplified
    noise, per camera (:attr:`ResultWriter.amplified`; a cluster worker's recorder has
    none: the driver's writer counts them as it replays)."""
    for camera, amplified in writer.amplified.items():
        notes[noise_note(camera, amplified)] += amplified.frames


class Streams:
    """Each camera's rolling persistence state, for cameras that run with persistence.

    The persistence mode comes from the camera's config (``[persistence] mode``; "auto"
    follows what ``learn`` measured). A frame of such a camera gets the persistence score,
    threshold, p-value and map instead of its single-frame ones, and ``since``; frames
    before the window is full are not flagged and counted in ``filling``, nor are frames
    with a camera condition other than an underexposed one
    (:func:`inspector.core.persistence.held_back`). A frame older
    than one the stream already took (it arrived late, under ``watch``) takes its place
    among the kept frames (see :func:`inspector.core.persistence.persistence`); one too
    late for a full window is counted in ``late``. With a ledger, the state survives a
    restart (watch).
    """

    def __init__(self, config: Config, ledger=None):
        self.config = config
        self.ledger = ledger
        self._states: dict[str, tuple[str, StreamState]] = {}
        self._lock = threading.Lock()
        self.filling: Counter[str] = Counter()
        self.late: Counter[str] = Counter()

    def on(self, baseline: Baseline) -> bool:
        """Whether ``baseline``'s camera is flagged by persistence."""
        p = baseline.persistence
        return persistence_on(p.busy if p is not None else None,
                              self.config.camera(baseline.camera).persistence.mode)

    def apply(self, baseline: Baseline, maps: np.ndarray, results: list[FrameResult],
              cells: np.ndarray | None = None) -> None:
        """Replace single-frame results of consecutive frames by persistence ones, in place
        (``cells``: the frames' :meth:`~inspector.core.persistence.Persistence.cells`, when
        known)."""
        if not self.on(baseline) or not results:
            return
        p = baseline.persistence
        cam = baseline.camera
        with self._lock:
            version, state = self._states.get(cam, ("", None))
            if not version and self.ledger is not None:
                version, state = self.ledger.stream(cam) or ("", None)
            if version != baseline.version:
                state = None
            run = p.run(maps, np.array([r.time.timestamp() for r in results]), state, cells)
            self._states[cam] = (baseline.version, run.state)
            if self.ledger is not None:
                self.ledger.keep_stream(cam, baseline.version, run.state.arrays())
        thresholds, p_values = p.judged(run)
        for i, r in enumerate(results):
            r.score, r.threshold, r.p_value = float(run.scores[i]), float(thresholds[i]), \
                float(p_values[i])
            r.amap = run.maps[i]
            r.flagged = bool(run.filled[i] and run.scores[i] > thresholds[i]
                             and not held_back(r.health))
            if r.flagged and np.isfinite(run.since[i]):  # (FrameResult.since: flagged only)
                r.since = datetime.fromtimestamp(run.since[i], tz=r.time.tzinfo)
            if not run.filled[i]:
                (self.late if run.late[i] else self.filling)[cam] += 1

    def note(self, notes: Counter) -> None:
        """Add to a summary's ``notes`` the frames not flagged for want of a full window."""
        for cam, n in self.filling.items():
            notes[f"{cam}: first frames of a run, not flagged while the persistence "
                  f"window fills"] += n
        for cam, n in self.late.items():
            notes[f"{cam}: frames that arrived after later ones, too late for a full "
                  f"persistence window, not flagged"] += n


@dataclass
class ScanSummary:
    """What a scan did, for its summary (a watch's :class:`~inspector.jobs.watch.WatchReport`
    adds to it).

    Attributes
    ----------
    scored, flagged : int
        Frames scored, and of those flagged.
    skipped : int
        Frames not scored (skipped.csv); a scan counts here the frames waiting for a usable
        baseline too, a watch counts those apart (``WatchReport.waiting``).
    health : int
        Camera health conditions reported (rows of health.csv: a frame may have several).
    seconds : float
        Wall-clock time of the scan.
    notes : Counter
        Summary lines, each with the number of frames it concerns.
    """

    scored: int = 0
    flagged: int = 0
    skipped: int = 0
    health: int = 0
    seconds: float = 0.0
    notes: Counter = field(default_factory=Counter)
    #: Frames left out because the ledger has them scored and the file is unchanged
    #: (``rescore=False``), and how many of those were scored against a baseline version
    #: that is no longer the camera's active one.
    unchanged: int = 0
    unchanged_older: int = 0
    #: Cameras whose active baseline is damaged: the message, with what to do.
    damaged: dict[str, str] = field(default_factory=dict)
    #: Frames not scored for want of a usable baseline, per camera (damaged ones included).
    no_baseline: dict[str, int] = field(default_factory=dict)
    #: Files directly in SOURCE, outside any camera folder.
    loose: int = 0

    @property
    def rate(self) -> float:
        return self.scored / self.seconds if self.seconds > 0 else 0.0


def load_baseline(baselines: BaselineCache, camera: str, damaged: dict[str, str]
                  ) -> tuple[Baseline | None, str]:
    """The camera's baseline and '', or None and why its frames cannot be scored (no
    baseline, or a damaged one: then the message with what to do goes into ``damaged``)."""
    try:
        return baselines.get(camera), ""
    except DamagedBaseline as exc:
        damaged[camera] = exc.note
        return None, str(exc)
    except LookupError as exc:
        return None, str(exc)


def check_baseline(store: Store, camera: str, damaged: dict[str, str]) -> None:
    """Put the camera's active baseline into ``damaged`` as :func:`load_baseline` would when
    it is damaged, from its checksums alone (:meth:`Store.verify`: a version saved before
    checksums is loaded), for a camera none of whose frames is scored."""
    version = store.active_version(camera)
    if version is not None:
        check = store.verify(camera, version)
        if check.damaged:
            damaged[camera] = DamagedBaseline(check, store.advice(camera, version)).note


def scan_files(files: Iterable[FrameFile], baselines: BaselineCache, writer: ResultWriter,
               config: Config, workers: int = 2, total: int | None = None,
               persist: bool = True) -> ScanSummary:
    """Score frame files (any cameras) into ``writer``; nothing is dropped silently.

    A camera without a usable baseline (none, or a damaged one) has its frames recorded
    with the reason; the other cameras are scored as usual. ``persist=False`` leaves every
    frame with its single-frame result (a cluster partition: the driver applies persistence
    in stream order, see :mod:`inspector.jobs.cluster`).
    """
    started = time.perf_counter()
    summary = ScanSummary()
    streams = Streams(config)
    by_camera: dict[str, list[FrameFile]] = {}
    for f in files:
        by_camera.setdefault(f.camera, []).append(f)
    with progress_bar(total, "scanning") as bar:
        for camera, cam_files in by_camera.items():
            baseline, reason = load_baseline(baselines, camera, summary.damaged)
            if baseline is None:
                writer.write(skipped=[Skip(f.rel, camera, reason, waiting=True)
                                      for f in cam_files])
                bar.update(len(cam_files))
                continue
            on = streams.on(baseline)
            if on:  # a stream goes forward in capture time
                cam_files = stream_order(cam_files, config)
            # Decoding, preparation, health measures and the model run in the worker
            # threads, batch by batch; the stream-ordered rest (frozen feed, thresholds)
            # and the writing here, in order. The cells persistence measures only for a
            # camera whose persistence is on (with ``persist=False`` too: a cluster's driver applies
            # persistence to what the workers measured).
            work = functools.partial(baseline.evaluate, cells=on)
            for batch in iter_batches(cam_files, BATCH, workers=workers,
                                      work=work, **read_args(baseline, config)):
                if batch.errors:
                    writer.write(skipped=[Skip(f.rel, camera, str(err))
                                          for f, err in batch.errors])
                writer.write(score_frames(baseline, batch.frames, batch.result,
                                          streams if persist else None, summary.notes))
                bar.update(len(batch.frames) + len(batch.errors))
    summary.scored = writer.counts["scored"]
    summary.flagged = writer.counts["flagged"]
    summary.skipped = writer.counts["skipped"] + writer.counts["waiting"]
    summary.health = writer.counts["health"]
    summary.seconds = time.perf_counter() - started
    streams.note(summary.notes)
    note_amplified(writer, summary.notes)
    return summary


def in_stream(baseline: Baseline, config: Config, file: FrameFile, folder: Path,
              frame: Frame | None = None) -> FrameResult | None:
    """One frame scored as a scan of its camera's stream scores it, when the camera runs
    with persistence: with the frames before it among the frame files under ``folder``
    (the camera's) filling its window; None for a camera without persistence. For a picture
    drawn on the spot (the review page). ``frame``: ``file`` already read (else it is read
    here; FrameError when it cannot be). An earlier frame that cannot be read is left out,
    as a scan leaves it out."""
    streams = Streams(config)
    if not streams.on(baseline):
        return None
    here = file.path.resolve()
    stream = discover(folder, file.camera)[0] if folder.is_dir() else []
    ordered = stream_order([f for f in stream if f.path.resolve() != here] + [file], config)
    k = next(i for i, f in enumerate(ordered) if f is file)
    frames = []
    p = baseline.persistence
    for f in ordered[max(0, k - p.window - p.past + 1):k]:
        try:
            frames.append(read_frame(f, **read_args(baseline, config)))
        except FrameError:
            continue
    frames.append(frame if frame is not None else read_frame(file, **read_args(baseline, config)))
    return score_frames(baseline.continue_from(None), frames, streams=streams)[-1]


def stream_order(files: Sequence[FrameFile], config: Config) -> list[FrameFile]:
    """One camera's frame files in capture-time order (then by name), as a stream goes."""
    if not files:
        return []
    formats = config.camera(files[0].camera).frames.time_formats
    return sorted(files, key=lambda f: (capture_time(f.path, formats), f.rel))


def scan_folder(source: Path, baselines: BaselineCache, writer: ResultWriter, config: Config,
                workers: int = 2, rescore: bool = True, client=None) -> ScanSummary:
    """Discover every frame under ``source`` (camera = first folder level) and score it.

    ``rescore=False`` leaves out the frames that ``writer``'s ledger has scored before and
    whose file is unchanged (counted in the summary); a camera all of whose frames are left
    out still has its active baseline checked (not loaded), so that damage to it is
    reported in ``summary.damaged`` as on any other scan. With a ``distributed.Client`` the
    frames are scored on its Dask cluster (:func:`inspector.jobs.cluster.scan_on_cluster`).
    """
    files, skips = discover(source)
    writer.write(skipped=skips)
    done: dict = {}
    if not rescore and writer.ledger is not None:
        root = Path(source).resolve()
        done = writer.ledger.unchanged_scored([root / f.rel for f in files])
        files = [f for f in files if str(root / f.rel) not in done]
    if client is not None:
        from inspector.jobs.cluster import scan_on_cluster

        summary = scan_on_cluster(client, files, baselines, writer, config, total=len(files))
    else:
        summary = scan_files(files, baselines, writer, config, workers=workers,
                             total=len(files))
    summary.unchanged = len(done)
    active = {c: baselines.store.active_version(c) for c in {r["camera"] for r in done.values()}}
    for camera in sorted(active.keys() - {f.camera for f in files}):
        check_baseline(baselines.store, camera, summary.damaged)  # all its frames left out
    summary.no_baseline = dict(writer.waiting)
    summary.loose = sum(not s.camera for s in skips)
    summary.unchanged_older = sum(r["version"] != active[r["camera"]] for r in done.values())
    return summary


def run_scan(source: Path, config: Config, store: Store, out: Path,
             all_scores: Path | None = None, maps: Path | None = None,
             rescore: bool = True, client=None) -> ScanSummary:
    """A whole scan as the command runs it: results, ledger rows and events.csv.

    ``rescore`` and ``client``: see :func:`scan_folder`.
    """
    from inspector.storage.ledger import Ledger

    with Ledger(store.database) as ledger, \
            ResultWriter(out, all_scores, maps, source=source, store=store.root,
                         ledger=ledger, events=config.events) as writer:
        return scan_folder(source, BaselineCache(store), writer, config, rescore=rescore,
                           client=client)
