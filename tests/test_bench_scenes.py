"""Smoke run of the scene bench (bench/scenes.py --small): it renders, learns, scans and
prints its table."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "bench"))

import scenes  # noqa: E402


def test_scene_bench_small_run():
    out = subprocess.run([sys.executable, str(ROOT / "bench" / "scenes.py"), "--small"],
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "pooled" in out.stdout and "spill" in out.stdout


def test_pro_of_a_perfect_and_a_blind_map():
    # PRO (Bergmann et al., IJCV 2021): a map that is high exactly on the regions scores
    # 1; a constant map scores 0 (no region pixel is above any threshold that keeps the
    # false-positive rate at or below 0.3).
    masks = np.zeros((2, 20, 20), bool)
    masks[0, 2:6, 2:6] = True
    masks[1, 10:18, 5:9] = True
    assert scenes.pro_score(masks.astype(float), masks) == 1.0
    assert scenes.pro_score(np.zeros((2, 20, 20)), masks) == 0.0
