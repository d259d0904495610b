"""Seeded random search of the hybrid's settings on the cold-start protocol.

Three disjoint sets of items: test items (kept for the final check only),
validation items (every trial is scored on them, from attributes alone) and
the training items the trials are fitted on.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hybrid.common.limits import check_checks
from hybrid.common.seeds import sub_seed
from hybrid.estimator.model import HybridFactorModel
from hybrid.evaluation.evaluate import cold_folds
from hybrid.evaluation.metrics import rmse


def draw_settings(rng, max_rank=32):
    """One trial's settings: rank, and log-uniform regularisation."""
    return {"rank": int(rng.choice([r for r in (2, 4, 6, 8, 10, 12, 16, 20, 24, 32) if r <= max_rank])),
            "lam_user": float(np.exp(rng.uniform(np.log(0.5), np.log(50.0)))),
            "lam_item": float(np.exp(rng.uniform(np.log(0.5), np.log(50.0)))),
            "lam_map": "auto" if rng.random() < 0.5 else float(np.exp(rng.uniform(np.log(0.1), np.log(100.0))))}


def tune(ratings: pd.DataFrame, attributes: pd.DataFrame, params: dict, trials: int = 30, seed: int = 0,
         min_ratings: int = 5, on_trial=None, max_rank: int = 32):
    """Try ``trials`` settings; return (table of trials, best settings, test RMSE of the best).

    ``params`` are the fixed keyword arguments of the model (schema, epochs...);
    each trial overrides rank and the three regularisation weights.
    """
    check_checks(trials=trials, seed=seed, min_ratings=min_ratings)
    rng = np.random.default_rng(seed)
    test = cold_folds(ratings, 5, seed, min_ratings)[0]
    rest = ratings[~test]
    valid_in_rest = cold_folds(rest, 5, sub_seed(seed, "tune validation"), min_ratings)[0]
    train, valid = rest[~valid_in_rest], rest[valid_in_rest]
    rows = []
    for t in range(trials):
        settings = draw_settings(rng, max_rank)
        model = HybridFactorModel(**{**params, **settings, "holdout": 0.0}).fit(train, attributes)
        score = rmse(valid["rating"], model.predict(valid["user"], valid["item"]))
        rows.append({"trial": t + 1, **settings, "valid_rmse": score})
        if on_trial:
            on_trial(rows[-1])
    table = pd.DataFrame(rows)
    best = table.loc[table["valid_rmse"].idxmin()]
    settings = {k: best[k] for k in ("rank", "lam_user", "lam_item", "lam_map")}
    settings["rank"] = int(settings["rank"])
    final = HybridFactorModel(**{**params, **settings, "holdout": 0.0}).fit(rest, attributes)
    test_rows = ratings[test]
    return table, settings, rmse(test_rows["rating"], final.predict(test_rows["user"], test_rows["item"]))
