"""Shared helpers for tests: small frames on disk and a small-resolution config."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import cv2
import numpy as np
import pytest


def write_frames(folder: Path, images, start: datetime | None = None, step_s: int = 60,
                 prefix: str = "cam", ext: str = ".jpg") -> list[Path]:
    """Write RGB uint8 frames with the capture time in the file name."""
    folder.mkdir(parents=True, exist_ok=True)
    start = start or datetime(2026, 11, 20, 8, 0, 0)
    paths = []
    for i, img in enumerate(images):
        t = start + timedelta(seconds=i * step_s)
        p = folder / f"{prefix}_{t:%Y%m%d_%H%M%S}{ext}"
        cv2.imwrite(str(p), np.ascontiguousarray(img[..., ::-1]))
        paths.append(p)
    return paths


def noisy_copies(base: np.ndarray, n: int, rng: np.random.Generator, noise: float = 3.0,
                 gain: float = 0.02) -> np.ndarray:
    """n frames of a fixed scene: a small global gain change and sensor noise each."""
    out = np.empty((n,) + base.shape, np.uint8)
    for i in range(n):
        g = 1.0 + gain * rng.standard_normal()
        out[i] = np.clip(base * g + rng.normal(0, noise, base.shape), 0, 255)
    return out


@pytest.fixture
def small_config(tmp_path: Path) -> Path:
    """A config for fast tests: a 96-pixel working resolution and three time blocks."""
    path = tmp_path / "small.toml"
    path.write_text('[frames]\nlong_side = 96\n\n[calibration]\nfolds = 3\n', encoding="utf-8")
    return path
