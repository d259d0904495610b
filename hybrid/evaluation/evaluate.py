"""Evaluation protocols: is the hybrid worth it, measured on held-out ratings.

* ``cold``: whole items (a seeded share of those with at least ``min_ratings``)
  are held out; everything is trained on the rest and the held-out items are
  scored from their attributes alone.  The case the product exists for.
* ``warm``: a seeded share of each user's ratings is held out.
* ``few``: held-out items get ``n`` of their ratings revealed (folded in),
  the rest are scored: how fast an item moves from its projection to its own.

Every figure is the mean and standard deviation over ``folds`` folds.  Each
baseline is tuned on a validation split of the training part made by the
same protocol, so the hybrid meets the strongest version of each.
"""
from __future__ import annotations

import copy

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError
from hybrid.common.limits import check_checks
from hybrid.common.seeds import sub_seed
from hybrid.estimator.features import AttributeEncoder
from hybrid.estimator.model import HybridFactorModel
from hybrid.evaluation.baselines import BASELINES
from hybrid.evaluation.metrics import mae, ndcg_by_group, rmse

PROTOCOLS = ("cold", "warm", "few")
REVEAL = (1, 3, 5, 10)


def cold_folds(ratings, folds, seed, min_ratings=5):
    """Boolean test masks over ``ratings``: each fold holds out whole items."""
    counts = ratings["item"].value_counts()
    eligible = np.sort(counts.index[counts >= min_ratings].to_numpy(str))
    rng = np.random.default_rng(seed)
    parts = np.array_split(rng.permutation(eligible), folds)
    items = ratings["item"].to_numpy(str)
    return [np.isin(items, part) for part in parts]


def warm_folds(ratings, folds, seed):
    """Boolean test masks: each user's ratings are dealt round-robin into folds."""
    rng = np.random.default_rng(seed)
    key = rng.random(len(ratings))
    rank = pd.Series(key).groupby(ratings["user"].to_numpy()).rank(method="first").to_numpy() - 1
    offset = pd.Series(rng.integers(0, folds, len(ratings))).groupby(
        ratings["user"].to_numpy()).transform("first").to_numpy()
    fold = (rank + offset) % folds
    return [fold == f for f in range(folds)]


def _split(ratings, protocol, folds, seed, min_ratings):
    if protocol == "warm":
        return warm_folds(ratings, folds, seed)
    return cold_folds(ratings, folds, seed, min_ratings)


class _Coder:
    """Integer codes of users and items shared by every method of one evaluation."""

    def __init__(self, ratings, attributes, schema, params):
        self.users = np.unique(ratings["user"].to_numpy(str))
        self.items = pd.Index(attributes.index.astype(str))
        self.u = np.searchsorted(self.users, ratings["user"].to_numpy(str))
        self.i = self.items.get_indexer(ratings["item"])
        self.r = ratings["rating"].to_numpy(float)
        enc = AttributeEncoder(schema, params.get("text_max_features", 2000), params.get("text_min_df", 2),
                               params.get("text_ngrams", 1), params.get("tag_separator", "|"))
        self.A = enc.fit(attributes).transform(attributes)


def _tuned(cls, C, train, protocol, seed, min_ratings):
    """Fit ``cls`` on ``train`` with its parameter chosen on an inner validation split."""
    if len(cls.grid) == 1:
        return cls().fit(C.u[train], C.i[train], C.r[train], C.A, len(C.users))
    sub = pd.DataFrame({"user": C.u[train], "item": C.i[train].astype(str)})
    inner = _split(sub, "warm" if protocol == "warm" else "cold", 6, sub_seed(seed, "evaluation inner"), min_ratings)[0]
    tr, va = np.flatnonzero(train)[~inner], np.flatnonzero(train)[inner]
    best = min(cls.grid, key=lambda p: rmse(C.r[va], cls(p).fit(C.u[tr], C.i[tr], C.r[tr], C.A,
                                                                 len(C.users)).predict(C.u[va], C.i[va])))
    return cls(best).fit(C.u[train], C.i[train], C.r[train], C.A, len(C.users))


def _scores(C, test, pred):
    y = C.r[test]
    row = {"rmse": rmse(y, pred), "mae": mae(y, pred)}
    _, item_ndcg = ndcg_by_group(C.i[test], y, pred, k=10)
    _, user_ndcg = ndcg_by_group(C.u[test], y, pred, k=10)
    row["item_ndcg10"] = float(item_ndcg.mean()) if item_ndcg.size else np.nan
    row["user_ndcg10"] = float(user_ndcg.mean()) if user_ndcg.size else np.nan
    return row


def _hybrid(ratings, attributes, params, train):
    return HybridFactorModel(**{**params, "holdout": 0.0}).fit(ratings[train], attributes)


