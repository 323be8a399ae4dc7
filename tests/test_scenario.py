"""The synthetic Larkspur Parcel Co. scenario: layout, ground truth, determinism."""

from __future__ import annotations

import re
from datetime import datetime
from pathlib import Path

import cv2
import numpy as np
import pytest

from inspector.demo.scenario import CAMERAS, INCIDENTS, Scenario, generate, load_truth
from inspector.errors import UsageError

SIZE = (320, 180)
NAME = re.compile(r"^(dock|aisle)_(\d{8}_\d{6})\.jpg$")


@pytest.fixture(scope="module")
def scenario(tmp_path_factory) -> Scenario:
    root = tmp_path_factory.mktemp("scenario")
    return generate(root, seed=7, normal_per_camera=32, new_per_camera=12,
                    incident_fraction=0.5, size=SIZE)


def _files(folder: Path) -> list[str]:
    return sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file())


def test_layout_names_and_sizes(scenario):
    assert scenario.normal == scenario.root / "normal"
    assert scenario.new == scenario.root / "new"
    for folder, per_camera in ((scenario.normal, 32), (scenario.new, 12)):
        for camera in CAMERAS:
            names = sorted(p.name for p in (folder / camera).iterdir())
            assert len(names) == per_camera
            for name in names:
                match = NAME.match(name)
                assert match and match.group(1) == camera
            img = cv2.imread(str(folder / camera / names[0]))
            assert img.shape == (SIZE[1], SIZE[0], 3)


def test_timestamps_parse_and_scan_day_is_later(scenario):
    def times(folder):
        return [datetime.strptime(NAME.match(p.name).group(2), "%Y%m%d_%H%M%S")
                for p in folder.rglob("*.jpg")]

    normal, new = times(scenario.normal), times(scenario.new)
    assert len({t.date() for t in normal}) >= 3
    assert max(normal) < min(new)


def test_truth_matches_new_frames_and_masks(scenario):
    rows = load_truth(scenario)
    assert rows == load_truth(scenario.root) == load_truth(scenario.truth)
    assert sorted(r[0] for r in rows) == _files(scenario.new)
    for frame, camera, incident in rows:
        assert frame.split("/")[0] == camera
        assert incident == "none" or incident in INCIDENTS
    incident_rows = [r for r in rows if r[2] != "none"]
    assert len(incident_rows) == 2 * 6
    assert {r[2] for r in incident_rows} == set(INCIDENTS)
    expected = sorted(f"{camera}/{Path(frame).stem}.png" for frame, camera, _ in incident_rows)
    assert _files(scenario.masks) == expected
    for frame, camera, _ in incident_rows:
        mask = cv2.imread(str(scenario.masks / camera / f"{Path(frame).stem}.png"),
                          cv2.IMREAD_UNCHANGED)
        assert mask.dtype == np.uint8 and mask.shape == (SIZE[1], SIZE[0])
        assert set(np.unique(mask)) <= {0, 255}
        assert 0.002 < (mask > 0).mean() < 0.3


def test_dock_brightness_follows_the_day(scenario):
    means = {}
    for path in sorted((scenario.normal / "dock").iterdir()):
        stamp = datetime.strptime(NAME.match(path.name).group(2), "%Y%m%d_%H%M%S")
        means[stamp] = float(cv2.imread(str(path), cv2.IMREAD_GRAYSCALE).mean())
    values = np.array(list(means.values()))
    assert values.max() - values.min() > 40
    late = [m for t, m in means.items() if t.hour >= 22]      # lamps off after ~21:50
    midday = [m for t, m in means.items() if 11 <= t.hour < 14]
    assert late and midday and max(late) < min(midday)


def test_same_seed_same_bytes_other_seed_differs(tmp_path):
    kwargs = dict(normal_per_camera=3, new_per_camera=4, incident_fraction=0.5, size=SIZE)
    a = generate(tmp_path / "a", seed=1, **kwargs)
    b = generate(tmp_path / "b", seed=1, **kwargs)
    c = generate(tmp_path / "c", seed=2, **kwargs)
    files = _files(a.root)
    assert files == _files(b.root)
    assert all((a.root / f).read_bytes() == (b.root / f).read_bytes() for f in files)
    assert files != _files(c.root) or any(
        (a.root / f).read_bytes() != (c.root / f).read_bytes() for f in files)


def test_rerun_replaces_and_foreign_data_is_kept(tmp_path):
    generate(tmp_path / "s", normal_per_camera=4, new_per_camera=0, size=SIZE)
    again = generate(tmp_path / "s", normal_per_camera=2, new_per_camera=0, size=SIZE)
    assert len(_files(again.normal)) == 2 * len(CAMERAS)
    assert load_truth(again) == []
    (tmp_path / "x" / "normal").mkdir(parents=True)
    (tmp_path / "x" / "normal" / "mine.jpg").write_bytes(b"not ours")
    with pytest.raises(UsageError):
        generate(tmp_path / "x", normal_per_camera=2, new_per_camera=0, size=SIZE)
    assert (tmp_path / "x" / "normal" / "mine.jpg").exists()


def test_nuisance_options(tmp_path):
    out = generate(tmp_path / "n", normal_per_camera=3, new_per_camera=2, incident_fraction=1.0,
                   size=SIZE, nuisance={"jitter_px": 2.0, "gain": 0.2})
    assert len(_files(out.masks)) == 2 * len(CAMERAS)
    with pytest.raises(UsageError):
        generate(tmp_path / "m", size=SIZE, nuisance={"blur": 1.0})
