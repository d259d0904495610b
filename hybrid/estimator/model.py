"""The fitted hybrid model: factors, attribute map, projection and prediction."""
from __future__ import annotations

import time
import warnings

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator
from sklearn.exceptions import ConvergenceWarning

from hybrid.common.errors import InputError
from hybrid.common.limits import ESTIMATOR, check_estimator, threads
from hybrid.common.seeds import stream
from hybrid.core.launch import launch_offset
from hybrid.core.penalties import NAMES as PENALTIES
from hybrid.core.penalties import SEARCH_RATINGS, START, choose_penalties, user_sample
from hybrid.core.ranksearch import search_rank
from hybrid.core.steps import Problem, RatingData, objective
from hybrid.core.train import fit_factors
from hybrid.engines.cluster import on_a_worker, training_data
from hybrid.engines.engine import LOCAL, Engine
from hybrid.estimator.features import AttributeEncoder
from hybrid.estimator.fitted import FittedViews
from hybrid.estimator.persist import load_model, save_model
from hybrid.estimator.predictions import Scores
from hybrid.io.tables import (
    check_items_described,
    validate_attributes,
    validate_ratings,
)

# the attributes a fit sets and a model file keeps; every other fitted attribute is derived
# from them by ``set_fitted``, which is the only code that writes any of them
FITTED = ("features_", "user_ids_", "item_ids_", "item_table_", "attributes_", "ratings_", "factors_", "mu_",
          "sigma2_", "sigma2_new_", "prior_weight_", "lam_user_", "lam_item_", "lam_map_", "penalty_path_",
          "rank_", "rank_path_", "launched_", "launch_offset_", "launch_spread_", "metrics_", "extras_", "settings_")
_D = {name: setting.default for name, setting in ESTIMATOR.items()}   # the defaults, from the one table
_EMPTY = {"item_table_": lambda: None, "extras_": dict, "settings_": lambda: None}


