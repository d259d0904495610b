"""The joint trainer: exactness of each half-step, and checks against references."""
import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import scipy.sparse as sp
from sklearn.linear_model import Ridge

from hybrid import HybridFactorModel
from hybrid.core.mapsolve import MapSolver, map_solver
from hybrid.core.prior import em_covariance
from hybrid.core.steps import Factors, item_step, map_step, objective, user_step
from hybrid.datasets.club import tasting_club


def dense_ratings(n_users=30, n_items=20, rank=3, noise=0.05, seed=0):
    rng = np.random.default_rng(seed)
    M = rng.normal(size=(n_users, rank)) @ rng.normal(size=(rank, n_items)) * 1.5
    M = M + noise * rng.normal(size=M.shape)
    u, i = np.meshgrid(np.arange(n_users), np.arange(n_items), indexing="ij")
    return pd.DataFrame({"user": [f"u{x:02d}" for x in u.ravel()], "item": [f"i{x:02d}" for x in i.ravel()],
                         "rating": M.ravel()}), M


def test_eckart_young_truncated_svd():
    # Eckart and Young (1936): the best rank-k approximation in Frobenius norm is the
    # truncated SVD; reference numpy.linalg.svd.  Full matrix, no biases, negligible
    # regularisation, intercept-only attributes.
    ratings, M = dense_ratings()
    m = HybridFactorModel(rank=3, lam_user=1e-9, lam_item=1e-9, lam_map=1e-9, epochs=3000, tol=1e-15,
                          biases=False, prior="fixed", seed=1, holdout=0.0).fit(ratings)   # the whole matrix
    s = np.linalg.svd(M - M.mean(), compute_uv=False)
    optimum = float(np.sum(s[3:] ** 2))
    sse = m.metrics_["train_rmse"] ** 2 * M.size
    assert abs(sse - optimum) / optimum < 1e-6


def test_every_half_step_never_increases_the_objective(club):
    model = HybridFactorModel(rank=4, epochs=1, schema=club.schema, text_min_df=1, prior="fixed").fit(
        club.ratings, club.lots)
    data = model.rating_data()
    F, A = model.factors_, model.attributes_
    weight = np.ones(len(model.item_ids_))
    rated = model.item_counts_ > 0
    solver = MapSolver(A[rated], weight[rated], model.lam_map_)
    values = [objective(data, F, A, model.lam_user_, model.lam_map_, weight)[0]]
    rng = np.random.default_rng(0)
    for epoch in range(6):
        if epoch == 3:  # any other prior (as the learned one is): half-steps still descend under it
            M = rng.normal(size=F.P.shape)
            F.P = M @ M.T + np.eye(len(M))
            values.append(objective(data, F, A, model.lam_user_, model.lam_map_, weight)[0])
        for step in (lambda: user_step(data, F, model.lam_user_), lambda: item_step(data, F, A, weight),
                     lambda: map_step(F, A, rated, solver)):
            step()
            values.append(objective(data, F, A, model.lam_user_, model.lam_map_, weight)[0])
            assert values[-1] <= values[-2] * (1 + 1e-12), (epoch, values[-2:])
    assert values[-1] < values[0]


def test_map_step_equals_sklearn_ridge(fitted):
    # reference: sklearn.linear_model.Ridge without intercept (ours is a column of A),
    # alpha = lam_map / lam_item for the isotropic prior lam_item * I
    m = fitted
    F = Factors(m.user_blocks_.copy(), m.item_blocks_.copy(), m.map_.copy(),
                m.lam_item_ * np.eye(m.rank + 1))
    rated = m.item_counts_ > 0
    map_step(F, m.attributes_, rated, MapSolver(m.attributes_[rated], np.ones(rated.sum()), m.lam_map_))
    ref = Ridge(alpha=m.lam_map_ / m.lam_item_, fit_intercept=False, solver="svd").fit(
        m.attributes_[rated].toarray(), m.item_blocks_[rated])
    assert np.allclose(F.W, ref.coef_.T, atol=1e-8)
    assert np.allclose(F.item[~rated], m.attributes_[~rated] @ F.W)


