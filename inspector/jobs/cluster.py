"""Learning and scanning on a Dask distributed cluster (``--scheduler``).

Without a scheduler everything runs on this machine as before; this module is only
imported when one is named. The split of work:

* scan: the frames of each camera, in stream order, are cut into partitions of
  ``partition`` consecutive frames. A worker scores a partition with the same code as a
  local scan (:func:`inspector.jobs.scan.scan_files` over the same frame reader and
  :func:`inspector.jobs.scan.score_frames`), into a recorder instead of the result files;
  the driver replays each partition's record into the one :class:`ResultWriter` (CSV files,
  overlays, maps, ledger) in partition order, whatever order the workers finish in. A
  partition lost with its worker is computed again by Dask (``retries``) and its record is
  read once, so no frame is lost or written twice. A camera that runs with persistence
  (:class:`inspector.jobs.scan.Streams`) is cut in capture-time order, its partitions come
  back with single-frame results, and the driver applies persistence to them as it replays
  them, in stream order: the window and each region's ``since`` go across partitions as in
  one pass (the image of a frame that persistence flags is read again for its overlay).
* learn: one task per camera (:func:`inspector.jobs.learn.learn_camera`), each saving its
  version into the store, reports returned in camera order. A single camera is learnt with
  its model's passes over the frames in the workers instead (:class:`ClusterPool`; PPCA:
  each time block's moments accumulated there and added here, held-out blocks scored
  there).

Workers load baselines from the store path themselves (the frames and the store must be at
the same paths on every machine, e.g. a shared mount) and keep the last few in memory, so a
camera's baseline is read once per worker process, not once per task.

Tasks and results travel between processes by Dask's own serialisation; nothing of it is
written to disk.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import Counter, OrderedDict, deque
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from inspector.config import LOCAL_SCHEDULER, ClusterSettings, Config
from inspector.core.baseline import Baseline
from inspector.core.persistence import persistence_on
from inspector.errors import FrameError, UsageError
from inspector.jobs.progress import progress_bar
from inspector.jobs.scan import (
    ScanSummary,
    Streams,
    load_baseline,
    note_amplified,
    read_args,
    scan_files,
    stream_order,
)
from inspector.storage.frames import FrameFile, Skip, read_frame
from inspector.storage.store import Store


def cluster_settings(config: Config, scheduler: str | None = None) -> ClusterSettings:
    """The config's ``[cluster]`` settings, with ``scheduler`` (``--scheduler``) over it."""
    s = config.cluster
    if scheduler is not None:
        s = replace(s, scheduler=scheduler)
    ClusterSettings.check(s, "--scheduler" if scheduler is not None else "[cluster]")
    return s


