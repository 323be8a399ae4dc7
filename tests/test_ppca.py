"""The PPCA density against reference implementations."""

import cv2
import numpy as np
import pytest
from scipy.stats import multivariate_normal
from sklearn.decomposition import PCA

from inspector.core.features import feature_size, observed_features, patch_features
from inspector.core.models.base import ArraySource
from inspector.core.models.ppca import Moments, PatchPPCA, ppca_fit, ppca_nll


def _data(n=400, d=10, seed=0):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(d, d))
    return rng.normal(size=(n, d)) @ A * 0.3 + rng.normal(size=d)


@pytest.mark.parametrize("q", [1, 3, 6])
def test_log_likelihood_matches_sklearn_and_scipy(q):
    X = _data()
    mean, cov = X.mean(0), np.cov(X.T)
    W, s2 = ppca_fit(cov[None], q)
    ll = -ppca_nll(X[:, None, :], mean[None], W, s2)[:, 0]
    # scikit-learn's PCA implements Tipping & Bishop (1999) probabilistic PCA in score_samples
    # (it too uses the unbiased sample covariance).
    ref = PCA(n_components=q).fit(X).score_samples(X)
    np.testing.assert_allclose(ll, ref, rtol=1e-10, atol=1e-9)
    # SciPy's Gaussian log-density with C = W W^T + sigma^2 I.
    C = W[0] @ W[0].T + s2[0] * np.eye(X.shape[1])
    np.testing.assert_allclose(ll, multivariate_normal(mean, C).logpdf(X), rtol=1e-10, atol=1e-9)


def test_masked_likelihood_is_the_exact_marginal():
    X = _data(d=12)
    mean, cov = X.mean(0), np.cov(X.T)
    W, s2 = ppca_fit(cov[None], 3)
    observed = np.ones((1, 12), bool)
    observed[0, [0, 5, 6, 11]] = False
    ll = -ppca_nll(X[:, None, :], mean[None], W, s2, observed)[:, 0]
    # SciPy: logpdf of the observed sub-vector under the observed sub-covariance.
    o = observed[0]
    C = W[0] @ W[0].T + s2[0] * np.eye(12)
    ref = multivariate_normal(mean[o], C[np.ix_(o, o)]).logpdf(X[:, o])
    np.testing.assert_allclose(ll, ref, rtol=1e-10, atol=1e-9)
    # Zero-filling the masked entries instead would change the answer: they are ignored.
    X2 = X.copy()
    X2[:, ~o] = 1e3
    np.testing.assert_allclose(-ppca_nll(X2[:, None, :], mean[None], W, s2, observed)[:, 0], ll)


def test_noise_scaled_likelihood_matches_scipy_with_the_inflated_covariance():
    # A frame known to carry s times the model's noise variance: the Mahalanobis term is
    # SciPy's Gaussian with C_s = W W^T + s sigma^2 I, the normalising term the model's own
    # (the likelihood less the entropy the extra noise adds: (log|C_s| - log|C|) / 2).
    X = _data(n=50, d=12)
    mean, cov = X.mean(0), np.cov(X.T)
    W, s2 = ppca_fit(cov[None], 3)
    observed = np.ones((1, 12), bool)
    observed[0, [2, 7]] = False
    o = observed[0]
    s = np.linspace(1.0, 4.0, len(X))
    nll = ppca_nll(X[:, None, :], mean[None], W, s2, observed, noise=s)[:, 0]
    C = (W[0] @ W[0].T + s2[0] * np.eye(12))[np.ix_(o, o)]
    for x, si, got in zip(X, s, nll):
        Cs = C + (si - 1.0) * s2[0] * np.eye(o.sum())
        entropy = 0.5 * (np.linalg.slogdet(Cs)[1] - np.linalg.slogdet(C)[1])
        ref = -multivariate_normal(mean[o], Cs).logpdf(x[o]) - entropy
        np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-9)


def test_streaming_moments_match_numpy_cov_with_a_block_left_out():
    rng = np.random.default_rng(1)
    X = rng.normal(size=(90, 4, 6)).astype(np.float32) + 5
    m = Moments(3, 4, 6, block_scatter=True)
    for b in range(3):
        m.add(b, X[b * 30:(b + 1) * 30])
    mean, cov, n = m.mean_cov(leave_out=1)
    keep = np.r_[X[:30], X[60:]]
    assert n == 60
    np.testing.assert_allclose(mean, keep.mean(0), rtol=1e-5)
    for loc in range(4):  # numpy.cov (unbiased) as the reference
        np.testing.assert_allclose(cov[loc], np.cov(keep[:, loc].T), rtol=1e-4, atol=1e-5)


