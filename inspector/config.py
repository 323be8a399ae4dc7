"""Settings: one TOML file, validated once, merged per camera.

Every setting has a default that works on a new scene; the file only changes what it
names. Sections are plain dataclasses so the rest of the code reads attributes, never
dictionaries. A camera table (``[cameras.NAME]``) may override any key of the
``[frames]``, ``[model]``, ``[calibration]`` and ``[conditions]`` sections for that camera, and adds the
camera's ignore mask.

Relative paths in the file are taken from the folder inspector is run in.
"""

from __future__ import annotations

import dataclasses
import re
import sys
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

from inspector.errors import UsageError
from inspector.names import CAMERA_NAME_RULE, is_camera_name

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

#: ``[cluster] scheduler`` (or ``--scheduler``) naming worker processes on this machine.
LOCAL_SCHEDULER = re.compile(r"^local:(\d+)$")
#: Where the config is looked for when ``--config`` is not given.
DEFAULT_CONFIG = Path("config") / "inspector.toml"


@dataclass(frozen=True)
class PathSettings:
    store: str = "inspector-store"
    out: str = "inspector-out"


@dataclass(frozen=True)
class FrameSettings:
    #: Long side of the working resolution in pixels; the short side keeps the aspect ratio.
    long_side: int = 320
    #: Frames with more pixels than this are skipped before decoding (decompression bombs).
    max_pixels: int = 100_000_000
    #: strftime-style patterns searched for in file names for the capture time.
    time_formats: tuple[str, ...] = (
        "%Y-%m-%dT%H-%M-%S",
        "%Y-%m-%d_%H-%M-%S",
        "%Y-%m-%d %H-%M-%S",
        "%Y%m%dT%H%M%S",
        "%Y%m%d_%H%M%S",
        "%Y%m%d-%H%M%S",
        "%Y%m%d%H%M%S",
    )
    #: Model colour (luminance plus half-resolution chroma); false models luminance only.
    colour: bool = True


@dataclass(frozen=True)
class ModelSettings:
    #: Density model: "ppca" (per-location probabilistic PCA) or "vae".
    model: str = "ppca"
    #: Patch side and stride in working-resolution pixels (even; stride divides patch).
    patch: int = 8
    stride: int = 4
    #: Latent size per location; 0 chooses it by ``latent_rule``.
    latent: int = 0
    explained_variance: float = 0.9
    #: "heldout": the size under which the earlier time blocks best predict the latest
    #: (held-out likelihood; PPCA only); "variance": the smallest size explaining
    #: ``explained_variance`` (also used with fewer than three time blocks).
    latent_rule: str = "heldout"
    max_latent: int = 24
    #: "shared": one noise variance for luminance and chroma (plain PPCA); "own": chroma
    #: has its own, fitted from the normal frames, so a change of colour is judged against
    #: colour noise (PPCA only).
    chroma_noise: str = "shared"

    @staticmethod
    def check(m: "ModelSettings", where: str) -> None:
        from inspector.core.models import MODEL_NAMES

        if m.model not in MODEL_NAMES:
            raise UsageError(f"{where} model = {m.model!r}: choose one of "
                             f"{', '.join(MODEL_NAMES)}")
        if m.latent_rule not in ("variance", "heldout"):
            raise UsageError(f"{where} latent_rule = {m.latent_rule!r}: choose variance or "
                             "heldout")
        if m.chroma_noise not in ("shared", "own"):
            raise UsageError(f"{where} chroma_noise = {m.chroma_noise!r}: choose shared or own")
        if m.patch % 2 or m.stride % 2 or m.patch % m.stride:
            raise UsageError(
                f"{where} patch = {m.patch}, stride = {m.stride}: both must be even and the "
                "stride must divide the patch"
            )


