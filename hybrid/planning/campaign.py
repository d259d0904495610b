"""A sampling campaign: split a budget of ratings across items, and choose whom to ask.

Budget split.  Each item has a curve ``g_i(n)``, its stability after ``n``
more ratings, known at the planner's grid of ``n``.  Two aims:

* ``reach``: as many items (weighted by priority) as possible reach the
  target; an item costs the ratings it needs.  With equal weights, taking
  the cheapest items first is optimal; with weights it is a knapsack, solved
  greedily by weight per rating and checked against ``scipy.optimize.milp``.
* ``gain``: the largest total (weighted) gain in stability; greedy on the
  upper concave hull of each curve, which is optimal for concave curves and
  checked against the exact multiple-choice knapsack in the tests.

Whom to ask.  For each item, users who have not rated it are ranked by the
information gain of one more rating, ``0.5 log(1 + b^T Sigma b / sigma^2)``
(D-optimal design; Fedorov, Theory of Optimal Experiments, 1972), times a
user's chance of answering (:mod:`hybrid.planning.responses`); users are picked
until the expected answers reach the ratings planned, so a wave asks more people than
it plans ratings.  After each pick ``Sigma`` is updated by the Sherman-Morrison
formula, so the next pick values what the first did not already tell.
"""
from __future__ import annotations

import numpy as np
import pandas as pd


def allocate_reach(needed, weights, budget):
    """Ratings per item for the ``reach`` aim (needed <= 0 or NaN: nothing to buy)."""
    needed = np.asarray(needed, float)
    weights = np.asarray(weights, float)
    planned = np.zeros(len(needed), dtype=np.int64)
    ok = np.isfinite(needed) & (needed > 0)
    idx = np.flatnonzero(ok)
    order = idx[np.lexsort((needed[idx], -weights[idx] / needed[idx]))]
    left = budget
    for i in order:  # one pass over candidate items, not over ratings
        if needed[i] <= left:
            planned[i] = int(needed[i])
            left -= int(needed[i])
    # a single heavy item can beat the greedy set (the classic knapsack fix)
    single = idx[needed[idx] <= budget]
    if single.size:
        best = single[np.argmax(weights[single])]
        if weights[best] > weights[planned > 0].sum():
            planned[:] = 0
            planned[best] = int(needed[best])
    return planned


def _hull(grid, curve):
    """Vertices of the upper concave hull of one curve (indices into grid)."""
    keep = [0]
    for j in range(1, len(grid)):
        while len(keep) >= 2:
            a, b = keep[-2], keep[-1]
            # drop b if it lies on or below the chord from a to j
            if (curve[b] - curve[a]) * (grid[j] - grid[a]) <= (curve[j] - curve[a]) * (grid[b] - grid[a]):
                keep.pop()
            else:
                break
        keep.append(j)
    return keep


def allocate_gain(curves, grid, weights, budget, cap=None):
    """Ratings per item (at grid points) for the ``gain`` aim."""
    grid = np.asarray(grid)
    limit = len(grid) if cap is None else int(np.searchsorted(grid, cap, side="right"))
    segments = []
    for i, curve in enumerate(np.asarray(curves)[:, :limit]):
        hull = _hull(grid[:limit], curve)
        for a, b in zip(hull[:-1], hull[1:]):
            gain = weights[i] * (curve[b] - curve[a])
            if gain > 0:
                segments.append((gain / (grid[b] - grid[a]), i, int(grid[a]), int(grid[b])))
    planned = np.zeros(len(curves), dtype=np.int64)
    left = budget
    for _, i, a, b in sorted(segments, key=lambda s: (-s[0], s[1], s[2])):
        if planned[i] == a and b - a <= left:  # segments of one item are taken in order
            planned[i] = b
            left -= b - a
    return planned


