"""How far each item's neighbour list can be trusted: stability now, after more ratings, and
the ratings each item needs to reach a target (the planner's assessment).

Stability is the expected overlap of an item's top-k list with the list it would have once
its vector is known (:mod:`hybrid.core.posterior`); it is an estimate.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError
from hybrid.common.limits import check_plan, threads
from hybrid.core.blocks import design, row_grams
from hybrid.core.posterior import (
    covariances,
    draw_factor,
    item_grams,
    scaled,
    stability,
    vector_part,
    vector_weight,
)
from hybrid.planning.responses import activity_share

GRID = np.array([0, 1, 2, 3, 5, 8, 12, 20, 30, 50, 80, 120, 200, 300, 500])
STATUS = ("no ratings yet", "under-covered", "trusted")
_ITEMS_PER_BLOCK = 256
FIRST_DRAWS = 16    # draws that may settle a comparison with the target on their own
_SE_FLOOR = 0.025   # a run of equal overlaps is not certainty
_MOMENT_USERS = 2000   # users sampled for the fourth moment of an update's movement


def responder_moment(model, mode="active", scores=None, threshold=None):
    """Mean of ``b b^T`` (b = [1, theta_u]) over the users expected to answer.

    ``active``: all users, weighted by their rating activity.  ``likely``:
    per item, the users whose expected rating is at least ``threshold``
    (needs ``scores``, the item x user block).  Returns (d, d) or (b, d, d).
    """
    B = user_design(model)
    w = activity_share(model.user_counts_)
    if mode == "active":
        return np.einsum("u,ud,ue->de", w, B, B) / w.sum()
    mask = (scores >= threshold) * w[None, :]
    total = np.maximum(mask.sum(1), 1e-12)
    outer = np.einsum("ud,ue->ude", B, B).reshape(len(B), -1)
    return (mask @ outer / total[:, None]).reshape(len(scores), B.shape[1], B.shape[1])


def user_design(model):
    """The users' design rows ``[1, theta_u]`` (``theta_u`` alone without biases)."""
    F = model.factors_
    ub, ut = F.split(F.user)
    return np.hstack([np.ones((len(ut), 1)), ut]) if ub is not None else ut


