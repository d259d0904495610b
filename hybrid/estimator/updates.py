"""Changing a fitted model in place: fold new ratings in, add new items or users.

Only what the new data touches is re-solved; everything else (other users,
other items, the map, the prior) stays as it was.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.sparse as sp

from hybrid.common.errors import InputError
from hybrid.core.steps import item_step, user_step
from hybrid.io.tables import validate_ratings


def fold_in(model, ratings: pd.DataFrame, attributes: pd.DataFrame | None = None):
    """Add new ratings and re-solve only the users and items they touch.

    Everything else (other users, other items, the map, the prior) stays
    fixed, so this is fast and leaves the rest of the model unchanged.
    New items need an attribute row; new users are added.

    Returns
    -------
    model
    """
    F = model.check_fitted()
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
    model.set_fitted(ratings_=(np.concatenate([old_u[keep], u]).astype(np.int32),
                               np.concatenate([old_i[keep], i]).astype(np.int32),
                               np.concatenate([old_r[keep], ratings["rating"].to_numpy(float)])))
    data = model.rating_data()
    touched_u, touched_i = np.unique(u), np.unique(i)
    if model.map_weighting != "none":
        weight = model.prior_weight_.copy()
        weight[touched_i] = model.weight_for_counts(data.item_counts())[touched_i]
        model.set_fitted(prior_weight_=weight)
    user_step(data, F, model.lam_user_, rows=touched_u)
    item_step(data, F, model.attributes_, model.prior_weight_, rows=touched_i,
              shift=model.prior_shift(touched_i))
    return model.set_fitted(factors_=F)   # the blocks changed in place: derived state follows


def fold_out(model, users):
    """Remove users from a fitted model: their ratings, their vectors and their ids.

    What a person's right to erasure asks of a model: nothing of theirs is left in it.  The
    items they rated are re-solved without their ratings (as :func:`fold_in` re-solves what it
    touches); every other block, the map and the prior stay as they were, so the result is a
    refit-free fold-out (a refit would also forget what their ratings taught the map and the
    penalties).

    Returns
    -------
    model

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=0, seed=3)
    >>> m = HybridFactorModel(rank=2, epochs=2, lam_user=5.0, lam_item=5.0, lam_map=5.0,
    ...                       schema=club.schema).fit(club.ratings, club.lots)
    >>> n = len(m.ratings_[2]); mine = int((club.ratings["user"] == m.user_ids_[0]).sum())
    >>> gone = m.user_ids_[0]
    >>> m = fold_out(m, [gone])
    >>> gone in m.user_ids_, len(m.ratings_[2]) == n - mine
    (False, True)
    """
    F = model.check_fitted()
    names = np.atleast_1d(np.asarray(users, dtype=str))
    pos = pd.Index(model.user_ids_).get_indexer(names)
    if (pos < 0).any():
        first = names[np.argmax(pos < 0)]
        raise InputError(f"user '{first}' is not in the model")
    u, i, r = model.ratings_
    gone = np.isin(u, pos)
    touched = np.unique(i[gone])
    stay = np.ones(len(model.user_ids_), bool)
    stay[pos] = False
    remap = np.cumsum(stay) - 1
    F.user = F.user[stay]
    model.set_fitted(factors_=F, user_ids_=model.user_ids_[stay],
                     ratings_=(remap[u[~gone]].astype(np.int32), i[~gone], r[~gone]))
    if touched.size:
        data = model.rating_data()
        if model.map_weighting != "none":
            weight = model.prior_weight_.copy()
            weight[touched] = model.weight_for_counts(data.item_counts())[touched]
            model.set_fitted(prior_weight_=weight)
        item_step(data, F, model.attributes_, model.prior_weight_, rows=touched, shift=model.prior_shift(touched))
    return model.set_fitted(factors_=F)


def import_counts(model, ratings: pd.DataFrame) -> dict:
    """How many of ``ratings`` (columns user, item, rating) are new to the model, change a
    rating it holds, or repeat one it holds with the same value.

    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=0, seed=3)
    >>> m = HybridFactorModel(rank=2, epochs=2, lam_user=5.0, lam_item=5.0, lam_map=5.0,
    ...                       schema=club.schema).fit(club.ratings, club.lots)
    >>> again = club.ratings.head(3).assign(rating=[club.ratings["rating"].iloc[0], 9.0, 9.0])
    >>> import_counts(m, again)
    {'added': 0, 'changed': 2, 'unchanged': 1}
    """
    present, same = held_already(model, ratings)
    return {"added": int((~present).sum()), "changed": int((present & ~same).sum()), "unchanged": int(same.sum())}


def held_already(model, ratings: pd.DataFrame):
    """Per row of ``ratings`` (user, item, rating): whether the model holds a rating of that pair,
    and whether it holds this very value (two boolean arrays)."""
    n_items = len(model.item_ids_)
    u = pd.Index(model.user_ids_).get_indexer(ratings["user"].astype(str))
    i = pd.Index(model.item_ids_).get_indexer(ratings["item"].astype(str))
    old_u, old_i, old_r = model.ratings_
    held = pd.Series(old_r, index=old_u.astype(np.int64) * n_items + old_i)
    keys = np.where((u >= 0) & (i >= 0), u.astype(np.int64) * n_items + i, -1)
    known = held.reindex(keys).to_numpy()
    present = ~np.isnan(known)
    return present, present & (known == ratings["rating"].to_numpy(float))


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
    F = model.check_fitted()
    attributes = attributes[~attributes.index.astype(str).isin(model.item_ids_)]
    if not len(attributes):
        return model
    new = attributes.index.to_numpy(dtype=str)
    A_new = model.features_.transform(attributes)
    F.item = np.vstack([F.item, model.launch_blocks(A_new)])   # new: at its prior mean
    table = model.item_table_
    if table is not None:
        extra = attributes.astype(str).reindex(columns=table.columns, fill_value="")
        table = pd.concat([table, extra.set_axis(pd.Index(new, name="item"), axis=0)])
    return model.set_fitted(
        factors_=F, attributes_=sp.vstack([model.attributes_, A_new], format="csr"),
        item_ids_=np.concatenate([model.item_ids_, new]), item_table_=table,
        prior_weight_=np.concatenate([model.prior_weight_, model.weight_for_counts(np.zeros(len(new)))]),
        launched_=np.concatenate([model.launched_, np.ones(len(new), bool)]))


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
    model.set_fitted(factors_=F, ratings_=(remap[u].astype(np.int32), i, r), user_ids_=ids[order])
