"""Realised false-alarm rate of the whole pipeline, before and after the calibration fixes.

A fixed camera looks at a photograph bundled with scikit-image (brick wall, 32 x 48 pixels)
with sensor noise and a small random gain per frame. With ``--drift`` the light changes
slowly through the normal frames (a window on one side brightens, the other side dims) and
keeps changing while the camera is scanned. Every run learns from ``n`` normal frames in
time order and scores the ``n_scan`` normal frames that follow them, as ``learn`` and
``scan`` would: the final model, the per-cell standardisation and the threshold. A frame
flagged here is a false alarm, so the realised rate is flagged / scored over all seeds,
printed with its exact (Clopper-Pearson) 95% interval next to alpha.

"before" reproduces the calibration path as it was (inside this script only): PPCA held-out
maps from leave-one-block-out models sharing the latent size of the final model, the VAE
calibrating and early-stopping on the latest share of every block, and the per-cell
standardisation taken from the very maps it then turns into calibration scores. "after"
is the tool's own path (:func:`inspector.core.calibration.calibrate`).

    python bench/calibration.py [--models ppca,vae] [--n 100,300,1000] [--alpha 0.01,0.05,0.1]
                                [--seeds 10] [--drift 0,1] [--paths before,after]
                                [--tail-trials 300]

With ``--tail-trials`` it also prints how an extrapolated threshold
(:func:`inspector.core.calibration.tail_threshold`) keeps a rate far below 1/(n+1), on scores
drawn from known distributions (scipy.stats: Gumbel, normal, generalized Pareto), whose true
exceedance probability at the threshold is exact: the point estimate of the tail fit
(``confidence=0.5``) against the default upper confidence bound.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from inspector.core.calibration import calibrate, conformal_threshold, rate_interval  # noqa: E402
from inspector.core.models.base import ArraySource  # noqa: E402
from inspector.core.models.ppca import Moments, PatchPPCA  # noqa: E402
from inspector.core.scoring import anomaly_maps, frame_scores, location_stats  # noqa: E402

#: Frame size (height, width) and the model settings of the runs: small, so that many runs
#: fit in a few minutes.
SIZE = (32, 48)
PPCA = {"patch": 8, "stride": 4}
VAE = {"patch": 8, "stride": 4, "width": 8, "latent": 2, "epochs": 40, "patience": 3,
       "steps": 200, "batch_size": 16, "threads": 1}
#: Light change across the frame over the normal frames (fraction of the brightness at the
#: two sides), continuing at the same pace while scanning.
DRIFT = 0.15
FOLDS = 5


def scene() -> np.ndarray:
    """The photograph: scikit-image's brick wall, lightly tinted, (h, w, 3) float32."""
    import cv2
    from skimage import data

    g = cv2.resize(data.brick(), SIZE[::-1], interpolation=cv2.INTER_AREA).astype(np.float32)
    return np.stack([g, g * 0.9, g * 0.75], axis=-1)


def stream(n: int, seed: int, drift: float, start: int = 0, span: int | None = None
           ) -> np.ndarray:
    """Frames ``start .. start + n - 1`` of the camera's stream, (n, h, w, 3) uint8.

    The light at frame t is ``1 + drift * (t / span) * ramp(x)``, ramp from -1 (left) to 1
    (right): after ``span`` frames the right side is ``drift`` brighter, the left darker.
    """
    rng = np.random.default_rng([seed, start])
    base = scene()
    ramp = np.linspace(-1.0, 1.0, SIZE[1], dtype=np.float32)[None, :, None]
    span = span or n
    out = np.empty((n,) + base.shape, np.uint8)
    for i in range(n):
        t = (start + i) / span
        light = 1.0 + drift * t * ramp
        gain = 1.0 + 0.02 * rng.standard_normal()
        out[i] = np.clip(base * light * gain + rng.normal(0, 3.0, base.shape), 0, 255)
    return out


def _blocks(n: int) -> np.ndarray:
    return (np.arange(n) * FOLDS) // n


