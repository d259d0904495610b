"""The launch offset: how far a projection has fallen short on the ratings items then got.

The map is fitted to every rated item alike, so a projection is the block of
a typical item.  The ratings a new item will get are not spread like that:
items that end up with many ratings are, on real catalogues, the better-liked
ones (selection bias), so the typical item's bias understates what a new
item's future ratings average.  The trainer's objective keeps one prior for
every item; the gap is measured afterwards, out of sample, and carried as
one number on the bias of items that had no ratings when the model was fitted.

Measured on the model's own ratings: each rated item is projected by the map
fitted without it (exact leave-one-out of the ridge map, items and users held
at their fit), its ratings are predicted from that projection, and the offset
is the mean error over all those ratings.  Rating-weighted, as the error of a
new item is: each item counts by the ratings it got.
"""
from __future__ import annotations

import numpy as np

from hybrid.core.mapsolve import column_parts, map_solver


def loo_projections(A_rated, Z_rated, weight, lam_map, P):
    """Each rated item's projection by the map fitted without it.

    The map is a ridge regression of the blocks ``Z`` on the attributes,
    column by column in the eigenbasis ``Q`` of the prior precision ``P``;
    a ridge residual left out of its own fit is the in-sample residual
    divided by one minus the row's leverage (the PRESS identity, Allen 1974),
    so no refit is needed.

    Parameters
    ----------
    A_rated : sparse (n, p)
        Attribute rows of the rated items.
    Z_rated : ndarray (n, d)
        Their fitted blocks.
    weight : ndarray (n,) or (n, d)
        Their prior weights (as the trainer's).
    lam_map : float
    P : ndarray (d, d)
        The prior precision.

    Returns
    -------
    ndarray (n, d)

    Examples
    --------
    >>> import scipy.sparse as sp
    >>> rng = np.random.default_rng(0)
    >>> A, Z = rng.normal(size=(30, 4)), rng.normal(size=(30, 2))
    >>> loo = loo_projections(sp.csr_matrix(A), Z, np.ones(30), 1.0, np.eye(2))
    >>> keep = np.arange(30) != 7        # refit without item 7
    >>> W = np.linalg.solve(A[keep].T @ A[keep] + np.eye(4), A[keep].T @ Z[keep])
    >>> bool(np.allclose(loo[7], A[7] @ W))
    True
    """
    solver = map_solver(A_rated, weight, lam_map)
    out = np.empty_like(Z_rated, dtype=float)
    rows = np.arange(Z_rated.shape[0])
    for cols, part in column_parts(solver, Z_rated.shape[1]):
        Pg = P[np.ix_(cols, cols)]
        Zg = Z_rated[:, cols]
        residual = Zg - np.asarray(A_rated @ part.solve(Zg, Pg))
        _, Q = np.linalg.eigh(Pg)
        H = part.leverages(rows, Pg)            # (n, d) per eigen-direction of Pg
        out[:, cols] = Zg - ((residual @ Q) / np.maximum(1.0 - H, 1e-9)) @ Q.T
    return out


# items with at least this many ratings estimate the spread: their averages are well determined,
# so the rating noise subtracted from each squared error is small beside it
SPREAD_MIN_RATINGS = 20


def launch_offset(data, F, A, weight, lam_map, noise=None):
    """The mean error, over every rating, of predictions from left-out projections; with
    ``noise`` (the variance of one rating), also the spread of an item's average error.

    ``data`` holds the fit's ratings (:class:`~hybrid.core.steps.RatingData` or the cluster's,
    whose workers do the sums); ``F`` the fitted :class:`~hybrid.core.train.Factors` (with
    biases); ``A`` the attribute matrix of every item; ``weight`` the items' prior weights.

    The spread is the variance of an item's average rating around its launch score beyond the
    noise of its ratings: over the items with at least :data:`SPREAD_MIN_RATINGS` ratings,
    the mean of ``e_i^2 - noise / n_i``, ``e_i`` the mean error of item ``i``'s ratings less the
    offset (method of moments; ``E e_i^2 = tau^2 + noise / n_i`` for independent errors).  Returns
    ``offset``, or ``(offset, spread)`` with ``noise`` (spread NaN with too few such items).
    """
    counts = data.item_counts()
    rated = np.flatnonzero(counts > 0)
    if not len(rated) or not F.biases:
        return 0.0 if noise is None else (0.0, float("nan"))
    Z = loo_projections(A[rated], F.item[rated], np.asarray(weight)[rated], lam_map, F.P)
    # sum over an item's ratings of r - mu - b_u - b_i - theta_u . x_i, for the
    # left-out block [b_i, x_i]: per item, the sum of its raters' blocks and of its
    # ratings (no per-rating table of vectors; on a cluster, summed where the blocks are)
    raters, own = data.rater_sums(F.user)
    raters, own = raters[rated], own[rated]
    miss = own - raters[:, 0] - counts[rated] * Z[:, 0] - np.einsum("ij,ij->i", raters[:, 1:], Z[:, 1:])
    offset = float(miss.sum() / counts.sum())
    if noise is None:
        return offset
    n = counts[rated]
    well = n >= SPREAD_MIN_RATINGS
    if well.sum() < 10:
        return offset, float("nan")
    e = miss[well] / n[well] - offset
    return offset, float(max(np.mean(e ** 2 - noise / n[well]), 0.0))
