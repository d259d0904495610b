"""How far rated items move when ratings are folded in: the planner's third variance scale.

The planner predicts the share of an item's neighbour list that stands after ``update``
(:meth:`hybrid.planning.assess.Assessor.movement`).  That needs the spread of the item's
estimate as the *trainer* left it (under the trainer's penalty), which the posterior the
hide-and-re-solve check calibrates (:mod:`hybrid.core.variance_scales`) understates: on the
tasting club rated items moved about 1.5 to 2 times as far as that posterior says, more so the
more ratings they had.

So for each ``n`` the loop is replayed on the held-out folds of :mod:`hybrid.core.prior` (users
re-fitted without the held items): a held item is solved as the trainer solves it (prior
precision ``P``) from its first ``n`` ratings, and again from all of them.  Under the planner's
model the squared move has expectation ``kappa a + b``:
``a = tr(K B'B Sigma_n B'B K')``, ``b = sigma_new^2 tr(K B'B K')``, ``K = (G_n + B'B + P)^-1``,
``B`` the rows of the later raters and ``Sigma_n`` the posterior after ``n`` ratings; ``kappa``
is the method-of-moments solution over the held items, held to [0.25, 4].  (Replaying the loop
with the held items fitted together with their first raters, as a fit does, gave larger scales
that made the planner too cautious on both the club and MovieLens; see the README's
calibration tables.)
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from hybrid.common.seeds import stream
from hybrid.core.blocks import row_grams
from hybrid.core.variance_scales import first_n_mask

LOOP_NS = (2, 5, 10, 20, 40)


def loop_scales(folds, Psi, sigma2, sigma2_new, P, ns=LOOP_NS, most=100, seed=0) -> tuple:
    """``((n, kappa), ...)`` for each ``n`` of ``ns`` that some held item has more ratings than.

    >>> from types import SimpleNamespace
    >>> rng = np.random.default_rng(0)
    >>> users = np.hstack([np.ones((300, 1)), rng.standard_normal((300, 2))])
    >>> truth = rng.standard_normal((60, 3)) * 0.8      # items spread around a zero projection
    >>> rows = [np.sort(rng.choice(300, 80, replace=False)) for _ in range(60)]
    >>> data = np.concatenate([users[r] @ z + rng.normal(0, 0.5, 80) for r, z in zip(rows, truth)])
    >>> R = sp.csr_matrix((data, np.concatenate(rows), np.arange(0, 61 * 80, 80)), shape=(60, 300))
    >>> fold = SimpleNamespace(R=R, held=np.arange(60), m=np.zeros((60, 3)), Fe=users, offset=np.zeros(300))
    >>> scales = loop_scales([fold], 0.64 * np.eye(3), 0.25, 0.25, 0.25 / 0.64 * np.eye(3), ns=(5, 20))
    >>> [n for n, _ in scales], all(0.7 < k < 1.4 for _, k in scales)   # a true model needs no scale
    ([5, 20], True)
    """
    psi_inv = np.linalg.inv(Psi)
    out = []
    for n in ns:
        num = den = 0.0
        for j, fold in enumerate(folds):
            a, b, moved = _replay(fold, n, P, sigma2, sigma2_new, psi_inv, most, seed, j)
            num += moved - b
            den += a
        if den > 0:
            out.append((int(n), float(np.clip(num / den, 0.25, 4.0))))
    return tuple(out)


def _split(R: sp.csr_matrix, n, seed):
    """Each row's first ``n`` ratings (a seeded draw) and the rest, as two CSR matrices."""
    first = first_n_mask(R.indptr, n, seed)
    rows = np.repeat(np.arange(R.shape[0]), np.diff(R.indptr))
    pick = lambda keep: sp.csr_matrix((R.data[keep], (rows[keep], R.indices[keep])), shape=R.shape)
    return pick(first), pick(~first)


def _replay(fold, n, P, sigma2, sigma2_new, psi_inv, most, seed, j):
    """(a, b, squared move) summed over at most ``most`` of the fold's held items with more than ``n``."""
    R, m = fold.R, fold.m
    if R.shape[0] > most:
        keep = np.sort(stream(seed, "loop subsets", j).choice(R.shape[0], most, replace=False))
        R, m = R[keep], m[keep]
    first, rest = _split(R, n, seed)
    live = np.flatnonzero(np.diff(rest.indptr) > 0)
    if not live.size:
        return 0.0, 0.0, 0.0
    first, rest, m = first[live], rest[live], m[live]
    Gn, bn = row_grams(first.indptr, first.indices, first.data, fold.Fe, fold.offset)[:2]
    Gr, br = row_grams(rest.indptr, rest.indices, rest.data, fold.Fe, fold.offset)[:2]
    Pm = m @ P
    z_n = np.linalg.solve(Gn + P, (bn + Pm)[..., None])[..., 0]
    z_all = np.linalg.solve(Gn + Gr + P, (bn + br + Pm)[..., None])[..., 0]
    K = np.linalg.inv(Gn + Gr + P)
    S = np.linalg.inv(Gn / sigma2 + psi_inv)
    KG = K @ Gr
    a = float(np.einsum("bij,bij->", KG @ S, KG))
    b = float(sigma2_new * np.einsum("bij,bij->", KG, K))
    return a, b, float(np.sum((z_all - z_n) ** 2))