# --- the path as it was (emulated here only) ---------------------------------------------

def _before_ppca(train: np.ndarray):
    """PPCA as it was: final model first (its latent size shared by the folds), then
    leave-one-block-out models score their block."""
    from inspector.core.features import (
        feature_size,
        grid_shape,
        observed_features,
        patch_features,
    )

    model = PatchPPCA(**PPCA)
    blocks = _blocks(len(train))
    h, w = train.shape[1:3]
    model.grid_ = grid_shape(h, w, model.patch, model.stride)
    model.observed_ = observed_features(None, model.patch, model.stride, model.colour)
    moments = Moments(FOLDS, model.grid_[0] * model.grid_[1],
                      feature_size(model.patch, model.colour), block_scatter=True)
    for b in range(FOLDS):
        moments.add(b, patch_features(train[blocks == b], model.patch, model.stride,
                                      model.colour))
    mean, cov, _ = moments.mean_cov()
    final = (mean, *model._fit_params(cov))
    model._set(*final)
    shared = model.latent
    model.latent = model.q_
    maps = []
    for b in range(FOLDS):
        m_k, c_k, _ = moments.mean_cov(leave_out=b)
        model._set(m_k, *model._fit_params(c_k))
        maps.append(model.score_maps(train[blocks == b]))
    model.latent = shared
    model._set(*final)
    return model, np.concatenate(maps)


def _before_vae(train: np.ndarray):
    """The VAE as it was: the latest 20% of every block both chose the stopping epoch and
    calibrated."""
    from inspector.core.models.vae import FrameVAEModel

    class Before(FrameVAEModel):
        def fit(self, source, mask=None):
            import torch

            from inspector.core.models.base import HeldOut
            from inspector.core.models.vae_net import _torch_threads

            self.size_ = tuple(source.size)
            self._geometry(self.size_)
            n = len(source)
            blocks = _blocks(n)
            held = np.zeros(n, bool)
            for b in range(FOLDS):
                members = np.flatnonzero(blocks == b)
                k = min(max(int(round(0.2 * len(members))), 1), len(members) - 1)
                held[members[len(members) - k:]] = True
            pos = np.arange(n)
            obs = torch.from_numpy(self._observed(mask))
            _, train_imgs = self._read(source, pos[~held])
            held_pos, held_imgs = self._read(source, pos[held])
            with _torch_threads(self.threads), torch.random.fork_rng(devices=[]):
                torch.manual_seed(self.seed)
                self.net_ = self._network()
                self._init_from_data(train_imgs, obs)
                self._prepare_scoring()
                self._train(train_imgs, held_imgs, obs, self.steps)
                self.net_.eval()
                self.map_center_, self.map_scale_ = 0.0, 1.0  # raw nats, as it was
                return HeldOut(held_pos, self._score_packed(held_imgs))

    model = Before(**VAE)
    held = model.fit(ArraySource(train, _blocks(len(train))))
    return model, held.maps


def _leaky_threshold(maps: np.ndarray, alpha: float):
    """The standardisation taken from the maps it then scores (the leak), and the
    conformal threshold of those scores."""
    center, scale = location_stats(maps)
    t = conformal_threshold(frame_scores(anomaly_maps(maps, center, scale)), alpha)
    return center, scale, t


# --- one run -------------------------------------------------------------------------------

def run(model_name: str, path: str, n: int, n_scan: int, alphas, drift: float, seed: int
        ) -> dict[float, tuple[int, int]]:
    """Learn from n normal frames, scan the n_scan that follow; (false alarms, frames) per
    alpha."""
    train = stream(n, seed, drift, 0, n)
    scan = stream(n_scan, seed, drift, n, n)
    out = {}
    if path == "before":
        model, maps = _before_ppca(train) if model_name == "ppca" else _before_vae(train)
        raw = model.score_maps(scan)
        for a in alphas:
            center, scale, t = _leaky_threshold(maps, a)
            s = frame_scores(anomaly_maps(raw, center, scale))
            out[a] = (int((s > t.value).sum()), len(s))
        return out
    if model_name == "ppca":
        model = PatchPPCA(**PPCA)
    else:
        from inspector.core.models.vae import FrameVAEModel

        model = FrameVAEModel(**VAE)
    blocks = _blocks(n)
    held = model.fit(ArraySource(train, blocks))
    raw = model.score_maps(scan)
    for a in alphas:
        cal = calibrate(held.maps, blocks[held.index], a)
        s = cal.score(raw)[1]
        out[a] = (int((s > cal.threshold.value).sum()), len(s))
    return out


