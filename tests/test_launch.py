"""The launch offset (hybrid.core.launch): left-out projections and what they miss."""
import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp

from hybrid import HybridFactorModel
from hybrid.core.launch import loo_projections
from hybrid.core.mapsolve import block_diagonal


def _refit_map(A, Z, w, lam, P):
    """The map's objective sum_i w_i (z_i - W^T a_i)^T P (z_i - W^T a_i) + lam |W|^2 solved
    directly with numpy.linalg (normal equations in vec form, Kronecker product)."""
    p, d = A.shape[1], Z.shape[1]
    G = A.T @ (w[:, None] * A)
    lhs = np.kron(P, G) + lam * np.eye(p * d)
    rhs = (A.T @ (w[:, None] * Z) @ P).ravel(order="F")
    return np.linalg.solve(lhs, rhs).reshape((p, d), order="F")


@pytest.mark.parametrize("n, p", [(40, 6), (12, 20)])       # primal and dual forms of the solver
def test_loo_projections_equal_refits_without_each_item(n, p):
    rng = np.random.default_rng(n)
    A, Z = rng.normal(size=(n, p)), rng.normal(size=(n, 3))
    w = rng.uniform(0.2, 2.0, n)
    M = rng.normal(size=(3, 3))
    P = M @ M.T + np.eye(3)                                    # couples the coordinates
    loo = loo_projections(sp.csr_matrix(A), Z, w, 0.7, P)
    for i in range(n):
        keep = np.arange(n) != i
        W = _refit_map(A[keep], Z[keep], w[keep], 0.7, P)
        assert np.allclose(loo[i], A[i] @ W, atol=1e-8)


def test_loo_projections_with_a_weight_per_coordinate():
    # map_weighting = "bias": the bias column has its own weights and the prior couples no
    # bias with a vector, so each column group is its own weighted ridge
    rng = np.random.default_rng(3)
    n, p = 30, 5
    A, Z = rng.normal(size=(n, p)), rng.normal(size=(n, 3))
    weight = np.ones((n, 3))
    weight[:, 0] = 1.0 + rng.integers(0, 20, n) / 2.0
    M = rng.normal(size=(3, 3))
    P = block_diagonal(M @ M.T + np.eye(3), weight)
    loo = loo_projections(sp.csr_matrix(A), Z, weight, 1.3, P)
    for i in (0, 11, 29):
        keep = np.arange(n) != i
        bias = _refit_map(A[keep], Z[keep, :1], weight[keep, 0], 1.3, P[:1, :1])
        vec = _refit_map(A[keep], Z[keep, 1:], weight[keep, 1], 1.3, P[1:, 1:])
        assert np.allclose(loo[i], np.r_[A[i] @ bias, A[i] @ vec], atol=1e-8)


def test_launch_offset_is_the_mean_error_of_left_out_predictions(club):
    m = HybridFactorModel(rank=3, epochs=6, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    u, i, r = m.ratings_
    F = m.factors_
    rated = np.flatnonzero(m.item_counts_ > 0)
    Z = np.zeros_like(F.item)
    Z[rated] = loo_projections(m.attributes_[rated], F.item[rated], m.prior_weight_[rated], m.lam_map_, F.P)
    # rating by rating (the module sums per item instead)
    pred = m.mu_ + F.user[u, 0] + Z[i, 0] + np.einsum("nk,nk->n", F.user[u, 1:], Z[i, 1:])
    assert m.launch_offset_ == pytest.approx(np.mean(r - pred), abs=1e-10)
    assert m.metrics_["launch_offset"] == m.launch_offset_
    off = HybridFactorModel(rank=3, epochs=6, schema=club.schema, text_min_df=1, launch_offset="none")
    off.fit(club.ratings, club.lots)
    assert off.launch_offset_ == 0.0
    # the offset moves only the new items' scores, by itself
    new = club.new_lots.iloc[:3]
    users = np.repeat(m.user_ids_[:2], 3)
    items = np.tile(new.index.to_numpy(str), 2)
    gap = m.predict(users, items, new) - off.predict(users, items, new)
    assert np.allclose(gap, m.launch_offset_)


def test_the_offset_removes_the_selection_gap_on_new_items():
    # invented catalogue with selection bias: items' true biases are independent of their
    # attributes, and an item is rated by more users the better it is liked.  Half the items
    # are held out whole (new, attributes only).  Without the offset their predictions fall
    # short of the ratings they then get; with it the mean error is near zero
    rng = np.random.default_rng(5)
    n_items, n_users = 3000, 300
    bias = rng.normal(0.0, 0.5, n_items)
    counts = np.maximum(1, np.round(4 * np.exp(1.6 * bias))).astype(int)
    rows = [(f"u{u}", f"i{j}", 3.0 + bias[j] + rng.normal(0, 0.3))
            for j in range(n_items) for u in rng.choice(n_users, min(counts[j], n_users), replace=False)]
    ratings = pd.DataFrame(rows, columns=["user", "item", "rating"])
    attributes = pd.DataFrame({"kind": rng.choice(["a", "b", "c"], n_items)},
                              index=pd.Index([f"i{j}" for j in range(n_items)], name="item"))
    new = ratings["item"].str[1:].astype(int) % 2 == 1
    gaps = {}
    for setting in ("learned", "none"):
        m = HybridFactorModel(rank=2, epochs=10, schema={"kind": "category"}, launch_offset=setting)
        m.fit(ratings[~new], attributes)
        gaps[setting] = float(np.mean(ratings["rating"][new] - m.predict(ratings["user"][new], ratings["item"][new])))
    assert gaps["none"] > 0.08, gaps
    assert abs(gaps["learned"]) < 0.03, gaps