def test_moments_consumed_by_their_last_fit_give_the_same_covariances():
    # numpy.cov (unbiased) as the reference; consumed: the same numbers to the bit, taken
    # in place, and the moments hold no products afterwards.
    rng = np.random.default_rng(4)
    X = rng.normal(size=(50, 4, 6)).astype(np.float32) + 3
    m = Moments(2, 4, 6)
    m.add(0, X[:25])
    m.add(1, X[25:])
    mean, cov, n = m.mean_cov()
    mean_c, cov_c, n_c = m.mean_cov(consume=True)
    assert n == n_c == 50 and m.total_scatter is None
    assert np.array_equal(mean, mean_c) and np.array_equal(cov, cov_c)
    for loc in range(4):
        np.testing.assert_allclose(cov_c[loc], np.cov(X[:, loc].T), rtol=1e-4, atol=1e-5)


def test_model_fit_score_save_load_roundtrip(tmp_path):
    rng = np.random.default_rng(2)
    # A smooth scene: 4:2:0 chroma cannot hold per-pixel colour noise, and cameras don't.
    base = cv2.GaussianBlur(rng.integers(0, 255, size=(32, 48, 3)).astype(np.float32), (0, 0), 1.5)
    imgs = np.clip(base + rng.normal(0, 4, (40, 32, 48, 3)), 0, 255).astype(np.uint8)
    model = PatchPPCA(patch=8, stride=4, latent=4)
    held = model.fit(ArraySource(imgs, folds=4))
    # Forward chaining: every frame of the blocks after the first 40% is held out once,
    # scored by the model of the blocks before it (the same as a model of those frames alone).
    assert sorted(held.index) == list(range(20, 40))
    early = PatchPPCA(patch=8, stride=4, latent=4)
    early.fit(ArraySource(imgs[:20], folds=2))
    in_block_2 = (held.index >= 20) & (held.index < 30)
    np.testing.assert_allclose(held.maps[in_block_2], early.score_maps(imgs[20:30]), rtol=1e-4)
    maps = model.score_maps(imgs[:3])
    # 7 x 11 patch positions of stride 4 cover 8 x 12 cells of 4 pixels.
    assert maps.shape[1:] == held.maps.shape[1:] == (8, 12)
    model.save(tmp_path)
    again = PatchPPCA.load(tmp_path, model.get_params())
    np.testing.assert_allclose(again.score_maps(imgs[:3]), maps, rtol=1e-5)
    exp = model.expected(imgs[:2])
    assert exp.shape == imgs[:2].shape and exp.dtype == np.uint8
    # The expected frame is closer to the scene than a random frame is.
    assert np.abs(exp.astype(float) - base).mean() < np.abs(imgs[0].astype(float) - base).mean()


def test_patch_features_layout_luma_then_half_resolution_chroma():
    img = np.zeros((1, 16, 16, 3), np.uint8)
    img[0, :, :8] = (255, 0, 0)
    X = patch_features(img, 8, 8, colour=True)
    assert X.shape == (1, 4, feature_size(8, True)) == (1, 4, 96)
    # ITU-R BT.601 luma of pure red is 0.299 (common practice, no source).
    np.testing.assert_allclose(X[0, 0, :64], 0.299, atol=2 / 255)
    np.testing.assert_allclose(X[0, 1, :64], 0.0, atol=1 / 255)


def _scipy_nll(model, X, s=1.0, locs=None):
    """-log N(x_o; mu_o, C_oo) per sample and location from SciPy, with the model's
    covariance in feature units: C = D^-1 (W W^T + sigma^2 I) D^-1, D weighing the chroma
    entries by ``chroma_weight_`` (scipy.stats.multivariate_normal); with ``s``, of
    C_s = D^-1 (W W^T + s sigma^2 I) D^-1 less (log|C_s| - log|C|) / 2 (see ppca_nll)."""
    d = X.shape[2]
    D = np.ones(d)
    D[64:] = model.chroma_weight_
    out = np.full(X.shape[:2], np.nan)
    for loc in range(X.shape[1]) if locs is None else locs:
        W = model.W_[loc].astype(np.float64)
        C = (W @ W.T + model.sigma2_[loc] * np.eye(d)) / np.outer(D, D)
        o = np.ones(d, bool) if model.observed_ is None else model.observed_[loc]
        if not o.any():  # a fully masked location has no density to compare
            continue
        Cs = C + (s - 1.0) * model.sigma2_[loc] * np.diag(1.0 / D ** 2)
        entropy = 0.5 * (np.linalg.slogdet(Cs[np.ix_(o, o)])[1]
                         - np.linalg.slogdet(C[np.ix_(o, o)])[1])
        out[:, loc] = -multivariate_normal(model.mean_[loc][o].astype(np.float64),
                                           Cs[np.ix_(o, o)]).logpdf(X[:, loc][:, o]) - entropy
    return out


