"""Nearest items, checked against scikit-learn's brute-force neighbours."""
import numpy as np
import pandas as pd
import pytest
from sklearn.neighbors import NearestNeighbors

from hybrid.core.neighbours import nearest
from hybrid.estimator.batch import score_items


@pytest.mark.parametrize("metric", ["euclidean", "cosine"])
def test_related_equals_sklearn_brute_force(fitted, metric):
    # reference: sklearn.neighbors.NearestNeighbors(algorithm="brute")
    X = fitted.item_blocks_[:, 1:]
    rows = [0, 10, 50, 100, len(X) - 1]
    got = fitted.related(fitted.item_ids_[rows], k=6, metric=metric)
    dist, idx = NearestNeighbors(n_neighbors=7, algorithm="brute", metric=metric).fit(X).kneighbors(X[rows])
    for j, row in enumerate(rows):
        mine = got[got["item"] == fitted.item_ids_[row]]
        keep = idx[j] != row                       # sklearn lists the item itself first
        assert mine["neighbour"].tolist() == fitted.item_ids_[idx[j][keep][:6]].tolist()
        assert np.allclose(mine["distance"], dist[j][keep][:6], atol=1e-9)


def test_among_restricts_candidates(fitted):
    pool = fitted.item_ids_[20:40]
    got = fitted.related([fitted.item_ids_[0]], k=3, among=pool)
    assert set(got["neighbour"]) <= set(pool)


def test_blocked_computation_matches_direct(monkeypatch):
    import hybrid.core.neighbours as rel
    rng = np.random.default_rng(0)
    Q, C = rng.normal(size=(50, 4)), rng.normal(size=(300, 4))
    full = nearest(Q, C, 5)
    monkeypatch.setattr(rel, "_BUDGET", 700)   # two queries per block
    blocked = nearest(Q, C, 5)
    assert np.array_equal(full[0], blocked[0]) and np.allclose(full[1], blocked[1])
    direct = np.sqrt(((Q[:, None] - C[None]) ** 2).sum(-1))
    assert np.allclose(np.sort(direct, axis=1)[:, :5], full[1])


def test_scoring_is_independent_of_chunk_size(fitted, club):
    a = pd.concat(score_items(fitted, club.new_lots, chunk=5, audience=4, neighbours=3, audience_by="rating"))
    b = pd.concat(score_items(fitted, club.new_lots, chunk=1000, audience=4, neighbours=3, audience_by="rating"))
    assert a.reset_index(drop=True).equals(b.reset_index(drop=True))
    S = fitted.score_matrix(club.new_lots.index, attributes=club.new_lots)
    best = np.argmax(S[0])
    assert a["audience"].iloc[0][0][0] == fitted.user_ids_[best]