def test_map_step_with_general_prior_is_the_exact_minimiser(fitted):
    # with a non-isotropic P the map is a Sylvester-type system; check the normal equations
    m = fitted
    rated = m.item_counts_ > 0
    A = m.attributes_[rated].toarray()
    w = np.linspace(0.2, 1.0, rated.sum())
    F = Factors(m.user_blocks_, m.item_blocks_.copy(), m.map_.copy(), m.prior_precision_)
    F.W = MapSolver(sp.csr_matrix(A), w, m.lam_map_).solve(m.item_blocks_[rated], F.P)
    grad = A.T @ (w[:, None] * (A @ F.W - m.item_blocks_[rated])) @ F.P + m.lam_map_ * F.W
    assert np.abs(grad).max() < 1e-8 * max(1.0, np.abs(A.T @ m.item_blocks_[rated]).max())


def test_bias_weighting_keeps_every_half_step_descending(club):
    # the bias coordinate's prior weighted per item, the vectors' not: still one objective
    model = HybridFactorModel(rank=4, epochs=1, schema=club.schema, text_min_df=1, prior="fixed",
                              map_weighting="bias", weight_half=3.0).fit(club.ratings, club.lots)
    data, F, A = model.rating_data(), model.factors_, model.attributes_
    weight = model.prior_weight_
    assert weight.shape == (len(model.item_ids_), 5) and (weight[:, 1:] == 1).all()
    assert np.allclose(weight[:, 0], 1 + model.item_counts_ / 3.0)
    rated = model.item_counts_ > 0
    solver = map_solver(A[rated], weight[rated], model.lam_map_)
    rng = np.random.default_rng(0)
    M = rng.normal(size=(4, 4))
    F.P = scipy.linalg.block_diag(2.0, M @ M.T + np.eye(4))    # a prior coupling no bias with a vector
    values = [objective(data, F, A, model.lam_user_, model.lam_map_, weight)[0]]
    for _ in range(4):
        for step in (lambda: user_step(data, F, model.lam_user_), lambda: item_step(data, F, A, weight),
                     lambda: map_step(F, A, rated, solver)):
            step()
            values.append(objective(data, F, A, model.lam_user_, model.lam_map_, weight)[0])
            assert values[-1] <= values[-2] * (1 + 1e-12), values[-2:]
    # the map's bias column is a ridge regression of the item biases weighted by 1 + n / 3
    # (reference: sklearn.linear_model.Ridge with sample_weight), its vector columns unweighted
    Z = F.item[rated]
    ref_b = Ridge(alpha=model.lam_map_ / 2.0, fit_intercept=False, solver="svd").fit(
        A[rated].toarray(), Z[:, 0], sample_weight=weight[rated, 0])
    assert np.allclose(F.W[:, 0], ref_b.coef_, atol=1e-8)
    Px = F.P[1:, 1:]
    Ad = A[rated].toarray()
    grad = Ad.T @ (Ad @ F.W[:, 1:] - Z[:, 1:]) @ Px + model.lam_map_ * F.W[:, 1:]
    assert np.abs(grad).max() < 1e-8 * max(1.0, np.abs(Ad.T @ Z[:, 1:]).max())


def test_bias_weighted_learned_prior_couples_no_bias_with_a_vector(club, tmp_path):
    m = HybridFactorModel(rank=3, epochs=8, schema=club.schema, text_min_df=1, map_weighting="bias",
                          weight_half=5.0).fit(club.ratings, club.lots)
    assert np.abs(m.prior_precision_[0, 1:]).max() == 0 and np.abs(m.prior_covariance_[0, 1:]).max() == 0
    assert np.all(np.linalg.eigvalsh(m.prior_covariance_) > 0)
    # the model file keeps the per-coordinate weights, and folding ratings in updates them
    from hybrid.estimator.persist import save_model
    from hybrid.estimator.updates import fold_in

    path = tmp_path / "bias.hybrid"
    save_model(m, path)
    back = HybridFactorModel.load(path)
    assert np.array_equal(back.prior_weight_, m.prior_weight_)
    lot = m.item_ids_[int(np.argmin(m.item_counts_))]
    new = pd.DataFrame({"user": m.user_ids_[:3], "item": [lot] * 3, "rating": [5.0, 4.5, 5.0]})
    fold_in(back, new)
    j = list(back.item_ids_).index(lot)
    assert back.prior_weight_[j, 0] == pytest.approx(1 + back.item_counts_[j] / 5.0)
    with pytest.raises(Exception, match="needs biases"):
        HybridFactorModel(rank=3, map_weighting="bias", biases=False).fit(club.ratings, club.lots)