def test_fast_scoring_path_equals_the_reference_formula():
    # The scoring path gathers residuals in grey levels with the mean subtracted on the way;
    # it must give the likelihood of ppca_nll (checked above against scikit-learn and SciPy).
    rng = np.random.default_rng(5)
    base = cv2.GaussianBlur(rng.integers(0, 255, size=(24, 40, 3)).astype(np.float32), (0, 0), 1)
    imgs = np.clip(base + rng.normal(0, 5, (30, 24, 40, 3)), 0, 255).astype(np.uint8)
    model = PatchPPCA(patch=8, stride=4, latent=3, chroma_noise="own")
    model.fit(ArraySource(imgs, folds=3))
    X = patch_features(imgs[:4], 8, 4, colour=True)
    assert model.chroma_weight_ != 1.0  # the weighted path is the one checked
    np.testing.assert_allclose(model.patch_nll(imgs[:4]), _scipy_nll(model, X),
                               rtol=2e-4, atol=2e-2)
    centered = patch_features(imgs[:4], 8, 4, True, center=model.mean_)
    np.testing.assert_allclose(centered, X - model.mean_[None], atol=1e-6)


def test_block_scoring_with_a_mask_equals_the_reference_formula():
    # Scoring from blocks (mean and mask applied once per block, projections summed over a
    # patch's blocks) must give ppca_nll's likelihood, masked entries marginalised out.
    rng = np.random.default_rng(6)
    base = cv2.GaussianBlur(rng.integers(0, 255, size=(32, 48, 3)).astype(np.float32), (0, 0), 1)
    imgs = np.clip(base + rng.normal(0, 5, (40, 32, 48, 3)), 0, 255).astype(np.uint8)
    mask = np.zeros((32, 48), bool)
    mask[3:13, 5:22] = True  # not aligned with the blocks
    model = PatchPPCA(patch=8, stride=4, latent=4, chroma_noise="own")
    model.fit(ArraySource(imgs, folds=3), mask)
    assert model._blocks is not None and model.observed_ is not None
    X = patch_features(imgs[:5], 8, 4, colour=True)
    ref = _scipy_nll(model, X)
    seen = np.isfinite(ref[0])
    np.testing.assert_allclose(model.patch_nll(imgs[:5])[:, seen], ref[:, seen],
                               rtol=2e-4, atol=2e-2)
    # frames with 2.5 times the model's noise variance (Conditions.noise_scale), at a few
    # locations, partly masked ones among them
    some = np.flatnonzero(seen)[::8]
    np.testing.assert_allclose(model.patch_nll(imgs[:5], noise=np.full(5, 2.5))[:, some],
                               _scipy_nll(model, X, 2.5, some)[:, some], rtol=2e-4, atol=2e-2)


def test_expected_patches_unchanged_by_the_block_order():
    # B kept in block order gives back the feature-order B of ppca_precompute
    from inspector.core.models.ppca import ppca_precompute

    rng = np.random.default_rng(7)
    imgs = rng.integers(0, 255, size=(20, 16, 24, 3)).astype(np.uint8)
    model = PatchPPCA(patch=8, stride=4, latent=2)
    model.fit(ArraySource(imgs, folds=2))
    B, _, _ = ppca_precompute(model.W_, model.sigma2_, model.observed_)
    np.testing.assert_allclose(model._b(), B, rtol=1e-5, atol=1e-6)
    assert model.expected(imgs[:2]).shape == (2, 16, 24, 3)


