"""The convolutional VAE model and its bound helpers (inspector.core.models.vae).

Each check names the outside result it relies on.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from scipy import integrate  # noqa: E402

from inspector.core.models.base import ArraySource  # noqa: E402
from inspector.core.models.ppca import ppca_fit, ppca_nll  # noqa: E402
from inspector.core.models.vae import FrameVAEModel, elbo, iwae_bound, log_weights  # noqa: E402


@pytest.fixture(autouse=True)
def _one_thread():
    old = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(old)


# --- linear VAE versus closed-form PPCA ---------------------------------------------------

def _linear_elbo_exact(X, enc, enc_lv, dec, dec_lv):
    """The expected ELBO of a linear Gaussian VAE in closed form (no sampling):
    E_q ||x - W z - b||^2 = ||x - W m - b||^2 + sum_j s_j ||W_:j||^2 and the Gaussian KL."""
    d = X.shape[1]
    m, s = enc(X), torch.exp(enc_lv)
    W = dec.weight
    sq = ((X - dec(m)) ** 2).sum(1) + (W ** 2 * s).sum()
    rec = -0.5 * (d * math.log(2 * math.pi) + d * dec_lv + sq / torch.exp(dec_lv))
    kl = 0.5 * (m ** 2 + s - 1.0 - enc_lv).sum(1)
    return (rec - kl).mean()


def test_linear_vae_elbo_reaches_ppca_maximum_likelihood():
    # Tipping & Bishop 1999 (J. R. Statist. Soc. B 61(3)), eqs. 7-8: closed-form ML PPCA.
    # Lucas, Tucker, Grosse & Norouzi 2019, "Don't Blame the ELBO!", sec. 4: a linear VAE with
    # a Gaussian decoder of shared variance has the PPCA ML solution as its global optimum,
    # where the ELBO is tight. So the trained ELBO must come within TOL of the PPCA maximum
    # log-likelihood and (being a lower bound on a likelihood that PPCA maximises) never
    # exceed it.
    TOL = 0.004  # measured 2.0e-3 with these seeds; twice that
    rng = np.random.default_rng(0)
    n, d, q = 1500, 8, 2
    W = rng.normal(size=(d, q)) * np.array([2.0, 1.0])
    X = rng.normal(size=(n, q)) @ W.T + rng.normal(size=d) + 0.5 * rng.normal(size=(n, d))
    mean, cov = X.mean(0), np.cov(X.T, bias=True)  # ML estimates (divide by n)
    Wp, s2 = ppca_fit(cov[None], q)
    max_loglik = float(-ppca_nll(X[:, None, :], mean[None], Wp, s2)[:, 0].mean())
    # scikit-learn's PCA.score is the mean PPCA log-likelihood at the fit (Tipping & Bishop
    # 1999), the outside reference for the maximum; it divides the covariance by n - 1,
    # which moves the value by about 1e-7 relative here.
    from sklearn.decomposition import PCA

    assert max_loglik == pytest.approx(PCA(n_components=q).fit(X).score(X), rel=1e-6)

    torch.manual_seed(0)
    Xt = torch.tensor(X, dtype=torch.float64)
    enc = torch.nn.Linear(d, q).double()
    dec = torch.nn.Linear(q, d).double()
    enc_lv = torch.nn.Parameter(torch.zeros(q, dtype=torch.float64))
    dec_lv = torch.nn.Parameter(torch.zeros((), dtype=torch.float64))

    def encoder(x):
        return enc(x), enc_lv.expand(len(x), q)

    def decoder(z):
        return dec(z), dec_lv

    steps = 1200
    opt = torch.optim.Adam([*enc.parameters(), *dec.parameters(), enc_lv, dec_lv], lr=0.05)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, steps)
    gen = torch.Generator().manual_seed(0)
    for step in range(steps):
        loss = -elbo(Xt, encoder, decoder, samples=4, generator=gen).mean()
        opt.zero_grad()
        loss.backward()
        opt.step()
        sched.step()
        if step % 100 == 0:
            with torch.no_grad():
                exact = float(_linear_elbo_exact(Xt, enc, enc_lv, dec, dec_lv))
            assert exact <= max_loglik + 1e-9
    with torch.no_grad():
        exact = float(_linear_elbo_exact(Xt, enc, enc_lv, dec, dec_lv))
        mc = elbo(Xt, encoder, decoder, samples=400, generator=gen)
    assert exact <= max_loglik + 1e-9
    print(f"gap to the PPCA maximum: {max_loglik - exact:.2e} nats per point")
    assert max_loglik - exact < TOL
    # The Monte-Carlo ELBO is an unbiased estimate of the closed form (Kingma & Welling 2014).
    se = float(mc.std()) / math.sqrt(n)
    assert abs(float(mc.mean()) - exact) < 4 * se + 1e-6


# --- importance weighting ----------------------------------------------------------------

def _tiny_model(seed=1, noise=0.2):
    """A 2-D latent, 3-D observation model with a tanh decoder, and four data points."""
    torch.manual_seed(seed)
    dec = torch.nn.Sequential(torch.nn.Linear(2, 16), torch.nn.Tanh(),
                              torch.nn.Linear(16, 3)).double()
    dec_lv = torch.tensor(math.log(noise ** 2), dtype=torch.float64)
    with torch.no_grad():
        x = dec(torch.randn(4, 2, dtype=torch.float64))
        x = x + noise * torch.randn(4, 3, dtype=torch.float64)
    for p in dec.parameters():
        p.requires_grad_(False)
    return dec, dec_lv, x


def _fitted_posterior(dec, dec_lv, x, steps=300):
    """Per-point Gaussian q(z | x) maximising the ELBO (a non-amortised encoder)."""
    m = torch.zeros(len(x), 2, dtype=torch.float64, requires_grad=True)
    lv = torch.zeros(len(x), 2, dtype=torch.float64, requires_grad=True)
    opt = torch.optim.Adam([m, lv], lr=0.05)
    gen = torch.Generator().manual_seed(0)
    for _ in range(steps):
        loss = -elbo(x, lambda _: (m, lv), lambda z: (dec(z), dec_lv), samples=8,
                     generator=gen).sum()
        opt.zero_grad()
        loss.backward()
        opt.step()
    return m.detach(), lv.detach()


def test_importance_weighted_bound_is_above_elbo_and_grows_with_k():
    # Burda, Grosse & Salakhutdinov 2016, Theorem 1: E[L_k] >= E[L_m] for k >= m, and
    # E[L_1] equals the ELBO. A deliberately loose q (posterior variance x4, mean shifted)
    # makes the gaps large against the Monte-Carlo error. Checked on the average of many
    # independent estimates, within 3 standard errors.
    dec, dec_lv, x = _tiny_model()
    m, lv = _fitted_posterior(dec, dec_lv, x)
    m, lv = m + 0.3, lv + math.log(4.0)
    enc = lambda _: (m, lv)  # noqa: E731
    decoder = lambda z: (dec(z), dec_lv)  # noqa: E731
    gen = torch.Generator().manual_seed(3)
    with torch.no_grad():
        ref = elbo(x, enc, decoder, samples=20000, generator=gen).mean()
        means, ses = {}, {}
        for k in (1, 4, 16, 64):
            reps = max(4000 // k, 60)  # independent estimates, all in one batch
            rep = lambda _, r=reps: (m.repeat(r, 1), lv.repeat(r, 1))  # noqa: E731
            est = iwae_bound(x.repeat(reps, 1), rep, decoder, k, generator=gen)
            est = est.reshape(reps, len(x)).mean(1)
            means[k], ses[k] = float(est.mean()), float(est.std()) / math.sqrt(reps)
    assert abs(means[1] - float(ref)) < 3 * ses[1] + 1e-3
    ks = sorted(means)
    for a, b in zip(ks, ks[1:]):
        assert means[b] >= means[a] - 3 * math.hypot(ses[a], ses[b])
        assert means[b] >= float(ref)
    assert means[64] - means[1] > 0.05  # a real improvement, not just noise


def test_exact_likelihood_by_quadrature_sits_between_elbo_and_iwae_limit():
    # log p(x) = log of a 2-D integral of p(x|z) p(z), computed by adaptive quadrature
    # (scipy.integrate.dblquad, QUADPACK). Jensen's inequality puts the ELBO below it;
    # Burda et al. 2016, Theorem 1: L_k -> log p(x) as k -> infinity when p/q is bounded.
    dec, dec_lv, x = _tiny_model(seed=4)
    m, lv = _fitted_posterior(dec, dec_lv, x)
    enc = lambda _: (m, lv)  # noqa: E731
    decoder = lambda z: (dec(z), dec_lv)  # noqa: E731
    gen = torch.Generator().manual_seed(5)
    with torch.no_grad():
        bound = elbo(x, enc, decoder, samples=20000, generator=gen).numpy()
        iw = iwae_bound(x, enc, decoder, 20000, generator=gen).numpy()
        lw = log_weights(x, enc, decoder, 8, generator=gen)
    assert lw.shape == (8, 4)
    W1, b1, W2, b2 = [p.numpy() for p in dec.parameters()]
    var = math.exp(float(dec_lv))

    def log_joint(z1, z2, xi):
        mean = W2 @ np.tanh(W1 @ np.array([z1, z2]) + b1) + b2
        return (-0.5 * np.sum((xi - mean) ** 2) / var - 1.5 * math.log(2 * math.pi * var)
                - 0.5 * (z1 * z1 + z2 * z2) - math.log(2 * math.pi))

    for i in range(len(x)):
        xi = x[i].numpy()
        grid = np.linspace(-6, 6, 61)
        peak = max(log_joint(a, b, xi) for a in grid for b in grid)
        val, err = integrate.dblquad(lambda z2, z1: math.exp(log_joint(z1, z2, xi) - peak),
                                     -8, 8, -8, 8, epsabs=1e-9, epsrel=1e-6)
        exact = peak + math.log(val)
        assert err / val < 1e-5
        assert bound[i] < exact  # 20000-sample ELBO: MC error ~1e-3, gaps here are >= 0.04
        assert abs(iw[i] - exact) < 0.02  # one estimate: a bound only in expectation
        assert abs(iw[i] - exact) < 0.25 * (exact - bound[i])


# --- the model on frames -----------------------------------------------------------------

def _frames(n=20, h=48, w=64, seed=0):
    """Smooth scene with a slow brightness drift and sensor noise."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:h, 0:w]
    base = np.stack([120 + 60 * np.sin(xx / 7.0), 100 + 50 * np.cos(yy / 5.0),
                     90 + 40 * np.sin((xx + yy) / 9.0)], -1)
    out = [base * (0.8 + 0.2 * np.sin(i / 4.0)) + rng.normal(0, 3, base.shape) for i in range(n)]
    return np.clip(np.stack(out), 0, 255).astype(np.uint8)


