"""Per-location probabilistic PCA over patches: the default baseline model.

Each patch position of the camera's frame has its own Gaussian density
``N(mu, W W^T + sigma^2 I)`` fitted in closed form (Tipping & Bishop 1999, "Probabilistic
principal component analysis", J. R. Statist. Soc. B 61(3), eqs. 7-8):

    sigma^2 = mean of the d - q discarded eigenvalues of the sample covariance,
    W = U_q (Lambda_q - sigma^2 I)^(1/2).

Fitting streams over the frames and keeps only per-location sufficient statistics (count,
sum, scatter), so memory does not grow with the number of frames. The frames are read once,
in time order: each time block is scored by the model of the blocks before it (fitted from
the moments so far) before it is added, so every calibration frame comes after the frames
of its model, as scan frames do (forward chaining; cross-conformal calibration, Vovk 2015).

Scoring uses the Woodbury identity and the matrix determinant lemma: with
``M = W^T W + sigma^2 I_q``,

    C^-1 = (I - W M^-1 W^T) / sigma^2,   log|C| = (d - q) log sigma^2 + log|M|,

so a frame costs O(L d q) for L locations, never a d x d inverse. Ignored (masked) pixels
are marginalised out exactly: the marginal of a Gaussian over the observed entries is the
Gaussian with the observed rows of ``mu`` and ``W``, which is again a PPCA, and it is fitted
from the observed sub-covariance.
"""

from __future__ import annotations

import copy
from concurrent.futures import ThreadPoolExecutor
from contextlib import nullcontext
from pathlib import Path
from typing import Any

import numpy as np
from threadpoolctl import ThreadpoolController

from inspector.core.calibration import newest_blocks
from inspector.core.features import (
    block_features,
    block_order,
    feature_size,
    fold_to_cells,
    grid_shape,
    observed_features,
    patch_features,
)
from inspector.core.models.base import DensityModel, FrameSource, HeldOut

LOG_2PI = float(np.log(2.0 * np.pi))
#: Pixels averaged into one chroma entry of a patch feature (a 2x2 block, 4:2:0 layout of
#: :mod:`inspector.core.features`): the variance floor of a chroma entry is a quarter of a
#: luminance entry's.
CHROMA_PIXELS = 4
#: The held-out latent size (one for all locations) is chosen from every this-many-th
#: location: the summed held-out likelihood of a regular sample of the locations, at an
#: eighth of the eigendecompositions and of the copies of the moments it needs.
HELDOUT_EVERY = 8
#: Locations per chunk when gathering scatter and forming covariances (bounds temporaries).
CHUNK = 256
#: Absolute tolerance of the bisection in :func:`batched_eigh` (twice the safe minimum, as
#: LAPACK advises for the most accurate eigenvalues).
ABSTOL = 2 * float(np.finfo(np.float64).tiny)
#: Relative residual ``||C v - theta v|| / ||C||`` at which :func:`top_eigh_from` takes an
#: eigenpair: eigenvalues then agree with LAPACK's to round-off (the error is second order
#: in the residual) and vectors to about ``EIG_TOL / relative gap``.
EIG_TOL = 1e-10
#: Extra vectors in :func:`top_eigh_from`'s block beyond the wanted ones.
EIG_GUARD = 4
#: Matrices :func:`batched_eigh` hands :func:`top_eigh_from` at once: its filter multiplies
#: them again and again, so they are kept within a core's cache (24 of 96 x 96 float64 are
#: 1.8 MB; 2 MB of L2 here); also its filter degree is chosen per group.
FROM_START_CHUNK = 24


def batched_eigh(cov: np.ndarray, vectors: bool = True, workers: int = 2,
                 top: int | None = None, chunk: int = 128, all_values: bool = True,
                 start: np.ndarray | None = None, pool=None):
    """``numpy.linalg.eigh`` over a stack of small symmetric matrices, faster and leaner.

    A multi-threaded BLAS spends most of its time synchronising on matrices this small
    (about 18 times slower than one thread, measured on 96 x 96); so BLAS is held to one
    thread and the stack is cut into chunks of ``chunk`` matrices shared by ``workers``
    Python threads (LAPACK releases the GIL), each writing into the outputs directly.

    With ``all_values`` False and few wanted pairs (``top`` <= d / 8) only those are
    computed, by LAPACK's ``dsyevr`` over an index range (:class:`TopPairs`, outside
    Python's lock; reduction to tridiagonal form, then bisection and inverse iteration for
    the wanted pairs alone): as exact as the full
    decomposition, at 0.19 ms instead of 0.63 ms for the top pair of a 96 x 96 matrix
    (0.34 ms for five; no gain beyond about twelve: measured on patch covariances, one
    thread). With ``start`` as well (vectors near the wanted ones, e.g. those of a
    closely related covariance) they are found by :func:`top_eigh_from` instead, which
    skips the reduction, to a residual of :data:`EIG_TOL`; LAPACK takes the matrices it
    leaves.

    Parameters
    ----------
    cov : ndarray, shape (L, d, d)
        Symmetric (positive semi-definite when ``start`` is given).
    vectors : bool
    top : int, optional
        Keep only the eigenvectors of the ``top`` largest eigenvalues (a PPCA of latent
        size q <= top needs no others): the output is then (L, d, top), not (L, d, d).
    all_values : bool
        False: return only the ``top`` largest eigenvalues (needs ``top``).
    start : ndarray, shape (L, d, m), optional
        Starting vectors for :func:`top_eigh_from` (used with ``all_values`` False).
    pool : executor, optional
        Threads to run the chunks in instead of ``workers`` of its own (shared with other
        work: see :meth:`PatchPPCA.fit`'s ``beside``).

    Returns
    -------
    evals : ndarray, shape (L, d), or (L, top) without ``all_values``; float64, ascending
    evecs : ndarray, shape (L, d, k), float64, k = ``top`` or d (with ``vectors``); the
        columns in the order of their eigenvalues, the largest last.
    """
    n, d = len(cov), cov.shape[-1]
    keep = d if top is None else max(1, min(int(top), d))
    subset = not all_values and 8 * keep <= d
    evals = np.empty((n, d if all_values else keep))
    evecs = np.empty((n, d, keep)) if vectors else None
    bounds = list(range(0, n, chunk)) + [n]

    def one(k: int) -> None:
        part = slice(bounds[k], bounds[k + 1])
        if subset:
            left = range(part.start, part.stop)
            if start is not None:
                left = []
                for a in range(part.start, part.stop, FROM_START_CHUNK):
                    few = slice(a, min(a + FROM_START_CHUNK, part.stop))
                    w, v, done = top_eigh_from(np.asarray(cov[few], np.float64), keep,
                                               start[few])
                    evals[few] = w
                    if vectors:
                        evecs[few] = v
                    left += list(a + np.flatnonzero(~done))
            top_pairs = TopPairs(d, keep, vectors) if len(left) else None
            for i in left:
                w, v = top_pairs(cov[i])
                evals[i] = w
                if vectors:
                    evecs[i] = v
        elif vectors:
            w, v = np.linalg.eigh(np.asarray(cov[part], np.float64))
            evals[part], evecs[part] = w[:, d - evals.shape[1]:], v[:, :, d - keep:]
        else:
            w = np.linalg.eigvalsh(np.asarray(cov[part], np.float64))
            evals[part] = w[:, d - evals.shape[1]:]

    in_chunks(one, len(bounds) - 1, workers, pool)
    return (evals, evecs) if vectors else evals


_BLAS: ThreadpoolController | None = None  # see one_blas_thread


def one_blas_thread():
    """A context in which BLAS (and OpenMP) run on one thread (threadpoolctl): the products
    of a fit are of small matrices, shared out by Python threads of their own where there is
    more than one job (see :func:`batched_eigh`). A multi-threaded BLAS synchronises its
    threads on each small product, and spins while the other thread waits for a core: one
    stacked product of 435 matrices 96 x 96 took 0.15-0.5 s of CPU on two threads against
    0.035 s on one (heldout_latent's, at load 7-30), up to 6.7 s at load 30. The libraries
    are found once (``threadpool_limits`` looks them up at every call, about 1.2 ms), after
    SciPy's LAPACK, which :func:`batched_eigh` calls, is loaded."""
    global _BLAS
    if _BLAS is None:
        from scipy.linalg import lapack  # noqa: F401 (its BLAS loaded before the look-up)

        _BLAS = ThreadpoolController()
    return _BLAS.limit(limits=1)


