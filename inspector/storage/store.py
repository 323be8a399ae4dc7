"""The baseline store: every version of every camera's baseline, on disk, without pickle.

Layout::

    STORE/<camera>/<version>/baseline.json   metadata and settings
    STORE/<camera>/<version>/calibration.npz standardisation, calibration scores, mask
    STORE/<camera>/<version>/conditions.npz  reference frame and health statistics
    STORE/<camera>/<version>/regimes.npz     per-regime standardisation and calibration
    STORE/<camera>/<version>/<model files>   e.g. ppca.npz or vae.pt
    STORE/<camera>/active.json               {"version": "v3"}

Versions are ``v1``, ``v2``, ... per camera; ``learn`` adds one and activates it, older
ones stay for comparison and rollback.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from inspector.core.baseline import Baseline
from inspector.core.calibration import Threshold
from inspector.core.conditions import Conditions
from inspector.core.models import model_class
from inspector.core.regimes import Regimes
from inspector.errors import UsageError

_VERSION_RE = re.compile(r"^v(\d+)$")
_NAME_RE = re.compile(r"^[^/\\\x00]+$")


def check_camera_name(name: str) -> str:
    """Camera names become folder names: refuse ones that could escape the store."""
    if not name or not _NAME_RE.match(name) or name in (".", "..") or name.startswith("."):
        raise UsageError(f"invalid camera name {name!r}")
    return name


def write_json(path: Path, data: Any) -> None:
    """Write JSON atomically (a reader never sees half a file)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=".json")
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=2, default=str)
        fh.write("\n")
    os.replace(tmp, path)


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
                      if p.is_dir() and not p.name.startswith(".") and self.versions(p.name))

    def versions(self, camera: str) -> list[str]:
        """Version ids of a camera, oldest first."""
        folder = self.root / check_camera_name(camera)
        if not folder.is_dir():
            return []
        found = [(int(m.group(1)), p.name) for p in folder.iterdir()
                 if (m := _VERSION_RE.match(p.name)) and (p / "baseline.json").is_file()]
        return [name for _, name in sorted(found)]

    def active_version(self, camera: str) -> str | None:
        path = self.root / check_camera_name(camera) / "active.json"
        try:
            return json.loads(path.read_text(encoding="utf-8"))["version"]
        except (OSError, ValueError, KeyError, TypeError):
            return None

    def metadata(self, camera: str, version: str) -> dict[str, Any]:
        path = self._version_dir(camera, version) / "baseline.json"
        return json.loads(path.read_text(encoding="utf-8"))

    def activate(self, camera: str, version: str) -> None:
        """Make ``version`` the camera's active baseline (also for rollback)."""
        if version not in self.versions(camera):
            known = ", ".join(self.versions(camera)) or "none"
            raise UsageError(f"camera {camera!r} has no baseline version {version!r} "
                             f"(versions: {known})")
        write_json(self.root / camera / "active.json", {"version": version})

    def load(self, camera: str, version: str | None = None) -> Baseline:
        """Load a camera's baseline (the active one by default).

        Raises
        ------
        LookupError
            ``no baseline for camera X`` when the camera has none.
        """
        version = version or self.active_version(camera)
        if version is None or version not in self.versions(camera):
            raise LookupError(f"no baseline for camera {camera}")
        folder = self._version_dir(camera, version)
        meta = json.loads((folder / "baseline.json").read_text(encoding="utf-8"))
        model = model_class(meta["model"]).load(folder, meta["model_params"])
        with np.load(folder / "calibration.npz", allow_pickle=False) as z:
            center, scale = z["center"], z["scale"]
            cal = z["calibration_scores"]
            mask = z["mask"] if "mask" in z.files else None
        t = meta["threshold"]
        threshold = Threshold(t["value"], t["alpha"], t["promised"], t["n"], t["frames_short"],
                              t.get("method", "conformal"))
        conditions = None
        if "conditions" in meta and (folder / "conditions.npz").is_file():
            with np.load(folder / "conditions.npz", allow_pickle=False) as z:
                conditions = Conditions.from_saved(meta["conditions"],
                                                   {k: z[k] for k in z.files})
        regimes = None
        if meta.get("regimes") and (folder / "regimes.npz").is_file():
            with np.load(folder / "regimes.npz", allow_pickle=False) as z:
                regimes = Regimes.from_saved(meta["regimes"], {k: z[k] for k in z.files})
        return Baseline(camera=camera, version=version, model=model, center=center,
                        scale=scale, calibration_scores=cal, threshold=threshold,
                        size=tuple(meta["working_size"]), source_size=tuple(meta["source_size"]),
                        mask=mask, meta=meta, conditions=conditions, regimes=regimes)

    def save(self, baseline: Baseline, activate: bool = True) -> str:
        """Write ``baseline`` as the camera's next version; returns the version id.

        The version folder is written under a temporary name and renamed into place, so a
        half-written version is never listed.
        """
        camera = check_camera_name(baseline.camera)
        folder = self.root / camera
        folder.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(dir=folder, prefix=".new-"))
        try:
            baseline.model.save(tmp)
            arrays = {"center": baseline.center, "scale": baseline.scale,
                      "calibration_scores": baseline.calibration_scores}
            if baseline.mask is not None:
                arrays["mask"] = baseline.mask
            np.savez_compressed(tmp / "calibration.npz", **arrays)
            if baseline.conditions is not None:
                np.savez_compressed(tmp / "conditions.npz", **baseline.conditions.arrays())
                baseline.meta["conditions"] = baseline.conditions.to_json()
            if baseline.regimes is not None:
                np.savez_compressed(tmp / "regimes.npz", **baseline.regimes.arrays())
                baseline.meta["regimes"] = baseline.regimes.to_json()
            while True:
                existing = [int(_VERSION_RE.match(v).group(1)) for v in self.versions(camera)]
                version = f"v{max(existing, default=0) + 1}"
                baseline.version = version
                baseline.meta["version"] = version
                write_json(tmp / "baseline.json", baseline.meta)
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
