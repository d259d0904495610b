"""Item posteriors and the stability of neighbour lists under them.

With the user side fixed, an item's block ``z_i = [b_i, x_i]`` has the
Gaussian posterior of Bayesian linear regression (Bishop, Pattern
Recognition and Machine Learning, 2006, section 3.3):

    mean = the trainer's item solution,
    Sigma_i = (B_i^T B_i / sigma^2 + c_i Psi^-1)^-1 = sigma^2 (B_i^T B_i + c_i P)^-1,

``B_i`` the rows ``[1, theta_u]`` of the item's raters, ``Psi`` the prior
covariance (learned, or ``sigma^2 / lam_item * I``), ``P`` the prior
precision the trainer used and ``c_i`` the item's prior weight (with a weight
per coordinate, ``c_i Psi^-1`` reads ``S_i Psi^-1 S_i``, :func:`scaled`).
Ratings still to come count with the variance of a new rating
(:func:`covariances`).  The *stability* of an item is the expected overlap of its top-k neighbour list
with the list it would have once its vector is known: the share of the
current list that a draw from the posterior keeps in its own top k.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numba
import numpy as np

from hybrid.core.blocks import blas_threads, design, row_grams

# a tile of draw x candidate distances (256 x 2048 floats, 2 MB) stays in a core's cache
_DRAWS_PER_TILE = 256
_POOL_PER_TILE = 2048
_PROBE = 8          # draws that try the shortlist before the rest of an item's do


def item_grams(model, rows=None):
    """``B_i^T B_i`` (n, d, d) of the model's items (or ``rows``) at the fitted users."""
    F = model.factors_
    ub, ut = F.split(F.user)
    R = model.rating_data().by_item
    if rows is not None:
        R = R[rows]
    offset = np.zeros(len(ut)) if ub is None else ub
    return row_grams(R.indptr, R.indices, R.data, design(ut, ub), offset)[0]


def posterior_covariance(grams, P, sigma2):
    """``sigma2 (G + P)^-1``: the covariance of items' blocks given their raters' Gram matrices
    ``G`` (n, d, d) and prior precision ``P`` on the noise's scale (one (d, d), or one per item)."""
    return sigma2 * np.linalg.inv(grams + P)


def gaussian_posterior(grams, rhs, prior_mean, P, sigma2):
    """Mean and covariance of items' blocks in Bayesian linear regression (Bishop 2006, 3.3).

    ``mean = (G + P)^-1 (b + P m)``, ``cov = sigma2 (G + P)^-1`` for each item's ``G = B^T B``,
    ``b = B^T y`` and prior mean ``m``; ``P`` is one (d, d) precision or one per item.

    >>> z, cov = gaussian_posterior(np.array([[[1.0]]]), np.array([[2.0]]), np.array([[0.0]]), np.eye(1), 0.5)
    >>> z.tolist(), cov.tolist()
    ([[1.0]], [[[0.25]]])
    """
    pm = prior_mean @ P if P.ndim == 2 else np.einsum("nij,nj->ni", P, prior_mean)
    # one factorisation for both: the inverse is needed for the covariance anyway (a separate
    # solve for the mean cost a third of the learned prior's EM)
    K = np.linalg.inv(grams + P)
    return (K @ (rhs + pm)[..., None])[..., 0], sigma2 * K


def covariances(model, grams, weight, extra=None):
    """Posterior covariances of a block of items.

    ``(G / sigma^2 + extra / sigma^2 + c Psi^-1)^-1``: the ratings the model was fitted to
    count with the fit's noise, and so do ``extra`` (the expected ``B^T B`` of ratings still to
    come), since ``update`` folds them in as the fit's own: the stability predicted after ``n``
    more ratings is the stability the model will report once they are in.  ``Psi`` is the prior
    covariance.
    """
    prec = grams / model.sigma2_ + scaled(np.linalg.inv(model.prior_covariance_), weight)
    if extra is not None:
        prec = prec + extra / model.sigma2_
    return np.linalg.inv(prec)


def scaled(P, weight):
    """Each item's prior precision ``S_i P S_i`` (n, d, d), ``S_i = diag(sqrt(weight_i))``,
    for a weight per item (n,) or per item and coordinate (n, d)."""
    weight = np.asarray(weight, float)
    if weight.ndim == 1:
        return weight[:, None, None] * P[None]
    s = np.sqrt(weight)
    return s[:, :, None] * P[None] * s[:, None, :]


