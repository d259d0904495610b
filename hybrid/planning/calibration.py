"""Are the planner's numbers true?  Hide ratings, re-solve, and compare.

For items with many ratings (60 or more), the probe: train without any of
their ratings (so nothing the planner estimates from data has seen them),
solve each probe item with all its ratings (its "full-data" list), then with
only ``n`` of them for each ``n``, and compare the planner's predicted
stability at ``n`` with the actual overlap of the ``n``-rating list and the
full-data list.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from hybrid.common.limits import check_checks
from hybrid.core.blocks import design, row_grams, solve_rows
from hybrid.core.neighbours import nearest
from hybrid.core.posterior import (
    draw_factor,
    overlap_of_lists,
    posterior_covariance,
    scaled,
    stability,
    vector_part,
)
from hybrid.estimator.model import HybridFactorModel
from hybrid.planning.assess import Assessor

NS = (0, 2, 5, 10, 20, 40)


def _probe_rows(model, table, keep):
    """CSR pieces (indptr, user codes, ratings - mu) of each probe item's kept ratings."""
    users = model.user_ids_
    pos = np.minimum(np.searchsorted(users, table["user"].to_numpy(str)), len(users) - 1)
    known = users[pos] == table["user"].to_numpy(str)
    # a rater the trained model never saw has the prior block (zeros): no information
    keep = keep & known
    codes = table["item_code"].to_numpy()[keep]
    order = np.argsort(codes, kind="stable")
    counts = np.bincount(codes, minlength=int(table["item_code"].max()) + 1)
    indptr = np.concatenate([[0], np.cumsum(counts)])
    return indptr, pos[keep][order], (table["rating"].to_numpy(float)[keep] - model.mu_)[order]


def _solve_probes(model, A_probe, indptr, idx, vals):
    F = model.factors_
    ub, ut = F.split(F.user)
    Fe = design(ut, ub)
    offset = np.zeros(len(ut)) if ub is None else ub
    counts = np.diff(indptr)
    weight = model.weight_for_counts(counts)
    P = model.new_rating_precision_
    z, _, _ = solve_rows(indptr, idx, vals, Fe, offset, P, model.launch_blocks(A_probe), weight)
    grams = row_grams(indptr, idx, vals, Fe, offset)[0]
    # no rater saw these ratings: they count with the variance of a new rating
    cov = posterior_covariance(grams, scaled(P, weight), model.sigma2_new_)
    return z, cov


def calibrate(ratings: pd.DataFrame, attributes: pd.DataFrame, params: dict, *, ns=NS,
              min_ratings: int = 60, n_probe: int = 120, k: int = 10, draws: int = 64,
              seed: int = 0, on_step=None) -> pd.DataFrame:
    """Predicted against actual stability at each ``n``; one row per ``n``.

    Columns: ``n``, ``items``, ``predicted``, ``actual``, ``actual_se``
    (standard error of the mean actual overlap) and ``gap`` = ``|predicted - actual|``.
    ``on_step(done, total, what)``, if given, hears of each step (the fit, then each ``n``).
    """
    step = on_step or (lambda *a: None)
    check_checks(n_probe=n_probe, seed=seed, min_ratings=min_ratings)
    rng = np.random.default_rng(seed)
    counts = ratings["item"].value_counts()
    eligible = np.sort(counts.index[counts >= max(min_ratings, max(ns))].to_numpy(str))
    probes = np.sort(rng.choice(eligible, min(n_probe, len(eligible)), replace=False))
    inside = ratings["item"].isin(probes).to_numpy()
    step(0, len(ns) + 1, "fitting without the probed items")
    model = HybridFactorModel(**params).fit(ratings[~inside], attributes)
    assessor = Assessor(model, k=k, draws=draws, seed=seed)
    pool = model.item_blocks_[assessor.pool][:, 1 if model.biases else 0:]
    code = pd.Index(probes).get_indexer(ratings["item"][inside])
    table = ratings[inside].assign(item_code=code).reset_index(drop=True)
    table["draw"] = rng.random(len(table))
    table["order"] = table.groupby("item_code")["draw"].rank(method="first") - 1
    A_probe = model.features_.transform(attributes.loc[probes])
    off = 1 if model.biases else 0
    z_full, cov_full = _solve_probes(model, A_probe, *_probe_rows(model, table, np.ones(len(table), bool)))
    full_lists = nearest(z_full[:, off:], pool, k)[0]
    rows = []
    for j, n in enumerate(ns):
        step(j + 1, len(ns) + 1, f"probes with {n} ratings")
        z, cov = _solve_probes(model, A_probe, *_probe_rows(model, table, table["order"].to_numpy() < n))
        # the yardstick is the full-data list, not the truth: given n ratings, the
        # full-data vector is spread around the n-rating one by Sigma_n - Sigma_full
        predicted, _ = stability(z[:, off:], draw_factor(vector_part(model, cov - cov_full)), pool, k, assessor.eps)
        actual = overlap_of_lists(nearest(z[:, off:], pool, k)[0], full_lists)
        rows.append({"n": n, "items": len(probes), "predicted": float(predicted.mean()),
                     "actual": float(actual.mean()),
                     "actual_se": float(actual.std(ddof=1) / np.sqrt(len(actual))),
                     "gap": float(abs(predicted.mean() - actual.mean()))})
    step(len(ns) + 1, len(ns) + 1, "done")
    return pd.DataFrame(rows)


