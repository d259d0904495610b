"""The fitted hybrid model: factors, attribute map, projection and prediction."""
from __future__ import annotations

import time

import numpy as np
import pandas as pd

from .data import check_items_described, validate_attributes, validate_ratings
from .errors import InputError
from .features import AttributeEncoder
from .cluster import training_data
from .launch import launch_offset
from .limits import threads
from .penalties import NAMES as PENALTIES, START, choose_penalties
from .ranksearch import search_rank
from .scores import Scores
from .train import Factors, RatingData, fit_factors, objective

_PARAMS = ("rank", "rank_choice", "lam_user", "lam_item", "lam_map", "epochs", "tol", "seed", "schema",
           "prior", "map_weighting", "weight_half", "launch_offset", "holdout", "biases", "n_jobs",
           "text_max_features", "text_min_df", "text_ngrams", "tag_separator", "engine", "address",
           "partitions", "shared_dir")


class HybridFactorModel(Scores):
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
        error is lowest (``rank_``, at most ``rank``; :mod:`hybrid.ranksearch`).
    rank_choice : {'fixed', 'held-out'}
        How the fitted rank ``rank_`` is chosen (see ``rank``).  ``'held-out'``
        is opt-in for now: on MovieLens it makes every rank from 2 to 64 give
        the same model, but it stops at rank 1 to 2 where 3 to 4 fit best
        (:mod:`hybrid.ranksearch`).
    lam_user, lam_item, lam_map : float or 'auto'
        Regularisation of user blocks, of item blocks around their attribute
        projection (the fixed prior, and the learned prior's starting point),
        and of the map.  ``'auto'`` (the default) chooses the penalty on a
        seeded tenth of the training ratings (:mod:`hybrid.penalties`), so it
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
        (cross-fitted EM, :mod:`hybrid.prior`) for the planner's uncertainty
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
        :mod:`hybrid.launch`) and adds that to the bias of every item that had
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
        process may run on (:func:`hybrid.limits.threads`).  The fitted model
        does not depend on it.
    text_max_features, text_min_df, text_ngrams, tag_separator
        Attribute encoding, see :class:`hybrid.features.AttributeEncoder`.
    engine : {'local', 'dask'}
        Where the training's half-steps run: this process, or a Dask cluster
        (:mod:`hybrid.cluster`; needs the ``dask`` extra).  The fitted model is
        the same either way.
    address : str, optional
        With ``'dask'``: the scheduler (``tcp://host:8786``); ``None`` starts a
        local cluster of two worker processes for the fit.
    partitions : int
        With ``'dask'``: blocks per side of the rating matrix.
    shared_dir : str, optional
        With ``'dask'``: a folder every worker can read, where the partitioned
        ratings are written for the fit (and removed after); ``None`` uses the
        temporary folder, which suits a cluster on this machine only.

    Examples
    --------
    >>> from hybrid.samples import tasting_club
    >>> club = tasting_club(n_members=300, n_lots=60, n_new=5, seed=1)
    >>> m = HybridFactorModel(rank=4, epochs=5, schema=club.schema).fit(club.ratings, club.lots)
    >>> m.predict(["M0001"], [club.new_lots.index[0]], attributes=club.new_lots).shape
    (1,)
    """

    def __init__(self, rank=16, rank_choice="fixed", lam_user="auto", lam_item="auto", lam_map="auto", epochs=25,
                 tol=1e-5, seed=0, schema=None, prior="learned", map_weighting="none", weight_half=20.0,
                 launch_offset="learned", holdout=0.0,
                 biases=True, n_jobs=-1, text_max_features=2000, text_min_df=2, text_ngrams=1,
                 tag_separator="|", engine="local", address=None, partitions=8,
                 shared_dir=None):
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
        self.engine = engine
        self.address = address
        self.partitions = partitions
        self.shared_dir = shared_dir

    def get_params(self) -> dict:
        """Hyper-parameters as given to ``__init__``."""
        return {k: getattr(self, k) for k in _PARAMS}

    def _check_params(self):
        for name in ("lam_user", "lam_item", "lam_map"):
            value = getattr(self, name)
            if isinstance(value, str) and value == "auto":
                continue
            if not (isinstance(value, (int, float, np.floating)) and value > 0):
                raise InputError(f"{name} must be a number > 0 or 'auto', found {value!r}")
        if not (isinstance(self.rank, (int, np.integer)) and self.rank >= 1):
            raise InputError(f"rank must be a whole number >= 1, found {self.rank!r}")
        if self.rank_choice not in ("held-out", "fixed"):
            raise InputError(f"rank_choice must be 'held-out' or 'fixed', found {self.rank_choice!r}")
        if self.prior not in ("learned", "fixed"):
            raise InputError(f"prior must be 'learned' or 'fixed', found {self.prior!r}")
        if self.map_weighting not in ("none", "precision", "bias"):
            raise InputError(f"map_weighting must be 'none', 'precision' or 'bias', found {self.map_weighting!r}")
        if self.map_weighting == "bias" and not self.biases:
            raise InputError("map_weighting 'bias' needs biases = true")
        if self.launch_offset not in ("learned", "none"):
            raise InputError(f"launch_offset must be 'learned' or 'none', found {self.launch_offset!r}")
        if not 0 <= self.holdout < 1:
            raise InputError(f"holdout must be in [0, 1), found {self.holdout!r}")
        if self.engine not in ("local", "dask"):
            raise InputError(f"engine must be 'local' or 'dask', found {self.engine!r}")
        threads(self.n_jobs)
        if not (isinstance(self.partitions, (int, np.integer)) and self.partitions >= 1):
            raise InputError(f"partitions must be a whole number >= 1, found {self.partitions!r}")

    # ----------------------------------------------------------------- fit
    def fit(self, ratings: pd.DataFrame, attributes: pd.DataFrame | None = None, on_epoch=None):
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

        Returns
        -------
        self
        """
        self._check_params()
        t0 = time.perf_counter()
        ratings = validate_ratings(ratings, {"user": "user", "item": "item", "rating": "rating"},
                                   scale=(-np.inf, np.inf), source="ratings")
        schema = self.schema or {}
        if attributes is None:
            attributes = pd.DataFrame(index=pd.Index(ratings["item"].unique(), name="item"))
        attributes = validate_attributes(attributes, None, AttributeEncoder(schema)._spec(),
                                         source="attributes")
        check_items_described(ratings, attributes)
        self.features_ = AttributeEncoder(schema, self.text_max_features, self.text_min_df,
                                          self.text_ngrams, self.tag_separator).fit(attributes)
        self.item_ids_ = attributes.index.to_numpy(dtype=str)
        # the raw table, as text, for priorities and reports (never used to fit)
        self.item_table_ = attributes.astype(str).set_axis(pd.Index(self.item_ids_, name="item"), axis=0)
        self.user_ids_ = np.unique(ratings["user"].to_numpy(dtype=str))
        self.attributes_ = self.features_.transform(attributes)
        u = np.searchsorted(self.user_ids_, ratings["user"].to_numpy(dtype=str))
        i = pd.Index(self.item_ids_).get_indexer(ratings["item"])
        r = ratings["rating"].to_numpy(float)
        train, valid = self._holdout_split(len(r))
        self.ratings_ = (u[train].astype(np.int32), i[train].astype(np.int32), r[train])
        stages = {"prepare": time.perf_counter() - t0}
        mark = time.perf_counter()
        self._choose_rank()
        stages["rank search"], mark = time.perf_counter() - mark, time.perf_counter()
        self._choose_penalties()
        stages["penalty search"], mark = time.perf_counter() - mark, time.perf_counter()
        with training_data(self) as data:
            validate = None
            if valid.size:
                uv, iv, rv = u[valid], i[valid], r[valid]
                validate = lambda F: float(np.sqrt(np.mean((rv - self._predict_codes(F, data.mu, uv, iv)) ** 2)))
            weight = self._prior_weight(data)
            F, sigma2, sigma2_new = fit_factors(
                data, self.attributes_, rank=self.rank_, lam_user=self.lam_user_, lam_item=self.lam_item_,
                lam_map=self.lam_map_, epochs=self.epochs, tol=self.tol, seed=self.seed, prior=self.prior, weight=weight,
                biases=self.biases, n_jobs=threads(self.n_jobs), validate=validate, on_epoch=on_epoch)
            final = objective(data, F, self.attributes_, self.lam_user_, self.lam_map_, weight)
        self._set_factors(F, data.mu, sigma2, weight, sigma2_new)
        stages["epochs"] = sum(h["seconds"] for h in F.history)
        stages["learned prior"] = F.timings.get("learned prior", 0.0)
        stages["other fitting"] = time.perf_counter() - mark - stages["epochs"] - stages["learned prior"]
        mark = time.perf_counter()
        self._set_launch(weight)
        stages["launch offset"] = time.perf_counter() - mark
        last = dict(F.history[-1])
        # the final state (after the learned prior and the last item step) is what is reported
        last["objective"], sse = final
        last["train_rmse"] = float(np.sqrt(sse / data.nnz))
        last["valid_rmse"] = validate(F) if validate else float("nan")
        self.metrics_ = {"n_users": len(self.user_ids_), "n_items": len(self.item_ids_),
                         "n_rated_items": int((self.item_counts_ > 0).sum()), "n_ratings": int(train.size),
                         "n_holdout": int(valid.size), "n_features": int(self.attributes_.shape[1]),
                         "epochs_run": len(F.history), "objective": last["objective"],
                         "rank": self.rank_, "rank_path": [list(p) for p in self.rank_path_],
                         "train_rmse": last["train_rmse"],
                         "valid_rmse": last["valid_rmse"] if valid.size else None,
                         "sigma2": self.sigma2_, "sigma2_new": self.sigma2_new_, "lam_user": self.lam_user_,
                         "lam_item": self.lam_item_, "lam_map": self.lam_map_,
                         "penalty_path": [[p, e] for p, e in self.penalty_path_],
                         "variance_scales": list(F.scales), "launch_offset": self.launch_offset_,
                         "seconds": time.perf_counter() - t0, "stage_seconds": stages}
        return self

    def _choose_penalties(self):
        """Set ``lam_user_``, ``lam_item_``, ``lam_map_`` and ``penalty_path_`` (empty when all fixed)."""
        given = {name: getattr(self, name) for name in PENALTIES}
        self.penalty_path_ = []
        if all(given[name] != "auto" for name in PENALTIES):
            chosen = {name: float(v) for name, v in given.items()}
        else:
            shape = (len(self.user_ids_), len(self.item_ids_))
            chosen, self.penalty_path_ = choose_penalties(
                self.ratings_, shape, self.attributes_, rank=self.rank_, given=given, biases=self.biases,
                seed=self.seed, n_jobs=threads(self.n_jobs))
        for name in PENALTIES:
            setattr(self, name + "_", float(chosen[name]))

    def _choose_rank(self):
        """Set ``rank_`` and ``rank_path_`` (the rank search's levels; empty when fixed)."""
        self.rank_, self.rank_path_ = int(self.rank), []
        if self.rank_choice == "fixed":
            return
        shape = (len(self.user_ids_), len(self.item_ids_))
        # the levels use the given penalties, or the search's starting ones; the penalties
        # are then chosen at the rank found (so any larger allowed rank gives the same fit)
        lam = {name: START[name] if getattr(self, name) == "auto" else float(getattr(self, name))
               for name in PENALTIES}
        self.rank_, self.rank_path_ = search_rank(
            self.ratings_, shape, self.attributes_, most=int(self.rank), **lam, biases=self.biases,
            seed=self.seed, n_jobs=threads(self.n_jobs))

    def _holdout_split(self, n):
        idx = np.arange(n)
        if not self.holdout:
            return idx, idx[:0]
        mask = np.random.default_rng(self.seed + 1).random(n) < self.holdout
        return idx[~mask], idx[mask]

    def _data(self) -> RatingData:
        u, i, r = self.ratings_
        mu = getattr(self, "mu_", None)
        return RatingData.from_codes(u, i, r, len(self.user_ids_), len(self.item_ids_), mu)

    def _prior_weight(self, data):
        return self._weight_for_counts(data.item_counts())

    def _weight_for_counts(self, counts):
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

    def _set_launch(self, weight):
        """Measure the launch offset and move the unrated items' bias by it (their
        blocks are their prior means)."""
        self.launched_ = self.item_counts_ == 0
        self.launch_offset_ = 0.0
        if self.launch_offset == "learned":
            u, i, r = self.ratings_
            self.launch_offset_ = launch_offset(u, i, r, self.mu_, self.factors_, self.attributes_, weight,
                                                self.lam_map_)
        self.factors_.item[:, 0] += self._prior_shift()

    def _prior_shift(self, rows=None):
        """What each item's prior mean adds to its projection's bias (zeros without biases)."""
        launched = self.launched_ if rows is None else self.launched_[rows]
        return self.launch_offset_ * launched if self.biases else np.zeros(len(launched))

    def _set_factors(self, F: Factors, mu, sigma2, weight, sigma2_new=None):
        self.factors_ = F
        self.mu_ = float(mu)
        self.sigma2_ = float(sigma2)
        self.sigma2_new_ = float(sigma2 if sigma2_new is None else sigma2_new)
        self.prior_weight_ = weight
        self.history_ = list(F.history)
        self.item_counts_ = np.bincount(self.ratings_[1], minlength=len(self.item_ids_))
        self.user_counts_ = np.bincount(self.ratings_[0], minlength=len(self.user_ids_))
        self.rating_range_ = (float(np.min(self.ratings_[2])), float(np.max(self.ratings_[2])))

    # ------------------------------------------------------------- access
    def _fitted(self):
        if not hasattr(self, "factors_"):
            raise InputError("this model is not fitted yet; call fit() first")
        return self.factors_

    @property
    def item_blocks_(self):
        """Rows ``[b_i, x_i]`` of every known item."""
        return self._fitted().item

    @property
    def user_blocks_(self):
        """Rows ``[b_u, theta_u]`` of every known user."""
        return self._fitted().user

    @property
    def fingerprint_(self):
        """16 hex digits of a SHA-256 over the ids, the fitted blocks and the rating counts:
        what a plan was made from, so a report can refuse a plan from another model (or from
        this model before an ``update``)."""
        import hashlib

        F = self._fitted()
        h = hashlib.sha256()
        for part in (self.user_ids_, self.item_ids_):
            h.update("\x1f".join(map(str, part)).encode("utf-8") + b"\x1e")
        for array in (F.user, F.item, self.item_counts_):
            h.update(np.ascontiguousarray(array, dtype=np.float64).tobytes())
        return h.hexdigest()[:16]

    @property
    def map_(self):
        """The attribute map ``W`` (features x block)."""
        return self._fitted().W

    @property
    def prior_precision_(self):
        """Item prior precision ``P`` of the fit (block x block); the prior covariance is
        :attr:`prior_covariance_` = ``sigma2_ * P^-1``."""
        return self._fitted().P

    @property
    def prior_covariance_(self):
        """How far an item's block falls from its attribute projection (covariance): the
        learned spread with ``prior='learned'``, else ``sigma2_ * P^-1``."""
        F = self._fitted()
        return F.spread if F.spread is not None else self.sigma2_ * np.linalg.inv(F.P)

    @property
    def dimension_spread_(self):
        """Standard deviation of the item prior along each of its principal directions,
        largest first (the bias left out): how much each dimension carries once the
        attributes are known.  Principal directions, because a factor basis is only
        fixed up to a rotation and the prior's own axes are not."""
        Psi = self.prior_covariance_[1:, 1:] if self.biases else self.prior_covariance_
        return np.sqrt(np.clip(np.linalg.eigvalsh(Psi), 0.0, None))[::-1]

    @property
    def dimensions_with_signal_(self):
        """The fewest principal directions that hold 90% of the item prior's variance.

        A rank larger than the data supports leaves its extra directions with almost
        no spread, so this count stays put as the rank grows (an explained-variance
        cut, as in principal components; common practice, the 90% is our choice).
        """
        var = self.dimension_spread_ ** 2
        return int(np.searchsorted(np.cumsum(var) / max(var.sum(), 1e-300), 0.9) + 1)

    @property
    def new_rating_precision_(self):
        """The prior precision on the scale of a new rating, ``sigma2_new_ * Psi^-1``:
        what an item solved from ratings its raters were not fitted to uses."""
        return self.sigma2_new_ * np.linalg.inv(self.prior_covariance_)

    # ------------------------------------------------------------ fold-in
    def fold_in(self, ratings: pd.DataFrame, attributes: pd.DataFrame | None = None):
        """Add new ratings and re-solve only the users and items they touch.

        New items need an attribute row; new users are added.  See
        :func:`hybrid.updates.fold_in`.

        Returns
        -------
        self
        """
        from .updates import fold_in
        return fold_in(self, ratings, attributes)

    def add_items(self, attributes: pd.DataFrame):
        """Add items with no ratings (their blocks are their projections); known ids are skipped.

        Returns
        -------
        self
        """
        from .updates import add_items
        return add_items(self, attributes)

    # --------------------------------------------------------------- misc
    def related(self, items, k: int = 5, metric: str = "euclidean", among=None,
                attributes: pd.DataFrame | None = None) -> pd.DataFrame:
        """Nearest items by distance between item vectors; see :func:`hybrid.related.related`."""
        from .related import related
        return related(self, items, k=k, metric=metric, among=among, attributes=attributes)

    def save(self, path) -> None:
        """Write the model file (JSON manifest + arrays, no pickle)."""
        from .store import save_model
        save_model(self, path)
