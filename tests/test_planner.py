"""The planner: posterior, sampler, ratings needed, budget split and whom to ask."""
import numpy as np
import pandas as pd
import pytest
import scipy.stats
from sklearn.linear_model import Ridge

from hybrid import HybridFactorModel
from hybrid.common.errors import InputError
from hybrid.core.posterior import covariances, item_grams, stability
from hybrid.planning.assess import FIRST_DRAWS, Assessor, settle
from hybrid.planning.campaign import (
    allocate_gain,
    allocate_reach,
    choose_askees,
    exact_allocation,
)
from hybrid.planning.planner import plan


@pytest.fixture(scope="module")
def fixed_model(club):
    return HybridFactorModel(rank=3, epochs=10, schema=club.schema, text_min_df=1, prior="fixed",
                             lam_map=1.0).fit(club.ratings, club.lots)


def _rows(model, item):
    R = model.rating_data().by_item
    users = R.indices[R.indptr[item]:R.indptr[item + 1]]
    y = R.data[R.indptr[item]:R.indptr[item + 1]] - model.user_blocks_[users, 0]
    B = np.hstack([np.ones((len(users), 1)), model.user_blocks_[users, 1:]])
    return B, y


def test_covariance_is_bayesian_linear_regression(fixed_model):
    # Bishop, PRML (2006), eq. 3.54: S_N^-1 = alpha I + beta Phi^T Phi, with beta = 1/sigma^2
    # and alpha = lam_item / sigma^2 for the trainer's isotropic prior
    m = fixed_model
    item = int(np.argmax(m.item_counts_))
    B, _ = _rows(m, item)
    beta, alpha = 1.0 / m.sigma2_, m.lam_item_ / m.sigma2_
    S_N = np.linalg.inv(alpha * np.eye(B.shape[1]) + beta * B.T @ B)
    mine = covariances(m, item_grams(m, [item]), m.prior_weight_[[item]])[0]
    assert np.allclose(mine, S_N, rtol=1e-10)