@contextmanager
def connect(settings: ClusterSettings) -> Iterator[Any]:
    """A ``distributed.Client`` for ``settings.scheduler`` (None when it is empty).

    ``local:N`` starts a ``distributed.LocalCluster`` of N single-threaded worker processes
    for the duration; any other address must be a running scheduler.

    Raises
    ------
    UsageError
        dask/distributed are not installed, N is not a positive number, or the scheduler does
        not answer within ``connect_timeout`` seconds.
    """
    address = settings.scheduler
    if not address:
        yield None
        return
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise UsageError("--scheduler needs dask and distributed: "
                         "pip install 'inspector[cluster]'") from None
    local = LOCAL_SCHEDULER.match(address)
    if local:
        n = int(local.group(1))
        if n < 1:
            raise UsageError(f"scheduler {address!r}: local needs at least 1 worker")
        with LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                          dashboard_address=":0", silence_logs=logging.ERROR) as cluster, \
                Client(cluster) as client:
            yield client
        return
    try:
        client = Client(address, timeout=settings.connect_timeout)
    except (OSError, TimeoutError, ValueError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise UsageError(f"cannot reach the Dask scheduler at {address}: {reason}") from None
    with client:
        yield client


def dashboard(client) -> str:
    """The Dask dashboard address of ``client``'s cluster ('' when it serves none)."""
    try:
        return client.dashboard_link or ""
    except Exception:  # no dashboard (bokeh missing on the scheduler)
        return ""


# --- worker side -----------------------------------------------------------------------------

_cache: OrderedDict[tuple[str, str, str], Baseline] = OrderedDict()
_cache_lock = threading.Lock()
#: Baselines this process read from a store, by (store, camera, version): shows the cache
#: works (see ``client.run``).
loads: Counter[tuple[str, str, str]] = Counter()


def worker_baseline(root: str, camera: str, version: str | None, keep: int) -> Baseline:
    """The baseline ``version`` of ``camera`` from the store at ``root``, read once per
    process and kept among the ``keep`` most recently used. ``version`` None reads the
    active one (not kept: it may change).

    Raises
    ------
    LookupError
        ``no baseline for camera X``.
    """
    key = (root, camera, version or "")
    with _cache_lock:
        if version is not None and key in _cache:
            _cache.move_to_end(key)
            return _cache[key]
        baseline = Store(root).load(camera, version)
        loads[(root, camera, baseline.version)] += 1
        if version is not None:
            _cache[key] = baseline
            while len(_cache) > keep:
                _cache.popitem(last=False)
        return baseline


class _Partition:
    """What :func:`scan_files` needs of a ``BaselineCache``, for one camera on a worker."""

    def __init__(self, baseline: Baseline):
        self.baseline = baseline

    def get(self, camera: str) -> Baseline:
        return self.baseline


class _Missing:
    """A camera without a usable baseline: every frame waits, as in a local scan."""

    def __init__(self, error: LookupError):
        self.error = error

    def get(self, camera: str) -> Baseline:
        raise self.error


class Recorder:
    """Stands in for :class:`ResultWriter` on a worker: keeps the calls a scan makes, in
    order, for the driver's writer to replay.

    The frame image and clipped pixels of an unflagged result are dropped (the writer draws
    overlays of flagged frames only), which keeps what travels back to the driver small.
    """

    def __init__(self):
        self.calls: list[tuple[list, list, Any]] = []
        self.counts: Counter[str] = Counter()
        #: Stays empty: the driver's writer counts the frames judged with amplified noise
        #: as it replays the calls.
        self.amplified: dict = {}

    def write(self, results=(), skipped=(), seen=None) -> list[str]:
        slim = [r if r.flagged else replace(r, image=np.zeros((0, 0, 3), np.uint8),
                                            clipped=None)
                for r in results]
        if slim or skipped:
            self.calls.append((slim, list(skipped), seen))
        return ["" for _ in slim]

    def replay(self, writer, streams=None, baseline: Baseline | None = None,
               files: Sequence[FrameFile] = (), config: Config | None = None) -> None:
        """Make the recorded calls on ``writer``, in the order they were made.

        With ``streams`` and the partition's ``baseline``, its results (single-frame, in
        stream order) get persistence first (:meth:`Streams.apply`, state carried from the
        partitions replayed before); a frame it flags whose image was dropped is read again
        from ``files``, its clipped pixels prepared again."""
        by_rel = {f.rel: f for f in files}
        for results, skipped, seen in self.calls:
            mine = [r for r in results if baseline is not None and r.version == baseline.version]
            if streams is not None and mine and streams.on(baseline):
                cells = (np.stack([r.cells for r in mine])
                         if all(r.cells is not None for r in mine) else None)
                streams.apply(baseline, np.stack([r.amap for r in mine]), mine, cells)
                for r in mine:
                    if r.flagged and not r.image.size:
                        r.image = read_frame(by_rel[r.frame], **read_args(baseline, config)).image
                        clipped = (None if baseline.conditions is None else
                                   baseline.conditions.prepare(r.image[None]).clipped)
                        r.clipped = None if clipped is None else clipped[0]
            writer.write(results, skipped, seen)


@dataclass
class Part:
    """One task of a cluster scan: consecutive frames of one camera."""

    camera: str
    version: str | None
    files: list[FrameFile]
    #: The frames just before ``files`` in the stream, nearest first (for a frozen feed).
    before: list[FrameFile] = field(default_factory=list)


def score_part(part: Part, root: str, config: Config, keep: int
               ) -> tuple[Recorder, Counter, dict[str, str]]:
    """Score one partition on a worker: its record of results, its frame notes and the
    damaged baseline met (camera -> message)."""
    recorder = Recorder()
    try:
        baseline = worker_baseline(root, part.camera, part.version, keep)
    except LookupError as exc:
        summary = scan_files(part.files, _Missing(exc), recorder, config)
        return recorder, summary.notes, summary.damaged
    previous = None
    for f in part.before:  # the last decodable frame before the partition
        try:
            previous = read_frame(f, **read_args(baseline, config)).image
            break
        except FrameError:
            continue
    summary = scan_files(part.files, _Partition(baseline.continue_from(previous)), recorder,
                         config, persist=False)  # persistence: in the driver's replay
    return recorder, summary.notes, summary.damaged


# --- driver side -----------------------------------------------------------------------------

def persists(store: Store, config: Config, camera: str) -> bool:
    """Whether the camera's active baseline runs with persistence, from its recorded
    settings alone (the driver loads only those baselines)."""
    version = store.active_version(camera)
    try:
        saved = store.metadata(camera, version).get("persistence") if version else None
    except (OSError, ValueError, LookupError):
        return False
    return saved is not None and persistence_on(bool(saved.get("busy")),
                                                config.camera(camera).persistence.mode)


def partitions(files: Sequence[FrameFile], store: Store, size: int,
               ordered: Sequence[str] = (), config: Config | None = None) -> list[Part]:
    """Cut frames into tasks: by camera (in order of first appearance, as a local scan goes),
    then ``size`` consecutive frames of the camera's stream each; the cameras in ``ordered``
    (those with persistence) in capture-time order, as a local scan takes them."""
    by_camera: dict[str, list[FrameFile]] = {}
    for f in files:
        by_camera.setdefault(f.camera, []).append(f)
    parts = []
    for camera, cam_files in by_camera.items():
        version = store.active_version(camera)
        if camera in ordered:
            cam_files = stream_order(cam_files, config)
        for i in range(0, len(cam_files), size):
            before = cam_files[max(0, i - size):i][::-1]
            parts.append(Part(camera, version, cam_files[i:i + size], before))
    return parts


def scan_on_cluster(client, files: Sequence[FrameFile], baselines, writer, config: Config,
                    total: int | None = None, settings: ClusterSettings | None = None
                    ) -> ScanSummary:
    """Score frame files on ``client``'s cluster into ``writer``, as
    :func:`inspector.jobs.scan.scan_files` does on this machine.

    Partitions are submitted a few per worker thread ahead of the writer; each one's
    results are written when it and all before it are done, so the files and the ledger
    come out the same whatever order the workers finish in. A partition still failing after
    ``retries`` (or whose workers kept dying) becomes ``skipped.csv`` rows with the reason.
    """
    store = baselines.store
    settings = settings or cluster_settings(config)
    started = time.perf_counter()
    files = list(files)
    streams = Streams(config)
    persisting: dict[str, Baseline] = {}  # loaded here only for cameras with persistence
    for camera in dict.fromkeys(f.camera for f in files):
        if persists(store, config, camera):
            baseline, _ = load_baseline(baselines, camera, {})
            if baseline is not None and streams.on(baseline):
                persisting[camera] = baseline
    parts = partitions(files, store, settings.partition, list(persisting), config)
    root = str(Path(store.root).resolve())
    ahead = max(4, 3 * sum(client.nthreads().values()))
    notes: Counter[str] = Counter()
    damaged: dict[str, str] = {}
    todo = iter(parts)
    flight: deque = deque()

    def submit() -> None:
        part = next(todo, None)
        if part is not None:
            flight.append((part, client.submit(score_part, part, root, config,
                                               settings.cached_baselines, pure=False,
                                               retries=settings.retries)))

    for _ in range(ahead):
        submit()
    with progress_bar(total, "scanning") as bar:
        while flight:
            part, future = flight.popleft()
            try:
                recorder, part_notes, part_damaged = future.result()
            except Exception as exc:
                if type(exc).__name__ != "KilledWorker":
                    raise
                writer.write(skipped=[
                    Skip(f.rel, f.camera, "not scored: every Dask worker that took it "
                                          "was lost (allowed-failures reached)")
                    for f in part.files])
            else:
                recorder.replay(writer, streams, persisting.get(part.camera), part.files,
                                config)
                notes.update(part_notes)
                damaged.update(part_damaged)
            finally:
                future.release()
            bar.update(len(part.files))
            submit()
    streams.note(notes)
    note_amplified(writer, notes)
    return ScanSummary(scored=writer.counts["scored"], flagged=writer.counts["flagged"],
                       skipped=writer.counts["skipped"] + writer.counts["waiting"],
                       health=writer.counts["health"],
                       seconds=time.perf_counter() - started, notes=notes, damaged=damaged)


class ClusterPool:
    """An executor over a Dask cluster for a model's fit (``fit(..., pool=...)``):
    ``map(fn, items)`` runs ``fn(item)`` in the workers and yields the results in order.

    Attributes
    ----------
    workers : int
        Tasks the cluster runs at once (its worker threads).
    """

    def __init__(self, client, retries: int = 3):
        self.client = client
        self.retries = retries
        self.workers = max(1, sum(client.nthreads().values()))

    def map(self, fn, items) -> Iterator:
        futures = [self.client.submit(fn, item, pure=False, retries=self.retries)
                   for item in items]
        try:
            for future in futures:
                yield future.result()
                future.release()
        finally:
            for future in futures:
                future.cancel()


def learn_on_cluster(client, tasks: Sequence[dict]) -> Iterator:
    """Run :func:`inspector.jobs.learn.learn_camera` for each keyword set of ``tasks`` on the
    cluster; yields the reports in the order of ``tasks``. An error of one camera (e.g. too
    few frames) is raised when its turn comes.

    Several cameras are learnt at once, one task each. A single camera whose model can
    (PPCA) is learnt here with its model's passes over the frames in the workers
    (:class:`ClusterPool`): the moments of each time block accumulated there and added
    here, the held-out blocks scored there.
    """
    from inspector.core.models import model_class
    from inspector.jobs.learn import learn_camera, takes_pool

    if len(tasks) == 1 and takes_pool(model_class(tasks[0]["cfg"].model.model)):
        yield learn_camera(**tasks[0], pool=ClusterPool(client))
        return
    futures = [client.submit(learn_camera, pure=False, **t) for t in tasks]
    try:
        for future in futures:
            yield future.result()
    finally:
        for future in futures:
            future.cancel()
