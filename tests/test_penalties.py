"""The penalties chosen on held-out ratings (hybrid/penalties.py) and what the fit reports."""
import numpy as np
import pytest

from hybrid.core.penalties import HIGHEST, LOWEST, NAMES, START, choose_penalties
from hybrid.datasets.club import tasting_club
from hybrid.estimator.features import AttributeEncoder
from hybrid.estimator.model import HybridFactorModel
from hybrid.evaluation.evaluate import evaluate


@pytest.fixture(scope="module")
def small():
    club = tasting_club(n_members=600, n_lots=120, n_new=0, seed=4)
    A = AttributeEncoder(club.schema).fit(club.lots).transform(club.lots)
    codes = (np.unique(club.ratings["user"], return_inverse=True)[1],
             club.lots.index.get_indexer(club.ratings["item"]), club.ratings["rating"].to_numpy(float))
    return club, A, codes


def _search(small, seed=0, rank=6):
    club, A, codes = small
    return choose_penalties(codes, (600, 120), A, rank=rank, biases=True, seed=seed,
                            given={name: "auto" for name in NAMES})


def test_the_search_ends_at_a_local_minimum_of_its_grid(small):
    # a coordinate search stops only when no single penalty moved one step (x2 or /2) does
    # better, so every such neighbour of the chosen point was tried and scored no lower
    chosen, path = _search(small)
    tried = {tuple(p[k] for k in NAMES): e for p, e in path}
    best = tried[tuple(chosen[k] for k in NAMES)]
    assert best == min(tried.values())
    for name in NAMES:
        for step in (2.0, 0.5):
            value = chosen[name] * step
            if LOWEST <= value <= HIGHEST:
                neighbour = tuple(value if k == name else chosen[k] for k in NAMES)
                assert neighbour in tried and tried[neighbour] >= best, (name, step)
    # every value tried lies on the grid START * 2^k
    for p, _ in path:
        assert all(float(np.log2(p[k] / START[k])).is_integer() for k in NAMES)


def test_the_search_is_seeded(small):
    assert _search(small, seed=3) == _search(small, seed=3)


def test_given_penalties_are_kept_and_reported(small):
    club, _, _ = small
    m = HybridFactorModel(rank=4, epochs=4, lam_user=3.0, lam_item=2.0, lam_map=5.0,
                          schema=club.schema).fit(club.ratings, club.lots)
    assert (m.lam_user_, m.lam_item_, m.lam_map_) == (3.0, 2.0, 5.0) and m.penalty_path_ == []
    auto = HybridFactorModel(rank=4, epochs=4, schema=club.schema).fit(club.ratings, club.lots)
    assert len(auto.penalty_path_) > 1 and auto.metrics_["lam_user"] == auto.lam_user_


def test_spread_by_principal_direction(small):
    # rotation-invariant: the squares of the spreads are the eigenvalues of the prior's vector
    # block, so they sum to its trace (the trace is the sum of the eigenvalues; numpy.linalg)
    club, _, _ = small
    m = HybridFactorModel(rank=8, epochs=6, schema=club.schema).fit(club.ratings, club.lots)
    spread = m.dimension_spread_
    assert len(spread) == 8 and np.all(np.diff(spread) <= 0)
    assert np.isclose((spread ** 2).sum(), np.trace(m.prior_covariance_[1:, 1:]))
    var = spread ** 2
    k = m.dimensions_with_signal_
    assert var[:k].sum() >= 0.9 * var.sum() > var[:k - 1].sum()


def test_defaults_beat_the_biases_only_model_on_the_club():
    # internal check on invented data (planted rank 5): at the default rank 16 and penalties,
    # the hybrid's warm RMSE is below the biases-only ridge model's, fold by fold on average
    club = tasting_club(n_members=1500, n_lots=300, n_new=0, seed=3)
    table = evaluate(club.ratings, club.lots, {"schema": club.schema, "n_jobs": 2},
                     protocol="warm", folds=2).set_index("method")["rmse_mean"]
    assert table["hybrid"] < 0.97 * table["mean + user + item biases"], table