def evaluate(ratings: pd.DataFrame, attributes: pd.DataFrame, params: dict, protocol: str = "cold",
             folds: int = 5, seed: int = 0, min_ratings: int = 5, reveal=REVEAL, on_step=None) -> pd.DataFrame:
    """The baselines and the hybrid side by side; one row per method (and ``n`` for ``few``).

    Parameters
    ----------
    ratings : DataFrame with ``user``, ``item``, ``rating``
    attributes : DataFrame indexed by item id
    params : dict
        Keyword arguments of :class:`~hybrid.estimator.model.HybridFactorModel` (with ``schema``).
    protocol : {'cold', 'warm', 'few'}
    folds : int
        Folds; each figure is reported as mean and standard deviation.

    Returns
    -------
    DataFrame with ``method``, ``uses`` (and ``n``), then ``<metric>_mean`` and
    ``<metric>_sd`` for rmse, mae, item_ndcg10 and user_ndcg10.  ``on_step(done, total, what)``,
    if given, hears of each fold as it starts.
    """
    if protocol not in PROTOCOLS:
        raise InputError(f"protocol must be one of {', '.join(PROTOCOLS)}, found {protocol!r}")
    check_checks(folds=folds, seed=seed, min_ratings=min_ratings)
    C = _Coder(ratings, attributes, params.get("schema") or {}, params)
    records = []
    for f, test in enumerate(_split(ratings, protocol, folds, seed, min_ratings)):
        if on_step is not None:
            on_step(f, folds, f"fold {f + 1}")
        train = ~test
        if protocol == "few":
            records += _few(C, ratings, attributes, params, train, test, sub_seed(seed, "evaluation folds", f), reveal,
                            min_ratings, f)
            continue
        for cls in BASELINES:
            model = _tuned(cls, C, train, protocol, sub_seed(seed, "evaluation folds", f), min_ratings)
            records.append({"fold": f, "method": cls.name, "uses": cls.uses,
                            **_scores(C, test, model.predict(C.u[test], C.i[test]))})
        hybrid = _hybrid(ratings, attributes, params, train)
        pred = hybrid.predict(ratings["user"].to_numpy(str)[test], ratings["item"].to_numpy(str)[test])
        records.append({"fold": f, "method": "hybrid", "uses": "ratings, attributes, factors",
                        **_scores(C, test, pred)})
    if on_step is not None:
        on_step(folds, folds, "done")
    return summarise(pd.DataFrame(records))


def _few(C, ratings, attributes, params, train, test, seed, reveal, min_ratings, fold):
    """Reveal n ratings of each held-out item, fold them in, score the rest."""
    rng = np.random.default_rng(seed)
    test_idx = np.flatnonzero(test)
    order = pd.Series(rng.random(len(test_idx))).groupby(C.i[test_idx]).rank(method="first").to_numpy() - 1
    count = np.bincount(C.i[test_idx], minlength=len(C.items))[C.i[test_idx]]
    keep = count > max(reveal)             # the same items at every n
    base = _hybrid(ratings, attributes, params, train)
    out = []
    for n in reveal:
        shown, scored = test_idx[keep & (order < n)], test_idx[keep & (order >= n)]
        mask = np.zeros(len(C.r), bool)
        mask[scored] = True
        seen = train.copy()
        seen[shown] = True
        for cls in BASELINES:
            model = _tuned(cls, C, seen, "cold", seed, min_ratings)
            out.append({"fold": fold, "n": n, "method": cls.name, "uses": cls.uses,
                        **_scores(C, mask, model.predict(C.u[scored], C.i[scored]))})
        hybrid = copy.deepcopy(base).fold_in(ratings.iloc[shown])
        pred = hybrid.predict(ratings["user"].to_numpy(str)[scored], ratings["item"].to_numpy(str)[scored])
        out.append({"fold": fold, "n": n, "method": "hybrid", "uses": "ratings, attributes, factors",
                    **_scores(C, mask, pred)})
    return out


def summarise(records: pd.DataFrame) -> pd.DataFrame:
    """Mean and standard deviation over folds of every metric."""
    keys = ["n", "method", "uses"] if "n" in records.columns else ["method", "uses"]
    metrics = ["rmse", "mae", "item_ndcg10", "user_ndcg10"]
    grouped = records.groupby(keys, sort=False)[metrics]
    mean, sd = grouped.mean().add_suffix("_mean"), grouped.std(ddof=1).add_suffix("_sd")
    out = pd.concat([mean, sd], axis=1)[[f"{m}_{s}" for m in metrics for s in ("mean", "sd")]]
    out["folds"] = records.groupby(keys, sort=False).size()
    return out.reset_index()
