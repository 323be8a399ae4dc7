"""The baseline store: every version of every camera's baseline, on disk, without pickle.

Layout::

    STORE/<camera>/<version>/baseline.json   metadata and settings (layout: :func:`describe`)
    STORE/<camera>/<version>/calibration.npz standardisation, calibration scores, mask
    STORE/<camera>/<version>/conditions.npz  reference frame and health statistics
    STORE/<camera>/<version>/regimes.npz     per-regime standardisation and calibration
    STORE/<camera>/<version>/<model files>   e.g. ppca.npz or vae.pt
    STORE/<camera>/active.json               {"version": "v3"}

Versions are ``v1``, ``v2``, ... per camera; ``learn`` adds one and activates it, older
ones stay for comparison and rollback. This module is the only one that writes or reads
``baseline.json``.

Checked files: ``baseline.json`` records the SHA-256 and size of every other file of the
version (``files``) and a SHA-256 of its own content (``meta_sha256``, over the JSON with
sorted keys and that key left out). A version whose files do not match is *damaged* and
nothing from it is used (:class:`DamagedBaseline`). Versions written before checksums
existed are *unchecked*: they load as before, and any file that cannot be read makes them
damaged too.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import tempfile
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from inspector.clock import iso_time
from inspector.core.baseline import Baseline
from inspector.core.calibration import Calibration, Threshold
from inspector.core.conditions import Conditions
from inspector.core.models import model_class
from inspector.core.persistence import Persistence
from inspector.core.regimes import Regimes
from inspector.errors import UsageError
from inspector.names import CAMERA_NAME_RULE, is_camera_name

#: Files of a version written by the store itself; the others are the model's.
_STORE_FILES = {"baseline.json", "calibration.npz", "conditions.npz", "regimes.npz"}
_VERSION_RE = re.compile(r"^v(\d+)$")


def check_camera_name(name: str) -> str:
    """Camera names become folder names: refuse ones that could escape the store or that no
    camera folder can have (:func:`inspector.names.is_camera_name`)."""
    if not is_camera_name(name):
        raise UsageError(f"invalid camera name {name!r} ({CAMERA_NAME_RULE})")
    return name


def write_atomic(path: Path, data: str | bytes) -> None:
    """Write a file atomically: a reader sees the old content or the new, never half."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=path.suffix)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data.encode("utf-8") if isinstance(data, str) else data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_json(path: Path, data: Any) -> None:
    """Write JSON atomically (a reader never sees half a file)."""
    write_atomic(path, json.dumps(data, indent=2, default=str) + "\n")