class TopPairs:
    """The ``keep`` largest eigenpairs of symmetric d x d matrices, one at a time, by LAPACK's
    ``dsyevr`` over an index range, as ``scipy.linalg.lapack.dsyevr`` computes them (the same
    routine from SciPy's Cython interface, ``scipy.linalg.cython_lapack``, with the same
    arguments and workspace sizes: the same numbers to the bit), but with Python's lock let
    go during the call (ctypes does; SciPy's wrapper holds it): a fit's thousands of calls
    then run beside the other threads' Python instead of stopping them. Buffers are reused
    from call to call, so one instance serves one thread.

    Parameters
    ----------
    d, keep : int
        Matrix size and pairs wanted, 1 <= keep <= d.
    vectors : bool
    abstol : float, optional
        Absolute tolerance of the bisection (default :data:`ABSTOL`).
    """

    _routine = None  # the ctypes function, found once

    def __init__(self, d: int, keep: int, vectors: bool = True, abstol: float | None = None):
        import ctypes

        if TopPairs._routine is None:
            from scipy.linalg import cython_lapack

            capsule = cython_lapack.__pyx_capi__["dsyevr"]
            name = ctypes.PYFUNCTYPE(ctypes.c_char_p, ctypes.py_object)(
                ("PyCapsule_GetName", ctypes.pythonapi))(capsule)
            address = ctypes.PYFUNCTYPE(ctypes.c_void_p, ctypes.py_object, ctypes.c_char_p)(
                ("PyCapsule_GetPointer", ctypes.pythonapi))(capsule, name)
            TopPairs._routine = ctypes.CFUNCTYPE(None, *[ctypes.c_void_p] * 21)(address)
        self.keep, self.vectors = int(keep), bool(vectors)
        self._a = np.empty((d, d), order="F")  # (overwritten by the routine)
        self._w = np.empty(d)
        self._z = np.empty((d, self.keep), order="F")
        self._isuppz = np.empty(2 * d, np.intc)
        self._work = np.empty(max(26 * d, 1))  # SciPy's sizes: the same blocking, the same
        self._iwork = np.empty(max(10 * d, 1), np.intc)  # numbers
        self._m, self._info = ctypes.c_int(0), ctypes.c_int(0)
        self._scalars = [ctypes.c_char(b"V" if vectors else b"N"), ctypes.c_char(b"I"),
                         ctypes.c_char(b"U"), ctypes.c_int(d), ctypes.c_double(0.0),
                         ctypes.c_int(d - self.keep + 1), ctypes.c_int(d),
                         ctypes.c_double(ABSTOL if abstol is None else float(abstol)),
                         ctypes.c_int(len(self._work)), ctypes.c_int(len(self._iwork))]
        jobz, rng, uplo, n, v0, il, iu, tol, lwork, liwork = (
            ctypes.addressof(v) for v in self._scalars)
        self._args = (jobz, rng, uplo, n, self._a.ctypes.data, n, v0, v0, il, iu, tol,
                      ctypes.addressof(self._m), self._w.ctypes.data, self._z.ctypes.data, n,
                      self._isuppz.ctypes.data, self._work.ctypes.data, lwork,
                      self._iwork.ctypes.data, liwork, ctypes.addressof(self._info))

    def __call__(self, matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
        """Eigenvalues (keep,) ascending and, with ``vectors``, eigenvectors (d, keep) of
        ``matrix`` (d, d) (views of buffers the next call overwrites). Raises LinAlgError
        when LAPACK fails."""
        self._a[...] = matrix  # (upper triangle read, as SciPy's Fortran-ordered copy)
        TopPairs._routine(*self._args)
        if self._info.value or self._m.value != self.keep:
            raise np.linalg.LinAlgError(f"dsyevr failed to converge ({self._info.value})")
        return self._w[:self.keep], (self._z if self.vectors else None)


def in_chunks(fn, n: int, workers: int = 2, pool=None) -> list:
    """``[fn(0), ..., fn(n - 1)]``, run in ``pool`` (an executor shared with other work) or
    else in ``workers`` threads of their own (in this thread when there is one job), BLAS
    held to one thread meanwhile (see :func:`batched_eigh`)."""
    with one_blas_thread():
        if pool is not None:
            return list(pool.map(fn, range(n)))
        if n <= 1 or workers <= 1:
            return [fn(k) for k in range(n)]
        with ThreadPoolExecutor(max(1, min(workers, n))) as own:
            return list(own.map(fn, range(n)))


def next_start(start: np.ndarray | None, W: np.ndarray) -> np.ndarray:
    """Starting vectors for the fit after the one that gave ``W`` (:func:`top_eigh_from`):
    the columns of ``W``, then those of the ``start`` it was fitted from beyond them (the
    earlier model's next eigenvectors: guard vectors better than random ones). In float32:
    a start needs no more digits, and it is kept beside the fits' largest arrays.

    Parameters
    ----------
    start : ndarray, shape (L, d, m), or None
    W : ndarray, shape (L, d, q)

    Returns
    -------
    ndarray, shape (L, d, max(q, m)), float32
    """
    if start is None or start.shape[2] <= W.shape[2]:
        return W.astype(np.float32)
    return np.concatenate([W.astype(np.float32), start[:, :, W.shape[2]:]], axis=2)


def top_eigh_from(cov: np.ndarray, k: int, start: np.ndarray, tol: float = None,
                  guard: int = None, steps: int = 5, max_degree: int = 20
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The ``k`` largest eigenpairs of each of a stack of symmetric positive semi-definite
    matrices, from starting vectors near them: Chebyshev-filtered subspace iteration with
    Rayleigh-Ritz, all matrices at once in batched products.

    A block of ``k + guard`` vectors (the start's, then random ones) is orthonormalised
    (Householder QR) and rotated onto the Ritz vectors of its Rayleigh quotient
    ``Q^T C Q`` (Rayleigh-Ritz; Saad, "Numerical Methods for Large Eigenvalue Problems",
    2nd ed. 2011, ch. 5). A pair is taken when its residual ``||C x - theta x||`` is at
    most ``tol`` times ``||C||_F`` (at least ``||C||_2``, as LAPACK's errors are): the
    eigenvalue is then within ``(tol ||C||)^2 / gap`` of the true one (Kato-Temple) and
    the vector's angle within ``tol ||C|| / gap`` (Davis & Kahan 1970, "The rotation of
    eigenvectors by a perturbation. III", SIAM J. Numer. Anal. 7(1)), ``gap`` the distance
    to the rest of the spectrum. Between Rayleigh-Ritz steps the block is multiplied by
    the Chebyshev polynomial ``T_m`` of ``2 C / b - I``, ``b`` the smallest Ritz value of
    the block (at least ``1e-3 ||C||_F``, so that no eigenvalue, not even one made
    negative by rounding in a covariance that is nearly zero, gives ``T_m`` beyond
    ``T_m(2001)``), which stays within [-1, 1] on the eigenvalues in [0, b] and grows
    fastest outside it (Saad 2011, ch. 7; the bound from the Ritz values as in Zhou, Saad, Tiago &
    Chelikowsky 2006, "Self-consistent-field calculations using Chebyshev-filtered
    subspace iteration", J. Comput. Phys. 219(1)). Its
    degree ``m`` is one more than would bring four residuals in five under ``tol`` at the
    rate of the k-th
    largest Ritz value, ``1 / (x + sqrt(x^2 - 1))`` per degree, ``x = 2 theta_k / b - 1``,
    but never so high that the top pair outgrows the k-th by more than 1e8 (which would
    leave it fewer than eight digits in float64). Matrices not converged after ``steps``
    Rayleigh-Ritz steps are left to the caller.

    Parameters
    ----------
    cov : ndarray, shape (L, d, d), float64
    k : int
        1 <= k <= d.
    start : ndarray, shape (L, d, m)
        Vectors (columns; any scale, zero columns allowed) near the top eigenvectors,
        largest first, e.g. the ``W`` of a PPCA fitted to a closely related covariance.
    tol : float, optional
        Relative residual (default :data:`EIG_TOL`).
    guard : int, optional
        Extra vectors in the block (default :data:`EIG_GUARD`): the filter's rate is set
        by the eigenvalue just below the block.
    steps, max_degree : int
        Rayleigh-Ritz steps, and the largest degree of one filter.

    Returns
    -------
    evals : ndarray, shape (L, k), float64, ascending
    evecs : ndarray, shape (L, d, k), float64, the largest last
    done : ndarray, shape (L,), bool
        Matrices whose pairs met ``tol``; the rows of the others are not set.
    """
    tol = EIG_TOL if tol is None else float(tol)
    L, d, _ = cov.shape
    p = min(d, k + (EIG_GUARD if guard is None else int(guard)))
    X = np.random.default_rng(0).standard_normal((L, d, p))  # fixed seed: reproducible
    m = min(p, start.shape[2])
    S = np.asarray(start[:, :, :m], np.float64)
    norm = np.sqrt((S * S).sum(axis=1))[:, None, :]
    X[:, :, :m] = np.where(norm > 0, S / np.where(norm > 0, norm, 1.0), X[:, :, :m])
    evals, evecs = np.empty((L, k)), np.empty((L, d, k))
    done = np.zeros(L, bool)
    left, C = np.arange(L), cov
    size = np.maximum(np.sqrt(np.einsum("lij,lij->l", cov, cov)), np.finfo(np.float64).tiny)
    for step in range(steps):
        Q = np.linalg.qr(X)[0]
        CQ = np.matmul(C, Q)
        theta, Y = np.linalg.eigh(np.matmul(Q.transpose(0, 2, 1), CQ))
        X, CX = np.matmul(Q, Y), np.matmul(CQ, Y)
        R = X[:, :, p - k:] * theta[:, None, p - k:]
        R -= CX[:, :, p - k:]
        R *= R
        res = np.sqrt(R.sum(axis=1).max(axis=1)) / size
        ok = res <= tol
        if ok.any():
            at = left[ok]
            evals[at], evecs[at], done[at] = theta[ok, p - k:], X[ok][:, :, p - k:], True
        if ok.all() or step == steps - 1:
            break
        if ok.any():
            go = ~ok
            left, C, X, CX, theta, res, size = (a[go] for a in (left, C, X, CX, theta, res, size))
        b = np.maximum(theta[:, 0], 1e-3 * size)
        rate_k = np.arccosh(np.maximum(2.0 * theta[:, p - k] / b - 1.0, 1.0))
        rate_1 = np.arccosh(np.maximum(2.0 * theta[:, -1] / b - 1.0, 1.0))
        need = np.log(np.maximum(res / tol, 1.0)) / np.maximum(rate_k, 1e-3)
        need = np.minimum(need, np.log(1e8) / np.maximum(rate_1 - rate_k, 1e-3))
        degree = int(np.clip(np.ceil(np.quantile(need, 0.8)) + 1, 2, max_degree))
        # T_0 = X, T_1 = (2/b) C X - X, T_j+1 = (4/b) C T_j - 2 T_j - T_j-1
        s = (4.0 / b)[:, None, None]
        T0, T1 = X, CX * (s / 2)
        T1 -= X
        spare = np.empty_like(X)
        for _ in range(degree - 1):
            T2 = np.matmul(C, T1, out=spare)
            T2 *= s
            T2 -= T1
            T2 -= T1
            T2 -= T0
            spare, T0, T1 = T0, T1, T2
        X = T1
    return evals, evecs, done


# --- pure functions ------------------------------------------------------------------------

def ppca_fit(cov: np.ndarray, latent: int, observed: np.ndarray | None = None,
             var_floor: float = 0.0, explained_variance: float = 0.9,
             max_latent: int = 24, most_observed: int | None = None,
             start: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form maximum-likelihood PPCA of each location (Tipping & Bishop 1999).

    The mean of each location is the sample mean; the closed form needs only the
    covariance.

    Parameters
    ----------
    cov : ndarray, shape (L, d, d)
        Sample covariance of each location.
    latent : int
        Latent size q, 1 <= q < d; 0 chooses it (see :func:`choose_latent`).
    observed : ndarray, shape (L, d), bool, optional
        Observed feature entries; the fit uses the observed sub-covariance only and returns
        zero rows of W for unobserved entries.
    var_floor : float
        Lower bound on sigma^2 (sensor and compression noise never vanish).
    explained_variance, max_latent
        Used when ``latent`` is 0.
    most_observed : int, optional
        The latent size is at most one less than the most entries any location observes:
        that number over all locations of the model when ``cov`` holds only some of them
        (fitted part by part); by default from ``observed``.
    start : ndarray, shape (L, d, m), optional
        With ``latent`` given: vectors near the top eigenvectors of ``cov`` (the ``W`` of a
        model of a closely related covariance); the top pairs are then found from them
        (:func:`batched_eigh`), to a residual of :data:`EIG_TOL` instead of LAPACK's
        round-off.

    Returns
    -------
    W : ndarray, shape (L, d, q), float64
    sigma2 : ndarray, shape (L,), float64
    """
    L, d, _ = cov.shape
    cov = np.asarray(cov)
    if observed is not None:
        o = observed.astype(cov.dtype)
        cov = cov * o[:, :, None] * o[:, None, :]
        d_obs = observed.sum(axis=1).astype(np.float64)
    else:
        d_obs = np.full(L, float(d))
    total = np.trace(cov, axis1=1, axis2=2, dtype=np.float64)
    # With the latent size given, the top q pairs and the trace are all the fit needs.
    evals, evecs = batched_eigh(cov, top=latent or max_latent, all_values=not latent,
                                start=start if latent else None)
    evals = np.clip(evals[:, ::-1], 0.0, None)
    evecs = evecs[:, :, ::-1]
    q = latent or choose_latent(evals, explained_variance, max_latent)
    most = int(d_obs.max()) if most_observed is None else int(most_observed)
    q = int(min(q, max(most - 1, 1), evecs.shape[2]))
    rest = np.maximum(d_obs - q, 1.0)
    sigma2 = np.maximum((total - evals[:, :q].sum(axis=1)) / rest, var_floor)
    sigma2 = np.maximum(sigma2, 1e-12)
    scale = np.sqrt(np.clip(evals[:, :q] - sigma2[:, None], 0.0, None))
    W = evecs[:, :, :q] * scale[:, None, :]
    if observed is not None:
        W = W * observed[:, :, None]
    return W, sigma2


def choose_latent(evals: np.ndarray, explained: float, max_latent: int) -> int:
    """Latent size shared by all locations: the median over locations of the smallest q
    whose leading eigenvalues explain ``explained`` of the variance, within [1, max_latent].

    Parameters
    ----------
    evals : ndarray, shape (L, d)
        Eigenvalues of each location's covariance, in descending order.
    """
    frac = np.cumsum(evals, axis=1) / np.maximum(evals.sum(axis=1, keepdims=True), 1e-20)
    q_loc = (frac < explained).sum(axis=1) + 1
    return int(np.clip(np.median(q_loc), 1, max_latent))


def chroma_weight(cov: np.ndarray, n_luma: int, latent: int,
                  observed: np.ndarray | None = None, var_floor: float = 0.0,
                  explained_variance: float = 0.9, max_latent: int = 24,
                  every: int = 8, max_steps: int = 10, tol: float = 1e-3) -> float:
    """Scale of the chroma entries under which one isotropic noise fits luma and chroma.

    PPCA gives every entry the same noise variance sigma^2, the mean of the discarded
    eigenvalues. Luminance left over by the latent dimensions (fine texture under jitter,
    compression) is far larger than what is left of the chroma, so sigma^2 is set by the
    luminance and a change of colour is judged against luminance noise. The model used
    instead has one noise variance per channel group, ``C = W W^T + diag(s_l I, s_c I)``
    (a factor analysis whose noise is tied within each group; Rubin & Thayer 1982, "EM
    algorithms for ML factor analysis", Psychometrika 47(1)). With the chroma entries
    multiplied by ``c = sqrt(s_l / s_c)`` it is again a PPCA, fitted in closed form. ``c``
    is found by alternating from equal noise: fit the PPCA to the weighted covariance, take
    each group's mean residual variance ``diag(S - W W^T)``, floored at the noise that never
    vanishes (``var_floor`` bounds the noise of one pixel; a chroma entry is the mean of
    :data:`CHROMA_PIXELS` pixels, so its floor is ``var_floor / CHROMA_PIXELS``, and with
    no other evidence ``c = sqrt(CHROMA_PIXELS)``), and multiply ``c`` by the square
    root of their ratio, the median over locations (every ``every``-th fully observed
    one), until it changes by less than ``tol``: one weight for the camera.

    Parameters
    ----------
    cov : ndarray, shape (L, d, d)
        Sample covariance of each location, luminance entries first.
    n_luma : int
        Number of luminance entries; the other d - n_luma are chroma.
    latent, observed, var_floor, explained_variance, max_latent
        As in :func:`ppca_fit`.
    every : int
        Step between the locations used (the weight is one median for the camera).
    max_steps : int
    tol : float
        Relative change of ``c`` at which the alternation stops.

    Returns
    -------
    float
        ``c`` > 0; 1 when there is no chroma.
    """
    L, d, _ = cov.shape
    if n_luma >= d:
        return 1.0
    use = chroma_locations(L, observed, every)
    if not len(use):
        return 1.0
    part = np.asarray(cov[use], np.float64)
    floor = max(float(var_floor), 1e-12)
    c = 1.0
    for _ in range(max_steps):
        weighted = weigh_chroma(part.copy(), n_luma, c)
        W, _ = ppca_fit(weighted, latent, None, var_floor, explained_variance, max_latent)
        rest = np.diagonal(weighted, axis1=1, axis2=2) - (W * W).sum(axis=2)
        luma = np.maximum(rest[:, :n_luma].mean(axis=1), floor)
        chroma = np.maximum(rest[:, n_luma:].mean(axis=1), floor * c * c / CHROMA_PIXELS)
        step = float(np.sqrt(np.median(luma / chroma)))
        c *= step
        if abs(step - 1.0) < tol:
            break
    return c


def chroma_locations(L: int, observed: np.ndarray | None, every: int) -> np.ndarray:
    """The locations :func:`chroma_weight` takes its median over: every ``every``-th of the
    fully observed ones.

    Parameters
    ----------
    L : int
    observed : ndarray, shape (L, d), bool, or None (all observed)
    every : int

    Returns
    -------
    ndarray, shape (k,), int
    """
    use = np.arange(L) if observed is None else np.flatnonzero(observed.all(axis=1))
    return use[::max(1, int(every))]


def weigh_chroma(cov: np.ndarray, n_luma: int, c: float) -> np.ndarray:
    """``D cov D`` with ``D = diag(1, .., 1, c, .., c)`` (chroma entries scaled by ``c``),
    in place (no copy of the largest array of a fit).

    Parameters
    ----------
    cov : ndarray, shape (..., d, d), float, writable

    Returns
    -------
    ndarray
        ``cov``.
    """
    if c != 1.0:
        cov[..., n_luma:, :] *= c
        cov[..., :, n_luma:] *= c
    return cov


def heldout_latent(evals: np.ndarray, evecs: np.ndarray, second: np.ndarray, max_latent: int,
                   var_floor: float = 0.0, weights: np.ndarray | None = None
                   ) -> tuple[int, np.ndarray]:
    """Latent size shared by all locations that gives held-out frames the highest
    likelihood, from moments alone.

    A PPCA fitted in closed form to a covariance with eigenvalues lambda_j and eigenvectors
    u_j (Tipping & Bishop 1999, eqs. 7-8) has covariance C_q with eigenvalues
    max(lambda_j, sigma_q^2) for j <= q and sigma_q^2 (the mean of the rest) beyond. The
    mean negative log-likelihood of held-out samples whose second moment about the model's
    mean is S is then

        0.5 * (d log 2 pi + log|C_q| + tr(C_q^-1 S)),
        tr(C_q^-1 S) = sum_j (u_j^T S u_j) / eigenvalue_j(C_q),

    so every q is scored from the projections u_j^T S u_j, without touching a frame.

    Parameters
    ----------
    evals : ndarray, shape (L, d)
        Eigenvalues of each location's training covariance, descending.
    evecs : ndarray, shape (L, d, d)
        The matching eigenvectors (columns).
    second : ndarray, shape (L, d, d)
        Second moment of the held-out samples about the training mean.
    max_latent : int
    var_floor : float
        Lower bound on sigma^2, as in :func:`ppca_fit`.
    weights : ndarray, shape (L,), optional
        Weight of each location (0 leaves it out, e.g. partly masked ones).

    Returns
    -------
    q : int
        In [1, min(max_latent, d - 1)].
    nll : ndarray, shape (max q,)
        Held-out NLL per sample summed over locations, for q = 1, 2, ...
    """
    L, d = evals.shape
    proj = np.empty((L, d))  # u_j^T S u_j
    step = max(1, CHUNK // 4)  # (locations at a time: temporaries of 4.7 MB, not 2 x 32 MB
    for start in range(0, L, step):  # at 435 x 96 x 96, beside learn's calibration)
        part = slice(start, start + step)
        proj[part] = (evecs[part] * np.matmul(second[part], evecs[part])).sum(axis=1)
    w = np.ones(L) if weights is None else np.asarray(weights, np.float64)
    top = int(min(max_latent, d - 1))
    tail_sum = evals.sum(axis=1, keepdims=True) - np.cumsum(evals, axis=1)  # after each j
    nll = np.empty(top)
    for q in range(1, top + 1):
        sigma2 = np.maximum(np.maximum(tail_sum[:, q - 1] / (d - q), var_floor), 1e-12)
        v = np.maximum(evals[:, :q], sigma2[:, None])
        per_loc = (np.log(v).sum(axis=1) + (d - q) * np.log(sigma2)
                   + (proj[:, :q] / v).sum(axis=1) + proj[:, q:].sum(axis=1) / sigma2)
        nll[q - 1] = 0.5 * float((w * (d * LOG_2PI + per_loc)).sum())
    return int(np.argmin(nll)) + 1, nll


def ppca_precompute(W: np.ndarray, sigma2: np.ndarray, observed: np.ndarray | None = None
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-location terms of the Woodbury form of the log-likelihood.

    ``W`` is first turned onto the principal axes of ``W W^T`` (``W V`` with ``W^T W =
    V diag(g) V^T``, which leaves ``W W^T`` and so the density unchanged); then ``M = W^T W
    + sigma^2 I = diag(g + sigma^2)`` and ``B = W V diag(g + sigma^2)^(-1/2)`` gives
    ``B B^T = W M^-1 W^T`` and ``log|M| = sum log(g + sigma^2)``: one small symmetric
    eigendecomposition per location instead of an inverse, a second factorisation and a
    determinant. The columns of ``B`` are orthogonal, ``|b_j|^2 = g_j / (g_j + sigma^2)``,
    which is what scoring with a larger noise variance needs (see :func:`noise_quad`). The
    matrices are small (q x q), so BLAS is held to one thread (as in :func:`batched_eigh`).

    Returns
    -------
    B : ndarray, shape (L, d, q)
        Such that ``r^T W M^-1 W^T r = |B^T r|^2``; orthogonal columns.
    logdet : ndarray, shape (L,)
        ``log|C|`` of the (observed) covariance, by the matrix determinant lemma.
    d_obs : ndarray, shape (L,)
        Number of observed entries.
    """
    W = np.asarray(W, np.float64)
    L, d, q = W.shape
    d_obs = observed.sum(axis=1).astype(np.float64) if observed is not None else np.full(L, float(d))
    with one_blas_thread():
        g, V = np.linalg.eigh(np.matmul(W.transpose(0, 2, 1), W))
        g = np.clip(g, 0.0, None) + sigma2[:, None]  # eigenvalues of M
        B = np.matmul(W, V) / np.sqrt(g)[:, None, :]
    logdet = (d_obs - q) * np.log(sigma2) + np.log(g).sum(axis=1)
    return B, logdet, d_obs


def noise_quad(sq: np.ndarray, proj: np.ndarray, sigma2: np.ndarray, kept: np.ndarray,
               noise: np.ndarray | None = None) -> np.ndarray:
    """Mahalanobis term ``r^T C^-1 r`` of each location and frame, from the Woodbury parts,
    with each frame's noise variance ``sigma^2`` multiplied by ``noise`` >= 1.

    A frame brought to the reference with a larger gain than any the model learnt carries
    its sensor and compression noise amplified by it (see
    :meth:`inspector.core.conditions.Conditions.noise_scale`): its covariance is
    ``C_s = W W^T + s sigma^2 I``. With ``B`` of orthogonal columns (:func:`ppca_precompute`),
    ``kept_j = 1 - |b_j|^2 = sigma^2 / lambda_j`` (lambda_j = |w_j|^2 + sigma^2, the
    covariance along axis j) and ``p = B^T r``, the Woodbury identity gives

        r^T C_s^-1 r = (|r|^2 - sum_j p_j^2 / (1 + (s - 1) kept_j)) / (s sigma^2),

    which is the plain ``(|r|^2 - |p|^2) / sigma^2`` at s = 1.

    Parameters
    ----------
    sq : ndarray, shape (L, n)
        ``|r|^2`` in the model's units.
    proj : ndarray, shape (L, n, q)
        ``B^T r`` in the same units.
    sigma2 : ndarray, shape (L,)
    kept : ndarray, shape (L, q)
        ``1 - |b_j|^2`` of each location's columns of ``B``.
    noise : ndarray, shape (n,), optional
        ``s`` of each frame (1: none added).

    Returns
    -------
    ndarray, shape (L, n), float64
    """
    if noise is None or not np.any(np.asarray(noise) > 1.0):
        lat = np.einsum("lnq,lnq->ln", proj, proj)
        return (sq - lat) / sigma2[:, None]
    s = np.asarray(noise, np.float64)
    weight = 1.0 / (1.0 + (s[None, :, None] - 1.0) * kept[:, None, :])
    lat = np.einsum("lnq,lnq,lnq->ln", proj, proj, weight)
    return (sq - lat) / (sigma2[:, None] * s[None, :])


def ppca_nll(X: np.ndarray, mean: np.ndarray, W: np.ndarray, sigma2: np.ndarray,
             observed: np.ndarray | None = None, noise: np.ndarray | None = None
             ) -> np.ndarray:
    """Negative log-likelihood of samples under per-location PPCA, in nats.

    Parameters
    ----------
    X : ndarray, shape (n, L, d)
    mean : ndarray, shape (L, d)
    W : ndarray, shape (L, d, q)
    sigma2 : ndarray, shape (L,)
    observed : ndarray, shape (L, d), bool, optional
        Entries left out are marginalised out (not zero-filled).
    noise : ndarray, shape (n,), optional
        Factor >= 1 on each sample's noise variance (see :func:`noise_quad`). The
        Mahalanobis term is that of ``W W^T + s sigma^2 I`` while the normalising term
        stays the model's ``log|C|``: ``-log N(x; mu, C_s) - (log|C_s| - log|C|) / 2``, the
        likelihood less the entropy the known extra noise adds, so that a sample whose only
        difference is that noise scores on average as a sample of the model does.

    Returns
    -------
    ndarray, shape (n, L), float64
        ``-log N(x_o; mu_o, W_o W_o^T + sigma^2 I)`` per sample and location.
    """
    if observed is not None:
        W = W * observed[:, :, None]
    B, logdet, d_obs = ppca_precompute(W, sigma2, observed)
    return _nll(X, mean, B, sigma2, logdet, d_obs, observed, noise=noise)


def _nll(X, mean, B, sigma2, logdet, d_obs, observed, unit: float = 1.0, noise=None,
         kept=None):
    """NLL from features ``X`` (``mean`` is subtracted unless None, i.e. already done);
    ``unit`` is the size of one feature step in the units of the model (1/255 when X is in
    grey levels); ``noise`` as in :func:`ppca_nll`, ``kept`` as in :func:`noise_quad`
    (from ``B`` when not given)."""
    R = np.asarray(X) if mean is None else np.asarray(X) - mean[None]
    if observed is not None:
        R = R * observed[None]
    sq = np.einsum("nld,nld->ln", R, R)
    proj = np.matmul(R.transpose(1, 0, 2), B.astype(R.dtype, copy=False))  # (L, n, q)
    if kept is None:
        kept = _kept(B)
    quad = noise_quad(sq, proj, sigma2, kept, noise).T * (unit * unit)
    return 0.5 * (d_obs * LOG_2PI + logdet + quad)


def _kept(B: np.ndarray) -> np.ndarray:
    """``1 - |b_j|^2`` of each location's columns of ``B`` (L, d, q), shape (L, q) float64
    (see :func:`noise_quad`)."""
    return np.clip(1.0 - (np.asarray(B, np.float64) ** 2).sum(axis=1), 0.0, 1.0)


class Moments:
    """Streaming sufficient statistics of patch features, per location and per time block.

    Counts and sums are kept per block; the scatter (the large part) in total, and per
    block only when ``block_scatter`` is set (needed to leave a block out or to take the
    blocks before one from moments gathered out of order). Scatter is accumulated about a
    fixed shift (the first batch's mean) to keep the float64 sums well conditioned, as
    batched float32 matrix products per batch.

    Neighbouring patches overlap. With ``tiles`` (patch side ``r`` times the stride, see
    :func:`inspector.core.features.block_order`) the samples are given per ``stride x
    stride`` block (e entries each, d = r^2 e) and the statistics kept per block: its sum
    and its products with itself and with the neighbours a patch spans (offsets (0, 0),
    (0, 1), (1, -1), (1, 0), (1, 1) for r = 2). A location's scatter is the r^2 x r^2
    tiles of these products (assembled when asked for), so a batch costs 5 e^2 instead of
    r^4 e^2 products per location (a third) and the scatter takes a third of the memory.
    Without ``tiles`` each location is its own block (r = 1, e = d).

    Parameters
    ----------
    n_blocks : int
        Time blocks.
    L, d : int
        Locations and feature size.
    block_scatter : bool
    tiles : (grid, r, order), optional
        The location grid (rows, columns), r, and the feature index of each block entry
        (:func:`inspector.core.features.block_order`).
    """

    def __init__(self, n_blocks: int, L: int, d: int, block_scatter: bool = False,
                 tiles: tuple[tuple[int, int], int, np.ndarray] | None = None):
        if tiles is None:
            tiles = ((L, 1), 1, np.arange(d))
        (gh, gw), r, order = tiles
        if gh * gw != L or len(order) != d or d % (r * r):
            raise ValueError("tiles do not match the locations and feature size")
        self.L, self.d, self.grid, self.r = L, d, (gh, gw), r
        self.e = d // (r * r)
        self.units = (gh + r - 1, gw + r - 1)
        self.inverse = np.argsort(order)  # block-order position of each feature entry
        self.offsets = [(a, b) for a in range(r) for b in range(1 - r, r) if a or b >= 0]
        shape = (len(self.offsets),) + self.units + (self.e, self.e)
        self.count = np.zeros(n_blocks)
        self.sum = np.zeros((n_blocks,) + self.units + (self.e,))
        self.scatter = np.zeros((n_blocks,) + shape) if block_scatter else None
        self.total_scatter = np.zeros(shape)
        self.shift: np.ndarray | None = None
        self._where = None

    def _pairs(self, o: int, rows: int | None = None, height: int | None = None
               ) -> tuple[tuple, tuple]:
        """Index of the blocks u and of their partners u + offset ``o``: of all blocks, or
        of the first ``rows`` rows of a stack of ``height`` rows of blocks."""
        a, b = self.offsets[o]
        uh, uw = self.units
        height = uh if height is None else height
        r0, r1 = 0, min(height if rows is None else rows, height - a)
        c0, c1 = max(0, -b), uw - max(0, b)
        return (slice(r0, r1), slice(c0, c1)), (slice(r0 + a, r1 + a), slice(c0 + b, c1 + b))

    def add(self, block: int, X: np.ndarray, scale: float | None = None) -> None:
        """Add samples ``X`` to ``block``: features (n, L, d), or with ``tiles`` block
        entries (rows, columns, n, e) of the block grid (:func:`block_features` order).
        ``scale``: the samples are ``X * float32(scale)`` (float32, as ``X *= scale`` makes
        them), multiplied here a chunk at a time (``X`` is not changed; a pass over the
        whole batch saved).

        The products are formed a few rows of blocks (:data:`CHUNK` locations' worth) at a
        time, in buffers reused from chunk to chunk, so the temporaries stay small whatever
        L and n are. Each block's sums over the samples are taken chunk by chunk as well
        (float64, sample after sample: the numbers of ``sum(axis=samples, dtype=float64)``).
        """
        U = X.transpose(1, 0, 2)[:, None] if self.r == 1 and X.ndim == 3 else X
        if U.shape[:2] != self.units or U.shape[3] != self.e:
            raise ValueError(f"samples of shape {X.shape} do not match the moments")
        n = U.shape[2]
        if not n:
            return
        factor = None if scale is None else np.float32(scale)
        if self.shift is None:  # (the first batch: the shift needs the samples as scaled)
            if factor is not None:
                U, factor = U * factor, None
            self.shift = U.mean(axis=2, dtype=np.float64).astype(np.float32)
        self.count[block] += n
        uh, uw = self.units
        step = max(1, CHUNK * self.r ** 4 // uw)
        sums = np.empty(self.units + (self.e,))
        buf = np.empty((min(step + self.r - 1, uh), uw, n, self.e), np.float32)
        out = np.empty((step, uw, self.e, self.e), np.float32)
        for start in range(0, uh, step):
            rows = slice(start, start + step + self.r - 1)  # with the partners' rows
            part = buf[:len(range(*rows.indices(uh)))]
            here = slice(start, min(start + step, uh))  # the rows whose sums are taken
            if factor is None:
                np.einsum("ijnk->ijk", U[here], dtype=np.float64, out=sums[here])
                np.subtract(U[rows], self.shift[rows, :, None, :], out=part)
            else:
                np.multiply(U[rows], factor, out=part)
                np.einsum("ijnk->ijk", part[:here.stop - start], dtype=np.float64,
                          out=sums[here])
                part -= self.shift[rows, :, None, :]
            for o in range(len(self.offsets)):
                (ri, ci), (rj, cj) = self._pairs(o, step, len(part))
                if ri.stop <= ri.start:
                    continue
                S = np.matmul(part[ri, ci].swapaxes(-1, -2), part[rj, cj],
                              out=out[:ri.stop - ri.start, :ci.stop - ci.start])
                ri = slice(ri.start + start, ri.stop + start)
                if self.scatter is not None:
                    self.scatter[block, o, ri, ci] += S
                self.total_scatter[o, ri, ci] += S
        self.sum[block] += sums - n * self.shift

    def merge(self, other: "Moments") -> "Moments":
        """Add the samples counted in ``other`` (same blocks, L, d and tiles), e.g.
        accumulated in another process; returns self.

        ``other``'s sums about its own shift b are moved to this one's shift a exactly: with
        delta = b - a, sum_a = sum_b + n delta and, for the products of blocks u and v,
        scatter_a = scatter_b + sum_b(u) delta(v)^T + delta(u) sum_b(v)^T + n delta(u) delta(v)^T
        (the parallel form of the scatter update, Chan, Golub & LeVeque 1979, "Updating
        formulae and a pairwise algorithm for computing sample variances").
        """
        if other.shift is None:
            return self
        if self.shift is None:
            self.shift = other.shift.copy()
        delta = other.shift.astype(np.float64) - self.shift  # (rows, columns, e)

        def moved(n, s, S):
            """Sums and products about this shift, from ``n`` samples with sums ``s``
            (..., rows, columns, e) and products ``S`` (..., offsets, rows, columns, e, e)
            about the other's."""
            S = S.copy()
            nn = np.asarray(n)[..., None, None, None, None]
            for o in range(len(self.offsets)):
                (ri, ci), (rj, cj) = self._pairs(o)
                su, sv, du, dv = s[..., ri, ci, :], s[..., rj, cj, :], delta[ri, ci], delta[rj, cj]
                S[..., o, ri, ci, :, :] += (su[..., :, None] * dv[..., None, :]
                                            + du[..., :, None] * sv[..., None, :]
                                            + nn * (du[:, :, :, None] * dv[:, :, None, :]))
            return s + np.asarray(n)[..., None, None, None] * delta, S

        if self.scatter is not None:
            if other.scatter is None:
                raise ValueError("cannot merge moments without block scatter into ones with it")
            s, S = moved(other.count, other.sum, other.scatter)
            self.scatter += S
        else:
            s = other.sum + other.count[:, None, None, None] * delta
        _, T = moved(other.count.sum(), other.sum.sum(axis=0), other.total_scatter)
        self.count += other.count
        self.sum += s
        self.total_scatter += T
        return self

    def _index(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Where a location's sums and scatter are in the flattened per-block arrays: the
        location's base offsets (for sums, for products) and each entry's (or entry pair's)
        offset from them. Entry pair (f, f') of a location is entry (t, t') of the product
        of its blocks k and k' holding f and f', stored under the block the offset starts
        from (transposed when that is k')."""
        if self._where is None:
            r, e = self.r, self.e
            uh, uw = self.units
            gi, gj = np.divmod(np.arange(self.L), self.grid[1])
            index = {o: k for k, o in enumerate(self.offsets)}
            k, t = np.divmod(self.inverse, e)  # block and entry of each feature
            a, b = np.divmod(k, r)
            sums = (a * uw + b) * e + t
            da, db = a[None, :] - a[:, None], b[None, :] - b[:, None]
            pairs = np.empty((self.d, self.d), np.int64)
            for (oa, ob), o in index.items():
                here = (da == oa) & (db == ob)
                back = (da == -oa) & (db == -ob)
                f1, f2 = np.nonzero(here)
                pairs[f1, f2] = (((o * uh + a[f1]) * uw + b[f1]) * e + t[f1]) * e + t[f2]
                f1, f2 = np.nonzero(back & ~here)
                pairs[f1, f2] = (((o * uh + a[f2]) * uw + b[f2]) * e + t[f2]) * e + t[f1]
            base = gi * uw + gj
            self._where = (base * e, sums, base * e * e, pairs)
        return self._where

    def _location_sums(self, s: np.ndarray, locs: np.ndarray) -> np.ndarray:
        """Per-location vectors (len(locs), d) from per-block ones (rows, columns, e)."""
        base, sums, _, _ = self._index()
        return np.ascontiguousarray(s).reshape(-1)[base[locs, None] + sums]

    def _location_scatter(self, S: np.ndarray, locs: np.ndarray) -> np.ndarray:
        """Per-location scatter (len(locs), d, d) float64 from block products ``S``
        (offsets, rows, columns, e, e), gathered location by location: the entry pairs'
        offsets (see :meth:`_index`) taken from the flattened products after the location's
        base (no index array the size of the result; np.take without bounds checks, the
        offsets being in range by construction: three times faster than one fancy index)."""
        _, _, base, pairs = self._index()
        flat = np.ascontiguousarray(S).reshape(-1)
        out = np.empty((len(locs), self.d, self.d), flat.dtype)
        for k, at in enumerate(base[np.asarray(locs)]):
            np.take(flat[at:], pairs, out=out[k], mode="clip")
        return out

    def _subset(self, leave_out: int | None = None, before: int | None = None):
        """Count, per-block sums and block products of all samples, of all but block
        ``leave_out``, or of blocks 0 .. ``before`` - 1."""
        if leave_out is None and before is None:
            return self.count.sum(), self.sum.sum(axis=0), self.total_scatter
        if self.scatter is None:
            raise ValueError("a subset of the blocks needs Moments(block_scatter=True)")
        if leave_out is not None:
            return (self.count.sum() - self.count[leave_out],
                    self.sum.sum(axis=0) - self.sum[leave_out],
                    self.total_scatter - self.scatter[leave_out])
        return (self.count[:before].sum(), self.sum[:before].sum(axis=0),
                self.scatter[:before].sum(axis=0))

    def sums(self, before: int | None = None, every: int = 1
             ) -> tuple[float, np.ndarray, np.ndarray]:
        """Count, sum (L', d) and scatter (L', d, d) about ``shift`` of all samples, or of
        blocks 0 .. ``before`` - 1 (needs ``block_scatter``), at every ``every``-th location
        (L' = ceil(L / every)); copies."""
        n, s, S = self._subset(before=before)
        locs = np.arange(0, self.L, max(1, int(every)))
        return float(n), self._location_sums(s, locs), self._location_scatter(S, locs)

    def covariances(self, leave_out: int | None = None, before: int | None = None,
                    consume: bool = False):
        """Mean and count of all samples, of all but block ``leave_out``, or of blocks 0 ..
        ``before`` - 1 (the last two need ``block_scatter``), and a function giving the
        unbiased covariance of any of the locations from them.

        ``consume``: these moments are not used again, so the products of all samples are
        taken about their mean in place instead of in a copy (the largest array of the
        moments, 86 MB at 320 x 180: the copy was part of learn's peak, at the final fit);
        the moments then hold no products (``total_scatter`` is None).

        Returns
        -------
        mean : ndarray, shape (L, d), float64
        covariance : callable
            ``covariance(locs)`` with locations ``locs`` (k,), int: ndarray (k, d, d),
            float64, a new array.
        n : int
        """
        n, s, S = self._subset(leave_out, before)
        # About the samples' mean at the level of the blocks (a third of the entries the
        # locations' scatter has): S(u, v) - n m(u) m(v)^T for each pair of blocks kept.
        m = s / n
        if S is self.total_scatter:
            if consume:
                self.total_scatter = None
            else:
                S = S.copy()
        for o in range(len(self.offsets)):
            (ri, ci), (rj, cj) = self._pairs(o)
            S[o, ri, ci] -= n * (m[ri, ci, :, None] * m[rj, cj, None, :])

        def covariance(locs: np.ndarray) -> np.ndarray:
            out = self._location_scatter(S, np.asarray(locs))
            out *= 1.0 / max(n - 1.0, 1.0)
            return out

        return self._location_sums(self.shift + m, np.arange(self.L)), covariance, int(n)

    def mean_cov(self, leave_out: int | None = None, before: int | None = None,
                 consume: bool = False) -> tuple[np.ndarray, np.ndarray, int]:
        """Mean (L, d), unbiased covariance (L, d, d) float32 and count of all samples, of all but
        block ``leave_out``, or of blocks 0 .. ``before`` - 1 (the last two need
        ``block_scatter``); see :meth:`covariances`."""
        mean, covariance, n = self.covariances(leave_out, before, consume)
        cov = np.empty((self.L, self.d, self.d), np.float32)  # float32 halves the largest array
        for start in range(0, self.L, CHUNK):
            cov[start:start + CHUNK] = covariance(np.arange(start, min(start + CHUNK, self.L)))
        return mean, cov, n


# --- the model -----------------------------------------------------------------------------

class PatchPPCA(DensityModel):
    """Per-location probabilistic PCA of patch features.

    Parameters
    ----------
    patch, stride : int
        Patch side and step in working-resolution pixels (even; stride divides patch).
    colour : bool
        Luminance plus half-resolution chroma (True) or luminance only.
    latent : int
        Latent size q; 0 chooses it by ``latent_rule``.
    latent_rule : {"heldout", "variance"}
        "heldout" (default): the size under which the model of the earlier time blocks best
        predicts the latest one (:func:`heldout_latent`), for every fold and the final model
        alike (with fewer than three time blocks, "variance"). It gives moving parts of a
        scene (foliage, screens) the latent dimensions their normal looks need, and a static
        scene under noise few. "variance": the smallest size explaining
        ``explained_variance`` of the variance (:func:`choose_latent`), which picks one
        dimension on lighting-dominated scenes and many on noise.
    explained_variance : float
    max_latent : int
    chroma_noise : {"own", "shared"}
        "own": chroma entries have their own noise variance, set from the training frames
        (:func:`chroma_weight`), so a change of colour is judged against colour noise, not
        against the larger luminance noise; "shared": one noise variance for all entries
        (plain PPCA).
    var_floor : float
        Lower bound on each location's noise variance sigma^2, in squared [0, 1] intensity
        units. The default 1e-4 (a standard deviation of about 2.5 grey levels) keeps flat or
        saturated areas from becoming infinitely sensitive to compression noise.
    batch_size : int
        Frames per batch while fitting and scoring.
    calibrate_from : float
        Blocks are scored for calibration only once the frames before them make at least
        this share of all frames: a model of a fifth of the frames scores new ones far
        higher than the final model of all of them would, which makes the threshold
        needlessly high (and the per-cell standardisation is only consistent between
        models of similar quality). The default keeps the newest 60% of the frames with 5
        blocks, the newest third with 3.

    Attributes
    ----------
    mean_ : ndarray, shape (L, d)
    W_ : ndarray, shape (L, d, q)
    sigma2_ : ndarray, shape (L,)
        Noise variance in the weighted units (chroma entries multiplied by
        ``chroma_weight_``).
    chroma_weight_ : float
        Factor applied to the chroma entries of the residual before the PPCA (1 for
        "shared" noise or without colour).
    observed_ : ndarray, shape (L, d), bool, or None
    grid_ : (int, int)
        Patch grid (rows, columns); L = rows * columns.
    n_frames_ : int
    """

    kind = "ppca"

    def __init__(self, patch: int = 8, stride: int = 4, colour: bool = True, latent: int = 0,
                 explained_variance: float = 0.9, max_latent: int = 24, var_floor: float = 1e-4,
                 batch_size: int = 64, calibrate_from: float = 0.4,
                 latent_rule: str = "heldout", chroma_noise: str = "shared"):
        self.patch = patch
        self.stride = stride
        self.colour = colour
        self.latent = latent
        self.explained_variance = explained_variance
        self.latent_rule = latent_rule
        self.chroma_noise = chroma_noise
        self.max_latent = max_latent
        self.var_floor = var_floor
        self.batch_size = batch_size
        self.calibrate_from = calibrate_from

    # fitting

    def fit(self, source: FrameSource, mask: np.ndarray | None = None, pool=None,
            alpha: float | None = None, beside=None) -> HeldOut:
        """Fit on every frame of ``source``; score each frame once with a model of the
        frames before it (forward chaining over the time blocks).

        The frames of block k are scored by the model fitted on blocks 0 .. k-1 (its latent
        size chosen from those frames only), for the blocks k whose frames before them
        make at least ``calibrate_from`` of all; earlier blocks only train. Calibration scores thus
        come, like scan scores, from frames later than every frame their model saw, so the
        threshold holds for frames that follow the normal set under slow drift (models that
        interpolate between blocks on both sides would not). Without a pool
        this is one pass over the frames in time order: each block is scored by the model
        of the moments so far, then added to them.

        Parameters
        ----------
        source : FrameSource
        mask : ndarray, shape (H, W), bool, optional
        pool : executor, optional
            Anything with ``map(fn, iterable)`` returning results in order (a
            ``concurrent.futures`` executor, or a Dask cluster's, see
            :class:`inspector.jobs.cluster.ClusterPool`; its ``workers`` attribute, if any,
            says how many run at once). The moments of the time blocks are then accumulated
            in its workers and added here (:meth:`Moments.merge`), and the blocks scored
            there, in a second pass. Each job reads a copy of ``source`` (its ``spawn()``,
            if it has one) whose record (``collected()``: frames skipped, notes) is added
            back with ``absorb``; the result equals the fit without a pool to float rounding.
        alpha : float, optional
            The false-alarm rate the held-out maps will calibrate for: blocks older than
            the newest ones :func:`inspector.core.calibration.newest_blocks` keeps for it
            (counted from the frames given, before decoding) are only trained on, not
            scored, since calibration would drop their maps; their fold models are not
            fitted. None: every block from ``calibrate_from`` on is scored.
        beside : callable or sequence of callables, optional
            ``beside(held)`` (each of them), run with the held-out maps while the final
            model is fitted from the moments (the calibration, which needs only those maps,
            then takes no time of its own: fitting runs LAPACK mostly outside Python's
            lock). They share two threads with the fit: each job of ``beside`` takes one
            as it comes free, the fit's chunks of locations the rest; so the longest job
            keeps a core to itself (with three threads on two cores, a 2,000-frame learn's
            calibration waited on the fit) while the shorter ones and the fit share the
            other. ``fit`` returns when all are done and raises what the first of them that
            failed raised.

        Returns
        -------
        HeldOut
            Raw maps of the frames of the scored blocks, each from the model fitted on the
            blocks before its own.
        """
        # (BLAS on one thread for the whole fit, in every thread it runs: see
        # one_blas_thread; nested limits inside then restore one thread, not two)
        with one_blas_thread():
            return self._fit(source, mask, pool, alpha, beside)

    def _fit(self, source: FrameSource, mask: np.ndarray | None, pool, alpha: float | None,
             beside) -> HeldOut:
        """:meth:`fit`'s work, BLAS held to one thread by it."""
        if self.chroma_noise not in ("own", "shared"):
            raise ValueError(f"chroma_noise must be 'own' or 'shared', not {self.chroma_noise!r}")
        w, h = source.size
        self.grid_ = grid_shape(h, w, self.patch, self.stride)
        self.observed_ = observed_features(mask, self.patch, self.stride, self.colour)
        r = self.patch // self.stride
        self.map_shape_ = (self.grid_[0] + r - 1, self.grid_[1] + r - 1)
        blocks = np.asarray(source.blocks)
        labels, block_of = np.unique(blocks, return_inverse=True)
        order = self.first_reads(blocks)[0]
        before = np.cumsum(np.bincount(block_of, minlength=len(labels))) - np.bincount(
            block_of, minlength=len(labels))
        first = int(np.argmax(np.r_[before >= self.calibrate_from * len(blocks), True]))
        first = max(first, 1)
        if alpha is not None and first < len(labels):
            later = block_of >= first
            kept = newest_blocks(block_of[later], alpha)
            first = int(block_of[later][kept].min())
        if pool is None:
            moments, folds, start, split = self._forward_pass(source, order, block_of,
                                                              len(labels), first)
        else:
            moments = self._new_moments(len(labels), block_scatter=True)
            for part in _pooled(pool, _block_moments, self, source,
                                _pieces(order, blocks, labels, pool)):
                moments.merge(part)
            jobs = []
            start = None  # each fold's W starts the eigensolver of the next (next_start)
            for k in range(first, len(labels)):
                if moments.count[:k].sum() < 2 or not moments.count[k]:
                    continue
                fold = copy.copy(self)
                q = self._heldout_q(moments.sums(k - 1, HELDOUT_EVERY) if k > 1 else None,
                                    moments.sums(k, HELDOUT_EVERY))
                fold._set(*fold._fit_moments(moments, q, start, before=k))
                start = next_start(start, fold.W_)
                jobs += [(fold, piece) for piece in _pieces(order, blocks, labels[k:k + 1], pool)]
            folds = list(_pooled(pool, _held_maps, None, source, jobs))
            split = ((moments.sums(len(labels) - 1, HELDOUT_EVERY) if len(labels) > 1
                      else None), moments.sums(every=HELDOUT_EVERY))
        if moments.count.sum() < 2:
            raise ValueError("need at least two decodable frames to fit")
        self.n_frames_ = int(moments.count.sum())
        held_idx = [i for fold in folds for i, _ in fold]
        held_maps = [m for fold in folds for _, m in fold]
        held = (HeldOut(np.concatenate(held_idx), np.concatenate(held_maps)) if held_maps else
                HeldOut(np.zeros(0, int), np.zeros((0,) + self.map_shape_, np.float32)))
        # The final model: beside's jobs take the threads first, the fit's chunks queue
        # after them (without beside, the fit's chunks run in two threads of their own).
        with nullcontext() if beside is None else ThreadPoolExecutor(2) as shared:
            jobs = [shared.submit(job, held)
                    for job in ([] if beside is None else [beside] if callable(beside)
                                else beside)]
            # With fewer than three time blocks a fold model has no earlier block to choose
            # its latent size with (the folds' sizes come from "variance"): the final one's
            # does too, so the calibration maps come from models chosen by the same rule.
            q = 0 if len(labels) < 3 else self._heldout_q(*split, pool=shared)
            # (the sums are dropped before the final fit forms its covariances: each
            # scatter is as large as a covariance of every HELDOUT_EVERY-th location)
            del split
            self._set(*self._fit_moments(moments, q, start, pool=shared,
                                         consume=True))  # (moments' last use)
            for job in jobs:
                job.result()
        return held

    def first_reads(self, blocks: np.ndarray) -> tuple[np.ndarray, int]:
        """The positions :meth:`fit` without a pool reads its frames in (``source.batches``:
        block by block, in time order within each) and its batch size, from the frames'
        time ``blocks`` (N,), so that a caller can decode the first of them ahead."""
        _, block_of = np.unique(np.asarray(blocks), return_inverse=True)
        return np.argsort(block_of, kind="stable"), self.batch_size

    def _forward_pass(self, source: FrameSource, order: np.ndarray, block_of: np.ndarray,
                      n_blocks: int, first: int
                      ) -> tuple[Moments, list, np.ndarray | None, tuple]:
        """One pass in time order: score each block from ``first`` on with the model of the
        moments so far, then add it. Returns the moments, ``[[(positions, raw maps)], ...]``,
        the start of the final model's eigensolver (:func:`next_start` of the folds'
        ``W``; None when no fold was fitted) and the sums the final model's latent size is
        chosen from (:meth:`_heldout_q`'s ``earlier`` and ``now``: without the last block,
        with it; None each when the latent size is not chosen that way)."""
        moments = self._new_moments(n_blocks)
        start = None  # each fold's W starts the eigensolver of the next (next_start)
        held: list[tuple[np.ndarray, np.ndarray]] = []
        current, ready = -1, False
        earlier = None  # sums at the start of the block before the current one
        for idx, images in source.batches(order, self.batch_size):
            b_of = block_of[idx]
            for b in np.unique(b_of):
                sel = b_of == b
                if b != current:  # a new block: fit the model of everything before it
                    current = b
                    ready = b >= first and moments.count.sum() >= 2
                    # (the sums are needed from the block before the first scored one)
                    now = (moments.sums(every=HELDOUT_EVERY)
                           if self._wants_sums() and b >= first - 1 else None)
                    if ready:  # the latent size first: its temporaries and the
                        q = self._heldout_q(earlier, now)  # covariances never coexist
                        self._set(*self._fit_moments(moments, q, start))
                        start = next_start(start, self.W_)
                    earlier = now
                part = images if sel.all() else images[sel]
                if ready:  # the block entries gathered once: scored, then learnt from
                    entries = self._entries(part)
                    held.append((idx[sel], self.score_maps(part, entries)))
                    self._add(moments, int(b), part, entries)
                else:
                    self._add(moments, int(b), part)
        split = (earlier, moments.sums(every=HELDOUT_EVERY) if self._wants_sums() else None)
        return moments, [held], start, split

    def _new_moments(self, n_blocks: int, block_scatter: bool = False) -> Moments:
        """Empty moments of this model's locations, kept per block of the frame when its
        patches split into blocks (:func:`block_order`)."""
        order = block_order(self.patch, self.stride, self.colour)
        tiles = None if order is None else (self.grid_, self.patch // self.stride, order)
        return Moments(n_blocks, self.grid_[0] * self.grid_[1],
                       feature_size(self.patch, self.colour), block_scatter, tiles)

    def _entries(self, images: np.ndarray) -> np.ndarray | None:
        """Block entries (rows, columns, n, e) float32 in grey levels of frames (n, H, W, 3)
        uint8 (:func:`block_features` over the cell map), or None when the patches do not
        split into blocks."""
        if block_order(self.patch, self.stride, self.colour) is None:
            return None
        return block_features(images, self.stride, self.colour, self.map_shape_)

    def _samples(self, images: np.ndarray, entries: np.ndarray | None = None) -> np.ndarray:
        """Frames (n, H, W, 3) uint8 as :meth:`Moments.add` of :meth:`_new_moments` takes
        them: block entries, or patch features when patches do not split into blocks;
        float32 in [0, 1].

        ``entries``: :meth:`_entries` of ``images`` when already gathered (changed in place).
        """
        if block_order(self.patch, self.stride, self.colour) is None:
            return patch_features(images, self.patch, self.stride, self.colour)
        X = self._entries(images) if entries is None else entries
        X *= np.float32(1 / 255)
        return X

    def _add(self, moments: Moments, block: int, images: np.ndarray,
             entries: np.ndarray | None = None) -> None:
        """Add frames (n, H, W, 3) uint8 to ``block`` of ``moments`` (of
        :meth:`_new_moments`) as :meth:`_samples` makes them, the block entries scaled by
        :meth:`Moments.add` on the way (``entries``: :meth:`_entries` of ``images`` when
        already gathered; not changed)."""
        if block_order(self.patch, self.stride, self.colour) is None:
            moments.add(block, self._samples(images))
        else:
            moments.add(block, self._entries(images) if entries is None else entries,
                        scale=1 / 255)

    def _fit_moments(self, moments: Moments, latent: int = 0, start: np.ndarray | None = None,
                     pool=None, **subset) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Mean, W and sigma^2 of the samples counted in ``moments`` (``subset``: the
        blocks of :meth:`Moments.covariances`, and whether it may consume them), with
        ``latent`` dimensions when given, else as :meth:`_fit_params` chooses. Sets
        ``chroma_weight_``. ``start``: (L, d, m), the ``W`` of a model of closely related
        moments (an earlier fold's), to find the eigenvectors from (:func:`ppca_fit`).

        With the latent size known, each location's fit needs only its own covariance:
        they are formed and fitted a chunk of locations at a time in two threads (or in
        ``pool``'s, see :func:`in_chunks`), so the covariances of all locations (the largest
        array of a fit) never exist at once.
        """
        q = latent or self.latent
        if not q:  # the explained-variance rule looks at every location's spectrum first
            mean, cov, _ = moments.mean_cov(**subset)
            return (mean, *self._fit_params(cov, 0))
        mean, covariance, _ = moments.covariances(**subset)
        L, d = mean.shape
        observed = self.observed_
        self.chroma_weight_ = self._chroma_weight(covariance, L, observed)
        most = d if observed is None else int(observed.sum(axis=1).max())

        step = CHUNK // 2

        def one(k: int) -> tuple[np.ndarray, np.ndarray]:
            part = slice(k * step, min((k + 1) * step, L))
            cov = weigh_chroma(covariance(np.arange(part.start, part.stop)),
                               self.patch * self.patch, self.chroma_weight_)
            return ppca_fit(cov, q, None if observed is None else observed[part],
                            self.var_floor, self.explained_variance, self.max_latent,
                            most_observed=most, start=None if start is None else start[part])

        fits = in_chunks(one, -(-L // step), 2, pool)
        return (mean, np.concatenate([W for W, _ in fits]),
                np.concatenate([sigma2 for _, sigma2 in fits]))

    def _fit_params(self, cov: np.ndarray, latent: int = 0) -> tuple[np.ndarray, np.ndarray]:
        """W and sigma^2 from a covariance, with ``latent`` dimensions when given, else
        ``self.latent``, else chosen by explained variance from the covariance alone.
        Sets ``chroma_weight_`` from ``cov`` and weighs ``cov`` with it (in place)."""
        self.chroma_weight_ = self._chroma_weight(cov.__getitem__, len(cov), self.observed_)
        cov = weigh_chroma(cov, self.patch * self.patch, self.chroma_weight_)
        return ppca_fit(cov, latent or self.latent, self.observed_, self.var_floor,
                        self.explained_variance, self.max_latent)

    def _chroma_weight(self, covariance, L: int, observed: np.ndarray | None,
                       every: int = HELDOUT_EVERY) -> float:
        """:func:`chroma_weight` of ``L`` locations whose covariances ``covariance(locs)``
        gives (only those of :func:`chroma_locations` are formed), with their ``observed``
        entries; 1 for "shared" noise or without colour."""
        if self.chroma_noise != "own" or not self.colour:
            return 1.0
        use = chroma_locations(L, observed, every)
        if not len(use):
            return 1.0
        return chroma_weight(covariance(use), self.patch * self.patch, self.latent, None,
                             self.var_floor, self.explained_variance, self.max_latent, every=1)

    def _wants_sums(self) -> bool:
        """Whether the latent size is chosen from the moments of the blocks (copies of the
        scatter, as large as the model's covariances, are kept only then)."""
        return not self.latent and self.latent_rule == "heldout"

    def _heldout_q(self, earlier, now, pool=None) -> int:
        """Latent size for a model of the samples counted in ``now`` (count, sum, scatter
        about the moments' shift): the one under which a model of ``earlier`` (the same,
        one time block fewer) gives that last block the highest likelihood
        (:func:`heldout_latent`). 0 when the latent size is set, or either part is too
        small (the explained-variance rule then decides). ``earlier``'s scatter is used up
        (the earlier covariance is made in its place); ``now`` is not changed. ``pool``: as
        :func:`batched_eigh`'s."""
        if self.latent or self.latent_rule != "heldout" or earlier is None:
            return 0
        n_a, s_a, S_a = earlier
        n_t, s_t, S_t = now
        n_b = n_t - n_a
        if n_a < 2 or n_b < 1:
            return 0
        m_a = s_a / n_a
        # Second moment of the last block about the earlier mean (both about the shift):
        # (S_b - s_b m^T - m s_b^T) / n_b + m m^T; the earlier covariance
        # (S_a - n_a m m^T) / (n_a - 1) in S_a's place. A chunk of locations at a time: the
        # terms m m^T and s_b m^T stay small (two arrays as large as the scatter fewer, at
        # the final fit's held-out choice, beside the calibration: learn's peak).
        second = np.empty_like(S_t)
        cov_a = S_a
        step = max(1, CHUNK // 4)
        for start in range(0, len(S_t), step):
            p = slice(start, start + step)
            outer = m_a[p, :, None] * m_a[p, None, :]
            cross = (s_t[p] - s_a[p])[:, :, None] * m_a[p, None, :]
            here = np.subtract(S_t[p], S_a[p], out=second[p])
            here -= cross
            here -= cross.swapaxes(1, 2)
            here *= 1.0 / n_b
            here += outer
            cov_a[p] -= np.multiply(n_a, outer, out=cross)
            cov_a[p] *= 1.0 / max(n_a - 1.0, 1.0)
        weights = None
        if self.observed_ is not None:  # partly masked locations are left out of the choice
            full = self.observed_[::HELDOUT_EVERY].all(axis=1)
            weights = full.astype(np.float64)
            cov_a *= full[:, None, None]
            second *= full[:, None, None]
        c = self._chroma_weight(cov_a.__getitem__, len(cov_a), None if self.observed_ is None
                                else self.observed_[::HELDOUT_EVERY], every=1)
        cov_a = weigh_chroma(cov_a, self.patch * self.patch, c)
        second = weigh_chroma(second, self.patch * self.patch, c)
        evals, evecs = batched_eigh(cov_a, pool=pool)
        evals = np.clip(evals[:, ::-1], 0.0, None)
        evecs = np.ascontiguousarray(evecs[:, :, ::-1])
        return heldout_latent(evals, evecs, second, self.max_latent, self.var_floor, weights)[0]

    def _set(self, mean: np.ndarray, W: np.ndarray, sigma2: np.ndarray) -> None:
        self.mean_ = mean.astype(np.float32)
        self.W_, self.sigma2_ = W, sigma2
        self.q_ = W.shape[2]
        self._prepare()

    def _prepare(self) -> None:
        B, logdet, d_obs = ppca_precompute(self.W_, self.sigma2_, self.observed_)
        self._mean_grey = self.mean_ * np.float32(255)
        # The density of the unweighted features: the weighting's Jacobian c^(chroma
        # entries observed) enters log|C| (Jacobian of a linear change of variables).
        c = float(getattr(self, "chroma_weight_", 1.0))
        p2 = self.patch * self.patch
        n_chroma = (self.observed_[:, p2:].sum(axis=1) if self.observed_ is not None
                    else np.full(len(d_obs), d_obs.max() - p2 if self.colour else 0))
        self._logdet = logdet - 2.0 * np.log(c) * n_chroma
        self._d_obs = d_obs
        self._kept = _kept(B)
        r = self.patch // self.stride
        self.map_shape_ = (self.grid_[0] + r - 1, self.grid_[1] + r - 1)
        B = B.astype(np.float32)
        # One float32 copy of B is kept: in block order when scoring goes by blocks.
        self._blocks = _BlockLayout.build(self, B)
        self._B = B if self._blocks is None else None

    def _b(self) -> np.ndarray:
        """``B`` of :func:`ppca_precompute` in feature order, (L, d, q) float32."""
        return self._B if self._B is not None else self._blocks.feature_order()

    # scoring

    def patch_nll(self, images: np.ndarray, entries: np.ndarray | None = None,
                  noise: np.ndarray | None = None) -> np.ndarray:
        """Negative log-likelihood of every patch, shape (n, L), float64 (``entries``: the
        frames' :meth:`_entries` when already gathered; not changed; ``noise``: as in
        :meth:`score_maps`)."""
        if self._blocks is not None:
            return self._blocks.nll(self, images, entries, noise)
        # Residuals in grey levels, the mean subtracted while gathering (the scale is applied
        # to the per-location sums instead of the whole array).
        R = patch_features(images, self.patch, self.stride, self.colour,
                           center=self._mean_grey, scale=1.0)
        self._weigh(R)
        return _nll(R, None, self._b(), self.sigma2_, self._logdet, self._d_obs,
                    self.observed_, unit=1 / 255, noise=noise, kept=self._kept)

    def _weigh(self, R: np.ndarray, inverse: bool = False) -> np.ndarray:
        """Chroma entries of features ``R`` (..., d) multiplied (divided, ``inverse``) by
        ``chroma_weight_``, in place; returns ``R``."""
        c = float(getattr(self, "chroma_weight_", 1.0))
        if c != 1.0:
            R[..., self.patch * self.patch:] *= np.float32(1.0 / c if inverse else c)
        return R

    def score_maps(self, images: np.ndarray, entries: np.ndarray | None = None,
                   noise: np.ndarray | None = None) -> np.ndarray:
        """Raw anomaly maps: patch NLL averaged onto cells, shape (n, h, w), float32.

        Fully masked locations score 0 (they carry no evidence). ``entries``: as in
        :meth:`patch_nll`. ``noise``: shape (n,), the factor >= 1 by which each frame's
        noise variance exceeds what the model learnt (:func:`ppca_nll`).
        """
        nll = self.patch_nll(images, entries, noise)
        if self.observed_ is not None:
            nll[:, self._d_obs == 0] = 0.0
        return fold_to_cells(nll, self.grid_, self.patch, self.stride)

    def expected(self, images: np.ndarray) -> np.ndarray:
        """The conditional mean of each patch given the model, averaged over overlaps.

        For PPCA the posterior mean of the latent code is ``M^-1 W^T (x - mu)`` and the
        expected patch ``mu + W M^-1 W^T (x - mu)`` (Tipping & Bishop 1999, sec. 3.3):
        what the scene looks like at that place, pulled toward normal appearance.
        """
        X = patch_features(images, self.patch, self.stride, self.colour)
        R = self._weigh(X - self.mean_[None]).transpose(1, 0, 2)
        if self.observed_ is not None:
            R = R * self.observed_[:, None, :]
        B = self._b()
        proj = self._weigh(np.matmul(np.matmul(R, B), B.transpose(0, 2, 1)),  # W M^-1 W^T r
                           inverse=True)
        Xhat = (proj.transpose(1, 0, 2) + self.mean_[None]).astype(np.float32)
        return _unpatch(Xhat, images.shape[1:3], self.grid_, self.patch, self.stride,
                        self.colour)

    def learned(self) -> dict[str, Any]:
        return {"latent": self.q_, "grid": list(self.grid_), "frames": self.n_frames_,
                "chroma_weight": round(float(getattr(self, "chroma_weight_", 1.0)), 4),
                "masked_locations": int((self._d_obs == 0).sum())}

    # persistence

    def save(self, directory: Path) -> None:
        arrays = {"mean": self.mean_, "W": self.W_.astype(np.float32),
                  "sigma2": self.sigma2_, "grid": np.array(self.grid_),
                  "n_frames": np.array(self.n_frames_),
                  "chroma_weight": np.array(float(getattr(self, "chroma_weight_", 1.0)))}
        if self.observed_ is not None:
            arrays["observed"] = self.observed_
        np.savez(Path(directory) / "ppca.npz", **arrays)  # floats hardly compress

    @classmethod
    def load(cls, directory: Path, params: dict[str, Any]) -> "PatchPPCA":
        model = cls(**params)
        with np.load(Path(directory) / "ppca.npz", allow_pickle=False) as z:
            model.mean_ = z["mean"]
            model.W_ = z["W"]  # float32 as saved; precomputed in float64
            model.sigma2_ = z["sigma2"]
            model.grid_ = tuple(int(v) for v in z["grid"])
            model.n_frames_ = int(z["n_frames"])
            model.observed_ = z["observed"] if "observed" in z.files else None
            model.chroma_weight_ = (float(z["chroma_weight"]) if "chroma_weight" in z.files
                                    else 1.0)
        model.q_ = model.W_.shape[2]
        model._prepare()
        return model


def _block_moments(model: PatchPPCA, source: FrameSource, indices: np.ndarray) -> Moments:
    """Moments of the frames at ``indices`` of ``source``, per time block (all blocks, with
    their scatter)."""
    blocks = np.asarray(source.blocks)
    labels = np.unique(blocks)
    block_of = {b: i for i, b in enumerate(labels)}
    moments = model._new_moments(len(labels), block_scatter=True)
    for idx, images in source.batches(indices, model.batch_size):
        for b in np.unique(blocks[idx]):
            model._add(moments, block_of[b], images[blocks[idx] == b])
    return moments


def _held_maps(model: PatchPPCA, source: FrameSource, indices: np.ndarray
               ) -> list[tuple[np.ndarray, np.ndarray]]:
    """``(positions, raw maps)`` of the frames at ``indices``, batch by batch."""
    return [(idx, model.score_maps(images))
            for idx, images in source.batches(indices, model.batch_size)]


def _pieces(order: np.ndarray, blocks: np.ndarray, labels: np.ndarray, pool
            ) -> list[np.ndarray]:
    """Frame positions (in ``order``) cut into tasks: each block of ``labels`` in about
    ``pool.workers / len(labels)`` consecutive pieces, so every worker has one."""
    per_block = -(-max(1, int(getattr(pool, "workers", 1))) // max(1, len(labels)))
    pieces = []
    for b in labels:
        idx = order[blocks[order] == b]
        pieces += [p for p in np.array_split(idx, min(per_block, max(1, len(idx)))) if len(p)]
    return pieces


def _pooled(pool, fn, model, source, jobs):
    """``fn(model, source, indices)`` for each job in ``pool``, results in order; the
    source's record of each run (skipped frames, notes, ...) is added to ``source``.
    A job is ``indices``, or ``(model, indices)`` to use a model of its own."""
    jobs = [j if isinstance(j, tuple) else (model, j) for j in jobs]
    for result, record in pool.map(_collecting, [(fn, m, source, idx) for m, idx in jobs]):
        if record is not None:
            source.absorb(record)
        yield result


def _collecting(job):
    """Run one pooled job on a fresh copy of the source (``spawn``); its record with it."""
    fn, model, source, indices = job
    part = source.spawn() if hasattr(source, "spawn") else source
    result = fn(model, part, indices)
    return result, (part.collected() if hasattr(part, "collected") else None)


class _BlockLayout:
    """Scoring from blocks: the frame cut into ``stride x stride`` blocks (and the matching
    half-size chroma blocks), each patch being ``r x r`` neighbouring blocks (r = patch /
    stride).

    The mean and the observed entries of a pixel are the same in every patch that covers it
    (the per-location mean is the mean of the same pixels), so the mean is subtracted and
    the mask applied once per block, not once per overlapping patch, and no patch is ever
    gathered: with ``B`` split by block, a patch's projection is the sum over its ``r x r``
    blocks of location-batched float32 matrix products ``block @ B_k``, and its squared
    norm the sum of its blocks' squared norms.
    """

    def __init__(self, B, perm, mean, observed, grid, r, stride, colour, chroma_weight=1.0):
        self.B, self.perm, self.mean, self.observed = B, perm, mean, observed
        self.chroma_weight = float(chroma_weight)
        self.grid, self.r, self.stride, self.colour = grid, r, stride, colour
        # the blocks with an unobserved entry (the only ones the mask changes)
        self._partial = (None if observed is None else
                         np.nonzero((observed < 1).any(axis=-1)))

    def feature_order(self) -> np.ndarray:
        """``B`` back in feature order, (L, d, q) float32 (made on demand)."""
        gh, gw = self.grid
        blocked = np.concatenate(self.B, axis=2).reshape(gh * gw, len(self.perm), -1)
        return blocked[:, np.argsort(self.perm), :]

    @classmethod
    def build(cls, model: "PatchPPCA", B: np.ndarray) -> "_BlockLayout | None":
        """The layout of a fitted model, or None when its patches do not split into blocks
        (or, defensively, when a pixel's mean differs between the patches covering it)."""
        perm = block_order(model.patch, model.stride, model.colour)
        if perm is None:
            return None
        r, s, colour = model.patch // model.stride, model.stride, model.colour
        gh, gw = model.grid_
        e = len(perm) // (r * r)
        per_loc = np.take(model._mean_grey, perm, axis=1).reshape(gh, gw, r, r, e)
        seen = (np.ones(per_loc.shape, bool) if model.observed_ is None else
                np.take(model.observed_, perm, axis=1).reshape(gh, gw, r, r, e))
        mean = np.zeros((gh + r - 1, gw + r - 1, e), np.float32)
        obs = np.ones(mean.shape, bool)
        for k in range(r * r):
            a, b = divmod(k, r)
            mean[a:a + gh, b:b + gw] = per_loc[:, :, a, b]
            obs[a:a + gh, b:b + gw] = seen[:, :, a, b]
        for k in range(r * r):
            a, b = divmod(k, r)
            if (np.abs(mean[a:a + gh, b:b + gw] - per_loc[:, :, a, b]).max() > 1e-3
                    or (obs[a:a + gh, b:b + gw] != seen[:, :, a, b]).any()):
                return None
        q = B.shape[2]
        # (np.take gathers along an axis several times faster than fancy indexing)
        parts = [np.take(B, perm[k * e:(k + 1) * e], axis=1).reshape(gh, gw, e, q)
                 for k in range(r * r)]
        return cls(parts, perm, mean, None if obs.all() else obs.astype(np.float32), (gh, gw),
                   r, s, colour, getattr(model, "chroma_weight_", 1.0))

    def blocks(self, images: np.ndarray, entries: np.ndarray | None = None) -> np.ndarray:
        """Observed residuals of every block in grey levels, shape (bh, bw, n, e) float32
        (from the frames' :func:`block_features` ``entries`` when given; not changed)."""
        if entries is None:
            out = block_features(images, self.stride, self.colour, self.mean.shape[:2])
            out -= self.mean[:, :, None, :]
        else:
            out = entries - self.mean[:, :, None, :]
        s = self.stride
        if self.colour and self.chroma_weight != 1.0:
            out[..., s * s:] *= np.float32(self.chroma_weight)
        if self._partial is not None:
            rows, cols = self._partial
            out[rows, cols] *= self.observed[rows, cols][:, None, :]
        return out

    def nll(self, model: "PatchPPCA", images: np.ndarray, entries: np.ndarray | None = None,
            noise: np.ndarray | None = None) -> np.ndarray:
        """:meth:`PatchPPCA.patch_nll` from blocks, shape (n, L), float64."""
        blocks = self.blocks(images, entries)
        norms = np.einsum("ijne,ijne->ijn", blocks, blocks)
        (gh, gw), r = self.grid, self.r
        sq = norms[:gh, :gw].copy()
        proj = np.matmul(blocks[:gh, :gw], self.B[0])  # (gh, gw, n, q)
        p = np.empty_like(proj)  # the next blocks' products, added in place in turn
        for k in range(1, r * r):
            a, b = divmod(k, r)
            np.matmul(blocks[a:a + gh, b:b + gw], self.B[k], out=p)
            sq += norms[a:a + gh, b:b + gw]
            proj += p
        L = gh * gw
        quad = noise_quad(sq.reshape(L, -1), proj.reshape(L, -1, proj.shape[-1]),
                          model.sigma2_, model._kept, noise) * (1 / 255) ** 2
        nll = 0.5 * (model._d_obs[:, None] * LOG_2PI + model._logdet[:, None] + quad)
        return nll.T


def _unpatch(X: np.ndarray, hw: tuple[int, int], grid: tuple[int, int], patch: int,
             stride: int, colour: bool) -> np.ndarray:
    """Patch feature vectors back to RGB frames, averaging overlaps (inverse of the layout
    in :func:`inspector.core.features.patch_features`)."""
    import cv2

    n = X.shape[0]
    h, w = hw
    gh, gw = grid
    X = X.reshape(n, gh, gw, -1)
    half = patch // 2

    def paste(vals, size, step, shape, fill):
        acc = np.zeros((n,) + shape, np.float32)
        cnt = np.zeros(shape, np.float32)
        v = vals.reshape(n, gh, gw, size, size)
        for i in range(gh):
            for j in range(gw):
                acc[:, i * step:i * step + size, j * step:j * step + size] += v[:, i, j]
                cnt[i * step:i * step + size, j * step:j * step + size] += 1
        # Pixels no patch covers (a border narrower than the stride) are not modelled:
        # black with neutral chroma, rather than the colour of an all-zero YCrCb pixel.
        return np.where(cnt > 0, acc / np.maximum(cnt, 1), np.float32(fill))

    luma = paste(X[..., :patch * patch], patch, stride, (h, w), 0.0)
    if not colour:
        out = np.repeat(luma[..., None], 3, axis=-1)
        return (np.clip(out, 0, 1) * 255).round().astype(np.uint8)
    c = half * half
    cr = paste(X[..., patch * patch:patch * patch + c], half, stride // 2, (h // 2, w // 2), 0.5)
    cb = paste(X[..., patch * patch + c:], half, stride // 2, (h // 2, w // 2), 0.5)
    out = np.empty((n, h, w, 3), np.uint8)
    for k in range(n):
        ycc = np.dstack([luma[k], cv2.resize(cr[k], (w, h)), cv2.resize(cb[k], (w, h))])
        ycc = (np.clip(ycc, 0, 1) * 255).round().astype(np.uint8)
        out[k] = cv2.cvtColor(ycc, cv2.COLOR_YCrCb2RGB)
    return out


__all__ = ["PatchPPCA", "ppca_fit", "ppca_nll", "ppca_precompute", "noise_quad", "choose_latent",
           "heldout_latent", "chroma_weight", "chroma_locations", "weigh_chroma", "Moments"]
