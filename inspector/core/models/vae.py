"""A small convolutional variational autoencoder over the whole frame: the non-linear model.

Per-location PPCA (:mod:`inspector.core.models.ppca`) is exact but linear in each patch. This
model replaces it with a deep latent-variable density (Kingma & Welling 2014,
"Auto-encoding variational Bayes"; Rezende, Mohamed & Wierstra 2014) while keeping what
makes the per-location model right for a fixed camera.

Design: one fully convolutional VAE over the whole working-resolution frame, not a VAE
shared by patches.

* A camera never moves, so *where* something is matters as much as *what* it is. A
  patch VAE with weights shared across the frame learns generic image patches and happily
  reconstructs a parcel on a floor that never has parcels. Here the decoder works from a
  learned per-pixel background (initialised at the mean frame) and the Gaussian
  likelihood has a learned per-pixel, per-channel variance (a free parameter, not
  predicted from the code, so an anomaly cannot lower its own score by being declared
  noisy; floored at ``var_floor`` like PPCA's noise variance). The convolutions model
  the *departures* from the background, which are local and alike across the frame
  (lighting, shadows, people passing): the decoder predicts a per-pixel relative gain
  and an offset, ``mean = background + gain * (background - anchor) + offset``.
* The latent code is a spatial grid, ``latent`` channels per ``patch x patch`` block of
  the frame, plus ``global_latent`` values for the whole frame, all with standard normal
  priors. The global values carry what changes everywhere at once (daylight, exposure,
  colour temperature), which a local code would pay KL for in every cell; with the gain
  form above, a global lighting change is one uniform gain. Local evidence stays local
  (a latent cell has a bounded receptive field), so each latent cell's KL term is put
  back on the map where it came from and the global one is spread evenly: the frame's
  map sums to its reconstruction NLL at the posterior mean plus its KL (the negative
  ELBO with the mean code in place of the expectation). On the demo dock camera the global code raised image
  AUROC from 0.981 to 0.994 (240 frames, same seed).
* Running once over the whole frame shares all the convolution work between overlapping
  neighbourhoods, which is what makes CPU training and >= 50 frames/s scoring possible.

The likelihood is over the same values PPCA models: luminance at full resolution and the
two chroma planes at half resolution (JPEG 4:2:0, :func:`inspector.core.features.to_planes`).
Full-resolution luminance is folded into four half-resolution channels (a lossless
space-to-depth step), so the network runs at half resolution on 6 channels (4 without
colour). The frame is padded to a multiple of the latent cell; padding, and pixels under
the ignore mask, are left out of the likelihood (training loss and scores) and are set to
the background before the encoder sees them, so their values can never change a score.

Raw maps: the decoder's Gaussian negative log-likelihood of each pixel given the posterior
mean code, summed over ``stride x stride`` cells (the grid of
:func:`inspector.core.features.map_shape`), plus (``kl_in_map``) each latent cell's KL
divergence spread evenly over the map cells it covers. With ``iw_samples = K > 0`` the map
is the importance-weighted bound instead (Burda, Grosse & Salakhutdinov 2016): the frame
total ``-log (1/K) sum_k w_k`` is split exactly into cells as
``sum_k omega_k c_k(cell) + (log K - H(omega)) / cells``, where ``c_k`` is sample k's per-cell
share of ``-log w_k`` and ``omega`` the normalised weights. :meth:`FrameVAEModel.score_maps`
centres these per cell and scales them by the model's own early-stopping frames (the scale
of a VAE's likelihood depends on how far its training went, and calibration scores come
from several models of a forward chain; see below).

Held-out frames, by forward chaining over the time blocks (as PPCA): one training run over
a growing window of frames in time order. Each time block from the first one with at least
``calibrate_from`` of the frames before it is scored by the model as it stood after
learning the frames before that block, in time order ``train | gap | stop | gap | block``:
the latest ``stop`` share of its frames chose its stopping epoch, and a short gap separates
each part from the one before, so neighbouring near copies never straddle a boundary. The
final model, which scans, learns every frame the same way, going on from the last model of
the chain. So every calibration frame stands to its model where a scan frame stands to the
final model, which is what the threshold's promise needs when the scene drifts. Calibrating
instead on the latest fifth of the frames with a model whose training ended before them
(and scanning with that model) let scan frames, further from its training frames than the
calibration frames were, be flagged at 0.11 and 0.33 for alpha 0.05 and 0.1 on a slowly
drifting scene (bench/calibration.py, n = 300); forward chained, 0.017 and 0.048
(stationary: 0.044 and 0.094; n = 300, 8 seeds).

Training: Adam on the negative ELBO (one reparameterised sample, analytic KL) of the
training frames, at most ``steps`` batches for the first model of the chain and
``warm_steps * steps`` for each later one (so training time does not grow with the number
of frames), the per-pixel maps at 10 times the network's learning rate (see
:data:`MAP_LR_SCALE`), halving both after 2 epochs without progress; the optimiser's state
carries over from one model of the chain to the next. Each epoch the ELBO of the
early-stopping frames (fixed noise, so epochs compare fairly) is measured; the best weights
are kept (for a later model of the chain, its starting weights count as epoch 0) and
training stops after ``patience`` epochs without improvement. An epoch is one pass over the
training frames or ``steps / epochs`` batches, whichever is more: with epochs of a few
batches, the models of a 120-frame chain stopped after 64-112 of their 500-2,000 steps and
the demo dock camera's held-out ELBO was 3.19 nats per dimension; with ``steps`` bounding
them, 3.46, and pixel AUROC 0.960 -> 0.982 (bench/models.py --cameras dock --normal 120).
"""