class Assessor:
    """Evaluates stability of any items at any number of extra ratings, with fixed draws."""

    def __init__(self, model, k=10, draws=64, seed=0, candidate_min_ratings=20, responders="active",
                 responder_threshold=None, pool=None):
        check_plan(k=k, draws=draws, seed=seed)   # k reaches a compiled kernel: never let 0 through
        self.model = model
        self.k = k
        off = 1 if model.biases else 0
        self.off = off
        self.vectors = model.item_blocks_[:, off:]
        self.weight = model.prior_weight_
        self.grams = item_grams(model)
        self.cov_now = covariances(model, self.grams, self.weight)
        prior_cov = model.prior_covariance_
        prior_var = np.trace(vector_part(model, prior_cov[None])[0])
        # relative variance: share of the prior's spread the ratings have not yet removed
        rel = np.einsum("bii->b", vector_part(model, self.cov_now)) * vector_weight(model, self.weight) / prior_var
        self.relative_variance = rel
        self.pool = self._pool(candidate_min_ratings) if pool is None else np.asarray(pool)
        if len(self.pool) <= k:
            raise InputError(f"only {len(self.pool)} rated items can serve as neighbours; "
                             f"need more than k={k}: lower k")
        self.pool_pos = pd.Index(self.pool).get_indexer(np.arange(len(self.vectors)))
        self.eps = np.random.default_rng(seed).standard_normal((draws, self.vectors.shape[1]))
        self.responders = responders
        self.threshold = responder_threshold
        self.C = responder_moment(model, "active") if responders == "active" else None
        # how much wider than the posterior the trainer's estimates move when ratings are folded
        # in, by the item's ratings (hybrid.core.loop_scales; 1 if not measured)
        pairs = np.asarray((getattr(model, "metrics_", None) or {}).get("loop_scales") or [[1, 1.0]], float)
        self.loop_scale = np.interp(np.log1p(model.item_counts_), np.log1p(pairs[:, 0]), pairs[:, 1])

    def _pool(self, min_ratings):
        """Trusted candidates: items with at least ``min_ratings`` ratings, or the
        ``4k`` most-rated items of a catalogue with too few of those (the rule
        used is kept in ``pool_rule``)."""
        counts = self.model.item_counts_
        pool = np.flatnonzero(counts >= min_ratings)
        self.pool_rule = f"items with {min_ratings} or more ratings"
        if len(pool) < 4 * self.k:
            pool = np.argsort(-counts, kind="stable")[:4 * self.k]
            pool = pool[counts[pool] > 0]
            self.pool_rule = f"the {len(pool)} most-rated items"
        return np.sort(pool)

    def extra_moment(self, items):
        if self.C is not None:
            return np.broadcast_to(self.C, (len(items),) + self.C.shape)
        z = self.model.item_blocks_[items]
        scores = next(self.model.score_blocks(z, chunk=len(z)))[1]
        return responder_moment(self.model, "likely", scores, self.threshold)

    def movement(self, items, more):
        """Covariance (b, d, d) of how far each item's block moves when ``more`` ratings from the
        responders assumed are folded in by :func:`hybrid.estimator.updates.fold_in`.

        The update re-solves the block as the trainer does, ``(G + B'B + c P)^-1 (...)``, so it
        moves by ``K B'(y - B z)`` with ``K = (G + B'B + c P)^-1`` (``G`` the Gram matrix of the
        ratings it has, ``P`` the trainer's prior precision, ``c`` the item's prior weight); the
        new ratings ``y`` scatter around ``B z`` with the noise of a new rating and with the
        block's own uncertainty ``Sigma`` (the planner's posterior, widened by the fit's loop scale
        for the item's count of ratings, :mod:`hybrid.core.loop_scales`).  With ``n`` ratings from
        rows ``b`` of second moment ``C`` and ``D = E[(b' Sigma b) b b']``, the expectation over
        the raters is taken with ``E[B'B] = n C`` and ``E[B'B Sigma B'B] = n (n - 1) C Sigma C + n D``:
        ``K (n (n - 1) C Sigma C + n D + n sigma_new^2 C) K'``.
        """
        m = self.model
        items = np.asarray(items)
        n = np.broadcast_to(np.asarray(more, float), items.shape)[:, None, None]
        cov = self.cov_now[items] * self.loop_scale[items][:, None, None]
        users, by_item, inverse = self._moments()
        # only users who have not rated an item can be asked for it
        w = self._weights(items)[:, users] * (1.0 - by_item[items][:, users].astype(bool).toarray())
        B = user_design(m)[users]
        w = w / np.maximum(w.sum(1, keepdims=True), 1e-12)
        # the rater is re-solved first and takes up part of the surprise: a share q / (1 + q) of
        # it, q = a' (G_u + lam_user I)^-1 a the new rating's leverage in its rater's solve
        a = self.model.item_blocks_[items].copy()
        if m.biases:
            a[:, 0] = 1.0
        keep = 1.0 / (1.0 + np.einsum("bd,ude,be->bu", a, inverse, a))
        C = np.einsum("bu,ud,ue->bde", w, B, B)
        Cs = np.einsum("bu,ud,ue->bde", w * keep, B, B)
        quad = np.einsum("ud,bde,ue->bu", B, cov, B)
        Dss = np.einsum("bu,ud,ue->bde", w * keep ** 2 * quad, B, B)
        Css = np.einsum("bu,ud,ue->bde", w * keep ** 2, B, B)
        K = np.linalg.inv(self.grams[items] + n * C + scaled(m.prior_precision_, self.weight[items]))
        middle = n * (n - 1) * Cs @ cov @ Cs + n * Dss + n * m.sigma2_new_ * Css
        return K @ middle @ K.transpose(0, 2, 1)

    def _moments(self):
        """What an update's moments are averaged over, worked out once: a fixed sample of users
        (all of a small set), the ratings by item, and each sampled user's own solve in the
        trainer's user step, ``(G_u + lam_user I)^-1``."""
        if getattr(self, "_moment_state", None) is None:
            U = len(self.model.user_ids_)
            users = np.arange(U) if U <= _MOMENT_USERS else \
                np.sort(np.random.default_rng(0).choice(U, _MOMENT_USERS, replace=False))
            data = self.model.rating_data()
            F = self.model.factors_
            ib, ix = F.split(F.item)
            R = data.by_user[users]
            offset = np.zeros(len(ix)) if ib is None else ib
            G = row_grams(R.indptr, R.indices, R.data, design(ix, ib), offset)[0]
            self._moment_state = (users, data.by_item, np.linalg.inv(G + self.model.lam_user_ * np.eye(G.shape[1])))
        return self._moment_state

    def _weights(self, items):
        """(b, U) weight of each user among the responders assumed for each item."""
        w = activity_share(self.model.user_counts_)
        if self.C is not None:
            return np.broadcast_to(w, (len(items), len(w)))
        z = self.model.item_blocks_[items]
        scores = next(self.model.score_blocks(z, chunk=len(z)))[1]
        return (scores >= self.threshold) * w[None, :]

    def kept(self, items, more, draws=slice(None)):
        """(expected kept share, se) of each item's current top-k list after ``more`` further
        ratings are folded in (:func:`hybrid.planning.kept.expected_kept`)."""
        items = np.asarray(items)
        more = np.broadcast_to(np.asarray(more, float), items.shape)
        mean, se = np.ones(len(items)), np.zeros(len(items))
        for s in range(0, len(items), _ITEMS_PER_BLOCK):
            blk = items[s:s + _ITEMS_PER_BLOCK]
            cov = self.movement(blk, more[s:s + _ITEMS_PER_BLOCK])
            mean[s:s + len(blk)], se[s:s + len(blk)] = stability(
                self.vectors[blk], draw_factor(vector_part(self.model, cov)), self.vectors[self.pool], self.k,
                self.eps[draws], exclude=self.pool_pos[blk], n_jobs=threads(self.model.n_jobs))
        return mean, se

    def at(self, items, extra, draws=slice(None)):
        """(stability, se) of ``items`` after ``extra`` more ratings each (array or scalar),
        from all the draws or the ``draws`` slice of them."""
        items = np.asarray(items)
        extra = np.broadcast_to(np.asarray(extra, float), items.shape)
        mean, se = np.empty(len(items)), np.empty(len(items))
        for s in range(0, len(items), _ITEMS_PER_BLOCK):
            blk = items[s:s + _ITEMS_PER_BLOCK]
            more = extra[s:s + _ITEMS_PER_BLOCK, None, None] * self.extra_moment(blk)
            cov = covariances(self.model, self.grams[blk], self.weight[blk], more)
            mean[s:s + len(blk)], se[s:s + len(blk)] = stability(
                self.vectors[blk], draw_factor(vector_part(self.model, cov)), self.vectors[self.pool], self.k, self.eps[draws],
                exclude=self.pool_pos[blk], n_jobs=threads(self.model.n_jobs))
        return mean, se