def vector_weight(model, weight):
    """Each item's prior weight on its vector (the mean over the vector's coordinates)."""
    weight = np.asarray(weight, float)
    return weight if weight.ndim == 1 else weight[:, 1 if model.biases else 0:].mean(1)


def vector_part(model, cov):
    """The covariance of the vector ``x`` (dropping the bias row and column)."""
    return cov[:, 1:, 1:] if model.biases else cov


def draw_factor(cov: np.ndarray) -> np.ndarray:
    """Cholesky factors of a stack of covariances, jittered by ``1e-12 I`` so that one that is
    singular to rounding (a difference of two posteriors, say) still factors.

    >>> draw_factor(np.array([[[4.0, 0.0], [0.0, 0.0]]])).round(6).tolist()
    [[[2.0, 0.0], [0.0, 1e-06]]]
    """
    return np.linalg.cholesky(cov + 1e-12 * np.eye(cov.shape[-1]))


def draws_for(L: np.ndarray, eps: np.ndarray) -> np.ndarray:
    """Offsets ``L eps`` (b, S, r) of every item's draws; ``eps`` (S, r) shared by all items."""
    return np.einsum("bij,sj->bsi", L, eps)


def _sq(X):
    return np.einsum("...i,...i->...", X, X)


def stability(means, chol, pool, k, eps, exclude=None, shortlist=256, n_jobs=1):
    """Expected overlap of each item's top-k list with the lists of its posterior draws.

    Parameters
    ----------
    means : ndarray (b, r)
        Posterior mean vectors (the model's item vectors).
    chol : ndarray (b, r, r)
        Cholesky factors of the vectors' posterior covariances.
    pool : ndarray (n, r)
        Candidate vectors (trusted items), taken as known.
    k : int
        Length of the neighbour list.
    eps : ndarray (S, r)
        Standard normal draws, the same for every item (common random numbers).
    exclude : ndarray (b,), optional
        Index in ``pool`` of each item itself, or -1.
    shortlist : int
        Candidates nearest the mean that are tried first; a draw whose k-th
        distance cannot be beaten from outside the shortlist (by the
        triangle inequality) is exact there, any other draw is redone
        against the whole pool, so the result is exact either way.

    Returns
    -------
    mean, se : ndarray (b,)
        The estimated expected overlap and its standard error over draws.

    Examples
    --------
    >>> pool = np.array([[-1.0], [1.0]])
    >>> eps = np.random.default_rng(0).standard_normal((4000, 1))
    >>> m, se = stability(np.array([[-0.5]]), np.array([[[1.0]]]), pool, 1, eps)
    >>> bool(abs(m[0] - 0.6915) < 3 * se[0])     # P(x < 0) for x ~ N(-0.5, 1)
    True
    """
    b, r = means.shape
    n = len(pool)
    k = min(k, n - (0 if exclude is None else 1))
    exclude = np.full(b, -1) if exclude is None else np.asarray(exclude)
    M = int(min(n, max(shortlist, 4 * k)))
    c2 = _sq(pool)
    D = c2[None, :] - 2.0 * means @ pool.T + _sq(means)[:, None]
    rows = np.flatnonzero(exclude >= 0)
    D[rows, exclude[rows]] = np.inf
    short = np.argpartition(D, M - 1, axis=1)[:, :M] if M < n else np.tile(np.arange(n), (b, 1))
    Ds = np.take_along_axis(D, short, 1)
    order = np.argsort(Ds, axis=1, kind="stable")
    short, Ds = np.take_along_axis(short, order, 1), np.take_along_axis(Ds, order, 1)
    listed = short[:, :k]                                   # the current top-k lists
    radius = np.sqrt(np.maximum(Ds[:, -1], 0.0)) if M < n else np.full(b, np.inf)
    offsets = draws_for(chol, eps)                          # (b, S, r)
    X = means[:, None, :] + offsets
    spread = np.sqrt(_sq(offsets))                          # (b, S)
    overlap, exact = np.zeros(spread.shape), np.zeros(spread.shape, bool)
    # a draw farther from the mean than the shortlist's radius can never be certified
    # there; of the other items, those none of whose first draws is certified (loose
    # posteriors) go straight to the whole pool
    hope = np.flatnonzero((spread < radius[:, None]).any(1))
    probe = min(_PROBE, len(eps))
    for draws in (slice(0, probe), slice(probe, None)):
        if hope.size and draws.start < len(eps):
            got, ok = _on_shortlist(X[hope, draws], short[hope], pool, c2, exclude[hope], k,
                                    radius[hope, None] - spread[hope, draws])
            overlap[hope, draws], exact[hope, draws] = got, ok
            hope = hope[ok.any(1)]
    if not exact.all():
        bi, si = np.nonzero(~exact)
        overlap[bi, si] = _full_pool(X[bi, si], pool, c2, listed[bi], exclude[bi], k, n_jobs)
    S = eps.shape[0]
    return overlap.mean(1), overlap.std(1, ddof=1) / np.sqrt(S) if S > 1 else np.zeros(b)