def test_heldout_latent_scores_every_size_like_scipy():
    # Held-out NLL of a PPCA of training samples, for every latent size, from moments only
    # (heldout_latent) equals the mean of SciPy's Gaussian log-densities of the held-out
    # samples under C = W W^T + sigma^2 I fitted in closed form (Tipping & Bishop 1999).
    from inspector.core.models.ppca import heldout_latent

    rng = np.random.default_rng(0)
    d, q_true = 10, 3
    A = rng.normal(size=(q_true, d))
    X = rng.normal(size=(300, q_true)) @ A + 0.3 * rng.normal(size=(300, d)) + 1.0
    train, test = X[:200], X[200:]
    mean, cov = train.mean(0), np.cov(train.T)
    evals, evecs = np.linalg.eigh(cov)
    evals, evecs = evals[::-1][None], evecs[:, ::-1][None]
    second = ((test - mean).T @ (test - mean) / len(test))[None]
    q, nll = heldout_latent(evals, evecs, second, max_latent=8)
    for k in range(1, 9):
        W, s2 = ppca_fit(cov[None], k)
        C = W[0] @ W[0].T + s2[0] * np.eye(d)
        ref = -multivariate_normal(mean, C).logpdf(test).mean()
        assert nll[k - 1] == pytest.approx(ref, rel=1e-9)
    assert q == q_true  # the size the held-out frames support, not the largest


def test_heldout_rule_picks_a_size_and_is_kept():
    rng = np.random.default_rng(2)
    imgs = np.clip(rng.normal(120, 8, (40, 16, 24, 3)), 0, 255).astype(np.uint8)
    m = PatchPPCA(latent_rule="heldout")
    m.fit(ArraySource(imgs, folds=4))
    assert 1 <= m.q_ <= m.max_latent and m.get_params()["latent_rule"] == "heldout"


