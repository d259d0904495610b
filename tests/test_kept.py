"""The planner's model of an update against ``update`` itself, and ``expected_kept``.

The planner predicts how far an item's block moves when ratings are folded in
(:meth:`Assessor.movement`) and, from that, the share of its neighbour list that stands
(:func:`hybrid.planning.kept.expected_kept`).  Here both are checked the way a user meets
them: draw ratings as the model says they come (the block from its posterior, raters from the
responders assumed, noise of a new rating), fold them in with ``fold_in`` (what ``hybrid
update`` runs), and compare.  Invented data (the tasting club): an internal check.
"""
import copy

import numpy as np
import pandas as pd
import pytest

from hybrid import HybridFactorModel, expected_kept
from hybrid.datasets.club import tasting_club
from hybrid.planning.assess import Assessor, user_design
from hybrid.planning.responses import activity_share

K = 5


@pytest.fixture(scope="module")
def fitted():
    club = tasting_club(n_members=600, n_lots=80, n_new=0, seed=3)
    with pytest.warns(Warning):
        return HybridFactorModel(rank=4, epochs=10, schema=club.schema).fit(club.ratings, club.lots)


def _simulate(m, A, i, n, sims, rng):
    """Blocks moves and kept shares of item ``i`` over ``sims`` updates of ``n`` drawn ratings."""
    B, w = user_design(m), activity_share(m.user_counts_)
    F = m.factors_
    ub = F.split(F.user)[0]
    R = m.rating_data().by_item
    ok = np.ones(len(B), bool)
    ok[R.indices[R.indptr[i]:R.indptr[i + 1]]] = False
    p = w * ok / (w * ok).sum()
    moves, kept = [], []
    for _ in range(sims):
        # the block's spread as the planner takes it: the posterior widened by the fit's loop scale
        z_true = rng.multivariate_normal(m.item_blocks_[i], A.cov_now[i] * A.loop_scale[i])
        us = rng.choice(len(B), n, replace=False, p=p)
        y = m.mu_ + ub[us] + B[us] @ z_true + rng.normal(0, np.sqrt(m.sigma2_new_), n)
        after = copy.deepcopy(m).fold_in(pd.DataFrame({"user": m.user_ids_[us], "item": m.item_ids_[i], "rating": y}))
        moves.append(after.item_blocks_[i] - m.item_blocks_[i])
        kept.append(len(_top(m, A.pool, i) & _top(after, A.pool, i)) / K)
    return np.array(moves), np.mean(kept)


def _top(m, pool, i):
    V = m.item_blocks_[:, 1:]
    d = ((V[pool] - V[i]) ** 2).sum(1)
    d[pool == i] = np.inf
    return set(pool[np.argsort(d, kind="stable")[:K]])


def test_the_planner_models_what_update_does(fitted):
    m = fitted
    A = Assessor(m, K, 256, 0)
    rng = np.random.default_rng(1)
    items = np.flatnonzero(m.item_counts_ < 40)[:10]
    for n in (2, 10, 40):
        pred = A.kept(items, n)[0]
        seen, ratio = [], []
        for i in items:
            moves, share = _simulate(m, A, i, n, 24, rng)
            seen.append(share)
            ratio.append(np.trace(np.cov(moves.T, bias=True)) / np.trace(A.movement([i], n)[0]))
        # the block moves as predicted (variance within a third: 24 draws a cell) and the
        # lists keep the predicted share (mean over items; 240 updates, se about 0.015)
        print(f"\nn={n}: movement variance seen/predicted median {np.median(ratio):.2f}; "
              f"kept predicted {pred.mean():.3f}, seen {np.mean(seen):.3f}")
        assert 0.6 < np.median(ratio) < 1.35, (n, np.round(ratio, 2))
        assert abs(pred.mean() - np.mean(seen)) < 0.04, (n, pred.mean(), np.mean(seen))


def test_expected_kept_falls_with_more_ratings_toward_stability(fitted):
    m = fitted
    names = list(m.item_ids_[np.flatnonzero(m.item_counts_ < 40)[:8]])
    shares = np.array([expected_kept(m, names, n, k=K) for n in (0, 2, 10, 40, 2000)])
    assert np.allclose(shares[0], 1.0)                   # nothing folded in: the list stands
    assert (np.diff(shares.mean(1)) < 0).all()
    # toward the stability (the list once the vector were known), not all the way: update
    # re-solves each new rater first, and the raters take up part of every surprise
    now = Assessor(m, K, 64, 0).at(pd.Index(m.item_ids_).get_indexer(names), 0)[0]
    assert 0 <= shares[-1].mean() - now.mean() < 0.1
    assert isinstance(expected_kept(m, names[0], 3, k=K), float)


def test_expected_kept_refuses_bad_numbers(fitted):
    from hybrid import InputError
    with pytest.raises(InputError, match="more must be"):
        expected_kept(fitted, ["L0001", "L0002"], [1, 2, 3], k=K)
    with pytest.raises(InputError, match="more must be"):
        expected_kept(fitted, ["L0001"], -1, k=K)
    with pytest.raises(InputError, match="k must be"):
        expected_kept(fitted, ["L0001"], 1, k=0)
