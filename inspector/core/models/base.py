"""The interface every density model follows, and the frame source models fit from.

A model has settings in its constructor, learned state after :meth:`DensityModel.fit`,
and turns frames into a raw anomaly map: negative log-likelihood in nats per map cell
(higher = more unusual). Standardising maps, frame scores, thresholds and p-values are
the same for every model and live in :mod:`inspector.core.scoring` and
:mod:`inspector.core.calibration`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar, Protocol

import numpy as np

from inspector.core.estimator import Estimator


class FrameSource(Protocol):
    """The normal frames of one camera, decoded on demand, in capture-time order.

    Attributes
    ----------
    blocks : ndarray, shape (N,), int
        Time block (0 .. K-1) of each frame; consecutive frames share a block.
    size : (int, int)
        Working (width, height) of every frame.
    """

    blocks: np.ndarray
    size: tuple[int, int]

    def __len__(self) -> int: ...

    def batches(self, indices: Sequence[int], batch_size: int = 64
                ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """Yield ``(index, images)``: positions (b,) int and RGB frames (b, H, W, 3) uint8.

        Frames that fail to decode are left out of the batches (and recorded by the source).
        """
        ...

    # A source that records what it sees (frames skipped, notes) and may be read in other
    # processes (a model's ``fit(..., pool=...)``) also has ``spawn()``: a copy with empty
    # records; ``collected()``: its records, picklable; ``absorb(record)``: add a copy's.


@dataclass
class HeldOut:
    """Raw anomaly maps of normal frames, each from a model that did not see that frame
    nor (for the promise to hold under drift) any frame after it.

    Attributes
    ----------
    index : ndarray, shape (m,), int
        Positions in the frame source.
    maps : ndarray, shape (m, h, w), float32
    """

    index: np.ndarray
    maps: np.ndarray


class DensityModel(Estimator, ABC):
    """A density over a camera's frames, scored as a negative log-likelihood map.

    Settings are the constructor's keyword arguments, JSON-ready (``get_params`` and
    ``__repr__`` come from :class:`~inspector.core.estimator.Estimator`).
    """

    #: Registry name, also stored in the baseline metadata.
    kind: ClassVar[str]

    @abstractmethod
    def fit(self, source: FrameSource, mask: np.ndarray | None = None) -> HeldOut:
        """Fit on all frames of ``source``; return held-out raw maps for calibration.

        Parameters
        ----------
        source : FrameSource
        mask : ndarray, shape (H, W), bool, optional
            True where pixels are ignored: they are left out of the likelihood.
        """

    @abstractmethod
    def score_maps(self, images: np.ndarray, noise: np.ndarray | None = None) -> np.ndarray:
        """Raw anomaly maps, shape (n, h, w) float32, of RGB frames (n, H, W, 3) uint8.

        ``noise``: shape (n,), the factor >= 1 by which each frame's noise variance exceeds
        what the model learnt (:meth:`~inspector.core.conditions.Conditions.noise_scale`);
        the model's noise variance is multiplied by it in the likelihood, whose
        normalising term is kept (see :func:`~inspector.core.models.ppca.ppca_nll`).
        """

    @abstractmethod
    def expected(self, images: np.ndarray) -> np.ndarray:
        """What the model expected to see: (n, H, W, 3) uint8, for reviewers."""

    @abstractmethod
    def learned(self) -> dict[str, Any]:
        """JSON-ready facts learned by ``fit`` worth showing (latent size, epochs, ...)."""

    @abstractmethod
    def save(self, directory: Path) -> None:
        """Write learned state into ``directory`` (arrays in .npz or torch weights; no pickle)."""

    @classmethod
    @abstractmethod
    def load(cls, directory: Path, params: dict[str, Any]) -> "DensityModel":
        """Rebuild a fitted model from ``save``'s files and ``get_params()``."""


class ArraySource:
    """A :class:`FrameSource` over frames already in memory (tests, small sets).

    Parameters
    ----------
    images : ndarray, shape (N, H, W, 3), uint8
    blocks : ndarray, shape (N,), int, optional
        Time blocks; by default ``folds`` contiguous blocks of equal size.
    folds : int
    """

    def __init__(self, images: np.ndarray, blocks: np.ndarray | None = None, folds: int = 5):
        self.images = np.asarray(images)
        if self.images.ndim != 4 or self.images.shape[-1] != 3 or self.images.dtype != np.uint8:
            raise ValueError(f"expected (N, H, W, 3) uint8, got {self.images.shape} "
                             f"{self.images.dtype}")
        n = len(self.images)
        self.blocks = (np.asarray(blocks, dtype=int) if blocks is not None
                       else (np.arange(n) * folds) // max(n, 1))
        self.size = (self.images.shape[2], self.images.shape[1])

    def __len__(self) -> int:
        return len(self.images)

    def batches(self, indices: Sequence[int], batch_size: int = 64
                ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        indices = np.asarray(indices, dtype=int)
        for start in range(0, len(indices), batch_size):
            idx = indices[start:start + batch_size]
            yield idx, self.images[idx]
