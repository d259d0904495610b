"""Why and how sure: an item's expected rating taken apart by attribute, and its interval.

The *mean user's rating* of an item is the rating predicted for a user whose block is the
mean of every user's, ``mu + mean(b_u) + g . z_i`` with ``g = [1, mean(theta_u)]``: the mean
of the users' expected ratings before each is held to the rating scale.  For an item with no
ratings the block is its prior mean ``W^T a_i`` plus the launch offset on the bias, so the
rating is linear in the attribute row ``a_i`` and splits exactly into one effect per feature,
``a_if (W_f . g)``; the intercept, the launch offset and the users' mean make the *baseline*
(the expected rating of an item that has none of the features).  A rated item adds how far
its ratings moved it from that projection, ``g . (z_i - prior mean)``.

Its interval: for an item scored from its attributes, the spread of a new item's average rating
around its launch score measured out of sample at the fit (``launch_spread_``: each rated item
projected by the map fitted without it, :mod:`hybrid.core.launch`); for a rated item, its block's
Gaussian posterior given its ratings (Bishop 2006, 3.3), ``g^T Sigma g``.  The average of ``n``
ratings still to come adds ``sigma2_new_ / n`` (the noise of a rating its raters were not
fitted to).  A model file without ``launch_spread_`` falls back on the prior covariance.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.stats import norm

from hybrid.common.errors import InputError
from hybrid.common.limits import check_score
from hybrid.core.posterior import covariances, item_grams


@dataclass(frozen=True)
class Reasons:
    """Each item's mean user's rating, split: ``baseline + effects.sum(1) + moved``.

    ``effects`` is sparse (items x features; the intercept's column is in ``baseline``),
    ``moved`` what the ratings added (0 for an item scored from its attributes), ``names``
    the features' readable names (``"process = honey"``, ``"notes: raspberry"``, ``"price"``).
    """

    baseline: np.ndarray
    effects: sp.csr_matrix
    moved: np.ndarray
    names: list

    @property
    def rating(self) -> np.ndarray:
        return self.baseline + np.asarray(self.effects.sum(axis=1)).ravel() + self.moved

    def top(self, row: int, n: int | None = None) -> list[tuple[str, float]]:
        """``(name, effect)`` of one item's features, largest effect (either sign) first."""
        lo, hi = self.effects.indptr[row], self.effects.indptr[row + 1]
        cols, vals = self.effects.indices[lo:hi], self.effects.data[lo:hi]
        keep = vals != 0
        cols, vals = cols[keep], vals[keep]
        order = np.lexsort((cols, -np.abs(vals)))[:n]
        return [(self.names[c], float(vals[j])) for j, c in zip(order, cols[order])]


def readable_names(encoder) -> list[str]:
    """One name per feature of a fitted :class:`~hybrid.estimator.features.AttributeEncoder`."""
    names = ["(intercept)"]
    for block in encoder.blocks_:
        col, kind = block["column"], block["type"]
        if kind == "category":
            names += [f"{col} = {c}" for c in block["categories"]]
        elif kind in ("tags", "text"):
            names += [f"{col}: {t}" for t in block["tags" if kind == "tags" else "vocabulary"]]
        else:
            names.append(col)
    return names


def mean_user(model, users=None):
    """``(base, g)``: the users' mean bias plus ``mu_``, and ``g`` with ``g . z`` the rest of
    their mean prediction for block ``z`` (over ``users``' positions, else every user)."""
    F = model.check_fitted()
    ub, ut = F.split(F.user if users is None else F.user[users])
    base = model.mu_ + (float(ub.mean()) if ub is not None else 0.0)
    g = ut.mean(axis=0)
    return base, (np.concatenate([[1.0], g]) if ub is not None else g)


def item_positions(model, items, attributes=None):
    """For ``items``: their positions in the model (-1 if unknown), whether each is rated, and
    whether each is scored from a row of ``attributes`` (an unrated item that has one)."""
    items = np.asarray(items, dtype=str)
    pos = pd.Index(model.item_ids_).get_indexer(items)
    rated = (pos >= 0) & (model.item_counts_[np.maximum(pos, 0)] > 0)
    has_row = np.zeros(len(items), bool) if attributes is None else np.isin(items, attributes.index.astype(str))
    if ((pos < 0) & ~has_row).any():
        raise InputError(f"item '{items[(pos < 0) & ~has_row][0]}' is not in the model and has no attribute row")
    return pos, rated, has_row & ~rated


def item_rows(model, items, attributes=None, clip_numbers=True):
    """For ``items``: their attribute rows (a file row for an unrated item that has one, else the
    model's), their positions in the model (-1 if unknown) and whether each is rated."""
    items = np.asarray(items, dtype=str)
    pos, rated, from_row = item_positions(model, items, attributes)
    A = model.attributes_[np.maximum(pos, 0)]
    if from_row.any():   # the file's rows in place of the model's, by one sparse product
        fresh = model.features_.transform(attributes.loc[items[from_row]], clip_numbers=clip_numbers)
        place = sp.csr_matrix((np.ones(fresh.shape[0]), (np.flatnonzero(from_row), np.arange(fresh.shape[0]))),
                              shape=(len(items), fresh.shape[0]))
        A = sp.diags((~from_row).astype(float)) @ A + place @ fresh
    return sp.csr_matrix(A), pos, rated


def reasons(model, items, attributes=None, *, clip_numbers=True) -> Reasons:
    """Each item's mean user's rating split by feature (see the module doc).

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=3, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    >>> why = reasons(m, club.new_lots.index, club.new_lots)
    >>> z = m.blocks_for_items(club.new_lots.index, club.new_lots, clip_numbers=True)
    >>> base, g = mean_user(m)
    >>> bool(np.allclose(why.rating, base + z @ g, atol=1e-9))   # exact: the effects add up
    True
    """
    base, g = mean_user(model)
    A, pos, rated = item_rows(model, items, attributes, clip_numbers)
    w = np.asarray(model.map_ @ g)
    effects = sp.csr_matrix(A.multiply(w[None, :]))
    shift = np.zeros(len(pos))
    if model.biases:   # the launch offset: items new at the fit, added since, or not in the model
        launched = np.where(pos >= 0, model.launched_[np.maximum(pos, 0)], True)
        shift = model.launch_offset_ * launched
    baseline = base + np.asarray(effects[:, 0].todense()).ravel() + shift
    effects[:, 0] = 0
    effects.eliminate_zeros()
    moved = np.zeros(len(pos))
    if rated.any():
        r = np.flatnonzero(rated)
        prior_mean = np.asarray(A[r] @ model.map_)
        if model.biases:
            prior_mean[:, 0] += shift[r]
        moved[r] = (model.item_blocks_[pos[r]] - prior_mean) @ g
    return Reasons(baseline, effects, moved, readable_names(model.features_))


def block_covariances(model, pos, rated):
    """The block covariance (n, d, d) of the items at ``pos`` (:func:`item_positions`): the
    learned prior's spread for an item scored from its attributes, the Gaussian posterior given
    its ratings for a rated one."""
    Psi = model.prior_covariance_
    cov = np.broadcast_to(Psi, (len(pos),) + Psi.shape).copy()
    if rated.any():
        r = pos[rated]
        cov[rated] = covariances(model, item_grams(model, r), model.prior_weight_[r])
    return cov


def intervals(model, items, attributes=None, *, level=0.8, raters=None, clip_numbers=True,
              blocks=None) -> pd.DataFrame:
    """The central ``level`` interval of each item's rating: of the mean user's rating, or, with
    ``raters`` (one array of user ids per item), of the average of those users' ratings of it,
    widened by the noise of that many ratings.  ``blocks``: the items' blocks, if the caller
    has them already (:meth:`~hybrid.estimator.predictions.Scores.blocks_for_items`).

    Returns a DataFrame with ``centre``, ``sd``, ``low`` and ``high`` (the ends held to the
    training ratings' range), indexed by item.

    Examples
    --------
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=200, n_lots=40, n_new=3, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    >>> iv = intervals(m, club.new_lots.index, club.new_lots, level=0.8)
    >>> bool(((iv["low"] < iv["centre"]) & (iv["centre"] < iv["high"])).all())
    True
    """
    check_score(interval=level)   # the one rule of an interval's level ([score] interval)
    items = np.asarray(items, dtype=str)
    z = model.blocks_for_items(items, attributes, clip_numbers=clip_numbers) if blocks is None else blocks
    pos, rated, _ = item_positions(model, items, attributes)
    cov = block_covariances(model, pos, rated)
    spread = model.launch_spread_
    if raters is None:   # the mean user: one g for every item
        base, g = mean_user(model)
        centre = base + z @ g
        var = np.einsum("i,nij,j->n", g, cov, g)
        if np.isfinite(spread):
            var[~rated] = spread
    else:
        if len(raters) != len(items):
            raise InputError(f"raters must hold one list per item, found {len(raters)} for {len(items)} items")
        centre, var = np.empty(len(items)), np.empty(len(items))
        for n, users in enumerate(raters):
            at = np.searchsorted(model.user_ids_, np.asarray(users, dtype=str))
            base, g = mean_user(model, at)
            centre[n] = base + z[n] @ g
            var[n] = g @ cov[n] @ g if rated[n] or not np.isfinite(spread) else spread
            var[n] += model.sigma2_new_ / max(len(at), 1)
    sd = np.sqrt(np.maximum(var, 0.0))
    half = norm.ppf(0.5 + level / 2) * sd
    low, high = model.rating_range_
    return pd.DataFrame({"centre": centre, "sd": sd, "low": np.clip(centre - half, low, high),
                         "high": np.clip(centre + half, low, high)}, index=pd.Index(items, name="item"))