def test_weighted_em_recovers_the_scaled_spread():
    # with data that pins every block down, the EM estimate is the mean of S_i D_i D_i^T S_i,
    # kept block-diagonal over the weight's column groups (bias | vector)
    rng = np.random.default_rng(4)
    n, d = 400, 4
    weight = np.ones((n, d))
    weight[:, 0] = rng.uniform(1, 9, n)
    m = rng.normal(size=(n, d))
    z = m + rng.normal(size=(n, d)) / np.sqrt(weight)
    grams = np.broadcast_to(1e9 * np.eye(d), (n, d, d)).copy()
    rhs = np.einsum("nij,nj->ni", grams, z)
    # a tight tolerance: the fit's own (1e-4 of the largest entry) is ample for the planner
    Psi = em_covariance(grams, rhs, m, 1.0, np.eye(d), weight=weight, tol=1e-9)
    S = (z - m) * np.sqrt(weight)
    expected = S.T @ S / n
    expected[0, 1:] = expected[1:, 0] = 0
    assert np.allclose(Psi, expected, atol=1e-6)
    # one weight per item on every coordinate: the same as no weight when all are one
    ones = em_covariance(grams, rhs, m, 1.0, np.eye(d), weight=np.ones((n, d)))
    assert np.allclose(ones, em_covariance(grams, rhs, m, 1.0, np.eye(d)), atol=1e-12)


def test_user_step_equals_sklearn_ridge(fitted):
    # reference: sklearn.linear_model.Ridge(alpha=lam_user, fit_intercept=False) on [1, x_i]
    m = fitted
    data = m.rating_data()
    F = Factors(m.user_blocks_.copy(), m.item_blocks_, m.map_, m.prior_precision_)
    user_step(data, F, m.lam_user_)
    row = data.by_user[7]
    X = np.hstack([np.ones((row.nnz, 1)), m.item_blocks_[row.indices, 1:]])
    y = row.data - m.item_blocks_[row.indices, 0]
    ref = Ridge(alpha=m.lam_user_, fit_intercept=False).fit(X, y)
    assert np.allclose(F.user[7], ref.coef_, atol=1e-10)


def test_prediction_matrix_matches_entries_and_rank(fitted):
    # common practice: the vectorised score block equals per-entry products, and
    # mu + b_i + b_u + X Theta^T has rank at most rank + 3 (three rank-one bias terms)
    m = fitted
    items = m.item_ids_[:40]
    S = m.score_matrix(items, chunk=7)
    users = m.user_ids_[[0, 5, 17]]
    for j, u in enumerate([0, 5, 17]):
        assert np.allclose(S[:, u], m.predict(np.repeat(users[j], 40), items))
    z, w = m.item_blocks_[:40], m.user_blocks_
    assert np.allclose(S[3, 9], m.mu_ + z[3, 0] + w[9, 0] + z[3, 1:] @ w[9, 1:])
    assert np.linalg.matrix_rank(S) <= m.rank + 3
    assert np.linalg.matrix_rank(S - S.mean()) >= m.rank


def test_projected_vectors_recover_the_true_ones():
    # invented data from a known factor model: the projected vectors of items never
    # rated span nearly the same subspace as their true attribute-driven vectors.
    # Principal angles from scipy.linalg.subspace_angles; the yardstick is an oracle,
    # sklearn Ridge fitted to the *true* vectors of the rated lots, which no method
    # that sees only ratings can beat by much.
    club = tasting_club(n_members=2500, n_lots=500, n_new=120, seed=5)
    m = HybridFactorModel(rank=5, epochs=30, schema=club.schema, text_min_df=1, seed=0, lam_map=1.0).fit(
        club.ratings, club.lots)
    true = club.true_attribute_part.loc[club.new_lots.index].to_numpy()

    def angles(P):
        return np.degrees(scipy.linalg.subspace_angles(P - P.mean(0), true - true.mean(0)))

    ours = angles(m.project(club.new_lots).iloc[:, 1:].to_numpy())
    A, A_new = (m.features_.transform(t).toarray() for t in (club.lots, club.new_lots))
    oracle = angles(Ridge(alpha=1.0).fit(A, club.true_vectors.loc[club.lots.index].iloc[:, 1:]).predict(A_new))
    random = angles(np.random.default_rng(0).normal(size=true.shape))
    assert np.all(ours <= oracle + 5.0), (ours.round(1), oracle.round(1))
    assert ours.max() < 50 and np.median(ours) < 35 and random.min() > 60, (ours.round(1), random.round(1))


