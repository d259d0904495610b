"""Protocols, metrics and baselines, checked against scikit-learn."""
import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error, mean_squared_error, ndcg_score

from hybrid.evaluation.evaluate import cold_folds, evaluate, warm_folds
from hybrid.evaluation.metrics import mae, ndcg_by_group, rmse


def test_rmse_and_mae_match_sklearn():
    rng = np.random.default_rng(0)
    y, p = rng.uniform(1, 5, 200), rng.uniform(1, 5, 200)
    assert rmse(y, p) == pytest.approx(np.sqrt(mean_squared_error(y, p)))
    assert mae(y, p) == pytest.approx(mean_absolute_error(y, p))


def test_grouped_ndcg_matches_sklearn_including_ties():
    # NDCG@10 as defined by Jarvelin and Kekalainen (2002); reference sklearn.metrics.ndcg_score
    rng = np.random.default_rng(1)
    g = np.repeat(np.arange(40), rng.integers(2, 25, 40))
    rel = rng.integers(1, 6, len(g)).astype(float)
    for pred in (np.round(rng.normal(size=len(g)), 1), np.zeros(len(g))):
        ids, values = ndcg_by_group(g, rel, pred, k=10)
        ref = [ndcg_score([rel[g == i]], [pred[g == i]], k=10) for i in ids]
        assert np.allclose(values, ref, atol=1e-12)


def test_folds_partition_the_ratings(club):
    cold = cold_folds(club.ratings, 4, 0, min_ratings=5)
    assert np.all(np.sum(cold, axis=0) <= 1)
    held = [set(club.ratings["item"][m]) for m in cold]
    assert all(not (a & b) for a in held for b in held if a is not b)
    counts = club.ratings["item"].value_counts()
    assert set().union(*held) == set(counts.index[counts >= 5])
    warm = warm_folds(club.ratings, 5, 0)
    assert np.array_equal(np.sum(warm, axis=0), np.ones(len(club.ratings)))
    share = pd.Series(warm[0]).groupby(club.ratings["user"].to_numpy()).mean()
    busy = club.ratings["user"].value_counts() >= 20
    assert share[busy[busy].index].between(0.1, 0.3).all()


def test_evaluate_table_on_the_tasting_club():
    # invented data (internal check): the demo's own settings
    from hybrid.app.config import load_config, model_params
    from hybrid.datasets.club import DEMO_CONFIG, tasting_club

    club = tasting_club()
    params = {**model_params(load_config(DEMO_CONFIG)), "schema": club.schema}
    table = evaluate(club.ratings, club.lots, params, protocol="cold", folds=2)
    assert table["method"].tolist() == ["global mean", "mean + user bias", "mean + user + item biases",
                                        "+ item bias from attributes", "attribute neighbours", "hybrid"]
    assert (table["folds"] == 2).all() and table["rmse_sd"].notna().all()
    by = table.set_index("method")
    assert by.loc["hybrid", "rmse_mean"] < by.loc["+ item bias from attributes", "rmse_mean"] \
        < by.loc["mean + user bias", "rmse_mean"] < by.loc["global mean", "rmse_mean"]
    assert by["item_ndcg10_mean"].idxmax() == "hybrid"
    few = evaluate(club.ratings, club.lots, params, protocol="few", folds=2, reveal=(1, 10))
    hyb = few[few["method"] == "hybrid"].set_index("n")["rmse_mean"]
    assert hyb[10] < hyb[1] < by.loc["hybrid", "rmse_mean"] + 0.02


def test_biases_baseline_is_the_ridge_least_squares_solution():
    # outside check (scipy.sparse.linalg.lsqr): with damp = sqrt(lam), lsqr minimises
    # |X b - y|^2 + lam |b|^2 over [user one-hot, item one-hot] exactly the ridge the baseline fits
    import scipy.sparse as sp
    from scipy.sparse.linalg import lsqr

    from hybrid.evaluation.baselines import Biases

    rng = np.random.default_rng(4)
    u, i = rng.integers(0, 30, 400), rng.integers(0, 20, 400)
    r = rng.normal(3.5, 1.0, 400) + 0.3 * (u % 3) - 0.2 * (i % 4)
    b = Biases(3.0).fit(u, i, r, sp.csr_matrix((20, 1)), 30)
    X = sp.hstack([sp.csr_matrix((np.ones(400), (np.arange(400), u)), shape=(400, 30)),
                   sp.csr_matrix((np.ones(400), (np.arange(400), i)), shape=(400, 20))]).tocsr()
    ref = lsqr(X, r - r.mean(), damp=np.sqrt(3.0), atol=1e-12, btol=1e-12, iter_lim=10_000)[0]
    assert np.allclose(np.concatenate([b.b_u_, b.b_i_]), ref, atol=1e-6)
