"""Regenerate the committed sample frames in ``sample_frames/`` from the synthetic scenario.

Run from the repository root: ``python bench/make_sample_frames.py``. The frames are
invented (the fictional Larkspur Parcel Co. depot, see :mod:`inspector.demo.scenario`); the
script replaces ``sample_frames/normal``, ``sample_frames/new``, ``sample_frames/truth.csv``
and ``sample_frames/truth_masks`` and leaves ``sample_frames/README.md`` alone.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from inspector.demo.scenario import generate  # noqa: E402

SEED = 0
NORMAL_PER_CAMERA = 40
NEW_PER_CAMERA = 16
SIZE = (480, 270)


def main() -> None:
    target = ROOT / "sample_frames"
    target.mkdir(exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        made = generate(Path(tmp) / "scenario", seed=SEED, normal_per_camera=NORMAL_PER_CAMERA,
                        new_per_camera=NEW_PER_CAMERA, incident_fraction=0.5, size=SIZE)
        for name in ("normal", "new", "masks"):
            source = getattr(made, name)
            shutil.rmtree(target / source.name, ignore_errors=True)
            shutil.copytree(source, target / source.name)
        shutil.copyfile(made.truth, target / "truth.csv")
    total = sum(p.stat().st_size for p in target.rglob("*") if p.is_file())
    print(f"wrote {target} ({total / 1e6:.1f} MB)")


if __name__ == "__main__":
    main()
