"""A small convolutional variational autoencoder over the whole frame: the non-linear model.

Per-location PPCA (:mod:`inspector.models.ppca`) is exact but linear in each patch. This
model replaces it with a deep latent-variable density (Kingma & Welling 2014,
"Auto-encoding variational Bayes"; Rezende, Mohamed & Wierstra 2014) while keeping what
makes the per-location model right for a fixed camera.

Design: one fully convolutional VAE over the whole working-resolution frame, not a VAE
shared by patches.

* A camera never moves, so *where* something is matters as much as *what* it is. A
  patch VAE with weights shared across the frame learns generic image patches and happily
  reconstructs a parcel on a floor that never has parcels. Here the decoder adds a learned
  per-pixel background (initialised at the mean frame) and the Gaussian likelihood has a
  learned per-pixel, per-channel variance (a free parameter, not predicted from the code,
  so an anomaly cannot lower its own score by being declared noisy; floored at
  ``var_floor`` like PPCA's noise variance). The convolutions model the *departures*
  from the background, which are local and similar across the frame (lighting, shadows,
  people passing).
* The latent code is a spatial grid: ``latent`` channels per ``patch x patch`` block of
  the frame, each with a standard normal prior. Evidence stays local (a latent cell has a
  bounded receptive field), so the KL term of each latent cell can be put back on the map
  where it came from, and the frame's map sums to the negative ELBO.
* Running once over the whole frame shares all the convolution work between overlapping
  neighbourhoods, which is what makes CPU training and >= 50 frames/s scoring possible.

The likelihood is over the same values PPCA models: luminance at full resolution and the
two chroma planes at half resolution (JPEG 4:2:0, :func:`inspector.features.to_planes`).
Full-resolution luminance is folded into four half-resolution channels (a lossless
space-to-depth step), so the network runs at half resolution on 6 channels (4 without
colour). The frame is padded to a multiple of the latent cell; padding, and pixels under
the ignore mask, are left out of the likelihood (training loss and scores) and are set to
the background before the encoder sees them, so their values can never change a score.

Raw maps: the decoder's Gaussian negative log-likelihood of each pixel given the posterior
mean code, summed over ``stride x stride`` cells (the grid of
:func:`inspector.features.map_shape`), plus (``kl_in_map``) each latent cell's KL
divergence spread evenly over the map cells it covers. With ``iw_samples = K > 0`` the map
is the importance-weighted bound instead (Burda, Grosse & Salakhutdinov 2016): the frame
total ``-log (1/K) sum_k w_k`` is split exactly into cells as
``sum_k omega_k c_k(cell) + (log K - H(omega)) / cells``, where ``c_k`` is sample k's per-cell
share of ``-log w_k`` and ``omega`` the normalised weights.

Training: Adam on the negative ELBO (one reparameterised sample, analytic KL) of the frames
of the earlier time blocks; the last ``holdout_blocks`` time blocks are held out. Each
epoch the held-out ELBO (fixed noise, so epochs compare fairly) is measured; the best
weights are kept and training stops after ``patience`` epochs without improvement. The
held-out frames are then scored by that final model and returned for calibration (split
conformal; the model is not refitted on them). They also chose the stopping epoch, a
weak dependence (one number picked out of a few dozen) accepted to keep every held-out
frame for calibration.
"""

from __future__ import annotations

import contextlib
import copy
import json
import math
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from tqdm import tqdm

from inspector.features import map_shape, to_planes
from inspector.models.base import DensityModel, FrameSource, HeldOut

LOG_2PI = math.log(2.0 * math.pi)

Encoder = Callable[[torch.Tensor], tuple[torch.Tensor, torch.Tensor]]
Decoder = Callable[[torch.Tensor], tuple[torch.Tensor, torch.Tensor]]


# --- pure functions: any Gaussian encoder / Gaussian decoder pair ---------------------------

def gaussian_nll(x: torch.Tensor, mean: torch.Tensor, logvar: torch.Tensor,
                 weight: torch.Tensor | None = None) -> torch.Tensor:
    """Elementwise ``-log N(x; mean, exp(logvar))`` in nats (broadcasting).

    ``weight`` (0 or 1, broadcastable) leaves entries out of the likelihood.
    """
    nll = 0.5 * (LOG_2PI + logvar + (x - mean) ** 2 * torch.exp(-logvar))
    nll = nll.expand(torch.broadcast_shapes(x.shape, nll.shape))
    return nll * weight if weight is not None else nll


