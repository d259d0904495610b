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

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError, did_you_mean_id
from hybrid.common.limits import SETTINGS, check_plan, defaults
from hybrid.planning.assess import (
    STATUS,
    Assessment,
    Assessor,
    ClusterAssessor,
    assess,
    ratings_needed,
    user_design,
)
from hybrid.planning.campaign import (
    allocate_gain,
    allocate_reach,
    asks_table,
    choose_askees,
)
from hybrid.planning.responses import Contacts

WELL_RATED = 100   # ratings that make an item well rated, for the summary's yardstick of a target


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
        # the plan's own effect: items not trusted now that its ratings bring to the target
        out["more items reaching the target with the plan"] = int(
            (self.items["reaches_target"] & (self.items["status"] != STATUS[2])).sum())
        if self.settings.get("aim") == "gain":   # its whole curves drawn: the stability it adds
            out["stability gained in all"] = round(self.gain(), 4)
        well = self.items.loc[self.items["ratings"] >= WELL_RATED, "stability"]
        if len(well):   # what a list can reach on this catalogue: a target far above it is out of reach
            out[f"median stability of items with {WELL_RATED}+ ratings"] = round(float(well.median()), 3)
        out["asks"] = len(self.asks)
        # a wave asks more people than it plans ratings: not everyone answers
        out["expected answers"] = round(float(self.asks["answer_chance"].sum()), 1)
        return out

    def gain(self) -> float:
        """The stability the planned ratings add, summed over items, read off each item's curve of
        stability against further ratings (whole curves are drawn with ``aim='gain'`` only;
        otherwise the curves hold just their two ends, and this is a rough figure)."""
        grid = np.asarray(self.curves.columns, dtype=float)
        rows = self.curves.loc[self.items["item"]].to_numpy()
        planned = self.items["planned"].to_numpy(float)
        after = np.array([np.interp(p, grid, row) for p, row in zip(planned, rows)])
        return float((after - rows[:, 0]).sum())


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
         responder_threshold=None, candidate_min_ratings=_P["candidate_min_ratings"], items=None, client=None,
         contacts: Contacts | None = None, levels=_P["levels"], pool_min_ratings=None) -> Plan:
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
    candidate_min_ratings : int
        Ratings an item needs to be a candidate (an item other items' neighbour lists may hold).
    pool_min_ratings : int, optional
        The old name of ``candidate_min_ratings``, until the next release (a ``FutureWarning``).
    items : list of str, optional
        Assess and plan only these items (a launch batch, say); the neighbour
        candidates are still all the catalogue's trusted items.
    client : distributed.Client, optional
        Evaluate the items' stability on this Dask cluster (same results).
    levels : list of float
        Stability levels (below the target) whose ratings needed the table gives too
        (``needed_0.5``, ...), so that an item far from the target still has a number to act on.
    contacts : Contacts, optional
        Whom this wave may ask and each user's chance of answering (a campaign's record,
        :func:`hybrid.planning.responses.contacts_from_history`); by default everyone may be
        asked up to ``per_user`` times and answers as often as a campaign's first wave is
        assumed to (``[campaign] first_response``, scaled by rating activity).  Asks are sized
        so that the expected answers meet the ratings planned.

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
    if pool_min_ratings is not None:   # the old name, for one release
        warnings.warn("plan(pool_min_ratings=...) is now candidate_min_ratings; the old name works until the next "
                      "release", FutureWarning, stacklevel=2)
        candidate_min_ratings = pool_min_ratings
    check_plan(target=target, k=k, budget=budget, per_user=per_user, per_item=per_item, seed=seed,
               draws=draws, max_needed=max_needed, aim=aim, responders=responders,
               responder_threshold=responder_threshold, candidate_min_ratings=candidate_min_ratings,
               levels=None if levels is None else list(levels))
    # 'likely' responders: those expected to rate at least the threshold (default LIKED)
    threshold = (LIKED if responder_threshold is None else responder_threshold) if responders == "likely" else None
    A = Assessor(model, k, draws, seed, candidate_min_ratings, responders, threshold)
    if client is not None:
        A = ClusterAssessor(A, client)
    found = assess(A, _chosen(model, items), target, max_needed, curves=(aim == "gain"))
    weights = priority_weights(model, priority)[found.chosen]
    planned = allocate(found, weights, budget, aim, per_item) if budget else np.zeros(len(found.chosen), np.int64)
    if contacts is None:
        contacts = Contacts.fresh(model, per_user)
    asks = _asks(model, A, found.chosen, planned, weights, contacts) if budget else asks_table([])
    settings = {"target": target, "k": k, "budget": budget, "per_user": per_user, "priority": priority,
                "seed": seed, "draws": draws, "aim": aim, "pool_size": int(len(A.pool)), "pool_rule": A.pool_rule,
                "responders": responders}
    table = with_outlook(plan_table(model, A, found, planned, weights, budget), A, found, planned)
    table = with_levels(table, A, found, [v for v in (levels or ()) if v < target], max_needed)
    return Plan(with_asks(table, asks), asks, found.curve_frame(model), settings)