def test_learned_prior_is_symmetric_positive_definite(fitted):
    P = fitted.prior_covariance_
    assert np.allclose(P, P.T) and np.linalg.eigvalsh(P).min() > 0
    assert not np.allclose(P, P[0, 0] * np.eye(len(P)))  # it did learn something anisotropic


def test_same_seed_same_model(club):
    a = HybridFactorModel(rank=3, epochs=4, schema=club.schema, holdout=0.1, seed=9).fit(club.ratings, club.lots)
    b = HybridFactorModel(rank=3, epochs=4, schema=club.schema, holdout=0.1, seed=9).fit(club.ratings, club.lots)
    assert np.array_equal(a.item_blocks_, b.item_blocks_) and np.array_equal(a.user_blocks_, b.user_blocks_)


def test_unrated_items_keep_their_prior_mean(fitted, club):
    unrated = fitted.item_counts_ == 0
    assert unrated.any() and np.array_equal(fitted.launched_, unrated)
    launch = np.r_[fitted.launch_offset_, np.zeros(fitted.rank)]      # on the bias alone
    assert np.allclose(fitted.item_blocks_[unrated], fitted.attributes_[unrated] @ fitted.map_ + launch)
    proj = fitted.project(club.lots.iloc[np.flatnonzero(unrated)])
    assert np.allclose(proj.to_numpy(), fitted.item_blocks_[unrated])


def test_fold_in_resolves_only_touched_rows(club):
    m = HybridFactorModel(rank=3, epochs=8, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    before_items, before_users = m.item_blocks_.copy(), m.user_blocks_.copy()
    new_lot = club.new_lots.index[0]
    fresh = pd.DataFrame({"user": ["M00001", "M00002", "NEW-MEMBER"], "item": [new_lot, new_lot, new_lot],
                          "rating": [5.0, 4.5, 2.0]})
    m.fold_in(fresh, attributes=club.new_lots)
    j = list(m.item_ids_).index(new_lot)
    changed_items = np.flatnonzero(np.any(m.item_blocks_[:len(before_items)] != before_items, axis=1))
    assert changed_items.size == 0 and m.item_counts_[j] == 3
    # the new item's block is the exact ridge solution around its projection
    F = m.factors_
    users = np.searchsorted(m.user_ids_, fresh["user"])
    B = np.hstack([np.ones((3, 1)), F.user[users, 1:]])
    y = fresh["rating"].to_numpy() - m.mu_ - F.user[users, 0]
    prior = m.attributes_[j] @ F.W + np.r_[m.launch_offset_, 0, 0, 0]   # new at the fit: launch offset
    assert m.launched_[j] and m.launch_offset_ != 0
    expect = np.linalg.solve(B.T @ B + F.P, B.T @ y + F.P @ np.ravel(prior))
    assert np.allclose(F.item[j], expect)
    assert "NEW-MEMBER" in m.user_ids_
    old = np.searchsorted(m.user_ids_, ["M00003"])[0]
    assert np.array_equal(F.user[old], before_users[np.searchsorted(np.sort(m.user_ids_[m.user_ids_ != "NEW-MEMBER"]), "M00003")])


def test_bad_hyper_parameters_named(club):
    from hybrid.common.errors import InputError
    with pytest.raises(InputError, match="lam_user must be a number > 0 or .auto., found -1"):
        HybridFactorModel(lam_user=-1).fit(club.ratings, club.lots)


def test_rating_data_without_keeps_ratings_equal_to_the_mean():
    # a rating equal to the mean is stored as an explicit zero; dropping items must not lose it
    from hybrid.core.steps import RatingData
    data = RatingData.from_codes([0, 0, 1, 1], [0, 1, 0, 2], [2.0, 3.0, 3.0, 4.0], 2, 3)
    assert data.mu == 3.0 and data.nnz == 4
    out = data.without([2])
    assert out.nnz == 3 and out.item_counts().tolist() == [2, 1, 0]
    assert sorted(out.by_user.data.tolist()) == [-1.0, 0.0, 0.0]


def test_refitting_a_model_on_other_ratings_takes_their_mean(club):
    m = HybridFactorModel(rank=2, epochs=2, schema=club.schema, text_min_df=1, prior="fixed", holdout=0.0)
    m.fit(club.ratings, club.lots)   # every rating in the fit: its mean is theirs
    shifted = club.ratings.assign(rating=club.ratings["rating"] - 1.0)
    m.fit(shifted, club.lots)
    assert m.mu_ == pytest.approx(shifted["rating"].mean())