SMALL = dict(width=8, latent=4, epochs=3, steps=24, patience=5, batch_size=8, threads=1,
             seed=0)


def test_patch_vae_fit_save_load_and_mask(tmp_path):
    # Forward chaining (cross-conformal calibration over time blocks, Vovk 2015, "Cross-
    # conformal predictors"): each calibration block is scored by a model of the frames
    # before it only, less a gap, whose stopping epoch was chosen on its own latest frames;
    # masked pixels are outside the likelihood.
    images = _frames()
    h, w = images.shape[1:3]
    mask = np.zeros((h, w), bool)
    mask[:8, :16] = True      # whole map cells (stride 4): these must score exactly 0
    mask[21:30, 33:47] = True  # odd-aligned, so part-masked cells and chroma blocks too
    model = FrameVAEModel(**SMALL)
    held = model.fit(ArraySource(images, folds=5), mask)
    # 20 frames in 5 blocks of 4; blocks 2-4 (8 or more frames before them) calibrate. The
    # model of block k learns frames 0 .. 4k-2 less a gap and the latest one (which stops).
    assert list(held.index) == list(range(8, 20))
    assert held.maps.shape == (12, h // 4, w // 4) and held.maps.dtype == np.float32
    assert np.isfinite(held.maps).all()
    assert np.all(held.maps[:, :2, :4] == 0)
    facts = model.learned()
    assert [c["train_frames"] for c in facts["chain"]] == [5, 9, 13]
    assert facts["train_frames"] == 17
    # ``steps`` alone bounds training: the first model (5 frames, 1 batch a pass) takes all
    # 24 steps in 3 epochs of 8 batches, each later one its 0.25 * 24 = 6 warm steps.
    assert [(c["steps"], c["epochs"]) for c in facts["chain"]] == [(24, 3), (6, 1), (6, 1)]
    assert facts["steps"] == 6 and facts["epochs"] == 1
    assert facts["stop_frames"] == 1 and facts["gap_frames"] == 2
    assert math.isfinite(facts["best_heldout_elbo"])
    json.dumps(facts)
    params = json.loads(json.dumps(model.get_params()))
    assert FrameVAEModel(**params).get_params() == model.get_params()

    # A block's calibration maps depend on no frame from its own block on: replacing the
    # frames of blocks 3 and 4 leaves block 2's maps exactly as they were.
    later = images.copy()
    later[12:] = np.random.default_rng(2).integers(0, 256, later[12:].shape, dtype=np.uint8)
    again = FrameVAEModel(**SMALL).fit(ArraySource(later, folds=5), mask)
    np.testing.assert_array_equal(again.maps[:4], held.maps[:4])
    assert not np.array_equal(again.maps[4:], held.maps[4:])

    maps = model.score_maps(images)
    assert np.isfinite(maps).all()
    model.save(tmp_path)
    assert (tmp_path / "vae.pt").is_file()
    loaded = FrameVAEModel.load(tmp_path, params)
    np.testing.assert_array_equal(loaded.score_maps(images), maps)
    assert loaded.learned() == facts
    rec = loaded.expected(images[:3])
    assert rec.shape == (3, h, w, 3) and rec.dtype == np.uint8

    # Altering masked pixels changes nothing, with the posterior mean and with IW scoring.
    noisy = images.copy()
    rng = np.random.default_rng(1)
    noisy[:, mask] = rng.integers(0, 256, size=noisy[:, mask].shape, dtype=np.uint8)
    np.testing.assert_array_equal(loaded.score_maps(noisy), maps)
    iw = FrameVAEModel.load(tmp_path, {**params, "iw_samples": 4})
    np.testing.assert_array_equal(iw.score_maps(noisy), iw.score_maps(images))
    # ... and an unmasked change does change the map where it happens.
    hit = images.copy()
    hit[:, 36:44, 8:16] = 255
    assert (loaded.score_maps(hit)[:, 9:11, 2:4] > maps[:, 9:11, 2:4]).all()

    # Training ignores masked pixels too: the same fit on the altered frames is identical.
    again = FrameVAEModel(**SMALL).fit(ArraySource(noisy, folds=5), mask)
    np.testing.assert_array_equal(again.maps, held.maps)


def test_importance_weighted_map_sums_to_the_bound():
    # The map splits -L_K exactly: log mean_k w_k = sum_k omega_k log w_k + H(omega) - log K
    # for the normalised weights omega (an identity of the log-sum-exp), so the cells of an
    # IW map add up to the negative importance-weighted bound (Burda et al. 2016, eq. 8).
    images = _frames(n=12)
    model = FrameVAEModel(**{**SMALL, "epochs": 1, "iw_samples": 6})
    model.fit(ArraySource(images, folds=4))
    maps = model.nll_maps(images[:5])
    net = model.net_
    gen = torch.Generator().manual_seed(model.seed + 2)  # the scoring noise, same order
    with torch.no_grad():
        bound = iwae_bound(model._planes(images[:5]), net.encode, net.decode, 6,
                           weight=net.observed, generator=gen)
    np.testing.assert_allclose(maps.sum(axis=(1, 2)), -bound.numpy(), rtol=1e-5)


def test_rejects_frames_of_another_size():
    images = _frames(n=10)
    model = FrameVAEModel(**{**SMALL, "epochs": 1})
    model.fit(ArraySource(images, folds=2))
    with pytest.raises(ValueError, match="fitted at 64x48"):
        model.score_maps(np.zeros((1, 32, 64, 3), np.uint8))