def tail_table(trials: int, seed: int = 0) -> None:
    """Realised rate / alpha and coverage of extrapolated thresholds, over ``trials`` draws."""
    from scipy.stats import genpareto, gumbel_r, norm

    from inspector.core.calibration import TAIL_CONFIDENCE, tail_threshold

    rng = np.random.default_rng(seed)
    print(f"\n{'scores':<8}{'n':>5}{'alpha':>8}  realised rate / alpha (mean) and share of "
          f"draws at or above the true quantile")
    print(f"{'':<21}  {'point estimate':>22}  {f'{TAIL_CONFIDENCE:.0%} bound':>22}")
    for name, dist in (("gumbel", gumbel_r), ("normal", norm), ("gpd 0.2", genpareto(0.2))):
        for n, alpha in ((200, 1e-3), (500, 1e-4)):
            truth = dist.isf(alpha)
            got = {0.5: [], TAIL_CONFIDENCE: []}
            for i in range(trials):
                s = dist.rvs(size=n, random_state=rng)
                for c in got:
                    got[c].append(tail_threshold(s, alpha, confidence=c, seed=i).value)
            cells = [f"{np.mean(dist.sf(v)) / alpha:>10.2f}{np.mean(np.array(v) >= truth):>12.2f}"
                     for v in got.values()]
            print(f"{name:<8}{n:>5}{alpha:>8g}  " + "  ".join(cells), flush=True)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", default="ppca,vae")
    ap.add_argument("--n", default="100,300,1000", help="normal frames learnt from")
    ap.add_argument("--scan", type=int, default=0,
                    help="normal frames scanned after them (default: n / 5, one block)")
    ap.add_argument("--alpha", default="0.01,0.05,0.1")
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument("--drift", default="0,1", help="0: stationary, 1: drifting, or both")
    ap.add_argument("--paths", default="before,after")
    ap.add_argument("--tail-trials", type=int, default=0,
                    help="also print the extrapolated-threshold table over this many draws")
    args = ap.parse_args(argv)
    alphas = [float(a) for a in args.alpha.split(",")]
    started = time.perf_counter()
    print(f"{'model':<6}{'drift':<7}{'n':>6}{'path':>8}{'alpha':>7}{'alarms':>8}{'frames':>8}"
          f"{'rate':>8}  95% interval")
    for model_name in args.models.split(","):
        for drift_on in (int(d) for d in args.drift.split(",")):
            for n in (int(v) for v in args.n.split(",")):
                n_scan = args.scan or max(n // FOLDS, 1)
                for path in args.paths.split(","):
                    totals = {a: [0, 0] for a in alphas}
                    for seed in range(args.seeds):
                        got = run(model_name, path, n, n_scan, alphas,
                                  DRIFT if drift_on else 0.0, seed)
                        for a, (k, m) in got.items():
                            totals[a][0] += k
                            totals[a][1] += m
                    for a in alphas:
                        k, m = totals[a]
                        lo, hi = rate_interval(k, m)
                        flag = "" if lo <= a else "  above alpha"
                        print(f"{model_name:<6}{'yes' if drift_on else 'no':<7}{n:>6}"
                              f"{path:>8}{a:>7g}{k:>8}{m:>8}{k / m:>8.4f}  "
                              f"[{lo:.4f}, {hi:.4f}]{flag}", flush=True)
    if args.tail_trials:
        tail_table(args.tail_trials)
    print(f"{time.perf_counter() - started:.0f} s")


if __name__ == "__main__":
    main()