LOOP_NS = (2, 5, 10, 20, 40)


def calibrate_updates(ratings: pd.DataFrame, attributes: pd.DataFrame, params: dict, *, ns=LOOP_NS,
                      min_ratings: int = 60, n_probe: int = 120, k: int = 10, draws: int = 64, seed: int = 0,
                      on_step=None) -> pd.DataFrame:
    """The planner's :func:`~hybrid.planning.kept.expected_kept` against what ``update`` does.

    The loop a user runs, for each ``n``: fit with each probe item's first ``n`` ratings
    inside the training data (the rest of its ratings held back), take the planner's
    prediction of the share of each probe's top-``k`` list that stands after its remaining
    ratings (:func:`~hybrid.planning.kept.expected_kept`, from the responders it assumes), fold
    those ratings in with ``fold_in`` (what ``hybrid update`` runs), and compare the lists
    before and after on the planner's own candidate pool.  One row per ``n``:
    ``n``, ``items``, ``more`` (median ratings folded in), ``predicted``, ``seen``, ``seen_se``
    and ``gap``.
    """
    from hybrid.planning.kept import current_lists, expected_kept

    step = on_step or (lambda *a: None)
    check_checks(n_probe=n_probe, seed=seed, min_ratings=min_ratings)
    rng = np.random.default_rng(seed)
    counts = ratings["item"].value_counts()
    eligible = np.sort(counts.index[counts >= max(min_ratings, 2 * max(ns))].to_numpy(str))
    probes = np.sort(rng.choice(eligible, min(n_probe, len(eligible)), replace=False))
    inside = ratings["item"].isin(probes).to_numpy()
    order = np.full(len(ratings), -1.0)
    draw = pd.Series(rng.random(int(inside.sum())))
    order[inside] = draw.groupby(ratings["item"].to_numpy()[inside]).rank(method="first").to_numpy() - 1
    rows = []
    for j, n in enumerate(ns):
        step(j, len(ns), f"probes with {n} ratings")
        early = ~inside | (order < n)
        model = HybridFactorModel(**params).fit(ratings[early], attributes)
        later = ratings[~early]
        where = pd.Index(model.item_ids_).get_indexer(probes)
        more = np.bincount(pd.Index(probes).get_indexer(later["item"]), minlength=len(probes))
        predicted = expected_kept(model, probes, more, k, draws=draws, seed=seed)
        assessor = Assessor(model, k=k, draws=2, seed=seed)
        before = current_lists(model, where, assessor.pool, k)
        after = current_lists(model.fold_in(later.copy()), where, assessor.pool, k)
        seen = overlap_of_lists(before, after)
        rows.append({"n": n, "items": len(probes), "more": int(np.median(more)),
                     "predicted": float(predicted.mean()), "seen": float(seen.mean()),
                     "seen_se": float(seen.std(ddof=1) / np.sqrt(len(seen))),
                     "gap": float(abs(predicted.mean() - seen.mean()))})
    step(len(ns), len(ns), "done")
    return pd.DataFrame(rows)

