"""Changing a fitted model in place: fold new ratings in, add new items or users.

Only what the new data touches is re-solved; everything else (other users,
other items, the map, the prior) stays as it was.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp

from .data import validate_ratings
from .errors import InputError
from .train import item_step, user_step


def fold_in(model, ratings: pd.DataFrame, attributes: pd.DataFrame | None = None):
    """Add new ratings and re-solve only the users and items they touch.

    Everything else (other users, other items, the map, the prior) stays
    fixed, so this is fast and leaves the rest of the model unchanged.
    New items need an attribute row; new users are added.

    Returns
    -------
    model
    """
    F = model._fitted()
    ratings = validate_ratings(ratings, {"user": "user", "item": "item", "rating": "rating"},
                               scale=(-np.inf, np.inf), duplicates="last", source="new ratings")
    counts = import_counts(model, ratings)
    if not counts["added"] and not counts["changed"]:
        # the same answers imported twice (a re-run of last week's import, say): refuse, so
        # that nobody believes the model learned something, and nothing is written
        raise InputError(f"all {counts['unchanged']} ratings are already in the model with the same "
                         "values (imported before?); nothing changed")
    _add_items(model, ratings, attributes)
    _add_users(model, ratings)
    u = np.searchsorted(model.user_ids_, ratings["user"].to_numpy(dtype=str))
    i = pd.Index(model.item_ids_).get_indexer(ratings["item"])
    old_u, old_i, old_r = model.ratings_
    keys_old = old_u.astype(np.int64) * len(model.item_ids_) + old_i
    keep = ~np.isin(keys_old, u.astype(np.int64) * len(model.item_ids_) + i)
    model.ratings_ = (np.concatenate([old_u[keep], u]).astype(np.int32),
                      np.concatenate([old_i[keep], i]).astype(np.int32),
                      np.concatenate([old_r[keep], ratings["rating"].to_numpy(float)]))
    data = model._data()
    touched_u, touched_i = np.unique(u), np.unique(i)
    if model.map_weighting != "none":
        model.prior_weight_[touched_i] = model._prior_weight(data)[touched_i]
    user_step(data, F, model.lam_user_, rows=touched_u)
    item_step(data, F, model.attributes_, model.prior_weight_, rows=touched_i,
              shift=model._prior_shift(touched_i))
    model.item_counts_ = np.bincount(model.ratings_[1], minlength=len(model.item_ids_))
    model.user_counts_ = np.bincount(model.ratings_[0], minlength=len(model.user_ids_))
    return model


def import_counts(model, ratings: pd.DataFrame) -> dict:
    """How many of ``ratings`` (columns user, item, rating) are new to the model, change a
    rating it holds, or repeat one it holds with the same value.

    >>> from hybrid import HybridFactorModel
    >>> from hybrid.samples import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=0, seed=3)
    >>> m = HybridFactorModel(rank=2, epochs=2, lam_user=5.0, lam_item=5.0, lam_map=5.0,
    ...                       schema=club.schema).fit(club.ratings, club.lots)
    >>> again = club.ratings.head(3).assign(rating=[club.ratings["rating"].iloc[0], 9.0, 9.0])
    >>> import_counts(m, again)
    {'added': 0, 'changed': 2, 'unchanged': 1}
    """
    n_items = len(model.item_ids_)
    u = pd.Index(model.user_ids_).get_indexer(ratings["user"].astype(str))
    i = pd.Index(model.item_ids_).get_indexer(ratings["item"].astype(str))
    old_u, old_i, old_r = model.ratings_
    held = pd.Series(old_r, index=old_u.astype(np.int64) * n_items + old_i)
    keys = np.where((u >= 0) & (i >= 0), u.astype(np.int64) * n_items + i, -1)
    known = held.reindex(keys).to_numpy()
    present = ~np.isnan(known)
    same = present & (known == ratings["rating"].to_numpy(float))
    return {"added": int((~present).sum()), "changed": int((present & ~same).sum()), "unchanged": int(same.sum())}


def _add_items(model, ratings, attributes):
    new = np.setdiff1d(ratings["item"].unique().astype(str), model.item_ids_)
    if not new.size:
        return
    if attributes is None or not np.isin(new, attributes.index.astype(str)).all():
        raise InputError(f"item '{new[0]}' is not in the model; give its attribute row to fold it in")
    add_items(model, attributes.loc[new])


def add_items(model, attributes: pd.DataFrame):
    """Add items with no ratings (their blocks are their projections); known ids are skipped.

    Returns
    -------
    model
    """
    F = model._fitted()
    attributes = attributes[~attributes.index.astype(str).isin(model.item_ids_)]
    if not len(attributes):
        return model
    new = attributes.index.to_numpy(dtype=str)
    A_new = model.features_.transform(attributes)
    F.item = np.vstack([F.item, model._launch_blocks(A_new)])   # new: at its prior mean
    model.attributes_ = sp.vstack([model.attributes_, A_new], format="csr")
    model.item_ids_ = np.concatenate([model.item_ids_, new])
    model.prior_weight_ = np.concatenate([model.prior_weight_, model._weight_for_counts(np.zeros(len(new)))])
    model.item_counts_ = np.concatenate([model.item_counts_, np.zeros(len(new), dtype=model.item_counts_.dtype)])
    model.launched_ = np.concatenate([model.launched_, np.ones(len(new), bool)])
    if getattr(model, "item_table_", None) is not None:
        extra = attributes.astype(str).reindex(columns=model.item_table_.columns, fill_value="")
        model.item_table_ = pd.concat([model.item_table_, extra.set_axis(pd.Index(new, name="item"), axis=0)])
    return model


def _add_users(model, ratings):
    new = np.setdiff1d(ratings["user"].unique().astype(str), model.user_ids_)
    if not new.size:
        return
    F = model.factors_
    ids = np.concatenate([model.user_ids_, new])
    order = np.argsort(ids, kind="stable")
    F.user = np.vstack([F.user, np.zeros((len(new), F.user.shape[1]))])[order]
    remap = np.empty(len(ids), dtype=np.int64)
    remap[order] = np.arange(len(ids))
    u, i, r = model.ratings_
    model.ratings_ = (remap[u].astype(np.int32), i, r)
    model.user_ids_ = ids[order]