class ClusterAssessor:
    """An :class:`Assessor` whose stability evaluations run on a Dask cluster.

    The assessor is sent to every worker once; each call maps
    :meth:`Assessor.at` over chunks of whole item blocks, so every item is
    evaluated exactly as it is locally.
    """

    def __init__(self, assessor: Assessor, client, blocks_per_task: int = 4):
        self.local = assessor
        self.client = client
        self.step = _ITEMS_PER_BLOCK * blocks_per_task
        from hybrid.engines.cluster import put
        self.shared = put(client, assessor)

    def __getattr__(self, name):
        return getattr(self.local, name)

    def at(self, items, extra, draws=slice(None)):
        from hybrid.engines.cluster import map_chunks
        items = np.asarray(items)
        extra = np.broadcast_to(np.asarray(extra, float), items.shape)
        chunks = ((items[s:s + self.step], extra[s:s + self.step], draws) for s in range(0, len(items), self.step))
        parts = list(map_chunks(self.client, _assess, self.shared, chunks, window=1 << 30))
        if not parts:
            return np.empty(0), np.empty(0)
        return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])


def _assess(assessor, items, extra, draws):
    return assessor.at(items, extra, draws)


def settle(assessor, items, extra, target):
    """Stability of ``items`` after ``extra`` ratings, as far as comparing it with ``target`` needs.

    A sequential estimate: the first :data:`FIRST_DRAWS` draws decide for every
    item whose estimate is more than three standard errors (at least
    :data:`_SE_FLOOR`) from the target; only the others take the remaining
    draws, and their estimate is then the one all the draws give.
    """
    items = np.asarray(items)
    extra = np.broadcast_to(np.asarray(extra, float), items.shape)
    S = len(assessor.eps)
    first = min(S, FIRST_DRAWS)
    value, se = assessor.at(items, extra, slice(0, first))
    unsure = np.flatnonzero(np.abs(value - target) < 3 * np.maximum(se, _SE_FLOOR))
    if first < S and unsure.size:
        rest = assessor.at(items[unsure], extra[unsure], slice(first, S))[0]
        value[unsure] = (first * value[unsure] + (S - first) * rest) / S
    return value