def exact_allocation(curves, grid, weights, budget, aim="gain", needed=None):
    """The exact optimum by ``scipy.optimize.milp`` (for checking the greedy on small cases)."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    grid = np.asarray(grid, float)
    if aim == "reach":
        needed = np.asarray(needed, float)
        ok = np.isfinite(needed) & (needed > 0)
        cost, value = needed[ok], np.asarray(weights, float)[ok]
        res = milp(-value, constraints=LinearConstraint(cost[None, :], 0, budget),
                   integrality=np.ones(len(cost)), bounds=Bounds(0, 1))
        planned = np.zeros(len(needed), dtype=np.int64)
        planned[np.flatnonzero(ok)[res.x > 0.5]] = cost[res.x > 0.5].astype(int)
        return planned, float(-res.fun)
    m, G = np.asarray(curves).shape
    value = (np.asarray(weights)[:, None] * (curves - curves[:, :1])).ravel()
    cost = np.tile(grid, m)
    pick_one = np.kron(np.eye(m), np.ones(G))
    res = milp(-value, constraints=[LinearConstraint(cost[None, :], 0, budget),
                                    LinearConstraint(pick_one, 1, 1)],
               integrality=np.ones(m * G), bounds=Bounds(0, 1))
    choice = res.x.reshape(m, G).argmax(1)
    return grid[choice].astype(np.int64), float(-res.fun)


def choose_askees(B, cov, sigma2, wanted, eligible, weight, asks_left):
    """Pick users for one item by propensity-weighted information gain, until the expected
    answers (the sum of the picks' propensities) reach ``wanted`` ratings.

    Parameters
    ----------
    B : ndarray (U, d)
        Every user's design row ``[1, theta_u]``.
    cov : ndarray (d, d)
        The item's posterior covariance; updated by Sherman-Morrison after each pick.
    eligible : bool ndarray (U,)
        Users who may be asked for this item (have not rated it).
    wanted : float
        Ratings wanted for the item (expected answers, not asks).
    weight : ndarray (U,)
        Each user's chance of answering (:mod:`hybrid.planning.responses`).
    asks_left : int ndarray (U,)
        Remaining asks per user across the campaign; decremented in place.

    Returns
    -------
    users : list of int
    gains : list of float (the information gain of each pick)
    cov : ndarray (d, d), the covariance expected after all picks (each adds its rating's
        precision times its chance of coming)

    Examples
    --------
    >>> B = np.array([[1.0, 2.0], [1.0, 0.1], [1.0, -2.0]])
    >>> left = np.array([1, 1, 1])
    >>> users, _, _ = choose_askees(B, np.eye(2), 1.0, 2, np.ones(3, bool), np.ones(3), left)
    >>> users, left.tolist()        # the two far-apart users: the second adds the most after the first
    ([0, 2], [0, 1, 0])
    >>> half = np.full(3, 0.5)      # each answers half the time: one rating takes two asks
    >>> choose_askees(B, np.eye(2), 1.0, 1, np.ones(3, bool), half, np.ones(3, int))[0]
    [0, 2]
    """
    cov = cov.copy()
    quad = np.einsum("ud,de,ue->u", B, cov, B)
    picks, gains = [], []
    expected = 0.0
    while expected < wanted - 1e-9:
        score = np.where(eligible & (asks_left > 0) & (weight > 0), 0.5 * np.log1p(quad / sigma2) * weight, -np.inf)
        u = int(np.argmax(score))
        if not np.isfinite(score[u]):
            break
        picks.append(u)
        gains.append(float(0.5 * np.log1p(quad[u] / sigma2)))
        asks_left[u] -= 1
        eligible[u] = False
        expected += float(weight[u])
        # Sherman-Morrison on the precision update, the rating counted by its chance of coming
        s = cov @ B[u]
        denom = sigma2 + float(weight[u]) * float(B[u] @ s)
        cov -= float(weight[u]) * np.outer(s, s) / denom
        quad -= float(weight[u]) * (B @ s) ** 2 / denom
    return picks, gains, cov


ASK_COLUMNS = ["item", "user", "order", "information", "expected_rating", "answer_chance"]


def asks_table(rows) -> pd.DataFrame:
    return pd.DataFrame(rows, columns=ASK_COLUMNS)