@dataclass(frozen=True)
class CalibrationSettings:
    #: False-alarm rate promised on normal frames (conformal guarantee).
    alpha: float = 0.01
    #: Number of time blocks for cross-conformal calibration.
    folds: int = 5
    #: Budget of false alarms per camera per day; 0 uses ``alpha`` instead. Converted to a
    #: per-frame rate with the frames per day counted from the normal frames' capture days.
    alarms_per_day: float = 0.0
    #: When the calibration set is too small for the rate that ``alarms_per_day`` asks for,
    #: extrapolate the threshold with a generalized Pareto fit of the largest scores (with a
    #: warning; the rate guaranteed stays 1/(n+1)). A plain ``alpha`` always uses the
    #: conformal threshold.
    tail_fit: bool = True
    #: Split the normal frames into appearance regimes (day/night, lights on/off, colour
    #: and infrared greyscale) when they clearly fall apart, each with its own per-cell
    #: standardisation and calibration (the density model stays shared). Off by default:
    #: smaller calibration sets per regime cost more than they gave in our measurements.
    regimes: bool = False
    #: Most regimes a camera may have.
    max_regimes: int = 3


@dataclass(frozen=True)
class ConditionSettings:
    """How camera conditions are handled (see :mod:`inspector.core.conditions`)."""

    #: Photometric normalisation against the baseline: "global" (a robust gain and offset
    #: per frame), "local" (that, then a smooth brightness field per colour channel, for
    #: lights, of any colour, that change one part of the scene more than another) or "off".
    lighting: str = "local"
    #: Exposure changes the baseline should take in its stride: half the normal frames are
    #: learnt and calibrated on as if caught up to this fraction darker or brighter (same
    #: sensor noise, highlights clipped), so a frame after an exposure step brought back
    #: to the reference is not an anomaly. 0 turns it off. Needs lighting normalisation.
    exposure_range: float = 0.2
    #: Align each frame to the baseline's reference (phase correlation) before scoring.
    register: bool = True
    #: Largest shift corrected, as a fraction of the frame's long side; beyond it the frame
    #: is reported as "camera moved" in health.csv instead of being scored for anomalies.
    max_shift: float = 0.05
    #: Find burned-in text (clock, date, camera name) at learn time and mask it.
    auto_text_mask: bool = True
    #: Largest share of the view the automatic text mask may cover; text found beyond it
    #: is not masked (learn warns). Configured boxes and masks do not count against it.
    text_mask_cap: float = 0.05
    #: Text boxes to mask as well, [x0, y0, x1, y1] in pixels of the exported frame.
    text_boxes: tuple = ()
    #: Report camera health (lens covered, out of focus, frozen, underexposed, overexposed,
    #: moved) in health.csv; frames with a condition are not flagged as anomalies.
    health: bool = True
    #: Health limits before they are widened by what the normal frames show: 99th
    #: percentile of grey below which a frame is underexposed; share of clipped pixels above
    #: which it is overexposed; share of textured cells lost from view above which the lens is
    #: covered; detail of the textured cells (their median) relative to normal below which
    #: it is out of focus; mean absolute difference to the previous frame (grey levels) below
    #: which the feed is frozen.
    dark_level: float = 20.0
    overexposed_share: float = 0.5
    covered_share: float = 0.5
    focus_ratio: float = 0.35
    frozen_difference: float = 0.25

    @staticmethod
    def check(c: "ConditionSettings", where: str) -> None:
        from inspector.core.conditions import LIGHTING_MODES

        if c.lighting not in LIGHTING_MODES:
            raise UsageError(f"{where} lighting = {c.lighting!r}: choose one of "
                             f"{', '.join(LIGHTING_MODES)}")
        for box in c.text_boxes:
            ok = (isinstance(box, (list, tuple)) and len(box) == 4
                  and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in box))
            if not ok or box[2] <= box[0] or box[3] <= box[1]:
                raise UsageError(f"{where} text_boxes: each box must be [x0, y0, x1, y1] with "
                                 f"x1 > x0 and y1 > y0, got {box!r}")