def ratings_needed(assessor, items, now, target, max_needed, grid=GRID, curves=True):
    """The smallest number of extra ratings reaching ``target``, and stability curves.

    Only items below the target are evaluated.  With ``curves`` the stability of
    each is found on the whole grid (the budget's ``gain`` aim needs it);
    without, only at ``max_needed``, and the answer is then found by bisection
    (about log2(max_needed) evaluations instead of the grid's).  Comparisons
    with the target off the grid use sequential estimates (:func:`settle`).
    Returns (curves (m, G), needed (m,) float with NaN for "more than max_needed", grid).
    """
    grid = grid[grid <= max_needed]
    if not curves:
        grid = np.array([0, grid[-1]])
    out = np.repeat(now[:, None], len(grid), axis=1)
    open_ = np.flatnonzero(now < target)
    for j, n in enumerate(grid[1:], start=1):
        live = open_[out[open_, j - 1] < 0.999]   # a settled curve stays settled
        if live.size:
            out[live, j] = assessor.at(items[live], n)[0] if curves else settle(assessor, items[live], n, target)
    needed = np.full(len(items), np.nan)
    needed[now >= target] = 0
    reach = out >= target
    first = np.where(reach.any(1), reach.argmax(1), -1)
    todo = np.flatnonzero(first > 0)
    lo, hi = grid[first[todo] - 1].astype(float), grid[first[todo]].astype(float)
    while todo.size and (hi - lo > 1).any():   # bisection, vectorised over items
        mid = np.floor((lo + hi) / 2)
        unsure = hi - lo > 1
        val = np.full(len(todo), -np.inf)
        val[unsure] = settle(assessor, items[todo[unsure]], mid[unsure], target)
        ok = val >= target
        hi = np.where(unsure & ok, mid, hi)
        lo = np.where(unsure & ~ok, mid, lo)
    needed[todo] = hi
    return out, needed, grid


@dataclass
class Assessment:
    """Where the chosen items stand: stability now (and its standard error), the ratings each
    needs to reach the target, and, when asked for, each item's stability curve."""

    chosen: np.ndarray
    target: float
    now: np.ndarray
    se: np.ndarray
    needed: np.ndarray
    curves: np.ndarray
    grid: np.ndarray

    def curve_frame(self, model) -> pd.DataFrame:
        return pd.DataFrame(self.curves, index=pd.Index(model.item_ids_[self.chosen], name="item"),
                            columns=[int(g) for g in self.grid])


def assess(A: Assessor, chosen, target, max_needed, curves=False) -> Assessment:
    """Stability now and the ratings needed for each of ``chosen``."""
    now, se = A.at(chosen, 0.0)
    curve, needed, grid = ratings_needed(A, chosen, now, target, max_needed, curves=curves)
    return Assessment(chosen, target, now, se, needed, curve, grid)
