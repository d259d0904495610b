"""scikit-learn's estimator rules, checked with scikit-learn's own tools (sklearn.base.clone,
get_params/set_params, NotFittedError; the rules are those of its developer guide), and the
one owner of fitted state."""
import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn.base import BaseEstimator, clone
from sklearn.exceptions import ConvergenceWarning, NotFittedError

from hybrid import HybridFactorModel


def test_clone_gives_an_unfitted_copy_with_the_same_settings(fitted):
    copy = clone(fitted)
    assert isinstance(copy, BaseEstimator) and copy is not fitted
    assert copy.get_params() == fitted.get_params()
    assert not hasattr(copy, "factors_") and not hasattr(copy, "item_blocks_")
    assert clone(HybridFactorModel(rank=4)).rank == 4


def test_set_params_changes_a_setting_and_refuses_a_typo():
    m = HybridFactorModel(rank=4)
    assert m.set_params(rank=6, lam_user=3.0) is m and (m.rank, m.lam_user) == (6, 3.0)
    with pytest.raises(ValueError, match="rnak"):
        m.set_params(rnak=2)
    assert "rank" in HybridFactorModel().get_params(deep=True)


def test_settings_are_keyword_only():
    with pytest.raises(TypeError):
        HybridFactorModel(4)


def test_use_before_fit_raises_not_fitted_and_hasattr_says_no():
    m = HybridFactorModel(rank=3)
    with pytest.raises(NotFittedError):
        m.predict(["a"], ["b"])
    assert not hasattr(m, "item_blocks_")   # NotFittedError is an AttributeError too
    assert issubclass(NotFittedError, ValueError)


def test_n_iter_and_a_warning_when_the_epochs_run_out(club):
    with pytest.warns(ConvergenceWarning, match="all 2 epochs"):
        m = HybridFactorModel(rank=3, epochs=2, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    assert m.n_iter_ == 2 == len(m.history_)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)   # settled early: no warning
        m = HybridFactorModel(rank=3, epochs=200, tol=1e-2, schema=club.schema,
                              text_min_df=1).fit(club.ratings, club.lots)
    assert m.n_iter_ < 200


def test_fold_in_keeps_every_derived_attribute_current(club):
    m = HybridFactorModel(rank=3, epochs=5, schema=club.schema, text_min_df=1, tol=0).fit(club.ratings, club.lots)
    top = float(club.ratings["rating"].max())
    user, item = club.ratings["user"].iloc[0], club.lots.index[-1]
    low = pd.DataFrame({"user": [user, "NEW-MEMBER"], "item": [item, item], "rating": [top + 3.0, 1.0]})
    m.fold_in(low)
    u, i, r = m.ratings_
    assert m.rating_range_ == (float(r.min()), top + 3.0)
    assert m.metrics_["n_ratings"] == len(r) and m.metrics_["n_users"] == len(m.user_ids_)
    assert np.array_equal(m.item_counts_, np.bincount(i, minlength=len(m.item_ids_)))
    assert np.array_equal(m.user_counts_, np.bincount(u, minlength=len(m.user_ids_)))


def test_only_set_fitted_names_are_accepted(fitted):
    with pytest.raises(TypeError, match="item_count_"):
        clone(fitted).set_fitted(item_count_=1)


def test_the_prior_em_warns_when_its_rounds_run_out():
    from hybrid.core.prior import em_covariance
    # items drawn from a known prior (spread 2 and 0.5), each rated by 8 raters with unit noise
    rng = np.random.default_rng(0)
    B = rng.normal(size=(400, 8, 2))
    z = rng.normal(size=(400, 2)) * [2.0, 0.5]
    y = np.einsum("nki,ni->nk", B, z) + rng.normal(size=(400, 8))
    grams, rhs = np.einsum("nki,nkj->nij", B, B), np.einsum("nki,nk->ni", B, y)
    with pytest.warns(ConvergenceWarning, match="all 1 rounds"):
        em_covariance(grams, rhs, np.zeros((400, 2)), 1.0, np.eye(2), rounds=1)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        Psi = em_covariance(grams, rhs, np.zeros((400, 2)), 1.0, np.eye(2), rounds=500)
    assert np.sqrt(np.diag(Psi)) == pytest.approx([2.0, 0.5], rel=0.2)   # and it finds the prior


def test_where_a_fit_runs_is_not_a_setting(club):
    from hybrid.engines.engine import Engine

    assert not {"engine", "address", "partitions", "shared_dir"} & set(HybridFactorModel().get_params())
    m = HybridFactorModel(rank=2, epochs=2, schema=club.schema, text_min_df=1)
    with pytest.raises(ValueError, match="engine must be an Engine"):
        m.fit(club.ratings, club.lots, engine="dask")
    with pytest.raises(ValueError, match="engine must be one of 'local', 'dask', found 'spark'"):
        Engine("spark")
    assert m.fit(club.ratings, club.lots).metrics_["engine"]["kind"] == "local"