def file_digest(path: Path) -> dict[str, Any]:
    """SHA-256 (hex) and size in bytes of a file, as recorded in ``baseline.json``."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 20):
            h.update(chunk)
            size += len(chunk)
    return {"sha256": h.hexdigest(), "bytes": size}


def _meta_digest(meta: dict[str, Any]) -> str:
    body = {k: v for k, v in meta.items() if k != "meta_sha256"}
    text = json.dumps(body, sort_keys=True, default=str, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


@dataclass
class VersionFacts:
    """What ``learn`` records about a version beside the baseline itself."""

    created: datetime
    frames: int
    frames_skipped: int
    first_frame_time: datetime
    last_frame_time: datetime
    #: Settings the version was learnt with, by config section.
    settings: dict[str, Any]
    text_boxes: list = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    #: Added as they are (e.g. how many frames came from review).
    extra: dict[str, Any] = field(default_factory=dict)


def describe(baseline: Baseline, facts: VersionFacts, inspector_version: str) -> dict[str, Any]:
    """The ``baseline.json`` content of a baseline about to be saved (without the file
    checksums, which :meth:`Store.save` adds)."""
    return {
        "camera": baseline.camera,
        "created": iso_time(facts.created),
        "model": baseline.model.kind,
        "model_params": baseline.model.get_params(),
        "model_learned": baseline.model.learned(),
        "frames": facts.frames,
        "frames_skipped": facts.frames_skipped,
        "calibration_frames": int(len(baseline.calibration.scores)),
        "first_frame_time": facts.first_frame_time.isoformat(),
        "last_frame_time": facts.last_frame_time.isoformat(),
        "source_size": list(baseline.source_size),
        "working_size": list(baseline.size),
        "settings": facts.settings,
        "threshold": baseline.threshold.to_dict(),
        "text_boxes": [list(b) for b in facts.text_boxes],
        "warnings": list(facts.warnings),
        "inspector_version": inspector_version,
        **facts.extra,
    }


@dataclass(frozen=True)
class VersionCheck:
    """What the checksums say about one version.

    ``state`` is ``ok`` (every file matches), ``unchecked`` (saved before checksums were
    recorded; ``problem`` empty) or ``damaged`` (``problem`` names the file and what is
    wrong, e.g. ``ppca.npz: checksum mismatch``).
    """

    camera: str
    version: str
    state: str
    problem: str = ""

    @property
    def damaged(self) -> bool:
        return self.state == "damaged"


class DamagedBaseline(LookupError):
    """The active (or asked-for) version of a camera is damaged: nothing of it is used."""

    def __init__(self, check: VersionCheck, advice: str = ""):
        self.check = check
        self.advice = advice
        super().__init__(f"baseline {check.camera} {check.version} is damaged "
                         f"({check.problem})")

    def __reduce__(self):  # travels between processes (cluster workers) whole
        return (DamagedBaseline, (self.check, self.advice))

    @property
    def note(self) -> str:
        """What is wrong and what to do, as a scan's summary and a watch's log name it."""
        return f"{self}: {self.advice}"


@dataclass(frozen=True)
class VersionInfo:
    """A version as listed by ``inspector baselines`` (read from its ``baseline.json``)."""

    version: str
    created: str
    model: str
    frames: int
    first: str
    last: str
    threshold: float
    #: False-alarm rate guaranteed by the calibration frames.
    false_alarm_rate: float
    false_alarms_added: int
    #: The rate a tail fit extrapolated the threshold to, beyond the guarantee (or None).
    extrapolated_target: float | None = None
    #: The confidence of the extrapolated threshold under its tail fit (0: not recorded).
    extrapolated_confidence: float = 0.0
    #: Share of the view the version does not look at (nan: learnt before it was recorded).
    masked: float = float("nan")
    #: Burned-in text boxes masked, [x0, y0, x1, y1] in frame pixels.
    text_boxes: list = field(default_factory=list)


class Store:
    """Baselines of all cameras under one folder.

    Parameters
    ----------
    root : Path
    """

    def __init__(self, root: Path | str):
        self.root = Path(root)

    @property
    def database(self) -> Path:
        """The SQLite file of the store (frame ledger, review labels)."""
        return self.root / "inspector.sqlite"

    def cameras(self) -> list[str]:
        """Cameras that have at least one baseline version."""
        if not self.root.is_dir():
            return []
        return sorted(p.name for p in self.root.iterdir()
                      if p.is_dir() and is_camera_name(p.name) and self.versions(p.name))

    def versions(self, camera: str) -> list[str]:
        """Version ids of a camera, oldest first (damaged ones included: a version folder
        appears only once complete, see :meth:`save`)."""
        folder = self.root / check_camera_name(camera)
        if not folder.is_dir():
            return []
        found = [(int(m.group(1)), p.name) for p in folder.iterdir()
                 if (m := _VERSION_RE.match(p.name)) and p.is_dir()]
        return [name for _, name in sorted(found)]

    def leftovers(self, camera: str) -> list[Path]:
        """Unfinished version folders and temporary files left by an interrupted ``learn``
        (never listed as versions, never used; safe to delete)."""
        folder = self.root / check_camera_name(camera)
        if not folder.is_dir():
            return []
        return sorted(p for p in folder.iterdir()
                      if p.name.startswith(".new-") or p.name.startswith(".tmp-"))

    def active_version(self, camera: str) -> str | None:
        path = self.root / check_camera_name(camera) / "active.json"
        try:
            return json.loads(path.read_text(encoding="utf-8"))["version"]
        except (OSError, ValueError, KeyError, TypeError):
            return None

    def metadata(self, camera: str, version: str) -> dict[str, Any]:
        """The version's ``baseline.json`` as saved (raises OSError or ValueError when it
        is missing or not JSON)."""
        path = self._version_dir(camera, version) / "baseline.json"
        return json.loads(path.read_text(encoding="utf-8"))

    def info(self, camera: str, version: str) -> VersionInfo:
        """The facts ``inspector baselines`` lists about a version."""
        m = self.metadata(camera, version)
        t = m.get("threshold", {})
        try:
            th = Threshold.from_dict(t)
        except (KeyError, TypeError, ValueError):
            th = None
        return VersionInfo(version=version, created=m.get("created", ""),
                           model=m.get("model", ""), frames=m.get("frames", 0),
                           first=m.get("first_frame_time", ""),
                           last=m.get("last_frame_time", ""),
                           threshold=t.get("value", float("nan")),
                           false_alarm_rate=th.guaranteed if th else float("nan"),
                           false_alarms_added=m.get("false_alarm_frames", 0),
                           extrapolated_target=th.alpha if th and th.extrapolated else None,
                           extrapolated_confidence=th.confidence if th else 0.0,
                           masked=m.get("masked", {}).get("share", float("nan")),
                           text_boxes=m.get("text_boxes", []))

    def check(self, camera: str, version: str) -> VersionCheck:
        """Verify a version's files against the checksums in its ``baseline.json``."""
        folder = self._version_dir(camera, version)

        def damaged(problem: str) -> VersionCheck:
            return VersionCheck(camera, version, "damaged", problem)

        try:
            meta = json.loads((folder / "baseline.json").read_text(encoding="utf-8"))
        except FileNotFoundError:
            return damaged("baseline.json: missing")
        except (OSError, UnicodeDecodeError, ValueError):
            return damaged("baseline.json: not valid JSON")
        if not isinstance(meta, dict):
            return damaged("baseline.json: not a baseline description")
        files = meta.get("files")
        if files is None or "meta_sha256" not in meta:
            return VersionCheck(camera, version, "unchecked")
        if meta["meta_sha256"] != _meta_digest(meta):
            return damaged("baseline.json: checksum mismatch")
        for name in sorted(files):
            want = files[name]
            try:
                got = file_digest(folder / name)
            except FileNotFoundError:
                return damaged(f"{name}: missing")
            except OSError as exc:
                return damaged(f"{name}: cannot be read ({exc.strerror or exc})")
            if isinstance(want.get("bytes"), int) and got["bytes"] < want["bytes"]:
                return damaged(f"{name}: cut short ({got['bytes']} of {want['bytes']} bytes)")
            if got["bytes"] != want.get("bytes"):
                return damaged(f"{name}: {got['bytes']} bytes, {want.get('bytes')} recorded")
            if got["sha256"] != want.get("sha256"):
                return damaged(f"{name}: checksum mismatch")
        return VersionCheck(camera, version, "ok")

    def good_versions(self, camera: str) -> list[str]:
        """Versions that are not damaged, oldest first."""
        return [v for v in self.versions(camera) if not self.check(camera, v).damaged]

    def advice(self, camera: str, version: str) -> str:
        """What to do about a damaged version: activate a good one, or learn again."""
        good = [v for v in self.good_versions(camera) if v != version]
        if good:
            return (f"activate a good version ('inspector baselines {camera} --activate "
                    f"{good[-1]}') or learn again")
        return f"learn camera {camera} again ('inspector learn')"

    def check_activatable(self, camera: str, version: str) -> None:
        """Raise a one-line UsageError unless ``version`` exists and is not damaged."""
        if version not in self.versions(camera):
            known = ", ".join(self.versions(camera)) or "none"
            raise UsageError(f"camera {camera!r} has no baseline version {version!r} "
                             f"(versions: {known})")
        check = self.check(camera, version)
        if check.damaged:
            raise UsageError(f"{DamagedBaseline(check)}; not activated: "
                             f"{self.advice(camera, version)}")

    def activate(self, camera: str, version: str) -> None:
        """Make ``version`` the camera's active baseline (also for rollback); a damaged
        version is refused."""
        self.check_activatable(camera, version)
        write_json(self.root / camera / "active.json", {"version": version})

    def verify(self, camera: str, version: str) -> VersionCheck:
        """:meth:`check`, and for a version saved before checksums were recorded, a full
        load: a file that cannot be read makes it damaged too (``store check``)."""
        check = self.check(camera, version)
        if check.state != "unchecked":
            return check
        try:
            self.load(camera, version)
        except DamagedBaseline as exc:
            return exc.check
        except LookupError as exc:
            return VersionCheck(camera, version, "damaged", str(exc))
        return check

    def load(self, camera: str, version: str | None = None) -> Baseline:
        """Load a camera's baseline (the active one by default), after checking its files.

        Raises
        ------
        LookupError
            ``no baseline for camera X`` when the camera has none.
        DamagedBaseline
            (a LookupError) when the version fails its checksums or a file cannot be read.
        """
        version = version or self.active_version(camera)
        if version is None or version not in self.versions(camera):
            raise LookupError(f"no baseline for camera {camera}")
        check = self.check(camera, version)
        if check.damaged:
            raise DamagedBaseline(check, self.advice(camera, version))
        folder = self._version_dir(camera, version)
        reading = "baseline.json"
        try:
            meta = self.metadata(camera, version)
            reading = ", ".join(sorted(p.name for p in folder.iterdir()
                                       if p.name not in _STORE_FILES)) or "model files"
            model = model_class(meta["model"]).load(folder, meta["model_params"])
            reading = "calibration.npz"
            with np.load(folder / "calibration.npz", allow_pickle=False) as z:
                arrays = {k: z[k] for k in ("center", "scale", "calibration_scores")}
                mask = z["mask"] if "mask" in z.files else None
                persistence = (Persistence.from_saved(
                    meta["persistence"], z["persistence_scores"],
                    z["persistence_start_scores"] if "persistence_start_scores" in z.files
                    else None,
                    z["persistence_normal"] if "persistence_normal" in z.files else None)
                               if meta.get("persistence") and "persistence_scores" in z.files
                               else None)
            reading = "baseline.json"
            calibration = Calibration(arrays["center"], arrays["scale"],
                                      arrays["calibration_scores"],
                                      Threshold.from_dict(meta["threshold"]))
            conditions = None
            if "conditions" in meta and (folder / "conditions.npz").is_file():
                reading = "conditions.npz"
                with np.load(folder / "conditions.npz", allow_pickle=False) as z:
                    conditions = Conditions.from_saved(meta["conditions"],
                                                       {k: z[k] for k in z.files})
            regimes = None
            if meta.get("regimes") and (folder / "regimes.npz").is_file():
                reading = "regimes.npz"
                with np.load(folder / "regimes.npz", allow_pickle=False) as z:
                    regimes = Regimes.from_saved(meta["regimes"], {k: z[k] for k in z.files})
            reading = "baseline.json"
            size = tuple(meta["working_size"])
            source_size = tuple(meta["source_size"])
        except ImportError:
            raise
        except Exception as exc:  # noqa: BLE001 - any unreadable file makes it damaged
            check = VersionCheck(camera, version, "damaged",
                                 f"{reading}: cannot be read ({type(exc).__name__})")
            raise DamagedBaseline(check, self.advice(camera, version)) from None
        return Baseline(camera=camera, version=version, model=model, calibration=calibration,
                        size=size, source_size=source_size,
                        mask=mask, meta=meta, conditions=conditions, regimes=regimes,
                        persistence=persistence)

    def save(self, baseline: Baseline, activate: bool = True) -> str:
        """Write ``baseline`` as the camera's next version; returns the version id.

        ``baseline.meta`` (see :func:`describe`) gets the version, the checksums and
        sizes of every file written (``files``) and its own checksum. The version folder
        is written under a temporary name, its files flushed to disk, and renamed into
        place, so a half-written version is never listed.
        """
        camera = check_camera_name(baseline.camera)
        folder = self.root / camera
        folder.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(dir=folder, prefix=".new-"))
        try:
            baseline.model.save(tmp)
            c = baseline.calibration
            arrays = {"center": c.center, "scale": c.scale, "calibration_scores": c.scores}
            if baseline.mask is not None:
                arrays["mask"] = baseline.mask
            if baseline.persistence is not None:
                arrays["persistence_scores"] = baseline.persistence.calibration_scores
                if baseline.persistence.start_scores is not None:
                    arrays["persistence_start_scores"] = baseline.persistence.start_scores
                if baseline.persistence.normal is not None:
                    arrays["persistence_normal"] = baseline.persistence.normal
                baseline.meta["persistence"] = baseline.persistence.to_json()
            np.savez_compressed(tmp / "calibration.npz", **arrays)
            if baseline.conditions is not None:
                np.savez_compressed(tmp / "conditions.npz", **baseline.conditions.arrays())
                baseline.meta["conditions"] = baseline.conditions.to_json()
            if baseline.regimes is not None:
                np.savez_compressed(tmp / "regimes.npz", **baseline.regimes.arrays())
                baseline.meta["regimes"] = baseline.regimes.to_json()
            files = {}
            for p in sorted(tmp.iterdir()):
                if p.is_file() and p.name != "baseline.json":
                    files[p.name] = file_digest(p)
                    _flush(p)
            while True:
                existing = [int(_VERSION_RE.match(v).group(1)) for v in self.versions(camera)]
                version = f"v{max(existing, default=0) + 1}"
                baseline.version = version
                baseline.meta["version"] = version
                baseline.meta["files"] = files
                # the checksum is of the JSON as it will be read back
                baseline.meta = json.loads(json.dumps(baseline.meta, default=str))
                baseline.meta["meta_sha256"] = _meta_digest(baseline.meta)
                write_json(tmp / "baseline.json", baseline.meta)
                _flush(tmp / "baseline.json")
                try:
                    os.rename(tmp, folder / version)
                    break
                except OSError:  # another learn took that number first
                    if not (folder / version).exists():
                        raise
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        if activate:
            self.activate(camera, version)
        return version

    def _version_dir(self, camera: str, version: str) -> Path:
        if not _VERSION_RE.match(version or ""):
            raise UsageError(f"invalid baseline version {version!r} (expected v1, v2, ...)")
        return self.root / check_camera_name(camera) / version


def _flush(path: Path) -> None:
    """Make sure a written file is on disk before the version is renamed into place."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