def _on_shortlist(X, short, pool, c2, exclude, k, room):
    """Overlap of draws ``X`` (h, s, r) on their items' shortlists, and whether each is exact
    (its k-th distance within ``room``, the shortlist radius less the draw's offset)."""
    DT = _sq(X)[..., None] + c2[short][:, None, :] - 2.0 * X @ pool[short].transpose(0, 2, 1)
    DT = np.where((short == exclude[:, None])[:, None, :], np.inf, DT)
    kth = np.partition(DT, k - 1, axis=2)[..., k - 1]   # (h, s)
    return (DT[..., :k] <= kth[..., None]).sum(-1) / k, np.sqrt(np.maximum(kth, 0.0)) <= room


def _full_pool(X, pool, c2, listed, exclude, k, n_jobs=1):
    """Overlap for single draws against the whole pool.

    One pass per block of draws: single-precision distance tiles from BLAS
    (ranks only need the order of distances), each folded at once into the
    draws' running top-k by a compiled loop, so no draw x pool table is ever
    held.  Threads share the draws.
    """
    # the compiled fold indexes without bounds checks: refuse what would make it write
    # outside its arrays (k = 0 once did) before it runs
    if not 1 <= k < len(pool) or len(listed) != len(X) or len(exclude) != len(X) or \
            (len(listed) and listed.shape[1] != k):
        raise ValueError(f"_full_pool: k={k} with a pool of {len(pool)} and {len(X)} draws of "
                         f"{len(listed)} lists")
    out = np.empty(len(X))
    pool32 = np.ascontiguousarray(pool, np.float32)
    c232 = np.ascontiguousarray(c2, np.float32)
    listed, exclude = np.ascontiguousarray(listed, np.int64), np.ascontiguousarray(exclude, np.int64)

    def run(rows):
        for s in range(rows.start, rows.stop, _DRAWS_PER_TILE):
            part = slice(s, min(s + _DRAWS_PER_TILE, rows.stop))
            x = X[part].astype(np.float32) * np.float32(-2.0)
            top_d = np.full((len(x), k), np.inf, np.float32)
            top_i = np.full((len(x), k), -1, np.int64)
            for j in range(0, len(pool32), _POOL_PER_TILE):
                tile = x @ pool32[j:j + _POOL_PER_TILE].T
                tile += c232[j:j + _POOL_PER_TILE]
                _fold_tile(tile, j, exclude[part], top_d, top_i)
            out[part] = overlap_of_lists(listed[part], top_i)

    edges = np.linspace(0, len(X), max(1, min(int(n_jobs), len(X) // _DRAWS_PER_TILE + 1)) + 1).astype(int)
    shares = [slice(a, b) for a, b in zip(edges[:-1], edges[1:])]
    # BLAS on one thread: our threads share the draws (idle BLAS threads would spin against them)
    with blas_threads(1):
        if len(shares) > 1:
            with ThreadPoolExecutor(len(shares)) as workers:
                list(workers.map(run, shares))
        else:
            run(shares[0])
    return out


@numba.njit(nogil=True, cache=True)
def _fold_tile(tile, first, exclude, top_d, top_i):  # pragma: no cover - compiled
    """Fold a tile of distances (draws x candidates ``first``...) into each draw's sorted top k."""
    m, w = tile.shape
    k = top_d.shape[1]
    if k == 0 or top_i.shape[0] < m or top_d.shape[0] < m or exclude.shape[0] < m:
        return
    for i in range(m):
        worst = top_d[i, k - 1]
        skip = exclude[i] - first
        for t in range(w):
            v = tile[i, t]
            if v < worst and t != skip:
                s = k - 1
                while s > 0 and top_d[i, s - 1] > v:
                    top_d[i, s] = top_d[i, s - 1]
                    top_i[i, s] = top_i[i, s - 1]
                    s -= 1
                top_d[i, s] = v
                top_i[i, s] = first + t
                worst = top_d[i, k - 1]


def overlap_of_lists(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise share of list ``a`` found in list ``b`` (both (m, k) index arrays)."""
    return (a[:, :, None] == b[:, None, :]).any(axis=2).mean(axis=1)
