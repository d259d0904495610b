"""Do the scores' intervals hold?  Coverage of new items' intervals on cold-start folds.

Whole items are held out of the fit (:func:`hybrid.evaluation.evaluate.cold_folds`); each
held-out item with at least ``min_held`` held-out ratings by users the model knows gets the
interval of the average of those users' ratings (:func:`hybrid.estimator.explain.intervals`
with ``raters``: the prior's spread around the item's projection, plus the noise of that many
ratings), and the share of items whose actual average falls inside is the coverage.  A nominal
80% interval should cover about 80% of them.
"""
from __future__ import annotations

import pandas as pd

from hybrid.common.limits import check_checks
from hybrid.common.seeds import sub_seed
from hybrid.estimator.explain import intervals
from hybrid.estimator.model import HybridFactorModel
from hybrid.evaluation.evaluate import cold_folds

LEVELS = (0.5, 0.8, 0.95)


def interval_coverage(ratings: pd.DataFrame, attributes: pd.DataFrame, params: dict, *, folds: int = 5,
                      seed: int = 0, min_held: int = 20, levels=LEVELS) -> pd.DataFrame:
    """One row per fold and level: ``fold``, ``level``, ``items``, ``covered`` (a share).

    ``params`` are the model's settings (``holdout`` is set to 0: every training rating fits).
    """
    check_checks(folds=folds, seed=seed, min_ratings=min_held)
    rows = []
    for f, test in enumerate(cold_folds(ratings, folds, sub_seed(seed, "coverage folds"), min_held)):
        model = HybridFactorModel(**{**params, "holdout": 0.0}).fit(ratings[~test], attributes)
        held = ratings[test]
        held = held[held["user"].astype(str).isin(model.user_ids_)]
        by_item = held.groupby("item")
        counts = by_item.size()
        items = counts.index[counts >= min_held].to_numpy(str)
        actual = by_item["rating"].mean().loc[items].to_numpy()
        raters = [by_item.get_group(i)["user"].to_numpy(str) for i in items]
        for level in levels:
            iv = intervals(model, items, attributes, level=float(level), raters=raters)
            inside = (iv["low"].to_numpy() <= actual) & (actual <= iv["high"].to_numpy())
            rows.append({"fold": f, "level": float(level), "items": len(items), "covered": float(inside.mean())})
    return pd.DataFrame(rows)