@dataclass(frozen=True)
class WatchSettings:
    """The ``[watch]`` section of the config."""

    #: A file is complete once its size and modification time stay unchanged this long (s).
    settle: float = 1.0
    #: Poll the folder every this many seconds instead of using file events (0 = events).
    #: For network shares and mounts where no events arrive.
    poll: float = 0.0
    #: Complete frames handed to the scoring workers at most at a time (back-pressure).
    queue: int = 64
    #: Scoring threads.
    workers: int = 2
    #: Frames scored together by a worker.
    batch: int = 16
    #: Walk the whole folder again every this many seconds for anything missed (0 = never).
    rescan: float = 600.0
    #: Log the backlog when the oldest complete frame has waited longer than this (s).
    lag_warning: float = 5.0

    @staticmethod
    def check(s: "WatchSettings", where: str) -> None:
        for name, lo, hi in (("settle", 0.0, 3600.0), ("poll", 0.0, 3600.0),
                             ("rescan", 0.0, 86400.0), ("lag_warning", 0.0, 86400.0)):
            v = getattr(s, name)
            if not lo <= v <= hi:
                raise UsageError(f"{where} {name} = {v!r} is outside [{lo:g}, {hi:g}]")
        for name, lo, hi in (("queue", 1, 100_000), ("workers", 1, 64), ("batch", 1, 256)):
            v = getattr(s, name)
            if not lo <= v <= hi:
                raise UsageError(f"{where} {name} = {v!r} is outside [{lo}, {hi}]")


@dataclass(frozen=True)
class EventSettings:
    """The ``[events]`` section of the config."""

    #: An event opens when at least k of the last n frames are flagged.
    k: int = 1
    n: int = 1
    #: Unflagged frames in a row tolerated inside an event.
    gap: int = 1

    @staticmethod
    def check(s: "EventSettings", where: str) -> None:
        if not (1 <= s.k <= s.n <= 1000):
            raise UsageError(f"{where} k = {s.k}, n = {s.n}: need 1 <= k <= n <= 1000")
        if not (0 <= s.gap <= 1000):
            raise UsageError(f"{where} gap = {s.gap} is outside [0, 1000]")


@dataclass(frozen=True)
class ClusterSettings:
    """The ``[cluster]`` section of the config."""

    #: "" runs on this machine; "local:N" starts N worker processes here; "tcp://host:8786"
    #: uses a running Dask scheduler.
    scheduler: str = ""
    #: Consecutive frames of one camera scored by one task.
    partition: int = 64
    #: Times a task that fails is tried again before its frames are skipped (a task lost
    #: with its worker is run again by Dask up to its ``allowed-failures``, 3 by default).
    retries: int = 3
    #: Seconds to wait for the scheduler to answer before giving up.
    connect_timeout: float = 5.0
    #: Baselines each worker process keeps loaded (least recently used ones are dropped).
    cached_baselines: int = 8

    @staticmethod
    def check(s: "ClusterSettings", where: str) -> None:
        if s.scheduler and not (LOCAL_SCHEDULER.match(s.scheduler) or "://" in s.scheduler):
            raise UsageError(f"{where} scheduler = {s.scheduler!r}: expected 'local:N' or an "
                             "address such as 'tcp://host:8786'")
        for name, low in (("partition", 1), ("retries", 0), ("cached_baselines", 1)):
            if getattr(s, name) < low:
                raise UsageError(f"{where} {name} must be at least {low}")
        if not s.connect_timeout > 0:
            raise UsageError(f"{where} connect_timeout must be more than 0")


#: ``[persistence] mode``'s choices.
PERSISTENCE_MODES = ("auto", "on", "off")


@dataclass(frozen=True)
class PersistenceSettings:
    """Busy cameras: flag what stays, not what passes (see :mod:`inspector.core.persistence`)."""

    #: "auto" (on for cameras whose normal frames often hold large short-lived anomalies,
    #: measured at learn time), "on" or "off".
    mode: str = "auto"
    #: Frames a region must stay unusual in before it is flagged (at learn time).
    window: int = 4

    @staticmethod
    def check(s: "PersistenceSettings", where: str) -> None:
        if s.mode not in PERSISTENCE_MODES:
            raise UsageError(f"{where} {s.mode!r} is not a persistence mode: choose one of "
                             f"{', '.join(PERSISTENCE_MODES)}")


@dataclass(frozen=True)
class CameraMask:
    #: Polygons in pixel coordinates of the exported frame, each a list of [x, y].
    polygons: tuple[tuple[tuple[float, float], ...], ...] = ()
    #: A mask image (same aspect ratio as the frames); non-zero pixels are ignored.
    image: str = ""


@dataclass(frozen=True)
class CameraConfig:
    """Everything that decides how one camera is learnt and scored."""

    name: str
    frames: FrameSettings
    model: ModelSettings
    calibration: CalibrationSettings
    mask: CameraMask
    conditions: ConditionSettings = field(default_factory=ConditionSettings)
    persistence: PersistenceSettings = field(default_factory=PersistenceSettings)