from __future__ import annotations

import copy
import json
import math
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from tqdm import tqdm

from inspector.core.features import map_shape, to_planes
from inspector.core.models.base import DensityModel, FrameSource, HeldOut
from inspector.core.scoring import location_stats
from inspector.core.models.vae_net import (  # noqa: F401 (re-exported)
    LOG_2PI,
    FrameVAENet,
    _noise,
    _per_item,
    _torch_threads,
    elbo,
    gaussian_nll,
    iwae_bound,
    kl_standard_normal,
    log_weights,
)

#: Learning-rate multiplier of the per-pixel background and variance maps. Each of their
#: entries gets one gradient per frame and Adam moves it by about ``lr`` per step, so at the
#: network's rate they would need thousands of steps to leave their start values; at 10x
#: the held-out ELBO of the demo cameras reached in 1,200 steps what took 2,000+ before.
MAP_LR_SCALE = 10.0

# --- the model -----------------------------------------------------------------------------

class FrameVAEModel(DensityModel):
    """Convolutional VAE of the whole frame with a spatial latent grid (see module docs).

    Parameters
    ----------
    patch : int
        Side of the image area one latent cell describes, in working-resolution pixels;
        rounded down to a power of two, at least 4 (8 -> latent grid at 1/8 resolution).
    stride : int
        Map cell side in working-resolution pixels (even).
    colour : bool
        Luminance plus half-resolution chroma (True) or luminance only.
    latent : int
        Latent channels per latent cell; 0 means 8.
    global_latent : int
        Latent values describing the whole frame (lighting); 0 for none.
    width : int
        Convolution channels (the network's size).
    epochs : int
        Upper bound on training epochs between held-out checks; an epoch is one pass over
        the training frames, or ``steps / epochs`` batches if that is more (so ``steps``
        alone bounds training on small frame sets).
    steps : int
        Upper bound on optimiser steps (batches), whatever the number of frames: training
        cost is bounded by ``steps * batch_size`` frame passes.
    patience : int
        Epochs without a better held-out ELBO before training stops (the learning rate is
        halved after 2 such epochs).
    batch_size : int
    lr : float
        Adam learning rate.
    seed : int
        Seeds weight initialisation, shuffling and sampling.
    threads : int
        Torch CPU threads while fitting and scoring; 0 keeps torch's default. One by
        default: the convolutions here are small, and on a 2-core host shared with one
        other busy process two OpenMP threads ran a training step 1.5 to 4 times *slower*
        than one (each parallel region waits for the descheduled thread), while one thread
        already meets the speed targets.
    iw_samples : int
        0 scores with the posterior mean code; K > 0 with the importance-weighted bound
        of K samples (K decoder passes per frame).
    kl_in_map : bool
        Add each latent cell's KL to the map cells it covers (posterior-mean scoring).
    var_floor : float
        Lower bound on the decoder variance in squared [0, 1] units (as PPCA's).
    calibrate_from : float
        Time blocks are scored for calibration once the frames before them make at least
        this share of all frames (as :class:`~inspector.core.models.ppca.PatchPPCA` does):
        a model of fewer frames than the final one scores new frames higher than it would.
    stop : float
        Share of a model's frames (its latest, after a gap) on which its stopping epoch is
        chosen; not trained on.
    gap : float
        Share of the frames left out between training and early-stopping frames, and
        between a model's frames and the block it scores (at least one frame each), so
        neighbouring near copies never straddle them.
    warm_steps : float
        Each model of the forward chain after the first goes on from the one before for at
        most ``warm_steps * steps`` batches (see :meth:`fit`).
    max_frames : int
        Training frames kept in memory (as uint16 planes, 2 bytes per modelled value: 177 MB
        for 1,000 frames at 320x180); more are subsampled evenly in time. The frames the
        models stop early on and calibrate on (about 60% of all) are kept as well.

    Attributes
    ----------
    size_ : (int, int)
        Working (width, height) the model was fitted at.
    learned_ : dict
        Facts from training (epochs, best held-out ELBO, ...).
    """

    kind = "vae"

    def __init__(self, patch: int = 8, stride: int = 4, colour: bool = True, latent: int = 0,
                 width: int = 32, epochs: int = 100, steps: int = 2000, patience: int = 8,
                 batch_size: int = 8, lr: float = 2e-3, seed: int = 0, threads: int = 1,
                 iw_samples: int = 0, kl_in_map: bool = True, var_floor: float = 1e-4,
                 calibrate_from: float = 0.4, max_frames: int = 2000,
                 global_latent: int = 4, stop: float = 0.05, gap: float = 0.02,
                 warm_steps: float = 0.25):
        self.patch = patch
        self.stride = stride
        self.colour = colour
        self.latent = latent
        self.width = width
        self.epochs = epochs
        self.steps = steps
        self.patience = patience
        self.batch_size = batch_size
        self.lr = lr
        self.seed = seed
        self.threads = threads
        self.iw_samples = iw_samples
        self.kl_in_map = kl_in_map
        self.var_floor = var_floor
        self.calibrate_from = calibrate_from
        self.warm_steps = warm_steps
        self.stop = stop
        self.gap = gap
        self.max_frames = max_frames
        self.global_latent = global_latent

    # geometry

    def _geometry(self, size: tuple[int, int]) -> None:
        """Set the frame, padding, latent and map geometry for frames of ``size`` (w, h)."""
        if self.stride < 2 or self.stride % 2:
            raise ValueError(f"stride must be even, got {self.stride}")
        w, h = size
        if h % 2 or w % 2:
            raise ValueError(f"frame {w}x{h}: width and height must be even")
        cell = 1 << max(int(self.patch).bit_length() - 1, 2)  # power of two, >= 4
        self.cell_ = cell
        self.down_ = int(math.log2(cell // 2))
        f = cell // 2
        self.half_ = (h // 2, w // 2)
        self.padded_ = (-(-h // 2 // f) * f, -(-w // 2 // f) * f)
        self.latent_grid_ = (self.padded_[0] // f, self.padded_[1] // f)
        self.map_shape_ = map_shape(h, w, self.stride, self.stride)
        self.channels_ = 6 if self.colour else 4
        self.q_ = int(self.latent) if self.latent > 0 else 8
        k = self.stride // 2
        rows = (np.arange(self.map_shape_[0]) * k) // f
        cols = (np.arange(self.map_shape_[1]) * k) // f
        count = np.zeros(self.latent_grid_)
        np.add.at(count, (rows[:, None], cols[None, :]), 1.0)
        self._cell_rows = torch.as_tensor(rows)
        self._cell_cols = torch.as_tensor(cols)
        self._cell_share = torch.as_tensor(
            1.0 / count[rows[:, None], cols[None, :]], dtype=torch.float32)

    def _network(self) -> FrameVAENet:
        return FrameVAENet(self.channels_, self.padded_, self.q_, int(self.global_latent),
                        self.down_, self.width, self.var_floor)

    def _observed(self, mask: np.ndarray | None) -> np.ndarray:
        """Observed planes (C, Hp, Wp), float32 0/1: not masked and not padding."""
        c = self.channels_
        h2, w2 = self.half_
        obs = np.zeros((c,) + self.padded_, np.float32)
        if mask is None:
            obs[:, :h2, :w2] = 1.0
            return obs
        seen = ~np.asarray(mask, bool)
        if seen.shape != (2 * h2, 2 * w2):
            raise ValueError(f"mask shape {seen.shape} does not match the frames "
                             f"{(2 * h2, 2 * w2)}")
        blocks = seen.reshape(h2, 2, w2, 2).transpose(1, 3, 0, 2).reshape(4, h2, w2)
        obs[:4, :h2, :w2] = blocks
        if self.colour:
            obs[4:, :h2, :w2] = blocks.all(axis=0)[None]
        return obs

    def _planes(self, images: np.ndarray) -> torch.Tensor:
        """RGB frames (n, H, W, 3) uint8 -> padded half-resolution planes (n, C, Hp, Wp)."""
        images = np.asarray(images)
        if images.shape[1:3] != (2 * self.half_[0], 2 * self.half_[1]):
            raise ValueError(f"frames are {images.shape[2]}x{images.shape[1]}, the model was "
                             f"fitted at {self.size_[0]}x{self.size_[1]}")
        luma, chroma = to_planes(images, self.colour)
        n = len(luma)
        h2, w2 = self.half_
        parts = [luma.reshape(n, h2, 2, w2, 2).transpose(0, 2, 4, 1, 3).reshape(n, 4, h2, w2)]
        if chroma is not None:
            parts.append(chroma.transpose(0, 3, 1, 2))
        x = np.concatenate(parts, axis=1) if len(parts) > 1 else parts[0]
        ph, pw = self.padded_[0] - h2, self.padded_[1] - w2
        if ph or pw:
            x = np.pad(x, ((0, 0), (0, 0), (0, ph), (0, pw)), mode="edge")
        return torch.from_numpy(np.ascontiguousarray(x, dtype=np.float32))

    #: Planes are cached as uint16 multiples of 1/1020: luminance (k/255) and 2x2 chroma
    #: means (sum/1020) are both exact on that grid, at half the memory of float32.
    _QUANT = 1020.0

    def _pack(self, images: np.ndarray) -> np.ndarray:
        return (self._planes(images).numpy() * self._QUANT).round().astype(np.uint16)

    def _unpack(self, packed: np.ndarray) -> torch.Tensor:
        return torch.from_numpy(packed.astype(np.float32)).div_(self._QUANT)

    # fitting

    def fit(self, source: FrameSource, mask: np.ndarray | None = None) -> HeldOut:
        """Train on all frames; score each later time block with the model of the frames
        before it (forward chaining), as scan frames are scored by the final model.

        One training run over a growing window of frames in time order. For each time block
        ``k`` whose earlier frames make at least ``calibrate_from`` of all, the model is
        trained on the frames before block ``k`` (less a gap): all but their latest ``stop``
        share, after another gap, on which the stopping epoch is chosen (the first model
        from fresh weights for at most ``steps`` batches, each later one from the weights
        and optimiser state of the one before, for at most ``warm_steps * steps``). That
        model then scores block ``k`` for calibration. The final model, which scans, is
        trained the same way on every frame (the window ends a gap before the last frame).
        Every calibration frame thus stands to its model where a scan frame stands to the
        final model: after a gap, after the frames that chose the stopping epoch, after
        every training frame, by the same recipe. Scoring the latest frames with a model
        whose training ended earlier than the final model's let slow drift push scan scores
        above the calibration scores (bench/calibration.py).

        Returns
        -------
        HeldOut
            Raw maps of the frames of the calibration blocks, each from the model of the
            frames before its block.
        """
        started = time.perf_counter()
        self.size_ = tuple(int(v) for v in source.size)
        self._geometry(self.size_)
        n = len(source)
        obs = torch.from_numpy(self._observed(mask))
        if not obs.any():
            raise ValueError("the mask ignores every pixel")
        gap = max(1, int(round(self.gap * n)))
        stages = self._stages(np.asarray(source.blocks), gap)
        train_all = self._subsample(np.unique(np.concatenate(
            [self._split(np.arange(end), n)[0] for end, _ in stages])))
        plain_all = np.unique(np.concatenate(
            [np.r_[self._split(np.arange(end), n)[1], score] for end, score in stages]))
        train_pos, train_imgs = self._read(source, train_all)
        plain_pos, plain_imgs = self._read(source, plain_all)
        held_pos, held_maps, chain = [], [], []
        self._opt = None
        try:
            for end, score in stages:
                learn, stop = self._split(np.arange(end), n)
                tr = np.isin(train_pos, learn)
                stop = np.isin(plain_pos, stop)
                facts = self._train_stage(train_imgs[tr], plain_imgs[stop], obs)
                chain.append({k: facts[k] for k in ("train_frames", "stop_frames", "epochs",
                                                    "steps", "best_epoch")})
                sel = np.isin(plain_pos, score)
                if sel.any():
                    with _torch_threads(self.threads):
                        held_maps.append(self._standardised(
                            self._score_packed(plain_imgs[sel])))
                    held_pos.append(plain_pos[sel])
        finally:
            del self._opt
        if sum(len(p) for p in held_pos) < 2:
            raise ValueError("need at least 2 decodable calibration frames")
        self.learned_ = {
            "latent": self.q_, "global_latent": int(self.global_latent),
            "latent_cell": self.cell_, "latent_grid": list(self.latent_grid_),
            "heldout_frames": int(sum(len(p) for p in held_pos)), "gap_frames": 2 * gap,
            "chain": chain[:-1],
            "parameters": int(sum(p.numel() for p in self.net_.parameters())),
            "observed_dims": int(obs.sum()), "seconds": round(time.perf_counter() - started, 2),
            **facts,
        }
        return HeldOut(np.concatenate(held_pos), np.concatenate(held_maps))

    def _stages(self, blocks: np.ndarray, gap: int) -> list[tuple[int, np.ndarray]]:
        """The forward chain: ``(end, scored)`` per model, in order. The model learns (and
        stops early on) positions ``< end``; ``scored`` are the positions of the time block
        it calibrates on, which starts ``gap`` frames after ``end``. The last entry is the
        final model: every frame, nothing scored."""
        n = len(blocks)
        labels, block_of = np.unique(blocks, return_inverse=True)
        if len(labels) < 2:
            raise ValueError("need at least 2 time blocks to calibrate on frames that come "
                             "after the frames of their model")
        if np.any(np.diff(block_of) < 0):
            raise ValueError("time blocks must follow the frames' order")
        starts = np.searchsorted(block_of, np.arange(len(labels)))
        stages = []
        for k in range(1, len(labels)):
            if starts[k] < self.calibrate_from * n and k < len(labels) - 1:
                continue
            stages.append((int(starts[k]) - gap, np.flatnonzero(block_of == k)))
        stages.append((n - gap, np.zeros(0, int)))
        for end, _ in stages:
            self._split(np.arange(end), n)  # enough frames to train and stop early?
        return stages

    def _train_stage(self, train_imgs: np.ndarray, stop_imgs: np.ndarray, obs: torch.Tensor
                     ) -> dict[str, Any]:
        """Train ``net_`` on packed frames: from fresh weights (data-initialised) on the first
        call of a fit, from the current weights and optimiser state after that."""
        if len(train_imgs) < 2 or len(stop_imgs) < 1:
            raise ValueError(f"need at least 2 training and 1 early-stopping decodable "
                             f"frames, got {len(train_imgs)} and {len(stop_imgs)}")
        warm = self._opt is not None
        with _torch_threads(self.threads), torch.random.fork_rng(devices=[]):
            torch.manual_seed(self.seed)
            if not warm:
                self.net_ = self._network()
                self._init_from_data(train_imgs, obs)
                self._prepare_scoring()
            steps = max(1, int(round(self.steps * (self.warm_steps if warm else 1.0))))
            history = self._train(train_imgs, stop_imgs, obs, steps)
            self.net_.eval()
            self._set_map_scale(self._score_packed(stop_imgs))
        return {"train_frames": int(len(train_imgs)), "stop_frames": int(len(stop_imgs)),
                **history}

    def _split(self, positions: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Training and early-stopping positions, in time order: ``train | gap | stop``.

        The early-stopping ones are the latest ``stop`` share of the ``n`` frames of the fit,
        the gap ``gap`` of them (at least one frame each), whatever the model of the chain,
        so that every model's training frames end as far before the frames it scores;
        no early-stopping frame is a near copy of a training frame.
        """
        stop = max(1, int(round(self.stop * n)))
        gap = max(1, int(round(self.gap * n)))
        train = len(positions) - stop - gap
        if train < 2:
            raise ValueError(f"{len(positions)} frames are too few to train and stop early")
        return positions[:train], positions[len(positions) - stop:]

    def _subsample(self, idx: np.ndarray) -> np.ndarray:
        if len(idx) <= self.max_frames:
            return idx
        keep = np.linspace(0, len(idx) - 1, self.max_frames).round().astype(int)
        return idx[np.unique(keep)]

    def _read(self, source: FrameSource, idx: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Decodable positions and their packed planes (see :meth:`_pack`)."""
        pos, planes = [], []
        for p, images in source.batches(idx, 64):
            pos.append(np.asarray(p, int))
            planes.append(self._pack(images))
        if not pos:
            return np.zeros(0, int), np.zeros((0, self.channels_) + self.padded_, np.uint16)
        return np.concatenate(pos), np.concatenate(planes)

    def _init_from_data(self, images: np.ndarray, obs: torch.Tensor) -> None:
        """Background at the mean frame, decoder variance at each pixel's variance."""
        total = torch.zeros((self.channels_,) + self.padded_, dtype=torch.float64)
        square = torch.zeros_like(total)
        for start in range(0, len(images), 64):
            x = self._unpack(images[start:start + 64]).double()
            total += x.sum(0)
            square += (x ** 2).sum(0)
        n = len(images)
        mean = total / n
        var = (square / n - mean ** 2).clamp_min(0.0)
        with torch.no_grad():
            self.net_.center.copy_(mean.float())
            self.net_.observed.copy_(obs)
            self.net_.background.copy_(mean.float())
            excess = (var - self.var_floor).clamp_min(self.var_floor * 1e-2)
            self.net_.raw_logvar.copy_(torch.log(excess).float())

    def _train(self, train_imgs: np.ndarray, held_imgs: np.ndarray,
               obs: torch.Tensor, budget: int) -> dict[str, Any]:
        """At most ``budget`` optimiser steps on ``train_imgs``, keeping the weights of the
        epoch with the best ELBO on ``held_imgs`` (the starting weights count as epoch 0
        when training goes on from an earlier stage, see :meth:`fit`)."""
        net = self.net_
        dims = float(obs.sum())
        if getattr(self, "_opt", None) is None:
            maps = [net.background, net.raw_logvar]
            rest = [p for p in net.parameters() if all(p is not m for m in maps)]
            opt = torch.optim.Adam([{"params": rest},
                                    {"params": maps, "lr": self.lr * MAP_LR_SCALE}],
                                   lr=self.lr)
            plateau = torch.optim.lr_scheduler.ReduceLROnPlateau(opt, mode="max", factor=0.5,
                                                                 patience=2)
            best, best_state = -math.inf, None
        else:
            opt, plateau = self._opt
            best = self._heldout_elbo(held_imgs, obs)
            best_state = copy.deepcopy(net.state_dict())
        self._opt = (opt, plateau)
        rng = np.random.default_rng(self.seed)
        gen = torch.Generator().manual_seed(self.seed)
        best_epoch, stale, epoch, steps = 0, 0, 0, 0
        train_elbo = math.nan
        per_epoch = self._epoch_steps(len(train_imgs))
        bar = tqdm(range(1, self.epochs + 1), desc="vae", unit="epoch", leave=False,
                   file=sys.stderr, disable=not sys.stderr.isatty(), dynamic_ncols=True)
        batches = self._batches(rng, len(train_imgs))
        for epoch in bar:
            net.train()
            total, count = 0.0, 0
            for _ in range(per_epoch):
                if steps >= budget:
                    break
                steps += 1
                x = self._unpack(train_imgs[next(batches)])
                e = elbo(x, net.encode, net.decode, weight=obs, generator=gen)
                loss = -e.mean() / dims
                opt.zero_grad(set_to_none=True)
                loss.backward()
                opt.step()
                total += float(e.detach().sum())
                count += len(x)
            train_elbo = total / count
            held = self._heldout_elbo(held_imgs, obs)
            plateau.step(held)
            if held > best:
                best, best_epoch, stale = held, epoch, 0
                best_state = copy.deepcopy(net.state_dict())
            else:
                stale += 1
            bar.set_postfix_str(f"ELBO nats/frame: train {train_elbo:.1f}, held-out {held:.1f} "
                                f"(best {best:.1f} @ epoch {best_epoch}); step {steps}")
            if stale >= self.patience or steps >= budget:
                break
        bar.close()
        if best_state is not None:
            net.load_state_dict(best_state)
        return {"epochs": int(epoch), "steps": int(steps), "best_epoch": int(best_epoch),
                "best_heldout_elbo": round(float(best), 3),
                "best_heldout_elbo_per_dim": round(float(best) / dims, 5),
                "last_train_elbo": round(float(train_elbo), 3)}

    def _epoch_steps(self, frames: int) -> int:
        """Optimiser steps between two held-out checks: one pass over the ``frames``
        training frames, or ``steps / epochs`` batches if that is more. So ``steps`` alone
        bounds training however few the frames (with 100 epochs of a few batches each, the
        first models of the chain stopped far short of ``steps`` on small frame sets), and
        ``patience`` is counted in at least ``patience * steps / epochs`` steps rather than
        in a handful of noisy checks."""
        return max(-(-frames // self.batch_size), -(-self.steps // max(1, self.epochs)))

    def _batches(self, rng: np.random.Generator, frames: int):
        """Endless sorted index batches over ``frames`` training frames, reshuffled each
        pass (the last batch of a pass may be short)."""
        while True:
            order = rng.permutation(frames)
            for start in range(0, frames, self.batch_size):
                yield np.sort(order[start:start + self.batch_size])

    @torch.no_grad()
    def _heldout_elbo(self, images: np.ndarray, obs: torch.Tensor) -> float:
        """Mean ELBO per held-out frame, with the same noise every epoch."""
        self.net_.eval()
        gen = torch.Generator().manual_seed(self.seed + 1)
        total = 0.0
        for start in range(0, len(images), 32):
            x = self._unpack(images[start:start + 32])
            total += float(elbo(x, self.net_.encode, self.net_.decode, weight=obs,
                                generator=gen).sum())
        return total / len(images)

    # scoring

    def _to_cells(self, pixel_nll: torch.Tensor, code_term: torch.Tensor | None
                  ) -> torch.Tensor:
        """Per-plane NLL (n, C, Hp, Wp) and per-code-entry terms (n, code_size) -> cell maps.

        A local code entry's term goes to the map cells of its latent cell, a global one's
        is spread evenly over all cells that are not fully masked.
        """
        h2, w2 = self.half_
        per_pix = pixel_nll[:, :, :h2, :w2].sum(dim=1, keepdim=True)
        k = self.stride // 2
        cells = F.avg_pool2d(per_pix, k, k)[:, 0] * (k * k) if k > 1 else per_pix[:, 0]
        mh, mw = self.map_shape_
        cells = cells[:, :mh, :mw]
        if code_term is not None:
            local, glob = self.net_.split(code_term)
            spread = local.sum(1)[:, self._cell_rows][:, :, self._cell_cols]
            cells = cells + spread * self._cell_share
            if glob.shape[1]:
                cells = cells + (glob.sum(1) / self._live.sum().clamp_min(1.0))[:, None, None]
        return cells * self._live

    def _prepare_scoring(self) -> None:
        obs = self.net_.observed[None, :, :self.half_[0], :self.half_[1]].sum(1, keepdim=True)
        k = self.stride // 2
        seen = F.avg_pool2d(obs, k, k)[:, 0] if k > 1 else obs[:, 0]
        mh, mw = self.map_shape_
        self._live = (seen[0, :mh, :mw] > 0).float()

    @torch.no_grad()
    def _score_batch(self, x: torch.Tensor, gen: torch.Generator | None,
                     scale: torch.Tensor | None = None) -> torch.Tensor:
        """Raw NLL maps of a batch of planes; ``scale`` (n, 1, 1, 1): each frame's factor
        on the decoder's variance (see :meth:`score_maps`)."""
        net = self.net_
        obs = net.observed
        mu, logvar = net.encode(x)
        if self.iw_samples <= 0:
            mean, dec_logvar = net.decode(mu)
            kl = kl_standard_normal(mu, logvar) if self.kl_in_map else None
            return self._to_cells(gaussian_nll(x, mean, dec_logvar, obs, scale), kl)
        K = int(self.iw_samples)
        std = torch.exp(0.5 * logvar)
        shares, neg_logw = [], []
        noise = _noise((K,) + mu.shape, mu, gen)  # as log_weights draws it (K <= its chunk)
        for eps in noise:
            z = mu + std * eps
            mean, dec_logvar = net.decode(z)
            rec = gaussian_nll(x, mean, dec_logvar, obs, scale)
            ratio = 0.5 * (z ** 2 - logvar - eps ** 2)  # log q(z|x) - log p(z), per entry
            neg_logw.append(_per_item(rec) + _per_item(ratio))
            shares.append(self._to_cells(rec, ratio))
        neg = torch.stack(neg_logw)                      # (K, n): -log w_k
        omega = torch.softmax(-neg, dim=0)
        entropy = -(omega * torch.log(omega.clamp_min(1e-30))).sum(0)
        maps = (omega[:, :, None, None] * torch.stack(shares)).sum(0)
        rest = (math.log(K) - entropy) / self._live.sum().clamp_min(1.0)
        return maps + rest[:, None, None] * self._live

    def nll_maps(self, images: np.ndarray, noise: np.ndarray | None = None) -> np.ndarray:
        """Negative log-likelihood maps in nats per map cell, shape (n, h, w), float32.

        Fully masked cells score 0 (they carry no evidence). ``noise``: as in
        :meth:`score_maps`.
        """
        images = np.asarray(images)
        return self._score((self._planes(images[i:i + 32]) for i in range(0, len(images), 32)),
                           noise)

    def score_maps(self, images: np.ndarray, noise: np.ndarray | None = None) -> np.ndarray:
        """Raw anomaly maps, shape (n, h, w), float32: :meth:`nll_maps` less each cell's
        median over the model's own early-stopping frames, over one robust scale
        (``map_center_``, ``map_scale_``, see :meth:`_set_map_scale`).

        A VAE's likelihood scale depends on how far its training went, so each model of
        the forward chain (see :meth:`fit`) is put on the scale of the frames just before
        the ones it scores; the final model, on those just before the frames it scans.

        ``noise``: shape (n,), the factor >= 1 by which each frame's noise variance exceeds
        what the model learnt; the decoder's variance is multiplied by it in the squared
        term, its normalising term kept (:func:`gaussian_nll` with ``scale``).
        """
        return self._standardised(self.nll_maps(images, noise))

    def _set_map_scale(self, stop_maps: np.ndarray) -> None:
        """The model's own standardisation from its early-stopping frames' NLL maps
        (m, h, w): each cell's median, and one scale for the whole map (the median over
        cells of :func:`~inspector.core.scoring.location_stats`' robust scales). Per-cell
        spreads are left to the calibration, which sees many more frames (a per-cell scale
        from a few dozen frames made the calibration scores' tail heavy and noisy)."""
        center, scale = location_stats(stop_maps)
        self.map_center_ = center
        self.map_scale_ = np.full_like(scale, np.median(scale))

    def _standardised(self, nll: np.ndarray) -> np.ndarray:
        return ((nll - self.map_center_) / self.map_scale_).astype(np.float32, copy=False)

    def _score_packed(self, packed: np.ndarray) -> np.ndarray:
        return self._score(self._unpack(packed[i:i + 32]) for i in range(0, len(packed), 32))

    def _score(self, batches, noise: np.ndarray | None = None) -> np.ndarray:
        """Raw NLL maps of batches of planes, in order; ``noise``: (n,) over all of them
        (see :meth:`score_maps`)."""
        self.net_.eval()
        out = []
        gen = torch.Generator().manual_seed(self.seed + 2) if self.iw_samples > 0 else None
        scale = None
        if noise is not None and np.any(np.asarray(noise) > 1.0):
            scale = torch.as_tensor(np.asarray(noise, np.float32)).reshape(-1, 1, 1, 1)
        done = 0
        with _torch_threads(self.threads):
            for x in batches:
                part = None if scale is None else scale[done:done + len(x)]
                out.append(self._score_batch(x, gen, part).numpy())
                done += len(x)
        if not out:
            return np.zeros((0,) + self.map_shape_, np.float32)
        return np.concatenate(out).astype(np.float32, copy=False)

    @torch.no_grad()
    def expected(self, images: np.ndarray) -> np.ndarray:
        """The decoder's mean at the posterior mean code, as RGB (n, H, W, 3) uint8."""
        import cv2

        images = np.asarray(images)
        h2, w2 = self.half_
        out = np.empty((len(images), 2 * h2, 2 * w2, 3), np.uint8)
        with _torch_threads(self.threads):
            for start in range(0, len(images), 32):
                x = self._planes(images[start:start + 32])
                mean, _ = self.net_.decode(self.net_.encode(x)[0])
                m = mean[:, :, :h2, :w2].clamp(0, 1).numpy()
                luma = m[:, :4].reshape(-1, 2, 2, h2, w2).transpose(0, 3, 1, 4, 2)
                luma = luma.reshape(-1, 2 * h2, 2 * w2)
                for i in range(len(m)):
                    y = (luma[i] * 255).round().astype(np.uint8)
                    if not self.colour:
                        out[start + i] = np.repeat(y[..., None], 3, axis=-1)
                        continue
                    c = (m[i, 4:].transpose(1, 2, 0) * 255).round().astype(np.uint8)
                    c = cv2.resize(c, (2 * w2, 2 * h2), interpolation=cv2.INTER_LINEAR)
                    out[start + i] = cv2.cvtColor(np.dstack([y, c]), cv2.COLOR_YCrCb2RGB)
        return out

    def learned(self) -> dict[str, Any]:
        return dict(self.learned_)

    # persistence

    def save(self, directory: Path) -> None:
        """Write ``vae.pt``: the network's state_dict plus the frame size and learned facts."""
        torch.save({"state_dict": self.net_.state_dict(), "size": list(self.size_),
                    "map_center": torch.from_numpy(self.map_center_),
                    "map_scale": torch.from_numpy(self.map_scale_),
                    "learned": json.loads(json.dumps(self.learned_))},
                   Path(directory) / "vae.pt")

    @classmethod
    def load(cls, directory: Path, params: dict[str, Any]) -> "FrameVAEModel":
        # Settings that only shaped an older version's fitting (e.g. ``holdout``) are not
        # needed to score.
        model = cls(**{k: v for k, v in params.items() if k in cls._param_names()})
        ckpt = torch.load(Path(directory) / "vae.pt", map_location="cpu", weights_only=True)
        model.size_ = tuple(int(v) for v in ckpt["size"])
        model._geometry(model.size_)
        model.net_ = model._network()
        model.net_.load_state_dict(ckpt["state_dict"])
        model.net_.eval()
        model._prepare_scoring()
        model.learned_ = dict(ckpt["learned"])
        if "map_center" in ckpt:
            model.map_center_ = ckpt["map_center"].numpy()
            model.map_scale_ = ckpt["map_scale"].numpy()
        else:  # saved before the per-model standardisation: raw nats
            model.map_center_ = np.zeros(model.map_shape_, np.float32)
            model.map_scale_ = np.ones(model.map_shape_, np.float32)
        return model


__all__ = ["FrameVAEModel", "FrameVAENet", "elbo", "iwae_bound", "log_weights",
           "gaussian_nll", "kl_standard_normal"]