class HybridFactorModel(Scores, FittedViews, BaseEstimator):
    """Low-rank rating factors fitted jointly with a map from item attributes.

    Parameters
    ----------
    rank : int
        Dimensions of the user and item vectors (with ``'held-out'`` rank
        choice, the most allowed).  A rank larger than the data supports is
        harmless at the default ``'auto'`` penalties, which grow with it: the
        extra dimensions keep almost no prior spread (``dimension_spread_``,
        ``dimensions_with_signal_``).  With ``rank_choice='held-out'`` the fit
        grows the model one rank at a time and keeps the rank whose held-out
        error is lowest (``rank_``, at most ``rank``; :mod:`hybrid.core.ranksearch`).
    rank_choice : {'fixed', 'held-out'}
        How the fitted rank ``rank_`` is chosen (see ``rank``).  ``'held-out'``
        is opt-in for now: on MovieLens it makes every rank from 2 to 64 give
        the same model, but it stops at rank 1 to 2 where 3 to 4 fit best
        (:mod:`hybrid.core.ranksearch`).
    lam_user, lam_item, lam_map : float or 'auto'
        Regularisation of user blocks, of item blocks around their attribute
        projection (the fixed prior, and the learned prior's starting point),
        and of the map.  ``'auto'`` (the default) chooses the penalty on a
        seeded tenth of the training ratings (:mod:`hybrid.core.penalties`), so it
        grows with the rank; a number fixes it.  The values used are
        ``lam_user_``, ``lam_item_`` and ``lam_map_``.
    epochs : int
        Most alternating epochs.
    tol : float
        Stop when the objective changes by less than this fraction.
    seed : int
        Seed of the initial item vectors and of the holdout draw.
    schema : dict, optional
        ``{column: 'text'|'category'|'tags'|'number'|'ignore'}`` or
        ``{column: {"type": ..., "weight": w}}``; ``None`` uses no attributes
        beyond an intercept.
    prior : {'learned', 'fixed'}
        ``'learned'`` estimates how far items fall from their projection
        (cross-fitted EM, :mod:`hybrid.core.prior`) for the planner's uncertainty
        (``prior_covariance_``); ``'fixed'`` takes ``sigma2_ / lam_item_ * I``.
        The fit itself uses the chosen penalties either way.
    map_weighting : {'none', 'precision', 'bias'}
        ``'precision'`` weights each item's prior term, and so its pull on the
        map, by ``n / (n + weight_half)`` for an item with ``n`` ratings: items
        whose ratings barely determine them (often unlike the items a new one
        will be compared with) pull the map less.  ``'bias'`` weights only the
        bias coordinate's prior, by ``1 + n / weight_half``, so the bias part of
        the map follows the items in proportion to their ratings (what a new
        item's future ratings will average) while the vectors, which the planner
        reads, keep one prior; the prior then couples no bias with a vector.
    weight_half : float
        With ``'precision'`` the rating count at which an item weighs half; with
        ``'bias'`` the count that adds one to the bias weight.
    launch_offset : {'learned', 'none'}
        ``'learned'`` measures, after the fit, how far projections fall short on
        the ratings items then get (out of sample, rating-weighted;
        :mod:`hybrid.core.launch`) and adds that to the bias of every item that had
        no ratings when the model was fitted, and of items added since: the
        expected rating of a new item is then what its future ratings should
        average, not what the typical item's do.  The value is
        ``launch_offset_``; items that had ratings at the fit keep their
        projection as prior mean.  Needs biases.
    holdout : float
        Fraction of ratings kept aside to report validation RMSE per epoch.
    biases : bool
        Fit user and item biases.
    n_jobs : int
        Threads for the block solves; ``-1`` (the default) uses every core the
        process may run on (:func:`hybrid.common.limits.threads`).  The fitted model
        does not depend on it.
    text_max_features, text_min_df, text_ngrams, tag_separator
        Attribute encoding, see :class:`hybrid.estimator.features.AttributeEncoder`.

    Where the fit runs (this process or a Dask cluster) is not a setting: it is ``fit``'s
    ``engine`` argument, and the fitted model is the same either way.  Every setting's default
    and allowed values come from :data:`hybrid.common.limits.SETTINGS`.

    The fit minimises (``z_i = [b_i, x_i]``, ``w_u = [b_u, theta_u]``)::

        sum_(i,u) (r_iu - mu - b_u - b_i - theta_u . x_i)^2 + lam_user sum_u |w_u|^2
          + sum_i c_i (z_i - W^T a_i)^T P (z_i - W^T a_i) + lam_map |W|^2

    over users, items and the attribute map ``W`` by exact alternating block solves
    (:mod:`hybrid.core.train`), with ``P = lam_item I`` and ``c_i`` the map weighting.

    Attributes
    ----------
    user_ids_, item_ids_ : ndarray of str
        The users and items the model knows, in the order of its arrays.
    item_blocks_, user_blocks_ : ndarray
        Rows ``[b_i, x_i]`` and ``[b_u, theta_u]`` (no bias column without biases).
    map_ : ndarray
        The attribute map ``W`` (features x block).
    mu_, sigma2_, sigma2_new_ : float
        The global mean; the noise variance of the fit, and of a rating its raters were not
        fitted to.
    lam_user_, lam_item_, lam_map_ : float
        The penalties used (chosen ones with ``'auto'``); ``penalty_path_`` the search's steps.
    rank_ : int
        The fitted rank; ``rank_path_`` the rank search's levels.
    prior_covariance_, prior_precision_ : ndarray
        The item prior around the attribute projection.
    launch_offset_ : float
        Added to the bias of items that had no ratings at the fit; ``launched_`` marks them.
    launch_spread_ : float
        The variance of a new item's average rating around its launch score, beyond the noise
        of its ratings, measured out of sample (:func:`hybrid.core.launch.launch_offset`; NaN
        when not measured): the width of the scores' intervals.
    item_counts_, user_counts_ : ndarray of int
        Ratings per item and per user; ``rating_range_`` the lowest and highest rating.
    history_ : list of dict
        One record per epoch (objective, RMSEs, seconds); ``n_iter_`` the epochs run.
    metrics_ : dict
        The fit's figures (sizes, RMSEs, penalties, seconds by stage, the engine it ran on).
    features_ : AttributeEncoder
        The fitted attribute encoding; ``attributes_`` the items' encoded rows.

    Examples
    --------
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=300, n_lots=60, n_new=5, seed=1)
    >>> m = HybridFactorModel(rank=4, epochs=5, schema=club.schema).fit(club.ratings, club.lots)
    >>> m.predict(["M0001"], [club.new_lots.index[0]], attributes=club.new_lots).shape
    (1,)
    """

    def __init__(self, *, rank=_D["rank"], rank_choice=_D["rank_choice"], lam_user=_D["lam_user"],
                 lam_item=_D["lam_item"], lam_map=_D["lam_map"], epochs=_D["epochs"], tol=_D["tol"], seed=_D["seed"],
                 schema=None, prior=_D["prior"], map_weighting=_D["map_weighting"], weight_half=_D["weight_half"],
                 launch_offset=_D["launch_offset"], holdout=_D["holdout"], biases=_D["biases"], n_jobs=_D["n_jobs"],
                 text_max_features=_D["text_max_features"], text_min_df=_D["text_min_df"],
                 text_ngrams=_D["text_ngrams"], tag_separator=_D["tag_separator"]):
        self.rank = rank
        self.rank_choice = rank_choice
        self.lam_user = lam_user
        self.lam_item = lam_item
        self.lam_map = lam_map
        self.epochs = epochs
        self.tol = tol
        self.seed = seed
        self.schema = schema
        self.prior = prior
        self.map_weighting = map_weighting
        self.weight_half = weight_half
        self.launch_offset = launch_offset
        self.holdout = holdout
        self.biases = biases
        self.n_jobs = n_jobs
        self.text_max_features = text_max_features
        self.text_min_df = text_min_df
        self.text_ngrams = text_ngrams
        self.tag_separator = tag_separator

    def _check_params(self):
        check_estimator(self.get_params())

    def fit(self, ratings: pd.DataFrame, attributes: pd.DataFrame | None = None, on_epoch=None, *,
            engine: Engine | None = None):
        """Fit factors and map jointly.

        Parameters
        ----------
        ratings : DataFrame
            Columns ``user``, ``item``, ``rating``.
        attributes : DataFrame, optional
            Indexed by item id, columns per ``schema``.  Every rated item
            needs a row; rows of unrated items are fitted as cold items.
        on_epoch : callable, optional
            Called with each epoch's record (for progress display).
        engine : Engine, optional
            Where the half-steps run (:class:`hybrid.engines.engine.Engine`); this process if
            not given.  Recorded in ``metrics_["engine"]``; the fitted model does not depend on it.

        Returns
        -------
        self
        """
        self._check_params()
        engine = LOCAL if engine is None else engine
        if not isinstance(engine, Engine):
            raise InputError(f"engine must be an Engine (hybrid.engines.engine.Engine), found {engine!r}")
        t0 = time.perf_counter()
        ratings = validate_ratings(ratings, {"user": "user", "item": "item", "rating": "rating"},
                                   scale=(-np.inf, np.inf), source="ratings")
        schema = self.schema or {}
        if attributes is None:
            attributes = pd.DataFrame(index=pd.Index(ratings["item"].unique(), name="item"))
        attributes = validate_attributes(attributes, None, AttributeEncoder(schema).spec(),
                                         source="attributes")
        check_items_described(ratings, attributes)
        features = AttributeEncoder(schema, self.text_max_features, self.text_min_df,
                                    self.text_ngrams, self.tag_separator).fit(attributes)
        item_ids = attributes.index.to_numpy(dtype=str)
        user_ids = np.unique(ratings["user"].to_numpy(dtype=str))
        u = np.searchsorted(user_ids, ratings["user"].to_numpy(dtype=str))
        i = pd.Index(item_ids).get_indexer(ratings["item"])
        r = ratings["rating"].to_numpy(float)
        train, valid = self._holdout_split(len(r))
        for name in FITTED:   # a refit starts from nothing
            self.__dict__.pop(name, None)
        self.set_fitted(
            features_=features, item_ids_=item_ids, user_ids_=user_ids,
            # the raw table, as text, for priorities and reports (never used to fit)
            item_table_=attributes.astype(str).set_axis(pd.Index(item_ids, name="item"), axis=0),
            attributes_=features.transform(attributes),
            ratings_=(u[train].astype(np.int32), i[train].astype(np.int32), r[train]))
        stages = {"prepare": time.perf_counter() - t0}
        mark = time.perf_counter()
        self.set_fitted(**self._choose_rank())
        stages["rank search"], mark = time.perf_counter() - mark, time.perf_counter()
        with training_data(self, engine) as data:
            stages["prepare"] += time.perf_counter() - mark    # the engine's copy of the ratings
            mark = time.perf_counter()
            self.set_fitted(**self._choose_penalties(data))
            stages["penalty search"], mark = time.perf_counter() - mark, time.perf_counter()
            validate = None
            if valid.size:
                uv, iv, rv = u[valid], i[valid], r[valid]
                validate = lambda F: float(np.sqrt(np.mean((rv - self.predict_codes(F, data.mu, uv, iv)) ** 2)))
            weight = self.weight_for_counts(data.item_counts())
            problem = Problem.of(data, self.attributes_, lam_user=self.lam_user_, lam_map=self.lam_map_, weight=weight)
            F, sigma2, sigma2_new = fit_factors(
                problem, rank=self.rank_, lam_item=self.lam_item_, epochs=self.epochs, tol=self.tol, seed=self.seed,
                biases=self.biases, prior=self.prior, n_jobs=threads(self.n_jobs), validate=validate,
                on_epoch=on_epoch)
            final = objective(data, F, self.attributes_, self.lam_user_, self.lam_map_, weight)
            self.set_fitted(factors_=F, mu_=float(data.mu), sigma2_=float(sigma2), sigma2_new_=float(sigma2_new),
                            prior_weight_=weight)
            stages["epochs"] = sum(h["seconds"] for h in F.history)
            stages["learned prior"] = F.timings.get("learned prior", 0.0)
            stages["other fitting"] = time.perf_counter() - mark - stages["epochs"] - stages["learned prior"]
            mark = time.perf_counter()
            self.set_fitted(**self._launch(weight, data))   # where the ratings are (a cluster's workers)
            stages["launch offset"] = time.perf_counter() - mark
        self._warn_if_unconverged(F.history)
        last = dict(F.history[-1])
        # the final state (after the learned prior and the last item step) is what is reported
        last["objective"], sse = final
        last["train_rmse"] = float(np.sqrt(sse / data.nnz))
        last["valid_rmse"] = validate(F) if validate else float("nan")
        self.set_fitted(metrics_={
            "n_users": len(self.user_ids_), "n_items": len(self.item_ids_),
            "n_rated_items": int((self.item_counts_ > 0).sum()), "n_ratings": int(train.size),
            "n_holdout": int(valid.size), "n_features": int(self.attributes_.shape[1]),
            "epochs_run": len(F.history), "objective": last["objective"],
            "rank": self.rank_, "rank_path": [list(p) for p in self.rank_path_],
            "train_rmse": last["train_rmse"],
            "valid_rmse": last["valid_rmse"] if valid.size else None,
            "sigma2": self.sigma2_, "sigma2_new": self.sigma2_new_, "lam_user": self.lam_user_,
            "lam_item": self.lam_item_, "lam_map": self.lam_map_,
            "penalty_path": [[p, e] for p, e in self.penalty_path_],
            "variance_scales": list(F.scales), "loop_scales": [list(pair) for pair in F.loop_scales],
            "launch_offset": self.launch_offset_,
            "launch_spread": self.launch_spread_,
            "seconds": time.perf_counter() - t0, "stage_seconds": stages, "engine": engine.provenance()})
        return self

    def _warn_if_unconverged(self, history):
        last = history[-1]["objective"]
        before = history[-2]["objective"] if len(history) > 1 else np.inf
        if self.tol > 0 and len(history) == self.epochs and abs(before - last) > self.tol * abs(last):
            warnings.warn(f"the fit used all {self.epochs} epochs before the objective settled "
                          f"(last change {abs(before - last) / abs(last):.1e} of it, tol {self.tol:g}); "
                          "more epochs may fit better", ConvergenceWarning, stacklevel=3)

    def _choose_penalties(self, data) -> dict:
        """``lam_user_``, ``lam_item_``, ``lam_map_`` and ``penalty_path_`` (empty when all fixed).

        The search runs where ``data`` lives: here, or on one of a cluster's workers with the
        seeded sample of users it searches on (the client never builds a rating matrix)."""
        given = {name: getattr(self, name) for name in PENALTIES}
        path = []
        if all(given[name] != "auto" for name in PENALTIES):
            chosen = {name: float(v) for name, v in given.items()}
        else:
            shape = (len(self.user_ids_), len(self.item_ids_))
            keep = user_sample(self.ratings_[0], SEARCH_RATINGS, self.seed)
            sample = tuple(c[keep] for c in self.ratings_)
            chosen, path = on_a_worker(
                data, choose_penalties, sample, shape, self.attributes_, rank=self.rank_, given=given,
                biases=self.biases, seed=self.seed, most=len(sample[0]),
                n_jobs=1 if hasattr(data, "client") else threads(self.n_jobs))
        return {"penalty_path_": path, **{name + "_": float(chosen[name]) for name in PENALTIES}}

    def _choose_rank(self) -> dict:
        """``rank_`` and ``rank_path_`` (the rank search's levels; empty when fixed)."""
        if self.rank_choice == "fixed":
            return {"rank_": int(self.rank), "rank_path_": []}
        shape = (len(self.user_ids_), len(self.item_ids_))
        # the levels use the given penalties, or the search's starting ones; the penalties
        # are then chosen at the rank found (so any larger allowed rank gives the same fit)
        lam = {name: START[name] if getattr(self, name) == "auto" else float(getattr(self, name))
               for name in PENALTIES}
        rank, path = search_rank(
            self.ratings_, shape, self.attributes_, most=int(self.rank), **lam, biases=self.biases,
            seed=self.seed, n_jobs=threads(self.n_jobs))
        return {"rank_": rank, "rank_path_": path}

    def _holdout_split(self, n):
        idx = np.arange(n)
        if not self.holdout:
            return idx, idx[:0]
        mask = stream(self.seed, "holdout").random(n) < self.holdout
        return idx[~mask], idx[mask]

    def rating_data(self) -> RatingData:
        """The model's ratings as the trainer's :class:`~hybrid.core.steps.RatingData`."""
        u, i, r = self.ratings_
        mu = getattr(self, "mu_", None)
        return RatingData.from_codes(u, i, r, len(self.user_ids_), len(self.item_ids_), mu)

    def weight_for_counts(self, counts):
        """Per-item multiplier of the prior term (ones unless the map is weighted)."""
        counts = np.asarray(counts, float)
        if self.map_weighting == "none":
            return np.ones(len(counts))
        if self.map_weighting == "bias":   # (n, d): the bias coordinate's weight, ones elsewhere
            weight = np.ones((len(counts), self.rank_ + 1))
            weight[:, 0] = 1.0 + counts / self.weight_half
            return weight
        # poorly rated items pull the map less (they are a selected, unlike set:
        # rarely rated products are rated lower), and no weight is zero.  An item
        # with no ratings takes no part in the map fit, so its weight only sets its
        # prior: it keeps the learned spread around its projection (weight 1)
        return np.where(counts == 0, 1.0, np.maximum(counts / (counts + self.weight_half), 0.05))

    def _launch(self, weight, data) -> dict:
        """Measure the launch offset on the fit's ``data`` and move the unrated items' bias by
        it (their blocks are their prior means)."""
        launched = self.item_counts_ == 0
        offset, spread = 0.0, float("nan")
        if self.launch_offset == "learned":
            offset, spread = launch_offset(data, self.factors_, self.attributes_, weight, self.lam_map_,
                                           noise=self.sigma2_new_)
        self.set_fitted(launched_=launched, launch_offset_=offset, launch_spread_=spread)
        self.factors_.item[:, 0] += self.prior_shift()
        return {"factors_": self.factors_}

    def prior_shift(self, rows=None):
        """What each item's prior mean adds to its projection's bias (zeros without biases)."""
        launched = self.launched_ if rows is None else self.launched_[rows]
        return self.launch_offset_ * launched if self.biases else np.zeros(len(launched))

    def set_fitted(self, **state):
        """Set fitted attributes and derive the others: the one place fitted state is written.

        Fitting, loading a model file, folding in ratings and adding items all come here, so
        the counts, the rating range, ``history_``, ``n_iter_`` and the metrics' counts always
        agree with the ratings and factors the model holds.  Names are those of ``FITTED``;
        attributes not given keep their values.  Returns ``self``.
        """
        unknown = sorted(set(state) - set(FITTED))
        if unknown:
            raise TypeError(f"{unknown[0]!r} is not a fitted attribute of HybridFactorModel")
        for name in FITTED:
            if name in state:
                self.__dict__[name] = state[name]
            elif name in _EMPTY and name not in self.__dict__:
                self.__dict__[name] = _EMPTY[name]()
        if "ratings_" in self.__dict__:
            u, i, r = self.ratings_
            self.item_counts_ = np.bincount(i, minlength=len(self.item_ids_))
            self.user_counts_ = np.bincount(u, minlength=len(self.user_ids_))
            self.rating_range_ = (float(np.min(r)), float(np.max(r))) if len(r) else (np.nan, np.nan)
        if "factors_" in self.__dict__:
            self.history_ = list(self.factors_.history)
            self.n_iter_ = len(self.history_)
        if self.__dict__.get("metrics_"):
            self.metrics_.update(n_users=len(self.user_ids_), n_items=len(self.item_ids_),
                                 n_rated_items=int((self.item_counts_ > 0).sum()),
                                 n_ratings=int(len(self.ratings_[2])))
        return self

    # ------------------------------------------------------------ fold-in
    def fold_in(self, ratings: pd.DataFrame, attributes: pd.DataFrame | None = None):
        """Add new ratings and re-solve only the users and items they touch.

        New items need an attribute row; new users are added.  See
        :func:`hybrid.estimator.updates.fold_in`.

        Returns
        -------
        self
        """
        from hybrid.estimator.updates import fold_in
        return fold_in(self, ratings, attributes)

    def add_items(self, attributes: pd.DataFrame):
        """Add items with no ratings (their blocks are their projections); known ids are skipped.

        Returns
        -------
        self
        """
        from hybrid.estimator.updates import add_items
        return add_items(self, attributes)

    # --------------------------------------------------------------- misc
    def related(self, items, k: int = 5, metric: str = "euclidean", among=None,
                attributes: pd.DataFrame | None = None) -> pd.DataFrame:
        """Nearest items by distance between item vectors; see :func:`hybrid.estimator.related.related`."""
        from hybrid.estimator.related import related
        return related(self, items, k=k, metric=metric, among=among, attributes=attributes)

    def save(self, path) -> None:
        """Write the model file (JSON manifest + arrays, no pickle; :mod:`hybrid.estimator.persist`)."""
        save_model(self, path)

    @classmethod
    def load(cls, path) -> "HybridFactorModel":
        """Read a model file written by :meth:`save` (also ``hybrid.load``)."""
        return load_model(path, cls)