@dataclass(frozen=True)
class Config:
    paths: PathSettings = field(default_factory=PathSettings)
    frames: FrameSettings = field(default_factory=FrameSettings)
    model: ModelSettings = field(default_factory=ModelSettings)
    calibration: CalibrationSettings = field(default_factory=CalibrationSettings)
    conditions: ConditionSettings = field(default_factory=ConditionSettings)
    watch: WatchSettings = field(default_factory=WatchSettings)
    events: EventSettings = field(default_factory=EventSettings)
    cluster: ClusterSettings = field(default_factory=ClusterSettings)
    persistence: PersistenceSettings = field(default_factory=PersistenceSettings)
    #: Raw per-camera tables, validated when read through :meth:`camera`.
    cameras: dict[str, dict[str, Any]] = field(default_factory=dict)
    source: str = "built-in defaults"

    def camera(self, name: str) -> CameraConfig:
        """Settings for camera ``name``: the global sections with its overrides applied."""
        table = dict(self.cameras.get(name, {}))
        where = f"[cameras.{name}]"
        mask = CameraMask(
            polygons=_polygons(table.pop("mask_polygons", ()), where),
            image=_typed(table.pop("mask_image", ""), str, f"{where} mask_image"),
        )
        sections = {"frames": self.frames, "model": self.model, "calibration": self.calibration,
                    "conditions": self.conditions}
        out: dict[str, Any] = {}
        # [persistence] keys read "persistence" and "persistence_window" in a camera table.
        labels = {"mode": "persistence", "window": "persistence_window"}
        mine = {k: table.pop(label) for k, label in labels.items() if label in table}
        out["persistence"] = _build(PersistenceSettings, mine, where, base=self.persistence,
                                    source=self.source, labels=labels)
        for key, current in sections.items():
            names = {f.name for f in fields(current)}
            mine = {k: table.pop(k) for k in list(table) if k in names}
            out[key] = _build(type(current), mine, where, base=current, source=self.source)
        if table:
            raise UsageError(f"{self.source}: unknown key {where} {sorted(table)[0]!r}")
        return CameraConfig(name=name, mask=mask, **out)