def kl_standard_normal(mu: torch.Tensor, logvar: torch.Tensor) -> torch.Tensor:
    """Elementwise ``KL(N(mu, exp(logvar)) || N(0, 1))`` in nats."""
    return 0.5 * (mu ** 2 + torch.exp(logvar) - 1.0 - logvar)


def _per_item(t: torch.Tensor) -> torch.Tensor:
    return t.reshape(t.shape[0], -1).sum(dim=1)


def _noise(shape, like: torch.Tensor, generator: torch.Generator | None) -> torch.Tensor:
    return torch.randn(shape, generator=generator, dtype=like.dtype, device=like.device)


def elbo(x: torch.Tensor, encoder: Encoder, decoder: Decoder, samples: int = 1,
         weight: torch.Tensor | None = None,
         generator: torch.Generator | None = None) -> torch.Tensor:
    """Evidence lower bound of each item, reparameterised samples and analytic KL.

    ``E_q[log p(x|z)] - KL(q(z|x) || N(0, I))`` (Kingma & Welling 2014, eq. 10).

    Parameters
    ----------
    x : Tensor, shape (n, ...)
    encoder : callable
        ``x -> (mu, logvar)`` of a diagonal Gaussian posterior, shape (n, ...).
    decoder : callable
        ``z -> (mean, logvar)`` of a diagonal Gaussian likelihood, broadcastable to ``x``.
    samples : int
        Monte-Carlo samples of z averaged for the expectation.
    weight : Tensor, optional
        0/1, broadcastable to ``x``: entries with 0 are left out of the likelihood.

    Returns
    -------
    Tensor, shape (n,)
    """
    mu, logvar = encoder(x)
    kl = _per_item(kl_standard_normal(mu, logvar))
    std = torch.exp(0.5 * logvar)
    rec = torch.zeros_like(kl)
    for _ in range(samples):
        z = mu + std * _noise(mu.shape, mu, generator)
        mean, dec_logvar = decoder(z)
        rec = rec + _per_item(gaussian_nll(x, mean, dec_logvar, weight))
    return -rec / samples - kl


def log_weights(x: torch.Tensor, encoder: Encoder, decoder: Decoder, k: int,
                weight: torch.Tensor | None = None,
                generator: torch.Generator | None = None) -> torch.Tensor:
    """Importance log-weights ``log p(x, z_k) - log q(z_k | x)``, z_k ~ q, shape (k, n)."""
    mu, logvar = encoder(x)
    std = torch.exp(0.5 * logvar)
    out = []
    for _ in range(k):
        eps = _noise(mu.shape, mu, generator)
        z = mu + std * eps
        mean, dec_logvar = decoder(z)
        log_px = -_per_item(gaussian_nll(x, mean, dec_logvar, weight))
        log_pz = -0.5 * _per_item(LOG_2PI + z ** 2)
        log_qz = -0.5 * _per_item(LOG_2PI + logvar + eps ** 2)
        out.append(log_px + log_pz - log_qz)
    return torch.stack(out)


def iwae_bound(x: torch.Tensor, encoder: Encoder, decoder: Decoder, k: int,
               weight: torch.Tensor | None = None,
               generator: torch.Generator | None = None) -> torch.Tensor:
    """Importance-weighted bound ``log (1/k) sum_k w_k`` of each item, shape (n,).

    Burda, Grosse & Salakhutdinov 2016, eq. 8: ``L_1`` is the ELBO in expectation, ``L_k``
    does not decrease with k in expectation and tends to ``log p(x)``.
    """
    lw = log_weights(x, encoder, decoder, k, weight, generator)
    return torch.logsumexp(lw, dim=0) - math.log(k)


# --- the network -------------------------------------------------------------------------

