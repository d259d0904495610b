"""Accuracy and ranking metrics, vectorised over groups (items or users).

NDCG follows Jarvelin and Kekalainen (2002) with the rating as the gain and
``1 / log2(rank + 1)`` as the discount, the same definition as
``sklearn.metrics.ndcg_score``; tied predictions share their gains the way
scikit-learn averages ties, so a constant predictor scores the expected
NDCG of a random order.
"""
from __future__ import annotations

import numpy as np


def rmse(y, p) -> float:
    """Root mean squared error."""
    y, p = np.asarray(y, float), np.asarray(p, float)
    return float(np.sqrt(np.mean((y - p) ** 2)))


def mae(y, p) -> float:
    """Mean absolute error."""
    return float(np.mean(np.abs(np.asarray(y, float) - np.asarray(p, float))))


def _dcg(groups, gains, scores, k, starts):
    """Tie-averaged DCG@k per group; rows sorted by (group, -score)."""
    n = len(gains)
    pos = np.arange(n) - starts[groups]
    disc = np.where(pos < k, 1.0 / np.log2(pos + 2.0), 0.0)
    # blocks of equal (group, score): each member gets the block's mean gain
    new_block = np.ones(n, bool)
    new_block[1:] = (groups[1:] != groups[:-1]) | (scores[1:] != scores[:-1])
    bstart = np.flatnonzero(new_block)
    mean_gain = np.add.reduceat(gains, bstart) / np.diff(np.append(bstart, n))
    block_disc = np.add.reduceat(disc, bstart)
    return np.bincount(groups[bstart], weights=mean_gain * block_disc, minlength=len(starts))


def ndcg_by_group(groups, relevance, predicted, k=10, min_size=2):
    """NDCG@k of each group's rows ordered by ``predicted``; returns (group ids, values).

    Groups with fewer than ``min_size`` rows are left out (their NDCG is 1 by
    construction).  Relevance must be non-negative.

    Examples
    --------
    >>> g = np.array([0, 0, 0, 1, 1])
    >>> ids, v = ndcg_by_group(g, np.array([3.0, 1.0, 2.0, 1.0, 5.0]), np.array([0.9, 0.1, 0.5, 0.2, 0.8]))
    >>> ids.tolist(), np.round(v, 6).tolist()
    ([0, 1], [1.0, 1.0])
    """
    groups = np.asarray(groups)
    codes, groups = np.unique(groups, return_inverse=True)
    rel = np.asarray(relevance, float)
    pred = np.asarray(predicted, float)
    sizes = np.bincount(groups)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    order = np.lexsort((-pred, groups))
    dcg = _dcg(groups[order], rel[order], pred[order], k, starts)
    ideal_order = np.lexsort((-rel, groups))
    idcg = _dcg(groups[ideal_order], rel[ideal_order], rel[ideal_order], k, starts)
    keep = (sizes >= min_size) & (idcg > 0)
    return codes[keep], dcg[keep] / idcg[keep]