def load_config(path: str | Path | None = None) -> Config:
    """Read and validate the config file.

    Parameters
    ----------
    path : str or Path, optional
        The TOML file. ``None`` uses ``config/inspector.toml`` in the working folder when it
        exists, else the built-in defaults.

    Raises
    ------
    UsageError
        The file is missing (when named), is not valid TOML, or holds an unknown key or a
        value of the wrong type or range; the message names the key.
    """
    if path is None:
        if not DEFAULT_CONFIG.is_file():
            return Config()
        path = DEFAULT_CONFIG
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UsageError(f"config file not found: {path}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"cannot read config file {path}: {exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise UsageError(f"config file {path} is not valid TOML: {exc}") from None
    src = str(path)
    _moved_keys(data, src)
    known = {"paths": PathSettings, "frames": FrameSettings, "model": ModelSettings,
             "calibration": CalibrationSettings, "conditions": ConditionSettings,
             "watch": WatchSettings, "events": EventSettings, "cluster": ClusterSettings,
             "persistence": PersistenceSettings}
    built = {k: _build(cls, data.pop(k, {}), f"[{k}]", source=src) for k, cls in known.items()}
    cameras = data.pop("cameras", {})
    if not isinstance(cameras, dict) or not all(isinstance(v, dict) for v in cameras.values()):
        raise UsageError(f"{src}: [cameras] must hold one table per camera, e.g. [cameras.dock]")
    for key, value in data.items():
        if not isinstance(value, dict):
            raise UsageError(f"{src}: unknown top-level key {key!r}")
        raise UsageError(f"{src}: unknown section [{key}] (sections: "
                         f"{', '.join(f'[{k}]' for k in [*known, 'cameras.NAME'])})")
    for name in cameras:
        if not is_camera_name(name):
            raise UsageError(f'{src}: [cameras."{name}"] cannot be a camera ({CAMERA_NAME_RULE})')
    config = Config(cameras=cameras, source=src, **built)
    for name in cameras:
        config.camera(name)  # validate now, not in the middle of a run
    return config


#: Keys that moved from [conditions] to [calibration]; the old place is still read.
MOVED_TO_CALIBRATION = ("alarms_per_day", "tail_fit", "regimes", "max_regimes")


def _moved_keys(data: dict[str, Any], src: str) -> None:
    """Move calibration keys found under [conditions] to [calibration], with a one-line
    warning on standard error (a key set in both places keeps the [calibration] value)."""
    cond = data.get("conditions")
    if not isinstance(cond, dict):
        return
    moved = [k for k in MOVED_TO_CALIBRATION if k in cond]
    if not moved:
        return
    cal = data.setdefault("calibration", {})
    if not isinstance(cal, dict):
        return
    for k in moved:
        value = cond.pop(k)
        cal.setdefault(k, value)
    print(f"inspector: warning: {src}: {', '.join(moved)} under [conditions] is deprecated; "
          f"move {'it' if len(moved) == 1 else 'them'} to [calibration]", file=sys.stderr)


# --- validation ---------------------------------------------------------------------------

_RANGES: dict[str, tuple[float, float]] = {
    "long_side": (32, 4096),
    "max_pixels": (1, 10**10),
    "patch": (2, 64),
    "stride": (1, 64),
    "latent": (0, 512),
    "explained_variance": (0.0, 1.0),
    "max_latent": (1, 512),
    "alpha": (1e-9, 0.5),
    "folds": (2, 50),
    "max_shift": (0.0, 0.5),
    "text_mask_cap": (0.0, 1.0),
    "max_regimes": (1, 8),
    "exposure_range": (0.0, 0.9),
    "alarms_per_day": (0.0, 1e6),
    "dark_level": (0.0, 255.0),
    "overexposed_share": (0.0, 1.0),
    "covered_share": (0.0, 1.0),
    "focus_ratio": (0.0, 1.0),
    "frozen_difference": (0.0, 255.0),
    "window": (1, 60),
}


def _typed(value: Any, kind: type, name: str) -> Any:
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if kind is tuple:
        if not isinstance(value, (list, tuple)):
            raise UsageError(f"{name} must be a list, got {value!r}")
        return tuple(value)
    if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
        raise UsageError(f"{name} must be {kind.__name__}, got {value!r}")
    return value


def _build(cls: type, table: Any, where: str, base: Any = None, source: str = "",
           labels: dict[str, str] | None = None) -> Any:
    """Make dataclass ``cls`` from a TOML table, checking names, types and ranges.

    ``labels``: a field's key as the user wrote it, where it differs (a camera table's
    ``persistence_window`` for [persistence]'s ``window``), for the messages."""
    prefix = f"{source}: " if source else ""
    if not isinstance(table, dict):
        raise UsageError(f"{prefix}{where} must be a table")
    base = base if base is not None else cls()
    known = {f.name: f for f in fields(cls)}
    values = {}
    for key, value in table.items():
        if key not in known:
            raise UsageError(f"{prefix}unknown key {where} {key!r}")
        default = getattr(base, key)
        kind = tuple if isinstance(default, tuple) else type(default)
        label = (labels or {}).get(key, key)
        value = _typed(value, kind, f"{prefix}{where} {label}")
        lo_hi = _RANGES.get(key)
        if lo_hi and not (lo_hi[0] <= value <= lo_hi[1]):
            raise UsageError(f"{prefix}{where} {label} = {value!r} is outside "
                             f"[{lo_hi[0]}, {lo_hi[1]}]")
        values[key] = value
    built = replace(base, **values)
    check = getattr(built, "check", None)  # a section's own rules beyond types and ranges
    if check:
        check(built, f"{prefix}{where}")
    return built


def _polygons(value: Any, where: str) -> tuple:
    try:
        polys = tuple(tuple((float(x), float(y)) for x, y in poly) for poly in value)
    except (TypeError, ValueError):
        raise UsageError(f"{where} mask_polygons must be a list of polygons, "
                         "each a list of [x, y] points") from None
    for poly in polys:
        if len(poly) < 3:
            raise UsageError(f"{where} mask_polygons: a polygon needs at least 3 points")
    return polys


def settings_dict(obj: Any) -> dict[str, Any]:
    """A JSON-ready dict of a settings dataclass (tuples become lists)."""
    return dataclasses.asdict(obj)