def with_outlook(items: pd.DataFrame, A: Assessor, found: Assessment, planned) -> pd.DataFrame:
    """Each item's stability after its planned ratings, and the share of its list expected to
    stand once they are folded in with ``update`` (:func:`hybrid.planning.kept.expected_kept`;
    1 where nothing is planned)."""
    after, kept = found.now.copy(), np.ones(len(planned))
    bought = np.flatnonzero(planned > 0)
    if bought.size:
        after[bought] = A.at(found.chosen[bought], planned[bought])[0]
        kept[bought] = A.kept(found.chosen[bought], planned[bought])[0]
    return items.assign(stability_after=after, expected_kept=kept)


def with_levels(items: pd.DataFrame, A: Assessor, found: Assessment, levels, max_needed) -> pd.DataFrame:
    """Ratings needed to reach each of ``levels`` (columns ``needed_<level>``; empty beyond
    ``max_needed``), found as the target's are."""
    out = {}
    for level in sorted(levels):
        needed = ratings_needed(A, found.chosen, found.now, level, max_needed, curves=False)[1]
        out[f"needed_{level:g}"] = pd.array(np.where(np.isfinite(needed), needed, np.nan)).astype("Int64")
    return items.assign(**out)


def with_asks(items: pd.DataFrame, asks: pd.DataFrame) -> pd.DataFrame:
    """The plan's table with each item's asks and expected answers (their chances summed)."""
    per = asks.groupby("item").agg(asks=("user", "size"), expected_answers=("answer_chance", "sum"))
    out = items.join(per, on="item")
    return out.assign(asks=out["asks"].fillna(0).astype(np.int64),
                      expected_answers=out["expected_answers"].fillna(0.0))


def allocate(found: Assessment, weights, budget, aim, per_item=None) -> np.ndarray:
    """Ratings planned per item: a budget split to reach the target (``reach``) or for the
    largest total gain (``gain``), only among the items below the target."""
    open_items = found.now < found.target
    if aim == "reach":
        cap = np.inf if per_item is None else per_item
        return allocate_reach(np.where(open_items & (found.needed <= cap), found.needed, np.nan), weights, budget)
    curves = found.curves
    return allocate_gain(np.where(open_items[:, None], curves, curves[:, :1]), found.grid, weights, budget, per_item)


def plan_table(model, A: Assessor, found: Assessment, planned, weights, budget) -> pd.DataFrame:
    """The plan's table, one row per chosen item, with what it was made with and from."""
    chosen, now, needed, target = found.chosen, found.now, found.needed, found.target
    counts = model.item_counts_[chosen]
    status = np.where(counts == 0, STATUS[0], np.where(now >= target, STATUS[2], STATUS[1]))
    reaches = (now >= target) | ((planned > 0) & np.isfinite(needed) & (planned >= needed))
    table = pd.DataFrame({
        "item": model.item_ids_[chosen], "status": status, "ratings": counts, "stability": now,
        "stability_se": found.se, "needed": pd.array(np.where(np.isfinite(needed), needed, np.nan)).astype("Int64"),
        "needed_label": [f"{int(n)}" if np.isfinite(n) else f"more than {int(found.grid[-1])}" for n in needed],
        "planned": planned, "reaches_target": reaches, "priority": weights,
        "candidate": np.isin(chosen, A.pool), "relative_variance": A.relative_variance[chosen]})
    # on every row, so that any file format keeps it
    return table.assign(plan_target=float(target), plan_k=int(A.k), plan_budget=int(budget or 0),
                        model_fingerprint=model.fingerprint_)


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


def _asks(model, A: Assessor, chosen, planned, weights, contacts: Contacts):
    """Whom to ask for every planned item, most important items first."""
    B = user_design(model)
    weight = np.where(contacts.opted_out, 0.0, contacts.propensity)
    left = contacts.asks_left.copy()
    R = model.rating_data().by_item
    rows = []
    order = np.flatnonzero(planned > 0)
    order = order[np.lexsort((planned[order], -weights[order]))]
    for j in order:
        i = chosen[j]
        eligible = np.ones(len(B), bool)
        eligible[R.indices[R.indptr[i]:R.indptr[i + 1]]] = False
        eligible[contacts.opted_out] = False
        eligible[contacts.blocked.get(int(i), [])] = False
        users, gains, _ = choose_askees(B, A.cov_now[i], model.sigma2_new_, int(planned[j]), eligible, weight, left)
        if users:
            expected = model.clip(model.combine(model.user_blocks_[users],
                                                 np.repeat(model.item_blocks_[[i]], len(users), 0)))
            rows += [(model.item_ids_[i], model.user_ids_[u], r + 1, g, e, weight[u])
                     for r, (u, g, e) in enumerate(zip(users, gains, expected))]
    return asks_table(rows)
