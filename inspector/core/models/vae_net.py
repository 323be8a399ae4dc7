"""The network of the frame VAE (:mod:`inspector.core.models.vae`) and the bounds it trains on.

Pure torch: the ELBO (Kingma & Welling 2014, "Auto-encoding variational Bayes"), the
importance-weighted bound (Burda, Grosse & Salakhutdinov 2016) for any Gaussian encoder /
Gaussian decoder pair, and :class:`FrameVAENet`, the fully convolutional network over a
whole frame's half-resolution planes. The estimator that fits it to a camera's frames,
scores frames and saves itself is :class:`inspector.core.models.vae.FrameVAEModel`.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Callable

import torch
from torch import nn

LOG_2PI = math.log(2.0 * math.pi)

Encoder = Callable[[torch.Tensor], tuple[torch.Tensor, torch.Tensor]]
Decoder = Callable[[torch.Tensor], tuple[torch.Tensor, torch.Tensor]]


# --- pure functions: any Gaussian encoder / Gaussian decoder pair ---------------------------

def gaussian_nll(x: torch.Tensor, mean: torch.Tensor, logvar: torch.Tensor,
                 weight: torch.Tensor | None = None, scale: torch.Tensor | None = None
                 ) -> torch.Tensor:
    """Elementwise ``-log N(x; mean, exp(logvar))`` in nats (broadcasting).

    ``weight`` (0 or 1, broadcastable) leaves entries out of the likelihood. ``scale``
    (>= 1, broadcastable) multiplies the variance of the squared term while the
    normalising term keeps ``logvar``: ``-log N(x; mean, s v) - log(s) / 2``, the
    likelihood of a sample known to carry s times the noise, less the entropy that noise
    adds (as :func:`inspector.core.models.ppca.ppca_nll` with ``noise``).
    """
    inv = torch.exp(-logvar) if scale is None else torch.exp(-logvar) / scale
    nll = 0.5 * (LOG_2PI + logvar + (x - mean) ** 2 * inv)
    nll = nll.expand(torch.broadcast_shapes(x.shape, nll.shape))
    return nll * weight if weight is not None else nll


def kl_standard_normal(mu: torch.Tensor, logvar: torch.Tensor) -> torch.Tensor:
    """Elementwise ``KL(N(mu, exp(logvar)) || N(0, 1))`` in nats."""
    return 0.5 * (mu ** 2 + torch.exp(logvar) - 1.0 - logvar)


def _per_item(t: torch.Tensor) -> torch.Tensor:
    return t.reshape(t.shape[0], -1).sum(dim=1)


def _noise(shape, like: torch.Tensor, generator: torch.Generator | None) -> torch.Tensor:
    return torch.randn(shape, generator=generator, dtype=like.dtype, device=like.device)


def _decode_samples(x: torch.Tensor, decoder: Decoder, z: torch.Tensor,
                    weight: torch.Tensor | None) -> torch.Tensor:
    """``-log p(x | z_s)`` per sample and item, shape (s, n), for codes z of shape (s, n, ...).

    The s samples go through the decoder as one batch of s * n items.
    """
    s, n = z.shape[:2]
    mean, logvar = decoder(z.reshape(s * n, *z.shape[2:]))
    mean = mean.reshape(s, n, *mean.shape[1:])
    if logvar.dim() == mean.dim() - 1 and logvar.shape[:1] == (s * n,):
        logvar = logvar.reshape(s, n, *logvar.shape[1:])  # per-item variances
    nll = gaussian_nll(x[None], mean, logvar, weight)
    return nll.reshape(s, n, -1).sum(dim=2)


def elbo(x: torch.Tensor, encoder: Encoder, decoder: Decoder, samples: int = 1,
         weight: torch.Tensor | None = None, generator: torch.Generator | None = None,
         chunk: int = 256) -> torch.Tensor:
    """Evidence lower bound of each item, reparameterised samples and analytic KL.

    ``E_q[log p(x|z)] - KL(q(z|x) || N(0, I))`` (Kingma & Welling 2014, eq. 10).

    Parameters
    ----------
    x : Tensor, shape (n, ...)
    encoder : callable
        ``x -> (mu, logvar)`` of a diagonal Gaussian posterior, shape (n, ...).
    decoder : callable
        ``z -> (mean, logvar)`` of a diagonal Gaussian likelihood: ``mean`` shaped like the
        items it decodes, ``logvar`` the same or broadcastable to one item.
    samples : int
        Monte-Carlo samples of z averaged for the expectation.
    weight : Tensor, optional
        0/1, broadcastable to ``x``: entries with 0 are left out of the likelihood.
    chunk : int
        Samples decoded together in one batch.

    Returns
    -------
    Tensor, shape (n,)
    """
    mu, logvar = encoder(x)
    kl = _per_item(kl_standard_normal(mu, logvar))
    std = torch.exp(0.5 * logvar)
    rec = torch.zeros_like(kl)
    for start in range(0, samples, chunk):
        s = min(chunk, samples - start)
        z = mu + std * _noise((s,) + mu.shape, mu, generator)
        rec = rec + _decode_samples(x, decoder, z, weight).sum(dim=0)
    return -rec / samples - kl


def log_weights(x: torch.Tensor, encoder: Encoder, decoder: Decoder, k: int,
                weight: torch.Tensor | None = None,
                generator: torch.Generator | None = None, chunk: int = 256) -> torch.Tensor:
    """Importance log-weights ``log p(x, z_k) - log q(z_k | x)``, z_k ~ q, shape (k, n)."""
    mu, logvar = encoder(x)
    std = torch.exp(0.5 * logvar)
    out = []
    for start in range(0, k, chunk):
        s = min(chunk, k - start)
        eps = _noise((s,) + mu.shape, mu, generator)
        z = mu + std * eps
        log_px = -_decode_samples(x, decoder, z, weight)
        log_pz = -0.5 * (LOG_2PI + z ** 2).reshape(s, len(x), -1).sum(dim=2)
        log_qz = -0.5 * (LOG_2PI + logvar + eps ** 2).reshape(s, len(x), -1).sum(dim=2)
        out.append(log_px + log_pz - log_qz)
    return torch.cat(out)


def iwae_bound(x: torch.Tensor, encoder: Encoder, decoder: Decoder, k: int,
               weight: torch.Tensor | None = None,
               generator: torch.Generator | None = None, chunk: int = 256) -> torch.Tensor:
    """Importance-weighted bound ``log (1/k) sum_k w_k`` of each item, shape (n,).

    Burda, Grosse & Salakhutdinov 2016, eq. 8: ``L_1`` is the ELBO in expectation, ``L_k``
    does not decrease with k in expectation and tends to ``log p(x)``.
    """
    lw = log_weights(x, encoder, decoder, k, weight, generator, chunk)
    return torch.logsumexp(lw, dim=0) - math.log(k)


# --- the network -------------------------------------------------------------------------

class FrameVAENet(nn.Module):
    """Fully convolutional VAE over half-resolution planes (C, Hp, Wp).

    The code of a frame is a flat vector: ``latent`` channels on the latent grid (local
    detail) followed by ``global_latent`` values for the whole frame (illumination,
    exposure, colour temperature: changes a local code would pay for once per latent
    cell). The decoder predicts a per-pixel relative gain ``g`` and an offset ``o`` and
    the likelihood mean is ``background + g * (background - anchor) + o`` (anchor 0 for
    luminance, 1/2 for chroma), so a lighting change of any strength is one uniform ``g``
    that the global code can express; the log-variance is a per-pixel parameter.

    Parameters
    ----------
    channels : int
        Planes per half-resolution pixel (6 with colour, 4 without).
    shape : (int, int)
        Padded half-resolution (Hp, Wp), multiples of ``2 ** down``.
    latent : int
        Latent channels per latent cell.
    global_latent : int
        Latent values for the whole frame (0 for none).
    down : int
        Number of stride-2 stages; a latent cell covers ``2 ** down`` half-resolution pixels.
    width : int
        Convolution channels.
    var_floor : float
        Lower bound on the decoder variance.
    """

    def __init__(self, channels: int, shape: tuple[int, int], latent: int, global_latent: int,
                 down: int, width: int, var_floor: float):
        super().__init__()
        hp, wp = shape
        f = 2 ** down
        self.grid = (hp // f, wp // f)
        self.latent, self.global_latent = latent, global_latent
        self.log_floor = math.log(var_floor)
        self.register_buffer("center", torch.zeros(channels, hp, wp))
        self.register_buffer("observed", torch.ones(channels, hp, wp))
        anchor = torch.zeros(channels, 1, 1)
        anchor[4:] = 0.5
        self.register_buffer("anchor", anchor)
        self.background = nn.Parameter(torch.zeros(channels, hp, wp))
        self.raw_logvar = nn.Parameter(torch.full((channels, hp, wp), math.log(1e-2)))
        chans = [max(width // 2, 8)] + [width] * (down - 1)
        trunk: list[nn.Module] = []
        c = channels
        for co in chans:
            trunk += [nn.Conv2d(c, co, 4, 2, 1), nn.SiLU()]
            c = co
        trunk += [nn.Conv2d(c, width, 3, 1, 1), nn.SiLU()]
        self.trunk = nn.Sequential(*trunk)
        self.local_head = nn.Conv2d(width, 2 * latent, 1)
        self.global_head = nn.Linear(width, 2 * global_latent) if global_latent else None
        self.dec_local = nn.Conv2d(latent, width, 3, 1, 1)
        self.dec_global = nn.Linear(global_latent, width) if global_latent else None
        dec: list[nn.Module] = [nn.SiLU(), nn.Conv2d(width, width, 3, 1, 1), nn.SiLU()]
        c = width
        targets = list(reversed(chans[:-1])) + [2 * channels]
        for i, co in enumerate(targets):
            dec.append(nn.ConvTranspose2d(c, co, 4, 2, 1))
            if i < len(targets) - 1:
                dec.append(nn.SiLU())
            c = co
        self.dec = nn.Sequential(*dec)
        with torch.no_grad():  # start near "background plus noise"; the code adds detail
            self.dec[-1].weight.mul_(0.1)
            self.dec[-1].bias.zero_()

    @property
    def code_size(self) -> int:
        return self.latent * self.grid[0] * self.grid[1] + self.global_latent

    def split(self, code: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Flat codes (..., code_size) -> local (..., latent, Hl, Wl) and global (..., g)."""
        n_local = self.latent * self.grid[0] * self.grid[1]
        lead = code.shape[:-1]
        return (code[..., :n_local].reshape(*lead, self.latent, *self.grid),
                code[..., n_local:])

    def encode(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Posterior mean and log-variance of the flat code, each (n, code_size)."""
        h = self.trunk((x - self.center) * self.observed)
        parts = [self.local_head(h).flatten(2)]  # (n, 2q, cells)
        mu = [parts[0][:, :self.latent].flatten(1)]
        logvar = [parts[0][:, self.latent:].flatten(1)]
        if self.global_head is not None:
            g = self.global_head(h.mean(dim=(2, 3)))
            mu.append(g[:, :self.global_latent])
            logvar.append(g[:, self.global_latent:])
        return torch.cat(mu, 1), torch.cat(logvar, 1).clamp(-12.0, 6.0)

    def decode(self, code: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Likelihood mean (n, C, Hp, Wp) and log-variance (C, Hp, Wp) of flat codes."""
        local, glob = self.split(code)
        h = self.dec_local(local)
        if self.dec_global is not None:
            h = h + self.dec_global(glob)[:, :, None, None]
        gain, offset = self.dec(h).chunk(2, dim=1)
        mean = self.background + gain * (self.background - self.anchor) + offset
        logvar = torch.logaddexp(self.raw_logvar,
                                 torch.tensor(self.log_floor, dtype=code.dtype))
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


__all__ = ["FrameVAENet", "elbo", "iwae_bound", "log_weights", "gaussian_nll",
           "kl_standard_normal", "LOG_2PI"]
