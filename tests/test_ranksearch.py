"""The rank search: how many dimensions the ratings support, chosen on held-out ratings."""
import numpy as np
import pytest

from hybrid import HybridFactorModel
from hybrid.core.ranksearch import ladder, search_rank, validation_split
from hybrid.datasets.club import tasting_club


@pytest.fixture(scope="module")
def club():
    return tasting_club(n_members=500, n_lots=120, n_new=5, seed=11)


def test_ladder_is_shared_by_every_rank():
    # a larger rank only extends the ladder: the levels a smaller search tries come first
    for small, large in [(4, 16), (16, 64), (64, 300)]:
        assert ladder(large)[:len(ladder(small)) - 1] == ladder(small)[:-1]
    assert ladder(1) == [1] and ladder(7)[-1] == 7


def test_validation_split_is_seeded_and_its_own_stream():
    a, b = validation_split(10_000, 0.1, 3), validation_split(10_000, 0.1, 3)
    assert np.array_equal(a, b) and abs(a.mean() - 0.1) < 0.01
    assert not np.array_equal(a, validation_split(10_000, 0.1, 4))


def test_search_finds_the_planted_rank_and_a_larger_rank_changes_nothing(club):
    # the club's ratings come from a rank-5 factor model (internal check): the search must not
    # stop at a trivial rank, and once it has stopped, a larger allowed rank gives the same model
    small = HybridFactorModel(rank=32, rank_choice="held-out", epochs=6, schema=club.schema).fit(club.ratings, club.lots)
    large = HybridFactorModel(rank=64, rank_choice="held-out", epochs=6, schema=club.schema).fit(club.ratings, club.lots)
    assert 3 <= small.rank_ <= 12 and small.rank_path_[-1][0] < 32
    assert small.rank_path_ == large.rank_path_ and small.rank_ == large.rank_
    assert np.array_equal(small.item_blocks_, large.item_blocks_)
    errors = dict(small.rank_path_)
    assert errors[small.rank_] == min(errors.values()) < errors[1]
    assert small.item_blocks_.shape[1] == small.rank_ + 1 and len(small.dimension_spread_) == small.rank_


def test_fixed_rank_skips_the_search(club):
    m = HybridFactorModel(rank=3, rank_choice="fixed", epochs=3, schema=club.schema).fit(club.ratings, club.lots)
    assert m.rank_ == 3 and m.rank_path_ == [] and m.metrics_["rank"] == 3


def test_search_rank_returns_the_best_level_it_tried(club):
    from hybrid.estimator.features import AttributeEncoder

    A = AttributeEncoder(club.schema).fit(club.lots).transform(club.lots)
    codes = (np.unique(club.ratings["user"], return_inverse=True)[1],
             club.lots.index.get_indexer(club.ratings["item"]), club.ratings["rating"].to_numpy(float))
    rank, path = search_rank(codes, (500, len(club.lots)), A, most=8, lam_user=5.0, lam_item=5.0,
                             lam_map=1.0,
                             biases=True, seed=0, patience=10)
    assert [r for r, _ in path] == [1, 2, 3, 4, 6, 8]
    assert rank == min(path, key=lambda p: p[1])[0]


@pytest.mark.parametrize("bad", [{"rank_choice": "auto"}, {"rank_choice": 3}])
def test_bad_rank_settings_name_the_setting(club, bad):
    from hybrid.common.errors import InputError

    with pytest.raises(InputError, match=next(iter(bad))):
        HybridFactorModel(**bad).fit(club.ratings, club.lots)