def test_blocks_calibration_drops_are_not_scored():
    # With alpha 0.1 the conformal threshold needs ceil(1 / alpha - 1) = 9 scores (Vovk,
    # Gammerman & Shafer 2005): of the scored blocks 2, 3, 4 (8 frames each) newest_blocks
    # keeps 3 and 4, so block 2 is only trained on; the rest is the plain fit's (to the
    # eigensolver's tolerance: without block 2's model, block 3's starts from LAPACK's
    # pairs, not from that model's vectors).
    from inspector.core.calibration import newest_blocks

    rng = np.random.default_rng(2)
    imgs = np.clip(rng.normal(120, 8, (40, 16, 24, 3)), 0, 255).astype(np.uint8)
    plain, lean = PatchPPCA(batch_size=8), PatchPPCA(batch_size=8)
    held = plain.fit(ArraySource(imgs))
    some = lean.fit(ArraySource(imgs), alpha=0.1)
    keep = newest_blocks(held.index // 8, 0.1)
    assert set(held.index // 8) == {2, 3, 4} and set(some.index // 8) == {3, 4}
    np.testing.assert_array_equal(some.index, held.index[keep])
    np.testing.assert_allclose(some.maps, held.maps[keep], rtol=1e-6)
    np.testing.assert_allclose(lean.sigma2_, plain.sigma2_, rtol=1e-9)
    WWt = [np.einsum("ldq,leq->lde", m.W_, m.W_) for m in (lean, plain)]
    np.testing.assert_allclose(WWt[0], WWt[1], rtol=0, atol=1e-9 * np.abs(WWt[1]).max())


def test_work_beside_the_final_fit_gets_the_held_out_maps_and_its_error_is_raised():
    # fit(beside=) runs it on the held-out maps while the final model is fitted: the same
    # maps as returned, the same model as without it; what it raises, fit raises.
    rng = np.random.default_rng(2)
    imgs = np.clip(rng.normal(120, 8, (40, 8, 16, 3)), 0, 255).astype(np.uint8)
    seen: list = []
    plain, beside = PatchPPCA(batch_size=8), PatchPPCA(batch_size=8)
    held = beside.fit(ArraySource(imgs), beside=seen.append)
    assert len(seen) == 1 and seen[0] is held
    np.testing.assert_array_equal(held.maps, plain.fit(ArraySource(imgs)).maps)
    np.testing.assert_array_equal(beside.W_, plain.W_)

    def fails(held):
        raise RuntimeError("calibration failed")

    with pytest.raises(RuntimeError, match="calibration failed"):
        PatchPPCA(batch_size=8).fit(ArraySource(imgs), beside=fails)
    # several jobs: each gets the maps; the first of them that failed is raised
    both: list = []
    PatchPPCA(batch_size=8).fit(ArraySource(imgs), beside=[both.append, both.append])
    assert len(both) == 2 and both[0] is both[1]

    def later(held):
        raise KeyError("later")

    with pytest.raises(RuntimeError, match="calibration failed"):
        PatchPPCA(batch_size=8).fit(ArraySource(imgs), beside=[both.append, fails, later])


def test_masked_fit_is_the_ppca_of_the_observed_features():
    # The fit path with an ignore mask: a location partly under the mask is the PPCA of its
    # observed features only (Tipping & Bishop 1999), which scikit-learn's PCA.score_samples
    # computes from those columns; a fully masked location scores 0.
    from inspector.core.features import observed_features

    rng = np.random.default_rng(7)
    base = cv2.GaussianBlur(rng.integers(0, 255, size=(16, 24, 3)).astype(np.float32), (0, 0), 1)
    imgs = np.clip(base + rng.normal(0, 6, (120, 16, 24, 3)), 0, 255).astype(np.uint8)
    mask = np.zeros((16, 24), bool)
    mask[2:6, 1:5] = True    # part of location 0
    mask[8:16, 16:24] = True  # all of the last location
    model = PatchPPCA(patch=8, stride=8, colour=False, latent=3, var_floor=0.0)
    model.fit(ArraySource(imgs[:100], folds=2), mask)
    obs = observed_features(mask, 8, 8, False)
    assert not obs[0].all() and obs[0].any() and not obs[-1].any()
    X = patch_features(imgs, 8, 8, colour=False).astype(np.float64)
    ref = PCA(n_components=3).fit(X[:100, 0][:, obs[0]]).score_samples(X[100:, 0][:, obs[0]])
    np.testing.assert_allclose(-model.patch_nll(imgs[100:])[:, 0], ref, rtol=1e-4)
    maps = model.score_maps(imgs[100:])
    assert np.all(maps[:, 2:, 4:] == 0)  # cells of the fully masked location


def test_chroma_weight_recovers_group_noise_like_factor_analysis():
    # Samples from C = W W^T + diag(s_l I, s_c I): luminance noise 16 times the chroma noise.
    # scikit-learn's FactorAnalysis (per-entry noise by maximum likelihood) gives the noise of
    # each group; the one-step weight must agree with it and with the truth (c = 4), and the
    # weighted model must give held-out samples a higher likelihood than plain PPCA (SciPy).
    from sklearn.decomposition import FactorAnalysis

    from inspector.core.models.ppca import chroma_weight, weigh_chroma

    rng = np.random.default_rng(11)
    n_luma, d, q = 16, 24, 2
    W = rng.normal(size=(d, q))
    noise = np.r_[np.full(n_luma, 0.16), np.full(d - n_luma, 0.01)]
    X = rng.normal(size=(6000, q)) @ W.T + rng.normal(size=(6000, d)) * np.sqrt(noise)
    train, test = X[:3000], X[3000:]
    cov = np.cov(train.T)[None]
    c = chroma_weight(cov, n_luma, latent=q)
    fa = FactorAnalysis(n_components=q, random_state=0).fit(train).noise_variance_
    c_fa = np.sqrt(fa[:n_luma].mean() / fa[n_luma:].mean())
    assert c == pytest.approx(4.0, rel=0.1) and c == pytest.approx(c_fa, rel=0.1)
    mean = train.mean(0)
    D = np.r_[np.ones(n_luma), np.full(d - n_luma, c)]
    Ww, s2w = ppca_fit(weigh_chroma(cov.copy(), n_luma, c), q)
    weighted = (Ww[0] @ Ww[0].T + s2w[0] * np.eye(d)) / np.outer(D, D)
    Wp, s2p = ppca_fit(cov, q)
    plain = Wp[0] @ Wp[0].T + s2p[0] * np.eye(d)
    ll = [multivariate_normal(mean, C).logpdf(test).mean() for C in (weighted, plain)]
    assert ll[0] > ll[1] + 1.0
    assert chroma_weight(cov[:, :n_luma, :n_luma], n_luma, latent=q) == 1.0  # no chroma


def test_planes_are_the_ycrcb_planes_with_exact_2x2_chroma_means():
    # ITU-R BT.601 YCrCb as OpenCV converts it (the JPEG convention); the chroma planes are
    # the exact means of 2 x 2 blocks, written here with numpy on a bundled photograph.
    from skimage import data as skdata

    from inspector.core.features import _planes

    img = skdata.astronaut()[:64, :96]
    images = np.stack([img, img[::-1], img[:, ::-1]])
    luma, chroma = _planes(images, True)
    ycc = np.stack([cv2.cvtColor(x, cv2.COLOR_RGB2YCrCb) for x in images])
    np.testing.assert_array_equal(luma, ycc[..., 0])
    want = ycc[..., 1:].astype(np.float64).reshape(3, 32, 2, 48, 2, 2).mean(axis=(2, 4))
    np.testing.assert_array_equal(chroma, want.astype(np.float32))


@pytest.mark.parametrize("q", [1, 2, 6])
def test_top_eigenpairs_alone_give_the_same_model_as_sklearn_pca(q):
    # With the latent size given, only the top q eigenpairs are computed (LAPACK dsyevr
    # over an index range, for q <= d / 8): the model must equal scikit-learn's PCA of the
    # same frames (Tipping & Bishop 1999 in get_covariance) and the pairs SciPy's full eigh.
    from scipy.linalg import eigh

    from inspector.core.models.ppca import batched_eigh

    X = _data(n=300, d=48, seed=q)
    cov = np.cov(X.T)
    vals, vecs = batched_eigh(np.stack([cov, 2 * cov]), top=q, all_values=False)
    ref_vals, ref_vecs = eigh(cov)
    np.testing.assert_allclose(vals[0], ref_vals[-q:], rtol=1e-10)
    np.testing.assert_allclose(vals[1], 2 * ref_vals[-q:], rtol=1e-10)
    # Eigenvectors up to sign: the projector onto them.
    np.testing.assert_allclose(vecs[0] @ vecs[0].T, ref_vecs[:, -q:] @ ref_vecs[:, -q:].T,
                               atol=1e-9)
    W, s2 = ppca_fit(cov[None], q)
    C = W[0] @ W[0].T + s2[0] * np.eye(48)
    np.testing.assert_allclose(C, PCA(n_components=q).fit(X).get_covariance(),
                               rtol=1e-9, atol=1e-12)


def _patch_like(kind, L=6, d=48, seed=0):
    """Covariances of samples drawn with a decaying spectrum (patch covariances fall off
    so, common practice, no source), and those of the first 80 % of the samples (an
    earlier fold's). ``kind``: "random"; "cluster" (two top eigenvalues 1e-6 apart and a
    flat tail); "rank" (rank 6); "masked" (rows and columns of 8 entries zero)."""
    rng = np.random.default_rng(seed)
    spec = 1.0 / (1.0 + np.arange(d)) ** 1.5
    if kind == "cluster":
        spec[1] = spec[0] * (1 - 1e-6)
        spec[6:] = spec[6]
    if kind == "rank":
        spec[6:] = 0.0
    U = np.linalg.qr(rng.normal(size=(L, d, d)))[0]
    X = rng.normal(size=(L, 600, d)) @ (U * np.sqrt(spec)).transpose(0, 2, 1)
    if kind == "masked":
        X[:, :, d - 8:] = 0.0
    cov = X.transpose(0, 2, 1) @ X / 600
    early = X[:, :480].transpose(0, 2, 1) @ X[:, :480] / 480
    return cov, early


@pytest.mark.parametrize("kind", ["random", "cluster", "rank", "masked"])
def test_top_pairs_found_from_a_start_equal_scipys(kind):
    # Subspace iteration from an earlier fold's vectors against SciPy's eigh over an index
    # range (LAPACK): eigenvalues to 1e-10 of the largest, the top-k subspace (projector)
    # to 1e-8; and the PPCA fitted from that start against the one fitted without.
    from scipy.linalg import eigh

    from inspector.core.models.ppca import batched_eigh, top_eigh_from

    cov, early = _patch_like(kind)
    d = cov.shape[-1]
    W0, _ = ppca_fit(early, 3)
    for k in (1, 2, 5):
        vals, vecs, done = top_eigh_from(cov, k, W0)
        assert done.all()
        for i in range(len(cov)):
            ref_vals, ref_vecs = eigh(cov[i], subset_by_index=[d - k, d - 1])
            np.testing.assert_allclose(vals[i], ref_vals, rtol=0, atol=1e-10 * ref_vals[-1])
            np.testing.assert_allclose(vecs[i] @ vecs[i].T, ref_vecs @ ref_vecs.T, atol=1e-8)
    both = batched_eigh(cov, top=k, all_values=False, start=W0)
    np.testing.assert_allclose(both[0], vals, rtol=0, atol=1e-10 * vals.max())
    W, s2 = ppca_fit(cov, k, start=W0)
    W1, s21 = ppca_fit(cov, k)
    np.testing.assert_allclose(s2, s21, rtol=1e-10)
    np.testing.assert_allclose(W @ W.transpose(0, 2, 1), W1 @ W1.transpose(0, 2, 1),
                               rtol=0, atol=1e-9 * np.abs(W1).max() ** 2)


def test_matrices_the_start_does_not_settle_go_to_lapack(monkeypatch):
    # One Rayleigh-Ritz step allowed: the matrix started from its own eigenvectors is
    # taken, the others go to LAPACK (dsyevr) and equal its pairs to the bit.
    import functools

    import inspector.core.models.ppca as ppca

    cov, early = _patch_like("random", L=4, seed=9)
    d = cov.shape[-1]
    start = ppca.batched_eigh(early, top=3, all_values=False)[1][:, :, ::-1].copy()
    start[0] = ppca.batched_eigh(cov[:1], top=3, all_values=False)[1][0, :, ::-1]
    one_step = functools.partial(ppca.top_eigh_from, steps=1)
    _, _, done = one_step(cov, 2, start)
    assert done[0] and not done[1:].any()
    monkeypatch.setattr(ppca, "top_eigh_from", one_step)
    vals, vecs = ppca.batched_eigh(cov, top=2, all_values=False, start=start)
    lapack_vals, lapack_vecs = ppca.batched_eigh(cov, top=2, all_values=False)
    np.testing.assert_array_equal(vals[1:], lapack_vals[1:])
    np.testing.assert_array_equal(vecs[1:], lapack_vecs[1:])
    np.testing.assert_allclose(vals[0], lapack_vals[0], rtol=1e-12)
    assert d == 48


@pytest.mark.parametrize("colour", [True, False])
def test_moments_kept_per_block_equal_numpy_cov_of_the_patches(colour):
    # Overlapping patches share blocks: moments kept per block (sums and products of
    # neighbouring blocks) must give each location the covariance numpy.cov gives its patch
    # features, for all frames, with a time block left out, for the blocks before one, at
    # every k-th location, and when moments of two parts of the frames are merged
    # (numpy.cov as the reference).
    from skimage import data

    rng = np.random.default_rng(4)
    scene = cv2.resize(data.astronaut(), (40, 24), interpolation=cv2.INTER_AREA).astype(float)
    imgs = np.clip(scene * rng.uniform(0.8, 1.2, (60, 1, 1, 1))
                   + rng.normal(0, 6, (60, 24, 40, 3)), 0, 255).astype(np.uint8)
    model = PatchPPCA(patch=8, stride=4, colour=colour)
    model.grid_, model.map_shape_ = (5, 9), (6, 10)
    X = patch_features(imgs, 8, 4, colour).astype(np.float64)  # (60, 45, d)
    whole = model._new_moments(3, block_scatter=True)
    assert whole.r == 2  # the blocked layout is the one tested
    parts = [model._new_moments(3, block_scatter=True) for _ in range(2)]
    for b in range(3):
        frames = imgs[b * 20:(b + 1) * 20]
        whole.add(b, model._samples(frames))
        parts[0].add(b, model._samples(frames[:7]))  # a different shift in each part
        parts[1].add(b, model._samples(frames[7:] // 2 + 60))
    merged = parts[0].merge(parts[1])
    reference = np.concatenate([np.r_[X[b * 20:b * 20 + 7]] for b in range(3)])

    def check(got, samples):
        mean, cov, n = got
        assert n == len(samples)
        np.testing.assert_allclose(mean, samples.mean(0), rtol=1e-5, atol=1e-6)
        for loc in range(samples.shape[1]):
            np.testing.assert_allclose(cov[loc], np.cov(samples[:, loc].T), rtol=1e-4,
                                       atol=1e-6)

    check(whole.mean_cov(), X)
    check(whole.mean_cov(leave_out=1), np.r_[X[:20], X[40:]])
    check(whole.mean_cov(before=2), X[:40])
    halves = patch_features(np.concatenate([imgs[b * 20 + 7:(b + 1) * 20] // 2 + 60
                                            for b in range(3)]), 8, 4, colour)
    check(merged.mean_cov(), np.r_[reference, halves.astype(np.float64)])
    n, s, S = whole.sums(before=2, every=4)
    assert n == 40
    centred = X[:40, ::4] - whole._location_sums(whole.shift, np.arange(0, 45, 4))
    np.testing.assert_allclose(s, centred.sum(0), rtol=1e-4, atol=1e-4)
    np.testing.assert_allclose(S, np.einsum("nld,nle->lde", centred, centred), rtol=1e-4,
                               atol=1e-4)


def test_fit_chunk_by_chunk_equals_scikit_learn_and_the_whole_fit():
    # With the latent size known, locations are fitted a chunk at a time from the moments
    # (their covariances never all formed): each location's model must be scikit-learn's
    # PCA of its patch features (Tipping & Bishop 1999 in get_covariance), and with a mask
    # and chroma noise of its own, the fit of all covariances at once.
    from skimage import data

    rng = np.random.default_rng(5)
    scene = cv2.resize(data.coffee(), (80, 48), interpolation=cv2.INTER_AREA).astype(float)
    imgs = np.clip(scene * rng.uniform(0.8, 1.2, (120, 1, 1, 1))
                   + rng.normal(0, 6, (120, 48, 80, 3)), 0, 255).astype(np.uint8)
    model = PatchPPCA(patch=8, stride=4, var_floor=0.0)
    model.grid_, model.map_shape_, model.observed_ = (11, 19), (12, 20), None  # 2 chunks
    moments = model._new_moments(1)
    model._add(moments, 0, imgs)  # (the entries scaled by Moments.add)
    mean, W, s2 = model._fit_moments(moments, 3)
    X = patch_features(imgs, 8, 4, colour=True).astype(np.float64)
    for loc in (0, 100, 150, 208):
        C = W[loc] @ W[loc].T + s2[loc] * np.eye(96)
        np.testing.assert_allclose(C, PCA(n_components=3).fit(X[:, loc]).get_covariance(),
                                   rtol=1e-4, atol=1e-9)
    np.testing.assert_allclose(mean, X.mean(0), rtol=1e-5, atol=1e-6)
    mask = np.zeros((48, 80), bool)
    mask[:20] = True  # the top rows of locations wholly masked
    mask[30:40, 10:30] = True
    masked = PatchPPCA(patch=8, stride=4, chroma_noise="own")
    masked.grid_, masked.map_shape_ = (11, 19), (12, 20)
    masked.observed_ = observed_features(mask, 8, 4, True)
    _, W1, s1 = masked._fit_moments(moments, 4)
    c1 = masked.chroma_weight_
    _, cov, _ = moments.mean_cov()
    W2, s2 = masked._fit_params(cov.astype(np.float64), 4)
    assert c1 == pytest.approx(masked.chroma_weight_, rel=1e-6) and c1 != 1.0
    np.testing.assert_allclose(np.einsum("lik,ljk->lij", W1, W1),
                               np.einsum("lik,ljk->lij", W2, W2), rtol=1e-5, atol=1e-8)
    np.testing.assert_allclose(s1, s2, rtol=1e-6)  # (the whole fit's are float32)


@pytest.mark.parametrize("kind", ["random", "cluster", "rank", "masked"])
def test_top_pairs_without_pythons_lock_equal_scipys_dsyevr_to_the_bit(kind):
    # TopPairs calls LAPACK's dsyevr through SciPy's Cython interface with ctypes (which
    # lets go of Python's lock): the same routine, arguments and workspace as SciPy's
    # wrapper scipy.linalg.lapack.dsyevr, so the same numbers to the bit, float32 or
    # float64 matrices, with and without vectors, one instance reused.
    from scipy.linalg import lapack

    from inspector.core.models.ppca import ABSTOL, TopPairs

    cov, _ = _patch_like(kind, L=4, seed=3)
    d = cov.shape[-1]
    for keep in (1, 3, 6, d):
        for vectors in (True, False):
            pairs = TopPairs(d, keep, vectors)
            for matrix in list(cov) + [cov[0].astype(np.float32)]:
                w, v, m, _, info = lapack.dsyevr(np.asarray(matrix, np.float64),
                                                 compute_v=vectors, range="I",
                                                 il=d - keep + 1, iu=d, abstol=ABSTOL)
                got_w, got_v = pairs(matrix)
                assert info == 0 and m == keep
                np.testing.assert_array_equal(got_w, w[:keep])
                if vectors:
                    np.testing.assert_array_equal(got_v, v[:, :keep])
                else:
                    assert got_v is None