class FrameVAE(nn.Module):
    """Fully convolutional VAE over half-resolution planes (C, Hp, Wp).

    Parameters
    ----------
    channels : int
        Planes per half-resolution pixel (6 with colour, 4 without).
    shape : (int, int)
        Padded half-resolution (Hp, Wp), multiples of ``2 ** down``.
    latent : int
        Latent channels per latent cell.
    down : int
        Number of stride-2 stages; a latent cell covers ``2 ** down`` half-resolution pixels.
    width : int
        Convolution channels.
    var_floor : float
        Lower bound on the decoder variance.
    """

    def __init__(self, channels: int, shape: tuple[int, int], latent: int, down: int,
                 width: int, var_floor: float):
        super().__init__()
        hp, wp = shape
        self.log_floor = math.log(var_floor)
        self.register_buffer("center", torch.zeros(channels, hp, wp))
        self.register_buffer("observed", torch.ones(channels, hp, wp))
        self.background = nn.Parameter(torch.zeros(channels, hp, wp))
        self.raw_logvar = nn.Parameter(torch.full((channels, hp, wp), math.log(1e-2)))
        chans = [max(width // 2, 8)] + [width] * (down - 1)
        enc: list[nn.Module] = []
        c = channels
        for co in chans:
            enc += [nn.Conv2d(c, co, 4, 2, 1), nn.SiLU()]
            c = co
        enc += [nn.Conv2d(c, width, 3, 1, 1), nn.SiLU(), nn.Conv2d(width, 2 * latent, 1)]
        self.enc = nn.Sequential(*enc)
        dec: list[nn.Module] = [nn.Conv2d(latent, width, 3, 1, 1), nn.SiLU(),
                                nn.Conv2d(width, width, 3, 1, 1), nn.SiLU()]
        c = width
        targets = list(reversed(chans[:-1])) + [channels]
        for i, co in enumerate(targets):
            dec.append(nn.ConvTranspose2d(c, co, 4, 2, 1))
            if i < len(targets) - 1:
                dec.append(nn.SiLU())
            c = co
        self.dec = nn.Sequential(*dec)
        with torch.no_grad():  # start near "background plus noise"; the code adds detail
            self.dec[-1].weight.mul_(0.1)
            self.dec[-1].bias.zero_()

    def encode(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Posterior mean and log-variance, each (n, latent, Hl, Wl)."""
        h = self.enc((x - self.center) * self.observed)
        mu, logvar = h.chunk(2, dim=1)
        return mu, logvar.clamp(-12.0, 6.0)

    def decode(self, z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Likelihood mean (n, C, Hp, Wp) and log-variance (C, Hp, Wp)."""
        mean = self.background + self.dec(z)
        logvar = torch.logaddexp(self.raw_logvar,
                                 torch.tensor(self.log_floor, dtype=z.dtype))
        return mean, logvar


@contextlib.contextmanager
def _torch_threads(n: int):
    if n <= 0:
        yield
        return
    old = torch.get_num_threads()
    torch.set_num_threads(n)
    try:
        yield
    finally:
        torch.set_num_threads(old)


# --- the model -----------------------------------------------------------------------------

class PatchVAE(DensityModel):
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
    width : int
        Convolution channels (the network's size).
    epochs : int
        Upper bound on training epochs.
    patience : int
        Epochs without a better held-out ELBO before training stops.
    batch_size : int
    lr : float
        Adam learning rate.
    seed : int
        Seeds weight initialisation, shuffling and sampling.
    threads : int
        Torch CPU threads while fitting and scoring; 0 keeps torch's default.
    iw_samples : int
        0 scores with the posterior mean code; K > 0 with the importance-weighted bound
        of K samples (K decoder passes per frame).
    kl_in_map : bool
        Add each latent cell's KL to the map cells it covers (posterior-mean scoring).
    var_floor : float
        Lower bound on the decoder variance in squared [0, 1] units (as PPCA's).
    holdout_blocks : int
        Latest time blocks held out for early stopping and calibration.
    max_frames : int
        Training frames kept in memory (uint8); more are subsampled evenly in time.

    Attributes
    ----------
    size_ : (int, int)
        Working (width, height) the model was fitted at.
    learned_ : dict
        Facts from training (epochs, best held-out ELBO, ...).
    """

    kind = "vae"

    def __init__(self, patch: int = 8, stride: int = 4, colour: bool = True, latent: int = 0,
                 width: int = 32, epochs: int = 40, patience: int = 5, batch_size: int = 16,
                 lr: float = 2e-3, seed: int = 0, threads: int = 0, iw_samples: int = 0,
                 kl_in_map: bool = True, var_floor: float = 1e-4, holdout_blocks: int = 1,
                 max_frames: int = 2000):
        self.patch = patch
        self.stride = stride
        self.colour = colour
        self.latent = latent
        self.width = width
        self.epochs = epochs
        self.patience = patience
        self.batch_size = batch_size
        self.lr = lr
        self.seed = seed
        self.threads = threads
        self.iw_samples = iw_samples
        self.kl_in_map = kl_in_map
        self.var_floor = var_floor
        self.holdout_blocks = holdout_blocks
        self.max_frames = max_frames

    _PARAMS = ("patch", "stride", "colour", "latent", "width", "epochs", "patience",
               "batch_size", "lr", "seed", "threads", "iw_samples", "kl_in_map", "var_floor",
               "holdout_blocks", "max_frames")

    def get_params(self) -> dict[str, Any]:
        return {k: getattr(self, k) for k in self._PARAMS}

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
        """Train on the earlier time blocks; score the held-out latest block(s) for calibration.

        Returns
        -------
        HeldOut
            Raw maps of the held-out frames, by the final (best held-out ELBO) model.
        """
        started = time.perf_counter()
        self.size_ = tuple(int(v) for v in source.size)
        self._geometry(self.size_)
        train_idx, held_idx, held_blocks = self._split(np.asarray(source.blocks))
        train_idx = self._subsample(train_idx)
        train_pos, train_imgs = self._read(source, train_idx)
        held_pos, held_imgs = self._read(source, held_idx)
        del train_pos
        if len(train_imgs) < 2 or len(held_imgs) < 1:
            raise ValueError(f"need at least 2 training and 1 held-out decodable frames, got "
                             f"{len(train_imgs)} and {len(held_imgs)}")
        obs = torch.from_numpy(self._observed(mask))
        if not obs.any():
            raise ValueError("the mask ignores every pixel")
        with _torch_threads(self.threads), torch.random.fork_rng(devices=[]):
            torch.manual_seed(self.seed)
            self.net_ = FrameVAE(self.channels_, self.padded_, self.q_, self.down_, self.width,
                                 self.var_floor)
            self._init_from_data(train_imgs, obs)
            self._prepare_scoring()
            history = self._train(train_imgs, held_imgs, obs)
            self.net_.eval()
            maps = self._score_packed(held_imgs)
        self.learned_ = {
            "latent": self.q_, "latent_cell": self.cell_, "latent_grid": list(self.latent_grid_),
            "train_frames": int(len(train_imgs)), "heldout_frames": int(len(held_imgs)),
            "heldout_blocks": [int(b) for b in held_blocks],
            "parameters": int(sum(p.numel() for p in self.net_.parameters())),
            "observed_dims": int(obs.sum()), "seconds": round(time.perf_counter() - started, 2),
            **history,
        }
        return HeldOut(held_pos, maps)

    def _split(self, blocks: np.ndarray) -> tuple[np.ndarray, np.ndarray, list]:
        """Training and held-out positions: the latest ``holdout_blocks`` blocks held out."""
        n = len(blocks)
        if n < 3:
            raise ValueError(f"need at least 3 frames to fit, got {n}")
        labels = np.unique(blocks)
        if len(labels) >= 2:
            k = int(np.clip(self.holdout_blocks, 1, len(labels) - 1))
            held = labels[-k:]
            is_held = np.isin(blocks, held)
        else:  # one block: hold out the latest fifth of the frames
            held = labels
            is_held = np.arange(n) >= n - max(1, n // 5)
        pos = np.arange(n)
        return pos[~is_held], pos[is_held], list(held)

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
               obs: torch.Tensor) -> dict[str, Any]:
        net = self.net_
        dims = float(obs.sum())
        opt = torch.optim.Adam(net.parameters(), lr=self.lr)
        rng = np.random.default_rng(self.seed)
        gen = torch.Generator().manual_seed(self.seed)
        best, best_state, best_epoch, stale, epoch = -math.inf, None, 0, 0, 0
        train_elbo = math.nan
        bar = tqdm(range(1, self.epochs + 1), desc="vae", unit="epoch", leave=False,
                   file=sys.stderr, disable=not sys.stderr.isatty(), dynamic_ncols=True)
        for epoch in bar:
            net.train()
            order = rng.permutation(len(train_imgs))
            total, count = 0.0, 0
            for start in range(0, len(order), self.batch_size):
                x = self._unpack(train_imgs[np.sort(order[start:start + self.batch_size])])
                e = elbo(x, net.encode, net.decode, weight=obs, generator=gen)
                loss = -e.mean() / dims
                opt.zero_grad(set_to_none=True)
                loss.backward()
                opt.step()
                total += float(e.detach().sum())
                count += len(x)
            train_elbo = total / count
            held = self._heldout_elbo(held_imgs, obs)
            if held > best:
                best, best_epoch, stale = held, epoch, 0
                best_state = copy.deepcopy(net.state_dict())
            else:
                stale += 1
            bar.set_postfix_str(f"ELBO/frame train {train_elbo:.1f} held-out {held:.1f} "
                                f"(best {best:.1f} @ {best_epoch})")
            if stale >= self.patience:
                break
        bar.close()
        if best_state is not None:
            net.load_state_dict(best_state)
        return {"epochs": int(epoch), "best_epoch": int(best_epoch),
                "best_heldout_elbo": round(float(best), 3),
                "best_heldout_elbo_per_dim": round(float(best) / dims, 5),
                "last_train_elbo": round(float(train_elbo), 3)}

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

    def _to_cells(self, pixel_nll: torch.Tensor, latent_term: torch.Tensor | None
                  ) -> torch.Tensor:
        """Per-plane NLL (n, C, Hp, Wp) and per-latent-cell terms (n, Hl, Wl) -> cell maps."""
        h2, w2 = self.half_
        per_pix = pixel_nll[:, :, :h2, :w2].sum(dim=1, keepdim=True)
        k = self.stride // 2
        cells = F.avg_pool2d(per_pix, k, k)[:, 0] * (k * k) if k > 1 else per_pix[:, 0]
        mh, mw = self.map_shape_
        cells = cells[:, :mh, :mw]
        if latent_term is not None:
            spread = latent_term[:, self._cell_rows][:, :, self._cell_cols]
            cells = cells + spread * self._cell_share
        return cells * self._live

    def _prepare_scoring(self) -> None:
        obs = self.net_.observed[None, :, :self.half_[0], :self.half_[1]].sum(1, keepdim=True)
        k = self.stride // 2
        seen = F.avg_pool2d(obs, k, k)[:, 0] if k > 1 else obs[:, 0]
        mh, mw = self.map_shape_
        self._live = (seen[0, :mh, :mw] > 0).float()

    @torch.no_grad()
    def _score_batch(self, x: torch.Tensor, gen: torch.Generator | None) -> torch.Tensor:
        net = self.net_
        obs = net.observed
        mu, logvar = net.encode(x)
        if self.iw_samples <= 0:
            mean, dec_logvar = net.decode(mu)
            kl = kl_standard_normal(mu, logvar).sum(1) if self.kl_in_map else None
            return self._to_cells(gaussian_nll(x, mean, dec_logvar, obs), kl)
        K = int(self.iw_samples)
        std = torch.exp(0.5 * logvar)
        shares, neg_logw = [], []
        for _ in range(K):
            eps = _noise(mu.shape, mu, gen)
            z = mu + std * eps
            mean, dec_logvar = net.decode(z)
            rec = gaussian_nll(x, mean, dec_logvar, obs)
            ratio = 0.5 * (z ** 2 - logvar - eps ** 2).sum(1)  # log q(z|x) - log p(z)
            neg_logw.append(_per_item(rec) + _per_item(ratio))
            shares.append(self._to_cells(rec, ratio))
        neg = torch.stack(neg_logw)                      # (K, n): -log w_k
        omega = torch.softmax(-neg, dim=0)
        entropy = -(omega * torch.log(omega.clamp_min(1e-30))).sum(0)
        maps = (omega[:, :, None, None] * torch.stack(shares)).sum(0)
        rest = (math.log(K) - entropy) / self._live.sum().clamp_min(1.0)
        return maps + rest[:, None, None] * self._live

    def score_maps(self, images: np.ndarray) -> np.ndarray:
        """Raw anomaly maps in nats per map cell, shape (n, h, w), float32.

        Fully masked cells score 0 (they carry no evidence).
        """
        images = np.asarray(images)
        return self._score(self._planes(images[i:i + 32]) for i in range(0, len(images), 32))

    def _score_packed(self, packed: np.ndarray) -> np.ndarray:
        return self._score(self._unpack(packed[i:i + 32]) for i in range(0, len(packed), 32))

    def _score(self, batches) -> np.ndarray:
        self.net_.eval()
        out = []
        gen = torch.Generator().manual_seed(self.seed + 2) if self.iw_samples > 0 else None
        with _torch_threads(self.threads):
            for x in batches:
                out.append(self._score_batch(x, gen).numpy())
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
                    "learned": json.loads(json.dumps(self.learned_))},
                   Path(directory) / "vae.pt")

    @classmethod
    def load(cls, directory: Path, params: dict[str, Any]) -> "PatchVAE":
        model = cls(**params)
        ckpt = torch.load(Path(directory) / "vae.pt", map_location="cpu", weights_only=True)
        model.size_ = tuple(int(v) for v in ckpt["size"])
        model._geometry(model.size_)
        model.net_ = FrameVAE(model.channels_, model.padded_, model.q_, model.down_,
                              model.width, model.var_floor)
        model.net_.load_state_dict(ckpt["state_dict"])
        model.net_.eval()
        model._prepare_scoring()
        model.learned_ = dict(ckpt["learned"])
        return model

    def __repr__(self) -> str:
        return f"PatchVAE({json.dumps(self.get_params())[1:-1]})"


__all__ = ["PatchVAE", "FrameVAE", "elbo", "iwae_bound", "log_weights", "gaussian_nll",
           "kl_standard_normal"]