def test_posterior_mean_is_sklearn_ridge_around_the_prior(club):
    # reference: sklearn Ridge(alpha=1) after whitening by the learned prior P = L L^T;
    # the model's item vector must be this posterior mean exactly
    m = HybridFactorModel(rank=3, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    item = int(np.argsort(m.item_counts_)[-5])
    B, y = _rows(m, item)
    prior_mean = np.ravel(m.attributes_[item] @ m.map_)
    L = np.linalg.cholesky(m.prior_precision_)
    X = B @ np.linalg.inv(L).T
    ridge = Ridge(alpha=1.0, fit_intercept=False).fit(X, y - B @ prior_mean)
    assert np.allclose(m.item_blocks_[item], prior_mean + np.linalg.inv(L).T @ ridge.coef_, atol=1e-8)


@pytest.mark.parametrize("mean,sd", [(-0.5, 1.0), (0.3, 0.4), (-1.2, 2.0)])
def test_sampler_matches_normal_cdf(mean, sd):
    # two candidates at -1 and +1 on a line: A (at -1) is nearest iff x < 0, so the
    # stability of a list {A} is P(x < 0) = Phi(-mean/sd)  (scipy.stats.norm)
    pool = np.array([[-1.0], [1.0]])
    eps = np.random.default_rng(1).standard_normal((20000, 1))
    got, se = stability(np.array([[mean]]), np.array([[[sd]]]), pool, 1, eps)
    p_a = scipy.stats.norm.cdf(-mean / sd)
    expected = p_a if mean < 0 else 1 - p_a
    assert abs(got[0] - expected) < 3 * se[0]


def test_shortlist_and_certificate_are_exact():
    rng = np.random.default_rng(3)
    pool = rng.normal(size=(400, 4))
    means = rng.normal(size=(30, 4))
    A = rng.normal(size=(30, 4, 4)) * np.linspace(0.05, 1.5, 30)[:, None, None]
    chol = np.linalg.cholesky(A @ A.transpose(0, 2, 1) + 1e-3 * np.eye(4))
    eps = rng.standard_normal((64, 4))
    brute = stability(means, chol, pool, 10, eps, shortlist=400)[0]
    short = stability(means, chol, pool, 10, eps, shortlist=40)[0]
    assert np.array_equal(brute, short)
    # and against a direct count for one item
    X = means[7] + eps @ chol[7].T
    d_mean = np.linalg.norm(pool - means[7], axis=1)
    listed = set(np.argsort(d_mean)[:10])
    direct = np.mean([len(listed & set(np.argsort(np.linalg.norm(pool - x, axis=1))[:10])) / 10 for x in X])
    assert brute[7] == pytest.approx(direct)


def test_sherman_morrison_updates_match_numpy_inverse():
    # after each pick the covariance is (Sigma^-1 + b b^T / sigma^2)^-1  (numpy.linalg.inv)
    rng = np.random.default_rng(0)
    B = np.hstack([np.ones((50, 1)), rng.normal(size=(50, 3))])
    M = rng.normal(size=(4, 4))
    cov0 = M @ M.T + np.eye(4)
    picks, gains, cov = choose_askees(B, cov0, 0.7, 6, np.ones(50, bool), np.ones(50), np.ones(50, int))
    prec = np.linalg.inv(cov0) + B[picks].T @ B[picks] / 0.7
    assert np.allclose(cov, np.linalg.inv(prec))
    assert len(set(picks)) == 6
    first = 0.5 * np.log1p(np.einsum("ud,de,ue->u", B, cov0, B) / 0.7)
    assert picks[0] == int(np.argmax(first)) and gains[0] == pytest.approx(first.max())


def test_greedy_budget_split_is_near_the_milp_optimum():
    # stated margin: on small random cases the greedy reaches at least 90% of the exact
    # optimum from scipy.optimize.milp, and on average at least 97%
    rng = np.random.default_rng(0)
    grid = np.array([0, 1, 2, 3, 5, 8, 12, 20, 30])
    ratios = {"reach": [], "gain": []}
    for _ in range(25):
        m = int(rng.integers(4, 9))
        weights = rng.uniform(0.2, 1.0, m)
        budget = int(rng.integers(5, 60))
        rate = rng.uniform(0.02, 0.4, m)
        start = rng.uniform(0.1, 0.7, m)
        curves = 1 - (1 - start[:, None]) * np.exp(-np.outer(rate, grid))
        needed = np.ceil(np.log((1 - start) / 0.2) / rate)
        needed[needed > 30] = np.nan
        planned = allocate_reach(needed, weights, budget)
        _, best = exact_allocation(None, grid, weights, budget, aim="reach", needed=needed)
        value = weights[planned > 0].sum()
        assert planned.sum() <= budget and np.all((planned == 0) | (planned == np.nan_to_num(needed)))
        ratios["reach"].append(1.0 if best == 0 else value / best)
        planned = allocate_gain(curves, grid, weights, budget)
        _, best = exact_allocation(curves, grid, weights, budget, aim="gain")
        gain = sum(weights[i] * (np.interp(planned[i], grid, curves[i]) - curves[i, 0]) for i in range(m))
        assert planned.sum() <= budget and set(planned) <= set(grid)
        ratios["gain"].append(gain / best)
    for aim, r in ratios.items():
        assert min(r) >= 0.90 and np.mean(r) >= 0.97, (aim, min(r), np.mean(r))


def test_plan_end_to_end(club):
    m = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    p = plan(m, budget=120, per_user=2, priority="margin", draws=32, k=5)
    items = p.items
    assert set(items["status"]) <= {"no ratings yet", "under-covered", "trusted"}
    assert (items.loc[items["ratings"] == 0, "status"] == "no ratings yet").all()
    trusted = items["status"] == "trusted"
    assert (items.loc[trusted, "stability"] >= 0.8).all() and (items.loc[trusted, "needed"] == 0).all()
    assert items["planned"].sum() <= 120 and (items.loc[trusted, "planned"] == 0).all()
    # every planned item that got all its asks reaches the target by the planner's own curve
    asked = p.asks.groupby("item").size()
    # not everyone answers: asks go out until each item's expected answers meet its planned ratings
    bought = items[items["planned"] > 0]
    assert (bought["expected_answers"] >= bought["planned"] - 1e-9).all()
    assert (bought["asks"] > bought["planned"]).all()
    assert p.summary()["expected answers"] == pytest.approx(p.asks["answer_chance"].sum(), abs=0.05)
    assert p.asks.groupby("user").size().max() <= 2
    R = m.rating_data().by_item
    pos = pd.Index(m.item_ids_)
    for item, users in p.asks.groupby("item")["user"]:
        i = pos.get_loc(item)
        raters = set(m.user_ids_[R.indices[R.indptr[i]:R.indptr[i + 1]]])
        assert not raters & set(users)
    assert asked.index.isin(items.loc[items["planned"] > 0, "item"]).all()


def test_ratings_needed_reaches_the_target_and_one_less_does_not(club):
    m = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    p = plan(m, k=5, draws=32)
    A = Assessor(m, k=5, draws=32, seed=0)
    rows = p.items[p.items["needed"].notna() & (p.items["needed"] > 1)].head(6)
    idx = pd.Index(m.item_ids_).get_indexer(rows["item"])
    need = rows["needed"].to_numpy(int)
    # comparisons with the target use the planner's sequential estimate
    assert (settle(A, idx, need, 0.8) >= 0.8).all() and (settle(A, idx, need - 1, 0.8) < 0.8).all()
    far = p.items[p.items["needed"].isna()]
    assert (far["needed_label"] == "more than 200").all()


def test_sequential_estimate_agrees_with_all_draws(club):
    m = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    A = Assessor(m, k=5, draws=64, seed=0)
    items = np.arange(len(m.item_ids_))
    took_all = 0
    for n in (0, 3, 12, 40):
        full = A.at(items, n)[0]
        quick = settle(A, items, n, 0.8)
        head, se = A.at(items, n, slice(0, FIRST_DRAWS))
        unsure = np.abs(head - 0.8) < 3 * np.maximum(se, 0.025)
        assert np.allclose(quick[unsure], full[unsure], atol=1e-12)     # all 64 draws
        assert np.array_equal(quick[~unsure], head[~unsure])            # the first 16 settled it
        assert np.mean((quick >= 0.8) == (full >= 0.8)) >= 0.98
        took_all += unsure.sum()
    assert 0 < took_all < 4 * len(items)


def test_planning_some_items_matches_planning_all(club):
    m = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    whole = plan(m, k=5, draws=32, budget=40).items.set_index("item")
    few = m.item_ids_[[7, 3, 40, 3]]                       # in any order, a repeat counted once
    part = plan(m, k=5, draws=32, budget=40, items=few)
    assert part.items["item"].tolist() == [few[0], few[1], few[2]]
    same = whole.loc[part.items["item"]]
    for column in ("status", "ratings", "stability", "needed", "candidate"):
        assert part.items[column].tolist() == same[column].tolist(), column
    assert set(part.asks["item"]) <= set(few) and part.items["planned"].sum() <= 40
    with pytest.raises(InputError, match="item 'NOPE' is not in the model"):
        plan(m, k=5, draws=8, items=["NOPE"])


def test_likely_responders_work_for_a_library_model(club):
    # a model fitted in Python has no CLI settings; the liked level then defaults to 4
    m = HybridFactorModel(rank=3, epochs=5, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    likely = plan(m, k=5, draws=8, responders="likely").items
    active = plan(m, k=5, draws=8).items
    assert likely["stability"].equals(active["stability"])           # stability now does not depend on it
    assert (likely["needed"].dropna() >= 0).all() and len(likely) == len(active)


def test_the_summary_counts_what_the_plan_adds(club):
    m = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    p = plan(m, k=5, draws=16, budget=60, aim="gain")
    s = p.summary()
    items = p.items
    assert s["more items reaching the target with the plan"] == int(
        (items["reaches_target"] & (items["status"] != "trusted")).sum())
    # the gain read off the curves by hand: each item's stability at its planned ratings, less now
    by_hand = 0.0
    for row in items.itertuples():
        curve = p.curves.loc[row.item]
        by_hand += np.interp(row.planned, np.asarray(curve.index, float), curve.to_numpy()) - curve.iloc[0]
    assert s["stability gained in all"] == pytest.approx(by_hand, abs=1e-4) and by_hand > 0
    assert "stability gained in all" not in plan(m, k=5, draws=16, budget=60).summary()   # no curves
