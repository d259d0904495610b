"""Coverage planner: how far each item's neighbour list can be trusted, and what to collect.

For every item: its status (no ratings yet, under-covered, trusted), its
stability now (expected overlap of its top-k list with the list it would
have once its vector is known; see :mod:`hybrid.core.posterior`), the ratings it
needs to reach the target, and, given a budget, how many to collect for it
and from whom (:mod:`hybrid.planning.campaign`).  Ratings are personal data and a
campaign contacts people: ask only members who agreed to be asked, respect
opt-outs and local data-protection law.  Every number here is an estimate.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError, did_you_mean_id
from hybrid.common.limits import SETTINGS, check_plan, defaults, threads
from hybrid.core.posterior import (
    covariances,
    draw_factor,
    item_grams,
    stability,
    vector_part,
    vector_weight,
)
from hybrid.planning.campaign import (
    allocate_gain,
    allocate_reach,
    asks_table,
    choose_askees,
    propensity,
)

GRID = np.array([0, 1, 2, 3, 5, 8, 12, 20, 30, 50, 80, 120, 200, 300, 500])
STATUS = ("no ratings yet", "under-covered", "trusted")
_ITEMS_PER_BLOCK = 256
FIRST_DRAWS = 16    # draws that may settle a comparison with the target on their own
_SE_FLOOR = 0.025   # a run of equal overlaps is not certainty


@dataclass
class Plan:
    """What the planner found: one row per item, the asks, and the stability curves."""

    items: pd.DataFrame
    asks: pd.DataFrame
    curves: pd.DataFrame
    settings: dict = field(default_factory=dict)

    def summary(self) -> dict:
        counts = self.items["status"].value_counts()
        out = {s: int(counts.get(s, 0)) for s in STATUS}
        out["ratings planned"] = int(self.items["planned"].sum())
        out["items reaching target with the plan"] = int(self.items["reaches_target"].sum())
        out["asks"] = len(self.asks)
        return out


def responder_moment(model, mode="active", scores=None, threshold=None):
    """Mean of ``b b^T`` (b = [1, theta_u]) over the users expected to answer.

    ``active``: all users, weighted by their response propensity.  ``likely``:
    per item, the users whose expected rating is at least ``threshold``
    (needs ``scores``, the item x user block).  Returns (d, d) or (b, d, d).
    """
    B = _user_design(model)
    w = propensity(model.user_counts_)
    if mode == "active":
        return np.einsum("u,ud,ue->de", w, B, B) / w.sum()
    mask = (scores >= threshold) * w[None, :]
    total = np.maximum(mask.sum(1), 1e-12)
    outer = np.einsum("ud,ue->ude", B, B).reshape(len(B), -1)
    return (mask @ outer / total[:, None]).reshape(len(scores), B.shape[1], B.shape[1])


def _user_design(model):
    F = model.factors_
    ub, ut = F.split(F.user)
    return np.hstack([np.ones((len(ut), 1)), ut]) if ub is not None else ut


class Assessor:
    """Evaluates stability of any items at any number of extra ratings, with fixed draws."""

    def __init__(self, model, k=10, draws=64, seed=0, pool_min_ratings=20, responders="active",
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
        self.pool = self._pool(pool_min_ratings) if pool is None else np.asarray(pool)
        if len(self.pool) <= k:
            raise InputError(f"only {len(self.pool)} rated items can serve as neighbours; "
                             f"need more than k={k}: lower k")
        self.pool_pos = pd.Index(self.pool).get_indexer(np.arange(len(self.vectors)))
        self.eps = np.random.default_rng(seed).standard_normal((draws, self.vectors.shape[1]))
        self.responders = responders
        self.threshold = responder_threshold
        self.C = responder_moment(model, "active") if responders == "active" else None

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


def priority_weights(model, column):
    """Weights from a raw attribute column: numbers as given (>= 0), dates earlier-first."""
    if column is None:
        return np.ones(len(model.item_ids_))
    table = getattr(model, "item_table_", None)
    if table is None or column not in table.columns:
        known = [] if table is None else list(table.columns)
        raise InputError(f"priority column '{column}' is not among the model's attribute columns "
                         f"({', '.join(known) or 'none stored'})")
    raw = table[column].reindex(model.item_ids_)
    num = pd.to_numeric(raw, errors="coerce")
    if num.notna().mean() > 0.5:
        return np.clip(num.fillna(num.median()).to_numpy(float), 0, None)
    dates = pd.to_datetime(raw, errors="coerce", format="mixed")
    if dates.notna().mean() > 0.5:
        days = (dates - dates.min()).dt.days.fillna(0).to_numpy(float)
        span = max(days.max(), 1.0)
        return 1.0 - 0.9 * days / span    # the soonest launch weighs 1, the latest 0.1
    raise InputError(f"priority column '{column}': expected numbers or dates, found {raw.iloc[0]!r}")


LIKED = SETTINGS["score"]["liked"].default   # the responder threshold when none is given (the app passes its own)
_P = defaults("plan")   # plan()'s defaults, from the one table


def plan(model, target=_P["target"], k=_P["k"], budget=None, per_user=None, priority=None, seed=_P["seed"], *,
         draws=_P["draws"], max_needed=_P["max_needed"], aim=_P["aim"], per_item=None, responders=_P["responders"],
         responder_threshold=None, pool_min_ratings=_P["pool_min_ratings"], items=None, client=None) -> Plan:
    """Assess every item and, given a budget, plan a sampling campaign.

    Parameters
    ----------
    model : HybridFactorModel
    target : float
        Stability an item must reach to count as trusted.
    k : int
        Length of the neighbour list.
    budget : int, optional
        Ratings to collect in all; ``None`` assesses without planning.
    per_user : int, optional
        Most asks per user across the campaign (default: no cap beyond one per item).
    priority : str, optional
        Attribute column weighting items (numbers, or launch dates: sooner first).
    seed : int
        Seed of the posterior draws.
    aim : {'reach', 'gain'}
        Maximise the (weighted) number of items reaching the target, or the total gain.
    per_item : int, optional
        Most ratings planned for one item.
    draws : int
        Posterior draws per item for the stability estimate.
    max_needed : int
        Largest number of extra ratings the ratings-needed search looks at.
    responders : {'active', 'likely'}
        Whom the asks go to: the users who rate most, or those expected to like the item.
    responder_threshold : float, optional
        With ``'likely'``: the expected rating a user must reach to be asked (``LIKED``, 4.0,
        if not given).
    pool_min_ratings : int
        Ratings an item needs to be a neighbour candidate.
    items : list of str, optional
        Assess and plan only these items (a launch batch, say); the neighbour
        candidates are still all the catalogue's trusted items.
    client : distributed.Client, optional
        Evaluate the items' stability on this Dask cluster (same results).

    Returns
    -------
    Plan

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=500, n_lots=80, n_new=4, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=8, schema=club.schema).fit(club.ratings, club.lots)
    >>> p = plan(m, k=5, budget=40, draws=16)
    >>> sorted(p.items["status"].unique())[0] in ("no ratings yet", "trusted", "under-covered")
    True
    """
    check_plan(target=target, k=k, budget=budget, per_user=per_user, per_item=per_item, seed=seed,
               draws=draws, max_needed=max_needed, aim=aim, responders=responders,
               responder_threshold=responder_threshold, pool_min_ratings=pool_min_ratings)
    # 'likely' responders: those expected to rate at least the threshold (default LIKED)
    threshold = (LIKED if responder_threshold is None else responder_threshold) if responders == "likely" else None
    A = Assessor(model, k, draws, seed, pool_min_ratings, responders, threshold)
    if client is not None:
        A = ClusterAssessor(A, client)
    chosen = _chosen(model, items)
    now, se = A.at(chosen, 0.0)
    curves, needed, grid = ratings_needed(A, chosen, now, target, max_needed, curves=(aim == "gain"))
    counts = model.item_counts_[chosen]
    status = np.where(counts == 0, STATUS[0], np.where(now >= target, STATUS[2], STATUS[1]))
    weights = priority_weights(model, priority)[chosen]
    planned = np.zeros(len(chosen), dtype=np.int64)
    open_items = now < target
    if budget:
        cap = np.inf if per_item is None else per_item
        if aim == "reach":
            cost = np.where(open_items & (needed <= cap), needed, np.nan)
            planned = allocate_reach(cost, weights, budget)
        else:
            planned = allocate_gain(np.where(open_items[:, None], curves, curves[:, :1]), grid, weights,
                                    budget, per_item)
    reaches = (now >= target) | ((planned > 0) & np.isfinite(needed) & (planned >= needed))
    table = pd.DataFrame({
        "item": model.item_ids_[chosen], "status": status, "ratings": counts, "stability": now,
        "stability_se": se, "needed": pd.array(np.where(np.isfinite(needed), needed, np.nan)).astype("Int64"),
        "needed_label": [f"{int(n)}" if np.isfinite(n) else f"more than {int(grid[-1])}" for n in needed],
        "planned": planned, "reaches_target": reaches, "priority": weights,
        "in_pool": np.isin(chosen, A.pool), "relative_variance": A.relative_variance[chosen]})
    # what the plan was made with and from, on every row so that any file format keeps it
    table = table.assign(plan_target=float(target), plan_k=int(k), plan_budget=int(budget or 0),
                         model_fingerprint=model.fingerprint_)
    asks = _asks(model, A, chosen, planned, weights, per_user) if budget else asks_table([])
    curve_frame = pd.DataFrame(curves, index=pd.Index(model.item_ids_[chosen], name="item"),
                               columns=[int(g) for g in grid])
    settings = {"target": target, "k": k, "budget": budget, "per_user": per_user, "priority": priority,
                "seed": seed, "draws": draws, "aim": aim, "pool_size": int(len(A.pool)), "pool_rule": A.pool_rule,
                "responders": responders}
    return Plan(table, asks, curve_frame, settings)


def _chosen(model, items):
    """Indices of the items to plan (all, or the named ones, each once, in the order given)."""
    if items is None:
        return np.arange(len(model.item_ids_))
    names = pd.unique(np.atleast_1d(np.asarray(items, dtype=str)))
    where = pd.Index(model.item_ids_).get_indexer(names)
    if (where < 0).any():
        first = names[np.argmax(where < 0)]
        raise InputError(f"item '{first}' is not in the model{did_you_mean_id(first, model.item_ids_)} "
                         "(add unrated items with their attributes first)")
    return where


def _asks(model, A: Assessor, chosen, planned, weights, per_user):
    """Whom to ask for every planned item, most important items first."""
    B = _user_design(model)
    weight = propensity(model.user_counts_)
    left = np.full(len(B), np.iinfo(np.int64).max if per_user is None else int(per_user))
    R = model.rating_data().by_item
    rows = []
    order = np.flatnonzero(planned > 0)
    order = order[np.lexsort((planned[order], -weights[order]))]
    for j in order:
        i = chosen[j]
        eligible = np.ones(len(B), bool)
        eligible[R.indices[R.indptr[i]:R.indptr[i + 1]]] = False
        users, gains, _ = choose_askees(B, A.cov_now[i], model.sigma2_new_, int(planned[j]), eligible, weight, left)
        if users:
            expected = model.clip(model.combine(model.user_blocks_[users],
                                                 np.repeat(model.item_blocks_[[i]], len(users), 0)))
            rows += [(model.item_ids_[i], model.user_ids_[u], r + 1, g, e)
                     for r, (u, g, e) in enumerate(zip(users, gains, expected))]
    return asks_table(rows)
